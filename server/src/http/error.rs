//! The one API error type: every way a request is refused maps to a status and a stable
//! machine code, and leaves as `{"error": {"code": "...", "message": "..."}}`. A server-side
//! failure (5xx) also carries an `id` that the server's log line for it repeats, so an operator
//! can find the details (which may name files on the server) that the client is not shown.

use axum::Json;
use axum::http::{HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use serde::Serialize;
use utoipa::ToSchema;

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

/// Every code an error answer can carry, with its HTTP status and when it is sent. The API
/// description lists them (the `ErrorCode` schema and each operation's responses), and a test
/// checks that every code the handlers use is here with the status they send it with.
pub const ERROR_CODES: &[(&str, u16, &str)] = &[
    (
        "malformed_json",
        400,
        "the body is not JSON, is empty, or is not sent as application/json",
    ),
    (
        "invalid_field",
        400,
        "a field is unknown, missing or of the wrong kind (the message names it)",
    ),
    ("unreadable_body", 400, "the body could not be read"),
    ("empty_body", 400, "an upload without a body"),
    (
        "invalid_name",
        400,
        "an adapter name that breaks the naming rules",
    ),
    (
        "invalid_version",
        400,
        "a version that is not of the store's form",
    ),
    (
        "invalid_query",
        400,
        "a query parameter that could not be read",
    ),
    ("no_texts", 400, "`texts` is empty"),
    ("empty_prompt", 400, "a generation without prompt text"),
    (
        "invalid_messages",
        400,
        "`messages` that break the chat rules",
    ),
    (
        "no_chat_template",
        400,
        "`messages` for a checkpoint without a chat template",
    ),
    (
        "invalid_sampling",
        400,
        "temperature, top-p or seed out of range",
    ),
    ("invalid_max_tokens", 400, "`max_tokens` of 0"),
    (
        "invalid_end_at",
        400,
        "`end_at` texts or token ids out of bounds",
    ),
    ("untokenizable", 400, "a text the tokenizer cannot encode"),
    ("ambiguous_target", 400, "both `adapter` and `split` named"),
    ("missing_target", 400, "a split request without a `subject`"),
    (
        "route_mismatch",
        400,
        "the Switchyard-Route header disagrees with the body",
    ),
    (
        "wrong_model_family",
        400,
        "embed or classify on a decoder, or generate on an encoder",
    ),
    (
        "not_a_classifier",
        400,
        "classify with an adapter (or the base) that has no head",
    ),
    (
        "invalid_split",
        400,
        "a split definition that breaks a rule (the message names it)",
    ),
    (
        "invalid_rollout",
        400,
        "a rollout policy that breaks a rule (the message names it)",
    ),
    (
        "invalid_outcome",
        400,
        "an outcome value that is not a finite number within ±1e15 or a boolean",
    ),
    (
        "missing_key",
        401,
        "no tenant key in the Authorization header",
    ),
    ("unknown_key", 401, "a tenant key this server does not know"),
    (
        "admin_token_required",
        401,
        "no admin token in the Authorization header",
    ),
    ("admin_token_wrong", 403, "a wrong admin token"),
    (
        "admin_disabled",
        403,
        "the server has no admin token configured",
    ),
    (
        "forbidden_target",
        403,
        "an adapter or split the tenant's key may not use",
    ),
    ("no_such_endpoint", 404, "a path the API does not have"),
    (
        "unknown_target",
        404,
        "an adapter or split this key cannot reach or that does not exist",
    ),
    (
        "unknown_version",
        404,
        "a version the adapter does not have",
    ),
    ("unknown_split", 404, "a split that does not exist"),
    (
        "unknown_response",
        404,
        "an outcome for a response this key was not served by a split",
    ),
    ("method_not_allowed", 405, "a method the path does not take"),
    (
        "no_previous_version",
        409,
        "a rollback without an earlier live version",
    ),
    ("version_is_live", 409, "retiring the live version"),
    (
        "version_held_by_split",
        409,
        "retiring a version a split arm serves",
    ),
    (
        "store_contended",
        409,
        "another writer changed the adapter at the same time; retry",
    ),
    (
        "cannot_pin",
        409,
        "a pin that cannot be held (the message says why)",
    ),
    (
        "no_rollout",
        409,
        "a rollout action on a split without a policy",
    ),
    (
        "rollout_not_applicable",
        409,
        "a rollout action its state does not allow",
    ),
    (
        "rollout_changed",
        409,
        "the rollout changed while the action was applied; read it again",
    ),
    ("outcome_recorded", 409, "a second outcome for one response"),
    (
        "body_too_large",
        413,
        "a body over the endpoint's size limit",
    ),
    (
        "text_too_large",
        413,
        "a text, prompt or conversation over bounds.text_bytes",
    ),
    (
        "too_many_texts",
        413,
        "more texts than bounds.texts_per_request",
    ),
    (
        "too_many_tokens",
        413,
        "a text or prompt over bounds.prompt_tokens or the model's context",
    ),
    (
        "kv_budget_exceeded",
        413,
        "prompt plus max_tokens over the engine's KV cache budget",
    ),
    (
        "over_token_quota",
        413,
        "a request larger than the tenant's whole token quota",
    ),
    (
        "invalid_package",
        422,
        "an adapter package that fails validation against the base model",
    ),
    (
        "queue_full",
        429,
        "the engine's queue is full; retry after Retry-After seconds",
    ),
    (
        "tenant_queue_full",
        429,
        "the tenant's share of the queue is full; retry after Retry-After",
    ),
    (
        "rate_limited",
        429,
        "over the tenant's request rate; retry after Retry-After",
    ),
    (
        "too_many_in_flight",
        429,
        "over the tenant's concurrent requests; retry after Retry-After",
    ),
    (
        "token_quota_spent",
        429,
        "the tenant's token quota is spent for now; retry after Retry-After",
    ),
    (
        "internal",
        500,
        "a server-side failure; `id` names the log line with the details",
    ),
    (
        "experiment_store_failed",
        500,
        "the experiment database failed",
    ),
    (
        "memory_full",
        503,
        "the adapter memory budget is held by requests in flight; retry",
    ),
    (
        "store_unreachable",
        503,
        "the adapter store (an object store) did not answer",
    ),
    (
        "not_ready",
        503,
        "the server is not taking new work (the message says why)",
    ),
    ("shutting_down", 503, "the server is shutting down"),
    (
        "engine_stopped",
        503,
        "the engine stopped after repeated panics; restart the process",
    ),
    (
        "deadline_exceeded",
        504,
        "the request's deadline passed before it was answered",
    ),
    ("store_full", 507, "the adapter store's disk is full"),
];

/// The body of every error answer.
#[derive(Debug, Clone, Serialize, ToSchema)]
pub struct ErrorBody {
    pub error: ErrorDetail,
}

/// What went wrong: a stable machine code and a message in plain words.
#[derive(Debug, Clone, Serialize, ToSchema)]
pub struct ErrorDetail {
    /// One of the codes listed in the `ErrorCode` schema.
    #[schema(schema_with = error_code_schema)]
    pub code: &'static str,
    pub message: String,
    /// Only on server-side failures (5xx): the id the server's log line repeats.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub id: Option<String>,
}

/// The `code` of an error: a string, one of [`ERROR_CODES`].
pub fn error_code_schema() -> utoipa::openapi::schema::Object {
    use utoipa::openapi::schema::{ObjectBuilder, Type};
    ObjectBuilder::new()
        .schema_type(Type::String)
        .description(Some(
            "A stable machine code; each operation's responses say which codes it sends with which status",
        ))
        .enum_values(Some(ERROR_CODES.iter().map(|(code, _, _)| *code)))
        .build()
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let body = ErrorBody {
            error: ErrorDetail {
                code: self.code,
                message: self.message,
                id: self.id,
            },
        };
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
