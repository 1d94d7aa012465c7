//! The API's error type: every failure becomes a JSON body
//! `{"error": {"code", "message", "row"?, "index"?, "field"?}}` with a fitting
//! status. Internal causes are logged, not shown.

use axum::Json;
use axum::http::{HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use serde::Serialize;
use thiserror::Error;

use crate::db::DbError;
use crate::ingest::IngestError;
use crate::ingest::parse::Location;
use crate::series::SeriesError;

/// An error answered to an API client.
#[derive(Debug, Error)]
pub enum ApiError {
    /// No credentials, or unknown/revoked ones.
    #[error("missing, unknown or revoked token")]
    Unauthorized,
    /// Valid credentials without the right to this resource.
    #[error("{0}")]
    Forbidden(String),
    /// The resource does not exist.
    #[error("{0} not found")]
    NotFound(String),
    /// A malformed request outside ingest (bad query parameter, …).
    #[error("{message}")]
    BadRequest {
        /// What is wrong.
        message: String,
        /// Which parameter.
        field: Option<String>,
    },
    /// Too many requests: a rate limit or the processing backlog.
    #[error("{message}")]
    TooManyRequests {
        /// `rate_limited` or `backlog_full`.
        code: &'static str,
        /// What was exceeded and when to try again.
        message: String,
        /// Seconds until another attempt may succeed.
        retry_after_s: u64,
    },
    /// An upload was refused.
    #[error(transparent)]
    Ingest(#[from] IngestError),
    /// A site series upload was refused.
    #[error(transparent)]
    Series(#[from] SeriesError),
    /// Storage failed.
    #[error(transparent)]
    Db(#[from] DbError),
}

#[derive(Serialize)]
struct Body<'a> {
    error: Detail<'a>,
}

#[derive(Serialize)]
struct Detail<'a> {
    code: &'a str,
    message: String,
    #[serde(flatten)]
    at: Option<&'a Location>,
}

impl ApiError {
    fn status_and_code(&self) -> (StatusCode, &'static str) {
        use IngestError as I;
        match self {
            ApiError::Unauthorized => (StatusCode::UNAUTHORIZED, "unauthorized"),
            ApiError::Forbidden(_) => (StatusCode::FORBIDDEN, "forbidden"),
            ApiError::NotFound(_) => (StatusCode::NOT_FOUND, "not_found"),
            ApiError::BadRequest { .. } => (StatusCode::BAD_REQUEST, "bad_request"),
            ApiError::TooManyRequests { code, .. } => (StatusCode::TOO_MANY_REQUESTS, *code),
            ApiError::Ingest(e) => match e {
                I::UnsupportedContentType(_) => {
                    (StatusCode::UNSUPPORTED_MEDIA_TYPE, "unsupported_content_type")
                }
                I::BodyTooLarge { .. } => (StatusCode::PAYLOAD_TOO_LARGE, "body_too_large"),
                I::TooManyReadings { .. } => (StatusCode::PAYLOAD_TOO_LARGE, "too_many_readings"),
                I::Invalid { .. } => (StatusCode::UNPROCESSABLE_ENTITY, "invalid_upload"),
                I::NoSequence { .. } => (StatusCode::CONFLICT, "no_sequence"),
                I::Conflict { .. } => (StatusCode::CONFLICT, "epoch_conflict"),
                I::Db(d) => db_status(d),
            },
            ApiError::Series(e) => match e {
                SeriesError::UnsupportedContentType(_) => {
                    (StatusCode::UNSUPPORTED_MEDIA_TYPE, "unsupported_content_type")
                }
                SeriesError::TooManySamples { .. } => {
                    (StatusCode::PAYLOAD_TOO_LARGE, "too_many_samples")
                }
                SeriesError::Invalid { .. } => (StatusCode::BAD_REQUEST, "invalid_series"),
                SeriesError::Db(d) => db_status(d),
            },
            ApiError::Db(d) => db_status(d),
        }
    }
}

fn db_status(e: &DbError) -> (StatusCode, &'static str) {
    match e {
        DbError::Unavailable(_) => (StatusCode::SERVICE_UNAVAILABLE, "database_unavailable"),
        DbError::NotFound { .. } => (StatusCode::NOT_FOUND, "not_found"),
        DbError::Conflict { .. } => (StatusCode::CONFLICT, "conflict"),
        _ => (StatusCode::INTERNAL_SERVER_ERROR, "internal"),
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let (status, code) = self.status_and_code();
        let message = if status == StatusCode::INTERNAL_SERVER_ERROR {
            tracing::error!(error = %self, "internal error");
            "internal error; see the server log".to_string()
        } else {
            if status == StatusCode::SERVICE_UNAVAILABLE {
                tracing::warn!(error = %self, "database unavailable");
            }
            self.to_string()
        };
        let field_only;
        let at = match &self {
            ApiError::Ingest(IngestError::Invalid { at, .. }) => Some(at),
            ApiError::Series(e) if e.location().is_some() => e.location(),
            ApiError::BadRequest { field: Some(f), .. } => {
                field_only = Location::field(f);
                Some(&field_only)
            }
            _ => None,
        };
        let mut resp = (status, Json(Body { error: Detail { code, message, at } })).into_response();
        if status == StatusCode::SERVICE_UNAVAILABLE {
            resp.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from_static("5"));
        }
        if let ApiError::TooManyRequests { retry_after_s, .. } = &self {
            resp.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from(*retry_after_s));
        }
        if status == StatusCode::UNAUTHORIZED {
            resp.headers_mut().insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer"));
        }
        resp
    }
}
