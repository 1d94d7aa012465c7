//! Review pages: the alerts list with filters, one alert (facts, the caution,
//! the zone's history, its change sections at onset and now, the audit trail,
//! and the acknowledge/resolve forms for engineers), and the line page's
//! timeline of processed epochs (sections, zones, line-wide wetting, the
//! season's strongest change).
//!
//! People act on alerts only through [`crate::pipeline::monitor::act`], the
//! same path as the API, so the audit trail, the monitor state and the
//! notices stay consistent.

use askama::Template;
use axum::extract::{Path, Query, State};
use axum::http::StatusCode;
use axum::response::{IntoResponse, Redirect, Response};
use ohmline_core::alerts::CAUTION;
use serde::Deserialize;

use super::figures::primary_mode;
use super::forms::{CsrfForm, SignedIn};
use super::view::{Chrome, fmt_time, iso};
use super::{PageError, render, render_with};
use crate::app::AppState;
use crate::auth::Role;
use crate::db::alerts::{AlertFilter, AlertRow, ZoneRow};
use crate::db::{self, lines::Line, models};
use crate::notify::{fmt_m, fmt_pct, fmt_range_m};
use crate::pipeline::Pipeline;
use crate::pipeline::monitor::{Action, ActionError, act};
use crate::pipeline::monitor_state::DetailDto;

/// Longest note on an alert action, characters.
const MAX_NOTE: usize = 4000;

/// An alert as the pages show it.
pub struct AlertView {
    /// Alert id.
    pub id: i64,
    /// Level rank (0 notice, 1… trigger levels).
    pub level: i64,
    /// The level in words.
    pub level_label: String,
    /// `raised`, `acknowledged` or `resolved`.
    pub state: String,
    /// What the alert is about.
    pub subject: String,
    /// Line slug.
    pub line: String,
    /// Site name.
    pub site: String,
    /// Chainage range, or empty.
    pub chainage: String,
    /// Depth range below the surface, or empty.
    pub depth: String,
    /// Peak change, or empty.
    pub change: String,
    /// Zone area, or empty.
    pub area: String,
    /// Since when the condition holds.
    pub since: String,
    /// RFC 3339 of `since`.
    pub since_iso: String,
    /// When raised.
    pub raised: String,
    /// Last change.
    pub updated: String,
    /// When resolved, or empty.
    pub resolved: String,
    /// Zone track, if a zone alert.
    pub track: Option<i64>,
}

impl AlertView {
    fn of(a: &AlertRow) -> Self {
        let range = |a: Option<f64>, b: Option<f64>| match (a, b) {
            (Some(a), Some(b)) => fmt_range_m((a, b)),
            _ => String::new(),
        };
        Self {
            id: a.id,
            level: a.level,
            level_label: a.level_label.clone(),
            state: a.state.clone(),
            subject: a.subject.clone(),
            line: a.line.clone(),
            site: a.site.clone(),
            chainage: range(a.x_min, a.x_max),
            depth: range(a.depth_top, a.depth_bottom),
            change: a.peak_change_pct.map(fmt_pct).unwrap_or_default(),
            area: a.area_m2.map(|v| format!("{} m²", fmt_m(v))).unwrap_or_default(),
            since: fmt_time(a.since),
            since_iso: iso(a.since),
            raised: fmt_time(a.raised_at),
            updated: fmt_time(a.updated_at),
            resolved: a.resolved_at.map(fmt_time).unwrap_or_default(),
            track: a.track,
        }
    }

    /// CSS class of the level badge.
    pub fn level_class(&self) -> &'static str {
        match self.level {
            i64::MIN..=0 => "level-0",
            1 => "level-1",
            2 => "level-2",
            _ => "level-3",
        }
    }

    /// The alert is still open.
    pub fn open(&self) -> bool {
        self.state != "resolved"
    }
}

/// Query of the alerts list.
#[derive(Debug, Default, Deserialize)]
pub struct AlertsQuery {
    /// `open` (default), `raised`, `acknowledged`, `resolved` or `all`.
    #[serde(default)]
    pub state: String,
    /// Line slug, or empty for every line.
    #[serde(default)]
    pub line: String,
    /// Lowest level rank, or empty.
    #[serde(default)]
    pub level: String,
}

struct Choice {
    value: String,
    label: String,
    selected: bool,
}

fn choices(options: &[(String, String)], current: &str) -> Vec<Choice> {
    options
        .iter()
        .map(|(v, l)| Choice { value: v.clone(), label: l.clone(), selected: v == current })
        .collect()
}

#[derive(Template)]
#[template(path = "alerts.html")]
struct AlertsPage {
    chrome: Chrome,
    caution: &'static str,
    alerts: Vec<AlertView>,
    states: Vec<Choice>,
    lines: Vec<Choice>,
    levels: Vec<Choice>,
    limited: bool,
}

/// Alerts shown on the list at most.
const LIST_LIMIT: i64 = 200;

/// `GET /alerts`: alerts filtered by state, line and level, newest first.
pub async fn alerts(
    State(state): State<AppState>,
    who: SignedIn,
    Query(q): Query<AlertsQuery>,
) -> Result<Response, PageError> {
    let wanted_state = if q.state.is_empty() { "open" } else { q.state.as_str() };
    let state_filter = match wanted_state {
        "all" => None,
        s @ ("open" | "raised" | "acknowledged" | "resolved") => Some(s.to_string()),
        other => {
            return Err(PageError::BadRequest(format!(
                "state must be open, raised, acknowledged, resolved or all, not {other:?}."
            )));
        }
    };
    let min_level = match q.level.as_str() {
        "" => None,
        s => Some(s.parse::<i64>().map_err(|_| {
            PageError::BadRequest(format!("level must be a whole number, not {s:?}."))
        })?),
    };
    let lines = db::lines::list(&state.db, None).await?;
    let line = match q.line.as_str() {
        "" => None,
        l if lines.iter().any(|x| x.name == l) => Some(l.to_string()),
        l => return Err(PageError::NotFound(format!("Line {l:?}"))),
    };
    let rows = db::alerts::list(
        &state.db,
        &AlertFilter {
            line,
            state: state_filter,
            min_level,
            limit: LIST_LIMIT,
            ..AlertFilter::default()
        },
    )
    .await?;
    let states: Vec<(String, String)> = [
        ("open", "Open (raised or acknowledged)"),
        ("raised", "Raised"),
        ("acknowledged", "Acknowledged"),
        ("resolved", "Resolved"),
        ("all", "Any state"),
    ]
    .iter()
    .map(|(v, l)| (v.to_string(), l.to_string()))
    .collect();
    let mut line_opts = vec![(String::new(), "Every line".to_string())];
    line_opts.extend(lines.iter().map(|l| (l.name.clone(), format!("{} ({})", l.name, l.site))));
    let level_opts: Vec<(String, String)> = [
        ("", "Any level"),
        ("1", "Trigger level 1 and above"),
        ("2", "Trigger level 2 and above"),
        ("3", "Trigger level 3 and above"),
    ]
    .iter()
    .map(|(v, l)| (v.to_string(), l.to_string()))
    .collect();
    render(&AlertsPage {
        chrome: who.chrome("alerts"),
        caution: CAUTION,
        limited: rows.len() as i64 == LIST_LIMIT,
        alerts: rows.iter().map(AlertView::of).collect(),
        states: choices(&states, wanted_state),
        lines: choices(&line_opts, &q.line),
        levels: choices(&level_opts, &q.level),
    })
}

struct TransitionView {
    at: String,
    at_iso: String,
    from: String,
    to: String,
    level: i64,
    reason: String,
    actor: String,
    note: String,
}

/// A change section of an epoch shown on a page.
pub struct SectionLink {
    /// Epoch id.
    pub epoch_id: i64,
    /// Epoch start.
    pub when: String,
    /// Image URL.
    pub src: String,
    /// Text alternative.
    pub alt: String,
}

#[derive(Template)]
#[template(path = "alert.html")]
struct AlertPage {
    chrome: Chrome,
    caution: &'static str,
    alert: AlertView,
    can_act: bool,
    can_acknowledge: bool,
    history: bool,
    sections: Vec<SectionLink>,
    trail: Vec<TransitionView>,
    note: String,
    error: String,
}

fn change_link(line: &str, epoch_id: i64, when: &str, what: &str) -> SectionLink {
    SectionLink {
        epoch_id,
        when: when.to_string(),
        src: format!("/lines/{line}/epochs/{epoch_id}/section.svg?kind=change"),
        alt: format!("Change section of line {line} at {when} ({what}), zones outlined"),
    }
}

async fn alert_page(
    state: &AppState,
    who: &SignedIn,
    id: i64,
    status: StatusCode,
    note: &str,
    error: &str,
) -> Result<Response, PageError> {
    let a = db::alerts::by_id(&state.db, id)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Alert {id}")))?;
    let trail = db::alerts::transitions(&state.db, id).await?;
    let history = match a.track {
        Some(track) => db::alerts::track_history(&state.db, a.line_id, track).await?,
        None => Vec::new(),
    };
    let mut sections = Vec::new();
    // Onset: the zone's first epoch at or after the alert's `since`; now: its
    // newest epoch (or the alert's epoch for other subjects).
    let onset = history.iter().find(|(_, t, _)| *t >= a.since).or(history.first());
    if let Some((eid, t, _)) = onset {
        sections.push(change_link(&a.line, *eid, &fmt_time(*t), "onset"));
    }
    let latest = match history.last() {
        Some((eid, t, _)) => Some((*eid, *t)),
        None => match a.epoch_id {
            Some(eid) => db::epochs::get(&state.db, eid).await?.map(|e| (eid, e.started_at)),
            None => None,
        },
    };
    if let Some((eid, t)) = latest
        && sections.first().is_none_or(|s| s.epoch_id != eid)
    {
        sections.push(change_link(&a.line, eid, &fmt_time(t), "newest"));
    }
    let alert = AlertView::of(&a);
    let can_act = who.user.role.allows(Role::Engineer) && alert.open();
    render_with(
        status,
        &AlertPage {
            chrome: who.chrome("alerts"),
            caution: CAUTION,
            can_acknowledge: can_act && alert.state == "raised",
            can_act,
            history: !history.is_empty(),
            sections,
            trail: trail
                .into_iter()
                .map(|t| TransitionView {
                    at: fmt_time(t.at),
                    at_iso: iso(t.at),
                    from: t.from_state.unwrap_or_else(|| "—".into()),
                    to: t.to_state,
                    level: t.level,
                    reason: t.reason,
                    actor: t.actor,
                    note: t.note.unwrap_or_default(),
                })
                .collect(),
            alert,
            note: note.to_string(),
            error: error.to_string(),
        },
    )
}

/// `GET /alerts/{id}`: one alert, the link in alert emails.
pub async fn alert(
    State(state): State<AppState>,
    who: SignedIn,
    Path(id): Path<i64>,
) -> Result<Response, PageError> {
    alert_page(&state, &who, id, StatusCode::OK, "", "").await
}

/// The acknowledge/resolve form.
#[derive(Debug, Deserialize)]
pub struct NoteForm {
    /// What was done or arranged.
    #[serde(default)]
    pub note: String,
}

async fn act_on(
    state: AppState,
    id: i64,
    f: CsrfForm<NoteForm>,
    action: Action,
) -> Result<Response, PageError> {
    let CsrfForm { who, form } = f;
    who.require(Role::Engineer)?;
    let note = form.note.trim();
    if note.is_empty() || note.chars().count() > MAX_NOTE {
        let msg =
            format!("The note must be 1 to {MAX_NOTE} characters: say what was done or arranged.");
        return alert_page(&state, &who, id, StatusCode::BAD_REQUEST, note, &msg).await;
    }
    let pipeline = Pipeline::new(state.db.clone(), state.config.clone());
    match act(&pipeline, id, action, &who.user.email, note).await {
        Ok(_) => {}
        Err(ActionError::NotFound(id)) => return Err(PageError::NotFound(format!("Alert {id}"))),
        Err(ActionError::Refused(m)) => {
            return alert_page(&state, &who, id, StatusCode::CONFLICT, note, &format!("{m}."))
                .await;
        }
        Err(ActionError::Pipeline(e)) => return Err(PageError::Task(e.to_string())),
    }
    let what = match action {
        Action::Acknowledge => "alert.acknowledge",
        Action::Resolve => "alert.resolve",
    };
    db::audit::record(&state.db, &who.user.email, what, &format!("alert {id}"), note).await?;
    Ok(Redirect::to(&format!("/alerts/{id}#trail-h")).into_response())
}

/// `POST /alerts/{id}/acknowledge` (engineers).
pub async fn acknowledge(
    State(state): State<AppState>,
    Path(id): Path<i64>,
    f: CsrfForm<NoteForm>,
) -> Result<Response, PageError> {
    act_on(state, id, f, Action::Acknowledge).await
}

/// `POST /alerts/{id}/resolve` (engineers).
pub async fn resolve(
    State(state): State<AppState>,
    Path(id): Path<i64>,
    f: CsrfForm<NoteForm>,
) -> Result<Response, PageError> {
    act_on(state, id, f, Action::Resolve).await
}

/// One zone of the shown epoch.
pub struct ZoneView {
    /// Track label (`Z3`).
    pub label: String,
    /// `drop` or `rise`.
    pub direction: String,
    /// Chainage range.
    pub chainage: String,
    /// Depth range below the surface.
    pub depth: String,
    /// Area.
    pub area: String,
    /// Mean change.
    pub mean: String,
    /// Peak change.
    pub peak: String,
    /// Trigger level reached, or `—`.
    pub level: String,
}

impl ZoneView {
    fn of(z: &ZoneRow) -> Self {
        Self {
            label: format!("Z{}", z.track),
            direction: z.direction.clone(),
            chainage: fmt_range_m((z.x_min, z.x_max)),
            depth: fmt_range_m((z.depth_top, z.depth_bottom)),
            area: format!("{} m²", fmt_m(z.area_m2)),
            mean: fmt_pct(z.mean_change_pct),
            peak: fmt_pct(z.peak_change_pct),
            level: z.level.map(|l| l.to_string()).unwrap_or_else(|| "—".into()),
        }
    }
}

/// The line page's view of one processed epoch and the way to its neighbours.
pub struct Timeline {
    /// Processed epochs of the line.
    pub n: usize,
    /// Position of the shown epoch (1-based).
    pub position: usize,
    /// Shown epoch.
    pub epoch_id: i64,
    /// Its start.
    pub when: String,
    /// Its start, RFC 3339.
    pub when_iso: String,
    /// Earlier epoch, if any.
    pub prev: Option<i64>,
    /// Later epoch, if any.
    pub next: Option<i64>,
    /// First and last epoch.
    pub first: i64,
    /// Newest epoch.
    pub last: i64,
    /// Every processed epoch (id, start) for the no-script picker, newest first.
    pub options: Vec<(i64, String)>,
    /// Every processed epoch id, oldest first, comma-separated (for the slider).
    pub ids: String,
    /// A change section is stored for the epoch.
    pub has_change: bool,
    /// Change mode shown.
    pub mode: String,
    /// Zones of the epoch.
    pub zones: Vec<ZoneView>,
    /// Line-wide wetting notice, or empty.
    pub wetting: String,
    /// Season chart of the strongest change is available.
    pub trend: bool,
    /// Quality-of-fit line of the model.
    pub fit: String,
}

/// The timeline of a line's processed epochs at `wanted` (default: the newest).
pub async fn timeline(
    state: &AppState,
    line: &Line,
    wanted: Option<i64>,
) -> Result<Option<Timeline>, PageError> {
    let epochs = models::modelled_epochs(&state.db, line.id).await?;
    if epochs.is_empty() {
        return Ok(None);
    }
    let k = match wanted {
        Some(id) => epochs.iter().position(|(e, _)| *e == id).ok_or_else(|| {
            PageError::NotFound(format!("Processed epoch {id} of line {}", line.name))
        })?,
        None => epochs.len() - 1,
    };
    let (epoch_id, at) = epochs[k];
    let mode = primary_mode(state);
    let changes = models::changes(&state.db, epoch_id).await?;
    let has_change = changes.iter().any(|c| c.mode == mode);
    let zones = db::alerts::epoch_zones(&state.db, epoch_id).await?;
    let wetting = match db::alerts::epoch_wetting(&state.db, epoch_id).await? {
        Some(w) => match serde_json::from_str::<DetailDto>(&w) {
            Ok(DetailDto::LineWideWetting(w)) => {
                crate::notify::wetting_words(&ohmline_core::alerts::WettingNotice::from(w))
            }
            _ => "Line-wide wetting was found in this epoch.".to_string(),
        },
        None => String::new(),
    };
    let fit = match models::model(&state.db, epoch_id).await? {
        Some(m) => format!(
            "Model fit: χ²/N {:.2}, RMS misfit {:.1} %, {} iterations, {} readings used{}.",
            m.chi2,
            m.rms_pct,
            m.iterations,
            m.n_used,
            if m.converged { "" } else { "; did not reach the target misfit" }
        ),
        None => String::new(),
    };
    let trend = !models::strongest_drops(&state.db, line.id, &mode).await?.is_empty();
    Ok(Some(Timeline {
        n: epochs.len(),
        position: k + 1,
        epoch_id,
        when: fmt_time(at),
        when_iso: iso(at),
        prev: k.checked_sub(1).map(|i| epochs[i].0),
        next: epochs.get(k + 1).map(|e| e.0),
        first: epochs[0].0,
        last: epochs[epochs.len() - 1].0,
        options: epochs.iter().rev().map(|(id, t)| (*id, fmt_time(*t))).collect(),
        ids: epochs.iter().map(|(id, _)| id.to_string()).collect::<Vec<_>>().join(","),
        has_change,
        mode,
        zones: zones.iter().map(ZoneView::of).collect(),
        wetting,
        trend,
        fit,
    }))
}

/// The open alerts of a line, newest first.
pub async fn open_alerts(state: &AppState, line_id: i64) -> Result<Vec<AlertView>, PageError> {
    let rows = db::alerts::list(
        &state.db,
        &AlertFilter {
            line_id: Some(line_id),
            state: Some("open".into()),
            limit: 50,
            ..AlertFilter::default()
        },
    )
    .await?;
    Ok(rows.iter().map(AlertView::of).collect())
}
