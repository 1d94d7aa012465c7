//! Resistivity and change sections of an epoch as JSON: cells as polygons with
//! their values, the sensitivity mask and a summary.

use axum::Json;
use axum::extract::{Path, Query, State};
use serde::{Deserialize, Serialize};

use super::epochs::epoch_for;
use crate::app::AppState;
use crate::auth::Caller;
use crate::db::{self, alerts::ZoneRow, models};
use crate::error::ApiError;

/// One cell of a section.
#[derive(Serialize)]
pub struct CellDto {
    /// Vertices (x chainage, z elevation), metres, counter-clockwise.
    pub polygon: Vec<[f64; 2]>,
    /// Value (Ω·m for a model, % for a change).
    pub value: f64,
    /// Inside the sensitivity mask.
    pub in_mask: bool,
}

/// `GET /api/v1/epochs/{id}/model` response.
#[derive(Serialize)]
pub struct ModelResponse {
    /// Epoch.
    pub epoch_id: i64,
    /// Line slug.
    pub line: String,
    /// Epoch start.
    pub started_at: chrono::DateTime<chrono::Utc>,
    /// Unit of the cell values.
    pub unit: &'static str,
    /// Values corrected to the reference temperature?
    pub temperature_corrected: bool,
    /// Summary of the inversion.
    pub summary: ModelSummary,
    /// Cells.
    pub cells: Vec<CellDto>,
}

/// Summary of an inversion.
#[derive(Serialize)]
pub struct ModelSummary {
    /// χ²/N.
    pub chi2: f64,
    /// RMS misfit, %.
    pub rms_pct: f64,
    /// Gauss–Newton iterations.
    pub iterations: i64,
    /// Final λ.
    pub lambda: f64,
    /// Reached the target misfit.
    pub converged: bool,
    /// Readings used.
    pub n_used: i64,
    /// Temperature correction applied.
    pub temperature: serde_json::Value,
    /// Warnings.
    pub warnings: Vec<String>,
    /// Seconds of computation.
    pub seconds: f64,
}

/// Query of the model endpoint.
#[derive(Deserialize)]
pub struct ModelQuery {
    /// `corrected` (default: at the reference temperature) or `raw`.
    pub values: Option<String>,
}

fn not_processed(id: i64, what: &str) -> ApiError {
    ApiError::NotFound(format!("{what} of epoch {id} (not processed yet, or it failed)"))
}

async fn section_polygons(state: &AppState, id: i64) -> Result<Vec<Vec<[f64; 2]>>, ApiError> {
    let s = models::section(&state.db, id)
        .await?
        .ok_or_else(|| ApiError::NotFound(format!("section {id}")))?;
    Ok(s.polygons()?)
}

/// `GET /api/v1/epochs/{id}/model`: the epoch's resistivity section.
pub async fn model(
    State(state): State<AppState>,
    auth: Caller,
    Path(id): Path<i64>,
    Query(q): Query<ModelQuery>,
) -> Result<Json<ModelResponse>, ApiError> {
    let (epoch, line) = epoch_for(&state, &auth, id).await?;
    let m = models::model(&state.db, id).await?.ok_or_else(|| not_processed(id, "model"))?;
    let raw = match q.values.as_deref() {
        None | Some("corrected") => false,
        Some("raw") => true,
        Some(other) => {
            return Err(ApiError::BadRequest {
                message: format!("values must be \"corrected\" or \"raw\", not {other:?}"),
                field: Some("values".into()),
            });
        }
    };
    let values = models::blob_to_f64s(if raw { &m.model } else { &m.corrected })?;
    let mask = models::blob_to_mask(&m.mask);
    let polygons = section_polygons(&state, m.section_id).await?;
    let cells = polygons
        .into_iter()
        .zip(values.into_iter().zip(mask))
        .map(|(polygon, (value, in_mask))| CellDto { polygon, value, in_mask })
        .collect();
    Ok(Json(ModelResponse {
        epoch_id: id,
        line: line.name,
        started_at: epoch.started_at,
        unit: "ohm_m",
        temperature_corrected: !raw,
        summary: ModelSummary {
            chi2: m.chi2,
            rms_pct: m.rms_pct,
            iterations: m.iterations,
            lambda: m.lambda,
            converged: m.converged,
            n_used: m.n_used,
            temperature: serde_json::from_str(&m.temperature).unwrap_or_default(),
            warnings: serde_json::from_str(&m.warnings).unwrap_or_default(),
            seconds: m.seconds,
        },
        cells,
    }))
}

/// `GET /api/v1/epochs/{id}/change` response.
#[derive(Serialize)]
pub struct ChangeResponse {
    /// Epoch.
    pub epoch_id: i64,
    /// Line slug.
    pub line: String,
    /// Epoch start.
    pub started_at: chrono::DateTime<chrono::Utc>,
    /// `ratio` or `difference`.
    pub mode: String,
    /// Modes available for this epoch.
    pub modes: Vec<String>,
    /// Baseline the change is against.
    pub baseline_id: i64,
    /// Unit of the cell values.
    pub unit: &'static str,
    /// Summary.
    pub summary: ChangeSummary,
    /// Zones found in this epoch (primary mode).
    pub zones: Vec<ZoneRow>,
    /// Line-wide wetting notice of this epoch, if any.
    pub wetting: Option<serde_json::Value>,
    /// Cells.
    pub cells: Vec<CellDto>,
}

/// Summary of a change inversion.
#[derive(Serialize)]
pub struct ChangeSummary {
    /// χ²/N.
    pub chi2: f64,
    /// RMS misfit, %.
    pub rms_pct: f64,
    /// Iterations.
    pub iterations: i64,
    /// Reached the target misfit.
    pub converged: bool,
    /// Most negative in-mask change, %.
    pub strongest_drop_pct: f64,
    /// Most positive in-mask change, %.
    pub strongest_rise_pct: f64,
    /// Warnings.
    pub warnings: Vec<String>,
    /// Seconds of computation.
    pub seconds: f64,
}

/// Query of the change endpoint.
#[derive(Deserialize)]
pub struct ChangeQuery {
    /// `ratio` or `difference` (default: the first configured mode).
    pub mode: Option<String>,
}

/// `GET /api/v1/epochs/{id}/change`: the epoch's temperature-corrected change
/// against the baseline, in percent.
pub async fn change(
    State(state): State<AppState>,
    auth: Caller,
    Path(id): Path<i64>,
    Query(q): Query<ChangeQuery>,
) -> Result<Json<ChangeResponse>, ApiError> {
    let (epoch, line) = epoch_for(&state, &auth, id).await?;
    let all = models::changes(&state.db, id).await?;
    if all.is_empty() {
        return Err(not_processed(id, "change section"));
    }
    let modes: Vec<String> = all.iter().map(|c| c.mode.clone()).collect();
    let wanted = q
        .mode
        .clone()
        .unwrap_or_else(|| state.config.processing.change_modes[0].as_str().to_string());
    let c = all.into_iter().find(|c| c.mode == wanted).ok_or_else(|| ApiError::BadRequest {
        message: format!("mode {wanted:?} is not stored for epoch {id}; stored: {modes:?}"),
        field: Some("mode".into()),
    })?;
    let values = models::blob_to_f64s(&c.change_pct)?;
    let mask = models::blob_to_mask(&c.mask);
    let polygons = section_polygons(&state, c.section_id).await?;
    let cells = polygons
        .into_iter()
        .zip(values.into_iter().zip(mask))
        .map(|(polygon, (value, in_mask))| CellDto { polygon, value, in_mask })
        .collect();
    let zones = db::alerts::epoch_zones(&state.db, id).await?;
    let wetting =
        db::alerts::epoch_wetting(&state.db, id).await?.and_then(|w| serde_json::from_str(&w).ok());
    Ok(Json(ChangeResponse {
        epoch_id: id,
        line: line.name,
        started_at: epoch.started_at,
        mode: c.mode,
        modes,
        baseline_id: c.baseline_id,
        unit: "percent",
        summary: ChangeSummary {
            chi2: c.chi2,
            rms_pct: c.rms_pct,
            iterations: c.iterations,
            converged: c.converged,
            strongest_drop_pct: c.strongest_drop_pct,
            strongest_rise_pct: c.strongest_rise_pct,
            warnings: serde_json::from_str(&c.warnings).unwrap_or_default(),
            seconds: c.seconds,
        },
        zones,
        wetting,
        cells,
    }))
}
