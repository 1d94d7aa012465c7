//! Site time series (river stage, rainfall, temperatures, named quantities):
//! the series of a site, their samples, every upload kept verbatim (gzip)
//! before parsing, and the revisions of replaced values.
//!
//! A sample is unique per series and time. Storing an upload's samples is one
//! transaction: a sample at a new time is added; the same value at a stored
//! time changes nothing; a different value replaces the stored one and the old
//! value, with the upload that brought it, is recorded in
//! `site_series_revisions`.

use std::collections::HashMap;

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::{Db, DbError, DbResult, in_tx, now, on_pool};

/// A stored series.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct SeriesRow {
    /// Row id.
    pub id: i64,
    /// The site.
    pub site_id: i64,
    /// Kind (`river_stage`, `rainfall`, … or a free name).
    pub kind: String,
    /// Unit of the values.
    pub unit: String,
    /// When the first sample was stored.
    pub created_at: DateTime<Utc>,
}

/// A series with its extent and newest value.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct SeriesSummary {
    /// Row id.
    pub id: i64,
    /// Kind.
    pub kind: String,
    /// Unit.
    pub unit: String,
    /// Samples stored.
    pub n_samples: i64,
    /// Time of the oldest sample.
    pub first_at: Option<DateTime<Utc>>,
    /// Time of the newest sample.
    pub last_at: Option<DateTime<Utc>>,
    /// Value of the newest sample.
    pub last_value: Option<f64>,
}

/// An upload to keep before parsing.
#[derive(Debug, Clone)]
pub struct NewUpload<'a> {
    /// The site.
    pub site_id: i64,
    /// Kind as requested.
    pub kind: &'a str,
    /// `api`, `web` or `cli`.
    pub source: &'a str,
    /// Who sent it (a user's e-mail address, or `line token N (line)`).
    pub actor: &'a str,
    /// File name, if any.
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
pub struct UploadRow {
    /// Row id.
    pub id: i64,
    /// Kind as requested.
    pub kind: String,
    /// When it arrived.
    pub received_at: DateTime<Utc>,
    /// `api`, `web` or `cli`.
    pub source: String,
    /// Who sent it.
    pub actor: String,
    /// File name, if any.
    pub filename: Option<String>,
    /// Uncompressed size, bytes.
    pub size_bytes: i64,
    /// `received`, `accepted` or `rejected`.
    pub status: String,
    /// Why it was rejected.
    pub error: Option<String>,
    /// Samples at new times.
    pub n_added: i64,
    /// Samples already stored with the same value.
    pub n_unchanged: i64,
    /// Samples that replaced a different stored value.
    pub n_replaced: i64,
}

/// What storing an upload's samples did.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct StoreOutcome {
    /// The series (created by this upload if it was new).
    pub series_id: i64,
    /// Samples at new times.
    pub added: usize,
    /// Samples already stored with the same value.
    pub unchanged: usize,
    /// Samples that replaced a different stored value.
    pub replaced: usize,
}

/// Rows per multi-row INSERT (4 parameters each).
const CHUNK: usize = 1000;

/// Keeps an upload with status `received`; returns its id.
pub async fn insert_upload(db: &Db, u: &NewUpload<'_>) -> DbResult<i64> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "INSERT INTO site_series_uploads (site_id, kind, received_at, source, actor, filename,
             content_type, query, sha256, size_bytes, body_gz, status)
         VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, 'received') RETURNING id"
    )
    .bind(u.site_id)
    .bind(u.kind)
    .bind(now())
    .bind(u.source)
    .bind(u.actor)
    .bind(u.filename)
    .bind(u.content_type)
    .bind(u.query)
    .bind(u.sha256)
    .bind(u.size_bytes as i64)
    .bind(u.body_gz)
    .fetch_one(p)
    .await?))
}

/// Marks an upload rejected with the reason.
pub async fn reject_upload(db: &Db, id: i64, error: &str) -> DbResult<()> {
    on_pool!(db, |p| sqlx::query(
        "UPDATE site_series_uploads SET status = 'rejected', error = $1 WHERE id = $2"
    )
    .bind(error)
    .bind(id)
    .execute(p)
    .await
    .map(|_| ())?);
    Ok(())
}

/// An upload's compressed body.
pub async fn upload_body_gz(db: &Db, id: i64) -> DbResult<Vec<u8>> {
    on_pool!(db, |p| sqlx::query_scalar::<_, Vec<u8>>(
        "SELECT body_gz FROM site_series_uploads WHERE id = $1"
    )
    .bind(id)
    .fetch_optional(p)
    .await?)
    .ok_or_else(|| super::not_found(format!("series upload {id}")))
}

/// The site's uploads, newest first.
pub async fn uploads(db: &Db, site_id: i64, limit: i64) -> DbResult<Vec<UploadRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, UploadRow>(
        "SELECT id, kind, received_at, source, actor, filename, size_bytes, status, error,
             n_added, n_unchanged, n_replaced
         FROM site_series_uploads WHERE site_id = $1 ORDER BY id DESC LIMIT $2"
    )
    .bind(site_id)
    .bind(limit)
    .fetch_all(p)
    .await?))
}

/// The site's series of this kind.
pub async fn by_kind(db: &Db, site_id: i64, kind: &str) -> DbResult<Option<SeriesRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, SeriesRow>(
        "SELECT id, site_id, kind, unit, created_at FROM site_series
         WHERE site_id = $1 AND kind = $2"
    )
    .bind(site_id)
    .bind(kind)
    .fetch_optional(p)
    .await?))
}

/// Every series of a site with its extent and newest value, by kind.
pub async fn summaries(db: &Db, site_id: i64) -> DbResult<Vec<SeriesSummary>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, SeriesSummary>(
        "SELECT s.id, s.kind, s.unit,
             (SELECT COUNT(*) FROM site_series_samples x WHERE x.series_id = s.id) AS n_samples,
             (SELECT MIN(x.at) FROM site_series_samples x WHERE x.series_id = s.id) AS first_at,
             (SELECT MAX(x.at) FROM site_series_samples x WHERE x.series_id = s.id) AS last_at,
             (SELECT x.value FROM site_series_samples x WHERE x.series_id = s.id
                 ORDER BY x.at DESC LIMIT 1) AS last_value
         FROM site_series s WHERE s.site_id = $1 ORDER BY s.kind"
    )
    .bind(site_id)
    .fetch_all(p)
    .await?))
}

/// Samples of a series in `[from, to]` (either end open when `None`), oldest first.
pub async fn samples(
    db: &Db,
    series_id: i64,
    from: Option<DateTime<Utc>>,
    to: Option<DateTime<Utc>>,
) -> DbResult<Vec<(DateTime<Utc>, f64)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (DateTime<Utc>, f64)>(
        "SELECT at, value FROM site_series_samples
         WHERE series_id = $1 AND ($2 IS NULL OR at >= $2) AND ($3 IS NULL OR at <= $3)
         ORDER BY at"
    )
    .bind(series_id)
    .bind(from)
    .bind(to)
    .fetch_all(p)
    .await?))
}

/// A stamp that changes whenever the series' samples change: the number of
/// samples and the newest upload among them (a replaced value takes the id of
/// the upload that replaced it, the largest so far).
pub async fn stamp(db: &Db, series_id: i64) -> DbResult<(i64, i64)> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (i64, i64)>(
        "SELECT COUNT(*), COALESCE(MAX(upload_id), 0) FROM site_series_samples
         WHERE series_id = $1"
    )
    .bind(series_id)
    .fetch_one(p)
    .await?))
}

/// Stores the samples of upload `upload_id` (times strictly increasing, in
/// milliseconds) into the site's series of `kind`, creating the series with
/// `unit` when it does not exist — all in one transaction that also marks the
/// upload accepted with its counts. See the module documentation for what
/// happens to a stored time. A stored series with another unit is refused.
pub async fn store(
    db: &Db,
    upload_id: i64,
    site_id: i64,
    kind: &str,
    unit: &str,
    samples: &[(DateTime<Utc>, f64)],
) -> DbResult<StoreOutcome> {
    in_tx!(db, |c| {
        let existing: Option<(i64, String)> =
            sqlx::query_as("SELECT id, unit FROM site_series WHERE site_id = $1 AND kind = $2")
                .bind(site_id)
                .bind(kind)
                .fetch_optional(&mut *c)
                .await?;
        let series_id = match existing {
            Some((_, stored)) if stored != unit => {
                return Err(DbError::Conflict {
                    what: format!("series {kind:?} of this site in {stored:?}, not {unit:?},"),
                });
            }
            Some((id, _)) => id,
            None => {
                sqlx::query_scalar::<_, i64>(
                    "INSERT INTO site_series (site_id, kind, unit, created_at)
                     VALUES ($1, $2, $3, $4) RETURNING id",
                )
                .bind(site_id)
                .bind(kind)
                .bind(unit)
                .bind(now())
                .fetch_one(&mut *c)
                .await?
            }
        };
        let mut stored: HashMap<DateTime<Utc>, (f64, i64)> = HashMap::new();
        if let (Some(first), Some(last)) = (samples.first(), samples.last()) {
            let rows: Vec<(DateTime<Utc>, f64, i64)> = sqlx::query_as(
                "SELECT at, value, upload_id FROM site_series_samples
                 WHERE series_id = $1 AND at >= $2 AND at <= $3",
            )
            .bind(series_id)
            .bind(first.0)
            .bind(last.0)
            .fetch_all(&mut *c)
            .await?;
            stored = rows.into_iter().map(|(t, v, u)| (t, (v, u))).collect();
        }
        let mut new = Vec::new();
        let (mut unchanged, mut replaced) = (0usize, 0usize);
        for &(at, value) in samples {
            match stored.get(&at) {
                None => new.push((at, value)),
                Some(&(old, _)) if old == value => unchanged += 1,
                Some(&(old, old_upload)) => {
                    sqlx::query(
                        "INSERT INTO site_series_revisions
                             (series_id, at, old_value, new_value, old_upload_id, upload_id)
                         VALUES ($1, $2, $3, $4, $5, $6)",
                    )
                    .bind(series_id)
                    .bind(at)
                    .bind(old)
                    .bind(value)
                    .bind(old_upload)
                    .bind(upload_id)
                    .execute(&mut *c)
                    .await?;
                    sqlx::query(
                        "UPDATE site_series_samples SET value = $1, upload_id = $2
                         WHERE series_id = $3 AND at = $4",
                    )
                    .bind(value)
                    .bind(upload_id)
                    .bind(series_id)
                    .bind(at)
                    .execute(&mut *c)
                    .await?;
                    replaced += 1;
                }
            }
        }
        for chunk in new.chunks(CHUNK) {
            let mut qb = sqlx::QueryBuilder::new(
                "INSERT INTO site_series_samples (series_id, at, value, upload_id) ",
            );
            qb.push_values(chunk, |mut b, (at, value)| {
                b.push_bind(series_id).push_bind(*at).push_bind(*value).push_bind(upload_id);
            });
            qb.build().execute(&mut *c).await?;
        }
        sqlx::query(
            "UPDATE site_series_uploads SET status = 'accepted', n_added = $1, n_unchanged = $2,
                 n_replaced = $3 WHERE id = $4",
        )
        .bind(new.len() as i64)
        .bind(unchanged as i64)
        .bind(replaced as i64)
        .bind(upload_id)
        .execute(&mut *c)
        .await?;
        Ok::<_, DbError>(StoreOutcome { series_id, added: new.len(), unchanged, replaced })
    })
}

/// Revisions of a series (replaced values), oldest first: time, old value,
/// new value, the upload that replaced it.
pub async fn revisions(db: &Db, series_id: i64) -> DbResult<Vec<(DateTime<Utc>, f64, f64, i64)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (DateTime<Utc>, f64, f64, i64)>(
        "SELECT at, old_value, new_value, upload_id FROM site_series_revisions
         WHERE series_id = $1 ORDER BY id"
    )
    .bind(series_id)
    .fetch_all(p)
    .await?))
}
