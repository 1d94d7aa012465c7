//! Personal API tokens of users: bearer credentials for scripts, with the role
//! of their user. Only a SHA-256 hash of each token is stored; the token itself
//! is shown once when issued.

use chrono::{DateTime, Duration, Utc};
use serde::Serialize;

use super::{Db, DbResult, not_found, now, on_pool};

/// A stored personal token (never the secret).
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct UserToken {
    /// Row id, used to revoke.
    pub id: i64,
    /// Whose token.
    pub user_id: i64,
    /// Free label (which script, which machine).
    pub label: String,
    /// When it was issued.
    pub created_at: DateTime<Utc>,
    /// When it was revoked, if it was.
    pub revoked_at: Option<DateTime<Utc>>,
    /// Last successful use (updated at most once a minute).
    pub last_used_at: Option<DateTime<Utc>>,
}

const COLUMNS: &str = "t.id, t.user_id, t.label, t.created_at, t.revoked_at, t.last_used_at";

/// Stores the hash of a newly issued token.
pub async fn insert(db: &Db, user_id: i64, token_hash: &str, label: &str) -> DbResult<UserToken> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, UserToken>(
        "INSERT INTO user_tokens (user_id, token_hash, label, created_at) VALUES ($1, $2, $3, $4)
         RETURNING id, user_id, label, created_at, revoked_at, last_used_at"
    )
    .bind(user_id)
    .bind(token_hash)
    .bind(label)
    .bind(now())
    .fetch_one(p)
    .await?))
}

/// The unrevoked token with this hash, if its user still exists.
pub async fn find_active(db: &Db, token_hash: &str) -> DbResult<Option<UserToken>> {
    let sql = format!(
        "SELECT {COLUMNS} FROM user_tokens t JOIN users u ON u.id = t.user_id
         WHERE t.token_hash = $1 AND t.revoked_at IS NULL"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, UserToken>(&sql)
        .bind(token_hash)
        .fetch_optional(p)
        .await?))
}

/// Records a use of the token, at most once a minute per token.
pub async fn touch(db: &Db, id: i64) -> DbResult<()> {
    let t = now();
    on_pool!(db, |p| sqlx::query(
        "UPDATE user_tokens SET last_used_at = $1
         WHERE id = $2 AND (last_used_at IS NULL OR last_used_at < $3)"
    )
    .bind(t)
    .bind(id)
    .bind(t - Duration::seconds(60))
    .execute(p)
    .await
    .map(|_| ())?);
    Ok(())
}

/// Revokes a token; revoking twice keeps the first time.
pub async fn revoke(db: &Db, id: i64) -> DbResult<UserToken> {
    on_pool!(db, |p| sqlx::query_as::<_, UserToken>(
        "UPDATE user_tokens SET revoked_at = COALESCE(revoked_at, $1) WHERE id = $2
         RETURNING id, user_id, label, created_at, revoked_at, last_used_at"
    )
    .bind(now())
    .bind(id)
    .fetch_optional(p)
    .await?)
    .ok_or_else(|| not_found(format!("personal token {id}")))
}

/// Every token of a user, newest first.
pub async fn list(db: &Db, user_id: i64) -> DbResult<Vec<UserToken>> {
    let sql =
        format!("SELECT {COLUMNS} FROM user_tokens t WHERE t.user_id = $1 ORDER BY t.id DESC");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, UserToken>(&sql).bind(user_id).fetch_all(p).await?))
}
