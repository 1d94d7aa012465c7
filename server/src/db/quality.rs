//! Stored outcomes of quality control: per reading (kept, why not), per epoch
//! (share dropped per rule, fitted error model), per electrode and epoch (health),
//! and data-quality events. Raw readings are never touched.

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::epochs::EpochRow;
use super::jobs::enqueue_job;
use super::{Db, DbError, DbResult, in_tx, on_pool};

/// Quality outcome of one epoch.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct EpochQuality {
    /// Epoch.
    pub epoch_id: i64,
    /// When quality control ran.
    pub processed_at: DateTime<Utc>,
    /// Readings checked.
    pub n_readings: i64,
    /// Readings dropped.
    pub n_dropped: i64,
    /// Share dropped (0–1).
    pub dropped_share: f64,
    /// JSON object: rule code → readings it dropped.
    pub rule_counts: String,
    /// JSON array of electrode positions flagged in this epoch.
    pub flagged: String,
    /// Median apparent resistivity of the epoch, Ω·m.
    pub median_rho_a: Option<f64>,
    /// Error model in effect: absolute term, Ω.
    pub error_a_ohm: f64,
    /// Error model in effect: relative term (0.02 = 2 %).
    pub error_b: f64,
    /// True when fitted from reciprocals, false for the configured default.
    pub error_fitted: bool,
    /// Reciprocal pairs used in the fit.
    pub error_pairs: i64,
    /// JSON array of warnings.
    pub warnings: String,
}

/// Quality outcome of one reading.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct ReadingQuality {
    /// Order in the upload.
    pub row_index: i64,
    /// Quadrupole position in the sequence.
    pub quad: i64,
    /// Kept for inversion.
    pub kept: bool,
    /// Geometric factor used, m.
    pub k_factor: Option<f64>,
    /// Apparent resistivity, Ω·m.
    pub rho_a: Option<f64>,
    /// Reciprocal error (0.05 = 5 %), where the sequence holds the reciprocal.
    pub reciprocal_error: Option<f64>,
    /// Robust spike score.
    pub spike_score: Option<f64>,
    /// Comma-separated rule codes that dropped it (empty when kept).
    pub rules: String,
    /// Human-readable reasons, `; `-separated.
    pub reasons: String,
}

/// Health of one electrode in one epoch.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct ElectrodeQuality {
    /// Electrode position (cable order).
    pub position: i64,
    /// In service when the epoch was checked.
    pub in_service: bool,
    /// Readings using it.
    pub n_readings: i64,
    /// Of those, failing a reading-level check.
    pub n_failing: i64,
    /// Share failing.
    pub fail_share: Option<f64>,
    /// Contact resistance reported, Ω.
    pub contact_ohm: Option<f64>,
    /// Comma-separated flag codes (empty when not flagged).
    pub flags: String,
    /// Consecutive flagged epochs up to and including this one.
    pub consecutive_flags: i64,
}

/// A data-quality event.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct QualityEventRow {
    /// Row id.
    pub id: i64,
    /// Line.
    pub line_id: i64,
    /// The epoch it came from, if any.
    pub epoch_id: Option<i64>,
    /// Stable code (`dropped_share`, `electrode_out_of_service`, …).
    pub kind: String,
    /// Human-readable detail.
    pub detail: String,
    /// When it happened.
    pub occurred_at: DateTime<Utc>,
}

/// A new data-quality event.
#[derive(Debug, Clone)]
pub struct NewEvent {
    /// Stable code.
    pub kind: String,
    /// Human-readable detail.
    pub detail: String,
    /// When it happened.
    pub occurred_at: DateTime<Utc>,
}

/// An electrode taken out of (or returned to) service by quality control.
#[derive(Debug, Clone)]
pub struct ServiceChange {
    /// Electrode position.
    pub position: i64,
    /// New state.
    pub in_service: bool,
    /// Why.
    pub reason: String,
}

/// Everything quality control decided for one epoch, stored together.
#[derive(Debug, Clone)]
pub struct QcOutcome<'a> {
    /// Line.
    pub line_id: i64,
    /// Per-epoch summary.
    pub epoch: &'a EpochQuality,
    /// Per reading.
    pub readings: &'a [ReadingQuality],
    /// Per electrode.
    pub electrodes: &'a [ElectrodeQuality],
    /// Events.
    pub events: &'a [NewEvent],
    /// Electrode service changes.
    pub service: &'a [ServiceChange],
    /// Status the epoch moves to.
    pub status: &'a str,
    /// Jobs to queue (key, kind, payload).
    pub next_jobs: &'a [(String, String, String)],
}

/// Stores a QC outcome in one transaction, replacing any earlier outcome of the
/// same epoch (reprocessing is idempotent), applies electrode service changes,
/// moves the epoch's status on and queues the next jobs.
pub async fn store(db: &Db, o: &QcOutcome<'_>) -> DbResult<()> {
    let e = o.epoch;
    in_tx!(db, |c| {
        for table in ["reading_quality", "electrode_quality", "epoch_quality", "quality_events"] {
            sqlx::query(&format!("DELETE FROM {table} WHERE epoch_id = $1"))
                .bind(e.epoch_id)
                .execute(&mut *c)
                .await?;
        }
        sqlx::query(
            "INSERT INTO epoch_quality (epoch_id, processed_at, n_readings, n_dropped, dropped_share,
                 rule_counts, flagged, median_rho_a, error_a_ohm, error_b, error_fitted, error_pairs, warnings)
             VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13)",
        )
        .bind(e.epoch_id)
        .bind(e.processed_at)
        .bind(e.n_readings)
        .bind(e.n_dropped)
        .bind(e.dropped_share)
        .bind(&e.rule_counts)
        .bind(&e.flagged)
        .bind(e.median_rho_a)
        .bind(e.error_a_ohm)
        .bind(e.error_b)
        .bind(e.error_fitted)
        .bind(e.error_pairs)
        .bind(&e.warnings)
        .execute(&mut *c)
        .await?;
        for chunk in o.readings.chunks(1000) {
            let mut qb = sqlx::QueryBuilder::new(
                "INSERT INTO reading_quality (epoch_id, row_index, quad, kept, k_factor, rho_a,
                     reciprocal_error, spike_score, rules, reasons) ",
            );
            qb.push_values(chunk, |mut b, r| {
                b.push_bind(e.epoch_id)
                    .push_bind(r.row_index)
                    .push_bind(r.quad)
                    .push_bind(r.kept)
                    .push_bind(r.k_factor)
                    .push_bind(r.rho_a)
                    .push_bind(r.reciprocal_error)
                    .push_bind(r.spike_score)
                    .push_bind(&r.rules)
                    .push_bind(&r.reasons);
            });
            qb.build().execute(&mut *c).await?;
        }
        if !o.electrodes.is_empty() {
            let mut qb = sqlx::QueryBuilder::new(
                "INSERT INTO electrode_quality (epoch_id, position, in_service, n_readings, n_failing,
                     fail_share, contact_ohm, flags, consecutive_flags) ",
            );
            qb.push_values(o.electrodes, |mut b, r| {
                b.push_bind(e.epoch_id)
                    .push_bind(r.position)
                    .push_bind(r.in_service)
                    .push_bind(r.n_readings)
                    .push_bind(r.n_failing)
                    .push_bind(r.fail_share)
                    .push_bind(r.contact_ohm)
                    .push_bind(&r.flags)
                    .push_bind(r.consecutive_flags);
            });
            qb.build().execute(&mut *c).await?;
        }
        for ev in o.events {
            sqlx::query(
                "INSERT INTO quality_events (line_id, epoch_id, kind, detail, occurred_at, created_at)
                 VALUES ($1, $2, $3, $4, $5, $6)",
            )
            .bind(o.line_id)
            .bind(e.epoch_id)
            .bind(&ev.kind)
            .bind(&ev.detail)
            .bind(ev.occurred_at)
            .bind(e.processed_at)
            .execute(&mut *c)
            .await?;
        }
        for s in o.service {
            let id: i64 = sqlx::query_scalar(
                "UPDATE electrodes SET in_service = $1 WHERE line_id = $2 AND position = $3 RETURNING id",
            )
            .bind(s.in_service)
            .bind(o.line_id)
            .bind(s.position)
            .fetch_one(&mut *c)
            .await?;
            sqlx::query(
                "INSERT INTO electrode_service (electrode_id, in_service, changed_at, actor, reason)
                 VALUES ($1, $2, $3, 'system', $4)",
            )
            .bind(id)
            .bind(s.in_service)
            .bind(e.processed_at)
            .bind(&s.reason)
            .execute(&mut *c)
            .await?;
        }
        sqlx::query("UPDATE epochs SET status = $1 WHERE id = $2")
            .bind(o.status)
            .bind(e.epoch_id)
            .execute(&mut *c)
            .await?;
        for (key, kind, payload) in o.next_jobs {
            enqueue_job!(c, key, kind, payload, 0i64, e.processed_at)?;
        }
        Ok::<_, DbError>(())
    })
}

const EPOCH_COLUMNS: &str = "id, line_id, sequence_id, started_at, finished_at, meter_id,
    received_at, status, content_hash, n_readings, raw_upload_id";

/// The line's epochs still waiting for quality control, oldest first.
pub async fn epochs_waiting(db: &Db, line_id: i64, limit: i64) -> DbResult<Vec<EpochRow>> {
    let sql = format!(
        "SELECT {EPOCH_COLUMNS} FROM epochs WHERE line_id = $1 AND status = 'received'
         ORDER BY started_at LIMIT $2"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, EpochRow>(&sql)
        .bind(line_id)
        .bind(limit)
        .fetch_all(p)
        .await?))
}

/// Up to `limit` quality-controlled epochs of the line that ran the same
/// sequence version and started before `before`, newest first.
pub async fn checked_before(
    db: &Db,
    line_id: i64,
    sequence_id: i64,
    before: DateTime<Utc>,
    limit: i64,
) -> DbResult<Vec<EpochRow>> {
    let sql = format!(
        "SELECT {EPOCH_COLUMNS} FROM epochs e
         WHERE line_id = $1 AND sequence_id = $2 AND started_at < $3
           AND EXISTS (SELECT 1 FROM epoch_quality q WHERE q.epoch_id = e.id)
         ORDER BY started_at DESC LIMIT $4"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, EpochRow>(&sql)
        .bind(line_id)
        .bind(sequence_id)
        .bind(before)
        .bind(limit)
        .fetch_all(p)
        .await?))
}

/// The newest quality-controlled epoch of the line that started before `before`
/// (any sequence version).
pub async fn last_checked_before(
    db: &Db,
    line_id: i64,
    before: DateTime<Utc>,
) -> DbResult<Option<EpochRow>> {
    let sql = format!(
        "SELECT {EPOCH_COLUMNS} FROM epochs e
         WHERE line_id = $1 AND started_at < $2
           AND EXISTS (SELECT 1 FROM epoch_quality q WHERE q.epoch_id = e.id)
         ORDER BY started_at DESC LIMIT 1"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, EpochRow>(&sql)
        .bind(line_id)
        .bind(before)
        .fetch_optional(p)
        .await?))
}

/// True when a quality-controlled epoch of the line started after `t`.
pub async fn checked_after(db: &Db, line_id: i64, t: DateTime<Utc>) -> DbResult<bool> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "SELECT COUNT(*) FROM epochs e WHERE line_id = $1 AND started_at > $2
           AND EXISTS (SELECT 1 FROM epoch_quality q WHERE q.epoch_id = e.id)"
    )
    .bind(line_id)
    .bind(t)
    .fetch_one(p)
    .await?)
        > 0)
}

/// An epoch's quality summary.
pub async fn epoch(db: &Db, epoch_id: i64) -> DbResult<Option<EpochQuality>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, EpochQuality>(
        "SELECT epoch_id, processed_at, n_readings, n_dropped, dropped_share, rule_counts, flagged,
             median_rho_a, error_a_ohm, error_b, error_fitted, error_pairs, warnings
         FROM epoch_quality WHERE epoch_id = $1"
    )
    .bind(epoch_id)
    .fetch_optional(p)
    .await?))
}

/// An epoch's per-reading outcome in upload order.
pub async fn readings(db: &Db, epoch_id: i64) -> DbResult<Vec<ReadingQuality>> {
    Ok(on_pool!(db, |p| {
        sqlx::query_as::<_, ReadingQuality>(
        "SELECT row_index, quad, kept, k_factor, rho_a, reciprocal_error, spike_score, rules, reasons
         FROM reading_quality WHERE epoch_id = $1 ORDER BY row_index"
    )
    .bind(epoch_id)
    .fetch_all(p)
    .await?
    }))
}

/// An epoch's per-electrode health in cable order.
pub async fn electrodes(db: &Db, epoch_id: i64) -> DbResult<Vec<ElectrodeQuality>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, ElectrodeQuality>(
        "SELECT position, in_service, n_readings, n_failing, fail_share, contact_ohm, flags,
             consecutive_flags
         FROM electrode_quality WHERE epoch_id = $1 ORDER BY position"
    )
    .bind(epoch_id)
    .fetch_all(p)
    .await?))
}

/// The line's data-quality events, newest first.
pub async fn events(db: &Db, line_id: i64, limit: i64) -> DbResult<Vec<QualityEventRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, QualityEventRow>(
        "SELECT id, line_id, epoch_id, kind, detail, occurred_at FROM quality_events
         WHERE line_id = $1 ORDER BY occurred_at DESC, id DESC LIMIT $2"
    )
    .bind(line_id)
    .bind(limit)
    .fetch_all(p)
    .await?))
}

/// An epoch's data-quality events.
pub async fn epoch_events(db: &Db, epoch_id: i64) -> DbResult<Vec<QualityEventRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, QualityEventRow>(
        "SELECT id, line_id, epoch_id, kind, detail, occurred_at FROM quality_events
         WHERE epoch_id = $1 ORDER BY id"
    )
    .bind(epoch_id)
    .fetch_all(p)
    .await?))
}

/// The quality summaries of a line's newest `limit` checked epochs, oldest
/// first, each with its epoch's start.
pub async fn line_epochs(
    db: &Db,
    line_id: i64,
    limit: i64,
) -> DbResult<Vec<(DateTime<Utc>, EpochQuality)>> {
    #[derive(sqlx::FromRow)]
    struct Row {
        started_at: DateTime<Utc>,
        #[sqlx(flatten)]
        quality: EpochQuality,
    }
    let mut rows: Vec<Row> = on_pool!(db, |p| sqlx::query_as::<_, Row>(
        "SELECT e.started_at, q.epoch_id, q.processed_at, q.n_readings, q.n_dropped,
             q.dropped_share, q.rule_counts, q.flagged, q.median_rho_a, q.error_a_ohm, q.error_b,
             q.error_fitted, q.error_pairs, q.warnings
         FROM epoch_quality q JOIN epochs e ON e.id = q.epoch_id
         WHERE e.line_id = $1 ORDER BY e.started_at DESC, q.epoch_id DESC LIMIT $2"
    )
    .bind(line_id)
    .bind(limit)
    .fetch_all(p)
    .await?);
    rows.reverse();
    Ok(rows.into_iter().map(|r| (r.started_at, r.quality)).collect())
}

/// Per-electrode health of the given epochs: (epoch id, electrode health).
pub async fn line_electrodes(
    db: &Db,
    line_id: i64,
    since: DateTime<Utc>,
) -> DbResult<Vec<(i64, ElectrodeQuality)>> {
    #[derive(sqlx::FromRow)]
    struct Row {
        epoch_id: i64,
        #[sqlx(flatten)]
        electrode: ElectrodeQuality,
    }
    let rows: Vec<Row> = on_pool!(db, |p| sqlx::query_as::<_, Row>(
        "SELECT q.epoch_id, q.position, q.in_service, q.n_readings, q.n_failing, q.fail_share,
             q.contact_ohm, q.flags, q.consecutive_flags
         FROM electrode_quality q JOIN epochs e ON e.id = q.epoch_id
         WHERE e.line_id = $1 AND e.started_at >= $2 ORDER BY e.started_at, q.position"
    )
    .bind(line_id)
    .bind(since)
    .fetch_all(p)
    .await?);
    Ok(rows.into_iter().map(|r| (r.epoch_id, r.electrode)).collect())
}
