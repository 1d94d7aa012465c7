//! Errors of the browser pages, answered as HTML pages (or, for a missing
//! sign-in, a redirect to the sign-in page). Internal causes are logged, not
//! shown.

use askama::Template;
use axum::http::{HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Redirect, Response};
use thiserror::Error;

use super::view::Chrome;
use crate::db::DbError;

/// A page request that cannot be answered with the page.
#[derive(Debug, Error)]
pub enum PageError {
    /// No live session: go to the sign-in page, then back to `next`.
    #[error("sign-in required")]
    SignInRequired {
        /// Local path to return to after signing in.
        next: String,
    },
    /// Signed in without the right.
    #[error("{0}")]
    Forbidden(String),
    /// A form without this session's CSRF token.
    #[error("This form has expired or did not come from this site. Reload the page and try again.")]
    CsrfRejected,
    /// No such object.
    #[error("{0} was not found.")]
    NotFound(String),
    /// The request cannot be used as it is.
    #[error("{0}")]
    BadRequest(String),
    /// The request body is over its limit.
    #[error("{0}")]
    TooLarge(String),
    /// Too many failed sign-ins.
    #[error("{message}")]
    TooManyAttempts {
        /// What to tell the user.
        message: String,
        /// Seconds until another attempt is allowed.
        retry_after_s: u64,
    },
    /// Storage failed.
    #[error(transparent)]
    Db(#[from] DbError),
    /// A template failed to render (a bug).
    #[error("page rendering failed: {0}")]
    Render(#[from] askama::Error),
    /// A blocking task failed (a bug).
    #[error("background task failed: {0}")]
    Task(String),
}

#[derive(Template)]
#[template(path = "error.html")]
struct ErrorPage {
    chrome: Chrome,
    status: u16,
    title: &'static str,
    message: String,
}

impl IntoResponse for PageError {
    fn into_response(self) -> Response {
        let (status, title) = match &self {
            PageError::SignInRequired { next } => {
                let q = serde_urlencoded::to_string([("next", next.as_str())]).unwrap_or_default();
                return Redirect::to(&format!("/sign-in?{q}")).into_response();
            }
            PageError::Forbidden(_) => (StatusCode::FORBIDDEN, "Not allowed"),
            PageError::CsrfRejected => (StatusCode::FORBIDDEN, "Form refused"),
            PageError::NotFound(_) => (StatusCode::NOT_FOUND, "Not found"),
            PageError::BadRequest(_) => (StatusCode::BAD_REQUEST, "Cannot do that"),
            PageError::TooLarge(_) => (StatusCode::PAYLOAD_TOO_LARGE, "Too large"),
            PageError::TooManyAttempts { .. } => {
                (StatusCode::TOO_MANY_REQUESTS, "Too many attempts")
            }
            PageError::Db(DbError::Unavailable(_)) => {
                (StatusCode::SERVICE_UNAVAILABLE, "Database unavailable")
            }
            PageError::Db(DbError::NotFound { .. }) => (StatusCode::NOT_FOUND, "Not found"),
            PageError::Db(DbError::Conflict { .. }) => (StatusCode::CONFLICT, "Already exists"),
            _ => (StatusCode::INTERNAL_SERVER_ERROR, "Internal error"),
        };
        let message = if status.is_server_error() {
            tracing::error!(error = %self, "page failed");
            match status {
                StatusCode::SERVICE_UNAVAILABLE => {
                    "The database does not answer. Try again in a minute.".to_string()
                }
                _ => "Something went wrong on the server; the log has the details.".to_string(),
            }
        } else {
            self.to_string()
        };
        let page =
            ErrorPage { chrome: Chrome::anonymous(), status: status.as_u16(), title, message };
        let mut resp = match page.render() {
            Ok(body) => super::html(status, body),
            Err(e) => {
                tracing::error!(error = %e, "error page failed to render");
                (status, title).into_response()
            }
        };
        let retry = match &self {
            PageError::TooManyAttempts { retry_after_s, .. } => Some(*retry_after_s),
            _ if status == StatusCode::SERVICE_UNAVAILABLE => Some(5),
            _ => None,
        };
        if let Some(s) = retry
            && let Ok(v) = HeaderValue::from_str(&s.to_string())
        {
            resp.headers_mut().insert(header::RETRY_AFTER, v);
        }
        resp
    }
}
