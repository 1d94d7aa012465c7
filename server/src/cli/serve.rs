//! `ohmline serve`: the HTTP service, drop-folder ingest and the alert email
//! delivery worker.

use std::future::Future;
use std::net::SocketAddr;
use std::time::Duration;

use anyhow::Context;
use tokio::net::TcpListener;
use tokio::sync::watch;
use tokio::task::JoinHandle;

use crate::app::{AppState, serve};
use crate::config::Config;
use crate::db::Db;
use crate::ingest::{Limits, dropfolder};
use crate::notify::worker::{Worker, WorkerParams};
use crate::pipeline::Pipeline;
use crate::worker::{self, WorkerSettings};

/// Runs the service until Ctrl-C or SIGTERM.
pub async fn run(config: Config) -> anyhow::Result<()> {
    let db = super::open_db(&config).await?;
    let listener = TcpListener::bind(&config.listen)
        .await
        .with_context(|| format!("listening on {}", config.listen))?;
    let service = start(config, db, listener, async {
        shutdown_signal().await;
        tracing::info!("shutting down");
    })?;
    // Tests and scripts read this line to find the port.
    println!("ohmline listening on http://{}", service.addr);
    service.wait().await
}

/// A running service: HTTP, job workers, drop folders, email delivery.
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

/// Starts the whole service on `listener` with a migrated database; it runs
/// until `shutdown` completes. Used by `ohmline serve` and `ohmline demo`.
pub fn start(
    config: Config,
    db: Db,
    listener: TcpListener,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> anyhow::Result<Service> {
    let addr = listener.local_addr()?;
    let state = AppState::new(db.clone(), config.clone());
    let (stop_tx, stop_rx) = watch::channel(false);

    let mut tasks = Vec::new();
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

    let pipeline = Pipeline::new(db.clone(), state.config.clone());
    let settings = WorkerSettings {
        lease: Duration::from_secs(config.workers.lease_s),
        ..WorkerSettings::for_this_process(config.workers.effective_concurrency())
    };
    tracing::info!(concurrency = settings.concurrency, "starting job workers");
    tasks.push(tokio::spawn(worker::run(pipeline, settings, state.wake.clone(), stop_rx.clone())));
    let worker = Worker::new(db.clone(), WorkerParams::from_config(&config)?)?;
    tasks.push(tokio::spawn(worker.run(stop_rx.clone())));
    tasks.push(tokio::spawn(sweep_sessions(db.clone(), config.clone(), stop_rx.clone())));

    tracing::info!(%addr, database = %super::redact(&config.database_url()), "serving");
    let shutdown = async move {
        shutdown.await;
        let _ = stop_tx.send(true);
    };
    let task = tokio::spawn(async move {
        serve(listener, state, shutdown).await?;
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
