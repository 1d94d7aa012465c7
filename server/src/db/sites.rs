//! Sites: a levee, dike or dam reach that holds one or more lines.

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::{Db, DbResult, in_tx, now, on_pool};

/// A stored site.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct Site {
    /// Row id.
    pub id: i64,
    /// Unique name.
    pub name: String,
    /// Free text.
    pub description: String,
    /// When it was registered.
    pub created_at: DateTime<Utc>,
}

/// Registers a site; a name already in use is a conflict.
pub async fn create(db: &Db, name: &str, description: &str) -> DbResult<Site> {
    in_tx!(db, |c| {
        sqlx::query_as::<_, Site>(
            "INSERT INTO sites (name, description, created_at) VALUES ($1, $2, $3)
             RETURNING id, name, description, created_at",
        )
        .bind(name)
        .bind(description)
        .bind(now())
        .fetch_one(&mut *c)
        .await
        .map_err(super::DbError::from)
    })
}

/// The site with this name.
pub async fn by_name(db: &Db, name: &str) -> DbResult<Option<Site>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, Site>(
        "SELECT id, name, description, created_at FROM sites WHERE name = $1"
    )
    .bind(name)
    .fetch_optional(p)
    .await?))
}

/// The site with this id.
pub async fn by_id(db: &Db, id: i64) -> DbResult<Option<Site>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, Site>(
        "SELECT id, name, description, created_at FROM sites WHERE id = $1"
    )
    .bind(id)
    .fetch_optional(p)
    .await?))
}

/// Every site, by name.
pub async fn list(db: &Db) -> DbResult<Vec<Site>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, Site>(
        "SELECT id, name, description, created_at FROM sites ORDER BY name"
    )
    .fetch_all(p)
    .await?))
}

/// The name of a line's site.
pub async fn name_of_line(db: &Db, line_id: i64) -> DbResult<Option<String>> {
    Ok(super::on_pool!(db, |p| sqlx::query_scalar::<_, String>(
        "SELECT s.name FROM sites s JOIN lines l ON l.site_id = s.id WHERE l.id = $1"
    )
    .bind(line_id)
    .fetch_optional(p)
    .await?))
}
