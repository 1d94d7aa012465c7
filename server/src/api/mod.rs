//! The JSON API under `/api/v1`.

pub mod epochs;
pub mod lines;
pub mod quality;

use axum::Router;
use axum::routing::{get, post};

use crate::app::AppState;

/// Routes of `/api/v1`.
pub fn routes() -> Router<AppState> {
    Router::new()
        .route("/api/v1/lines", get(lines::list))
        .route("/api/v1/lines/{line}/epochs", post(epochs::upload).get(epochs::list))
        .route("/api/v1/epochs/{id}", get(epochs::show))
        .route("/api/v1/epochs/{id}/readings", get(epochs::readings))
        .route("/api/v1/epochs/{id}/quality", get(quality::show))
}
