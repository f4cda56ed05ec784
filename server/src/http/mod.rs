//! The HTTP surface. [`router`] builds the whole app from shared [`AppState`]; `serve` and the
//! tests both call it. Handlers only authenticate, parse, resolve the adapter once at admission,
//! enqueue and await; all model compute runs on the engine thread.
//!
//! - [`inference`]: `POST /embed`, `/classify`, `/generate` (JSON or SSE), `/outcomes`
//! - [`admin`]: adapter versions, live pointer, rollback, retire, pins, listing
//! - [`splits`]: A/B splits, their assignment and readout
//! - `GET /health/live`, `/health/ready`, `/metrics`

pub mod admin;
pub mod auth;
pub mod error;
pub mod extract;
pub mod inference;
pub mod splits;

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use axum::Router;
use axum::extract::{DefaultBodyLimit, State};
use axum::http::StatusCode;
use axum::response::IntoResponse;
use axum::routing::{delete, get, post, put};
use switchyard_adapters::registry::Registry;

use crate::engine::{Backbone, Engine};
use crate::metrics::Metrics;
use auth::Tenants;

/// Request limits the handlers enforce before anything is queued.
#[derive(Debug, Clone)]
pub struct RequestLimits {
    pub max_body_bytes: usize,
    pub max_input_tokens: usize,
    pub max_output_tokens: usize,
    pub max_texts: usize,
    pub timeout: Duration,
}

/// Everything the handlers share.
pub struct AppState {
    pub engine: Engine,
    pub backbone: Arc<Backbone>,
    pub registry: Registry,
    pub tenants: Tenants,
    pub admin_token: Option<String>,
    pub metrics: Arc<Metrics>,
    pub splits: crate::experiments::Experiments,
    pub limits: RequestLimits,
    pub ready: AtomicBool,
}

pub type SharedState = Arc<AppState>;

/// The whole app.
pub fn router(state: SharedState) -> Router {
    let limit = state.limits.max_body_bytes;
    Router::new()
        .route("/embed", post(inference::embed))
        .route("/classify", post(inference::classify))
        .route("/generate", post(inference::generate))
        .route("/outcomes", post(splits::post_outcome))
        .route("/admin/adapters", get(admin::list))
        .route("/admin/adapters/{name}", put(admin::upload))
        .route("/admin/adapters/{name}/live", post(admin::set_live))
        .route("/admin/adapters/{name}/rollback", post(admin::rollback))
        .route(
            "/admin/adapters/{name}/versions/{version}",
            delete(admin::retire),
        )
        .route(
            "/admin/adapters/{name}/pin",
            put(admin::pin).delete(admin::unpin),
        )
        .route("/admin/splits", get(splits::list))
        .route(
            "/admin/splits/{name}",
            put(splits::put_split).delete(splits::delete_split),
        )
        .route("/admin/splits/{name}/readout", get(splits::readout))
        .route("/health/live", get(|| async { "alive\n" }))
        .route("/health/ready", get(ready))
        .route("/metrics", get(metrics))
        .fallback(|| async {
            error::ApiError::not_found(
                "no_such_endpoint",
                "no such endpoint; see the README for the API",
            )
        })
        .layer(DefaultBodyLimit::max(limit))
        .with_state(state)
}

async fn ready(State(state): State<SharedState>) -> impl IntoResponse {
    if state.ready.load(Ordering::SeqCst) {
        (StatusCode::OK, "ready\n").into_response()
    } else {
        error::ApiError::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "not_ready",
            "the server is not taking new work",
        )
        .into_response()
    }
}

async fn metrics(State(state): State<SharedState>) -> impl IntoResponse {
    state.metrics.queue_depth.set(state.engine.queued() as i64);
    (
        [(
            axum::http::header::CONTENT_TYPE,
            "text/plain; version=0.0.4; charset=utf-8",
        )],
        state.metrics.render(),
    )
}
