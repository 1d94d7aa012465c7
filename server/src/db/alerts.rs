//! Change zones and alerts: each line's monitor state (zone tracker and alert
//! engine, JSON with a version), the zones of every processed epoch, the alerts
//! with their audit trail, and the email notices written with them.
//!
//! A monitor update (one processed epoch, or a person acknowledging or
//! resolving) is stored in one transaction: the new state (only if nobody
//! stored another since it was read: optimistic concurrency on `version`),
//! zones, alerts, transitions, outbox rows for the notices, and the epoch's
//! status. A version conflict returns [`DbError::Conflict`]; the caller reloads
//! and retries.

use std::collections::HashMap;

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::outbox::{EnqueueParams, enqueue_notice};
use super::{Db, DbError, DbResult, in_tx, on_pool};
use crate::notify::AlertNotice;

/// A line's stored monitor state.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct MonitorRow {
    /// JSON of `pipeline::monitor_state::MonitorState`.
    pub state: String,
    /// Increases with every update.
    pub version: i64,
    /// Last epoch processed.
    pub last_epoch_id: Option<i64>,
}

/// The monitor state of a line, if it has one.
pub async fn monitor(db: &Db, line_id: i64) -> DbResult<Option<MonitorRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, MonitorRow>(
        "SELECT state, version, last_epoch_id FROM line_monitors WHERE line_id = $1"
    )
    .bind(line_id)
    .fetch_optional(p)
    .await?))
}

/// One zone of one epoch.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct ZoneRow {
    /// Track identity (stable across epochs).
    pub track: i64,
    /// `drop` or `rise`.
    pub direction: String,
    /// Level the zone qualified for (0 notice, 1… trigger), if any.
    pub level: Option<i64>,
    /// Area, m².
    pub area_m2: f64,
    /// Chainage from, m.
    pub x_min: f64,
    /// Chainage to, m.
    pub x_max: f64,
    /// Depth of the top below ground, m.
    pub depth_top: f64,
    /// Depth of the bottom below ground, m.
    pub depth_bottom: f64,
    /// Centroid chainage, m.
    pub centroid_x: f64,
    /// Centroid elevation, m.
    pub centroid_z: f64,
    /// Area-weighted mean change, %.
    pub mean_change_pct: f64,
    /// Extreme change, %.
    pub peak_change_pct: f64,
    /// Extreme change relative to the line-wide background, %.
    pub peak_judged_pct: f64,
    /// Share of the area with good sensitivity.
    pub good_share: f64,
    /// Outline rings, JSON `[[[x, z], ...], ...]`.
    pub outline: String,
    /// Cell indices, JSON.
    pub cells: String,
}

/// What one processed epoch adds.
#[derive(Debug, Clone, PartialEq)]
pub struct EpochMonitoring<'a> {
    /// Epoch.
    pub epoch_id: i64,
    /// Zones found.
    pub zones: &'a [ZoneRow],
    /// Line-wide wetting, JSON, if any.
    pub wetting: Option<String>,
    /// Warnings, JSON array.
    pub warnings: String,
    /// Status the epoch moves to.
    pub status: &'a str,
}

/// The stored form of an alert after an update.
#[derive(Debug, Clone, PartialEq)]
pub struct AlertUpsert {
    /// The engine's id of the alert (unique per line).
    pub engine_id: i64,
    /// What it is about, for people.
    pub subject: String,
    /// `zone`, `line_wide_wetting` or `quality`.
    pub subject_kind: String,
    /// Track of a zone subject.
    pub track: Option<i64>,
    /// `raised`, `acknowledged` or `resolved`.
    pub state: String,
    /// Level rank.
    pub level: i64,
    /// Level in words.
    pub level_label: String,
    /// When raised.
    pub raised_at: DateTime<Utc>,
    /// Start of the qualifying run.
    pub since: DateTime<Utc>,
    /// Latest update.
    pub updated_at: DateTime<Utc>,
    /// When resolved.
    pub resolved_at: Option<DateTime<Utc>>,
    /// Epoch behind the latest facts.
    pub epoch_id: Option<i64>,
    /// Chainage range, m.
    pub x_range: Option<(f64, f64)>,
    /// Depth range, m.
    pub depth_range: Option<(f64, f64)>,
    /// Extreme change, %.
    pub peak_change_pct: Option<f64>,
    /// Area, m².
    pub area_m2: Option<f64>,
    /// Latest facts, JSON.
    pub detail: String,
}

/// One transition for the audit trail.
#[derive(Debug, Clone, PartialEq)]
pub struct NewTransition {
    /// The engine's id of the alert.
    pub engine_id: i64,
    /// State before (`None` when raised).
    pub from_state: Option<String>,
    /// State after.
    pub to_state: String,
    /// Level rank after.
    pub level: i64,
    /// Why, in words.
    pub reason: String,
    /// `system` or a person.
    pub actor: String,
    /// A person's note.
    pub note: Option<String>,
    /// When.
    pub at: DateTime<Utc>,
}

/// Everything one monitor update stores.
#[derive(Debug, Clone, PartialEq)]
pub struct MonitorUpdate<'a> {
    /// Line.
    pub line_id: i64,
    /// New monitor state, JSON.
    pub state: String,
    /// Version the state was read at (`None`: the line had none).
    pub read_version: Option<i64>,
    /// Time of the newest epoch the state has seen.
    pub last_time: Option<DateTime<Utc>>,
    /// The epoch, when the update processes one.
    pub epoch: Option<EpochMonitoring<'a>>,
    /// Alerts changed by the update.
    pub alerts: &'a [AlertUpsert],
    /// Transitions, in order.
    pub transitions: &'a [NewTransition],
}

/// What was stored.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct StoredUpdate {
    /// Row id of each alert by engine id.
    pub alert_ids: HashMap<i64, i64>,
    /// Outbox rows written.
    pub emails: usize,
}

/// Stores a monitor update (module docs). `notice` builds the email notice of
/// a transition from the alert's row id, or `None` when it sends none.
pub async fn store_update(
    db: &Db,
    u: &MonitorUpdate<'_>,
    notice: &(dyn Fn(i64, &NewTransition) -> Option<AlertNotice> + Send + Sync),
    params: &EnqueueParams,
) -> DbResult<StoredUpdate> {
    let now = super::now();
    in_tx!(db, |c| {
        let last_epoch = u.epoch.as_ref().map(|e| e.epoch_id);
        let rows = match u.read_version {
            Some(v) => sqlx::query(
                "UPDATE line_monitors SET state = $1, version = version + 1,
                     last_epoch_id = COALESCE($2, last_epoch_id), last_time = COALESCE($3, last_time),
                     updated_at = $4
                 WHERE line_id = $5 AND version = $6",
            )
            .bind(&u.state)
            .bind(last_epoch)
            .bind(u.last_time)
            .bind(now)
            .bind(u.line_id)
            .bind(v)
            .execute(&mut *c)
            .await?
            .rows_affected(),
            None => sqlx::query(
                "INSERT INTO line_monitors (line_id, state, version, last_epoch_id, last_time, updated_at)
                 VALUES ($1, $2, 1, $3, $4, $5) ON CONFLICT (line_id) DO NOTHING",
            )
            .bind(u.line_id)
            .bind(&u.state)
            .bind(last_epoch)
            .bind(u.last_time)
            .bind(now)
            .execute(&mut *c)
            .await?
            .rows_affected(),
        };
        if rows != 1 {
            return Err(DbError::Conflict {
                what: format!("a newer monitor state of line {}", u.line_id),
            });
        }
        if let Some(e) = &u.epoch {
            sqlx::query("DELETE FROM epoch_zones WHERE epoch_id = $1")
                .bind(e.epoch_id)
                .execute(&mut *c)
                .await?;
            sqlx::query("DELETE FROM epoch_monitoring WHERE epoch_id = $1")
                .bind(e.epoch_id)
                .execute(&mut *c)
                .await?;
            for z in e.zones {
                sqlx::query(
                    "INSERT INTO epoch_zones (epoch_id, line_id, track, direction, level, area_m2,
                         x_min, x_max, depth_top, depth_bottom, centroid_x, centroid_z,
                         mean_change_pct, peak_change_pct, peak_judged_pct, good_share, outline, cells)
                     VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16, $17, $18)",
                )
                .bind(e.epoch_id)
                .bind(u.line_id)
                .bind(z.track)
                .bind(&z.direction)
                .bind(z.level)
                .bind(z.area_m2)
                .bind(z.x_min)
                .bind(z.x_max)
                .bind(z.depth_top)
                .bind(z.depth_bottom)
                .bind(z.centroid_x)
                .bind(z.centroid_z)
                .bind(z.mean_change_pct)
                .bind(z.peak_change_pct)
                .bind(z.peak_judged_pct)
                .bind(z.good_share)
                .bind(&z.outline)
                .bind(&z.cells)
                .execute(&mut *c)
                .await?;
            }
            sqlx::query(
                "INSERT INTO epoch_monitoring (epoch_id, line_id, wetting, warnings, created_at)
                 VALUES ($1, $2, $3, $4, $5)",
            )
            .bind(e.epoch_id)
            .bind(u.line_id)
            .bind(&e.wetting)
            .bind(&e.warnings)
            .bind(now)
            .execute(&mut *c)
            .await?;
            sqlx::query("UPDATE epochs SET status = $1 WHERE id = $2")
                .bind(e.status)
                .bind(e.epoch_id)
                .execute(&mut *c)
                .await?;
        }
        let mut out = StoredUpdate::default();
        for a in u.alerts {
            let id: i64 = sqlx::query_scalar(
                "INSERT INTO alerts (line_id, engine_id, subject, subject_kind, track, state, level,
                     level_label, raised_at, since, updated_at, resolved_at, epoch_id, x_min, x_max,
                     depth_top, depth_bottom, peak_change_pct, area_m2, detail)
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16, $17, $18, $19, $20)
                 ON CONFLICT (line_id, engine_id) DO UPDATE SET subject = excluded.subject,
                     subject_kind = excluded.subject_kind, track = excluded.track,
                     state = excluded.state, level = excluded.level,
                     level_label = excluded.level_label, since = excluded.since,
                     updated_at = excluded.updated_at, resolved_at = excluded.resolved_at,
                     epoch_id = COALESCE(excluded.epoch_id, alerts.epoch_id),
                     x_min = excluded.x_min, x_max = excluded.x_max,
                     depth_top = excluded.depth_top, depth_bottom = excluded.depth_bottom,
                     peak_change_pct = excluded.peak_change_pct, area_m2 = excluded.area_m2,
                     detail = excluded.detail
                 RETURNING id",
            )
            .bind(u.line_id)
            .bind(a.engine_id)
            .bind(&a.subject)
            .bind(&a.subject_kind)
            .bind(a.track)
            .bind(&a.state)
            .bind(a.level)
            .bind(&a.level_label)
            .bind(a.raised_at)
            .bind(a.since)
            .bind(a.updated_at)
            .bind(a.resolved_at)
            .bind(a.epoch_id)
            .bind(a.x_range.map(|r| r.0))
            .bind(a.x_range.map(|r| r.1))
            .bind(a.depth_range.map(|r| r.0))
            .bind(a.depth_range.map(|r| r.1))
            .bind(a.peak_change_pct)
            .bind(a.area_m2)
            .bind(&a.detail)
            .fetch_one(&mut *c)
            .await?;
            out.alert_ids.insert(a.engine_id, id);
        }
        for t in u.transitions {
            let alert_id = match out.alert_ids.get(&t.engine_id) {
                Some(id) => *id,
                None => sqlx::query_scalar::<_, i64>(
                    "SELECT id FROM alerts WHERE line_id = $1 AND engine_id = $2",
                )
                .bind(u.line_id)
                .bind(t.engine_id)
                .fetch_optional(&mut *c)
                .await?
                .ok_or_else(|| DbError::NotFound {
                    what: format!("alert {} of line {}", t.engine_id, u.line_id),
                })?,
            };
            sqlx::query(
                "INSERT INTO alert_transitions (alert_id, from_state, to_state, level, reason, actor,
                     note, epoch_id, at)
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9)",
            )
            .bind(alert_id)
            .bind(&t.from_state)
            .bind(&t.to_state)
            .bind(t.level)
            .bind(&t.reason)
            .bind(&t.actor)
            .bind(&t.note)
            .bind(last_epoch)
            .bind(t.at)
            .execute(&mut *c)
            .await?;
            if let Some(n) = notice(alert_id, t) {
                let r = enqueue_notice!(c, &n, params)?;
                out.emails += r.queued.len() + r.deferred.len();
            }
        }
        Ok::<_, DbError>(out)
    })
}

/// An alert as listed and shown.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct AlertRow {
    /// Row id.
    pub id: i64,
    /// Line id.
    pub line_id: i64,
    /// Line slug.
    pub line: String,
    /// Site name.
    pub site: String,
    /// The engine's id.
    pub engine_id: i64,
    /// What it is about.
    pub subject: String,
    /// `zone`, `line_wide_wetting` or `quality`.
    pub subject_kind: String,
    /// Zone track.
    pub track: Option<i64>,
    /// State.
    pub state: String,
    /// Level rank.
    pub level: i64,
    /// Level in words.
    pub level_label: String,
    /// When raised.
    pub raised_at: DateTime<Utc>,
    /// Start of the qualifying run.
    pub since: DateTime<Utc>,
    /// Latest update.
    pub updated_at: DateTime<Utc>,
    /// When resolved.
    pub resolved_at: Option<DateTime<Utc>>,
    /// Epoch behind the latest facts.
    pub epoch_id: Option<i64>,
    /// Chainage from, m.
    pub x_min: Option<f64>,
    /// Chainage to, m.
    pub x_max: Option<f64>,
    /// Depth of the top, m.
    pub depth_top: Option<f64>,
    /// Depth of the bottom, m.
    pub depth_bottom: Option<f64>,
    /// Extreme change, %.
    pub peak_change_pct: Option<f64>,
    /// Area, m².
    pub area_m2: Option<f64>,
    /// Latest facts, JSON.
    pub detail: String,
}

const ALERT_SELECT: &str = "SELECT a.id, a.line_id, l.name AS line, s.name AS site, a.engine_id,
    a.subject, a.subject_kind, a.track, a.state, a.level, a.level_label, a.raised_at, a.since,
    a.updated_at, a.resolved_at, a.epoch_id, a.x_min, a.x_max, a.depth_top, a.depth_bottom,
    a.peak_change_pct, a.area_m2, a.detail
    FROM alerts a JOIN lines l ON l.id = a.line_id JOIN sites s ON s.id = l.site_id";

/// Filters of [`list`].
#[derive(Debug, Clone, Default, PartialEq)]
pub struct AlertFilter {
    /// Site name.
    pub site: Option<String>,
    /// Line slug.
    pub line: Option<String>,
    /// Line id (e.g. a token's line).
    pub line_id: Option<i64>,
    /// State; `open` means raised or acknowledged.
    pub state: Option<String>,
    /// Lowest level rank.
    pub min_level: Option<i64>,
    /// Most rows.
    pub limit: i64,
}

/// Alerts, newest update first.
pub async fn list(db: &Db, f: &AlertFilter) -> DbResult<Vec<AlertRow>> {
    let (state, open) = match f.state.as_deref() {
        Some("open") => (None, true),
        s => (s.map(str::to_string), false),
    };
    let sql = format!(
        "{ALERT_SELECT} WHERE ($1 IS NULL OR s.name = $1) AND ($2 IS NULL OR l.name = $2)
           AND ($3 IS NULL OR a.line_id = $3) AND ($4 IS NULL OR a.state = $4)
           AND ($5 = 0 OR a.state IN ('raised', 'acknowledged'))
           AND ($6 IS NULL OR a.level >= $6)
         ORDER BY a.updated_at DESC, a.id DESC LIMIT $7"
    );
    Ok(on_pool!(db, |p| sqlx::query_as::<_, AlertRow>(&sql)
        .bind(&f.site)
        .bind(&f.line)
        .bind(f.line_id)
        .bind(&state)
        .bind(i64::from(open))
        .bind(f.min_level)
        .bind(f.limit)
        .fetch_all(p)
        .await?))
}

/// One alert.
pub async fn by_id(db: &Db, id: i64) -> DbResult<Option<AlertRow>> {
    let sql = format!("{ALERT_SELECT} WHERE a.id = $1");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, AlertRow>(&sql).bind(id).fetch_optional(p).await?))
}

/// A stored transition.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct TransitionRow {
    /// Row id.
    pub id: i64,
    /// State before.
    pub from_state: Option<String>,
    /// State after.
    pub to_state: String,
    /// Level rank after.
    pub level: i64,
    /// Why.
    pub reason: String,
    /// Who.
    pub actor: String,
    /// Note.
    pub note: Option<String>,
    /// Epoch being processed, if any.
    pub epoch_id: Option<i64>,
    /// When.
    pub at: DateTime<Utc>,
}

/// The audit trail of an alert, oldest first.
pub async fn transitions(db: &Db, alert_id: i64) -> DbResult<Vec<TransitionRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, TransitionRow>(
        "SELECT id, from_state, to_state, level, reason, actor, note, epoch_id, at
         FROM alert_transitions WHERE alert_id = $1 ORDER BY id"
    )
    .bind(alert_id)
    .fetch_all(p)
    .await?))
}

/// The zones of an epoch.
pub async fn epoch_zones(db: &Db, epoch_id: i64) -> DbResult<Vec<ZoneRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, ZoneRow>(
        "SELECT track, direction, level, area_m2, x_min, x_max, depth_top, depth_bottom,
             centroid_x, centroid_z, mean_change_pct, peak_change_pct, peak_judged_pct,
             good_share, outline, cells
         FROM epoch_zones WHERE epoch_id = $1 ORDER BY peak_change_pct"
    )
    .bind(epoch_id)
    .fetch_all(p)
    .await?))
}

/// A zone track's history: (epoch id, epoch start, zone), oldest first.
pub async fn track_history(
    db: &Db,
    line_id: i64,
    track: i64,
) -> DbResult<Vec<(i64, DateTime<Utc>, ZoneRow)>> {
    #[derive(sqlx::FromRow)]
    struct Row {
        epoch_id: i64,
        started_at: DateTime<Utc>,
        #[sqlx(flatten)]
        zone: ZoneRow,
    }
    let rows: Vec<Row> = on_pool!(db, |p| sqlx::query_as::<_, Row>(
        "SELECT z.epoch_id, e.started_at, z.track, z.direction, z.level, z.area_m2, z.x_min,
             z.x_max, z.depth_top, z.depth_bottom, z.centroid_x, z.centroid_z, z.mean_change_pct,
             z.peak_change_pct, z.peak_judged_pct, z.good_share, z.outline, z.cells
         FROM epoch_zones z JOIN epochs e ON e.id = z.epoch_id
         WHERE z.line_id = $1 AND z.track = $2 ORDER BY e.started_at"
    )
    .bind(line_id)
    .bind(track)
    .fetch_all(p)
    .await?);
    Ok(rows.into_iter().map(|r| (r.epoch_id, r.started_at, r.zone)).collect())
}

/// Line-wide wetting JSON of an epoch, if any.
pub async fn epoch_wetting(db: &Db, epoch_id: i64) -> DbResult<Option<String>> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, Option<String>>(
        "SELECT wetting FROM epoch_monitoring WHERE epoch_id = $1"
    )
    .bind(epoch_id)
    .fetch_optional(p)
    .await?)
    .flatten())
}

/// Open alerts per line and level: (line id, level, count).
pub async fn open_counts(db: &Db) -> DbResult<Vec<(i64, i64, i64)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (i64, i64, i64)>(
        "SELECT line_id, level, COUNT(*) FROM alerts
         WHERE state IN ('raised', 'acknowledged') GROUP BY line_id, level"
    )
    .fetch_all(p)
    .await?))
}

/// The alert of a line with the engine's id.
pub async fn by_engine_id(db: &Db, line_id: i64, engine_id: i64) -> DbResult<Option<AlertRow>> {
    let sql = format!("{ALERT_SELECT} WHERE a.line_id = $1 AND a.engine_id = $2");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, AlertRow>(&sql)
        .bind(line_id)
        .bind(engine_id)
        .fetch_optional(p)
        .await?))
}

/// The highest engine id of the line's alerts (0 when none).
pub async fn max_engine_id(db: &Db, line_id: i64) -> DbResult<i64> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, Option<i64>>(
        "SELECT MAX(engine_id) FROM alerts WHERE line_id = $1"
    )
    .bind(line_id)
    .fetch_one(p)
    .await?)
    .unwrap_or(0))
}

/// Before a line's history is reprocessed from `from`: open alerts are
/// resolved with a transition saying why (the audit trail stays), the monitor
/// state is dropped, and zones and monitoring rows from `from` on are removed.
pub async fn supersede(db: &Db, line_id: i64, from: DateTime<Utc>) -> DbResult<u64> {
    let now = super::now();
    in_tx!(db, |c| {
        let open: Vec<(i64, i64)> = sqlx::query_as(
            "SELECT id, level FROM alerts WHERE line_id = $1 AND state IN ('raised', 'acknowledged')",
        )
        .bind(line_id)
        .fetch_all(&mut *c)
        .await?;
        for (id, level) in &open {
            sqlx::query(
                "INSERT INTO alert_transitions (alert_id, from_state, to_state, level, reason, actor, note, at)
                 SELECT id, state, 'resolved', $1, 'superseded: the line was reprocessed', 'system', NULL, $2
                 FROM alerts WHERE id = $3",
            )
            .bind(level)
            .bind(now)
            .bind(id)
            .execute(&mut *c)
            .await?;
            sqlx::query("UPDATE alerts SET state = 'resolved', resolved_at = $1, updated_at = $1 WHERE id = $2")
                .bind(now)
                .bind(id)
                .execute(&mut *c)
                .await?;
        }
        for table in ["epoch_zones", "epoch_monitoring"] {
            sqlx::query(&format!(
                "DELETE FROM {table} WHERE line_id = $1 AND epoch_id IN
                 (SELECT id FROM epochs WHERE line_id = $1 AND started_at >= $2)"
            ))
            .bind(line_id)
            .bind(from)
            .execute(&mut *c)
            .await?;
        }
        sqlx::query("DELETE FROM line_monitors WHERE line_id = $1")
            .bind(line_id)
            .execute(&mut *c)
            .await?;
        Ok::<_, DbError>(open.len() as u64)
    })
}

/// Every zone of a line: (epoch id, epoch start, zone), oldest first (exports).
pub async fn line_zones(db: &Db, line_id: i64) -> DbResult<Vec<(i64, DateTime<Utc>, ZoneRow)>> {
    #[derive(sqlx::FromRow)]
    struct Row {
        epoch_id: i64,
        started_at: DateTime<Utc>,
        #[sqlx(flatten)]
        zone: ZoneRow,
    }
    let rows: Vec<Row> = on_pool!(db, |p| sqlx::query_as::<_, Row>(
        "SELECT z.epoch_id, e.started_at, z.track, z.direction, z.level, z.area_m2, z.x_min,
             z.x_max, z.depth_top, z.depth_bottom, z.centroid_x, z.centroid_z, z.mean_change_pct,
             z.peak_change_pct, z.peak_judged_pct, z.good_share, z.outline, z.cells
         FROM epoch_zones z JOIN epochs e ON e.id = z.epoch_id
         WHERE z.line_id = $1 ORDER BY e.started_at, z.epoch_id, z.track"
    )
    .bind(line_id)
    .fetch_all(p)
    .await?);
    Ok(rows.into_iter().map(|r| (r.epoch_id, r.started_at, r.zone)).collect())
}
