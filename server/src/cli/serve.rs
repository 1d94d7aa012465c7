//! `ohmline serve`: the HTTP service, drop-folder ingest, the job workers and
//! the alert email delivery worker, split by role:
//!
//! - `api`: the HTTP service (API, pages, `/healthz`, `/readyz`, `/metrics`),
//!   drop-folder ingest and the session sweep; no jobs, no email;
//! - `worker`: the job loops and email delivery; on `listen` it serves only
//!   `/healthz`, `/readyz` and `/metrics`;
//! - `all` (default): both, in one process (the single-machine set-up).
//!
//! Any number of processes of each role may share one PostgreSQL database.
//! SIGTERM or Ctrl-C stops a process gracefully: HTTP finishes its requests,
//! workers claim nothing new and finish or release the job in hand.

use std::future::Future;
use std::net::SocketAddr;
use std::time::Duration;

use anyhow::Context;
use tokio::net::TcpListener;
use tokio::sync::watch;
use tokio::task::JoinHandle;

use crate::app::{AppState, ops_router, serve, serve_router};
use crate::config::Config;
use crate::db::Db;
use crate::ingest::{Limits, dropfolder};
use crate::notify::worker::{Worker, WorkerParams};
use crate::pipeline::Pipeline;
use crate::worker::{self, WorkerSettings};

/// What one `ohmline serve` process runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, clap::ValueEnum)]
pub enum Role {
    /// HTTP (API, pages), drop folders; no job loops, no email.
    Api,
    /// Job loops and email delivery; HTTP only for health and metrics.
    Worker,
    /// Everything in one process.
    #[default]
    All,
}

impl Role {
    fn http(self) -> bool {
        self != Role::Worker
    }

    fn jobs(self) -> bool {
        self != Role::Api
    }

    /// Name as given on the command line.
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Api => "api",
            Role::Worker => "worker",
            Role::All => "all",
        }
    }
}

/// Runs the service until Ctrl-C or SIGTERM.
pub async fn run(config: Config, role: Role) -> anyhow::Result<()> {
    let db = super::open_db(&config).await?;
    let listener = TcpListener::bind(&config.listen)
        .await
        .with_context(|| format!("listening on {}", config.listen))?;
    let service = start(config, db, listener, role, async {
        shutdown_signal().await;
        tracing::info!("shutting down");
    })?;
    // Tests and scripts read this line to find the port.
    println!("ohmline listening on http://{}", service.addr);
    service.wait().await
}

/// A running service: HTTP, job workers, drop folders, email delivery (as its
/// role says).
pub struct Service {
    /// The address it listens on.
    pub addr: SocketAddr,
    task: JoinHandle<anyhow::Result<()>>,
}

impl Service {
    /// Waits until the service has shut down (after its shutdown future
    /// completed) and every background task has stopped.
    pub async fn wait(self) -> anyhow::Result<()> {
        self.task.await.context("the service task panicked")?
    }
}

/// Starts the service on `listener` with a migrated database in `role`; it
/// runs until `shutdown` completes. Used by `ohmline serve` and `ohmline demo`.
pub fn start(
    config: Config,
    db: Db,
    listener: TcpListener,
    role: Role,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> anyhow::Result<Service> {
    crate::metrics::handle();
    let addr = listener.local_addr()?;
    let state = AppState::new(db.clone(), config.clone());
    let (stop_tx, stop_rx) = watch::channel(false);

    let mut tasks = Vec::new();
    if role.http() {
        let limits = Limits { max_readings: config.ingest.max_readings };
        let poll = Duration::from_secs_f64(config.drop_folders.poll_interval_s);
        for (line, dir) in &config.drop_folders.lines {
            let w = dropfolder::Watch { line: line.clone(), dir: dir.clone() };
            tasks.push(tokio::spawn(dropfolder::run(
                db.clone(),
                state.sequences.clone(),
                w,
                poll,
                limits,
                stop_rx.clone(),
            )));
        }
        tasks.push(tokio::spawn(sweep_sessions(db.clone(), config.clone(), stop_rx.clone())));
    }
    if role.jobs() {
        let pipeline = Pipeline::new(db.clone(), state.config.clone());
        let settings = WorkerSettings {
            lease: Duration::from_secs(config.workers.lease_s),
            shutdown_grace: Duration::from_secs(config.workers.shutdown_grace_s),
            ..WorkerSettings::for_this_process(config.workers.effective_concurrency())
        };
        tracing::info!(concurrency = settings.concurrency, "starting job workers");
        tasks.push(tokio::spawn(worker::run(
            pipeline,
            settings,
            state.wake.clone(),
            stop_rx.clone(),
        )));
        let worker = Worker::new(db.clone(), WorkerParams::from_config(&config)?)?;
        tasks.push(tokio::spawn(worker.run(stop_rx.clone())));
    }

    tracing::info!(%addr, role = role.as_str(), database = %super::redact(&config.database_url()), "serving");
    let shutdown = async move {
        shutdown.await;
        let _ = stop_tx.send(true);
    };
    let task = tokio::spawn(async move {
        if role.http() {
            serve(listener, state, shutdown).await?;
        } else {
            let header_timeout =
                std::time::Duration::from_secs_f64(state.config.limits.header_read_timeout_s);
            serve_router(listener, ops_router(state), header_timeout, shutdown).await?;
        }
        for t in tasks {
            let _ = t.await;
        }
        db.close().await;
        Ok(())
    });
    Ok(Service { addr, task })
}

/// Deletes expired sessions at start and then hourly (a session is also
/// refused and deleted when it is next used after expiring).
async fn sweep_sessions(db: Db, config: Config, mut stop: watch::Receiver<bool>) {
    let idle = chrono::Duration::seconds(config.web.session_idle_s as i64);
    let max = chrono::Duration::seconds(config.web.session_max_s as i64);
    loop {
        let now = crate::db::now();
        match crate::db::sessions::delete_expired(&db, now - max, now - idle).await {
            Ok(0) => {}
            Ok(n) => tracing::info!(sessions = n, "expired sessions deleted"),
            Err(e) => tracing::warn!(error = %e, "could not delete expired sessions"),
        }
        tokio::select! {
            _ = tokio::time::sleep(Duration::from_secs(3600)) => {}
            _ = stop.changed() => return,
        }
    }
}

/// Completes on Ctrl-C or SIGTERM.
pub async fn shutdown_signal() {
    let ctrl_c = async {
        let _ = tokio::signal::ctrl_c().await;
    };
    #[cfg(unix)]
    let term = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut s) => {
                s.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! {
        _ = ctrl_c => {}
        _ = term => {}
    }
}
