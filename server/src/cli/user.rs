//! `ohmline user …`: people who use the pages and the API, and their personal
//! tokens. Secrets (generated passwords, tokens) go to stdout only; actions are
//! recorded in the audit trail with the actor `cli`.

use std::io::{IsTerminal, Read};

use anyhow::{Context, bail};
use clap::Subcommand;

use crate::auth::password::{check_new_password, generate_password, hash_password};
use crate::auth::{Role, hash_token, new_user_token, normalise_email};
use crate::db::{self, Db};

/// `ohmline user …`
#[derive(Debug, Subcommand)]
pub enum UserCmd {
    /// Add a user. Prints a generated password unless one is piped on stdin.
    Add {
        /// E-mail address (the sign-in name).
        #[arg(long)]
        email: String,
        /// viewer, engineer or admin.
        #[arg(long)]
        role: Role,
    },
    /// List users.
    List,
    /// Change a user's role.
    SetRole {
        /// E-mail address.
        #[arg(long)]
        email: String,
        /// viewer, engineer or admin.
        #[arg(long)]
        role: Role,
    },
    /// Delete a user with their sessions and tokens.
    Delete {
        /// E-mail address.
        #[arg(long)]
        email: String,
    },
    /// Issue a personal API token; prints only the token.
    Token {
        /// E-mail address.
        #[arg(long)]
        email: String,
        /// Which script or machine holds it.
        #[arg(long, default_value = "")]
        label: String,
    },
    /// List a user's personal tokens (never the secrets).
    Tokens {
        /// E-mail address.
        #[arg(long)]
        email: String,
    },
    /// Revoke a personal token by id.
    RevokeToken {
        /// Token id (see `user tokens`).
        id: i64,
    },
}

impl clap::ValueEnum for Role {
    fn value_variants<'a>() -> &'a [Self] {
        &Role::ALL
    }
    fn to_possible_value(&self) -> Option<clap::builder::PossibleValue> {
        Some(clap::builder::PossibleValue::new(self.as_str()))
    }
}

async fn user_by_email(db: &Db, email: &str) -> anyhow::Result<db::users::User> {
    let email = normalise_email(email)?;
    db::users::by_email(db, &email).await?.with_context(|| format!("no user {email}"))
}

/// A password piped on stdin (first line), if any.
fn password_from_stdin() -> anyhow::Result<Option<String>> {
    let stdin = std::io::stdin();
    if stdin.is_terminal() {
        return Ok(None);
    }
    let mut text = String::new();
    stdin.lock().read_to_string(&mut text).context("reading the password from stdin")?;
    let first = text.lines().next().unwrap_or("").to_string();
    Ok((!first.is_empty()).then_some(first))
}

/// Adds a user with a checked password (hashed off the async threads) and
/// records it in the audit trail with the actor `cli`.
pub async fn add_user(
    db: &Db,
    email: &str,
    role: Role,
    password: &str,
) -> anyhow::Result<db::users::User> {
    let email = normalise_email(email)?;
    check_new_password(password)?;
    let pw = password.to_string();
    let hash = tokio::task::spawn_blocking(move || hash_password(&pw)).await??;
    let u = db::users::create(db, &email, &hash, role).await?;
    db::audit::record(db, "cli", "user.add", &u.email, &format!("role {role}")).await?;
    Ok(u)
}

/// Issues a personal API token for a user; returns the stored row and the secret.
pub async fn issue_token(
    db: &Db,
    u: &db::users::User,
    label: &str,
) -> anyhow::Result<(db::user_tokens::UserToken, String)> {
    let secret = new_user_token();
    let t = db::user_tokens::insert(db, u.id, &hash_token(&secret), label).await?;
    db::audit::record(db, "cli", "user_token.issue", &u.email, &format!("token {}", t.id)).await?;
    Ok((t, secret))
}

pub async fn user(db: &Db, cmd: UserCmd) -> anyhow::Result<()> {
    match cmd {
        UserCmd::Add { email, role } => {
            let given = password_from_stdin()?;
            let generated = given.is_none();
            let password = given.unwrap_or_else(generate_password);
            let u = add_user(db, &email, role, &password).await?;
            eprintln!("user {} added as {} (id {})", u.email, u.role, u.id);
            if generated {
                println!("{password}");
            }
        }
        UserCmd::List => {
            for u in db::users::list(db).await? {
                println!("{}\t{}\t{}\tadded {}", u.id, u.email, u.role, u.created_at.to_rfc3339());
            }
        }
        UserCmd::SetRole { email, role } => {
            let u = user_by_email(db, &email).await?;
            if u.role == Role::Admin
                && role != Role::Admin
                && db::users::count_with_role(db, Role::Admin).await? <= 1
            {
                bail!("{} is the last admin and keeps the admin role", u.email);
            }
            let updated = db::users::set_role(db, u.id, role).await?;
            db::audit::record(db, "cli", "user.role", &u.email, &format!("{} → {role}", u.role))
                .await?;
            println!("{} is now {}", updated.email, updated.role);
        }
        UserCmd::Delete { email } => {
            let u = user_by_email(db, &email).await?;
            let gone = db::users::delete(db, u.id).await?;
            db::audit::record(
                db,
                "cli",
                "user.delete",
                &gone.email,
                &format!("role {}", gone.role),
            )
            .await?;
            println!("user {} deleted", gone.email);
        }
        UserCmd::Token { email, label } => {
            let u = user_by_email(db, &email).await?;
            let (t, secret) = issue_token(db, &u, &label).await?;
            eprintln!("personal token {} issued for {} ({})", t.id, u.email, u.role);
            println!("{secret}");
        }
        UserCmd::Tokens { email } => {
            let u = user_by_email(db, &email).await?;
            for t in db::user_tokens::list(db, u.id).await? {
                println!(
                    "{}\t{}\tissued {}\t{}\tlast used {}",
                    t.id,
                    t.label,
                    t.created_at.to_rfc3339(),
                    t.revoked_at
                        .map(|x| format!("revoked {}", x.to_rfc3339()))
                        .unwrap_or_else(|| "active".into()),
                    t.last_used_at.map(|x| x.to_rfc3339()).unwrap_or_else(|| "never".into())
                );
            }
        }
        UserCmd::RevokeToken { id } => {
            let t = db::user_tokens::revoke(db, id).await?;
            db::audit::record(
                db,
                "cli",
                "user_token.revoke",
                &t.user_id.to_string(),
                &format!("token {id}"),
            )
            .await?;
            println!(
                "personal token {} revoked at {}",
                t.id,
                t.revoked_at.map(|x| x.to_rfc3339()).unwrap_or_default()
            );
        }
    }
    Ok(())
}
