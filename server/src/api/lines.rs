//! Line listings and the alert rules in force for a line.

use axum::Json;
use axum::extract::{Path, State};
use chrono::{DateTime, Utc};
use ohmline_core::alerts::RuleSet;
use serde::Serialize;

use crate::app::AppState;
use crate::auth::Caller;
use crate::db::rules::RulesDto;
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

/// `GET /api/v1/lines/{line}/rules` response.
#[derive(Serialize)]
pub struct RulesResponse {
    /// Line slug.
    pub line: String,
    /// True when the line has no stored rules and uses the defaults.
    pub defaults: bool,
    /// Counted up on every change (0 for the defaults).
    pub version: i64,
    /// Who changed them last.
    pub updated_by: Option<String>,
    /// When.
    pub updated_at: Option<DateTime<Utc>>,
    /// The rules in force.
    pub rules: RulesDto,
}

/// The alert rules in force for a line (every user; a line token for its own line).
pub async fn rules(
    State(state): State<AppState>,
    auth: Caller,
    Path(name): Path<String>,
) -> Result<Json<RulesResponse>, ApiError> {
    let line = db::lines::by_name(&state.db, &name)
        .await?
        .ok_or_else(|| ApiError::NotFound(format!("line {name:?}")))?;
    auth.require_line(line.id)?;
    let stored = db::rules::get(&state.db, line.id).await?;
    Ok(Json(match stored {
        Some(s) => RulesResponse {
            line: line.name,
            defaults: false,
            version: s.version,
            updated_by: Some(s.updated_by),
            updated_at: Some(s.updated_at),
            rules: RulesDto::from(&s.rules),
        },
        None => RulesResponse {
            line: line.name,
            defaults: true,
            version: 0,
            updated_by: None,
            updated_at: None,
            rules: RulesDto::from(&RuleSet::default()),
        },
    }))
}
