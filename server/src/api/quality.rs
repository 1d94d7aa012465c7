//! Quality-control outcomes of an epoch.

use std::collections::BTreeMap;

use axum::Json;
use axum::extract::{Path, State};
use serde::Serialize;

use super::epochs::epoch_for;
use crate::app::AppState;
use crate::auth::Caller;
use crate::db::{self, quality::QualityEventRow};
use crate::error::ApiError;

/// `GET /api/v1/epochs/{id}/quality` response.
#[derive(Serialize)]
pub struct QualityReport {
    /// Epoch id.
    pub epoch_id: i64,
    /// When quality control ran.
    pub processed_at: chrono::DateTime<chrono::Utc>,
    /// Readings checked.
    pub n_readings: i64,
    /// Readings dropped.
    pub n_dropped: i64,
    /// Share dropped (0–1).
    pub dropped_share: f64,
    /// Readings dropped per rule code.
    pub dropped_by_rule: BTreeMap<String, i64>,
    /// Labels of electrodes flagged in this epoch.
    pub flagged_electrodes: Vec<String>,
    /// Median apparent resistivity, Ω·m.
    pub median_rho_a_ohm_m: Option<f64>,
    /// Error model in effect (δR = a + b·|R|).
    pub error_model: ErrorModelDto,
    /// Warnings of the checks and the fit.
    pub warnings: Vec<String>,
    /// Per reading, upload order.
    pub readings: Vec<ReadingDto>,
    /// Per electrode, cable order.
    pub electrodes: Vec<ElectrodeDto>,
    /// Data-quality events of this epoch.
    pub events: Vec<QualityEventRow>,
}

/// The error model.
#[derive(Serialize)]
pub struct ErrorModelDto {
    /// Absolute term a, Ω.
    pub absolute_ohm: f64,
    /// Relative term b (0.02 = 2 %).
    pub relative: f64,
    /// Fitted from reciprocal pairs (false: the configured default).
    pub fitted: bool,
    /// Pairs used.
    pub pairs: i64,
}

/// One reading's outcome.
#[derive(Serialize)]
pub struct ReadingDto {
    /// Order in the upload (0-based).
    pub row_index: i64,
    /// Electrode labels.
    pub a: String,
    /// Electrode label or empty for remote.
    pub b: String,
    /// Electrode label.
    pub m: String,
    /// Electrode label or empty for remote.
    pub n: String,
    /// Kept for inversion.
    pub kept: bool,
    /// Geometric factor, m.
    pub k_factor_m: Option<f64>,
    /// Apparent resistivity, Ω·m.
    pub rho_a_ohm_m: Option<f64>,
    /// Reciprocal error (0.05 = 5 %).
    pub reciprocal_error: Option<f64>,
    /// Robust spike score.
    pub spike_score: Option<f64>,
    /// Rule codes that dropped it.
    pub rules: Vec<String>,
    /// Why, in words.
    pub reasons: String,
}

/// One electrode's health in this epoch.
#[derive(Serialize)]
pub struct ElectrodeDto {
    /// Label.
    pub label: String,
    /// In service when checked.
    pub in_service: bool,
    /// Readings using it.
    pub n_readings: i64,
    /// Of those, failing.
    pub n_failing: i64,
    /// Share failing.
    pub fail_share: Option<f64>,
    /// Contact resistance, Ω.
    pub contact_ohm: Option<f64>,
    /// Flag codes.
    pub flags: Vec<String>,
    /// Consecutive flagged epochs.
    pub consecutive_flags: i64,
}

fn codes(s: &str) -> Vec<String> {
    s.split(',').filter(|c| !c.is_empty()).map(str::to_string).collect()
}

/// `GET /api/v1/epochs/{id}/quality`.
pub async fn show(
    State(state): State<AppState>,
    auth: Caller,
    Path(id): Path<i64>,
) -> Result<Json<QualityReport>, ApiError> {
    let (epoch, line) = epoch_for(&state, &auth, id).await?;
    let q = db::quality::epoch(&state.db, id).await?.ok_or_else(|| {
        ApiError::NotFound(format!(
            "quality outcome of epoch {id} (status {:?}; not checked yet)",
            epoch.status
        ))
    })?;
    let electrodes = db::lines::electrodes(&state.db, line.id).await?;
    let label = |p: i64| electrodes.get(p as usize).map(|e| e.label.clone()).unwrap_or_default();
    let seq = db::sequences::load(&state.db, epoch.sequence_id, electrodes.len()).await?;
    let readings = db::quality::readings(&state.db, id)
        .await?
        .into_iter()
        .map(|r| {
            let quad = seq.quadrupoles().get(r.quad as usize).copied();
            let l = |e: Option<usize>| e.map(|e| label(e as i64)).unwrap_or_default();
            ReadingDto {
                row_index: r.row_index,
                a: l(quad.map(|q| q.a)),
                b: l(quad.and_then(|q| q.b)),
                m: l(quad.map(|q| q.m)),
                n: l(quad.and_then(|q| q.n)),
                kept: r.kept,
                k_factor_m: r.k_factor,
                rho_a_ohm_m: r.rho_a,
                reciprocal_error: r.reciprocal_error,
                spike_score: r.spike_score,
                rules: codes(&r.rules),
                reasons: r.reasons,
            }
        })
        .collect();
    let electrode_rows = db::quality::electrodes(&state.db, id)
        .await?
        .into_iter()
        .map(|e| ElectrodeDto {
            label: label(e.position),
            in_service: e.in_service,
            n_readings: e.n_readings,
            n_failing: e.n_failing,
            fail_share: e.fail_share,
            contact_ohm: e.contact_ohm,
            flags: codes(&e.flags),
            consecutive_flags: e.consecutive_flags,
        })
        .collect();
    let flagged: Vec<i64> = serde_json::from_str(&q.flagged).unwrap_or_default();
    Ok(Json(QualityReport {
        epoch_id: id,
        processed_at: q.processed_at,
        n_readings: q.n_readings,
        n_dropped: q.n_dropped,
        dropped_share: q.dropped_share,
        dropped_by_rule: serde_json::from_str(&q.rule_counts).unwrap_or_default(),
        flagged_electrodes: flagged.into_iter().map(label).collect(),
        median_rho_a_ohm_m: q.median_rho_a,
        error_model: ErrorModelDto {
            absolute_ohm: q.error_a_ohm,
            relative: q.error_b,
            fitted: q.error_fitted,
            pairs: q.error_pairs,
        },
        warnings: serde_json::from_str(&q.warnings).unwrap_or_default(),
        readings,
        electrodes: electrode_rows,
        events: db::quality::epoch_events(&state.db, id).await?,
    }))
}
