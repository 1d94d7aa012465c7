//! The HTTP application: shared state, the router, and `serve`.

use std::future::Future;
use std::sync::Arc;
use std::time::Duration;

use axum::Router;
use axum::body::Body;
use axum::extract::{ConnectInfo, DefaultBodyLimit, State};
use axum::http::{Request, StatusCode, header};
use axum::routing::{MethodRouter, get};
use hyper::body::Incoming;
use hyper_util::rt::{TokioIo, TokioTimer};
use tokio::net::TcpListener;
use tokio::sync::{Notify, watch};
use tower_http::sensitive_headers::SetSensitiveHeadersLayer;
use tower_http::timeout::TimeoutLayer;
use tower_http::trace::TraceLayer;
use tower_service::Service;

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
    /// Request rate limits and the backlog bound.
    pub limits: Arc<crate::limits::Limiters>,
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
            limits: Arc::new(crate::limits::Limiters::new(&config.limits)),
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
    Routes::new().merge(ops_routes()).merge(crate::api::routes()).merge(crate::web::routes())
}

/// The operations endpoints.
fn ops_routes() -> Routes {
    Routes::new()
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .route("/metrics", get(crate::metrics::metrics_page))
}

/// The whole HTTP service: API, pages, and the operations endpoints.
pub fn router(state: AppState) -> Router {
    let c = &state.config;
    let body_limit = c.ingest.max_body_bytes;
    let timeout = Duration::from_secs_f64(c.limits.request_timeout_s);
    let inner = routes()
        .into_router()
        // Upload handlers enforce the limit themselves (see `api::epochs`).
        .layer(DefaultBodyLimit::max(body_limit.saturating_mul(4)))
        .layer(TimeoutLayer::with_status_code(StatusCode::REQUEST_TIMEOUT, timeout))
        .layer(axum::middleware::from_fn(crate::metrics::track_http));
    crate::web::with_security_headers(inner, &c.web)
        .layer(TraceLayer::new_for_http().make_span_with(|req: &Request<_>| {
            tracing::info_span!("request", method = %req.method(), path = %req.uri().path())
        }))
        // Credentials are marked so that no log output shows them.
        .layer(SetSensitiveHeadersLayer::new([
            header::AUTHORIZATION,
            header::COOKIE,
            header::SET_COOKIE,
        ]))
        .with_state(state)
}

/// Only the operations endpoints (`/healthz`, `/readyz`, `/metrics`): what a
/// `--role worker` process serves.
pub fn ops_router(state: AppState) -> Router {
    ops_routes()
        .into_router()
        .layer(axum::middleware::from_fn(crate::metrics::track_http))
        .with_state(state)
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

/// Serves `router(state)` on `listener` (HTTP/1.1) until `shutdown`
/// completes, then finishes in-flight requests. Each connection must send a
/// request's headers within `limits.header_read_timeout_s` (an idle kept-alive
/// connection is closed after as long), so slow clients cannot hold
/// connections; handlers see the peer address as `ConnectInfo<SocketAddr>`.
pub async fn serve(
    listener: TcpListener,
    state: AppState,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    let header_timeout = Duration::from_secs_f64(state.config.limits.header_read_timeout_s);
    serve_router(listener, router(state), header_timeout, shutdown).await
}

/// Serves any router on `listener` as [`serve`] does, with `header_timeout`
/// for each request's headers.
pub async fn serve_router(
    listener: TcpListener,
    router: Router,
    header_timeout: Duration,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    // Each connection holds a receiver of `stop`; `closed()` completes when
    // every connection has ended.
    let (stop_tx, stop_rx) = watch::channel(false);
    let mut shutdown = std::pin::pin!(shutdown);
    loop {
        let (stream, peer) = tokio::select! {
            accepted = listener.accept() => match accepted {
                Ok(a) => a,
                Err(e) => {
                    // Out of file descriptors and the like: wait, then go on.
                    tracing::warn!(error = %e, "accepting a connection failed");
                    tokio::time::sleep(Duration::from_millis(100)).await;
                    continue;
                }
            },
            () = &mut shutdown => break,
        };
        let _ = stream.set_nodelay(true);
        let router = router.clone();
        let mut stop = stop_rx.clone();
        tokio::spawn(async move {
            let service = hyper::service::service_fn(move |mut req: Request<Incoming>| {
                req.extensions_mut().insert(ConnectInfo(peer));
                let mut router = router.clone();
                async move { router.call(req.map(Body::new)).await }
            });
            let mut builder = hyper::server::conn::http1::Builder::new();
            builder.timer(TokioTimer::new()).header_read_timeout(header_timeout);
            let conn = builder.serve_connection(TokioIo::new(stream), service);
            let mut conn = std::pin::pin!(conn);
            tokio::select! {
                result = conn.as_mut() => {
                    if let Err(e) = result {
                        tracing::debug!(%peer, error = %e, "connection ended with an error");
                    }
                }
                _ = stop.changed() => {
                    // Finish the request in flight, then close.
                    conn.as_mut().graceful_shutdown();
                    let _ = conn.as_mut().await;
                }
            }
            drop(stop);
        });
    }
    drop(listener);
    drop(stop_rx);
    let _ = stop_tx.send(true);
    stop_tx.closed().await;
    Ok(())
}
