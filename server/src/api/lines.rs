//! Line listings.

use axum::Json;
use axum::extract::State;
use serde::Serialize;

use crate::app::AppState;
use crate::auth::Caller;
use crate::db::{self, lines::LineListing};
use crate::error::ApiError;

/// `GET /api/v1/lines` response.
#[derive(Serialize)]
pub struct LinesResponse {
    /// Lines visible to the caller.
    pub lines: Vec<LineListing>,
}

/// Lists the lines the caller may see (a line token sees its own line; a user sees all).
pub async fn list(
    State(state): State<AppState>,
    auth: Caller,
) -> Result<Json<LinesResponse>, ApiError> {
    let lines = db::lines::list(&state.db, auth.line_scope()).await?;
    Ok(Json(LinesResponse { lines }))
}
