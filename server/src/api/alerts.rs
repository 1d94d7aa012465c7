//! Alerts: list, show with the audit trail, acknowledge and resolve, and the
//! OASIS CAP 1.2 document of each alert with an Atom index.
//!
//! Every alert response carries the caution: an alert only prompts an
//! inspection by a qualified engineer.

use axum::Json;
use axum::extract::{Path, Query, State};
use axum::http::header;
use axum::response::{IntoResponse, Response};
use serde::{Deserialize, Serialize};

use crate::app::AppState;
use crate::auth::{Caller, Role};
use crate::db::alerts::{AlertFilter, AlertRow, TransitionRow};
use crate::db::{self};
use crate::error::ApiError;
use crate::notify::cap::{self, CapParams, FeedParams};
use crate::notify::{AlertEvent, AlertKind, AlertNotice, CAUTION, NewNotice, alert_link};
use crate::pipeline::Pipeline;
use crate::pipeline::monitor::{Action, ActionError, act};

/// Query of `GET /api/v1/alerts`.
#[derive(Deserialize)]
pub struct ListQuery {
    /// Site name.
    pub site: Option<String>,
    /// Line slug.
    pub line: Option<String>,
    /// `raised`, `acknowledged`, `resolved` or `open` (raised or acknowledged).
    pub state: Option<String>,
    /// Lowest level rank (0 notice, 1… trigger levels).
    pub level: Option<i64>,
    /// Most alerts (default 100, at most 1000).
    pub limit: Option<i64>,
}

/// An alert as the API shows it.
#[derive(Serialize)]
pub struct AlertDto {
    /// Alert id.
    pub id: i64,
    /// Site name.
    pub site: String,
    /// Line slug.
    pub line: String,
    /// `raised`, `acknowledged` or `resolved`.
    pub state: String,
    /// Level rank: 0 notice, 1… trigger level (1 gentlest).
    pub level: i64,
    /// The level in words.
    pub level_label: String,
    /// What it is about.
    pub subject: String,
    /// `zone`, `line_wide_wetting` or `quality`.
    pub subject_kind: String,
    /// Zone track id.
    pub track: Option<i64>,
    /// Chainage range (from, to), m.
    pub chainage_m: Option<[f64; 2]>,
    /// Depth range below ground (top, bottom), m.
    pub depth_m: Option<[f64; 2]>,
    /// Extreme change against the baseline, %.
    pub peak_change_pct: Option<f64>,
    /// Area, m².
    pub area_m2: Option<f64>,
    /// When raised.
    pub raised_at: chrono::DateTime<chrono::Utc>,
    /// Start of the qualifying run.
    pub since: chrono::DateTime<chrono::Utc>,
    /// Latest update.
    pub updated_at: chrono::DateTime<chrono::Utc>,
    /// When resolved.
    pub resolved_at: Option<chrono::DateTime<chrono::Utc>>,
    /// Epoch behind the latest facts.
    pub epoch_id: Option<i64>,
    /// Latest facts from the rules.
    pub detail: serde_json::Value,
    /// The alert page.
    pub link: String,
}

impl AlertDto {
    fn of(a: AlertRow, base: &str) -> Self {
        AlertDto {
            link: alert_link(base, a.id),
            id: a.id,
            site: a.site,
            line: a.line,
            state: a.state,
            level: a.level,
            level_label: a.level_label,
            subject: a.subject,
            subject_kind: a.subject_kind,
            track: a.track,
            chainage_m: a.x_min.zip(a.x_max).map(|(a, b)| [a, b]),
            depth_m: a.depth_top.zip(a.depth_bottom).map(|(a, b)| [a, b]),
            peak_change_pct: a.peak_change_pct,
            area_m2: a.area_m2,
            raised_at: a.raised_at,
            since: a.since,
            updated_at: a.updated_at,
            resolved_at: a.resolved_at,
            epoch_id: a.epoch_id,
            detail: serde_json::from_str(&a.detail).unwrap_or_default(),
        }
    }
}

/// `GET /api/v1/alerts` response.
#[derive(Serialize)]
pub struct AlertList {
    /// The caution every alert carries.
    pub caution: &'static str,
    /// Alerts, newest update first.
    pub alerts: Vec<AlertDto>,
}

/// `GET /api/v1/alerts`: alerts filtered by site, line, state and level.
pub async fn list(
    State(state): State<AppState>,
    auth: Caller,
    Query(q): Query<ListQuery>,
) -> Result<Json<AlertList>, ApiError> {
    if let Some(s) = q.state.as_deref()
        && !["raised", "acknowledged", "resolved", "open"].contains(&s)
    {
        return Err(ApiError::BadRequest {
            message: format!("state must be raised, acknowledged, resolved or open, not {s:?}"),
            field: Some("state".into()),
        });
    }
    let limit = q.limit.unwrap_or(100);
    if !(1..=1000).contains(&limit) {
        return Err(ApiError::BadRequest {
            message: format!("limit must be 1 to 1000, not {limit}"),
            field: Some("limit".into()),
        });
    }
    let rows = db::alerts::list(
        &state.db,
        &AlertFilter {
            site: q.site,
            line: q.line,
            line_id: auth.line_scope(),
            state: q.state,
            min_level: q.level,
            limit,
        },
    )
    .await?;
    let base = &state.config.notify.public_base_url;
    Ok(Json(AlertList {
        caution: CAUTION,
        alerts: rows.into_iter().map(|a| AlertDto::of(a, base)).collect(),
    }))
}

/// `GET /api/v1/alerts/{id}` response.
#[derive(Serialize)]
pub struct AlertDetail {
    /// The caution every alert carries.
    pub caution: &'static str,
    /// The alert.
    pub alert: AlertDto,
    /// Its audit trail, oldest first.
    pub transitions: Vec<TransitionRow>,
}

async fn alert_for(state: &AppState, auth: &Caller, id: i64) -> Result<AlertRow, ApiError> {
    let a = db::alerts::by_id(&state.db, id)
        .await?
        .ok_or_else(|| ApiError::NotFound(format!("alert {id}")))?;
    auth.require_line(a.line_id)?;
    Ok(a)
}

/// `GET /api/v1/alerts/{id}`: one alert with its audit trail.
pub async fn show(
    State(state): State<AppState>,
    auth: Caller,
    Path(id): Path<i64>,
) -> Result<Json<AlertDetail>, ApiError> {
    let a = alert_for(&state, &auth, id).await?;
    let transitions = db::alerts::transitions(&state.db, id).await?;
    Ok(Json(AlertDetail {
        caution: CAUTION,
        alert: AlertDto::of(a, &state.config.notify.public_base_url),
        transitions,
    }))
}

/// Body of acknowledge and resolve.
#[derive(Deserialize)]
pub struct ActionBody {
    /// What the engineer did or arranged (required, one paragraph).
    pub note: String,
}

async fn do_action(
    state: AppState,
    auth: Caller,
    id: i64,
    body: ActionBody,
    action: Action,
) -> Result<Json<AlertDetail>, ApiError> {
    let user = auth.require_role(Role::Engineer)?.clone();
    let a = alert_for(&state, &auth, id).await?;
    let note = body.note.trim();
    if note.is_empty() || note.len() > 4000 {
        return Err(ApiError::BadRequest {
            message: "note must be 1 to 4000 characters: say what was done or arranged".into(),
            field: Some("note".into()),
        });
    }
    let pipeline = Pipeline::new(state.db.clone(), state.config.clone());
    match act(&pipeline, a.id, action, &user.email, note).await {
        Ok(_) => {}
        Err(ActionError::NotFound(id)) => return Err(ApiError::NotFound(format!("alert {id}"))),
        Err(ActionError::Refused(m)) => {
            return Err(ApiError::BadRequest { message: m, field: None });
        }
        Err(ActionError::Pipeline(e)) => {
            return Err(ApiError::BadRequest { message: e.to_string(), field: None });
        }
    }
    crate::db::audit::record(
        &state.db,
        &user.email,
        match action {
            Action::Acknowledge => "alert.acknowledge",
            Action::Resolve => "alert.resolve",
        },
        &format!("alert {id}"),
        note,
    )
    .await?;
    show(State(state), auth, Path(id)).await
}

/// `POST /api/v1/alerts/{id}/acknowledge` with `{"note": "..."}` (engineer role).
pub async fn acknowledge(
    State(state): State<AppState>,
    auth: Caller,
    Path(id): Path<i64>,
    Json(body): Json<ActionBody>,
) -> Result<Json<AlertDetail>, ApiError> {
    do_action(state, auth, id, body, Action::Acknowledge).await
}

/// `POST /api/v1/alerts/{id}/resolve` with `{"note": "..."}` (engineer role).
pub async fn resolve(
    State(state): State<AppState>,
    auth: Caller,
    Path(id): Path<i64>,
    Json(body): Json<ActionBody>,
) -> Result<Json<AlertDetail>, ApiError> {
    do_action(state, auth, id, body, Action::Resolve).await
}

/// The notice of an alert's current state (for the CAP document and feed).
pub fn notice_of(a: &AlertRow, base: &str) -> Option<AlertNotice> {
    let kind = match a.subject_kind.as_str() {
        "zone" if a.subject.contains("rise") => AlertKind::RiseZone,
        "zone" => AlertKind::DropZone,
        "line_wide_wetting" => AlertKind::LineWideWetting,
        _ => AlertKind::DataQuality,
    };
    let event = match a.state.as_str() {
        "resolved" => AlertEvent::Resolved,
        "acknowledged" => AlertEvent::Acknowledged,
        _ => AlertEvent::Raised,
    };
    AlertNotice::new(NewNotice {
        alert_id: a.id,
        event,
        site: a.site.clone(),
        line: a.line.clone(),
        level_rank: u8::try_from(a.level).unwrap_or(0),
        level_label: a.level_label.clone(),
        kind,
        summary: format!("{} on line {} ({}).", a.subject, a.line, a.level_label),
        chainage_m: a.x_min.zip(a.x_max),
        depth_m: a.depth_top.zip(a.depth_bottom),
        area_m2: a.area_m2,
        peak_change_pct: a.peak_change_pct,
        since: a.since,
        raised_at: a.raised_at,
        event_at: a.updated_at.max(a.raised_at),
        epoch_at: a.updated_at,
        persistence_epochs: 0,
        good_sensitivity_share: None,
        actor: None,
        link: alert_link(base, a.id),
        section_png: None,
        history_png: None,
    })
    .ok()
}

fn xml(body: String, content_type: &'static str) -> Response {
    ([(header::CONTENT_TYPE, content_type)], body).into_response()
}

/// `GET /api/v1/alerts/{id}/cap`: the alert as an OASIS CAP 1.2 document.
pub async fn cap_document(
    State(state): State<AppState>,
    auth: Caller,
    Path(id): Path<i64>,
) -> Result<Response, ApiError> {
    let a = alert_for(&state, &auth, id).await?;
    let base = &state.config.notify.public_base_url;
    let n = notice_of(&a, base)
        .ok_or_else(|| ApiError::NotFound(format!("a CAP rendering of alert {id}")))?;
    let doc = cap::alert_document(&n, None, &CapParams::from_config(&state.config.notify));
    Ok(xml(doc, "application/cap+xml; charset=utf-8"))
}

/// `GET /api/v1/alerts/feed.atom`: Atom index of the latest alerts with links
/// to their CAP documents.
pub async fn feed(State(state): State<AppState>, auth: Caller) -> Result<Response, ApiError> {
    let rows = db::alerts::list(
        &state.db,
        &AlertFilter { line_id: auth.line_scope(), limit: 100, ..Default::default() },
    )
    .await?;
    let base = state.config.notify.public_base_url.clone();
    let entries: Vec<AlertNotice> = rows.iter().filter_map(|a| notice_of(a, &base)).collect();
    let updated = rows.iter().map(|a| a.updated_at).max().unwrap_or_else(db::now);
    let p = FeedParams {
        public_base_url: base.clone(),
        title: "ohmline alerts".into(),
        updated,
        author: state.config.notify.cap.sender_name.clone(),
    };
    Ok(xml(cap::atom_feed(&entries, &p), "application/atom+xml; charset=utf-8"))
}
