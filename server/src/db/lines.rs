//! Lines and their electrodes, with each electrode's in-service history.

use chrono::{DateTime, Utc};
use ohmline_core::geometry::{Electrode, GeometryError, LineGeometry};
use ohmline_core::sequence::Sequence;
use serde::Serialize;

use super::sequences::{SequenceRow, insert_sequence};
use super::{Db, DbError, DbResult, in_tx, not_found, now, on_pool};

/// A stored line.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct Line {
    /// Row id.
    pub id: i64,
    /// The site it belongs to.
    pub site_id: i64,
    /// Unique slug across the deployment, used in URLs.
    pub name: String,
    /// `longitudinal` (along the crest) or `transverse` (across the embankment).
    pub orientation: String,
    /// Expected time between epochs, seconds.
    pub expected_interval_s: i64,
    /// Free text.
    pub notes: String,
    /// When it was registered.
    pub created_at: DateTime<Utc>,
}

const COLUMNS: &str = "id, site_id, name, orientation, expected_interval_s, notes, created_at";

/// A line with its site's name, for listings.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct LineListing {
    /// Row id.
    pub id: i64,
    /// Line slug.
    pub name: String,
    /// Site name.
    pub site: String,
    /// Orientation.
    pub orientation: String,
    /// Expected time between epochs, seconds.
    pub expected_interval_s: i64,
    /// Number of electrodes.
    pub n_electrodes: i64,
    /// Number of stored epochs.
    pub n_epochs: i64,
    /// Start of the newest epoch.
    pub last_epoch_at: Option<DateTime<Utc>>,
}

/// A stored electrode.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct ElectrodeRow {
    /// Row id.
    pub id: i64,
    /// Cable-order position, 0-based.
    pub position: i64,
    /// Label used by the meter and the sequence files.
    pub label: String,
    /// Chainage, m.
    pub x: f64,
    /// Elevation, m.
    pub z: f64,
    /// Optional map easting, m.
    pub easting: Option<f64>,
    /// Optional map northing, m.
    pub northing: Option<f64>,
    /// Currently in service.
    pub in_service: bool,
}

/// An electrode to register.
#[derive(Debug, Clone, PartialEq)]
pub struct NewElectrode {
    /// Label.
    pub label: String,
    /// Chainage, m.
    pub x: f64,
    /// Elevation, m.
    pub z: f64,
    /// Optional map easting, m.
    pub easting: Option<f64>,
    /// Optional map northing, m.
    pub northing: Option<f64>,
}

/// A line to register, with its electrodes (in cable order) and optionally its
/// first sequence.
#[derive(Debug, Clone)]
pub struct NewLine<'a> {
    /// Site id.
    pub site_id: i64,
    /// Unique slug.
    pub name: &'a str,
    /// `longitudinal` or `transverse`.
    pub orientation: &'a str,
    /// Expected time between epochs, seconds.
    pub expected_interval_s: i64,
    /// Free text.
    pub notes: &'a str,
    /// Electrodes in cable order.
    pub electrodes: &'a [NewElectrode],
    /// First sequence: name and quadrupoles.
    pub sequence: Option<(&'a str, &'a Sequence)>,
}

/// Registers a line, its electrodes and optionally its first sequence in one
/// transaction. A name already in use is a conflict.
pub async fn create(db: &Db, new: &NewLine<'_>) -> DbResult<(Line, Option<SequenceRow>)> {
    let sql = format!(
        "INSERT INTO lines (site_id, name, orientation, expected_interval_s, notes, created_at)
         VALUES ($1, $2, $3, $4, $5, $6) RETURNING {COLUMNS}"
    );
    let t = now();
    in_tx!(db, |c| {
        let line = sqlx::query_as::<_, Line>(&sql)
            .bind(new.site_id)
            .bind(new.name)
            .bind(new.orientation)
            .bind(new.expected_interval_s)
            .bind(new.notes)
            .bind(t)
            .fetch_one(&mut *c)
            .await
            .map_err(|e| match DbError::from(e) {
                DbError::Conflict { .. } => {
                    DbError::Conflict { what: format!("a line named {:?}", new.name) }
                }
                e => e,
            })?;
        for (pos, e) in new.electrodes.iter().enumerate() {
            let id: i64 = sqlx::query_scalar(
                "INSERT INTO electrodes (line_id, position, label, x, z, easting, northing, in_service)
                 VALUES ($1, $2, $3, $4, $5, $6, $7, TRUE) RETURNING id",
            )
            .bind(line.id)
            .bind(pos as i64)
            .bind(&e.label)
            .bind(e.x)
            .bind(e.z)
            .bind(e.easting)
            .bind(e.northing)
            .fetch_one(&mut *c)
            .await?;
            sqlx::query(
                "INSERT INTO electrode_service (electrode_id, in_service, changed_at, actor, reason)
                 VALUES ($1, TRUE, $2, 'system', 'installed')",
            )
            .bind(id)
            .bind(t)
            .execute(&mut *c)
            .await?;
        }
        let seq = match new.sequence {
            Some((name, seq)) => Some(insert_sequence!(c, line.id, name, seq)?),
            None => None,
        };
        Ok::<_, DbError>((line, seq))
    })
}

/// The line with this slug.
pub async fn by_name(db: &Db, name: &str) -> DbResult<Option<Line>> {
    let sql = format!("SELECT {COLUMNS} FROM lines WHERE name = $1");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, Line>(&sql).bind(name).fetch_optional(p).await?))
}

/// The line with this id.
pub async fn by_id(db: &Db, id: i64) -> DbResult<Option<Line>> {
    let sql = format!("SELECT {COLUMNS} FROM lines WHERE id = $1");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, Line>(&sql).bind(id).fetch_optional(p).await?))
}

const LISTING: &str = "SELECT l.id, l.name, s.name AS site, l.orientation, l.expected_interval_s,
        (SELECT COUNT(*) FROM electrodes e WHERE e.line_id = l.id) AS n_electrodes,
        (SELECT COUNT(*) FROM epochs p WHERE p.line_id = l.id) AS n_epochs,
        (SELECT MAX(p.started_at) FROM epochs p WHERE p.line_id = l.id) AS last_epoch_at
    FROM lines l JOIN sites s ON s.id = l.site_id";

/// Every line with its site, by site then line name; `only` restricts to one line.
pub async fn list(db: &Db, only: Option<i64>) -> DbResult<Vec<LineListing>> {
    let sql = format!("{LISTING} WHERE ($1 IS NULL OR l.id = $1) ORDER BY s.name, l.name");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, LineListing>(&sql).bind(only).fetch_all(p).await?))
}

/// The line's electrodes in cable order.
pub async fn electrodes(db: &Db, line_id: i64) -> DbResult<Vec<ElectrodeRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, ElectrodeRow>(
        "SELECT id, position, label, x, z, easting, northing, in_service
         FROM electrodes WHERE line_id = $1 ORDER BY position"
    )
    .bind(line_id)
    .fetch_all(p)
    .await?))
}

/// The line's electrode geometry, validated.
pub async fn geometry(db: &Db, line_id: i64) -> DbResult<LineGeometry> {
    let rows = electrodes(db, line_id).await?;
    LineGeometry::new(rows.into_iter().map(|r| Electrode::new(r.label, r.x, r.z)).collect())
        .map_err(|e: GeometryError| DbError::Corrupt {
            what: format!("stored electrodes of line {line_id}: {e}"),
        })
}

/// One change of an electrode's in-service flag.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct ServiceChange {
    /// Electrode row id.
    pub electrode_id: i64,
    /// New state.
    pub in_service: bool,
    /// When.
    pub changed_at: DateTime<Utc>,
    /// Who: a user, or `system` for automatic changes.
    pub actor: String,
    /// Why.
    pub reason: String,
}

/// Sets an electrode in or out of service and records the change.
pub async fn set_in_service(
    db: &Db,
    electrode_id: i64,
    in_service: bool,
    actor: &str,
    reason: &str,
) -> DbResult<()> {
    in_tx!(db, |c| {
        let n = sqlx::query("UPDATE electrodes SET in_service = $1 WHERE id = $2")
            .bind(in_service)
            .bind(electrode_id)
            .execute(&mut *c)
            .await?
            .rows_affected();
        if n == 0 {
            return Err(not_found(format!("electrode {electrode_id}")));
        }
        sqlx::query(
            "INSERT INTO electrode_service (electrode_id, in_service, changed_at, actor, reason)
             VALUES ($1, $2, $3, $4, $5)",
        )
        .bind(electrode_id)
        .bind(in_service)
        .bind(now())
        .bind(actor)
        .bind(reason)
        .execute(&mut *c)
        .await?;
        Ok::<_, DbError>(())
    })
}

/// The in-service history of every electrode of a line, oldest first.
pub async fn service_history(db: &Db, line_id: i64) -> DbResult<Vec<ServiceChange>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, ServiceChange>(
        "SELECT h.electrode_id, h.in_service, h.changed_at, h.actor, h.reason
         FROM electrode_service h JOIN electrodes e ON e.id = h.electrode_id
         WHERE e.line_id = $1 ORDER BY h.changed_at, h.id"
    )
    .bind(line_id)
    .fetch_all(p)
    .await?))
}
