//! The HTTP application: shared state, the router, and `serve`.

use std::future::Future;
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use axum::Router;
use axum::extract::{DefaultBodyLimit, State};
use axum::http::{Request, StatusCode};
use axum::routing::get;
use tokio::net::TcpListener;
use tokio::sync::Notify;
use tower_http::trace::TraceLayer;

use crate::auth::limiter::{SignInLimiter, SignInLimits};
use crate::config::Config;
use crate::db::Db;
use crate::ingest::SequenceCache;

/// State shared by every request.
#[derive(Clone)]
pub struct AppState {
    /// Storage.
    pub db: Db,
    /// Configuration in effect.
    pub config: Arc<Config>,
    /// Sequence versions by id (immutable once stored).
    pub sequences: Arc<SequenceCache>,
    /// Failed sign-in counts.
    pub sign_in: Arc<SignInLimiter>,
    /// Wakes this process's idle job workers (new work was queued).
    pub wake: Arc<Notify>,
    /// Section grids and rendered figures of the pages.
    pub figures: Arc<crate::web::figures::FigureCache>,
}

impl AppState {
    /// State over an open database.
    pub fn new(db: Db, config: Config) -> Self {
        let w = &config.web;
        let limits = SignInLimits {
            per_account: w.sign_in_failures_per_account,
            per_ip: w.sign_in_failures_per_ip,
            window: Duration::from_secs(w.sign_in_window_s),
        };
        Self {
            db,
            config: Arc::new(config),
            sequences: Arc::default(),
            sign_in: Arc::new(SignInLimiter::new(limits)),
            wake: Arc::default(),
            figures: Arc::default(),
        }
    }
}

/// The whole HTTP service: API, pages, and the operations endpoints.
pub fn router(state: AppState) -> Router {
    let body_limit = state.config.ingest.max_body_bytes;
    Router::new()
        .merge(ops_routes())
        .merge(crate::api::routes())
        .merge(crate::web::routes())
        // Upload handlers enforce the limit themselves (see `api::epochs`).
        .layer(DefaultBodyLimit::max(body_limit.saturating_mul(4)))
        .layer(axum::middleware::from_fn(crate::metrics::track_http))
        .layer(axum::middleware::from_fn(crate::web::security_headers))
        .layer(TraceLayer::new_for_http().make_span_with(|req: &Request<_>| {
            tracing::info_span!("request", method = %req.method(), path = %req.uri().path())
        }))
        .with_state(state)
}

/// Only the operations endpoints (`/healthz`, `/readyz`, `/metrics`): what a
/// `--role worker` process serves.
pub fn ops_router(state: AppState) -> Router {
    Router::new()
        .merge(ops_routes())
        .layer(axum::middleware::from_fn(crate::metrics::track_http))
        .with_state(state)
}

fn ops_routes() -> Router<AppState> {
    Router::new()
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .route("/metrics", get(crate::metrics::metrics_page))
}

/// `GET /healthz`: liveness — 200 whenever the process answers at all (the
/// database is checked by `/readyz`, so an outage does not get processes
/// restarted in a loop).
async fn healthz() -> (StatusCode, &'static str) {
    (StatusCode::OK, "ok\n")
}

/// `GET /readyz`: readiness — 200 when the database answers and its schema
/// has every migration this build knows; 503 with the reason otherwise.
async fn readyz(State(state): State<AppState>) -> (StatusCode, String) {
    match state.db.pending_migrations().await {
        Ok(0) => (StatusCode::OK, "ready\n".into()),
        Ok(n) => (
            StatusCode::SERVICE_UNAVAILABLE,
            format!("{n} database migrations not applied; run `ohmline migrate`\n"),
        ),
        Err(e) => {
            tracing::warn!(error = %e, "readiness check: database unavailable");
            (StatusCode::SERVICE_UNAVAILABLE, "database unavailable\n".into())
        }
    }
}

/// Serves `router(state)` on `listener` until `shutdown` completes, then
/// finishes in-flight requests.
pub async fn serve(
    listener: TcpListener,
    state: AppState,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    serve_router(listener, router(state), shutdown).await
}

/// Serves any router on `listener` until `shutdown` completes, then finishes
/// in-flight requests.
pub async fn serve_router(
    listener: TcpListener,
    router: Router,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    axum::serve(listener, router.into_make_service_with_connect_info::<SocketAddr>())
        .with_graceful_shutdown(shutdown)
        .await
}
