//! Line activity for the overview: per line, the newest epoch and the number of
//! epochs started since a given time.

use chrono::{DateTime, Utc};

use super::{Db, DbResult, on_pool};

/// One line's recent activity.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct LineActivity {
    /// Line row id.
    pub line_id: i64,
    /// Line slug.
    pub line: String,
    /// Site row id.
    pub site_id: i64,
    /// Site name.
    pub site: String,
    /// `longitudinal` or `transverse`.
    pub orientation: String,
    /// Expected time between epochs, s.
    pub expected_interval_s: i64,
    /// Number of electrodes.
    pub n_electrodes: i64,
    /// Start of the newest epoch.
    pub last_epoch_at: Option<DateTime<Utc>>,
    /// Epochs that started at or after `since`.
    pub recent_epochs: i64,
}

/// Every line with its activity since `since`, by site then line name.
pub async fn lines(db: &Db, since: DateTime<Utc>) -> DbResult<Vec<LineActivity>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, LineActivity>(
        "SELECT l.id AS line_id, l.name AS line, s.id AS site_id, s.name AS site, l.orientation,
                l.expected_interval_s,
                (SELECT COUNT(*) FROM electrodes e WHERE e.line_id = l.id) AS n_electrodes,
                (SELECT MAX(p.started_at) FROM epochs p WHERE p.line_id = l.id) AS last_epoch_at,
                (SELECT COUNT(*) FROM epochs p WHERE p.line_id = l.id AND p.started_at >= $1)
                    AS recent_epochs
         FROM lines l JOIN sites s ON s.id = l.site_id
         ORDER BY s.name, l.name"
    )
    .bind(since)
    .fetch_all(p)
    .await?))
}
