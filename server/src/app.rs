//! The HTTP application: shared state, the router, and `serve`.

use std::future::Future;
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use axum::Router;
use axum::extract::{DefaultBodyLimit, State};
use axum::http::{Request, StatusCode};
use axum::routing::{MethodRouter, get};
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

/// Routes that remember the paths they serve, so that a test can hold every
/// path against its access rules (a new route without a rule fails it).
#[derive(Default)]
pub struct Routes {
    router: Router<AppState>,
    paths: Vec<&'static str>,
}

impl Routes {
    /// No routes.
    pub fn new() -> Self {
        Self::default()
    }

    /// Adds `path` with its handlers (see [`Router::route`]).
    pub fn route(mut self, path: &'static str, handlers: MethodRouter<AppState>) -> Self {
        self.router = self.router.route(path, handlers);
        if !self.paths.contains(&path) {
            self.paths.push(path);
        }
        self
    }

    /// Adds every route of `other`.
    pub fn merge(mut self, other: Routes) -> Self {
        self.router = self.router.merge(other.router);
        self.paths.extend(other.paths);
        self
    }

    /// The paths served, in the order they were added.
    pub fn paths(&self) -> &[&'static str] {
        &self.paths
    }

    /// The router.
    pub fn into_router(self) -> Router<AppState> {
        self.router
    }
}

/// Every route of the service.
pub fn routes() -> Routes {
    Routes::new()
        .route("/healthz", get(healthz))
        .merge(crate::api::routes())
        .merge(crate::web::routes())
}

/// The whole HTTP service.
pub fn router(state: AppState) -> Router {
    let body_limit = state.config.ingest.max_body_bytes;
    routes()
        .into_router()
        // Upload handlers enforce the limit themselves (see `api::epochs`).
        .layer(DefaultBodyLimit::max(body_limit.saturating_mul(4)))
        .layer(axum::middleware::from_fn(crate::web::security_headers))
        .layer(TraceLayer::new_for_http().make_span_with(|req: &Request<_>| {
            tracing::info_span!("request", method = %req.method(), path = %req.uri().path())
        }))
        .with_state(state)
}

/// `GET /healthz`: 200 when the server runs and its database answers.
async fn healthz(State(state): State<AppState>) -> (StatusCode, &'static str) {
    match state.db.ping().await {
        Ok(()) => (StatusCode::OK, "ok\n"),
        Err(e) => {
            tracing::warn!(error = %e, "health check: database unavailable");
            (StatusCode::SERVICE_UNAVAILABLE, "database unavailable\n")
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
    axum::serve(listener, router(state).into_make_service_with_connect_info::<SocketAddr>())
        .with_graceful_shutdown(shutdown)
        .await
}
