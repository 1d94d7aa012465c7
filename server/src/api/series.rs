//! Site time series: upload (CSV or JSON) and reading.
//!
//! Who may upload: an engineer or admin with a personal token, or the meter
//! token of any line of the site (a station that also logs the river gauge or
//! a rain gauge). Who may read: every user, and the token of a line of the
//! site. The site is named by its id or its name.

use std::collections::BTreeMap;

use axum::Json;
use axum::body::Body;
use axum::extract::{Path, Query, State};
use axum::http::{HeaderMap, StatusCode, header};
use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use super::epochs::read_limited;
use crate::app::AppState;
use crate::auth::{Caller, Role};
use crate::db::{self, sites::Site};
use crate::error::ApiError;
use crate::series::{self, SeriesAccepted, SeriesUpload};

/// The site named `key`, if the caller may see it; returns the caller's name
/// for the upload record. Writing needs the engineer role or a line token of
/// the site.
async fn site_for(
    state: &AppState,
    auth: &Caller,
    key: &str,
    write: bool,
) -> Result<(Site, String), ApiError> {
    let site = series::site_by_key(&state.db, key)
        .await?
        .ok_or_else(|| ApiError::NotFound(format!("site {key:?}")))?;
    let actor = match auth {
        Caller::Line(t) => {
            let line = db::lines::by_id(&state.db, t.line_id)
                .await?
                .ok_or_else(|| ApiError::NotFound(format!("line {}", t.line_id)))?;
            if line.site_id != site.id {
                return Err(ApiError::Forbidden(
                    "this token belongs to a line of another site".into(),
                ));
            }
            format!("line token {} ({})", t.id, line.name)
        }
        Caller::User(u) => {
            if write {
                auth.require_role(Role::Engineer)?;
            }
            u.user.email.clone()
        }
    };
    Ok((site, actor))
}

/// `POST /api/v1/sites/{site}/series/{kind}`: stores samples (CSV or JSON
/// body; unit in the query parameter `unit`, a `# unit:` line or the JSON key).
/// 201 when samples were added or replaced, 200 when all were already stored.
pub async fn upload(
    State(state): State<AppState>,
    auth: Caller,
    Path((key, kind)): Path<(String, String)>,
    Query(query): Query<BTreeMap<String, String>>,
    headers: HeaderMap,
    body: Body,
) -> Result<(StatusCode, Json<SeriesAccepted>), ApiError> {
    let limit = state.config.ingest.max_body_bytes;
    // Read first so that a refusal reaches a client that is still sending.
    let bytes = read_limited(body, limit).await;
    let (site, actor) = site_for(&state, &auth, &key, true).await?;
    let bytes = bytes?;
    let content_type =
        headers.get(header::CONTENT_TYPE).and_then(|v| v.to_str().ok()).unwrap_or("");
    let query_string = query.iter().map(|(k, v)| format!("{k}={v}")).collect::<Vec<_>>().join("&");
    let accepted = series::upload(
        &state.db,
        &site,
        &kind,
        SeriesUpload {
            body: &bytes,
            content_type,
            unit: query.get("unit").map(String::as_str),
            query: &query_string,
            source: "api",
            actor: &actor,
            filename: None,
        },
    )
    .await?;
    let status = if accepted.changed() { StatusCode::CREATED } else { StatusCode::OK };
    Ok((status, Json(accepted)))
}

/// One series in a site's list.
#[derive(Serialize)]
pub struct SeriesItem {
    /// Kind.
    pub kind: String,
    /// Title for people.
    pub title: String,
    /// Unit.
    pub unit: String,
    /// Samples stored.
    pub n_samples: i64,
    /// Oldest sample's time.
    pub first: Option<DateTime<Utc>>,
    /// Newest sample's time.
    pub last: Option<DateTime<Utc>>,
    /// Newest sample's value.
    pub last_value: Option<f64>,
}

/// `GET /api/v1/sites/{site}/series` response.
#[derive(Serialize)]
pub struct SeriesList {
    /// Site id.
    pub site_id: i64,
    /// Site name.
    pub site: String,
    /// The site's series, by kind.
    pub series: Vec<SeriesItem>,
}

/// `GET /api/v1/sites/{site}/series`: the site's series with extent and
/// newest value.
pub async fn list(
    State(state): State<AppState>,
    auth: Caller,
    Path(key): Path<String>,
) -> Result<Json<SeriesList>, ApiError> {
    let (site, _) = site_for(&state, &auth, &key, false).await?;
    let series = db::series::summaries(&state.db, site.id)
        .await?
        .into_iter()
        .map(|s| SeriesItem {
            title: series::title(&s.kind),
            kind: s.kind,
            unit: s.unit,
            n_samples: s.n_samples,
            first: s.first_at,
            last: s.last_at,
            last_value: s.last_value,
        })
        .collect();
    Ok(Json(SeriesList { site_id: site.id, site: site.name, series }))
}

/// Time window of `GET …/series/{kind}`.
#[derive(Debug, Deserialize)]
pub struct Window {
    /// Samples at or after this time (RFC 3339).
    pub from: Option<String>,
    /// Samples at or before this time (RFC 3339).
    pub to: Option<String>,
}

/// One sample.
#[derive(Serialize)]
pub struct Sample {
    /// Time, UTC.
    pub time: DateTime<Utc>,
    /// Value in the series' unit.
    pub value: f64,
}

/// `GET /api/v1/sites/{site}/series/{kind}` response.
#[derive(Serialize)]
pub struct SeriesSamples {
    /// Site name.
    pub site: String,
    /// Kind.
    pub kind: String,
    /// Unit.
    pub unit: String,
    /// Samples in the window, oldest first.
    pub samples: Vec<Sample>,
}

fn window_time(name: &str, s: Option<&str>) -> Result<Option<DateTime<Utc>>, ApiError> {
    s.filter(|s| !s.is_empty())
        .map(|s| {
            DateTime::parse_from_rfc3339(s).map(|t| db::ms(t.with_timezone(&Utc))).map_err(|e| {
                ApiError::BadRequest {
                    message: format!("{name} {s:?} is not an RFC 3339 time ({e})"),
                    field: Some(name.into()),
                }
            })
        })
        .transpose()
}

/// `GET /api/v1/sites/{site}/series/{kind}?from=&to=`: the samples in the
/// window, oldest first.
pub async fn samples(
    State(state): State<AppState>,
    auth: Caller,
    Path((key, kind)): Path<(String, String)>,
    Query(w): Query<Window>,
) -> Result<Json<SeriesSamples>, ApiError> {
    let (site, _) = site_for(&state, &auth, &key, false).await?;
    let from = window_time("from", w.from.as_deref())?;
    let to = window_time("to", w.to.as_deref())?;
    if let (Some(a), Some(b)) = (from, to)
        && b < a
    {
        return Err(ApiError::BadRequest {
            message: format!("to {b} is before from {a}"),
            field: Some("to".into()),
        });
    }
    let row = db::series::by_kind(&state.db, site.id, &kind)
        .await?
        .ok_or_else(|| ApiError::NotFound(format!("series {kind:?} of site {:?}", site.name)))?;
    let samples = db::series::samples(&state.db, row.id, from, to)
        .await?
        .into_iter()
        .map(|(time, value)| Sample { time, value })
        .collect();
    Ok(Json(SeriesSamples { site: site.name, kind: row.kind, unit: row.unit, samples }))
}
