//! The transactional outbox of alert emails: rendered messages
//! (`mail_messages`, `mail_attachments`), one `outbox` row per recipient, and the
//! daily digest runs (`digest_runs`).
//!
//! Life of an outbox row: written `pending` (or `digest` when it waits for the
//! next digest) in the transaction of the alert event; claimed by a delivery
//! worker under a lease (`lease_owner`, `lease_until`); then `sent`, back to
//! `pending` with a later `next_attempt_at` after a transient failure, or
//! `failed` after a permanent refusal. A row whose lease expired (its worker
//! died mid-send) is claimable again, which is what makes delivery
//! at-least-once (see [`crate::notify`]). Rows waiting for a digest become
//! `digested` when a digest row lists them; removing a recipient cancels its
//! undelivered rows.

use chrono::{DateTime, Duration, Utc};
use serde::Serialize;

use super::{Db, DbError, DbResult, in_tx, ms, on_pool};
use crate::notify::email::{Attachment, DigestItem, render_digest};
use crate::notify::{AlertEvent, AlertNotice};

/// Settings of one enqueue, from the configuration and the clock.
#[derive(Debug, Clone, PartialEq)]
pub struct EnqueueParams {
    /// Most emails per recipient in any rolling hour; the excess waits for the
    /// next digest. 0 = no limit.
    pub max_per_hour: u32,
    /// Domain part of generated Message-IDs (e.g. the sender's domain).
    pub message_id_domain: String,
    /// The time of writing (truncated to ms when stored).
    pub now: DateTime<Utc>,
}

/// What an enqueue wrote.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct EnqueueReport {
    /// The `mail_messages` row holding the rendered content.
    pub message_id: i64,
    /// Outbox rows to send now, one per recipient.
    pub queued: Vec<i64>,
    /// Outbox rows waiting for the next digest (digest-only recipients and rows
    /// over the hourly limit).
    pub deferred: Vec<i64>,
}

/// A Message-ID header value, unique across deployments: 128 random bits at
/// `domain`, e.g. `<ohmline.alert17.raised.3f…@example.org>`.
pub fn new_message_id(tag: &str, domain: &str) -> String {
    format!("<ohmline.{tag}.{:032x}@{domain}>", rand::random::<u128>())
}

/// Inserts a rendered message and its attachments on connection `$c`,
/// evaluating to `Result<i64, DbError>` (the message row id). `$facts` is
/// `Option<&AlertNotice>` (None for a digest).
macro_rules! insert_message {
    ($c:ident, $kind:expr, $facts:expr, $rendered:expr, $now:expr) => {{
        let rendered: &$crate::notify::email::RenderedEmail = $rendered;
        let facts: Option<&$crate::notify::AlertNotice> = $facts;
        let f = facts.map(|n| n.fields());
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO mail_messages (kind, alert_id, event, site, line, level_rank, level_label,
                 summary, link, event_at, subject, body_text, body_html, created_at)
             VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14) RETURNING id",
        )
        .bind($kind)
        .bind(f.map(|f| f.alert_id))
        .bind(f.map(|f| f.event.as_str()))
        .bind(f.map(|f| f.site.as_str()))
        .bind(f.map(|f| f.line.as_str()))
        .bind(f.map(|f| i64::from(f.level_rank)))
        .bind(f.map(|f| f.level_label.as_str()))
        .bind(f.map(|f| f.summary.as_str()))
        .bind(f.map(|f| f.link.as_str()))
        .bind(f.map(|f| $crate::db::ms(f.event_at)))
        .bind(rendered.subject.as_str())
        .bind(rendered.text.as_str())
        .bind(rendered.html.as_str())
        .bind($now)
        .fetch_one(&mut *$c)
        .await?;
        for (i, a) in rendered.attachments.iter().enumerate() {
            sqlx::query(
                "INSERT INTO mail_attachments (message_id, position, filename, content_type, content)
                 VALUES ($1, $2, $3, $4, $5)",
            )
            .bind(id)
            .bind(i as i64)
            .bind(a.filename.as_str())
            .bind(a.content_type.as_str())
            .bind(a.content.as_slice())
            .execute(&mut *$c)
            .await?;
        }
        Ok::<i64, $crate::db::DbError>(id)
    }};
}
pub(crate) use insert_message;

/// Renders `$notice` (`&AlertNotice`) and writes it with one outbox row per
/// matching recipient on connection `$c` (`&mut` a SQLite or PostgreSQL
/// connection, typically inside `in_tx!`), evaluating to
/// `Result<EnqueueReport, DbError>`. `$params` is `&EnqueueParams`.
///
/// A recipient matches when it is for the notice's site (by name) or for every
/// site, and its `min_level` is at most the notice's level rank. An address that
/// matches through several recipient entries gets one email (a per-event entry
/// wins over a digest-only one). A per-event recipient that already has
/// `max_per_hour` alert emails written in the past hour gets this one in its
/// next digest instead.
///
/// Use it so the alert transition and its emails commit together:
///
/// ```text
/// in_tx!(db, |c| {
///     /* …store the alert transition on `c`… */
///     enqueue_notice!(c, &notice, &params)
/// })
/// ```
macro_rules! enqueue_notice {
    ($c:ident, $notice:expr, $params:expr) => {{
        let notice: &$crate::notify::AlertNotice = $notice;
        let params: &$crate::db::outbox::EnqueueParams = $params;
        let now = $crate::db::ms(params.now);
        let rendered = $crate::notify::email::render(notice);
        let f = notice.fields();
        let message_id =
            $crate::db::outbox::insert_message!($c, "alert", Some(notice), &rendered, now)?;
        let recipients: Vec<(i64, String, String, bool)> = sqlx::query_as(
            "SELECT r.id, r.email, r.name, r.digest_only
             FROM recipients r LEFT JOIN sites s ON s.id = r.site_id
             WHERE (r.site_id IS NULL OR s.name = $1) AND r.min_level <= $2
             ORDER BY r.digest_only, r.id",
        )
        .bind(f.site.as_str())
        .bind(i64::from(f.level_rank))
        .fetch_all(&mut *$c)
        .await?;
        let hour_ago = now - chrono::Duration::hours(1);
        let mut report = $crate::db::outbox::EnqueueReport { message_id, ..Default::default() };
        let mut seen = std::collections::HashSet::new();
        for (rid, email, name, digest_only) in recipients {
            if !seen.insert(email.to_lowercase()) {
                continue;
            }
            let defer = if digest_only {
                true
            } else if params.max_per_hour == 0 {
                false
            } else {
                let recent: i64 = sqlx::query_scalar(
                    "SELECT COUNT(*) FROM outbox o JOIN mail_messages m ON m.id = o.message_id
                     WHERE lower(o.to_address) = lower($1) AND m.kind = 'alert'
                       AND o.status IN ('pending', 'sent', 'failed') AND o.created_at > $2",
                )
                .bind(email.as_str())
                .bind(hour_ago)
                .fetch_one(&mut *$c)
                .await?;
                recent >= i64::from(params.max_per_hour)
            };
            let tag = format!("alert{}.{}", f.alert_id, f.event.as_str());
            let id: i64 = sqlx::query_scalar(
                "INSERT INTO outbox (message_id, recipient_id, to_address, to_name,
                     header_message_id, status, next_attempt_at, created_at)
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $7) RETURNING id",
            )
            .bind(message_id)
            .bind(rid)
            .bind(email.as_str())
            .bind(name.as_str())
            .bind($crate::db::outbox::new_message_id(&tag, &params.message_id_domain))
            .bind(if defer { "digest" } else { "pending" })
            .bind(now)
            .fetch_one(&mut *$c)
            .await?;
            if defer { report.deferred.push(id) } else { report.queued.push(id) }
        }
        Ok::<_, $crate::db::DbError>(report)
    }};
}
pub(crate) use enqueue_notice;

/// Renders `notice` and writes it for every matching recipient in one
/// transaction (see the crate-internal `enqueue_notice!` macro for the matching
/// and the hourly limit).
pub async fn enqueue(
    db: &Db,
    notice: &AlertNotice,
    params: &EnqueueParams,
) -> DbResult<EnqueueReport> {
    in_tx!(db, |c| crate::db::outbox::enqueue_notice!(c, notice, params))
}

/// A claimed outbox row with everything needed to send it.
#[derive(Debug, Clone, PartialEq)]
pub struct Outgoing {
    /// Outbox row.
    pub outbox_id: i64,
    /// `alert` or `digest`.
    pub kind: String,
    /// Recipient address.
    pub to_address: String,
    /// Recipient display name (may be empty).
    pub to_name: String,
    /// Message-ID header, with angle brackets.
    pub header_message_id: String,
    /// Subject.
    pub subject: String,
    /// Plain-text part.
    pub text: String,
    /// HTML part.
    pub html: String,
    /// Attachments in order.
    pub attachments: Vec<Attachment>,
    /// When the row was written (the Date header).
    pub created_at: DateTime<Utc>,
    /// Delivery attempts including this one.
    pub attempts: i64,
}

#[derive(sqlx::FromRow)]
struct OutgoingRow {
    outbox_id: i64,
    message_id: i64,
    kind: String,
    to_address: String,
    to_name: String,
    header_message_id: String,
    subject: String,
    body_text: String,
    body_html: String,
    created_at: DateTime<Utc>,
    attempts: i64,
}

/// Claims up to `limit` due rows (pending, `next_attempt_at` ≤ `now`, no live
/// lease) for `owner` until `now + lease`, counting an attempt on each, and
/// loads their content. A row is claimed by a conditional update, so two
/// workers never hold the same row at once.
pub async fn claim_due(
    db: &Db,
    owner: &str,
    now: DateTime<Utc>,
    lease: Duration,
    limit: i64,
) -> DbResult<Vec<Outgoing>> {
    let now = ms(now);
    let until = ms(now + lease);
    let candidates: Vec<i64> = on_pool!(db, |p| sqlx::query_scalar(
        "SELECT id FROM outbox
         WHERE status = 'pending' AND next_attempt_at <= $1
           AND (lease_until IS NULL OR lease_until <= $1)
         ORDER BY next_attempt_at, id LIMIT $2"
    )
    .bind(now)
    .bind(limit)
    .fetch_all(p)
    .await?);
    let mut out = Vec::new();
    for id in candidates {
        let claimed = on_pool!(db, |p| sqlx::query(
            "UPDATE outbox SET lease_owner = $1, lease_until = $2, attempts = attempts + 1
             WHERE id = $3 AND status = 'pending' AND next_attempt_at <= $4
               AND (lease_until IS NULL OR lease_until <= $4)"
        )
        .bind(owner)
        .bind(until)
        .bind(id)
        .bind(now)
        .execute(p)
        .await?
        .rows_affected());
        if claimed == 1 {
            out.push(load_outgoing(db, id).await?);
        }
    }
    Ok(out)
}

async fn load_outgoing(db: &Db, id: i64) -> DbResult<Outgoing> {
    let row: OutgoingRow = on_pool!(db, |p| sqlx::query_as(
        "SELECT o.id AS outbox_id, m.id AS message_id, m.kind, o.to_address, o.to_name,
                o.header_message_id, m.subject, m.body_text, m.body_html, o.created_at, o.attempts
         FROM outbox o JOIN mail_messages m ON m.id = o.message_id WHERE o.id = $1"
    )
    .bind(id)
    .fetch_one(p)
    .await?);
    let attachments: Vec<(String, String, Vec<u8>)> = on_pool!(db, |p| sqlx::query_as(
        "SELECT filename, content_type, content FROM mail_attachments
         WHERE message_id = $1 ORDER BY position"
    )
    .bind(row.message_id)
    .fetch_all(p)
    .await?);
    Ok(Outgoing {
        outbox_id: row.outbox_id,
        kind: row.kind,
        to_address: row.to_address,
        to_name: row.to_name,
        header_message_id: row.header_message_id,
        subject: row.subject,
        text: row.body_text,
        html: row.body_html,
        attachments: attachments
            .into_iter()
            .map(|(filename, content_type, content)| Attachment { filename, content_type, content })
            .collect(),
        created_at: row.created_at,
        attempts: row.attempts,
    })
}

/// Marks a row sent. True when the row was still pending (false: it was
/// cancelled meanwhile, or another worker already marked it).
pub async fn mark_sent(db: &Db, id: i64, now: DateTime<Utc>) -> DbResult<bool> {
    let n = on_pool!(db, |p| {
        sqlx::query(
        "UPDATE outbox SET status = 'sent', sent_at = $1, lease_owner = NULL, lease_until = NULL,
             last_error = NULL
         WHERE id = $2 AND status = 'pending'"
    )
    .bind(ms(now))
    .bind(id)
    .execute(p)
    .await?
    .rows_affected()
    });
    Ok(n == 1)
}

/// Releases `owner`'s lease on a row after a transient failure, to be tried
/// again at `next_attempt_at`. False when the lease was no longer `owner`'s.
pub async fn mark_retry(
    db: &Db,
    id: i64,
    owner: &str,
    next_attempt_at: DateTime<Utc>,
    error: &str,
) -> DbResult<bool> {
    let n = on_pool!(db, |p| sqlx::query(
        "UPDATE outbox SET next_attempt_at = $1, last_error = $2, lease_owner = NULL,
             lease_until = NULL
         WHERE id = $3 AND status = 'pending' AND lease_owner = $4"
    )
    .bind(ms(next_attempt_at))
    .bind(error)
    .bind(id)
    .bind(owner)
    .execute(p)
    .await?
    .rows_affected());
    Ok(n == 1)
}

/// Marks a row failed for good (the SMTP server refused it permanently, or it
/// cannot be built). False when the lease was no longer `owner`'s.
pub async fn mark_failed(db: &Db, id: i64, owner: &str, error: &str) -> DbResult<bool> {
    let n = on_pool!(db, |p| sqlx::query(
        "UPDATE outbox SET status = 'failed', last_error = $1, lease_owner = NULL,
             lease_until = NULL
         WHERE id = $2 AND status = 'pending' AND lease_owner = $3"
    )
    .bind(error)
    .bind(id)
    .bind(owner)
    .execute(p)
    .await?
    .rows_affected());
    Ok(n == 1)
}

/// An outbox row for listings and checks.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct OutboxRow {
    /// Row id.
    pub id: i64,
    /// `alert` or `digest`.
    pub kind: String,
    /// The alert, for alert emails.
    pub alert_id: Option<i64>,
    /// The event, for alert emails.
    pub event: Option<String>,
    /// Subject.
    pub subject: String,
    /// Recipient address.
    pub to_address: String,
    /// Message-ID header.
    pub header_message_id: String,
    /// `pending`, `sent`, `failed`, `digest`, `digested` or `cancelled`.
    pub status: String,
    /// Delivery attempts so far.
    pub attempts: i64,
    /// Earliest next attempt.
    pub next_attempt_at: DateTime<Utc>,
    /// The last failure.
    pub last_error: Option<String>,
    /// The digest row that listed it.
    pub digest_outbox_id: Option<i64>,
    /// When it was written.
    pub created_at: DateTime<Utc>,
    /// When it was sent.
    pub sent_at: Option<DateTime<Utc>>,
}

/// Outbox rows, oldest first, optionally only those with `status`.
pub async fn list(db: &Db, status: Option<&str>) -> DbResult<Vec<OutboxRow>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, OutboxRow>(
        "SELECT o.id, m.kind, m.alert_id, m.event, m.subject, o.to_address, o.header_message_id,
                o.status, o.attempts, o.next_attempt_at, o.last_error, o.digest_outbox_id,
                o.created_at, o.sent_at
         FROM outbox o JOIN mail_messages m ON m.id = o.message_id
         WHERE ($1 IS NULL OR o.status = $1) ORDER BY o.id"
    )
    .bind(status)
    .fetch_all(p)
    .await?))
}

/// What a digest run wrote.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DigestRun {
    /// The slot processed.
    pub scheduled_for: DateTime<Utc>,
    /// One outbox row per recipient address with waiting events.
    pub digests: Vec<i64>,
    /// Waiting rows listed in them.
    pub items: usize,
}

/// One recipient address's waiting events: address, name, recipient, (outbox
/// row, item) in event order.
type DigestGroup = (String, String, Option<i64>, Vec<(i64, DigestItem)>);

#[derive(sqlx::FromRow)]
struct WaitingRow {
    id: i64,
    recipient_id: Option<i64>,
    to_address: String,
    to_name: String,
    alert_id: Option<i64>,
    event: Option<String>,
    site: Option<String>,
    line: Option<String>,
    level_label: Option<String>,
    summary: Option<String>,
    subject: String,
    link: Option<String>,
    event_at: Option<DateTime<Utc>>,
}

/// Processes the digest slot `scheduled_for` once across all workers, in one
/// transaction: every row waiting for a digest is listed in one digest email per
/// recipient address, written as a pending outbox row; the listed rows become
/// `digested`. `None` when the slot was already processed.
pub async fn run_digest(
    db: &Db,
    scheduled_for: DateTime<Utc>,
    now: DateTime<Utc>,
    message_id_domain: &str,
) -> DbResult<Option<DigestRun>> {
    let slot = ms(scheduled_for);
    let now = ms(now);
    in_tx!(db, |c| {
        let fresh: Option<DateTime<Utc>> = sqlx::query_scalar(
            "INSERT INTO digest_runs (scheduled_for, ran_at, n_digests) VALUES ($1, $2, 0)
             ON CONFLICT (scheduled_for) DO NOTHING RETURNING scheduled_for",
        )
        .bind(slot)
        .bind(now)
        .fetch_optional(&mut *c)
        .await?;
        if fresh.is_none() {
            return Ok(None);
        }
        let waiting: Vec<WaitingRow> = sqlx::query_as(
            "SELECT o.id, o.recipient_id, o.to_address, o.to_name, m.alert_id, m.event, m.site,
                    m.line, m.level_label, m.summary, m.subject, m.link, m.event_at
             FROM outbox o JOIN mail_messages m ON m.id = o.message_id
             WHERE o.status = 'digest' AND m.kind = 'alert'
             ORDER BY lower(o.to_address), m.event_at, o.id",
        )
        .fetch_all(&mut *c)
        .await?;
        let mut groups: Vec<DigestGroup> = Vec::new();
        for w in waiting {
            let item = digest_item(&w)?;
            match groups.last_mut() {
                Some(g) if g.0.eq_ignore_ascii_case(&w.to_address) => g.3.push((w.id, item)),
                _ => groups.push((w.to_address, w.to_name, w.recipient_id, vec![(w.id, item)])),
            }
        }
        let mut run = DigestRun { scheduled_for: slot, digests: Vec::new(), items: 0 };
        for (to_address, to_name, recipient_id, items) in groups {
            let list: Vec<DigestItem> = items.iter().map(|(_, it)| it.clone()).collect();
            let rendered = render_digest(&list, now);
            let message_id = insert_message!(c, "digest", None, &rendered, now)?;
            let digest_row: i64 = sqlx::query_scalar(
                "INSERT INTO outbox (message_id, recipient_id, to_address, to_name,
                     header_message_id, status, next_attempt_at, created_at)
                 VALUES ($1, $2, $3, $4, $5, 'pending', $6, $6) RETURNING id",
            )
            .bind(message_id)
            .bind(recipient_id)
            .bind(&to_address)
            .bind(&to_name)
            .bind(new_message_id("digest", message_id_domain))
            .bind(now)
            .fetch_one(&mut *c)
            .await?;
            for (id, _) in &items {
                sqlx::query(
                    "UPDATE outbox SET status = 'digested', digest_outbox_id = $1
                     WHERE id = $2 AND status = 'digest'",
                )
                .bind(digest_row)
                .bind(id)
                .execute(&mut *c)
                .await?;
            }
            run.items += items.len();
            run.digests.push(digest_row);
        }
        sqlx::query("UPDATE digest_runs SET n_digests = $1 WHERE scheduled_for = $2")
            .bind(run.digests.len() as i64)
            .bind(slot)
            .execute(&mut *c)
            .await?;
        Ok::<_, DbError>(Some(run))
    })
}

fn digest_item(w: &WaitingRow) -> DbResult<DigestItem> {
    let corrupt = |what: &str| DbError::Corrupt {
        what: format!("outbox row {}: alert message without {what}", w.id),
    };
    Ok(DigestItem {
        alert_id: w.alert_id.ok_or_else(|| corrupt("alert_id"))?,
        event: w.event.as_deref().and_then(AlertEvent::parse).ok_or_else(|| corrupt("event"))?,
        site: w.site.clone().ok_or_else(|| corrupt("site"))?,
        line: w.line.clone().ok_or_else(|| corrupt("line"))?,
        level_label: w.level_label.clone().ok_or_else(|| corrupt("level_label"))?,
        summary: w.summary.clone().unwrap_or_default(),
        subject: w.subject.clone(),
        link: w.link.clone().ok_or_else(|| corrupt("link"))?,
        event_at: w.event_at.ok_or_else(|| corrupt("event_at"))?,
    })
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::db::recipients::{self, Delivery, NewRecipient};
    use crate::db::sites;
    use crate::notify::NewNotice;
    use crate::notify::tests::sample;
    use chrono::TimeZone;

    pub async fn sqlite() -> (Db, tempfile::TempDir) {
        let dir = tempfile::tempdir().unwrap();
        let url = format!("sqlite://{}", dir.path().join("t.sqlite").display());
        let db = Db::connect(&url).await.unwrap();
        db.migrate().await.unwrap();
        (db, dir)
    }

    pub async fn add(db: &Db, email: &str, site: Option<i64>, min_level: u8, delivery: Delivery) {
        let address: lettre::Address = email.parse().unwrap();
        recipients::add(
            db,
            &NewRecipient { email: &address, name: "", site_id: site, min_level, delivery },
        )
        .await
        .unwrap();
    }

    fn t0() -> DateTime<Utc> {
        Utc.with_ymd_and_hms(2026, 3, 3, 6, 0, 0).unwrap()
    }

    fn params(now: DateTime<Utc>, max_per_hour: u32) -> EnqueueParams {
        EnqueueParams { max_per_hour, message_id_domain: "levees.example.org".into(), now }
    }

    fn notice(change: impl FnOnce(&mut NewNotice)) -> AlertNotice {
        let mut f = sample();
        change(&mut f);
        AlertNotice::new(f).unwrap()
    }

    async fn addresses(db: &Db, ids: &[i64]) -> Vec<String> {
        let all = list(db, None).await.unwrap();
        ids.iter().map(|id| all.iter().find(|r| r.id == *id).unwrap().to_address.clone()).collect()
    }

    /// Enqueues `n` at `now` with the hourly limit and checks who gets it now
    /// and who waits for the digest.
    async fn check(
        db: &Db,
        n: &AlertNotice,
        now: DateTime<Utc>,
        queued: &[&str],
        deferred: &[&str],
    ) {
        let r = enqueue(db, n, &params(now, 2)).await.unwrap();
        assert_eq!(addresses(db, &r.queued).await, queued, "sent now");
        assert_eq!(addresses(db, &r.deferred).await, deferred, "waiting for the digest");
    }

    #[tokio::test]
    async fn recipients_match_by_site_and_level_within_the_hourly_limit() {
        let (db, _dir) = sqlite().await;
        let north = sites::create(&db, "Levee North", "").await.unwrap().id;
        let south = sites::create(&db, "Levee South", "").await.unwrap().id;
        add(&db, "all@x.org", None, 0, Delivery::PerEvent).await;
        add(&db, "north2@x.org", Some(north), 2, Delivery::PerEvent).await;
        add(&db, "south@x.org", Some(south), 0, Delivery::PerEvent).await;
        add(&db, "digest@x.org", Some(north), 0, Delivery::DigestOnly).await;
        // The same address for one site and for all sites gets one email.
        add(&db, "ALL@x.org", Some(north), 0, Delivery::PerEvent).await;
        let dup: lettre::Address = "all@x.org".parse().unwrap();
        let e = recipients::add(
            &db,
            &NewRecipient {
                email: &dup,
                name: "",
                site_id: None,
                min_level: 1,
                delivery: Delivery::PerEvent,
            },
        )
        .await
        .unwrap_err();
        assert!(matches!(e, DbError::Conflict { .. }), "{e}");

        let level2 = notice(|_| {});
        let level1 = notice(|f| f.level_rank = 1);
        let t = t0();
        check(&db, &level2, t, &["all@x.org", "north2@x.org"], &["digest@x.org"]).await;
        check(&db, &level1, t + Duration::minutes(10), &["all@x.org"], &["digest@x.org"]).await;
        // A third email within the hour to all@: over the limit of 2, so it
        // waits for the digest; north2@ has had one.
        check(
            &db,
            &level2,
            t + Duration::minutes(20),
            &["north2@x.org"],
            &["all@x.org", "digest@x.org"],
        )
        .await;
        // An hour after the first, the window has room again.
        check(&db, &level1, t + Duration::minutes(61), &["all@x.org"], &["digest@x.org"]).await;
        let south_notice = notice(|f| f.site = "Levee South".into());
        check(&db, &south_notice, t + Duration::hours(3), &["all@x.org", "south@x.org"], &[]).await;

        let rows = list(&db, None).await.unwrap();
        let ids: std::collections::HashSet<_> = rows.iter().map(|r| &r.header_message_id).collect();
        assert_eq!(ids.len(), rows.len(), "every row has its own Message-ID");
        for r in &rows {
            assert!(
                r.header_message_id.starts_with("<ohmline.alert17."),
                "{}",
                r.header_message_id
            );
            assert!(r.header_message_id.ends_with("@levees.example.org>"));
        }
    }

    #[tokio::test]
    async fn a_claim_holds_its_lease_until_it_expires() {
        let (db, _dir) = sqlite().await;
        add(&db, "duty@x.org", None, 0, Delivery::PerEvent).await;
        let t = t0();
        let r = enqueue(&db, &notice(|_| {}), &params(t, 0)).await.unwrap();
        let id = r.queued[0];
        let lease = Duration::seconds(300);
        let a = claim_due(&db, "A", t, lease, 10).await.unwrap();
        assert_eq!(a.len(), 1);
        assert_eq!((a[0].outbox_id, a[0].attempts), (id, 1));
        assert_eq!(a[0].attachments.len(), 2);
        assert!(a[0].text.contains(crate::notify::CAUTION));
        // Held: B gets nothing and cannot release A's lease.
        assert!(
            claim_due(&db, "B", t + Duration::seconds(299), lease, 10).await.unwrap().is_empty()
        );
        assert!(!mark_retry(&db, id, "B", t, "x").await.unwrap());
        // A "crashed": once the lease expires, B claims the row again.
        let b = claim_due(&db, "B", t + Duration::seconds(300), lease, 10).await.unwrap();
        assert_eq!((b.len(), b[0].attempts), (1, 2));
        assert!(!mark_retry(&db, id, "A", t, "late").await.unwrap(), "A's lease is gone");
        // A transient failure: released with a later attempt time.
        assert!(mark_retry(&db, id, "B", t + Duration::seconds(400), "refused").await.unwrap());
        assert!(
            claim_due(&db, "C", t + Duration::seconds(399), lease, 10).await.unwrap().is_empty()
        );
        let c = claim_due(&db, "C", t + Duration::seconds(400), lease, 10).await.unwrap();
        assert_eq!(c[0].attempts, 3);
        assert!(mark_sent(&db, id, t + Duration::seconds(401)).await.unwrap());
        assert!(!mark_sent(&db, id, t + Duration::seconds(402)).await.unwrap(), "sent once");
        assert!(claim_due(&db, "C", t + Duration::days(1), lease, 10).await.unwrap().is_empty());
        let row = &list(&db, Some("sent")).await.unwrap()[0];
        assert_eq!((row.attempts, row.last_error.as_deref()), (3, None));
    }

    #[tokio::test]
    async fn a_digest_slot_is_processed_once() {
        let (db, _dir) = sqlite().await;
        add(&db, "digest@x.org", None, 0, Delivery::DigestOnly).await;
        add(&db, "busy@x.org", None, 0, Delivery::PerEvent).await;
        let t = t0();
        for (i, rank) in [2u8, 3, 3].into_iter().enumerate() {
            let n = notice(|f| {
                f.level_rank = rank;
                f.alert_id = 20 + i as i64;
            });
            enqueue(&db, &n, &params(t + Duration::minutes(i as i64), 1)).await.unwrap();
        }
        assert_eq!(list(&db, Some("digest")).await.unwrap().len(), 3 + 2);
        let slot = t + Duration::hours(1);
        let run = run_digest(&db, slot, slot, "levees.example.org").await.unwrap().unwrap();
        assert_eq!((run.digests.len(), run.items), (2, 5));
        assert!(run_digest(&db, slot, slot, "levees.example.org").await.unwrap().is_none());
        assert!(list(&db, Some("digest")).await.unwrap().is_empty());
        let digested = list(&db, Some("digested")).await.unwrap();
        assert_eq!(digested.len(), 5);
        assert!(digested.iter().all(|r| run.digests.contains(&r.digest_outbox_id.unwrap())));
        let out = claim_due(&db, "A", slot, Duration::seconds(60), 10).await.unwrap();
        let digest =
            out.iter().find(|o| o.to_address == "busy@x.org" && o.kind == "digest").unwrap();
        assert_eq!(digest.kind, "digest");
        assert!(digest.subject.contains("2 alert events"), "{}", digest.subject);
        assert!(digest.text.contains("alerts/17"), "links of the listed events");
        assert!(digest.text.contains(crate::notify::CAUTION));
        // Nothing waiting: the next slot writes no digest.
        let next = run_digest(&db, slot + Duration::days(1), slot + Duration::days(1), "x.org")
            .await
            .unwrap()
            .unwrap();
        assert!(next.digests.is_empty());
    }

    #[tokio::test]
    async fn removing_a_recipient_cancels_what_it_has_not_received() {
        let (db, _dir) = sqlite().await;
        add(&db, "gone@x.org", None, 0, Delivery::PerEvent).await;
        add(&db, "stays@x.org", None, 0, Delivery::PerEvent).await;
        let t = t0();
        enqueue(&db, &notice(|_| {}), &params(t, 0)).await.unwrap();
        let gone =
            recipients::list(&db).await.unwrap().into_iter().find(|r| r.email == "gone@x.org");
        let removed = recipients::remove(&db, gone.unwrap().id).await.unwrap();
        assert_eq!(removed.cancelled, 1);
        let due = claim_due(&db, "A", t, Duration::seconds(60), 10).await.unwrap();
        assert_eq!(due.len(), 1);
        assert_eq!(due[0].to_address, "stays@x.org");
        assert!(matches!(recipients::remove(&db, 999).await, Err(DbError::NotFound { .. })));
    }
}
