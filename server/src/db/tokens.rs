//! Line tokens: bearer credentials of field meters. Only a SHA-256 hash of each
//! token is stored; the token itself is shown once when issued.

use chrono::{DateTime, Duration, Utc};
use serde::Serialize;

use super::{Db, DbResult, not_found, now, on_pool};

/// A stored token (never the secret).
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct LineToken {
    /// Row id, used to revoke.
    pub id: i64,
    /// The line the token may write to and read.
    pub line_id: i64,
    /// Free label (which meter, who holds it).
    pub label: String,
    /// When it was issued.
    pub created_at: DateTime<Utc>,
    /// When it was revoked, if it was.
    pub revoked_at: Option<DateTime<Utc>>,
    /// Last successful use (updated at most once a minute).
    pub last_used_at: Option<DateTime<Utc>>,
}

const COLUMNS: &str = "id, line_id, label, created_at, revoked_at, last_used_at";

/// Stores the hash of a newly issued token.
pub async fn insert(db: &Db, line_id: i64, token_hash: &str, label: &str) -> DbResult<LineToken> {
    let sql = format!(
        "INSERT INTO line_tokens (line_id, token_hash, label, created_at) VALUES ($1, $2, $3, $4)
         RETURNING {COLUMNS}"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, LineToken>(&sql)
        .bind(line_id)
        .bind(token_hash)
        .bind(label)
        .bind(now())
        .fetch_one(p)
        .await?))
}

/// The unrevoked token with this hash.
pub async fn find_active(db: &Db, token_hash: &str) -> DbResult<Option<LineToken>> {
    let sql =
        format!("SELECT {COLUMNS} FROM line_tokens WHERE token_hash = $1 AND revoked_at IS NULL");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, LineToken>(&sql)
        .bind(token_hash)
        .fetch_optional(p)
        .await?))
}

/// Records a use of the token, at most once a minute per token.
pub async fn touch(db: &Db, id: i64) -> DbResult<()> {
    let t = now();
    on_pool!(db, |p| sqlx::query(
        "UPDATE line_tokens SET last_used_at = $1
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
pub async fn revoke(db: &Db, id: i64) -> DbResult<LineToken> {
    let sql = format!(
        "UPDATE line_tokens SET revoked_at = COALESCE(revoked_at, $1) WHERE id = $2 RETURNING {COLUMNS}"
    );
    on_pool!(db, |p| sqlx::query_as::<_, LineToken>(&sql)
        .bind(now())
        .bind(id)
        .fetch_optional(p)
        .await?)
    .ok_or_else(|| not_found(format!("token {id}")))
}

/// Every token of a line, newest first.
pub async fn list(db: &Db, line_id: i64) -> DbResult<Vec<LineToken>> {
    let sql = format!("SELECT {COLUMNS} FROM line_tokens WHERE line_id = $1 ORDER BY id DESC");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, LineToken>(&sql).bind(line_id).fetch_all(p).await?))
}
