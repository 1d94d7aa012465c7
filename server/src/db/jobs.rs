//! Durable jobs with leases. Workers on any number of processes claim due jobs
//! (on PostgreSQL with `FOR UPDATE SKIP LOCKED`, so two workers never take the
//! same row), extend the lease while they work, and finish, retry or bury them.
//! A job whose lease expired (its worker died) is claimed again.
//!
//! Jobs are identified by a key; see [`enqueue_job!`] for what enqueuing an
//! existing key does.

use chrono::{DateTime, Duration, Utc};
use serde::Serialize;

use super::{Db, DbError, DbResult, in_tx, now, on_pool};

/// A stored job.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct Job {
    /// Row id.
    pub id: i64,
    /// Identity of the work, e.g. `qc:line:7`.
    pub key: String,
    /// Handler name.
    pub kind: String,
    /// Handler arguments, JSON.
    pub payload: String,
    /// `queued`, `running`, `done` or `dead`.
    pub state: String,
    /// Higher runs first.
    pub priority: i64,
    /// Claims so far (including the current one).
    pub attempts: i64,
    /// Claims allowed before the job is buried.
    pub max_attempts: i64,
    /// Run again after the current run (enqueued while running).
    pub rerun: bool,
    /// Not before.
    pub run_after: DateTime<Utc>,
    /// The current claim expires then.
    pub lease_until: Option<DateTime<Utc>>,
    /// Who holds the claim.
    pub worker: Option<String>,
    /// The last failure.
    pub last_error: Option<String>,
    /// When first enqueued.
    pub created_at: DateTime<Utc>,
    /// When the current or last run started.
    pub started_at: Option<DateTime<Utc>>,
    /// When it last finished.
    pub finished_at: Option<DateTime<Utc>>,
}

const COLUMNS: &str = "id, key, kind, payload, state, priority, attempts, max_attempts, rerun,
    run_after, lease_until, worker, last_error, created_at, started_at, finished_at";

/// Enqueues a job on connection `$c` (inside the caller's transaction),
/// evaluating to `Result<(), sqlx::Error>`:
/// - a new key is inserted as `queued`;
/// - a key that is `queued` stays as it is (the pending run will do the work);
/// - a key that is `running` is marked to run again when it finishes;
/// - a key that is `done` or `dead` is queued anew with its attempts reset.
macro_rules! enqueue_job {
    ($c:ident, $key:expr, $kind:expr, $payload:expr, $priority:expr, $run_after:expr) => {{
        let t = $crate::db::now();
        sqlx::query(
            "INSERT INTO jobs (key, kind, payload, state, priority, run_after, created_at)
             VALUES ($1, $2, $3, 'queued', $4, $5, $6)
             ON CONFLICT (key) DO UPDATE SET
                 kind = excluded.kind,
                 payload = excluded.payload,
                 priority = excluded.priority,
                 rerun = CASE WHEN jobs.state = 'running' THEN TRUE ELSE jobs.rerun END,
                 attempts = CASE WHEN jobs.state IN ('done', 'dead') THEN 0 ELSE jobs.attempts END,
                 last_error = CASE WHEN jobs.state IN ('done', 'dead') THEN NULL ELSE jobs.last_error END,
                 run_after = CASE WHEN jobs.state IN ('done', 'dead') THEN excluded.run_after ELSE jobs.run_after END,
                 state = CASE WHEN jobs.state IN ('done', 'dead') THEN 'queued' ELSE jobs.state END",
        )
        .bind($key)
        .bind($kind)
        .bind($payload)
        .bind($priority)
        .bind($run_after)
        .bind(t)
        .execute(&mut *$c)
        .await
        .map(|_| ())
    }};
}
pub(crate) use enqueue_job;

/// A job to enqueue.
#[derive(Debug, Clone)]
pub struct NewJob<'a> {
    /// Identity of the work.
    pub key: &'a str,
    /// Handler name.
    pub kind: &'a str,
    /// Handler arguments, JSON.
    pub payload: &'a str,
    /// Higher runs first.
    pub priority: i64,
    /// Not before.
    pub run_after: DateTime<Utc>,
}

/// Enqueues one job in its own transaction (see [`enqueue_job!`]).
pub async fn enqueue(db: &Db, j: &NewJob<'_>) -> DbResult<()> {
    in_tx!(db, |c| Ok::<_, DbError>(enqueue_job!(
        c,
        j.key,
        j.kind,
        j.payload,
        j.priority,
        j.run_after
    )?))
}

/// Claims the most urgent due job (or one whose lease expired) for `worker`,
/// holding it for `lease`.
pub async fn claim(db: &Db, worker: &str, lease: Duration) -> DbResult<Option<Job>> {
    let t = now();
    let pick = "SELECT id FROM jobs
        WHERE (state = 'queued' AND run_after <= $3) OR (state = 'running' AND lease_until < $3)
        ORDER BY priority DESC, run_after, id LIMIT 1";
    let update = |lock: &str| {
        format!(
            "UPDATE jobs SET state = 'running', attempts = attempts + 1, lease_until = $1,
                 worker = $2, started_at = $3
             WHERE id = ({pick}{lock}) RETURNING {COLUMNS}"
        )
    };
    Ok(match db {
        Db::Sqlite(p) => {
            sqlx::query_as::<_, Job>(&update(""))
                .bind(t + lease)
                .bind(worker)
                .bind(t)
                .fetch_optional(p)
                .await?
        }
        Db::Postgres(p) => {
            sqlx::query_as::<_, Job>(&update(" FOR UPDATE SKIP LOCKED"))
                .bind(t + lease)
                .bind(worker)
                .bind(t)
                .fetch_optional(p)
                .await?
        }
    })
}

/// Extends the lease of a job `worker` holds; false when the claim was lost
/// (the lease expired and another worker took the job).
pub async fn heartbeat(db: &Db, id: i64, worker: &str, lease: Duration) -> DbResult<bool> {
    let n = on_pool!(db, |p| sqlx::query(
        "UPDATE jobs SET lease_until = $1 WHERE id = $2 AND worker = $3 AND state = 'running'"
    )
    .bind(now() + lease)
    .bind(id)
    .bind(worker)
    .execute(p)
    .await?
    .rows_affected());
    Ok(n == 1)
}

/// Marks a job `worker` holds as done, or queues it again at once when it was
/// enqueued while running. False when the claim was lost.
pub async fn complete(db: &Db, id: i64, worker: &str) -> DbResult<bool> {
    let n = on_pool!(db, |p| sqlx::query(
        "UPDATE jobs SET
             state = CASE WHEN rerun THEN 'queued' ELSE 'done' END,
             attempts = CASE WHEN rerun THEN 0 ELSE attempts END,
             rerun = FALSE, lease_until = NULL, worker = NULL, last_error = NULL, finished_at = $1
         WHERE id = $2 AND worker = $3 AND state = 'running'"
    )
    .bind(now())
    .bind(id)
    .bind(worker)
    .execute(p)
    .await?
    .rows_affected());
    Ok(n == 1)
}

/// Records a failed run: the job is queued again at `retry_at`, or buried
/// (`dead`) when `retry_at` is None.
pub async fn fail(
    db: &Db,
    id: i64,
    worker: &str,
    error: &str,
    retry_at: Option<DateTime<Utc>>,
) -> DbResult<()> {
    let t = now();
    on_pool!(db, |p| sqlx::query(
        "UPDATE jobs SET
             state = CASE WHEN $1 IS NULL THEN 'dead' ELSE 'queued' END,
             run_after = COALESCE($1, run_after),
             lease_until = NULL, worker = NULL, last_error = $2, finished_at = $3
         WHERE id = $4 AND worker = $5 AND state = 'running'"
    )
    .bind(retry_at)
    .bind(error)
    .bind(t)
    .bind(id)
    .bind(worker)
    .execute(p)
    .await
    .map(|_| ())?);
    Ok(())
}

/// Hands a claimed job back unfinished (graceful shutdown): queued and due at
/// once, the claim not counted as an attempt. A pending re-run request is
/// dropped: the queued run covers it.
pub async fn release(db: &Db, id: i64, worker: &str) -> DbResult<()> {
    on_pool!(db, |p| {
        sqlx::query(
        "UPDATE jobs SET state = 'queued', attempts = CASE WHEN attempts > 0 THEN attempts - 1 ELSE 0 END, rerun = FALSE,
             run_after = $3, lease_until = NULL, worker = NULL
         WHERE id = $1 AND worker = $2 AND state = 'running'"
    )
    .bind(id)
    .bind(worker)
    .bind(now())
    .execute(p)
    .await
    .map(|_| ())?
    });
    Ok(())
}

/// A job by key.
pub async fn by_key(db: &Db, key: &str) -> DbResult<Option<Job>> {
    let sql = format!("SELECT {COLUMNS} FROM jobs WHERE key = $1");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, Job>(&sql).bind(key).fetch_optional(p).await?))
}

/// Jobs in a state, oldest first (e.g. the dead-letter list).
pub async fn in_state(db: &Db, state: &str, limit: i64) -> DbResult<Vec<Job>> {
    let sql = format!("SELECT {COLUMNS} FROM jobs WHERE state = $1 ORDER BY id LIMIT $2");
    Ok(on_pool!(db, |p| sqlx::query_as::<_, Job>(&sql)
        .bind(state)
        .bind(limit)
        .fetch_all(p)
        .await?))
}

/// Number of jobs per (state, kind).
pub async fn counts(db: &Db) -> DbResult<Vec<(String, String, i64)>> {
    Ok(on_pool!(db, |p| sqlx::query_as::<_, (String, String, i64)>(
        "SELECT state, kind, COUNT(*) FROM jobs GROUP BY state, kind ORDER BY state, kind"
    )
    .fetch_all(p)
    .await?))
}

/// Number of jobs not yet finished (queued or running) whose key starts with
/// `prefix`.
pub async fn pending_with_prefix(db: &Db, prefix: &str) -> DbResult<i64> {
    Ok(on_pool!(db, |p| sqlx::query_scalar::<_, i64>(
        "SELECT COUNT(*) FROM jobs WHERE state IN ('queued', 'running') AND key LIKE $1"
    )
    .bind(format!("{prefix}%"))
    .fetch_one(p)
    .await?))
}

/// Queues a dead job again with its attempts reset.
pub async fn retry_dead(db: &Db, id: i64) -> DbResult<bool> {
    let n = on_pool!(db, |p| {
        sqlx::query(
        "UPDATE jobs SET state = 'queued', attempts = 0, run_after = $1 WHERE id = $2 AND state = 'dead'"
    )
    .bind(now())
    .bind(id)
    .execute(p)
    .await?
    .rows_affected()
    });
    Ok(n == 1)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::db::outbox::tests::sqlite;

    async fn one_job(db: &Db) {
        let job = NewJob {
            key: "qc:line:1",
            kind: "qc_line",
            payload: "{}",
            priority: 0,
            run_after: now(),
        };
        enqueue(db, &job).await.unwrap();
    }

    #[tokio::test]
    async fn a_released_job_is_queued_again_without_counting_the_claim() {
        let (db, _dir) = sqlite().await;
        one_job(&db).await;
        let lease = Duration::seconds(60);
        let j = claim(&db, "w1", lease).await.unwrap().expect("a due job");
        assert_eq!((j.state.as_str(), j.attempts), ("running", 1));
        assert_eq!(claim(&db, "w2", lease).await.unwrap(), None, "held by w1");
        // Enqueued while running: a re-run is requested; the release covers it.
        one_job(&db).await;
        release(&db, j.id, "w1").await.unwrap();
        let j = by_key(&db, "qc:line:1").await.unwrap().unwrap();
        assert_eq!((j.state.as_str(), j.attempts, j.rerun), ("queued", 0, false));
        assert_eq!((j.worker, j.lease_until), (None, None));
        let j = claim(&db, "w2", lease).await.unwrap().expect("claimable at once");
        assert_eq!((j.attempts, j.worker.as_deref()), (1, Some("w2")));
        // Another worker's release does nothing.
        release(&db, j.id, "w1").await.unwrap();
        assert_eq!(by_key(&db, "qc:line:1").await.unwrap().unwrap().state, "running");
        assert!(complete(&db, j.id, "w2").await.unwrap());
    }

    #[tokio::test]
    async fn an_expired_lease_is_claimed_again_and_a_dead_job_requeued() {
        let (db, _dir) = sqlite().await;
        one_job(&db).await;
        let j = claim(&db, "w1", Duration::milliseconds(-1)).await.unwrap().unwrap();
        let again = claim(&db, "w2", Duration::seconds(60)).await.unwrap().expect("lease expired");
        assert_eq!((again.id, again.attempts), (j.id, 2));
        assert!(!heartbeat(&db, j.id, "w1", Duration::seconds(60)).await.unwrap(), "w1 lost it");
        fail(&db, j.id, "w2", "stored data cannot be processed", None).await.unwrap();
        let dead = in_state(&db, "dead", 10).await.unwrap();
        assert_eq!(dead.len(), 1);
        assert_eq!(dead[0].last_error.as_deref(), Some("stored data cannot be processed"));
        assert!(retry_dead(&db, j.id).await.unwrap());
        assert!(!retry_dead(&db, j.id).await.unwrap(), "no longer dead");
        let j = claim(&db, "w3", Duration::seconds(60)).await.unwrap().unwrap();
        assert_eq!(j.attempts, 1);
    }
}
