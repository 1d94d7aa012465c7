//! Epoch upload and reading.

use std::collections::BTreeMap;

use axum::Json;
use axum::body::Body;
use axum::extract::{Path, Query, State};
use axum::http::{HeaderMap, StatusCode, header};
use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use crate::app::AppState;
use crate::auth::Caller;
use crate::db::epochs::{EpochRow, ReadingRow};
use crate::db::lines::Line;
use crate::db::{self};
use crate::error::ApiError;
use crate::ingest::{self, Accepted, IngestError, Limits, Upload};
use crate::limits::retry_after_s;
use crate::web::forms::ClientIp;

async fn line_for(state: &AppState, auth: &Caller, name: &str) -> Result<Line, ApiError> {
    let line = db::lines::by_name(&state.db, name)
        .await?
        .ok_or_else(|| ApiError::NotFound(format!("line {name:?}")))?;
    auth.require_line(line.id)?;
    Ok(line)
}

/// Refuses an upload over the per-token or per-address rate, or while the
/// processing backlog is full (429 with Retry-After).
async fn admit(state: &AppState, auth: &Caller, ip: std::net::IpAddr) -> Result<(), ApiError> {
    let now = std::time::Instant::now();
    let l = &state.limits;
    let c = &state.config.limits;
    if let Caller::Line(t) = auth
        && let Err(wait) = l.uploads_by_token.take(t.id, now)
    {
        tracing::warn!(token = t.id, "upload refused: token rate limit");
        return Err(ApiError::TooManyRequests {
            code: "rate_limited",
            message: format!(
                "more than {} uploads a minute with this token (limits.uploads_per_minute_per_token); try again in {} s",
                c.uploads_per_minute_per_token,
                retry_after_s(wait)
            ),
            retry_after_s: retry_after_s(wait),
        });
    }
    if let Err(wait) = l.uploads_by_ip.take(ip, now) {
        tracing::warn!(%ip, "upload refused: address rate limit");
        return Err(ApiError::TooManyRequests {
            code: "rate_limited",
            message: format!(
                "more than {} uploads a minute from this address (limits.uploads_per_minute_per_ip); try again in {} s",
                c.uploads_per_minute_per_ip,
                retry_after_s(wait)
            ),
            retry_after_s: retry_after_s(wait),
        });
    }
    if c.max_backlog_epochs > 0 {
        let waiting = match l.backlog.fresh(now) {
            Some(n) => n,
            None => {
                let n = u64::try_from(db::epochs::backlog(&state.db).await?).unwrap_or(0);
                l.backlog.counted(n, now);
                n
            }
        };
        if waiting >= c.max_backlog_epochs {
            tracing::warn!(waiting, "upload refused: processing backlog full");
            return Err(ApiError::TooManyRequests {
                code: "backlog_full",
                message: format!(
                    "{waiting} epochs wait for processing, the most allowed (limits.max_backlog_epochs = {}); try again in {} s",
                    c.max_backlog_epochs, c.backlog_retry_after_s
                ),
                retry_after_s: c.backlog_retry_after_s,
            });
        }
    }
    Ok(())
}

/// `POST /api/v1/lines/{line}/epochs`: stores one epoch (CSV or JSON body).
/// 201 with the new epoch, 200 for a re-sent identical epoch; 429 with
/// Retry-After over a rate limit or the backlog bound.
pub async fn upload(
    State(state): State<AppState>,
    auth: Caller,
    ClientIp(ip): ClientIp,
    Path(name): Path<String>,
    Query(query): Query<BTreeMap<String, String>>,
    headers: HeaderMap,
    body: Body,
) -> Result<(StatusCode, Json<Accepted>), ApiError> {
    // The body is read before the line is looked up, so that every refusal
    // (unknown line, another line's token, too large) reaches a client that is
    // still sending instead of a connection reset.
    let limit = state.config.ingest.max_body_bytes;
    let bytes = read_limited(body, limit).await;
    let line = line_for(&state, &auth, &name).await?;
    auth.require_upload(line.id)?;
    let bytes = bytes?;
    admit(&state, &auth, ip).await?;
    let content_type =
        headers.get(header::CONTENT_TYPE).and_then(|v| v.to_str().ok()).unwrap_or("");
    let upload = Upload { body: &bytes, content_type, query, source: "api", filename: None };
    let limits = Limits { max_readings: state.config.ingest.max_readings };
    let accepted = ingest::ingest(&state.db, &state.sequences, &line, upload, limits).await?;
    if !accepted.duplicate {
        state.limits.backlog.add_one();
        state.wake.notify_waiters();
    }
    let status = if accepted.duplicate { StatusCode::OK } else { StatusCode::CREATED };
    Ok((status, Json(accepted)))
}

/// Reads a body of at most `limit` bytes. A larger body is read on and discarded
/// up to four times the limit before the 413 answer, so that a client still
/// sending gets to read the answer instead of a connection reset; beyond that the
/// connection is closed.
pub(crate) async fn read_limited(body: Body, limit: usize) -> Result<bytes::Bytes, ApiError> {
    use futures_util::StreamExt;
    let mut stream = body.into_data_stream();
    let mut buf = bytes::BytesMut::new();
    let mut total = 0usize;
    while let Some(chunk) = stream.next().await {
        let chunk = chunk.map_err(|e| ApiError::BadRequest {
            message: format!("the request body could not be read: {e}"),
            field: None,
        })?;
        total += chunk.len();
        if total <= limit {
            buf.extend_from_slice(&chunk);
        } else if total > limit.saturating_mul(4) {
            break;
        }
    }
    if total > limit {
        return Err(IngestError::BodyTooLarge { limit }.into());
    }
    Ok(buf.freeze())
}

/// Paging parameters of `GET /api/v1/lines/{line}/epochs`.
#[derive(Debug, Deserialize)]
pub struct Page {
    /// Epochs per page (1–500, default 50).
    pub limit: Option<i64>,
    /// Only epochs that started before this time (the `next_before` of the
    /// previous page).
    pub before: Option<String>,
}

/// One page of epochs.
#[derive(Serialize)]
pub struct EpochPage {
    /// Epochs, newest first.
    pub epochs: Vec<EpochRow>,
    /// Pass as `before` to get the next page; absent on the last page.
    pub next_before: Option<DateTime<Utc>>,
}

/// `GET /api/v1/lines/{line}/epochs`: the line's epochs, newest first.
pub async fn list(
    State(state): State<AppState>,
    auth: Caller,
    Path(name): Path<String>,
    Query(page): Query<Page>,
) -> Result<Json<EpochPage>, ApiError> {
    let line = line_for(&state, &auth, &name).await?;
    let limit = page.limit.unwrap_or(50);
    if !(1..=500).contains(&limit) {
        return Err(ApiError::BadRequest {
            message: format!("limit {limit} is outside 1…500"),
            field: Some("limit".into()),
        });
    }
    let before = page
        .before
        .as_deref()
        .map(|s| {
            DateTime::parse_from_rfc3339(s).map(|t| db::ms(t.with_timezone(&Utc))).map_err(|e| {
                ApiError::BadRequest {
                    message: format!("before {s:?} is not an RFC 3339 time ({e})"),
                    field: Some("before".into()),
                }
            })
        })
        .transpose()?;
    let epochs = db::epochs::list_for_line(&state.db, line.id, before, limit).await?;
    let next_before =
        (epochs.len() as i64 == limit).then(|| epochs.last().map(|e| e.started_at)).flatten();
    Ok(Json(EpochPage { epochs, next_before }))
}

/// `GET /api/v1/epochs/{id}` response.
#[derive(Serialize)]
pub struct EpochDetail {
    /// The epoch.
    #[serde(flatten)]
    pub epoch: EpochRow,
    /// Line slug.
    pub line: String,
    /// Sequence version the meter ran.
    pub sequence_version: i64,
    /// Ground temperatures sent with the epoch.
    pub temperatures: Vec<Temperature>,
}

/// A ground temperature.
#[derive(Serialize)]
pub struct Temperature {
    /// Depth below ground, m.
    pub depth_m: f64,
    /// °C.
    pub temperature_c: f64,
}

pub(crate) async fn epoch_for(
    state: &AppState,
    auth: &Caller,
    id: i64,
) -> Result<(EpochRow, Line), ApiError> {
    let epoch = db::epochs::get(&state.db, id)
        .await?
        .ok_or_else(|| ApiError::NotFound(format!("epoch {id}")))?;
    auth.require_line(epoch.line_id)?;
    let line = db::lines::by_id(&state.db, epoch.line_id)
        .await?
        .ok_or_else(|| ApiError::NotFound(format!("line {}", epoch.line_id)))?;
    Ok((epoch, line))
}

/// `GET /api/v1/epochs/{id}`: metadata, counts and processing status.
pub async fn show(
    State(state): State<AppState>,
    auth: Caller,
    Path(id): Path<i64>,
) -> Result<Json<EpochDetail>, ApiError> {
    let (epoch, line) = epoch_for(&state, &auth, id).await?;
    let seq = db::sequences::by_id(&state.db, epoch.sequence_id)
        .await?
        .ok_or_else(|| ApiError::NotFound(format!("sequence {}", epoch.sequence_id)))?;
    let temperatures = db::epochs::temperatures(&state.db, id)
        .await?
        .into_iter()
        .map(|(depth_m, temperature_c)| Temperature { depth_m, temperature_c })
        .collect();
    Ok(Json(EpochDetail { epoch, line: line.name, sequence_version: seq.version, temperatures }))
}

/// `GET /api/v1/epochs/{id}/readings` response.
#[derive(Serialize)]
pub struct Readings {
    /// Epoch id.
    pub epoch_id: i64,
    /// Readings as stored, in upload order.
    pub readings: Vec<ReadingRow>,
}

/// `GET /api/v1/epochs/{id}/readings`: the stored raw readings.
pub async fn readings(
    State(state): State<AppState>,
    auth: Caller,
    Path(id): Path<i64>,
) -> Result<Json<Readings>, ApiError> {
    epoch_for(&state, &auth, id).await?;
    let readings = db::epochs::readings(&state.db, id).await?;
    Ok(Json(Readings { epoch_id: id, readings }))
}
