//! Prometheus metrics of this process, served at `GET /metrics` in the text
//! exposition format (the `metrics` facade with `metrics-exporter-prometheus`).
//!
//! Counters and histograms are recorded where the work happens; the job-queue
//! gauge is read from the database at each scrape, so every process reports
//! the same (shared) queue. `/metrics` is unauthenticated, like `/healthz`: it
//! carries counts and timings only, never names of lines, people or data. Keep
//! it off the public internet at the reverse proxy (deploy/OPERATIONS.md).
//!
//! Names (all prefixed `ohmline_`):
//! - `epochs_ingested_total`, `readings_ingested_total` — stored uploads;
//! - `qc_readings_dropped_total` — readings quality control took out;
//! - `jobs{state,kind}` — job queue depth (gauge, per scrape);
//! - `job_wait_seconds{kind}` — due → claimed; `job_run_seconds{kind,outcome}`;
//! - `inversion_seconds{kind}` — `single`, `ratio`, `difference`, `baseline`;
//! - `alerts_raised_total{level}` — transitions into the raised state;
//! - `emails_sent_total`, `emails_failed_total{reason}` (`retry`, `permanent`);
//! - `http_requests_total{method,route,status}`, `http_request_seconds{method,route}`.

use std::sync::OnceLock;
use std::time::Instant;

use axum::extract::{MatchedPath, Request, State};
use axum::http::{StatusCode, header};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use metrics_exporter_prometheus::{Matcher, PrometheusBuilder, PrometheusHandle};

use crate::app::AppState;
use crate::db::{self, Db};

/// Epochs stored by ingest (duplicates not counted).
pub const EPOCHS_INGESTED: &str = "ohmline_epochs_ingested_total";
/// Readings stored by ingest.
pub const READINGS_INGESTED: &str = "ohmline_readings_ingested_total";
/// Readings dropped by quality control.
pub const QC_DROPPED: &str = "ohmline_qc_readings_dropped_total";
/// Jobs per state and kind.
pub const JOBS: &str = "ohmline_jobs";
/// Seconds from a job being due to being claimed.
pub const JOB_WAIT: &str = "ohmline_job_wait_seconds";
/// Seconds a job ran.
pub const JOB_RUN: &str = "ohmline_job_run_seconds";
/// Seconds of one inversion.
pub const INVERSION: &str = "ohmline_inversion_seconds";
/// Alerts entering the raised state, by level.
pub const ALERTS_RAISED: &str = "ohmline_alerts_raised_total";
/// Emails handed to SMTP or written as files.
pub const EMAILS_SENT: &str = "ohmline_emails_sent_total";
/// Email deliveries that failed.
pub const EMAILS_FAILED: &str = "ohmline_emails_failed_total";
/// HTTP requests answered.
pub const HTTP_REQUESTS: &str = "ohmline_http_requests_total";
/// HTTP request durations.
pub const HTTP_SECONDS: &str = "ohmline_http_request_seconds";

static HANDLE: OnceLock<PrometheusHandle> = OnceLock::new();

/// Installs the process-wide recorder once and returns its handle. Later
/// calls return the same handle. When another recorder was installed first
/// (a library user's own), a private one is returned that sees nothing.
pub fn handle() -> PrometheusHandle {
    HANDLE
        .get_or_init(|| {
            // Buckets from 5 ms to 10 min cover requests, waits and inversions.
            let buckets = [
                0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 120.0,
                300.0, 600.0,
            ];
            let builder = PrometheusBuilder::new()
                .set_buckets_for_metric(Matcher::Suffix("_seconds".into()), &buckets)
                .expect("non-empty buckets");
            let recorder = builder.build_recorder();
            let handle = recorder.handle();
            if metrics::set_global_recorder(recorder).is_err() {
                tracing::warn!("a metrics recorder was already installed; /metrics stays empty");
            }
            handle
        })
        .clone()
}

/// Refreshes the job-queue gauge from the database: one series per (state,
/// kind) present, and zero for the states without jobs.
pub async fn refresh_queue(db: &Db) -> Result<(), db::DbError> {
    let counts = db::jobs::counts(db).await?;
    for state in ["queued", "running", "done", "dead"] {
        if !counts.iter().any(|(s, _, _)| s == state) {
            metrics::gauge!(JOBS, "state" => state, "kind" => "all").set(0.0);
        }
    }
    for (state, kind, n) in counts {
        metrics::gauge!(JOBS, "state" => state, "kind" => kind).set(n as f64);
    }
    Ok(())
}

/// `GET /metrics`: the Prometheus text exposition of this process.
pub async fn metrics_page(State(state): State<AppState>) -> Response {
    let handle = handle();
    if let Err(e) = refresh_queue(&state.db).await {
        tracing::warn!(error = %e, "metrics: job queue depth not refreshed");
    }
    (
        StatusCode::OK,
        [(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")],
        handle.render(),
    )
        .into_response()
}

/// Counts and times every HTTP request by its route pattern (e.g.
/// `/api/v1/lines/{line}/epochs`, never the concrete path, so the number of
/// series stays bounded); unmatched paths count as `unmatched`.
pub async fn track_http(req: Request, next: Next) -> Response {
    let route = req
        .extensions()
        .get::<MatchedPath>()
        .map(|p| p.as_str().to_string())
        .unwrap_or_else(|| "unmatched".into());
    let method = req.method().as_str().to_string();
    let started = Instant::now();
    let resp = next.run(req).await;
    let status = resp.status().as_u16().to_string();
    metrics::histogram!(HTTP_SECONDS, "method" => method.clone(), "route" => route.clone())
        .record(started.elapsed().as_secs_f64());
    metrics::counter!(HTTP_REQUESTS, "method" => method, "route" => route, "status" => status)
        .increment(1);
    resp
}
