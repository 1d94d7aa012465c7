//! Job workers: loops that claim due jobs from the database, keep their lease
//! alive while running them, and record the outcome. Any number of processes may
//! run workers against one PostgreSQL; claims never overlap. On shutdown a worker
//! claims nothing new and gives the job in hand `shutdown_grace` to finish (the
//! lease is kept alive meanwhile); a job still running then is abandoned and
//! released: queued again at once, the claim not counted as an attempt. Every
//! stage stores its results idempotently, so the next claim redoes at most the
//! interrupted step.
//!
//! Failures: a transient one (database unavailable) is retried with exponential
//! back-off (5 s · 2^(attempt−1), at most 10 min); any other failure is retried
//! the same way until the job's `max_attempts`, then the job is buried (`dead`)
//! and shown to admins with its last error. A job whose lease expired more than
//! `max_attempts` times (its worker keeps dying on it) is buried too.

use std::sync::Arc;
use std::time::Duration;

use chrono::Duration as ChronoDuration;
use tokio::sync::{Notify, watch};

use crate::db::{self, jobs::Job};
use crate::pipeline::Pipeline;

/// Worker settings.
#[derive(Debug, Clone)]
pub struct WorkerSettings {
    /// Name prefix recorded on claimed jobs (host and process).
    pub name: String,
    /// Concurrent job loops in this process.
    pub concurrency: usize,
    /// Lease length; renewed every third of it.
    pub lease: Duration,
    /// Poll interval when idle (a local wake-up cuts it short).
    pub idle_poll: Duration,
    /// How long a running job may go on after shutdown was asked for.
    pub shutdown_grace: Duration,
}

impl WorkerSettings {
    /// Defaults for this process: `concurrency` loops, 60 s lease, 1 s poll,
    /// 30 s shutdown grace.
    pub fn for_this_process(concurrency: usize) -> Self {
        let host = std::env::var("HOSTNAME").unwrap_or_else(|_| "host".into());
        Self {
            name: format!("{host}-{}", std::process::id()),
            concurrency: concurrency.max(1),
            lease: Duration::from_secs(60),
            idle_poll: Duration::from_secs(1),
            shutdown_grace: Duration::from_secs(30),
        }
    }
}

/// Back-off before retry number `attempt` (1-based).
pub fn backoff(attempt: i64) -> Duration {
    let secs = 5u64.saturating_mul(1u64 << (attempt.clamp(1, 20) - 1) as u32);
    Duration::from_secs(secs.min(600))
}

/// Runs `settings.concurrency` job loops until `shutdown` turns true.
pub async fn run(
    pipeline: Pipeline,
    settings: WorkerSettings,
    wake: Arc<Notify>,
    shutdown: watch::Receiver<bool>,
) {
    let mut handles = Vec::new();
    for i in 0..settings.concurrency {
        let name = format!("{}-{i}", settings.name);
        handles.push(tokio::spawn(job_loop(
            pipeline.clone(),
            settings.clone(),
            name,
            wake.clone(),
            shutdown.clone(),
        )));
    }
    for h in handles {
        let _ = h.await;
    }
}

async fn job_loop(
    pipeline: Pipeline,
    settings: WorkerSettings,
    name: String,
    wake: Arc<Notify>,
    mut shutdown: watch::Receiver<bool>,
) {
    let lease = ChronoDuration::from_std(settings.lease).expect("lease fits");
    let mut db_backoff = Duration::from_millis(500);
    loop {
        if *shutdown.borrow() {
            return;
        }
        match db::jobs::claim(&pipeline.db, &name, lease).await {
            Ok(Some(job)) => {
                db_backoff = Duration::from_millis(500);
                run_job(&pipeline, &settings, &name, job, shutdown.clone()).await;
            }
            Ok(None) => {
                tokio::select! {
                    _ = wake.notified() => {}
                    _ = tokio::time::sleep(settings.idle_poll) => {}
                    _ = shutdown.changed() => {}
                }
            }
            Err(e) => {
                tracing::warn!(worker = %name, error = %e, "cannot claim jobs; retrying");
                tokio::select! {
                    _ = tokio::time::sleep(db_backoff) => {}
                    _ = shutdown.changed() => {}
                }
                db_backoff = (db_backoff * 2).min(Duration::from_secs(30));
            }
        }
    }
}

/// Completes `grace` after `shutdown` turns true (never if it does not).
async fn grace_expired(mut shutdown: watch::Receiver<bool>, grace: Duration) {
    if shutdown.wait_for(|stop| *stop).await.is_err() {
        std::future::pending::<()>().await;
    }
    tokio::time::sleep(grace).await;
}

#[tracing::instrument(skip_all, fields(job = job.id, key = %job.key, attempt = job.attempts))]
async fn run_job(
    pipeline: &Pipeline,
    settings: &WorkerSettings,
    name: &str,
    job: Job,
    shutdown: watch::Receiver<bool>,
) {
    let db = &pipeline.db;
    let kind = job.kind.clone();
    if let Some(started) = job.started_at {
        let wait = (started - job.run_after).num_milliseconds().max(0) as f64 / 1000.0;
        metrics::histogram!(crate::metrics::JOB_WAIT, "kind" => kind.clone()).record(wait);
    }
    if job.attempts > job.max_attempts {
        let msg = format!(
            "lease expired {} times: the worker running it stopped each time",
            job.attempts - 1
        );
        tracing::error!(%msg, "job buried");
        let _ = db::jobs::fail(db, job.id, name, &msg, None).await;
        return;
    }
    // Keep the lease alive while the job runs.
    let lease = ChronoDuration::from_std(settings.lease).expect("lease fits");
    let (hb_stop, mut hb_rx) = watch::channel(false);
    let hb = {
        let (db, name, id) = (db.clone(), name.to_string(), job.id);
        let every = settings.lease / 3;
        tokio::spawn(async move {
            loop {
                tokio::select! {
                    _ = tokio::time::sleep(every) => {}
                    _ = hb_rx.changed() => return,
                }
                match db::jobs::heartbeat(&db, id, &name, lease).await {
                    Ok(true) => {}
                    Ok(false) => {
                        tracing::warn!(job = id, "lease lost; another worker may run this job");
                        return;
                    }
                    Err(e) => tracing::warn!(job = id, error = %e, "heartbeat failed"),
                }
            }
        })
    };
    let started = std::time::Instant::now();
    let result = tokio::select! {
        r = pipeline.run(&job) => Some(r),
        _ = grace_expired(shutdown, settings.shutdown_grace) => None,
    };
    let _ = hb_stop.send(true);
    let _ = hb.await;
    let secs = started.elapsed().as_secs_f64();
    let outcome = match &result {
        Some(Ok(())) => "done",
        Some(Err(_)) => "failed",
        None => "released",
    };
    metrics::histogram!(crate::metrics::JOB_RUN, "kind" => kind, "outcome" => outcome).record(secs);
    match result {
        None => {
            tracing::info!(seconds = secs, "shutting down: job released unfinished");
            if let Err(e) = db::jobs::release(db, job.id, name).await {
                tracing::warn!(error = %e, "could not release the job; it runs again after its lease");
            }
        }
        Some(Ok(())) => {
            tracing::debug!(seconds = secs, "job done");
            if let Err(e) = db::jobs::complete(db, job.id, name).await {
                tracing::warn!(error = %e, "could not mark job done; it will run again after its lease");
            }
        }
        Some(Err(e)) => {
            let last = job.attempts >= job.max_attempts;
            let retry_at = (!last).then(|| {
                db::now() + ChronoDuration::from_std(backoff(job.attempts)).expect("backoff fits")
            });
            if e.is_transient() {
                tracing::warn!(error = %e, ?retry_at, "job failed (transient)");
            } else {
                tracing::error!(error = %e, ?retry_at, "job failed");
            }
            if let Err(e2) = db::jobs::fail(db, job.id, name, &e.to_string(), retry_at).await {
                tracing::warn!(error = %e2, "could not record the failure; the job runs again after its lease");
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn backoff_doubles_and_is_capped() {
        assert_eq!(backoff(1), Duration::from_secs(5));
        assert_eq!(backoff(2), Duration::from_secs(10));
        assert_eq!(backoff(4), Duration::from_secs(40));
        assert_eq!(backoff(30), Duration::from_secs(600));
    }
}
