//! The JSON API under `/api/v1`.

pub mod alerts;
pub mod epochs;
pub mod lines;
pub mod quality;
pub mod sections;
pub mod series;

use axum::routing::{get, post};

use crate::app::Routes;

/// Routes of `/api/v1`.
pub fn routes() -> Routes {
    Routes::new()
        .route("/api/v1/lines", get(lines::list))
        .route("/api/v1/lines/{line}/epochs", post(epochs::upload).get(epochs::list))
        .route("/api/v1/lines/{line}/rules", get(lines::rules))
        .route("/api/v1/epochs/{id}", get(epochs::show))
        .route("/api/v1/epochs/{id}/readings", get(epochs::readings))
        .route("/api/v1/epochs/{id}/quality", get(quality::show))
        .route("/api/v1/epochs/{id}/model", get(sections::model))
        .route("/api/v1/epochs/{id}/change", get(sections::change))
        .route("/api/v1/sites/{site}/series", get(series::list))
        .route("/api/v1/sites/{site}/series/{kind}", post(series::upload).get(series::samples))
        .route("/api/v1/alerts", get(alerts::list))
        .route("/api/v1/alerts/feed.atom", get(alerts::feed))
        .route("/api/v1/alerts/{id}", get(alerts::show))
        .route("/api/v1/alerts/{id}/cap", get(alerts::cap_document))
        .route("/api/v1/alerts/{id}/acknowledge", post(alerts::acknowledge))
        .route("/api/v1/alerts/{id}/resolve", post(alerts::resolve))
}
