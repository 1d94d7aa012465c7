//! Recipients of alert emails: an address, for one site or every site, from a
//! minimum level rank (0 = notices, 1… = trigger levels), by email per event or
//! by daily digest only.

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::{Db, DbError, DbResult, in_tx, not_found, now, on_pool};

/// A stored recipient with its site's name.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct Recipient {
    /// Row id.
    pub id: i64,
    /// Email address.
    pub email: String,
    /// Display name (may be empty).
    pub name: String,
    /// The site, or `None` for every site.
    pub site_id: Option<i64>,
    /// The site's name, or `None` for every site.
    pub site: Option<String>,
    /// Lowest level rank sent: 0 = notices and up, 1… = that trigger level and up.
    pub min_level: i64,
    /// Only the daily digest, no email per event.
    pub digest_only: bool,
    /// When it was added.
    pub created_at: DateTime<Utc>,
}

/// How a recipient gets alert events.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Delivery {
    /// One email per event (within the hourly limit; the excess goes to the digest).
    PerEvent,
    /// Only the daily digest.
    DigestOnly,
}

/// A recipient to add.
#[derive(Debug, Clone)]
pub struct NewRecipient<'a> {
    /// Address (checked by its type).
    pub email: &'a lettre::Address,
    /// Display name (may be empty).
    pub name: &'a str,
    /// The site, or `None` for every site.
    pub site_id: Option<i64>,
    /// Lowest level rank sent (0 = notices and up).
    pub min_level: u8,
    /// Per event or digest only.
    pub delivery: Delivery,
}

/// A removed recipient and how many of its undelivered emails were cancelled.
#[derive(Debug, Clone, PartialEq)]
pub struct Removed {
    /// The recipient as it was.
    pub recipient: Recipient,
    /// Outbox rows still pending or waiting for a digest, now cancelled.
    pub cancelled: u64,
}

const SELECT: &str = "SELECT r.id, r.email, r.name, r.site_id, s.name AS site, r.min_level,
        r.digest_only, r.created_at
     FROM recipients r LEFT JOIN sites s ON s.id = r.site_id";

/// Adds a recipient. The same address (case-insensitive) for the same site
/// (or for every site) twice is a conflict.
pub async fn add(db: &Db, new: &NewRecipient<'_>) -> DbResult<Recipient> {
    let email = new.email.to_string();
    let digest_only = new.delivery == Delivery::DigestOnly;
    let t = now();
    let sql = format!("{SELECT} WHERE r.id = $1");
    in_tx!(db, |c| {
        let dup: i64 = sqlx::query_scalar(
            "SELECT COUNT(*) FROM recipients
             WHERE lower(email) = lower($1) AND COALESCE(site_id, 0) = COALESCE($2, 0)",
        )
        .bind(&email)
        .bind(new.site_id)
        .fetch_one(&mut *c)
        .await?;
        if dup > 0 {
            return Err(DbError::Conflict { what: format!("recipient {email} for this site") });
        }
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO recipients (email, name, site_id, min_level, digest_only, created_at)
             VALUES ($1, $2, $3, $4, $5, $6) RETURNING id",
        )
        .bind(&email)
        .bind(new.name)
        .bind(new.site_id)
        .bind(i64::from(new.min_level))
        .bind(digest_only)
        .bind(t)
        .fetch_one(&mut *c)
        .await?;
        let r = sqlx::query_as::<_, Recipient>(&sql).bind(id).fetch_one(&mut *c).await?;
        Ok::<_, DbError>(r)
    })
}

/// Every recipient, by address then site.
pub async fn list(db: &Db) -> DbResult<Vec<Recipient>> {
    let sql = format!("{SELECT} ORDER BY lower(r.email), s.name, r.id");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, Recipient>(&sql).fetch_all(p).await?))
}

/// The recipient with this id.
pub async fn by_id(db: &Db, id: i64) -> DbResult<Option<Recipient>> {
    let sql = format!("{SELECT} WHERE r.id = $1");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, Recipient>(&sql).bind(id).fetch_optional(p).await?))
}

/// Removes a recipient and cancels its emails not yet delivered (pending or
/// waiting for a digest), in one transaction. Delivered rows keep their address.
pub async fn remove(db: &Db, id: i64) -> DbResult<Removed> {
    let sql = format!("{SELECT} WHERE r.id = $1");
    in_tx!(db, |c| {
        let recipient = sqlx::query_as::<_, Recipient>(&sql)
            .bind(id)
            .fetch_optional(&mut *c)
            .await?
            .ok_or_else(|| not_found(format!("recipient {id}")))?;
        let cancelled = sqlx::query(
            "UPDATE outbox SET status = 'cancelled', lease_owner = NULL, lease_until = NULL
             WHERE recipient_id = $1 AND status IN ('pending', 'digest')",
        )
        .bind(id)
        .execute(&mut *c)
        .await?
        .rows_affected();
        sqlx::query("DELETE FROM recipients WHERE id = $1").bind(id).execute(&mut *c).await?;
        Ok::<_, DbError>(Removed { recipient, cancelled })
    })
}
