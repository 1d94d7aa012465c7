//! Exports of a line's results for reports and other tools:
//! `models.csv|json` (resistivity per cell and epoch), `changes.csv|json`
//! (change per cell, epoch and mode; both for one epoch with `?epoch=ID`), `zones.csv|json` (every zone of every
//! epoch) and `sections.vtu?epoch=ID` (one epoch's sections as a VTK XML
//! UnstructuredGrid: cells as polygons in the x–z plane, x = chainage,
//! z = elevation, y = 0; cell arrays `resistivity` (Ω·m, temperature
//! corrected), `change` (%, primary mode; NaN without a change section) and
//! `in_mask` (1 inside the sensitivity mask)).
//!
//! The VTK XML format is the open format of the Visualization Toolkit
//! ("VTK File Formats", VTK User's Guide, Kitware); polygons are cell type 7.

use std::collections::HashMap;
use std::fmt::Write as _;

use axum::extract::{Path, Query, State};
use axum::http::header;
use axum::response::{IntoResponse, Response};
use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};
use serde_json::json;

use super::PageError;
use super::figures::{grid, line_named, primary_mode};
use super::forms::SignedIn;
use super::view::iso;
use crate::app::AppState;
use crate::db::{self, alerts::ZoneRow, lines::Line, models};

/// Query of the exports.
#[derive(Debug, Deserialize)]
pub struct ExportQuery {
    /// Epoch of `sections.vtu` (default: the newest processed one); for the
    /// models and changes, only this epoch (default: every epoch).
    pub epoch: Option<i64>,
}

/// A response that downloads `body` as the file `name`.
pub(super) fn download(mime: &'static str, name: String, body: Vec<u8>) -> Response {
    let mut resp =
        ([(header::CONTENT_TYPE, mime), (header::CACHE_CONTROL, "private, no-cache")], body)
            .into_response();
    if let Ok(v) = format!("attachment; filename=\"{name}\"").parse() {
        resp.headers_mut().insert(header::CONTENT_DISPOSITION, v);
    }
    resp
}

fn csv_bytes(
    header: &[&str],
    rows: impl Iterator<Item = Vec<String>>,
) -> Result<Vec<u8>, PageError> {
    let mut w = csv::Writer::from_writer(Vec::new());
    let bad = |e: csv::Error| PageError::Task(format!("CSV export: {e}"));
    w.write_record(header).map_err(bad)?;
    for r in rows {
        w.write_record(&r).map_err(bad)?;
    }
    w.into_inner().map_err(|e| PageError::Task(format!("CSV export: {e}")))
}

/// `GET /lines/{line}/export/{file}`.
pub async fn export(
    State(state): State<AppState>,
    _who: SignedIn,
    Path((name, file)): Path<(String, String)>,
    Query(q): Query<ExportQuery>,
) -> Result<Response, PageError> {
    let line = line_named(&state, &name).await?;
    let base = line.name.clone();
    match file.as_str() {
        "models.csv" => Ok(download(
            "text/csv; charset=utf-8",
            format!("{base}-models.csv"),
            models_csv(&state, &line, q.epoch).await?,
        )),
        "models.json" => Ok(download(
            "application/json",
            format!("{base}-models.json"),
            models_json(&state, &line, q.epoch).await?,
        )),
        "changes.csv" => Ok(download(
            "text/csv; charset=utf-8",
            format!("{base}-changes.csv"),
            changes_csv(&state, &line, q.epoch).await?,
        )),
        "changes.json" => Ok(download(
            "application/json",
            format!("{base}-changes.json"),
            changes_json(&state, &line, q.epoch).await?,
        )),
        "zones.csv" => {
            let zones = db::alerts::line_zones(&state.db, line.id).await?;
            let body = csv_bytes(
                &[
                    "epoch_id",
                    "started_at",
                    "zone",
                    "direction",
                    "level",
                    "x_min_m",
                    "x_max_m",
                    "depth_top_m",
                    "depth_bottom_m",
                    "area_m2",
                    "centroid_x_m",
                    "centroid_z_m",
                    "mean_change_pct",
                    "peak_change_pct",
                    "good_share",
                ],
                zones.iter().map(|(e, t, z)| {
                    vec![
                        e.to_string(),
                        iso(*t),
                        format!("Z{}", z.track),
                        z.direction.clone(),
                        z.level.map(|l| l.to_string()).unwrap_or_default(),
                        z.x_min.to_string(),
                        z.x_max.to_string(),
                        z.depth_top.to_string(),
                        z.depth_bottom.to_string(),
                        z.area_m2.to_string(),
                        z.centroid_x.to_string(),
                        z.centroid_z.to_string(),
                        z.mean_change_pct.to_string(),
                        z.peak_change_pct.to_string(),
                        z.good_share.to_string(),
                    ]
                }),
            )?;
            Ok(download("text/csv; charset=utf-8", format!("{base}-zones.csv"), body))
        }
        "zones.json" => {
            #[derive(Serialize)]
            struct Z<'a> {
                epoch_id: i64,
                started_at: DateTime<Utc>,
                #[serde(flatten)]
                zone: &'a ZoneRow,
            }
            let zones = db::alerts::line_zones(&state.db, line.id).await?;
            let list: Vec<Z> =
                zones.iter().map(|(e, t, z)| Z { epoch_id: *e, started_at: *t, zone: z }).collect();
            let body = serde_json::to_vec(&json!({"line": line.name, "zones": list}))
                .map_err(|e| PageError::Task(e.to_string()))?;
            Ok(download("application/json", format!("{base}-zones.json"), body))
        }
        "sections.vtu" => {
            let epoch_id = match q.epoch {
                Some(id) => id,
                None => models::modelled_epochs(&state.db, line.id)
                    .await?
                    .last()
                    .map(|e| e.0)
                    .ok_or_else(|| {
                        PageError::NotFound(format!("Processed epochs of line {}", line.name))
                    })?,
            };
            let body = vtu(&state, &line, epoch_id).await?;
            Ok(download(
                "application/xml",
                format!("{base}-epoch-{epoch_id}-sections.vtu"),
                body.into_bytes(),
            ))
        }
        _ => Err(PageError::NotFound(format!("Export {file:?}"))),
    }
}

/// Cell centroids of a section (x, z), metres.
async fn centroids(
    state: &AppState,
    cache: &mut HashMap<i64, Vec<[f64; 2]>>,
    section_id: i64,
) -> Result<(), PageError> {
    if let std::collections::hash_map::Entry::Vacant(slot) = cache.entry(section_id) {
        let g = grid(state, section_id).await?;
        slot.insert(g.grid.cells().iter().map(|c| c.centroid()).collect());
    }
    Ok(())
}

async fn models_csv(
    state: &AppState,
    line: &Line,
    only: Option<i64>,
) -> Result<Vec<u8>, PageError> {
    let mut rows = models::line_models(&state.db, line.id).await?;
    rows.retain(|(_, m)| only.is_none_or(|id| m.epoch_id == id));
    let mut cache = HashMap::new();
    let mut out = Vec::new();
    for (t, m) in &rows {
        centroids(state, &mut cache, m.section_id).await?;
        let c = &cache[&m.section_id];
        let raw = models::blob_to_f64s(&m.model)?;
        let corrected = models::blob_to_f64s(&m.corrected)?;
        let coverage = models::blob_to_f64s(&m.coverage)?;
        let mask = models::blob_to_mask(&m.mask);
        for (i, r) in raw.iter().enumerate() {
            out.push(vec![
                m.epoch_id.to_string(),
                iso(*t),
                m.section_id.to_string(),
                i.to_string(),
                c.get(i).map(|p| p[0].to_string()).unwrap_or_default(),
                c.get(i).map(|p| p[1].to_string()).unwrap_or_default(),
                r.to_string(),
                corrected.get(i).map(f64::to_string).unwrap_or_default(),
                coverage.get(i).map(f64::to_string).unwrap_or_default(),
                u8::from(mask.get(i).copied().unwrap_or(false)).to_string(),
            ]);
        }
    }
    csv_bytes(
        &[
            "epoch_id",
            "started_at",
            "section_id",
            "cell",
            "x_m",
            "z_m",
            "resistivity_ohm_m",
            "corrected_ohm_m",
            "coverage",
            "in_mask",
        ],
        out.into_iter(),
    )
}

async fn changes_csv(
    state: &AppState,
    line: &Line,
    only: Option<i64>,
) -> Result<Vec<u8>, PageError> {
    let mut rows = models::line_changes(&state.db, line.id).await?;
    rows.retain(|(_, c)| only.is_none_or(|id| c.epoch_id == id));
    let mut cache = HashMap::new();
    let mut out = Vec::new();
    for (t, ch) in &rows {
        centroids(state, &mut cache, ch.section_id).await?;
        let c = &cache[&ch.section_id];
        let values = models::blob_to_f64s(&ch.change_pct)?;
        let mask = models::blob_to_mask(&ch.mask);
        for (i, v) in values.iter().enumerate() {
            out.push(vec![
                ch.epoch_id.to_string(),
                iso(*t),
                ch.mode.clone(),
                ch.baseline_id.to_string(),
                i.to_string(),
                c.get(i).map(|p| p[0].to_string()).unwrap_or_default(),
                c.get(i).map(|p| p[1].to_string()).unwrap_or_default(),
                v.to_string(),
                u8::from(mask.get(i).copied().unwrap_or(false)).to_string(),
            ]);
        }
    }
    csv_bytes(
        &[
            "epoch_id",
            "started_at",
            "mode",
            "baseline_id",
            "cell",
            "x_m",
            "z_m",
            "change_pct",
            "in_mask",
        ],
        out.into_iter(),
    )
}

async fn section_polygons(
    state: &AppState,
    ids: impl Iterator<Item = i64>,
) -> Result<serde_json::Map<String, serde_json::Value>, PageError> {
    let mut sections = serde_json::Map::new();
    for id in ids {
        if sections.contains_key(&id.to_string()) {
            continue;
        }
        let s = models::section(&state.db, id)
            .await?
            .ok_or_else(|| PageError::NotFound(format!("Section {id}")))?;
        sections.insert(id.to_string(), json!(s.polygons()?));
    }
    Ok(sections)
}

async fn models_json(
    state: &AppState,
    line: &Line,
    only: Option<i64>,
) -> Result<Vec<u8>, PageError> {
    let mut rows = models::line_models(&state.db, line.id).await?;
    rows.retain(|(_, m)| only.is_none_or(|id| m.epoch_id == id));
    let sections = section_polygons(state, rows.iter().map(|(_, m)| m.section_id)).await?;
    let mut epochs = Vec::new();
    for (t, m) in &rows {
        epochs.push(json!({
            "epoch_id": m.epoch_id,
            "started_at": t,
            "section_id": m.section_id,
            "chi2": m.chi2,
            "rms_pct": m.rms_pct,
            "converged": m.converged,
            "resistivity_ohm_m": models::blob_to_f64s(&m.model)?,
            "corrected_ohm_m": models::blob_to_f64s(&m.corrected)?,
            "in_mask": models::blob_to_mask(&m.mask),
        }));
    }
    serde_json::to_vec(&json!({
        "line": line.name,
        "sections": sections,
        "epochs": epochs,
    }))
    .map_err(|e| PageError::Task(e.to_string()))
}

async fn changes_json(
    state: &AppState,
    line: &Line,
    only: Option<i64>,
) -> Result<Vec<u8>, PageError> {
    let mut rows = models::line_changes(&state.db, line.id).await?;
    rows.retain(|(_, c)| only.is_none_or(|id| c.epoch_id == id));
    let sections = section_polygons(state, rows.iter().map(|(_, c)| c.section_id)).await?;
    let mut epochs = Vec::new();
    for (t, c) in &rows {
        epochs.push(json!({
            "epoch_id": c.epoch_id,
            "started_at": t,
            "mode": c.mode,
            "baseline_id": c.baseline_id,
            "section_id": c.section_id,
            "strongest_drop_pct": c.strongest_drop_pct,
            "strongest_rise_pct": c.strongest_rise_pct,
            "change_pct": models::blob_to_f64s(&c.change_pct)?,
            "in_mask": models::blob_to_mask(&c.mask),
        }));
    }
    serde_json::to_vec(&json!({
        "line": line.name,
        "sections": sections,
        "changes": epochs,
    }))
    .map_err(|e| PageError::Task(e.to_string()))
}

/// One epoch's sections as VTK XML UnstructuredGrid (ASCII), vertices shared
/// between cells where they coincide exactly.
async fn vtu(state: &AppState, line: &Line, epoch_id: i64) -> Result<String, PageError> {
    let m = models::model(&state.db, epoch_id).await?.filter(|m| m.line_id == line.id).ok_or_else(
        || PageError::NotFound(format!("The model of epoch {epoch_id} of line {}", line.name)),
    )?;
    let section = models::section(&state.db, m.section_id)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Section {}", m.section_id)))?;
    let polygons = section.polygons()?;
    let rho = models::blob_to_f64s(&m.corrected)?;
    let mask = models::blob_to_mask(&m.mask);
    let mode = primary_mode(state);
    let change = models::changes(&state.db, epoch_id)
        .await?
        .into_iter()
        .find(|c| c.mode == mode && c.section_id == m.section_id)
        .map(|c| models::blob_to_f64s(&c.change_pct))
        .transpose()?;
    Ok(write_vtu(&polygons, &rho, change.as_deref(), &mask))
}

/// Writes polygons with their cell values as a VTK XML UnstructuredGrid.
pub fn write_vtu(
    polygons: &[Vec<[f64; 2]>],
    rho: &[f64],
    change: Option<&[f64]>,
    mask: &[bool],
) -> String {
    let mut index: HashMap<(u64, u64), usize> = HashMap::new();
    let mut points: Vec<[f64; 2]> = Vec::new();
    let mut connectivity = Vec::new();
    let mut offsets = Vec::with_capacity(polygons.len());
    for poly in polygons {
        for p in poly {
            let key = (p[0].to_bits(), p[1].to_bits());
            let i = *index.entry(key).or_insert_with(|| {
                points.push(*p);
                points.len() - 1
            });
            connectivity.push(i);
        }
        offsets.push(connectivity.len());
    }
    let join = |it: &mut dyn Iterator<Item = String>| it.collect::<Vec<_>>().join(" ");
    let num = |v: f64| if v.is_finite() { v.to_string() } else { "nan".to_string() };
    let mut s = String::new();
    let n = polygons.len();
    let _ = writeln!(s, "<?xml version=\"1.0\"?>");
    let _ = writeln!(
        s,
        "<VTKFile type=\"UnstructuredGrid\" version=\"1.0\" byte_order=\"LittleEndian\" header_type=\"UInt64\">"
    );
    let _ = writeln!(s, "<UnstructuredGrid>");
    let _ = writeln!(s, "<Piece NumberOfPoints=\"{}\" NumberOfCells=\"{n}\">", points.len());
    let _ = writeln!(
        s,
        "<Points><DataArray type=\"Float64\" Name=\"chainage_0_elevation_m\" NumberOfComponents=\"3\" format=\"ascii\">{}</DataArray></Points>",
        join(&mut points.iter().map(|p| format!("{} 0 {}", p[0], p[1])))
    );
    let _ = writeln!(s, "<Cells>");
    let _ = writeln!(
        s,
        "<DataArray type=\"Int64\" Name=\"connectivity\" format=\"ascii\">{}</DataArray>",
        join(&mut connectivity.iter().map(usize::to_string))
    );
    let _ = writeln!(
        s,
        "<DataArray type=\"Int64\" Name=\"offsets\" format=\"ascii\">{}</DataArray>",
        join(&mut offsets.iter().map(usize::to_string))
    );
    let _ = writeln!(
        s,
        "<DataArray type=\"UInt8\" Name=\"types\" format=\"ascii\">{}</DataArray>",
        join(&mut (0..n).map(|_| "7".to_string()))
    );
    let _ = writeln!(s, "</Cells>");
    let _ = writeln!(s, "<CellData Scalars=\"resistivity\">");
    let _ = writeln!(
        s,
        "<DataArray type=\"Float64\" Name=\"resistivity\" format=\"ascii\">{}</DataArray>",
        join(&mut (0..n).map(|i| num(rho.get(i).copied().unwrap_or(f64::NAN))))
    );
    let _ = writeln!(
        s,
        "<DataArray type=\"Float64\" Name=\"change\" format=\"ascii\">{}</DataArray>",
        join(&mut (0..n).map(|i| num(change.and_then(|c| c.get(i).copied()).unwrap_or(f64::NAN))))
    );
    let _ = writeln!(
        s,
        "<DataArray type=\"UInt8\" Name=\"in_mask\" format=\"ascii\">{}</DataArray>",
        join(&mut (0..n).map(|i| u8::from(mask.get(i).copied().unwrap_or(false)).to_string()))
    );
    let _ = writeln!(s, "</CellData>");
    let _ = writeln!(s, "</Piece>");
    let _ = writeln!(s, "</UnstructuredGrid>");
    let _ = writeln!(s, "</VTKFile>");
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two unit squares sharing an edge: 6 distinct points, offsets 4 and 8
    /// (the layout of the VTK XML format, VTK User's Guide, "VTK File Formats").
    #[test]
    fn shared_vertices_are_written_once() {
        let a = vec![[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]];
        let b = vec![[1.0, 0.0], [2.0, 0.0], [2.0, 1.0], [1.0, 1.0]];
        let s = write_vtu(&[a, b], &[10.0, 20.0], None, &[true, false]);
        assert!(s.contains("NumberOfPoints=\"6\" NumberOfCells=\"2\""), "{s}");
        assert!(s.contains("Name=\"offsets\" format=\"ascii\">4 8<"), "{s}");
        assert!(s.contains("Name=\"connectivity\" format=\"ascii\">0 1 2 3 1 4 5 2<"), "{s}");
        assert!(s.contains("Name=\"change\" format=\"ascii\">nan nan<"), "{s}");
        assert!(s.contains("Name=\"in_mask\" format=\"ascii\">1 0<"), "{s}");
    }
}
