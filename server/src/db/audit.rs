//! The audit trail of administrative actions: who did what to which object,
//! and when. Rows are only ever added.

use chrono::{DateTime, Utc};
use serde::Serialize;

use super::{Db, DbResult, now, on_pool};

/// One recorded action.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct AuditEvent {
    /// Row id.
    pub id: i64,
    /// When.
    pub at: DateTime<Utc>,
    /// Who: a user's e-mail address, or `cli` for the command line.
    pub actor: String,
    /// What, as a short stable code (`user.add`, `token.revoke`, …).
    pub action: String,
    /// On what (a user's e-mail, a line's slug, a token id).
    pub target: String,
    /// Free detail (never a secret).
    pub detail: String,
}

/// Records an action.
pub async fn record(
    db: &Db,
    actor: &str,
    action: &str,
    target: &str,
    detail: &str,
) -> DbResult<()> {
    tracing::info!(actor, action, target, detail, "audit");
    on_pool!(db, |p| sqlx::query(
        "INSERT INTO audit_events (at, actor, action, target, detail) VALUES ($1, $2, $3, $4, $5)"
    )
    .bind(now())
    .bind(actor)
    .bind(action)
    .bind(target)
    .bind(detail)
    .execute(p)
    .await
    .map(|_| ())?);
    Ok(())
}

/// The newest `limit` events, newest first.
pub async fn recent(db: &Db, limit: i64) -> DbResult<Vec<AuditEvent>> {
    Ok(on_pool!(db, |p| {
        sqlx::query_as::<_, AuditEvent>(
        "SELECT id, at, actor, action, target, detail FROM audit_events ORDER BY at DESC, id DESC LIMIT $1"
    )
    .bind(limit)
    .fetch_all(p)
    .await?
    }))
}
