//! Figures of the review pages, drawn by `ohmline_core::figures` on request:
//! an epoch's resistivity or change section (SVG or PNG), the season's
//! strongest-change chart of a line, a zone's history for its alert, and the
//! data-quality charts. Pages show them with `<img>`, so they read without
//! JavaScript.
//!
//! Section grids are rebuilt from the stored polygons once per section id and
//! kept; rendered section figures are kept per epoch, kind and the model's
//! storage time (a reprocessed epoch gets a new key), the season and quality
//! charts per line and the state of their data. Drawing runs off the async
//! workers.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};

use axum::extract::{Path, Query, State};
use axum::http::header;
use axum::response::{IntoResponse, Response};
use chrono::{DateTime, Utc};
use ohmline_core::figures::{
    Axis, Canvas, ElectrodeHealth, Figure, HealthStrip, HealthStripParams, PseudoValues,
    PseudosectionFigure, PseudosectionParams, SectionFigure, SectionParams, SectionValues,
    Sparkline, SparklineParams, Threshold, TimeChart, TimeChartParams, TimeSeries, Zone,
};
use ohmline_core::geometry::{LineGeometry, Surface};
use ohmline_core::section::SectionGrid;
use serde::Deserialize;

use super::PageError;
use super::forms::SignedIn;
use crate::app::AppState;
use crate::db::{self, lines::Line, models};

/// Rendered section figures kept at most (each some tens of kB).
const MAX_KEPT: usize = 512;

/// A section grid with the line geometry it is drawn with.
pub struct GridEntry {
    /// Cells of the section.
    pub grid: SectionGrid,
    /// Electrodes of the line.
    pub geometry: LineGeometry,
}

/// Section grids by section id and rendered section figures by key.
#[derive(Default)]
pub struct FigureCache {
    grids: Mutex<HashMap<i64, Arc<GridEntry>>>,
    images: Mutex<HashMap<String, Arc<Vec<u8>>>>,
}

impl FigureCache {
    pub(super) fn image(&self, key: &str) -> Option<Arc<Vec<u8>>> {
        self.images.lock().expect("figure cache lock").get(key).cloned()
    }

    pub(super) fn keep(&self, key: String, bytes: Arc<Vec<u8>>) {
        let mut m = self.images.lock().expect("figure cache lock");
        if m.len() >= MAX_KEPT {
            m.clear();
        }
        m.insert(key, bytes);
    }
}

fn failed(what: &str, e: impl std::fmt::Display) -> PageError {
    PageError::Task(format!("{what}: {e}"))
}

/// The grid of a stored section, rebuilt once and kept.
pub async fn grid(state: &AppState, section_id: i64) -> Result<Arc<GridEntry>, PageError> {
    if let Some(g) = state.figures.grids.lock().expect("grid cache lock").get(&section_id) {
        return Ok(g.clone());
    }
    let row = models::section(&state.db, section_id)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Section {section_id}")))?;
    let polygons = row.polygons()?;
    let geometry = db::lines::geometry(&state.db, row.line_id).await?;
    let points = models::surface_points(&state.db, row.line_id).await?;
    let surface =
        Surface::through_line(&geometry, &points).map_err(|e| failed("ground surface", e))?;
    let grid = SectionGrid::new(polygons, surface).map_err(|e| failed("section grid", e))?;
    let entry = Arc::new(GridEntry { grid, geometry });
    state.figures.grids.lock().expect("grid cache lock").insert(section_id, entry.clone());
    Ok(entry)
}

/// Runs drawing off the async workers.
pub(super) async fn draw<T: Send + 'static>(
    f: impl FnOnce() -> Result<T, String> + Send + 'static,
) -> Result<T, PageError> {
    tokio::task::spawn_blocking(f)
        .await
        .map_err(|e| PageError::Task(e.to_string()))?
        .map_err(PageError::Task)
}

/// SVG or PNG, from the requested file name's extension.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// Scalable vector graphics.
    Svg,
    /// Portable network graphics.
    Png,
}

impl Format {
    /// The format of `file` named `stem.svg` or `stem.png`.
    pub fn of(file: &str, stem: &str) -> Option<Format> {
        match file.strip_prefix(stem)? {
            ".svg" => Some(Format::Svg),
            ".png" => Some(Format::Png),
            _ => None,
        }
    }

    fn mime(self) -> &'static str {
        match self {
            Format::Svg => "image/svg+xml",
            Format::Png => "image/png",
        }
    }

    /// File name extension.
    pub fn ext(self) -> &'static str {
        match self {
            Format::Svg => "svg",
            Format::Png => "png",
        }
    }

    /// Renders a figure at a size, px.
    pub fn render(self, fig: &impl Figure, width: u32, height: u32) -> Result<Vec<u8>, String> {
        let canvas = Canvas::with_default_font(width, height).map_err(|e| e.to_string())?;
        match self {
            Format::Svg => fig.svg(&canvas).map(String::into_bytes),
            Format::Png => fig.png(&canvas),
        }
        .map_err(|e| e.to_string())
    }
}

pub(super) fn image(format: Format, bytes: &[u8], download: Option<String>) -> Response {
    let mut resp = (
        [(header::CONTENT_TYPE, format.mime()), (header::CACHE_CONTROL, "private, max-age=300")],
        bytes.to_vec(),
    )
        .into_response();
    if let Some(name) = download {
        let v = format!("attachment; filename=\"{name}\"");
        if let Ok(v) = v.parse() {
            resp.headers_mut().insert(header::CONTENT_DISPOSITION, v);
        }
    }
    resp
}

/// A line by its slug, or a page error.
pub async fn line_named(state: &AppState, name: &str) -> Result<Line, PageError> {
    db::lines::by_name(&state.db, name)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Line {name:?}")))
}

fn unix(t: DateTime<Utc>) -> i64 {
    t.timestamp()
}

/// Query of a section figure.
#[derive(Debug, Deserialize)]
pub struct SectionQuery {
    /// `model` (resistivity, default) or `change`.
    pub kind: Option<String>,
    /// Change mode (`ratio`, `difference`); default: the primary mode.
    pub mode: Option<String>,
    /// Offer the figure as a download.
    pub download: Option<String>,
}

/// What a section figure shows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SectionKind {
    /// Temperature-corrected resistivity.
    Model,
    /// Change against the baseline, %.
    Change,
}

impl SectionKind {
    /// From the `kind` query parameter.
    pub fn parse(s: Option<&str>) -> Result<SectionKind, PageError> {
        match s {
            None | Some("model") => Ok(SectionKind::Model),
            Some("change") => Ok(SectionKind::Change),
            Some(o) => {
                Err(PageError::BadRequest(format!("kind must be model or change, not {o:?}.")))
            }
        }
    }
}

/// The primary change mode of the configuration.
pub fn primary_mode(state: &AppState) -> String {
    state
        .config
        .processing
        .change_modes
        .first()
        .map(|m| m.as_str().to_string())
        .unwrap_or_else(|| "ratio".into())
}

/// Zone outlines of an epoch, labelled by track.
pub async fn zone_outlines(state: &AppState, epoch_id: i64) -> Result<Vec<Zone>, PageError> {
    let zones = db::alerts::epoch_zones(&state.db, epoch_id).await?;
    Ok(zones
        .into_iter()
        .filter_map(|z| {
            let cells: Vec<usize> = serde_json::from_str(&z.cells).ok()?;
            Some(Zone { label: format!("Z{}", z.track), cells })
        })
        .collect())
}

/// Colour limits of the resistivity sections of a line (Ω·m), the same for
/// every epoch so that stepping through the season compares like with like:
/// the in-mask range of the active baseline's first epoch, widened by a
/// factor 2 each way (room for the season's changes; values beyond are
/// drawn at the ends of the colour bar). `None` without a baseline.
pub async fn season_limits(
    state: &AppState,
    line_id: i64,
) -> Result<Option<(f64, f64)>, PageError> {
    let Some(b) = models::active_baseline(&state.db, line_id).await? else {
        return Ok(None);
    };
    let Some(first) = b.epochs()?.first().copied() else {
        return Ok(None);
    };
    let Some(m) = models::model(&state.db, first).await? else {
        return Ok(None);
    };
    let values = models::blob_to_f64s(&m.corrected)?;
    let mask = models::blob_to_mask(&m.mask);
    let (lo, hi) = values
        .iter()
        .zip(&mask)
        .filter(|(v, inside)| **inside && v.is_finite() && **v > 0.0)
        .fold((f64::INFINITY, 0.0f64), |(lo, hi), (v, _)| (lo.min(*v), hi.max(*v)));
    Ok((lo.is_finite() && hi > 0.0).then(|| (lo / 2.0, hi * 2.0)))
}

/// Draws (or takes from the cache) an epoch's section figure.
pub async fn section_bytes(
    state: &AppState,
    line: &Line,
    epoch_id: i64,
    kind: SectionKind,
    mode: Option<&str>,
    format: Format,
) -> Result<Arc<Vec<u8>>, PageError> {
    let epoch = db::epochs::get(&state.db, epoch_id)
        .await?
        .filter(|e| e.line_id == line.id)
        .ok_or_else(|| PageError::NotFound(format!("Epoch {epoch_id} of line {}", line.name)))?;
    let when = super::view::fmt_time(epoch.started_at);
    let limits = match kind {
        SectionKind::Model => season_limits(state, line.id).await?,
        SectionKind::Change => None,
    };
    let (section_id, values, mask, stored, mode, title, subtitle) = match kind {
        SectionKind::Model => {
            let m = models::model(&state.db, epoch_id).await?.ok_or_else(|| {
                PageError::NotFound(format!("The model of epoch {epoch_id} (not processed yet)"))
            })?;
            (
                m.section_id,
                models::blob_to_f64s(&m.corrected)?,
                models::blob_to_mask(&m.mask),
                m.created_at,
                String::new(),
                format!("Resistivity · {} · {when}", line.name),
                if limits.is_some() {
                    "corrected to the reference temperature; colours fixed for the season; faded: low sensitivity"
                } else {
                    "corrected to the reference temperature; faded: low sensitivity"
                }
                .to_string(),
            )
        }
        SectionKind::Change => {
            let wanted = mode.map(str::to_string).unwrap_or_else(|| primary_mode(state));
            let all = models::changes(&state.db, epoch_id).await?;
            let c = all.into_iter().find(|c| c.mode == wanted).ok_or_else(|| {
                PageError::NotFound(format!("The {wanted} change of epoch {epoch_id}"))
            })?;
            (
                c.section_id,
                models::blob_to_f64s(&c.change_pct)?,
                models::blob_to_mask(&c.mask),
                c.created_at,
                wanted.clone(),
                format!("Change against the baseline · {} · {when}", line.name),
                format!("{wanted} mode; blue is a drop (wetter); faded: low sensitivity"),
            )
        }
    };
    let key = format!(
        "section:{epoch_id}:{kind:?}:{mode}:{}:{limits:?}.{}",
        stored.timestamp_millis(),
        format.ext()
    );
    if let Some(b) = state.figures.image(&key) {
        return Ok(b);
    }
    let zones = match kind {
        SectionKind::Change => zone_outlines(state, epoch_id).await?,
        SectionKind::Model => Vec::new(),
    };
    let entry = grid(state, section_id).await?;
    let bytes = draw(move || {
        let values = match kind {
            SectionKind::Model => SectionValues::Resistivity { rho: &values, limits },
            SectionKind::Change => {
                SectionValues::ChangePercent { change: &values, limit: Some(40.0) }
            }
        };
        let fig = SectionFigure::new(
            &entry.grid,
            SectionParams {
                title,
                subtitle: Some(subtitle),
                values,
                line: Some(&entry.geometry),
                well_resolved: Some(&mask),
                fade: 0.6,
                zones,
                vertical_exaggeration: 1.0,
            },
        )
        .map_err(|e| e.to_string())?;
        format.render(&fig, 900, 420)
    })
    .await?;
    let bytes = Arc::new(bytes);
    state.figures.keep(key, bytes.clone());
    Ok(bytes)
}

/// `GET /lines/{line}/epochs/{id}/section.svg|png?kind=model|change&mode=`.
pub async fn section(
    State(state): State<AppState>,
    _who: SignedIn,
    Path((name, epoch_id, file)): Path<(String, i64, String)>,
    Query(q): Query<SectionQuery>,
) -> Result<Response, PageError> {
    let format = Format::of(&file, "section")
        .ok_or_else(|| PageError::NotFound(format!("Figure {file:?}")))?;
    let kind = SectionKind::parse(q.kind.as_deref())?;
    let line = line_named(&state, &name).await?;
    let bytes = section_bytes(&state, &line, epoch_id, kind, q.mode.as_deref(), format).await?;
    let download = q.download.is_some().then(|| {
        let k = if kind == SectionKind::Model { "resistivity" } else { "change" };
        format!("{}-epoch-{epoch_id}-{k}.{}", line.name, format.ext())
    });
    Ok(image(format, &bytes, download))
}

/// Times strictly increasing: later samples at an equal time are dropped.
fn increasing(points: Vec<(i64, Option<f64>)>) -> Vec<(i64, Option<f64>)> {
    let mut out: Vec<(i64, Option<f64>)> = Vec::with_capacity(points.len());
    for p in points {
        if out.last().is_none_or(|l| p.0 > l.0) {
            out.push(p);
        }
    }
    out
}

/// A time range for a chart: the data's, widened by an hour each side when
/// it is a single instant.
fn time_range(points: &[(i64, Option<f64>)]) -> Option<(i64, i64)> {
    match (points.first(), points.last()) {
        (Some(a), Some(b)) if a.0 == b.0 => Some((a.0 - 3600, a.0 + 3600)),
        _ => None,
    }
}

/// The trigger levels of a line's rules as chart lines, and the rules'
/// version (0 for the defaults) for cache keys.
async fn trigger_lines(state: &AppState, line: &Line) -> Result<(Vec<Threshold>, i64), PageError> {
    let stored = db::rules::get(&state.db, line.id).await?;
    let version = stored.as_ref().map_or(0, |s| s.version);
    let rules = stored.map(|s| s.rules).unwrap_or_default();
    let lines = rules
        .levels
        .iter()
        .enumerate()
        .map(|(i, l)| Threshold {
            value: l.change_pct,
            label: format!("level {}", i + 1),
            axis: Axis::Left,
        })
        .collect();
    Ok((lines, version))
}

/// `GET /lines/{line}/trend.svg|png`: the strongest in-mask drop of every
/// processed epoch over the season, trigger levels drawn;
/// `sparkline.svg|png`: the same as a small line without text (overview).
pub async fn trend(
    State(state): State<AppState>,
    _who: SignedIn,
    Path((name, file)): Path<(String, String)>,
) -> Result<Response, PageError> {
    let (format, small) = match (Format::of(&file, "trend"), Format::of(&file, "sparkline")) {
        (Some(f), _) => (f, false),
        (None, Some(f)) => (f, true),
        _ => return Err(PageError::NotFound(format!("Figure {file:?}"))),
    };
    let line = line_named(&state, &name).await?;
    let mode = primary_mode(&state);
    let drops = models::strongest_drops(&state.db, line.id, &mode).await?;
    if drops.is_empty() {
        return Err(PageError::NotFound(format!("Change sections of line {}", line.name)));
    }
    let (thresholds, rules_version) = trigger_lines(&state, &line).await?;
    let key = format!(
        "trend:{}:{small}:{mode}:{rules_version}:{}:{}:{}.{}",
        line.id,
        drops.len(),
        drops.last().map_or(0, |d| d.0),
        drops.iter().map(|d| d.2).sum::<f64>().to_bits(),
        format.ext()
    );
    if let Some(b) = state.figures.image(&key) {
        return Ok(image(format, &b, None));
    }
    let points = increasing(drops.iter().map(|(_, t, v)| (unix(*t), Some(*v))).collect());
    let title = format!("Strongest drop in resistivity · {}", line.name);
    let bytes = draw(move || {
        let range = time_range(&points);
        let series = TimeSeries::new("strongest drop (%)", &points, Axis::Left)
            .map_err(|e| e.to_string())?;
        if small {
            let spark = Sparkline::new(SparklineParams {
                series: vec![series],
                thresholds: thresholds.iter().map(|t| t.value).collect(),
                max_gap_s: None,
                time_range: range,
            })
            .map_err(|e| e.to_string())?;
            return format.render(&spark, 160, 40);
        }
        let chart = TimeChart::new(TimeChartParams {
            title,
            subtitle: Some(format!(
                "{mode} change against the baseline, inside the sensitivity mask"
            )),
            series: vec![series],
            thresholds,
            left_title: "Change (%)".into(),
            right_title: None,
            max_gap_s: None,
            time_range: range,
            left_range: None,
            right_range: None,
        })
        .map_err(|e| e.to_string())?;
        format.render(&chart, 900, 260)
    })
    .await?;
    let bytes = Arc::new(bytes);
    state.figures.keep(key, bytes.clone());
    Ok(image(format, &bytes, None))
}

/// `GET /alerts/{id}/history.svg|png`: the alert's zone over time — peak
/// change (left axis) and area (right axis), trigger levels drawn.
pub async fn alert_history(
    State(state): State<AppState>,
    _who: SignedIn,
    Path((id, file)): Path<(i64, String)>,
) -> Result<Response, PageError> {
    let format = Format::of(&file, "history")
        .ok_or_else(|| PageError::NotFound(format!("Figure {file:?}")))?;
    let a = db::alerts::by_id(&state.db, id)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Alert {id}")))?;
    let track = a.track.ok_or_else(|| {
        PageError::NotFound(format!("A zone history of alert {id} (not a zone alert)"))
    })?;
    let line = db::lines::by_id(&state.db, a.line_id)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Line of alert {id}")))?;
    let history = db::alerts::track_history(&state.db, line.id, track).await?;
    if history.is_empty() {
        return Err(PageError::NotFound(format!("History of zone Z{track}")));
    }
    let peak =
        increasing(history.iter().map(|(_, t, z)| (unix(*t), Some(z.peak_change_pct))).collect());
    let area = increasing(history.iter().map(|(_, t, z)| (unix(*t), Some(z.area_m2))).collect());
    let (thresholds, _) = trigger_lines(&state, &line).await?;
    let title = format!("Zone Z{track} · {} · alert {id}", line.name);
    let bytes = draw(move || {
        let range = time_range(&peak);
        let s1 =
            TimeSeries::new("peak change (%)", &peak, Axis::Left).map_err(|e| e.to_string())?;
        let s2 = TimeSeries::new("area (m²)", &area, Axis::Right).map_err(|e| e.to_string())?;
        let chart = TimeChart::new(TimeChartParams {
            title,
            subtitle: Some("dashed: trigger levels of the change".into()),
            series: vec![s1, s2],
            thresholds,
            left_title: "Change (%)".into(),
            right_title: Some("Area (m²)".into()),
            max_gap_s: None,
            time_range: range,
            left_range: None,
            right_range: None,
        })
        .map_err(|e| e.to_string())?;
        format.render(&chart, 900, 300)
    })
    .await?;
    Ok(image(format, &bytes, None))
}

/// Epochs shown on the data-quality charts at most.
pub const QUALITY_EPOCHS: i64 = 500;

/// `GET /lines/{line}/quality/{file}`: `dropped.svg` (share of readings
/// dropped per epoch), `health.svg` (electrode health over time), `rho.svg`
/// and `error.svg` (pseudosections of the newest checked epoch); PNG too.
pub async fn quality(
    State(state): State<AppState>,
    _who: SignedIn,
    Path((name, file)): Path<(String, String)>,
) -> Result<Response, PageError> {
    let line = line_named(&state, &name).await?;
    let not_found = || PageError::NotFound(format!("Figure {file:?}"));
    let (stem, format) = ["dropped", "health", "rho", "error"]
        .iter()
        .find_map(|s| Format::of(&file, s).map(|f| (*s, f)))
        .ok_or_else(not_found)?;
    let epochs = db::quality::line_epochs(&state.db, line.id, QUALITY_EPOCHS).await?;
    let (Some((first_at, _)), Some((_, newest))) = (epochs.first(), epochs.last()) else {
        return Err(PageError::NotFound(format!("Checked epochs of line {}", line.name)));
    };
    // The figures change only when an epoch is checked (again).
    let key = format!(
        "quality:{}:{stem}:{}:{}:{}.{}",
        line.id,
        epochs.len(),
        newest.epoch_id,
        newest.processed_at.timestamp_millis(),
        format.ext()
    );
    if let Some(b) = state.figures.image(&key) {
        return Ok(image(format, &b, None));
    }
    let bytes = match stem {
        "dropped" => {
            let points = increasing(
                epochs.iter().map(|(t, q)| (unix(*t), Some(100.0 * q.dropped_share))).collect(),
            );
            // At least 0–10 %, so a clean season reads as clean, not as noise.
            let top = points.iter().filter_map(|p| p.1).fold(10.0f64, f64::max).min(100.0);
            let title = format!("Readings dropped by quality control · {}", line.name);
            draw(move || {
                let range = time_range(&points);
                let s = TimeSeries::new("dropped (%)", &points, Axis::Left)
                    .map_err(|e| e.to_string())?;
                let chart = TimeChart::new(TimeChartParams {
                    title,
                    subtitle: Some("share of each epoch's readings".into()),
                    series: vec![s],
                    thresholds: Vec::new(),
                    left_title: "Dropped (%)".into(),
                    right_title: None,
                    max_gap_s: None,
                    time_range: range,
                    left_range: Some((0.0, top)),
                    right_range: None,
                })
                .map_err(|e| e.to_string())?;
                format.render(&chart, 900, 240)
            })
            .await?
        }
        "health" => {
            let electrodes = db::lines::electrodes(&state.db, line.id).await?;
            let rows = db::quality::line_electrodes(&state.db, line.id, *first_at).await?;
            let mut times = Vec::new();
            let mut column: HashMap<i64, usize> = HashMap::new();
            for (t, q) in &epochs {
                if times.last().is_none_or(|l| unix(*t) > *l) {
                    column.insert(q.epoch_id, times.len());
                    times.push(unix(*t));
                }
            }
            let row_of: HashMap<i64, usize> =
                electrodes.iter().enumerate().map(|(i, e)| (e.position, i)).collect();
            let n = times.len();
            let mut states = vec![ElectrodeHealth::NoData; electrodes.len() * n];
            for (epoch_id, e) in rows {
                let (Some(&k), Some(&r)) = (column.get(&epoch_id), row_of.get(&e.position)) else {
                    continue;
                };
                states[r * n + k] = if !e.in_service {
                    ElectrodeHealth::OutOfService
                } else {
                    match e.fail_share {
                        Some(s) if e.n_readings > 0 => ElectrodeHealth::Share(s.clamp(0.0, 1.0)),
                        _ => ElectrodeHealth::NoData,
                    }
                };
            }
            let labels: Vec<String> = electrodes.into_iter().map(|e| e.label).collect();
            let height = (120 + 9 * labels.len() as u32).clamp(200, 1400);
            let title = format!("Electrode health · {}", line.name);
            draw(move || {
                let strip = HealthStrip::new(HealthStripParams {
                    title,
                    subtitle: Some("share of each electrode's readings failing the checks".into()),
                    electrodes: labels,
                    epochs: times,
                    states,
                })
                .map_err(|e| e.to_string())?;
                format.render(&strip, 900, height)
            })
            .await?
        }
        _ => {
            let (at, q) = epochs.last().expect("not empty");
            let epoch = db::epochs::get(&state.db, q.epoch_id).await?.ok_or_else(not_found)?;
            let geometry = db::lines::geometry(&state.db, line.id).await?;
            let sequence =
                db::sequences::load(&state.db, epoch.sequence_id, geometry.len()).await?;
            let readings = db::quality::readings(&state.db, q.epoch_id).await?;
            let mut values: Vec<Option<f64>> = vec![None; sequence.len()];
            let rho = stem == "rho";
            for r in &readings {
                let v = if rho { r.rho_a } else { r.reciprocal_error.map(|e| 100.0 * e) };
                if let Some(slot) = usize::try_from(r.quad).ok().and_then(|i| values.get_mut(i)) {
                    *slot = v.filter(|v| v.is_finite()).or(*slot);
                }
            }
            let when = super::view::fmt_time(*at);
            let title = if rho {
                format!("Apparent resistivity · {} · {when}", line.name)
            } else {
                format!("Reciprocal error · {} · {when}", line.name)
            };
            draw(move || {
                let values = if rho {
                    PseudoValues::ApparentResistivity { rho_a: &values, limits: None }
                } else {
                    PseudoValues::ReciprocalErrorPercent { error: &values, max: None }
                };
                let fig = PseudosectionFigure::new(
                    &geometry,
                    &sequence,
                    PseudosectionParams {
                        title,
                        subtitle: Some("every reading of the epoch, kept or not".into()),
                        values,
                        vertical_exaggeration: 1.0,
                    },
                )
                .map_err(|e| e.to_string())?;
                format.render(&fig, 900, 360)
            })
            .await?
        }
    };
    let bytes = Arc::new(bytes);
    state.figures.keep(key, bytes.clone());
    Ok(image(format, &bytes, None))
}
