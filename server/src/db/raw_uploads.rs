//! Raw uploads: every authenticated upload kept verbatim (gzip-compressed) with
//! its SHA-256, stored before parsing so any epoch can be re-parsed later and a
//! rejected upload can be diagnosed.

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::{Db, DbResult, not_found, now, on_pool};

/// An upload to store.
#[derive(Debug, Clone)]
pub struct NewRawUpload<'a> {
    /// The line it was sent for.
    pub line_id: i64,
    /// `api` or `dropfolder`.
    pub source: &'a str,
    /// File name (drop folder) if any.
    pub filename: Option<&'a str>,
    /// Declared content type.
    pub content_type: &'a str,
    /// Query string as received.
    pub query: &'a str,
    /// SHA-256 of the body, hex.
    pub sha256: &'a str,
    /// Uncompressed size.
    pub size_bytes: usize,
    /// Gzip-compressed body.
    pub body_gz: &'a [u8],
}

/// A stored upload's metadata.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct RawUpload {
    /// Row id.
    pub id: i64,
    /// The line.
    pub line_id: i64,
    /// When it arrived.
    pub received_at: DateTime<Utc>,
    /// `api` or `dropfolder`.
    pub source: String,
    /// File name, if any.
    pub filename: Option<String>,
    /// Declared content type.
    pub content_type: String,
    /// Query string.
    pub query: String,
    /// SHA-256 of the body, hex.
    pub sha256: String,
    /// Uncompressed size.
    pub size_bytes: i64,
    /// `received`, `accepted`, `duplicate` or `rejected`.
    pub status: String,
    /// Why it was rejected.
    pub error: Option<String>,
    /// The epoch it produced or matched.
    pub epoch_id: Option<i64>,
}

const COLUMNS: &str = "id, line_id, received_at, source, filename, content_type, query, sha256,
    size_bytes, status, error, epoch_id";

/// Stores an upload with status `received`; returns its id.
pub async fn insert(db: &Db, u: &NewRawUpload<'_>) -> DbResult<i64> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "INSERT INTO raw_uploads (line_id, received_at, source, filename, content_type, query,
             sha256, size_bytes, body_gz, status)
         VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, 'received') RETURNING id"
    )
    .bind(u.line_id)
    .bind(now())
    .bind(u.source)
    .bind(u.filename)
    .bind(u.content_type)
    .bind(u.query)
    .bind(u.sha256)
    .bind(u.size_bytes as i64)
    .bind(u.body_gz)
    .fetch_one(p)
    .await?))
}

/// Records the outcome of parsing an upload.
pub async fn mark(
    db: &Db,
    id: i64,
    status: &str,
    error: Option<&str>,
    epoch_id: Option<i64>,
) -> DbResult<()> {
    on_pool!(db, |p| sqlx::query(
        "UPDATE raw_uploads SET status = $1, error = $2, epoch_id = $3 WHERE id = $4"
    )
    .bind(status)
    .bind(error)
    .bind(epoch_id)
    .bind(id)
    .execute(p)
    .await
    .map(|_| ())?);
    Ok(())
}

/// An upload's metadata.
pub async fn get(db: &Db, id: i64) -> DbResult<RawUpload> {
    let sql = format!("SELECT {COLUMNS} FROM raw_uploads WHERE id = $1");
    on_pool!(db, |p| sqlx::query_as::<_, RawUpload>(&sql).bind(id).fetch_optional(p).await?)
        .ok_or_else(|| not_found(format!("raw upload {id}")))
}

/// An upload's compressed body.
pub async fn body_gz(db: &Db, id: i64) -> DbResult<Vec<u8>> {
    on_pool!(db, |p| sqlx::query_scalar::<_, Vec<u8>>(
        "SELECT body_gz FROM raw_uploads WHERE id = $1"
    )
    .bind(id)
    .fetch_optional(p)
    .await?)
    .ok_or_else(|| not_found(format!("raw upload {id}")))
}

/// The line's uploads, newest first, optionally only those with a status.
pub async fn list(
    db: &Db,
    line_id: i64,
    status: Option<&str>,
    limit: i64,
) -> DbResult<Vec<RawUpload>> {
    let sql = format!(
        "SELECT {COLUMNS} FROM raw_uploads WHERE line_id = $1 AND ($2 IS NULL OR status = $2)
         ORDER BY id DESC LIMIT $3"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, RawUpload>(&sql)
        .bind(line_id)
        .bind(status)
        .bind(limit)
        .fetch_all(p)
        .await?))
}
