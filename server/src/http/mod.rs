//! The HTTP surface. [`router`] builds the whole app from shared [`AppState`]; `serve` and the
//! tests both call it. Handlers only authenticate, parse, resolve the adapter once at admission,
//! enqueue and await; all model compute runs on the engine thread.
//!
//! - [`inference`]: `POST /embed`, `/classify`, `/generate` (JSON or SSE), `/outcomes`
//! - [`admin`]: adapter versions, live pointer, rollback, retire, pins, listing
//! - [`splits`]: A/B splits, their assignment and readout
//! - [`status`]: the status page (`GET /status`), whose script reads the admin API
//! - `GET /health/live`, `/health/ready`, `/metrics`

pub mod admin;
pub mod auth;
pub mod description;
pub mod error;
pub mod extract;
pub mod gate;
pub mod inference;
pub mod recent;
pub mod shadow;
pub mod splits;
pub mod status;

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use axum::Router;
use axum::extract::{DefaultBodyLimit, State};
use axum::http::StatusCode;
use axum::middleware::{from_fn, from_fn_with_state};
use axum::response::IntoResponse;
use switchyard_adapters::registry::Registry;

use crate::engine::{Backbone, Engine};
use crate::metrics::Metrics;
use auth::Tenants;

/// What one request may ask for; the handlers refuse anything beyond it before any model work.
#[derive(Debug, Clone)]
pub struct Bounds {
    /// Largest body of every request but an upload.
    pub inference_body_bytes: usize,
    /// Largest adapter package upload.
    pub upload_body_bytes: usize,
    /// Most bytes of one text or prompt, checked before tokenising.
    pub text_bytes: usize,
    /// Most tokens of one text or prompt.
    pub prompt_tokens: usize,
    /// Most tokens one generation may produce.
    pub generated_tokens: usize,
    /// Most texts in one embed or classify request.
    pub texts_per_request: usize,
    /// Deadline of one request, from admission to its last byte.
    pub timeout: Duration,
}

/// Everything the handlers share.
pub struct AppState {
    pub engine: Engine,
    pub backbone: Arc<Backbone>,
    pub registry: Registry,
    pub tenants: Tenants,
    pub admin_token: Option<String>,
    /// `/metrics` answers without the admin token.
    pub metrics_public: bool,
    pub metrics: Arc<Metrics>,
    pub splits: crate::experiments::Experiments,
    /// The parameters of split readouts (`[experiments]` in the configuration).
    pub readout: crate::splits::ReadoutSettings,
    /// How often rollout policies are checked (`[experiments] rollout_check_ms`).
    pub rollout_check: std::time::Duration,
    /// Shadow traffic's lane and budget.
    pub shadow: ShadowBudget,
    pub bounds: Bounds,
    /// False once shutdown began.
    pub ready: AtomicBool,
    /// Background threads whose death makes the server unfit for traffic (the store watcher):
    /// each is a name and a flag that is true while the thread runs.
    pub vital_threads: Vec<(&'static str, Arc<AtomicBool>)>,
    /// This server's name among replicas (`server.replica`, else the host name): every response
    /// carries it in the [`REPLICA_HEADER`] header.
    pub replica: axum::http::HeaderValue,
    /// The last hour of samples and each adapter's last use (`GET /admin/history`).
    pub history: crate::history::History,
}

/// Where shadow work runs and how much of it may (`[experiments] shadow_max_in_flight`,
/// `shadow_max_queued`).
#[derive(Debug)]
pub struct ShadowBudget {
    /// The engine lane shadow jobs queue in: the one after every tenant's.
    pub lane: usize,
    pub max_in_flight: usize,
    /// Shadow work starts only while the engine's queue holds at most this many jobs.
    pub max_queued: usize,
    pub in_flight: std::sync::atomic::AtomicUsize,
}

/// The response header that names the replica that answered.
pub const REPLICA_HEADER: &str = "Switchyard-Replica";

/// The replica name a server goes by: the configured one, else the machine's host name.
pub fn replica_name(configured: Option<&str>) -> axum::http::HeaderValue {
    let name = configured.map(str::to_owned).unwrap_or_else(|| {
        std::fs::read_to_string("/proc/sys/kernel/hostname")
            .map(|h| h.trim().to_owned())
            .unwrap_or_default()
    });
    axum::http::HeaderValue::from_str(&name)
        .ok()
        .filter(|_| !name.is_empty())
        .unwrap_or_else(|| axum::http::HeaderValue::from_static("switchyard"))
}

/// Names the replica on every response, errors and panics included.
async fn name_replica(
    State(state): State<SharedState>,
    req: axum::extract::Request,
    next: axum::middleware::Next,
) -> axum::response::Response {
    let mut response = next.run(req).await;
    response
        .headers_mut()
        .insert(REPLICA_HEADER, state.replica.clone());
    response
}

impl AppState {
    /// What keeps the server from serving well, in words; empty when it is ready.
    pub fn health_problems(&self) -> Vec<String> {
        let mut problems = Vec::new();
        if !self.ready.load(Ordering::SeqCst) {
            problems.push("shutting down".to_owned());
        }
        if !self.engine.is_running() {
            problems.push("the engine thread stopped".to_owned());
        }
        for (name, alive) in &self.vital_threads {
            if !alive.load(Ordering::SeqCst) {
                problems.push(format!("the {name} thread stopped"));
            }
        }
        problems
    }
}

pub type SharedState = Arc<AppState>;

/// The whole app. Credentials are checked by middleware before a body is read (see [`gate`]);
/// uploads and every other request have separate body limits; a panic anywhere answers a JSON
/// 500 instead of dropping the connection.
pub fn router(state: SharedState) -> Router {
    let bounds = state.bounds.clone();
    let inference = description::inference_routes()
        .route_layer(from_fn_with_state(state.clone(), gate::tenant));
    let upload = description::upload_routes()
        .route_layer(DefaultBodyLimit::max(bounds.upload_body_bytes))
        .route_layer(from_fn_with_state(state.clone(), gate::admin));
    let admin =
        description::admin_routes().route_layer(from_fn_with_state(state.clone(), gate::admin));
    let metrics =
        description::metrics_routes().route_layer(from_fn_with_state(state.clone(), gate::metrics));
    let (routes, _) = utoipa_axum::router::OpenApiRouter::new()
        .merge(inference)
        .merge(admin)
        .merge(metrics)
        .merge(description::open_routes())
        .split_for_parts();
    let (upload, _) = upload.split_for_parts();
    routes
        .layer(DefaultBodyLimit::max(bounds.inference_body_bytes))
        .merge(upload)
        .fallback(|| async {
            error::ApiError::not_found(
                "no_such_endpoint",
                "no such endpoint; see the README or GET /reference/http-api.json for the API",
            )
        })
        .method_not_allowed_fallback(|| async {
            error::ApiError::new(
                StatusCode::METHOD_NOT_ALLOWED,
                "method_not_allowed",
                "this endpoint does not take that method; see the README or GET /reference/http-api.json for the API",
            )
        })
        .layer(from_fn(gate::catch_panic))
        .layer(from_fn_with_state(state.clone(), name_replica))
        .with_state(state)
}

/// Alive unless the engine stopped for good after repeated panics: then only a new process can
/// compute again, and a supervisor that restarts on a failed liveness check should do so.
#[utoipa::path(get, path = "/health/live", operation_id = "liveness", tag = "operations",
    responses((status = 200, description = "The process can compute (`alive`)", content_type = "text/plain", body = String)))]
async fn live(State(state): State<SharedState>) -> impl IntoResponse {
    if state.engine.has_stopped() {
        error::ApiError::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "engine_stopped",
            "the engine stopped after repeated panics; restart the process (its log says why)",
        )
        .into_response()
    } else {
        (StatusCode::OK, "alive\n").into_response()
    }
}

/// Ready unless shutting down or a vital thread stopped.
#[utoipa::path(get, path = "/health/ready", operation_id = "readiness", tag = "operations",
    responses((status = 200, description = "The server takes new work (`ready`)", content_type = "text/plain", body = String)))]
async fn ready(State(state): State<SharedState>) -> impl IntoResponse {
    let problems = state.health_problems();
    if problems.is_empty() {
        (StatusCode::OK, "ready\n").into_response()
    } else {
        error::ApiError::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "not_ready",
            format!("the server is not taking new work: {}", problems.join("; ")),
        )
        .into_response()
    }
}

/// The Prometheus text format.
#[utoipa::path(get, path = "/metrics", operation_id = "metrics", tag = "operations",
    responses((status = 200, description = "Every metric in the Prometheus text format", content_type = "text/plain", body = String)),
    security((), ("admin_token" = [])),
)]
async fn metrics(State(state): State<SharedState>) -> impl IntoResponse {
    state.metrics.queue_depth.set(state.engine.queued() as i64);
    if let Some(stats) = state.registry.store().cache_stats() {
        state.metrics.set_package_cache(&stats);
    }
    (
        [(
            axum::http::header::CONTENT_TYPE,
            "text/plain; version=0.0.4; charset=utf-8",
        )],
        state.metrics.render(),
    )
}
