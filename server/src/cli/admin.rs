//! Registration commands: sites, lines, sequences, tokens, alert recipients.

use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::{Context, bail};
use clap::{Subcommand, ValueEnum};

use crate::auth::{hash_token, new_line_token};
use crate::db::lines::NewLine;
use crate::db::recipients::{Delivery, NewRecipient};
use crate::db::{self, Db};
use crate::files;

/// `ohmline site …`
#[derive(Debug, Subcommand)]
pub enum SiteCmd {
    /// Register a site.
    Add {
        /// Unique name.
        name: String,
        /// Free text.
        #[arg(long, default_value = "")]
        description: String,
    },
    /// List sites.
    List,
}

/// Orientation of a line relative to the embankment.
#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum Orientation {
    /// Along the crest.
    Longitudinal,
    /// Across the embankment.
    Transverse,
}

impl Orientation {
    fn as_str(self) -> &'static str {
        match self {
            Orientation::Longitudinal => "longitudinal",
            Orientation::Transverse => "transverse",
        }
    }
}

/// `ohmline line …`
#[derive(Debug, Subcommand)]
pub enum LineCmd {
    /// Register a line with its electrodes (and optionally its first sequence).
    Add {
        /// Site name.
        #[arg(long)]
        site: String,
        /// Unique slug: lower-case letters, digits and '-', used in URLs.
        #[arg(long)]
        name: String,
        /// Electrodes CSV (columns label,x,z; optional easting,northing).
        #[arg(long, value_name = "FILE")]
        electrodes: PathBuf,
        /// Sequence CSV (columns a,b,m,n with electrode labels).
        #[arg(long, value_name = "FILE")]
        sequence: Option<PathBuf>,
        /// Along the crest or across the embankment.
        #[arg(long, value_enum, default_value = "longitudinal")]
        orientation: Orientation,
        /// Expected time between epochs, e.g. 6h or 90min.
        #[arg(long, default_value = "6h", value_parser = humantime::parse_duration)]
        interval: Duration,
        /// Free text.
        #[arg(long, default_value = "")]
        notes: String,
    },
    /// List lines.
    List,
}

/// `ohmline sequence …`
#[derive(Debug, Subcommand)]
pub enum SequenceCmd {
    /// Store a new version of a line's sequence.
    Add {
        /// Line slug.
        #[arg(long)]
        line: String,
        /// Sequence CSV (columns a,b,m,n with electrode labels).
        #[arg(long, value_name = "FILE")]
        file: PathBuf,
        /// Name of the sequence (default: the file name).
        #[arg(long)]
        name: Option<String>,
    },
    /// List the versions of a line's sequence.
    List {
        /// Line slug.
        #[arg(long)]
        line: String,
    },
}

/// `ohmline token …`
#[derive(Debug, Subcommand)]
pub enum TokenCmd {
    /// Issue a meter token for a line; prints only the token.
    Issue {
        /// Line slug.
        #[arg(long)]
        line: String,
        /// Which meter or person holds it.
        #[arg(long, default_value = "")]
        label: String,
    },
    /// Revoke a token by id.
    Revoke {
        /// Token id (see `token list`).
        id: i64,
    },
    /// List a line's tokens (never the secrets).
    List {
        /// Line slug.
        #[arg(long)]
        line: String,
    },
}

/// `ohmline recipient …`
#[derive(Debug, Subcommand)]
pub enum RecipientCmd {
    /// Add a recipient of alert emails.
    Add {
        /// Email address.
        email: String,
        /// Display name.
        #[arg(long, default_value = "")]
        name: String,
        /// Only alerts of this site (default: every site).
        #[arg(long)]
        site: Option<String>,
        /// Lowest level sent: 0 = also notices (line-wide wetting, data quality),
        /// 1, 2, … = that trigger level and above.
        #[arg(long, default_value_t = 0)]
        min_level: u8,
        /// One daily digest instead of an email per alert event.
        #[arg(long)]
        digest_only: bool,
    },
    /// List recipients.
    List,
    /// Remove a recipient by id; its undelivered emails are cancelled.
    Remove {
        /// Recipient id (see `recipient list`).
        id: i64,
    },
}

fn read_file(path: &Path) -> anyhow::Result<String> {
    std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))
}

/// Checks a line slug: 1–64 of `a-z`, `0-9`, `-`, not starting or ending with `-`.
pub fn check_slug(name: &str) -> anyhow::Result<()> {
    let ok = !name.is_empty()
        && name.len() <= 64
        && name.bytes().all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'-')
        && !name.starts_with('-')
        && !name.ends_with('-');
    if !ok {
        bail!(
            "line name {name:?} must be 1–64 lower-case letters, digits or '-', not starting or ending with '-'"
        );
    }
    Ok(())
}

async fn line_by_name(db: &Db, name: &str) -> anyhow::Result<db::lines::Line> {
    db::lines::by_name(db, name).await?.with_context(|| format!("no line named {name:?}"))
}

pub async fn site(db: &Db, cmd: SiteCmd) -> anyhow::Result<()> {
    match cmd {
        SiteCmd::Add { name, description } => {
            if name.trim().is_empty() {
                bail!("a site needs a name");
            }
            let s = db::sites::create(db, name.trim(), &description).await?;
            db::audit::record(db, "cli", "site.add", &s.name, "").await?;
            println!("site {} registered (id {})", s.name, s.id);
        }
        SiteCmd::List => {
            for s in db::sites::list(db).await? {
                println!("{}\t{}\t{}", s.id, s.name, s.description);
            }
        }
    }
    Ok(())
}

pub async fn line(db: &Db, cmd: LineCmd) -> anyhow::Result<()> {
    match cmd {
        LineCmd::Add { site, name, electrodes, sequence, orientation, interval, notes } => {
            check_slug(&name)?;
            let site = db::sites::by_name(db, &site).await?.with_context(|| {
                format!("no site named {site:?}; add it with `ohmline site add`")
            })?;
            let e_file = electrodes.display().to_string();
            let (new_electrodes, geometry) =
                files::read_electrodes(&e_file, &read_file(&electrodes)?)?;
            let seq = match &sequence {
                Some(p) => {
                    Some(files::read_sequence(&p.display().to_string(), &read_file(p)?, &geometry)?)
                }
                None => None,
            };
            let seq_name = sequence.as_ref().map(|p| file_stem(p)).unwrap_or_default();
            if interval.as_secs() == 0 {
                bail!("--interval must be at least one second");
            }
            let (line, seq_row) = db::lines::create(
                db,
                &NewLine {
                    site_id: site.id,
                    name: &name,
                    orientation: orientation.as_str(),
                    expected_interval_s: interval.as_secs() as i64,
                    notes: &notes,
                    electrodes: &new_electrodes,
                    sequence: seq.as_ref().map(|s| (seq_name.as_str(), s)),
                },
            )
            .await?;
            db::audit::record(
                db,
                "cli",
                "line.register",
                &line.name,
                &format!("{} electrodes", new_electrodes.len()),
            )
            .await?;
            print!(
                "line {} registered (id {}) with {} electrodes",
                line.name,
                line.id,
                new_electrodes.len()
            );
            match seq_row {
                Some(s) => println!(
                    ", sequence {:?} version {} with {} quadrupoles",
                    s.name, s.version, s.n_quadrupoles
                ),
                None => println!(", no sequence yet"),
            }
        }
        LineCmd::List => {
            for l in db::lines::list(db, None).await? {
                println!(
                    "{}\t{}\t{}\t{} electrodes\t{} epochs\tlast {}",
                    l.site,
                    l.name,
                    l.orientation,
                    l.n_electrodes,
                    l.n_epochs,
                    l.last_epoch_at.map(|t| t.to_rfc3339()).unwrap_or_else(|| "never".into())
                );
            }
        }
    }
    Ok(())
}

fn file_stem(p: &Path) -> String {
    p.file_stem().map(|s| s.to_string_lossy().to_string()).unwrap_or_else(|| "sequence".into())
}

pub async fn sequence(db: &Db, cmd: SequenceCmd) -> anyhow::Result<()> {
    match cmd {
        SequenceCmd::Add { line, file, name } => {
            let line = line_by_name(db, &line).await?;
            let geometry = db::lines::geometry(db, line.id).await?;
            let seq =
                files::read_sequence(&file.display().to_string(), &read_file(&file)?, &geometry)?;
            let name = name.unwrap_or_else(|| file_stem(&file));
            let row = db::sequences::create(db, line.id, &name, &seq).await?;
            let detail = format!("version {} {:?}", row.version, row.name);
            db::audit::record(db, "cli", "sequence.upload", &line.name, &detail).await?;
            println!(
                "sequence {:?} version {} stored for line {} ({} quadrupoles, {} reciprocal pairs)",
                row.name,
                row.version,
                line.name,
                row.n_quadrupoles,
                seq.reciprocal_pairs().count()
            );
        }
        SequenceCmd::List { line } => {
            let line = line_by_name(db, &line).await?;
            for s in db::sequences::list(db, line.id).await? {
                println!(
                    "v{}\t{}\t{} quadrupoles\t{}",
                    s.version,
                    s.name,
                    s.n_quadrupoles,
                    s.created_at.to_rfc3339()
                );
            }
        }
    }
    Ok(())
}

/// Issues a meter token for a line (recorded in the audit trail with the
/// actor `cli`); returns the secret.
pub async fn issue_line_token(
    db: &Db,
    line: &db::lines::Line,
    label: &str,
) -> anyhow::Result<String> {
    let secret = new_line_token();
    let t = db::tokens::insert(db, line.id, &hash_token(&secret), label).await?;
    tracing::info!(token_id = t.id, line = %line.name, "token issued");
    db::audit::record(db, "cli", "line_token.issue", &line.name, &format!("token {}", t.id))
        .await?;
    Ok(secret)
}

pub async fn token(db: &Db, cmd: TokenCmd) -> anyhow::Result<()> {
    match cmd {
        TokenCmd::Issue { line, label } => {
            let line = line_by_name(db, &line).await?;
            println!("{}", issue_line_token(db, &line, &label).await?);
        }
        TokenCmd::Revoke { id } => {
            let t = db::tokens::revoke(db, id).await?;
            let line = db::lines::by_id(db, t.line_id).await?.map(|l| l.name).unwrap_or_default();
            db::audit::record(db, "cli", "line_token.revoke", &line, &format!("token {id}"))
                .await?;
            println!(
                "token {} revoked at {}",
                t.id,
                t.revoked_at.map(|x| x.to_rfc3339()).unwrap_or_default()
            );
        }
        TokenCmd::List { line } => {
            let line = line_by_name(db, &line).await?;
            for t in db::tokens::list(db, line.id).await? {
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
    }
    Ok(())
}

pub async fn recipient(db: &Db, cmd: RecipientCmd) -> anyhow::Result<()> {
    match cmd {
        RecipientCmd::Add { email, name, site, min_level, digest_only } => {
            let address: lettre::Address = email
                .trim()
                .parse()
                .with_context(|| format!("{email:?} is not an email address"))?;
            if name.chars().any(char::is_control) {
                bail!("--name must be one line");
            }
            let site_id = match &site {
                Some(s) => Some(
                    db::sites::by_name(db, s)
                        .await?
                        .with_context(|| {
                            format!("no site named {s:?}; add it with `ohmline site add`")
                        })?
                        .id,
                ),
                None => None,
            };
            let r = db::recipients::add(
                db,
                &NewRecipient {
                    email: &address,
                    name: name.trim(),
                    site_id,
                    min_level,
                    delivery: if digest_only { Delivery::DigestOnly } else { Delivery::PerEvent },
                },
            )
            .await?;
            println!("recipient {} added (id {})", r.email, r.id);
        }
        RecipientCmd::List => {
            for r in db::recipients::list(db).await? {
                println!(
                    "{}\t{}\t{}\t{}\tlevel >= {}\t{}",
                    r.id,
                    r.email,
                    r.name,
                    r.site.as_deref().unwrap_or("all sites"),
                    r.min_level,
                    if r.digest_only { "daily digest" } else { "per event" }
                );
            }
        }
        RecipientCmd::Remove { id } => {
            let removed = db::recipients::remove(db, id).await?;
            println!(
                "recipient {} removed (id {}); {} undelivered email(s) cancelled",
                removed.recipient.email, removed.recipient.id, removed.cancelled
            );
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slugs() {
        assert!(check_slug("crest-north-2").is_ok());
        for bad in ["", "Crest", "a b", "-a", "a-", "a/b"] {
            assert!(check_slug(bad).is_err(), "{bad:?}");
        }
    }
}
