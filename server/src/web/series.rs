//! Site time series in the pages: one chart per series of the line's site on
//! the line page, on the time axis of the epoch time control with the epoch
//! on show marked; the site's series page (what is stored, recent uploads) with
//! an upload form for engineers and admins.
//!
//! The time axis runs from the first to the newest processed epoch of the line
//! (the span of the time control) with a margin of 2 % each side; before any
//! epoch is processed, over the stored epochs; with no epochs at all, over the
//! series' own samples. A single instant is widened by 12 h each side. Samples
//! outside the axis are not drawn. Series are listed river stage, rainfall,
//! air and ground temperature, then the others by name. A line breaks where two samples are more than three times the
//! series' median step apart (common practice, no source: a missing reading
//! or two shows as a gap). Rainfall is drawn as bars from zero.

use std::sync::Arc;

use askama::Template;
use axum::extract::{Path, Query, State};
use axum::http::StatusCode;
use axum::response::Response;
use chrono::{DateTime, Duration, Utc};
use ohmline_core::figures::{Axis, Marker, TimeChart, TimeChartParams, TimeSeries, format_number};
use serde::Deserialize;

use super::figures::{Format, draw, image, line_named};
use super::forms::{CsrfMultipart, SignedIn};
use super::view::{Chrome, fmt_time, iso};
use super::{PageError, render_with};
use crate::app::AppState;
use crate::auth::Role;
use crate::db::lines::Line;
use crate::db::sites::Site;
use crate::db::{self, models};
use crate::series::{self, KNOWN_KINDS, SeriesError, SeriesUpload};

/// Width and height of a series chart, px (as wide as the section figures).
const CHART_SIZE: (u32, u32) = (900, 220);

/// The time axis of a line's series charts.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SeriesAxis {
    /// Start.
    pub t0: DateTime<Utc>,
    /// End.
    pub t1: DateTime<Utc>,
    /// The epoch on show (id, start), when epochs are processed.
    pub marker: Option<(i64, DateTime<Utc>)>,
}

impl SeriesAxis {
    /// The range drawn: the axis with a margin of 2 % each side, which keeps a
    /// mark on the first or newest epoch clear of the plot's frame.
    pub fn shown(&self) -> (DateTime<Utc>, DateTime<Utc>) {
        let pad = (self.t1 - self.t0) / 50;
        (self.t0 - pad, self.t1 + pad)
    }
}

/// The axis of a line's series charts with `epoch` (default: the newest
/// processed one) marked; `None` when the line has no epochs.
pub async fn axis(
    state: &AppState,
    line: &Line,
    epoch: Option<i64>,
) -> Result<Option<SeriesAxis>, PageError> {
    let processed = models::modelled_epochs(&state.db, line.id).await?;
    let (t0, t1, marker) = match (processed.first(), processed.last()) {
        (Some(first), Some(last)) => {
            let marker = match epoch {
                Some(id) => *processed.iter().find(|(e, _)| *e == id).ok_or_else(|| {
                    PageError::NotFound(format!("Processed epoch {id} of line {}", line.name))
                })?,
                None => *last,
            };
            (first.1, last.1, Some(marker))
        }
        _ => match db::epochs::span_for_line(&state.db, line.id).await? {
            Some((a, b)) => (a, b, None),
            None => return Ok(None),
        },
    };
    let (t0, t1) =
        if t1 > t0 { (t0, t1) } else { (t0 - Duration::hours(12), t1 + Duration::hours(12)) };
    Ok(Some(SeriesAxis { t0, t1, marker }))
}

/// A value with its unit for people.
fn with_unit(v: f64, unit: &str) -> String {
    let r = (v * 1000.0).round() / 1000.0;
    format!("{} {unit}", format_number(r))
}

/// One series on the line page.
pub struct SeriesView {
    /// Kind (URL part).
    pub kind: String,
    /// Title.
    pub title: String,
    /// Unit.
    pub unit: String,
    /// Samples on the axis.
    pub n_on_axis: usize,
    /// Newest value and its time, in words.
    pub latest: String,
    /// Query string of the figure (`?epoch=…` or empty).
    pub query: String,
}

/// The series part of the line page.
pub struct LineSeries {
    /// The site's id (link to its series page).
    pub site_id: i64,
    /// Axis start in words (empty without an axis).
    pub from: String,
    /// Axis end in words.
    pub to: String,
    /// Axis start, RFC 3339.
    pub from_iso: String,
    /// Axis end, RFC 3339.
    pub to_iso: String,
    /// One per series of the site.
    pub views: Vec<SeriesView>,
}

/// The series of a line's site for the line page, on the axis with `epoch`.
pub async fn for_line(
    state: &AppState,
    line: &Line,
    epoch: Option<i64>,
) -> Result<LineSeries, PageError> {
    let mut summaries = db::series::summaries(&state.db, line.site_id).await?;
    summaries.sort_by_key(|s| {
        (
            KNOWN_KINDS.iter().position(|k| k.0 == s.kind).unwrap_or(KNOWN_KINDS.len()),
            s.kind.clone(),
        )
    });
    let ax = if summaries.is_empty() { None } else { axis(state, line, epoch).await? };
    let query = match ax.and_then(|a| a.marker) {
        Some((id, _)) => format!("?epoch={id}"),
        None => String::new(),
    };
    let mut views = Vec::with_capacity(summaries.len());
    for s in summaries {
        let n_on_axis = match ax {
            Some(a) => {
                let (from, to) = a.shown();
                db::series::samples(&state.db, s.id, Some(from), Some(to)).await?.len()
            }
            None => s.n_samples as usize,
        };
        let latest = match (s.last_value, s.last_at) {
            (Some(v), Some(t)) => format!("{} at {}", with_unit(v, &s.unit), fmt_time(t)),
            _ => String::new(),
        };
        views.push(SeriesView {
            title: series::title(&s.kind),
            kind: s.kind,
            unit: s.unit,
            n_on_axis,
            latest,
            query: query.clone(),
        });
    }
    Ok(LineSeries {
        site_id: line.site_id,
        from: ax.map(|a| fmt_time(a.t0)).unwrap_or_default(),
        to: ax.map(|a| fmt_time(a.t1)).unwrap_or_default(),
        from_iso: ax.map(|a| iso(a.t0)).unwrap_or_default(),
        to_iso: ax.map(|a| iso(a.t1)).unwrap_or_default(),
        views,
    })
}

/// Newest value of every series of a site, in words (the overview).
pub async fn latest_values(state: &AppState, site_id: i64) -> Result<Vec<String>, PageError> {
    Ok(db::series::summaries(&state.db, site_id)
        .await?
        .into_iter()
        .filter_map(|s| {
            Some(format!(
                "{} {} ({})",
                series::title(&s.kind),
                with_unit(s.last_value?, &s.unit),
                fmt_time(s.last_at?)
            ))
        })
        .collect())
}

/// Query of a series chart.
#[derive(Debug, Deserialize)]
pub struct ChartQuery {
    /// Processed epoch to mark (default: the newest).
    pub epoch: Option<i64>,
    /// Offer the figure as a download.
    pub download: Option<String>,
}

/// A line breaks at steps longer than three median steps.
fn max_gap(times: &[i64]) -> Option<i64> {
    let mut steps: Vec<i64> = times.windows(2).map(|w| w[1] - w[0]).collect();
    if steps.is_empty() {
        return None;
    }
    steps.sort_unstable();
    Some((3 * steps[steps.len() / 2]).max(1))
}

/// `GET /lines/{line}/series/{kind}.svg|png?epoch=`: a series of the line's
/// site on the line's time axis, the epoch marked.
pub async fn chart(
    State(state): State<AppState>,
    _who: SignedIn,
    Path((name, file)): Path<(String, String)>,
    Query(q): Query<ChartQuery>,
) -> Result<Response, PageError> {
    let (kind, format) = match file.rsplit_once('.') {
        Some((k, _)) => (k.to_string(), Format::of(&file, k)),
        None => (file.clone(), None),
    };
    let format = format.ok_or_else(|| PageError::NotFound(format!("Figure {file:?}")))?;
    let line = line_named(&state, &name).await?;
    let row = db::series::by_kind(&state.db, line.site_id, &kind)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Series {kind:?} of the site of {name}")))?;
    let ax = axis(&state, &line, q.epoch).await?;
    let (n, newest_upload) = db::series::stamp(&state.db, row.id).await?;
    let marker_t = ax.and_then(|a| a.marker).map(|m| m.1.timestamp());
    let key = format!(
        "series:{}:{}:{n}:{newest_upload}:{:?}:{:?}:{}",
        line.id,
        row.id,
        ax.map(|a| (a.shown().0.timestamp(), a.shown().1.timestamp())),
        marker_t,
        format.ext()
    );
    let download = q.download.is_some().then(|| format!("{}-{kind}.{}", line.name, format.ext()));
    if let Some(b) = state.figures.image(&key) {
        return Ok(image(format, &b, download));
    }
    let shown = ax.map(|a| a.shown());
    let samples =
        db::series::samples(&state.db, row.id, shown.map(|r| r.0), shown.map(|r| r.1)).await?;
    let site = db::sites::by_id(&state.db, line.site_id).await?.map(|s| s.name).unwrap_or_default();
    let title = format!("{} · {site}", series::title(&kind));
    let unit = row.unit.clone();
    let bars = kind == "rainfall";
    let marker = ax
        .and_then(|a| a.marker)
        .map(|(_, t)| Marker { time: t.timestamp(), label: format!("epoch {}", fmt_time(t)) });
    let range = shown.map(|(a, b)| (a.timestamp(), b.timestamp()));
    let bytes = draw(move || {
        let points: Vec<(i64, Option<f64>)> =
            samples.iter().map(|(t, v)| (t.timestamp(), Some(*v))).collect();
        let times: Vec<i64> = points.iter().map(|p| p.0).collect();
        let mut s = TimeSeries::new(String::new(), &points, Axis::Left).map_err(|e| e.to_string())?;
        let left_range = if bars {
            s = s.with_bars();
            let hi = samples.iter().map(|p| p.1).fold(0.0f64, f64::max);
            Some((0.0, if hi > 0.0 { 1.1 * hi } else { 1.0 }))
        } else {
            None
        };
        let time_range = range.or_else(|| match (times.first(), times.last()) {
            (Some(a), Some(b)) if a == b => Some((a - 43_200, b + 43_200)),
            _ => None,
        });
        let mut chart = TimeChart::new(TimeChartParams {
            title,
            subtitle: Some(if marker.is_some() {
                "on the time axis of the line's processed epochs; the black line is the epoch on show".into()
            } else {
                "on the time axis of the line's epochs".into()
            }),
            series: vec![s],
            thresholds: vec![],
            left_title: format!("{} ({unit})", series::title(&kind)),
            right_title: None,
            max_gap_s: if bars { None } else { max_gap(&times) },
            time_range,
            left_range,
            right_range: None,
        })
        .map_err(|e| e.to_string())?;
        if let Some(m) = marker {
            chart = chart.with_marker(m);
        }
        format.render(&chart, CHART_SIZE.0, CHART_SIZE.1)
    })
    .await?;
    let bytes = Arc::new(bytes);
    state.figures.keep(key, bytes.clone());
    Ok(image(format, &bytes, download))
}

struct SeriesRowView {
    kind: String,
    title: String,
    unit: String,
    n_samples: i64,
    first: String,
    last: String,
    latest: String,
}

struct UploadView {
    id: i64,
    kind: String,
    received: String,
    source: String,
    actor: String,
    filename: String,
    status: String,
    counts: String,
    error: String,
}

struct KindOption {
    value: &'static str,
    label: String,
}

struct LineLink {
    name: String,
}

#[derive(Template)]
#[template(path = "site_series.html")]
struct SiteSeriesPage {
    chrome: Chrome,
    site: String,
    site_id: i64,
    lines: Vec<LineLink>,
    series: Vec<SeriesRowView>,
    uploads: Vec<UploadView>,
    kinds: Vec<KindOption>,
    can_upload: bool,
    notice: String,
    error: String,
}

/// Uploads listed on the site's series page.
const UPLOADS_SHOWN: i64 = 20;

async fn site_page(
    state: &AppState,
    who: &SignedIn,
    site: &Site,
    status: StatusCode,
    notice: &str,
    error: &str,
) -> Result<Response, PageError> {
    let series = db::series::summaries(&state.db, site.id)
        .await?
        .into_iter()
        .map(|s| SeriesRowView {
            title: series::title(&s.kind),
            first: s.first_at.map(fmt_time).unwrap_or_default(),
            last: s.last_at.map(fmt_time).unwrap_or_default(),
            latest: s.last_value.map(|v| with_unit(v, &s.unit)).unwrap_or_default(),
            kind: s.kind,
            unit: s.unit,
            n_samples: s.n_samples,
        })
        .collect();
    let uploads = db::series::uploads(&state.db, site.id, UPLOADS_SHOWN)
        .await?
        .into_iter()
        .map(|u| UploadView {
            id: u.id,
            kind: u.kind,
            received: fmt_time(u.received_at),
            source: u.source,
            actor: u.actor,
            filename: u.filename.unwrap_or_default(),
            counts: if u.status == "accepted" {
                format!(
                    "{} added, {} unchanged, {} replaced",
                    u.n_added, u.n_unchanged, u.n_replaced
                )
            } else {
                String::new()
            },
            status: u.status,
            error: u.error.unwrap_or_default(),
        })
        .collect();
    let lines = db::lines::list(&state.db, None)
        .await?
        .into_iter()
        .filter(|l| l.site == site.name)
        .map(|l| LineLink { name: l.name })
        .collect();
    let mut kinds: Vec<KindOption> = KNOWN_KINDS
        .iter()
        .map(|(k, unit, title)| KindOption { value: k, label: format!("{title} ({unit})") })
        .collect();
    kinds.push(KindOption { value: "", label: "Other (name and unit below)".into() });
    render_with(
        status,
        &SiteSeriesPage {
            chrome: who.chrome("overview"),
            site: site.name.clone(),
            site_id: site.id,
            lines,
            series,
            uploads,
            kinds,
            can_upload: who.user.role.allows(Role::Engineer),
            notice: notice.into(),
            error: error.into(),
        },
    )
}

async fn site_by_id(state: &AppState, id: i64) -> Result<Site, PageError> {
    db::sites::by_id(&state.db, id).await?.ok_or_else(|| PageError::NotFound(format!("Site {id}")))
}

/// `GET /sites/{id}/series`: the site's series and recent uploads; the upload
/// form for engineers and admins.
pub async fn site(
    State(state): State<AppState>,
    who: SignedIn,
    Path(id): Path<i64>,
) -> Result<Response, PageError> {
    let site = site_by_id(&state, id).await?;
    site_page(&state, &who, &site, StatusCode::OK, "", "").await
}

/// `POST /sites/{id}/series`: uploads a CSV or JSON file of one series
/// (engineers and admins). Fields: `kind` (a known kind, or empty with
/// `other` naming a new one), `unit` (optional), `file`.
pub async fn upload(
    State(state): State<AppState>,
    Path(id): Path<i64>,
    f: CsrfMultipart,
) -> Result<Response, PageError> {
    f.who.require(Role::Engineer)?;
    let who = &f.who;
    let site = site_by_id(&state, id).await?;
    let kind = match f.field("kind") {
        "" => f.field("other").to_string(),
        k => k.to_string(),
    };
    let (st, si) = (&state, &site);
    let refuse = move |msg: String| async move {
        site_page(st, who, si, StatusCode::BAD_REQUEST, "", &msg).await
    };
    if kind.is_empty() {
        return refuse("Choose a kind, or name a new one.".into()).await;
    }
    let Some(file) = f.files.get("file") else {
        return refuse("Choose a CSV or JSON file.".into()).await;
    };
    let content_type = if file.filename.to_ascii_lowercase().ends_with(".json") {
        "application/json"
    } else {
        "text/csv"
    };
    let unit = f.field("unit");
    let query = serde_urlencoded::to_string([("unit", unit)]).unwrap_or_default();
    let result = series::upload(
        &state.db,
        &site,
        &kind,
        SeriesUpload {
            body: &file.bytes,
            content_type,
            unit: Some(unit),
            query: &query,
            source: "web",
            actor: &who.user.email,
            filename: Some(&file.filename),
        },
    )
    .await;
    match result {
        Ok(a) => {
            let detail = format!(
                "{} from {}: {} samples, {} added, {} unchanged, {} replaced",
                a.kind, file.filename, a.n_samples, a.added, a.unchanged, a.replaced
            );
            db::audit::record(&state.db, &who.user.email, "series.upload", &site.name, &detail)
                .await?;
            let notice = format!("Stored {detail}.");
            site_page(&state, who, &site, StatusCode::OK, &notice, "").await
        }
        Err(SeriesError::Db(e)) => Err(e.into()),
        Err(e) => refuse(format!("{} was not stored: {e}.", file.filename)).await,
    }
}
