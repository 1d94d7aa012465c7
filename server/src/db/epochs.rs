//! Epochs (one complete run of a line's sequence) and their readings. Readings
//! are written once, in the same transaction as their epoch, and never changed.

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::jobs::enqueue_job;
use super::{Db, DbError, DbResult, on_pool};

/// One reading to store. `quad` is the quadrupole's position in the epoch's
/// sequence version.
#[derive(Debug, Clone, PartialEq)]
pub struct NewReading {
    /// 0-based order of the reading in the upload.
    pub row_index: i64,
    /// Position of the quadrupole in the sequence.
    pub quad: i64,
    /// Injected current, mA.
    pub current_ma: Option<f64>,
    /// Measured potential difference, mV.
    pub voltage_mv: Option<f64>,
    /// Transfer resistance, Ω (given, or U/I).
    pub resistance_ohm: f64,
    /// Stacking error reported by the meter, %.
    pub stack_error_pct: Option<f64>,
    /// Contact resistance at A, Ω.
    pub contact_a_ohm: Option<f64>,
    /// Contact resistance at B, Ω.
    pub contact_b_ohm: Option<f64>,
}

/// An epoch to store with its readings.
#[derive(Debug, Clone)]
pub struct NewEpoch<'a> {
    /// Line.
    pub line_id: i64,
    /// Sequence version the meter ran.
    pub sequence_id: i64,
    /// Start of the run, UTC.
    pub started_at: DateTime<Utc>,
    /// End of the run, UTC.
    pub finished_at: Option<DateTime<Utc>>,
    /// Meter identifier.
    pub meter_id: Option<&'a str>,
    /// When the server received it.
    pub received_at: DateTime<Utc>,
    /// Hash of the parsed content (decides idempotent re-sends).
    pub content_hash: &'a str,
    /// The raw upload it came from.
    pub raw_upload_id: i64,
    /// Ground temperatures (depth m, °C) sent with the epoch.
    pub temperatures: &'a [(f64, f64)],
    /// The readings.
    pub readings: &'a [NewReading],
}

/// What storing an epoch did.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Stored {
    /// A new epoch with this id.
    Created(i64),
    /// The same content was already stored under this id.
    Duplicate(i64),
    /// Another epoch with different content exists for this line and start time.
    Conflict(i64),
}

/// A stored epoch.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct EpochRow {
    /// Row id.
    pub id: i64,
    /// Line.
    pub line_id: i64,
    /// Sequence version id.
    pub sequence_id: i64,
    /// Start of the run.
    pub started_at: DateTime<Utc>,
    /// End of the run.
    pub finished_at: Option<DateTime<Utc>>,
    /// Meter identifier.
    pub meter_id: Option<String>,
    /// When the server received it.
    pub received_at: DateTime<Utc>,
    /// Processing status.
    pub status: String,
    /// Hash of the parsed content.
    pub content_hash: String,
    /// Number of readings.
    pub n_readings: i64,
    /// The raw upload it came from.
    pub raw_upload_id: i64,
}

const COLUMNS: &str = "id, line_id, sequence_id, started_at, finished_at, meter_id, received_at,
    status, content_hash, n_readings, raw_upload_id";

/// Rows per multi-row INSERT (9 parameters each, well below both engines' limits).
const CHUNK: usize = 1000;

/// Stores an epoch, its temperatures and readings, and marks its raw upload
/// accepted — all in one transaction. An existing epoch of the same line and
/// start time is reported as a duplicate (same content hash) or a conflict.
pub async fn insert(db: &Db, e: &NewEpoch<'_>) -> DbResult<Stored> {
    let r = insert_once(db, e).await;
    match r {
        // Two identical uploads racing: the loser sees the winner's row.
        Err(DbError::Conflict { .. }) => match existing(db, e).await? {
            Some(s) => Ok(s),
            None => r,
        },
        r => r,
    }
}

async fn existing(db: &Db, e: &NewEpoch<'_>) -> DbResult<Option<Stored>> {
    let row: Option<(i64, String)> = on_pool!(db, |p| sqlx::query_as(
        "SELECT id, content_hash FROM epochs WHERE line_id = $1 AND started_at = $2"
    )
    .bind(e.line_id)
    .bind(e.started_at)
    .fetch_optional(p)
    .await?);
    Ok(row.map(
        |(id, h)| if h == e.content_hash { Stored::Duplicate(id) } else { Stored::Conflict(id) },
    ))
}

async fn insert_once(db: &Db, e: &NewEpoch<'_>) -> DbResult<Stored> {
    if let Some(s) = existing(db, e).await? {
        return Ok(s);
    }
    // The epoch row, its temperatures, the raw upload's status and the QC job are
    // written the same way on both engines; readings go by multi-row INSERT on
    // SQLite and by COPY on PostgreSQL (several times faster there).
    macro_rules! head {
        ($c:ident) => {{
            let id: i64 = sqlx::query_scalar(
                "INSERT INTO epochs (line_id, sequence_id, started_at, finished_at, meter_id,
                     received_at, status, content_hash, n_readings, raw_upload_id)
                 VALUES ($1, $2, $3, $4, $5, $6, 'received', $7, $8, $9) RETURNING id",
            )
            .bind(e.line_id)
            .bind(e.sequence_id)
            .bind(e.started_at)
            .bind(e.finished_at)
            .bind(e.meter_id)
            .bind(e.received_at)
            .bind(e.content_hash)
            .bind(e.readings.len() as i64)
            .bind(e.raw_upload_id)
            .fetch_one(&mut *$c)
            .await?;
            for &(depth, t) in e.temperatures {
                sqlx::query(
                    "INSERT INTO epoch_temperatures (epoch_id, depth_m, temperature_c) VALUES ($1, $2, $3)",
                )
                .bind(id)
                .bind(depth)
                .bind(t)
                .execute(&mut *$c)
                .await?;
            }
            sqlx::query("UPDATE raw_uploads SET status = 'accepted', epoch_id = $1 WHERE id = $2")
                .bind(id)
                .bind(e.raw_upload_id)
                .execute(&mut *$c)
                .await?;
            // Processing is queued in the same transaction: an acknowledged epoch
            // is never left unprocessed.
            let (key, payload) = crate::pipeline::qc_job(e.line_id);
            enqueue_job!($c, &key, crate::pipeline::QC_LINE, &payload, 10i64, e.received_at)?;
            id
        }};
    }
    match db {
        Db::Sqlite(pool) => {
            let mut tx = pool.begin().await?;
            let c = &mut *tx;
            let id = head!(c);
            for chunk in e.readings.chunks(CHUNK) {
                let mut qb = sqlx::QueryBuilder::new(
                    "INSERT INTO readings (epoch_id, row_index, quad, current_ma, voltage_mv,
                         resistance_ohm, stack_error_pct, contact_a_ohm, contact_b_ohm) ",
                );
                qb.push_values(chunk, |mut b, r| {
                    b.push_bind(id)
                        .push_bind(r.row_index)
                        .push_bind(r.quad)
                        .push_bind(r.current_ma)
                        .push_bind(r.voltage_mv)
                        .push_bind(r.resistance_ohm)
                        .push_bind(r.stack_error_pct)
                        .push_bind(r.contact_a_ohm)
                        .push_bind(r.contact_b_ohm);
                });
                qb.build().execute(&mut *c).await?;
            }
            tx.commit().await?;
            Ok(Stored::Created(id))
        }
        Db::Postgres(pool) => {
            let mut tx = pool.begin().await?;
            let c = &mut *tx;
            let id = head!(c);
            let mut copy = c
                .copy_in_raw(
                    "COPY readings (epoch_id, row_index, quad, current_ma, voltage_mv,
                         resistance_ohm, stack_error_pct, contact_a_ohm, contact_b_ohm)
                     FROM STDIN (FORMAT text)",
                )
                .await?;
            copy.send(copy_text(id, e.readings).into_bytes()).await?;
            copy.finish().await?;
            tx.commit().await?;
            Ok(Stored::Created(id))
        }
    }
}

/// Readings in PostgreSQL's COPY text format: tab-separated, `\N` for NULL.
/// Floats are written with Rust's shortest round-trip formatting, so the stored
/// value is bit-identical to the parsed one.
fn copy_text(epoch_id: i64, readings: &[NewReading]) -> String {
    use std::fmt::Write;
    let opt = |v: Option<f64>| v.map_or_else(|| "\\N".to_string(), |x| format!("{x:?}"));
    let mut s = String::with_capacity(readings.len() * 96);
    for r in readings {
        let _ = writeln!(
            s,
            "{epoch_id}\t{}\t{}\t{}\t{}\t{:?}\t{}\t{}\t{}",
            r.row_index,
            r.quad,
            opt(r.current_ma),
            opt(r.voltage_mv),
            r.resistance_ohm,
            opt(r.stack_error_pct),
            opt(r.contact_a_ohm),
            opt(r.contact_b_ohm)
        );
    }
    s
}

/// An epoch by id.
pub async fn get(db: &Db, id: i64) -> DbResult<Option<EpochRow>> {
    let sql = format!("SELECT {COLUMNS} FROM epochs WHERE id = $1");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, EpochRow>(&sql).bind(id).fetch_optional(p).await?))
}

/// A page of the line's epochs, newest first, starting before `before` if given.
pub async fn list_for_line(
    db: &Db,
    line_id: i64,
    before: Option<DateTime<Utc>>,
    limit: i64,
) -> DbResult<Vec<EpochRow>> {
    let sql = format!(
        "SELECT {COLUMNS} FROM epochs WHERE line_id = $1 AND ($2 IS NULL OR started_at < $2)
         ORDER BY started_at DESC LIMIT $3"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, EpochRow>(&sql)
        .bind(line_id)
        .bind(before)
        .bind(limit)
        .fetch_all(p)
        .await?))
}

/// Number of epochs stored for a line.
pub async fn count_for_line(db: &Db, line_id: i64) -> DbResult<i64> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "SELECT COUNT(*) FROM epochs WHERE line_id = $1"
    )
    .bind(line_id)
    .fetch_one(p)
    .await?))
}

/// Start of the oldest and the newest epoch of a line, if it has any.
pub async fn span_for_line(
    db: &Db,
    line_id: i64,
) -> DbResult<Option<(DateTime<Utc>, DateTime<Utc>)>> {
    let (lo, hi): (Option<DateTime<Utc>>, Option<DateTime<Utc>>) = on_pool!(db, |p| {
        sqlx::query_as("SELECT MIN(started_at), MAX(started_at) FROM epochs WHERE line_id = $1")
            .bind(line_id)
            .fetch_one(p)
            .await?
    });
    Ok(lo.zip(hi))
}

/// Number of epochs waiting for quality control or inversion (all lines).
pub async fn backlog(db: &Db) -> DbResult<i64> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "SELECT COUNT(*) FROM epochs WHERE status IN ('received', 'checked')"
    )
    .fetch_one(p)
    .await?))
}

/// A stored reading.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct ReadingRow {
    /// Order in the upload, 0-based.
    pub row_index: i64,
    /// Position of the quadrupole in the sequence.
    pub quad: i64,
    /// Current, mA.
    pub current_ma: Option<f64>,
    /// Potential difference, mV.
    pub voltage_mv: Option<f64>,
    /// Transfer resistance, Ω.
    pub resistance_ohm: f64,
    /// Stacking error, %.
    pub stack_error_pct: Option<f64>,
    /// Contact resistance at A, Ω.
    pub contact_a_ohm: Option<f64>,
    /// Contact resistance at B, Ω.
    pub contact_b_ohm: Option<f64>,
}

/// An epoch's readings in upload order.
pub async fn readings(db: &Db, epoch_id: i64) -> DbResult<Vec<ReadingRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, ReadingRow>(
        "SELECT row_index, quad, current_ma, voltage_mv, resistance_ohm, stack_error_pct,
             contact_a_ohm, contact_b_ohm
         FROM readings WHERE epoch_id = $1 ORDER BY row_index"
    )
    .bind(epoch_id)
    .fetch_all(p)
    .await?))
}

/// An epoch's ground temperatures (depth m, °C), shallowest first.
pub async fn temperatures(db: &Db, epoch_id: i64) -> DbResult<Vec<(f64, f64)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (f64, f64)>(
        "SELECT depth_m, temperature_c FROM epoch_temperatures WHERE epoch_id = $1 ORDER BY depth_m"
    )
    .bind(epoch_id)
    .fetch_all(p)
    .await?))
}
