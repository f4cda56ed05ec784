//! Middleware that runs before a handler reads the body: who may call (a tenant key for
//! inference, the admin token for the admin API and, unless configured public, for `/metrics`),
//! and a guard that turns a panic anywhere in a handler into a JSON 500 with an id instead of a
//! dropped connection.
//!
//! Checking credentials here, before any extractor runs, means an unauthenticated client cannot
//! make the server buffer, parse or tokenise a body: it is answered from the headers alone. So
//! that an ordinary client still reads that answer (a server that closes with unread bytes makes
//! the kernel reset the connection, and the client may see a broken pipe instead of the 401), up
//! to [`DRAIN_BYTES`] of a refused body are read and thrown away, within [`DRAIN_TIME`]; a
//! larger body is cut off.

use std::panic::AssertUnwindSafe;
use std::time::Duration;

use axum::extract::{Request, State};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use futures_util::{FutureExt, StreamExt};

use crate::http::SharedState;
use crate::http::error::ApiError;

/// The `Authorization` header's value, if it is text.
pub fn authorization(headers: &axum::http::HeaderMap) -> Option<&str> {
    headers
        .get(axum::http::header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
}

/// Most bytes of a refused request's body read (and discarded) before the refusal goes out.
pub const DRAIN_BYTES: usize = 1 << 20;
/// Longest time spent reading a refused request's body.
pub const DRAIN_TIME: Duration = Duration::from_secs(2);

/// Answers a refused request: its body is read and discarded up to [`DRAIN_BYTES`] (never
/// buffered), so that the client gets to read the answer; the connection is then closed.
async fn refuse(req: Request, error: ApiError) -> Response {
    let mut body = req.into_body().into_data_stream();
    let mut read = 0usize;
    let _ = tokio::time::timeout(DRAIN_TIME, async {
        while let Some(Ok(chunk)) = body.next().await {
            read += chunk.len();
            if read > DRAIN_BYTES {
                break;
            }
        }
    })
    .await;
    let mut resp = error.into_response();
    resp.headers_mut().insert(
        axum::http::header::CONNECTION,
        axum::http::HeaderValue::from_static("close"),
    );
    resp
}

/// Authenticates the tenant key and hands the tenant to the handler as an extension.
pub async fn tenant(State(state): State<SharedState>, mut req: Request, next: Next) -> Response {
    match state.tenants.authenticate(authorization(req.headers())) {
        Ok(tenant) => {
            req.extensions_mut().insert(tenant);
            next.run(req).await
        }
        Err(e) => refuse(req, ApiError::from(e)).await,
    }
}

/// Refuses a request without the admin token.
pub async fn admin(State(state): State<SharedState>, req: Request, next: Next) -> Response {
    match crate::http::auth::check_admin(state.admin_token.as_deref(), authorization(req.headers()))
    {
        Ok(()) => next.run(req).await,
        Err(e) => refuse(req, ApiError::from(e)).await,
    }
}

/// `/metrics` names every adapter and split, so it takes the admin token unless the config says
/// it is public (a scraper on a private network).
pub async fn metrics(state: State<SharedState>, req: Request, next: Next) -> Response {
    if state.metrics_public {
        next.run(req).await
    } else {
        admin(state, req, next).await
    }
}

/// Runs the rest of the stack and answers a panic with a JSON 500 that carries an id, logged
/// with the panic's message, so the client gets a status and the operator a line to find.
/// Shared state is never left poisoned by this: every lock the handlers take recovers from
/// poisoning (see `crate::sync`), and the guard only stops the unwinding at the handler's edge.
pub async fn catch_panic(req: Request, next: Next) -> Response {
    let method = req.method().clone();
    let path = req.uri().path().to_owned();
    match AssertUnwindSafe(next.run(req)).catch_unwind().await {
        Ok(resp) => resp,
        Err(panic) => {
            let id = crate::http::inference::new_error_id();
            let message = panic_message(&*panic);
            tracing::error!(id, %method, path, panic = message, "handler panicked; answered 500");
            ApiError::internal_with_id(
                &id,
                "the server hit an internal error while answering this request; it keeps serving",
            )
            .into_response()
        }
    }
}

fn panic_message(panic: &(dyn std::any::Any + Send)) -> &str {
    panic
        .downcast_ref::<&str>()
        .copied()
        .or_else(|| panic.downcast_ref::<String>().map(String::as_str))
        .unwrap_or("(a panic without a message)")
}

#[cfg(test)]
mod tests {
    use axum::Router;
    use axum::body::Body;
    use axum::http::{Request, StatusCode};
    use axum::middleware::from_fn;
    use axum::routing::get;
    use tower::ServiceExt;

    async fn body_json(resp: axum::response::Response) -> serde_json::Value {
        let bytes = axum::body::to_bytes(resp.into_body(), 1 << 20)
            .await
            .unwrap();
        serde_json::from_slice(&bytes).unwrap()
    }

    /// Regression: a panic in a handler (the readout's statistics) dropped the connection with
    /// no status. The guard answers a JSON 500 with an id, and the next request is served.
    #[tokio::test]
    async fn a_panicking_handler_answers_json_500_with_an_id_and_the_next_request_is_served() {
        let app = Router::new()
            .route(
                "/boom",
                get(|| async {
                    if true {
                        panic!("degrees of freedom are positive");
                    }
                    "unreachable"
                }),
            )
            .route("/fine", get(|| async { "fine" }))
            .layer(from_fn(super::catch_panic));
        let resp = app
            .clone()
            .oneshot(Request::get("/boom").body(Body::empty()).unwrap())
            .await
            .unwrap();
        assert_eq!(resp.status(), StatusCode::INTERNAL_SERVER_ERROR);
        let body = body_json(resp).await;
        assert_eq!(body["error"]["code"], "internal");
        let id = body["error"]["id"].as_str().unwrap();
        assert!(id.starts_with("e-") && id.len() == 26, "{id}");
        assert!(
            body["error"]["message"].as_str().unwrap().contains(id),
            "{body}"
        );
        let resp = app
            .oneshot(Request::get("/fine").body(Body::empty()).unwrap())
            .await
            .unwrap();
        assert_eq!(resp.status(), StatusCode::OK);
    }
}
