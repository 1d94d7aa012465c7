//! Inversion results: a line's section grid, its baselines, each epoch's
//! resistivity model and its change sections against the baseline.
//!
//! Per-cell values are stored as little-endian `f64` arrays ([`f64s_to_blob`]);
//! masks as one byte per cell. Storing a result replaces any earlier result of
//! the same epoch (and mode), so reprocessing is idempotent.

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::{Db, DbError, DbResult, in_tx, on_pool};

/// Encodes per-cell values as little-endian `f64`.
pub fn f64s_to_blob(v: &[f64]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

/// Decodes [`f64s_to_blob`].
pub fn blob_to_f64s(b: &[u8]) -> DbResult<Vec<f64>> {
    if b.len() % 8 != 0 {
        return Err(DbError::Corrupt { what: format!("per-cell array of {} bytes", b.len()) });
    }
    Ok(b.chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes"))).collect())
}

/// Encodes a mask, one byte per cell.
pub fn mask_to_blob(m: &[bool]) -> Vec<u8> {
    m.iter().map(|&b| u8::from(b)).collect()
}

/// Decodes [`mask_to_blob`].
pub fn blob_to_mask(b: &[u8]) -> Vec<bool> {
    b.iter().map(|&x| x != 0).collect()
}

/// A line's section grid as stored.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct SectionRow {
    /// Row id.
    pub id: i64,
    /// Line.
    pub line_id: i64,
    /// Hash of the electrode geometry and surface it was built from.
    pub geometry_hash: String,
    /// Cell polygons, JSON `[[[x, z], ...], ...]`.
    pub polygons: String,
    /// Depth of each cell's centroid below ground, m (f64 array).
    pub depths: Vec<u8>,
    /// When it was stored.
    pub created_at: DateTime<Utc>,
}

impl SectionRow {
    /// Cell polygons.
    pub fn polygons(&self) -> DbResult<Vec<Vec<[f64; 2]>>> {
        serde_json::from_str(&self.polygons)
            .map_err(|e| DbError::Corrupt { what: format!("polygons of section {}: {e}", self.id) })
    }
}

/// The section of a line for a geometry, stored on first use.
pub async fn ensure_section(
    db: &Db,
    line_id: i64,
    geometry_hash: &str,
    polygons: &[Vec<[f64; 2]>],
    depths: &[f64],
) -> DbResult<i64> {
    if let Some(id) = on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "SELECT id FROM line_sections WHERE line_id = $1 AND geometry_hash = $2"
    )
    .bind(line_id)
    .bind(geometry_hash)
    .fetch_optional(p)
    .await?)
    {
        return Ok(id);
    }
    let json = serde_json::to_string(polygons).expect("polygons serialise");
    let blob = f64s_to_blob(depths);
    let now = super::now();
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "INSERT INTO line_sections (line_id, geometry_hash, polygons, depths, created_at)
         VALUES ($1, $2, $3, $4, $5)
         ON CONFLICT (line_id, geometry_hash) DO UPDATE SET geometry_hash = excluded.geometry_hash
         RETURNING id"
    )
    .bind(line_id)
    .bind(geometry_hash)
    .bind(&json)
    .bind(&blob)
    .bind(now)
    .fetch_one(p)
    .await?))
}

/// A section by id.
pub async fn section(db: &Db, id: i64) -> DbResult<Option<SectionRow>> {
    Ok(on_pool!(db, |p| {
        sqlx::query_as::<_, SectionRow>(
        "SELECT id, line_id, geometry_hash, polygons, depths, created_at FROM line_sections WHERE id = $1"
    )
    .bind(id)
    .fetch_optional(p)
    .await?
    }))
}

/// A baseline as stored.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct BaselineRow {
    /// Row id.
    pub id: i64,
    /// Line.
    pub line_id: i64,
    /// Sequence version of its epochs.
    pub sequence_id: i64,
    /// Section its model lives on.
    pub section_id: i64,
    /// Epoch ids, JSON array.
    pub epoch_ids: String,
    /// `auto` or the person who chose it.
    pub chosen_by: String,
    /// The line's current baseline?
    pub active: bool,
    /// Baseline model (f64 array), once inverted.
    #[serde(skip)]
    pub model: Option<Vec<u8>>,
    /// χ²/N of the baseline inversion.
    pub chi2: Option<f64>,
    /// RMS misfit, %.
    pub rms_pct: Option<f64>,
    /// λ of the baseline inversion (kept fixed for the time-lapse inversions).
    pub lambda: Option<f64>,
    /// When it was chosen.
    pub created_at: DateTime<Utc>,
}

impl BaselineRow {
    /// Its epoch ids.
    pub fn epochs(&self) -> DbResult<Vec<i64>> {
        serde_json::from_str(&self.epoch_ids).map_err(|e| DbError::Corrupt {
            what: format!("epoch list of baseline {}: {e}", self.id),
        })
    }
}

const BASELINE_COLUMNS: &str = "id, line_id, sequence_id, section_id, epoch_ids, chosen_by, active,
    model, chi2, rms_pct, lambda, created_at";

/// The line's active baseline.
pub async fn active_baseline(db: &Db, line_id: i64) -> DbResult<Option<BaselineRow>> {
    let sql = format!(
        "SELECT {BASELINE_COLUMNS} FROM line_baselines WHERE line_id = $1 AND active = $2
         ORDER BY id DESC LIMIT 1"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, BaselineRow>(&sql)
        .bind(line_id)
        .bind(true)
        .fetch_optional(p)
        .await?))
}

/// A baseline by id.
pub async fn baseline(db: &Db, id: i64) -> DbResult<Option<BaselineRow>> {
    let sql = format!("SELECT {BASELINE_COLUMNS} FROM line_baselines WHERE id = $1");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, BaselineRow>(&sql).bind(id).fetch_optional(p).await?))
}

/// Makes a new baseline the line's active one (the old one stays for the
/// record); its model is stored later by [`store_baseline_model`]. Change
/// sections against the old baseline are removed: they are recomputed.
pub async fn set_baseline(
    db: &Db,
    line_id: i64,
    sequence_id: i64,
    section_id: i64,
    epoch_ids: &[i64],
    chosen_by: &str,
) -> DbResult<i64> {
    insert_baseline(db, line_id, sequence_id, section_id, epoch_ids, chosen_by, true).await
}

/// Makes `epoch_ids` the line's active baseline unless the line has one
/// already; returns the active baseline's id either way. Two workers that
/// choose at once end with one baseline (the line's row is locked first).
pub async fn choose_baseline(
    db: &Db,
    line_id: i64,
    sequence_id: i64,
    section_id: i64,
    epoch_ids: &[i64],
    chosen_by: &str,
) -> DbResult<i64> {
    insert_baseline(db, line_id, sequence_id, section_id, epoch_ids, chosen_by, false).await
}

/// Stores a baseline as the line's active one: replacing the active one
/// (`replace`), or only when the line has none.
async fn insert_baseline(
    db: &Db,
    line_id: i64,
    sequence_id: i64,
    section_id: i64,
    epoch_ids: &[i64],
    chosen_by: &str,
    replace: bool,
) -> DbResult<i64> {
    let ids = serde_json::to_string(epoch_ids).expect("ids serialise");
    let now = super::now();
    in_tx!(db, |c| {
        // A no-op write that takes the line's row lock on PostgreSQL (SQLite's
        // IMMEDIATE transaction holds the database's write lock already).
        sqlx::query("UPDATE lines SET id = id WHERE id = $1")
            .bind(line_id)
            .execute(&mut *c)
            .await?;
        if replace {
            sqlx::query("UPDATE line_baselines SET active = $1 WHERE line_id = $2")
                .bind(false)
                .bind(line_id)
                .execute(&mut *c)
                .await?;
            sqlx::query("DELETE FROM epoch_changes WHERE line_id = $1")
                .bind(line_id)
                .execute(&mut *c)
                .await?;
        } else {
            let active: Option<i64> = sqlx::query_scalar(
                "SELECT id FROM line_baselines WHERE line_id = $1 AND active = $2
                 ORDER BY id DESC LIMIT 1",
            )
            .bind(line_id)
            .bind(true)
            .fetch_optional(&mut *c)
            .await?;
            if let Some(id) = active {
                return Ok(id);
            }
        }
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO line_baselines (line_id, sequence_id, section_id, epoch_ids, chosen_by,
                 active, created_at)
             VALUES ($1, $2, $3, $4, $5, $6, $7) RETURNING id",
        )
        .bind(line_id)
        .bind(sequence_id)
        .bind(section_id)
        .bind(&ids)
        .bind(chosen_by)
        .bind(true)
        .bind(now)
        .fetch_one(&mut *c)
        .await?;
        Ok::<_, DbError>(id)
    })
}

/// Stores the inverted baseline model.
pub async fn store_baseline_model(
    db: &Db,
    id: i64,
    model: &[f64],
    chi2: f64,
    rms_pct: f64,
    lambda: f64,
) -> DbResult<()> {
    let blob = f64s_to_blob(model);
    on_pool!(db, |p| sqlx::query(
        "UPDATE line_baselines SET model = $1, chi2 = $2, rms_pct = $3, lambda = $4 WHERE id = $5"
    )
    .bind(&blob)
    .bind(chi2)
    .bind(rms_pct)
    .bind(lambda)
    .bind(id)
    .execute(p)
    .await?
    .rows_affected());
    Ok(())
}

/// One epoch's inversion result.
#[derive(Debug, Clone, PartialEq)]
pub struct NewModel<'a> {
    /// Epoch.
    pub epoch_id: i64,
    /// Line.
    pub line_id: i64,
    /// Section.
    pub section_id: i64,
    /// Model as inverted, Ω·m per cell.
    pub model: &'a [f64],
    /// Model corrected to the reference temperature, Ω·m per cell.
    pub corrected: &'a [f64],
    /// Normalised cumulative sensitivity per cell.
    pub coverage: &'a [f64],
    /// Cells inside the sensitivity mask.
    pub mask: &'a [bool],
    /// χ²/N.
    pub chi2: f64,
    /// RMS misfit, %.
    pub rms_pct: f64,
    /// Gauss–Newton iterations.
    pub iterations: i64,
    /// Final λ.
    pub lambda: f64,
    /// Reached the target misfit?
    pub converged: bool,
    /// Readings used.
    pub n_used: i64,
    /// Temperature correction applied, JSON.
    pub temperature: &'a str,
    /// Warnings, JSON array.
    pub warnings: &'a str,
    /// CPU-bound time spent, s.
    pub seconds: f64,
}

/// One epoch's change section in one mode.
#[derive(Debug, Clone, PartialEq)]
pub struct NewChange<'a> {
    /// Epoch.
    pub epoch_id: i64,
    /// `ratio` or `difference`.
    pub mode: &'a str,
    /// Line.
    pub line_id: i64,
    /// Baseline it is against.
    pub baseline_id: i64,
    /// Section.
    pub section_id: i64,
    /// Temperature-corrected change, % per cell (negative = drop).
    pub change_pct: &'a [f64],
    /// Cells inside the sensitivity mask.
    pub mask: &'a [bool],
    /// χ²/N.
    pub chi2: f64,
    /// RMS misfit, %.
    pub rms_pct: f64,
    /// Iterations.
    pub iterations: i64,
    /// Reached the target misfit?
    pub converged: bool,
    /// Most negative in-mask change, %.
    pub strongest_drop_pct: f64,
    /// Most positive in-mask change, %.
    pub strongest_rise_pct: f64,
    /// Warnings, JSON array.
    pub warnings: &'a str,
    /// CPU-bound time spent, s.
    pub seconds: f64,
}

/// Stores an epoch's model and changes, replacing earlier ones, moves the
/// epoch's status to `status` and queues `next_jobs`, in one transaction.
pub async fn store_epoch(
    db: &Db,
    m: &NewModel<'_>,
    changes: &[NewChange<'_>],
    status: &str,
    next_jobs: &[NextJob],
) -> DbResult<()> {
    let now = super::now();
    let (model, corrected, coverage, mask) = (
        f64s_to_blob(m.model),
        f64s_to_blob(m.corrected),
        f64s_to_blob(m.coverage),
        mask_to_blob(m.mask),
    );
    in_tx!(db, |c| {
        sqlx::query("DELETE FROM epoch_changes WHERE epoch_id = $1")
            .bind(m.epoch_id)
            .execute(&mut *c)
            .await?;
        sqlx::query("DELETE FROM epoch_models WHERE epoch_id = $1")
            .bind(m.epoch_id)
            .execute(&mut *c)
            .await?;
        sqlx::query(
            "INSERT INTO epoch_models (epoch_id, line_id, section_id, model, corrected, coverage,
                 mask, chi2, rms_pct, iterations, lambda, converged, n_used, temperature,
                 warnings, seconds, created_at)
             VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16, $17)",
        )
        .bind(m.epoch_id)
        .bind(m.line_id)
        .bind(m.section_id)
        .bind(&model)
        .bind(&corrected)
        .bind(&coverage)
        .bind(&mask)
        .bind(m.chi2)
        .bind(m.rms_pct)
        .bind(m.iterations)
        .bind(m.lambda)
        .bind(m.converged)
        .bind(m.n_used)
        .bind(m.temperature)
        .bind(m.warnings)
        .bind(m.seconds)
        .bind(now)
        .execute(&mut *c)
        .await?;
        for ch in changes {
            sqlx::query(
                "INSERT INTO epoch_changes (epoch_id, mode, line_id, baseline_id, section_id,
                     change_pct, mask, chi2, rms_pct, iterations, converged, strongest_drop_pct,
                     strongest_rise_pct, warnings, seconds, created_at)
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16)",
            )
            .bind(ch.epoch_id)
            .bind(ch.mode)
            .bind(ch.line_id)
            .bind(ch.baseline_id)
            .bind(ch.section_id)
            .bind(f64s_to_blob(ch.change_pct))
            .bind(mask_to_blob(ch.mask))
            .bind(ch.chi2)
            .bind(ch.rms_pct)
            .bind(ch.iterations)
            .bind(ch.converged)
            .bind(ch.strongest_drop_pct)
            .bind(ch.strongest_rise_pct)
            .bind(ch.warnings)
            .bind(ch.seconds)
            .bind(now)
            .execute(&mut *c)
            .await?;
        }
        sqlx::query("UPDATE epochs SET status = $1 WHERE id = $2")
            .bind(status)
            .bind(m.epoch_id)
            .execute(&mut *c)
            .await?;
        for (key, kind, payload) in next_jobs {
            super::jobs::enqueue_job!(c, key, kind, payload, 0i64, now)?;
        }
        Ok::<_, DbError>(())
    })
}

/// A stored epoch model.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct ModelRow {
    /// Epoch.
    pub epoch_id: i64,
    /// Line.
    pub line_id: i64,
    /// Section.
    pub section_id: i64,
    /// Ω·m per cell as inverted.
    pub model: Vec<u8>,
    /// Ω·m per cell at the reference temperature.
    pub corrected: Vec<u8>,
    /// Coverage per cell.
    pub coverage: Vec<u8>,
    /// Mask per cell.
    pub mask: Vec<u8>,
    /// χ²/N.
    pub chi2: f64,
    /// RMS %.
    pub rms_pct: f64,
    /// Iterations.
    pub iterations: i64,
    /// λ.
    pub lambda: f64,
    /// Converged?
    pub converged: bool,
    /// Readings used.
    pub n_used: i64,
    /// Temperature correction, JSON.
    pub temperature: String,
    /// Warnings, JSON array.
    pub warnings: String,
    /// Seconds spent.
    pub seconds: f64,
    /// When stored.
    pub created_at: DateTime<Utc>,
}

/// The model of an epoch.
pub async fn model(db: &Db, epoch_id: i64) -> DbResult<Option<ModelRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, ModelRow>(
        "SELECT epoch_id, line_id, section_id, model, corrected, coverage, mask, chi2, rms_pct,
             iterations, lambda, converged, n_used, temperature, warnings, seconds, created_at
         FROM epoch_models WHERE epoch_id = $1"
    )
    .bind(epoch_id)
    .fetch_optional(p)
    .await?))
}

/// The newest model of the line stored before `before` (start time), for warm starts.
pub async fn previous_model(
    db: &Db,
    line_id: i64,
    section_id: i64,
    before: DateTime<Utc>,
) -> DbResult<Option<Vec<f64>>> {
    let blob: Option<Vec<u8>> = on_pool!(db, |p| sqlx::query_scalar(
        "SELECT m.model FROM epoch_models m JOIN epochs e ON e.id = m.epoch_id
         WHERE m.line_id = $1 AND m.section_id = $2 AND e.started_at < $3
         ORDER BY e.started_at DESC LIMIT 1"
    )
    .bind(line_id)
    .bind(section_id)
    .bind(before)
    .fetch_optional(p)
    .await?);
    blob.map(|b| blob_to_f64s(&b)).transpose()
}

/// A stored change section.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct ChangeRow {
    /// Epoch.
    pub epoch_id: i64,
    /// Mode.
    pub mode: String,
    /// Line.
    pub line_id: i64,
    /// Baseline.
    pub baseline_id: i64,
    /// Section.
    pub section_id: i64,
    /// % per cell.
    pub change_pct: Vec<u8>,
    /// Mask per cell.
    pub mask: Vec<u8>,
    /// χ²/N.
    pub chi2: f64,
    /// RMS %.
    pub rms_pct: f64,
    /// Iterations.
    pub iterations: i64,
    /// Converged?
    pub converged: bool,
    /// Most negative in-mask change, %.
    pub strongest_drop_pct: f64,
    /// Most positive in-mask change, %.
    pub strongest_rise_pct: f64,
    /// Warnings JSON.
    pub warnings: String,
    /// Seconds spent.
    pub seconds: f64,
    /// When stored.
    pub created_at: DateTime<Utc>,
}

const CHANGE_COLUMNS: &str = "epoch_id, mode, line_id, baseline_id, section_id, change_pct, mask,
    chi2, rms_pct, iterations, converged, strongest_drop_pct, strongest_rise_pct, warnings,
    seconds, created_at";

/// The change sections of an epoch (one per mode).
pub async fn changes(db: &Db, epoch_id: i64) -> DbResult<Vec<ChangeRow>> {
    let sql = format!(
        "SELECT {CHANGE_COLUMNS} FROM epoch_changes WHERE epoch_id = $1 ORDER BY mode DESC"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, ChangeRow>(&sql).bind(epoch_id).fetch_all(p).await?))
}

/// The newest change of the line in `mode` stored before `before`, for warm starts.
pub async fn previous_change_model(
    db: &Db,
    line_id: i64,
    baseline_id: i64,
    mode: &str,
    before: DateTime<Utc>,
) -> DbResult<Option<i64>> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "SELECT c.epoch_id FROM epoch_changes c JOIN epochs e ON e.id = c.epoch_id
         WHERE c.line_id = $1 AND c.baseline_id = $2 AND c.mode = $3 AND e.started_at < $4
         ORDER BY e.started_at DESC LIMIT 1"
    )
    .bind(line_id)
    .bind(baseline_id)
    .bind(mode)
    .bind(before)
    .fetch_optional(p)
    .await?))
}

/// Strongest in-mask drop per processed epoch of a line in `mode`, oldest
/// first: (epoch id, start, strongest drop %).
pub async fn strongest_drops(
    db: &Db,
    line_id: i64,
    mode: &str,
) -> DbResult<Vec<(i64, DateTime<Utc>, f64)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (i64, DateTime<Utc>, f64)>(
        "SELECT c.epoch_id, e.started_at, c.strongest_drop_pct FROM epoch_changes c
         JOIN epochs e ON e.id = c.epoch_id
         WHERE c.line_id = $1 AND c.mode = $2 ORDER BY e.started_at"
    )
    .bind(line_id)
    .bind(mode)
    .fetch_all(p)
    .await?))
}

/// Extra surface points of a line (beyond its electrodes), by x.
pub async fn surface_points(db: &Db, line_id: i64) -> DbResult<Vec<[f64; 2]>> {
    let rows: Vec<(f64, f64)> = on_pool!(db, |p| sqlx::query_as(
        "SELECT x, z FROM surface_points WHERE line_id = $1 ORDER BY x"
    )
    .bind(line_id)
    .fetch_all(p)
    .await?);
    Ok(rows.into_iter().map(|(x, z)| [x, z]).collect())
}

/// Replaces the extra surface points of a line.
pub async fn set_surface_points(db: &Db, line_id: i64, points: &[[f64; 2]]) -> DbResult<()> {
    in_tx!(db, |c| {
        sqlx::query("DELETE FROM surface_points WHERE line_id = $1")
            .bind(line_id)
            .execute(&mut *c)
            .await?;
        for [x, z] in points {
            sqlx::query("INSERT INTO surface_points (line_id, x, z) VALUES ($1, $2, $3)")
                .bind(line_id)
                .bind(x)
                .bind(z)
                .execute(&mut *c)
                .await?;
        }
        Ok::<_, DbError>(())
    })
}

const EPOCH_COLUMNS: &str = "id, line_id, sequence_id, started_at, finished_at, meter_id,
    received_at, status, content_hash, n_readings, raw_upload_id";

/// Ids of the first `limit` quality-controlled epochs of the line on
/// `sequence_id` whose dropped share is below `max_dropped`, oldest first.
pub async fn quiet_epochs(
    db: &Db,
    line_id: i64,
    sequence_id: i64,
    max_dropped: f64,
    limit: i64,
) -> DbResult<Vec<i64>> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "SELECT e.id FROM epochs e JOIN epoch_quality q ON q.epoch_id = e.id
         WHERE e.line_id = $1 AND e.sequence_id = $2 AND q.dropped_share < $3
           AND e.status IN ('checked', 'inverted', 'processed')
         ORDER BY e.started_at LIMIT $4"
    )
    .bind(line_id)
    .bind(sequence_id)
    .bind(max_dropped)
    .bind(limit)
    .fetch_all(p)
    .await?))
}

/// Ids of the line's quality-controlled epochs started within [from, to], oldest first.
pub async fn epochs_between(
    db: &Db,
    line_id: i64,
    from: DateTime<Utc>,
    to: DateTime<Utc>,
) -> DbResult<Vec<(i64, i64)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (i64, i64)>(
        "SELECT id, sequence_id FROM epochs
         WHERE line_id = $1 AND started_at >= $2 AND started_at <= $3
           AND status IN ('checked', 'inverted', 'processed')
         ORDER BY started_at"
    )
    .bind(line_id)
    .bind(from)
    .bind(to)
    .fetch_all(p)
    .await?))
}

/// Marks an epoch failed with the reason (kept for review; reprocessing retries it).
pub async fn mark_failed(db: &Db, epoch_id: i64, message: &str) -> DbResult<()> {
    let now = super::now();
    in_tx!(db, |c| {
        sqlx::query("DELETE FROM epoch_failures WHERE epoch_id = $1")
            .bind(epoch_id)
            .execute(&mut *c)
            .await?;
        sqlx::query(
            "INSERT INTO epoch_failures (epoch_id, stage, message, failed_at)
             VALUES ($1, 'process', $2, $3)",
        )
        .bind(epoch_id)
        .bind(message)
        .bind(now)
        .execute(&mut *c)
        .await?;
        sqlx::query("UPDATE epochs SET status = 'failed' WHERE id = $1")
            .bind(epoch_id)
            .execute(&mut *c)
            .await?;
        Ok::<_, DbError>(())
    })
}

/// Why an epoch failed, if it did.
pub async fn failure(db: &Db, epoch_id: i64) -> DbResult<Option<String>> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, String>(
        "SELECT message FROM epoch_failures WHERE epoch_id = $1"
    )
    .bind(epoch_id)
    .fetch_optional(p)
    .await?))
}

/// Sends the line's epochs from `from` on (all when `None`) back to
/// inversion: status `checked`, their results and failures removed. Returns
/// how many epochs will be reprocessed.
pub async fn reset_from(db: &Db, line_id: i64, from: Option<DateTime<Utc>>) -> DbResult<u64> {
    let from = from.unwrap_or(DateTime::<Utc>::UNIX_EPOCH);
    in_tx!(db, |c| {
        // The cached noise calibration may rest on change sections about to be
        // recomputed: it is measured again from them.
        sqlx::query("DELETE FROM line_noise WHERE line_id = $1")
            .bind(line_id)
            .execute(&mut *c)
            .await?;
        for table in ["epoch_changes", "epoch_models", "epoch_failures"] {
            sqlx::query(&format!(
                "DELETE FROM {table} WHERE epoch_id IN
                 (SELECT id FROM epochs WHERE line_id = $1 AND started_at >= $2)"
            ))
            .bind(line_id)
            .bind(from)
            .execute(&mut *c)
            .await?;
        }
        let n = sqlx::query(
            "UPDATE epochs SET status = 'checked' WHERE line_id = $1 AND started_at >= $2
               AND status IN ('inverted', 'processed', 'failed')",
        )
        .bind(line_id)
        .bind(from)
        .execute(&mut *c)
        .await?
        .rows_affected();
        Ok::<_, DbError>(n)
    })
}

/// Epochs of a line per processing status.
pub async fn status_counts(db: &Db, line_id: i64) -> DbResult<Vec<(String, i64)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (String, i64)>(
        "SELECT status, COUNT(*) FROM epochs WHERE line_id = $1 GROUP BY status ORDER BY status"
    )
    .bind(line_id)
    .fetch_all(p)
    .await?))
}

/// Epochs of a line from `from` on still waiting for processing.
pub async fn pending_since(db: &Db, line_id: i64, from: DateTime<Utc>) -> DbResult<i64> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "SELECT COUNT(*) FROM epochs WHERE line_id = $1 AND started_at >= $2
           AND status IN ('received', 'checked', 'inverted')"
    )
    .bind(line_id)
    .bind(from)
    .fetch_one(p)
    .await?))
}

/// A job to enqueue in the transaction that stores a result: (key, kind, payload).
pub type NextJob = (String, String, String);

/// Queues `per_epoch(id)` for every epoch of the line waiting for inversion
/// (status `checked`), oldest first, and then `then`, in one transaction.
/// Returns how many epochs were queued.
pub async fn queue_checked(
    db: &Db,
    line_id: i64,
    per_epoch: impl Fn(i64) -> NextJob,
    then: &[NextJob],
) -> DbResult<usize> {
    let now = super::now();
    in_tx!(db, |c| {
        let ids: Vec<i64> = sqlx::query_scalar(
            "SELECT id FROM epochs WHERE line_id = $1 AND status = 'checked' ORDER BY started_at",
        )
        .bind(line_id)
        .fetch_all(&mut *c)
        .await?;
        for &id in &ids {
            let (key, kind, payload) = per_epoch(id);
            super::jobs::enqueue_job!(c, &key, &kind, &payload, 0i64, now)?;
        }
        for (key, kind, payload) in then {
            super::jobs::enqueue_job!(c, key, kind, payload, 0i64, now)?;
        }
        Ok::<_, DbError>(ids.len())
    })
}

/// Inverted epochs of a line ready for the monitor: status `inverted` and no
/// earlier epoch of the line still waiting for quality control or inversion
/// (the monitor sees a line's epochs in start-time order), oldest first.
pub async fn epochs_to_monitor(
    db: &Db,
    line_id: i64,
    limit: i64,
) -> DbResult<Vec<super::epochs::EpochRow>> {
    let sql = format!(
        "SELECT {EPOCH_COLUMNS} FROM epochs e WHERE line_id = $1 AND status = 'inverted'
           AND NOT EXISTS (SELECT 1 FROM epochs w WHERE w.line_id = $1
                             AND w.status IN ('received', 'checked') AND w.started_at < e.started_at)
         ORDER BY started_at LIMIT $2"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, super::epochs::EpochRow>(&sql)
        .bind(line_id)
        .bind(limit)
        .fetch_all(p)
        .await?))
}

/// The newest section of a line.
pub async fn latest_section(db: &Db, line_id: i64) -> DbResult<Option<i64>> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "SELECT id FROM line_sections WHERE line_id = $1 ORDER BY id DESC LIMIT 1"
    )
    .bind(line_id)
    .fetch_optional(p)
    .await?))
}

/// Epochs of a line with a stored model, oldest first: (epoch id, start).
pub async fn modelled_epochs(db: &Db, line_id: i64) -> DbResult<Vec<(i64, DateTime<Utc>)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (i64, DateTime<Utc>)>(
        "SELECT m.epoch_id, e.started_at FROM epoch_models m JOIN epochs e ON e.id = m.epoch_id
         WHERE m.line_id = $1 ORDER BY e.started_at, m.epoch_id"
    )
    .bind(line_id)
    .fetch_all(p)
    .await?))
}

/// The models of a line, oldest first, each with its epoch's start (exports).
pub async fn line_models(db: &Db, line_id: i64) -> DbResult<Vec<(DateTime<Utc>, ModelRow)>> {
    #[derive(sqlx::FromRow)]
    struct Row {
        started_at: DateTime<Utc>,
        #[sqlx(flatten)]
        model: ModelRow,
    }
    let rows: Vec<Row> = on_pool!(db, |p| sqlx::query_as::<_, Row>(
        "SELECT e.started_at, m.epoch_id, m.line_id, m.section_id, m.model, m.corrected,
             m.coverage, m.mask, m.chi2, m.rms_pct, m.iterations, m.lambda, m.converged,
             m.n_used, m.temperature, m.warnings, m.seconds, m.created_at
         FROM epoch_models m JOIN epochs e ON e.id = m.epoch_id
         WHERE m.line_id = $1 ORDER BY e.started_at, m.epoch_id"
    )
    .bind(line_id)
    .fetch_all(p)
    .await?);
    Ok(rows.into_iter().map(|r| (r.started_at, r.model)).collect())
}

/// The change sections of a line, oldest first, each with its epoch's start (exports).
pub async fn line_changes(db: &Db, line_id: i64) -> DbResult<Vec<(DateTime<Utc>, ChangeRow)>> {
    #[derive(sqlx::FromRow)]
    struct Row {
        started_at: DateTime<Utc>,
        #[sqlx(flatten)]
        change: ChangeRow,
    }
    let rows: Vec<Row> = on_pool!(db, |p| sqlx::query_as::<_, Row>(
        "SELECT e.started_at, c.epoch_id, c.mode, c.line_id, c.baseline_id, c.section_id,
             c.change_pct, c.mask, c.chi2, c.rms_pct, c.iterations, c.converged,
             c.strongest_drop_pct, c.strongest_rise_pct, c.warnings, c.seconds, c.created_at
         FROM epoch_changes c JOIN epochs e ON e.id = c.epoch_id
         WHERE c.line_id = $1 ORDER BY e.started_at, c.epoch_id, c.mode DESC"
    )
    .bind(line_id)
    .fetch_all(p)
    .await?);
    Ok(rows.into_iter().map(|r| (r.started_at, r.change)).collect())
}

/// Epochs of a line with a change section in `mode` against `baseline_id`,
/// oldest first: (epoch id, start).
pub async fn changed_epochs(
    db: &Db,
    line_id: i64,
    baseline_id: i64,
    mode: &str,
) -> DbResult<Vec<(i64, DateTime<Utc>)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (i64, DateTime<Utc>)>(
        "SELECT c.epoch_id, e.started_at FROM epoch_changes c JOIN epochs e ON e.id = c.epoch_id
         WHERE c.line_id = $1 AND c.baseline_id = $2 AND c.mode = $3
         ORDER BY e.started_at, c.epoch_id"
    )
    .bind(line_id)
    .bind(baseline_id)
    .bind(mode)
    .fetch_all(p)
    .await?))
}
