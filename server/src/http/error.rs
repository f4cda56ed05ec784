//! The one API error type: every way a request is refused maps to a status and a stable
//! machine code, and leaves as `{"error": {"code": "...", "message": "..."}}`. A server-side
//! failure (5xx) also carries an `id` that the server's log line for it repeats, so an operator
//! can find the details (which may name files on the server) that the client is not shown.

use axum::Json;
use axum::http::{HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use serde_json::json;

use crate::engine::EngineError;
use crate::http::auth::AuthError;

#[derive(Debug, Clone)]
pub struct ApiError {
    pub status: StatusCode,
    pub code: &'static str,
    pub message: String,
    pub retry_after_s: Option<u32>,
    /// Set on server-side failures; logged with the failure.
    pub id: Option<String>,
}

impl ApiError {
    pub fn new(status: StatusCode, code: &'static str, message: impl Into<String>) -> Self {
        Self {
            status,
            code,
            message: message.into(),
            retry_after_s: None,
            id: None,
        }
    }

    /// Adds `Retry-After: seconds` to the answer.
    pub fn retry_after(mut self, seconds: u32) -> Self {
        self.retry_after_s = Some(seconds);
        self
    }

    pub fn bad_request(code: &'static str, message: impl Into<String>) -> Self {
        Self::new(StatusCode::BAD_REQUEST, code, message)
    }

    pub fn not_found(code: &'static str, message: impl Into<String>) -> Self {
        Self::new(StatusCode::NOT_FOUND, code, message)
    }

    pub fn conflict(code: &'static str, message: impl Into<String>) -> Self {
        Self::new(StatusCode::CONFLICT, code, message)
    }

    /// A server-side failure. `detail` goes to the log with the error's id; the client sees
    /// only that id and a generic message, since details can name server paths.
    pub fn internal(detail: impl Into<String>) -> Self {
        let id = crate::http::inference::new_error_id();
        tracing::error!(id, detail = detail.into(), "internal error");
        Self::internal_with_id(
            &id,
            "the server failed to answer this request; it keeps serving",
        )
    }

    /// A server-side failure already logged under `id`.
    pub fn internal_with_id(id: &str, message: &str) -> Self {
        Self {
            id: Some(id.to_owned()),
            ..Self::new(
                StatusCode::INTERNAL_SERVER_ERROR,
                "internal",
                format!("{message} (error id {id})"),
            )
        }
    }

    /// An unknown split, worded the same whether it exists for another tenant or not.
    pub fn unknown_split(name: &str) -> Self {
        Self::not_found(
            "unknown_split",
            format!("no split named {name:?} is available to this key"),
        )
    }

    /// An unknown adapter or split, worded the same whether it exists for another tenant or not.
    pub fn unknown_target(kind: &str, name: &str) -> Self {
        Self::not_found(
            "unknown_target",
            format!("no {kind} named {name:?} is available to this key"),
        )
    }
}

impl From<AuthError> for ApiError {
    fn from(e: AuthError) -> Self {
        let (status, code) = match e {
            AuthError::Missing => (StatusCode::UNAUTHORIZED, "missing_key"),
            AuthError::Unknown => (StatusCode::UNAUTHORIZED, "unknown_key"),
            AuthError::AdminRequired => (StatusCode::UNAUTHORIZED, "admin_token_required"),
            AuthError::AdminWrong => (StatusCode::FORBIDDEN, "admin_token_wrong"),
            AuthError::AdminDisabled => (StatusCode::FORBIDDEN, "admin_disabled"),
        };
        Self::new(status, code, e.to_string())
    }
}

impl From<EngineError> for ApiError {
    fn from(e: EngineError) -> Self {
        let retry_after_s = e
            .retry_after()
            .map(|wait| u32::try_from(crate::engine::whole_seconds(wait)).unwrap_or(u32::MAX));
        match &e {
            // A refusal a retry can get past is a 429 with its wait; a request larger than a
            // whole quota never gets past, and is a 413.
            EngineError::QueueFull { .. }
            | EngineError::TenantQueueFull { .. }
            | EngineError::OverQuota { .. } => {
                let status = match retry_after_s {
                    Some(_) => StatusCode::TOO_MANY_REQUESTS,
                    None => StatusCode::PAYLOAD_TOO_LARGE,
                };
                let code = e.refusal_code().unwrap_or("refused");
                Self {
                    retry_after_s,
                    ..Self::new(status, code, e.to_string())
                }
            }
            EngineError::ShuttingDown => Self::new(
                StatusCode::SERVICE_UNAVAILABLE,
                "shutting_down",
                e.to_string(),
            ),
            EngineError::Stopped => Self::new(
                StatusCode::SERVICE_UNAVAILABLE,
                "engine_stopped",
                e.to_string(),
            ),
            EngineError::DeadlineExceeded => Self::new(
                StatusCode::GATEWAY_TIMEOUT,
                "deadline_exceeded",
                e.to_string(),
            ),
            EngineError::Compute(_) => Self::internal(e.to_string()),
        }
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let mut error = json!({"code": self.code, "message": self.message});
        if let Some(id) = &self.id {
            error["id"] = json!(id);
        }
        let body = json!({ "error": error });
        let mut resp = (self.status, Json(body)).into_response();
        if let Some(s) = self.retry_after_s {
            resp.headers_mut().insert(
                header::RETRY_AFTER,
                HeaderValue::from_str(&s.to_string()).expect("digits"),
            );
        }
        resp
    }
}
