//! The HTTP API: versioned JSON endpoints under `/v1`, a live Server-Sent Events
//! stream, and `/metrics` for Prometheus/OpenMetrics scrapers.
//!
//! Main items: [`app`] builds the [`Router`] from an [`AppState`] (testable without
//! sockets through `tower::ServiceExt::oneshot`); [`Server`] binds `network.bind`
//! (loopback by default), optionally with TLS (rustls, ring provider) from the
//! configured certificate and key, and [`serve`] runs it until shutdown. [`routes`] is
//! the one list of every endpoint, its method and the access it needs; the router and
//! the OpenAPI test (docs/openapi.json) are both built from it. [`spawn_thread`] runs the
//! server on a thread and tokio runtime of its own, apart from the control loop's.
//!
//! The server never delays the control loop: it only reads the latest `Status` from the
//! watch channel (an `Arc` clone under a brief lock), subscribes to the rows broadcast
//! (a slow client lags and is told so; the loop never waits for it), and sends changes
//! on the bounded request queue with a timeout.
//!
//! Status codes, in the order they are checked: 401/403 (access, see [`auth`]), 415
//! (not JSON), 413 (body over [`body::MAX_BODY_BYTES`]), 400 (malformed JSON or a field
//! of the wrong type or name — the error names the field), 422 (a value outside what
//! the configuration allows; nothing is sent to the loop), 404 (unknown alarm id),
//! 409 (the controller refused the change in its present state; nothing changed),
//! 503 (the loop is not running, its queue is full, or it did not answer in time).
//! Every error body is `{"error": {"code", "field", "message"}}` ([`error::ApiError`]).

pub mod auth;
pub mod body;
pub mod client;
pub mod error;
pub mod handlers;
pub mod metrics;
pub mod stream;
pub mod wire;

use std::future::Future;
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use axum::Router;
use axum::extract::{ConnectInfo, DefaultBodyLimit, State};
use axum::http::{Method, StatusCode};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{MethodRouter, get, post, put};
use stilt_config::{Config, LoopGains};
use tokio::sync::Semaphore;
use tokio_util::sync::CancellationToken;

use crate::status::{Handles, Status};
use auth::{Access, Need, TokenFileError, TokenSet};
use error::ApiError;
use metrics::ApiCounters;

/// How long graceful shutdown waits for open requests before closing them.
pub const DRAIN: Duration = Duration::from_secs(3);

/// The gains and manual power in force, from the loop's [`crate::status::Settings`]
/// (`Status` does not carry gains; see `GET /v1/config`).
#[derive(Debug, Clone, PartialEq)]
pub struct Running {
    /// Tilt loop gains.
    pub tilt_loop: LoopGains,
    /// Leg loop gains.
    pub leg_loop: LoopGains,
    /// Manual-mode power per leg, W.
    pub manual_power_w: f64,
}

/// Everything the handlers share. Cheap to clone.
#[derive(Clone)]
pub struct AppState {
    pub(crate) inner: Arc<Inner>,
}

pub(crate) struct Inner {
    pub(crate) handles: Handles,
    pub(crate) config: Arc<Config>,
    pub(crate) access: Access,
    pub(crate) streams: Arc<Semaphore>,
    pub(crate) shutdown: CancellationToken,
    pub(crate) counters: ApiCounters,
}

impl AppState {
    /// A state with an explicit access policy (tests and embedders).
    pub fn new(
        config: Arc<Config>,
        handles: Handles,
        access: Access,
        shutdown: CancellationToken,
    ) -> Self {
        AppState {
            inner: Arc::new(Inner {
                handles,
                streams: Arc::new(Semaphore::new(config.network.max_stream_clients)),
                config,
                access,
                shutdown,
                counters: ApiCounters::default(),
            }),
        }
    }

    /// A state whose policy follows the configuration: the token file if one is
    /// configured (refused if others can read it), else open reads and loopback-only
    /// changes.
    pub fn from_config(
        config: Arc<Config>,
        handles: Handles,
        shutdown: CancellationToken,
    ) -> Result<Self, ServeError> {
        let access = match &config.network.token_file {
            Some(p) => Access::Tokens(TokenSet::load(p)?),
            None => Access::NoTokens {
                loopback: config.network.bind.ip().is_loopback(),
            },
        };
        Ok(AppState::new(config, handles, access, shutdown))
    }

    /// The API's counters (also in `/metrics`).
    pub fn counters(&self) -> &ApiCounters {
        &self.inner.counters
    }

    /// The token that ends live streams; cancelled when the server shuts down.
    pub fn shutdown_token(&self) -> &CancellationToken {
        &self.inner.shutdown
    }

    fn status(&self) -> Arc<Status> {
        self.inner.handles.status.borrow().clone()
    }

    /// The configuration in force now, as the loop last published it.
    fn settings(&self) -> Arc<crate::status::Settings> {
        self.inner.handles.settings.borrow().clone()
    }

    fn running(&self) -> Running {
        let c = &self.settings().control;
        Running {
            tilt_loop: c.tilt_loop,
            leg_loop: c.leg_loop,
            manual_power_w: c.manual_power_w,
        }
    }
}

/// One endpoint: method, path, the access it needs and what it does.
#[derive(Debug, Clone, PartialEq)]
pub struct RouteSpec {
    /// HTTP method.
    pub method: Method,
    /// Path (axum syntax).
    pub path: &'static str,
    /// Who may call it.
    pub need: Need,
    /// One line on what it does.
    pub summary: &'static str,
}

fn spec(method: Method, path: &'static str, need: Need, summary: &'static str) -> RouteSpec {
    RouteSpec {
        method,
        path,
        need,
        summary,
    }
}

/// The one list of endpoints, each with its handler.
fn table() -> Vec<(RouteSpec, MethodRouter<AppState>)> {
    use Need::*;
    vec![
        (
            spec(
                Method::GET,
                "/v1/health/live",
                Open,
                "Liveness: the daemon answers",
            ),
            get(handlers::live),
        ),
        (
            spec(
                Method::GET,
                "/v1/health/ready",
                Open,
                "Readiness: the loop runs with the readings its mode needs",
            ),
            get(handlers::ready),
        ),
        (
            spec(
                Method::GET,
                "/v1/status",
                Read,
                "Everything the loop knows now",
            ),
            get(handlers::status),
        ),
        (
            spec(
                Method::GET,
                "/v1/config",
                Read,
                "The running configuration, secrets left out",
            ),
            get(handlers::config),
        ),
        (
            spec(
                Method::GET,
                "/v1/stream",
                Read,
                "Live control rows as Server-Sent Events",
            ),
            get(stream::stream),
        ),
        (
            spec(
                Method::GET,
                "/metrics",
                Read,
                "Prometheus or OpenMetrics text",
            ),
            get(handlers::metrics),
        ),
        (
            spec(
                Method::PUT,
                "/v1/setpoint/tilt",
                Change,
                "New tilt target per axis (ramped)",
            ),
            put(handlers::set_tilt),
        ),
        (
            spec(
                Method::PUT,
                "/v1/setpoint/leg-bias",
                Change,
                "New common leg temperature bias (ramped)",
            ),
            put(handlers::set_bias),
        ),
        (
            spec(
                Method::PUT,
                "/v1/manual-power",
                Change,
                "New per-leg heater power for manual mode",
            ),
            put(handlers::set_manual_power),
        ),
        (
            spec(
                Method::PUT,
                "/v1/mode",
                Change,
                "Switch the controller mode",
            ),
            put(handlers::set_mode),
        ),
        (
            spec(
                Method::PUT,
                "/v1/gains/tilt",
                Change,
                "New gains for both tilt loops",
            ),
            put(handlers::set_tilt_gains),
        ),
        (
            spec(
                Method::PUT,
                "/v1/gains/leg",
                Change,
                "New gains for every leg loop",
            ),
            put(handlers::set_leg_gains),
        ),
        (
            spec(
                Method::POST,
                "/v1/alarms/acknowledge",
                Change,
                "Acknowledge one alarm or all",
            ),
            post(handlers::acknowledge),
        ),
    ]
}

/// Every endpoint (for documentation and the OpenAPI test).
pub fn routes() -> Vec<RouteSpec> {
    table().into_iter().map(|(s, _)| s).collect()
}

async fn guard(
    State((st, need)): State<(AppState, Need)>,
    mut req: axum::extract::Request,
    next: Next,
) -> Response {
    match st.inner.access.authorize(req.headers(), need) {
        Ok(mut caller) => {
            caller.peer = req
                .extensions()
                .get::<ConnectInfo<SocketAddr>>()
                .map(|c| c.0);
            req.extensions_mut().insert(caller);
            next.run(req).await
        }
        Err(e) => {
            ApiCounters::inc(&st.inner.counters.denied);
            let peer = req
                .extensions()
                .get::<ConnectInfo<SocketAddr>>()
                .map(|c| c.0.to_string())
                .unwrap_or_else(|| "-".into());
            tracing::warn!(target: "stiltd::audit", method = %req.method(), path = %req.uri().path(), peer = %peer, code = e.code, "request denied");
            e.into_response()
        }
    }
}

async fn not_found() -> ApiError {
    ApiError::new(
        StatusCode::NOT_FOUND,
        "not_found",
        "no such endpoint; see docs/openapi.json (every path starts with /v1, or is /metrics)",
    )
}

async fn wrong_method() -> ApiError {
    ApiError::new(
        StatusCode::METHOD_NOT_ALLOWED,
        "method_not_allowed",
        "this endpoint does not take that method; see docs/openapi.json",
    )
}

/// The router, every endpoint behind its access check.
pub fn app(state: AppState) -> Router {
    let mut r: Router<AppState> = Router::new();
    for (s, mr) in table() {
        let layer = middleware::from_fn_with_state((state.clone(), s.need), guard);
        r = r.route(s.path, mr.route_layer(layer));
    }
    r.fallback(not_found)
        .method_not_allowed_fallback(wrong_method)
        .layer(DefaultBodyLimit::max(body::MAX_BODY_BYTES))
        .with_state(state)
}

/// Why the server could not start or stopped with an error.
#[derive(Debug, thiserror::Error)]
pub enum ServeError {
    /// The token file is unusable.
    #[error(transparent)]
    Tokens(#[from] TokenFileError),
    /// The certificate or key cannot be used.
    #[error("TLS: cannot use certificate {cert} with key {key}: {message}")]
    Tls {
        /// Certificate file.
        cert: String,
        /// Key file.
        key: String,
        /// The cause.
        message: String,
    },
    /// The address cannot be bound.
    #[error("cannot listen on {addr}: {source}")]
    Bind {
        /// The address.
        addr: SocketAddr,
        /// The cause.
        source: std::io::Error,
    },
    /// Serving failed.
    #[error("HTTP server: {0}")]
    Io(#[from] std::io::Error),
}

/// A bound, not yet running server.
pub struct Server {
    listener: std::net::TcpListener,
    tls: Option<axum_server::tls_rustls::RustlsConfig>,
    state: AppState,
    addr: SocketAddr,
}

impl Server {
    /// Loads the token file and TLS material and binds `network.bind` (port 0 picks a
    /// free port; see [`Server::local_addr`]).
    pub async fn bind(config: &Config, handles: Handles) -> Result<Server, ServeError> {
        let config = Arc::new(config.clone());
        let state = AppState::from_config(config.clone(), handles, CancellationToken::new())?;
        let tls = match &config.network.tls {
            None => None,
            Some(t) => Some(
                axum_server::tls_rustls::RustlsConfig::from_pem_file(&t.cert_file, &t.key_file)
                    .await
                    .map_err(|e| ServeError::Tls {
                        cert: t.cert_file.display().to_string(),
                        key: t.key_file.display().to_string(),
                        message: e.to_string(),
                    })?,
            ),
        };
        let bind = config.network.bind;
        let listener = std::net::TcpListener::bind(bind)
            .map_err(|source| ServeError::Bind { addr: bind, source })?;
        let addr = listener.local_addr()?;
        Ok(Server {
            listener,
            tls,
            state,
            addr,
        })
    }

    /// The address actually bound.
    pub fn local_addr(&self) -> SocketAddr {
        self.addr
    }

    /// Whether it serves HTTPS.
    pub fn is_tls(&self) -> bool {
        self.tls.is_some()
    }

    /// The shared state (counters, shutdown token).
    pub fn state(&self) -> &AppState {
        &self.state
    }

    /// Serves until `shutdown` completes; then ends live streams at once and gives other
    /// requests [`DRAIN`] to finish.
    pub async fn run(
        self,
        shutdown: impl Future<Output = ()> + Send + 'static,
    ) -> Result<(), ServeError> {
        let handle = axum_server::Handle::new();
        let token = self.state.inner.shutdown.clone();
        let h = handle.clone();
        let stopper = tokio::spawn(async move {
            tokio::select! {
                _ = shutdown => {}
                _ = token.cancelled() => {}
            }
            token.cancel();
            h.graceful_shutdown(Some(DRAIN));
        });
        tracing::info!(addr = %self.addr, tls = self.tls.is_some(), "HTTP API listening");
        let make = app(self.state.clone()).into_make_service_with_connect_info::<SocketAddr>();
        let r = match self.tls {
            None => {
                axum_server::from_tcp(self.listener)?
                    .handle(handle)
                    .serve(make)
                    .await
            }
            Some(tls) => {
                axum_server::from_tcp_rustls(self.listener, tls)?
                    .handle(handle)
                    .serve(make)
                    .await
            }
        };
        stopper.abort();
        self.state.inner.shutdown.cancel();
        r.map_err(ServeError::Io)
    }
}

/// The API server on a thread and tokio runtime of its own (see [`spawn_thread`]).
pub struct ServerThread {
    addr: SocketAddr,
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    thread: Option<std::thread::JoinHandle<Result<(), ServeError>>>,
}

impl ServerThread {
    /// The address bound.
    pub fn local_addr(&self) -> SocketAddr {
        self.addr
    }

    /// Shuts the server down (streams end at once, requests get [`DRAIN`]) and waits.
    pub fn stop(mut self) -> Result<(), ServeError> {
        self.finish()
    }

    fn finish(&mut self) -> Result<(), ServeError> {
        if let Some(s) = self.stop.take() {
            let _ = s.send(());
        }
        match self.thread.take() {
            Some(t) => t.join().unwrap_or_else(|_| {
                Err(ServeError::Io(std::io::Error::other(
                    "the API thread panicked",
                )))
            }),
            None => Ok(()),
        }
    }
}

impl Drop for ServerThread {
    fn drop(&mut self) {
        let _ = self.finish();
    }
}

/// Starts the API server on its own thread with its own tokio runtime (`workers`
/// threads), so that HTTP work never shares a scheduler with the control loop: a burst
/// of clients can cost CPU, but never a place in the loop's task queue. Returns once
/// the address is bound (or binding failed).
pub fn spawn_thread(
    config: &Config,
    handles: Handles,
    workers: usize,
) -> Result<ServerThread, ServeError> {
    let config = config.clone();
    let (addr_tx, addr_rx) = std::sync::mpsc::channel();
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let thread = std::thread::Builder::new()
        .name("stiltd-api".into())
        .spawn(move || -> Result<(), ServeError> {
            let rt = tokio::runtime::Builder::new_multi_thread()
                .worker_threads(workers.max(1))
                .thread_name("stiltd-api")
                .enable_all()
                .build()?;
            rt.block_on(async move {
                let server = match Server::bind(&config, handles).await {
                    Ok(s) => {
                        let _ = addr_tx.send(Ok(s.local_addr()));
                        s
                    }
                    Err(e) => {
                        let _ = addr_tx.send(Err(e));
                        return Ok(());
                    }
                };
                server
                    .run(async move {
                        let _ = stop_rx.await;
                    })
                    .await
            })
        })?;
    match addr_rx.recv() {
        Ok(Ok(addr)) => Ok(ServerThread {
            addr,
            stop: Some(stop_tx),
            thread: Some(thread),
        }),
        Ok(Err(e)) => {
            let _ = thread.join();
            Err(e)
        }
        Err(_) => Err(match thread.join() {
            Ok(Err(e)) => e,
            _ => ServeError::Io(std::io::Error::other("the API thread ended before binding")),
        }),
    }
}

/// Binds `network.bind` and serves until `shutdown` completes.
pub async fn serve(
    config: &Config,
    handles: Handles,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), ServeError> {
    Server::bind(config, handles).await?.run(shutdown).await
}
