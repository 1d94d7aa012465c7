//! Users of the browser pages and the API: an e-mail address (stored lower-case,
//! unique), an argon2id password hash (PHC string) and a role. Deleting a user
//! deletes their sessions and personal tokens in the same transaction.

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::{Db, DbError, DbResult, in_tx, not_found, now, on_pool};
use crate::auth::Role;

/// A stored user (never the password hash).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct User {
    /// Row id.
    pub id: i64,
    /// E-mail address, lower-case.
    pub email: String,
    /// What the user may do.
    pub role: Role,
    /// When the user was added.
    pub created_at: DateTime<Utc>,
    /// When the password was last set.
    pub password_changed_at: DateTime<Utc>,
}

#[derive(sqlx::FromRow)]
struct Row {
    id: i64,
    email: String,
    role: String,
    created_at: DateTime<Utc>,
    password_changed_at: DateTime<Utc>,
}

impl TryFrom<Row> for User {
    type Error = DbError;
    fn try_from(r: Row) -> DbResult<User> {
        let role = r.role.parse().map_err(|_| DbError::Corrupt {
            what: format!("user {} has unknown role {:?}", r.id, r.role),
        })?;
        Ok(User {
            id: r.id,
            email: r.email,
            role,
            created_at: r.created_at,
            password_changed_at: r.password_changed_at,
        })
    }
}

const COLUMNS: &str = "id, email, role, created_at, password_changed_at";

fn one(row: Option<Row>) -> DbResult<Option<User>> {
    row.map(User::try_from).transpose()
}

/// Adds a user; an e-mail address already in use is a conflict.
pub async fn create(db: &Db, email: &str, password_hash: &str, role: Role) -> DbResult<User> {
    let sql = format!(
        "INSERT INTO users (email, password_hash, role, created_at, password_changed_at)
         VALUES ($1, $2, $3, $4, $4) RETURNING {COLUMNS}"
    );
    let row = on_pool!(db, |p| sqlx::query_as::<_, Row>(&sql)
        .bind(email)
        .bind(password_hash)
        .bind(role.as_str())
        .bind(now())
        .fetch_one(p)
        .await
        .map_err(|e| match DbError::from(e) {
            DbError::Conflict { .. } => DbError::Conflict { what: format!("a user {email:?}") },
            e => e,
        })?);
    User::try_from(row)
}

/// The user with this e-mail address (lower-case) and their password hash.
pub async fn by_email_with_hash(db: &Db, email: &str) -> DbResult<Option<(User, String)>> {
    let sql = format!("SELECT {COLUMNS}, password_hash FROM users WHERE email = $1");
    #[derive(sqlx::FromRow)]
    struct WithHash {
        #[sqlx(flatten)]
        row: Row,
        password_hash: String,
    }
    let r =
        on_pool!(db, |p| sqlx::query_as::<_, WithHash>(&sql).bind(email).fetch_optional(p).await?);
    r.map(|w| Ok((User::try_from(w.row)?, w.password_hash))).transpose()
}

/// The password hash of a user.
pub async fn password_hash(db: &Db, id: i64) -> DbResult<String> {
    on_pool!(db, |p| sqlx::query_scalar::<_, String>(
        "SELECT password_hash FROM users WHERE id = $1"
    )
    .bind(id)
    .fetch_optional(p)
    .await?)
    .ok_or_else(|| not_found(format!("user {id}")))
}

/// The user with this e-mail address (lower-case).
pub async fn by_email(db: &Db, email: &str) -> DbResult<Option<User>> {
    let sql = format!("SELECT {COLUMNS} FROM users WHERE email = $1");
    one(on_pool!(db, |p| sqlx::query_as::<_, Row>(&sql).bind(email).fetch_optional(p).await?))
}

/// The user with this id.
pub async fn by_id(db: &Db, id: i64) -> DbResult<Option<User>> {
    let sql = format!("SELECT {COLUMNS} FROM users WHERE id = $1");
    one(on_pool!(db, |p| sqlx::query_as::<_, Row>(&sql).bind(id).fetch_optional(p).await?))
}

/// Every user, by e-mail address.
pub async fn list(db: &Db) -> DbResult<Vec<User>> {
    let sql = format!("SELECT {COLUMNS} FROM users ORDER BY email");
    let rows = on_pool!(db, |p| sqlx::query_as::<_, Row>(&sql).fetch_all(p).await?);
    rows.into_iter().map(User::try_from).collect()
}

/// Number of users holding a role.
pub async fn count_with_role(db: &Db, role: Role) -> DbResult<i64> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>("SELECT COUNT(*) FROM users WHERE role = $1")
        .bind(role.as_str())
        .fetch_one(p)
        .await?))
}

/// Changes a user's role.
pub async fn set_role(db: &Db, id: i64, role: Role) -> DbResult<User> {
    let sql = format!("UPDATE users SET role = $1 WHERE id = $2 RETURNING {COLUMNS}");
    one(on_pool!(db, |p| sqlx::query_as::<_, Row>(&sql)
        .bind(role.as_str())
        .bind(id)
        .fetch_optional(p)
        .await?))?
    .ok_or_else(|| not_found(format!("user {id}")))
}

/// Sets a new password hash and ends every session of the user except `keep`
/// (the session that changed it), in one transaction.
pub async fn set_password(
    db: &Db,
    id: i64,
    password_hash: &str,
    keep: Option<i64>,
) -> DbResult<()> {
    in_tx!(db, |c| {
        let n = sqlx::query(
            "UPDATE users SET password_hash = $1, password_changed_at = $2 WHERE id = $3",
        )
        .bind(password_hash)
        .bind(now())
        .bind(id)
        .execute(&mut *c)
        .await?
        .rows_affected();
        if n == 0 {
            return Err(not_found(format!("user {id}")));
        }
        sqlx::query("DELETE FROM sessions WHERE user_id = $1 AND ($2 IS NULL OR id <> $2)")
            .bind(id)
            .bind(keep)
            .execute(&mut *c)
            .await?;
        Ok::<_, DbError>(())
    })
}

/// Deletes a user with their sessions and personal tokens, in one transaction.
pub async fn delete(db: &Db, id: i64) -> DbResult<User> {
    let sql = format!("DELETE FROM users WHERE id = $1 RETURNING {COLUMNS}");
    let row = in_tx!(db, |c| {
        sqlx::query("DELETE FROM sessions WHERE user_id = $1").bind(id).execute(&mut *c).await?;
        sqlx::query("DELETE FROM user_tokens WHERE user_id = $1").bind(id).execute(&mut *c).await?;
        let row = sqlx::query_as::<_, Row>(&sql).bind(id).fetch_optional(&mut *c).await?;
        row.ok_or_else(|| not_found(format!("user {id}")))
    })?;
    User::try_from(row)
}
