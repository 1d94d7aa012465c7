//! Sign-in sessions of users. The cookie holds a random secret; only its
//! SHA-256 is stored. Each session carries its own CSRF token (a random value
//! that forms echo back). A session is found only while its user exists.

use chrono::{DateTime, Duration, Utc};

use super::{Db, DbResult, now, on_pool};

/// A stored session.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct SessionRow {
    /// Row id.
    pub id: i64,
    /// Whose session.
    pub user_id: i64,
    /// The synchronizer token forms of this session must carry.
    pub csrf_token: String,
    /// When the user signed in.
    pub created_at: DateTime<Utc>,
    /// Last request seen (updated at most once a minute).
    pub last_seen_at: DateTime<Utc>,
}

const COLUMNS: &str = "s.id, s.user_id, s.csrf_token, s.created_at, s.last_seen_at";

/// Stores a new session.
pub async fn create(
    db: &Db,
    user_id: i64,
    token_hash: &str,
    csrf_token: &str,
) -> DbResult<SessionRow> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, SessionRow>(
        "INSERT INTO sessions (user_id, token_hash, csrf_token, created_at, last_seen_at)
         VALUES ($1, $2, $3, $4, $4)
         RETURNING id, user_id, csrf_token, created_at, last_seen_at"
    )
    .bind(user_id)
    .bind(token_hash)
    .bind(csrf_token)
    .bind(now())
    .fetch_one(p)
    .await?))
}

/// The session with this cookie hash, if its user still exists.
pub async fn find(db: &Db, token_hash: &str) -> DbResult<Option<SessionRow>> {
    let sql = format!(
        "SELECT {COLUMNS} FROM sessions s JOIN users u ON u.id = s.user_id WHERE s.token_hash = $1"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, SessionRow>(&sql)
        .bind(token_hash)
        .fetch_optional(p)
        .await?))
}

/// Records activity on a session, at most once a minute.
pub async fn touch(db: &Db, id: i64) -> DbResult<()> {
    let t = now();
    on_pool!(db, |p| sqlx::query(
        "UPDATE sessions SET last_seen_at = $1 WHERE id = $2 AND last_seen_at < $3"
    )
    .bind(t)
    .bind(id)
    .bind(t - Duration::seconds(60))
    .execute(p)
    .await
    .map(|_| ())?);
    Ok(())
}

/// Ends a session (sign-out or expiry).
pub async fn delete(db: &Db, id: i64) -> DbResult<()> {
    on_pool!(db, |p| sqlx::query("DELETE FROM sessions WHERE id = $1")
        .bind(id)
        .execute(p)
        .await
        .map(|_| ())?);
    Ok(())
}

/// Deletes sessions created before `created_before` or idle since before
/// `seen_before`; returns how many.
pub async fn delete_expired(
    db: &Db,
    created_before: DateTime<Utc>,
    seen_before: DateTime<Utc>,
) -> DbResult<u64> {
    Ok(on_pool!(db, |p| sqlx::query(
        "DELETE FROM sessions WHERE created_at < $1 OR last_seen_at < $2"
    )
    .bind(created_before)
    .bind(seen_before)
    .execute(p)
    .await?
    .rows_affected()))
}
