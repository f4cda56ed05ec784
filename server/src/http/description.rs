//! The machine-readable description of the HTTP API (OpenAPI 3.1), made from the same handler
//! annotations and types the router is built from ([`super::router`] and [`describe`] both take
//! their routes from the groups below), so the two cannot drift apart. The server answers it at
//! [`DESCRIPTION_PATH`]; `switchyard describe-api` prints it; `docs/http-api.json` is the
//! committed copy, which a test keeps equal to what the code makes.
//!
//! Each operation's error answers come from one table here ([`OPERATION_ERRORS`]): the codes it
//! may send, grouped by status with [`ERROR_CODES`]' words, each with the error body's schema.

use std::collections::BTreeMap;
use std::sync::OnceLock;

use utoipa::OpenApi;
use utoipa::openapi::path::Operation;
use utoipa::openapi::security::{HttpAuthScheme, HttpBuilder, SecurityScheme};
use utoipa::openapi::{ContentBuilder, HeaderBuilder, Ref, ResponseBuilder};
use utoipa_axum::router::OpenApiRouter;
use utoipa_axum::routes;

use super::error::{ERROR_CODES, ErrorBody, ErrorDetail};
use super::{SharedState, admin, inference, recent, splits, status};

/// Where the server answers its API description.
pub const DESCRIPTION_PATH: &str = "/reference/http-api.json";

/// The response header every answer carries.
const REPLICA_HEADER_TEXT: &str =
    "The name of the replica that answered (`server.replica`, else the host name)";

#[derive(OpenApi)]
#[openapi(
    info(
        title = "switchyard HTTP API",
        description = "One base model, many low-rank adapters. Inference (`/embed`, `/classify`, `/generate`, `/outcomes`) takes a tenant's key; the admin API (`/admin/...`) takes the admin token; both as `Authorization: Bearer <secret>`. Every error answer is `{\"error\": {\"code\", \"message\"}}` with a stable code (the `ErrorCode` list); each operation lists the codes it may send. Every answer carries the `Switchyard-Replica` header.",
        license(name = "Apache-2.0", identifier = "Apache-2.0"),
    ),
    components(schemas(
        ErrorBody,
        ErrorDetail,
        inference::TokenEvent,
        inference::DoneEvent,
        inference::ErrorEvent,
    )),
    tags(
        (name = "inference", description = "Requests a tenant's key may send"),
        (name = "adapters", description = "The adapter store: publish, live version, rollback, retire, pins"),
        (name = "splits", description = "A/B splits, their readouts and rollouts"),
        (name = "operations", description = "Health, metrics, history, the status page and this description"),
    ),
    modifiers(&Credentials),
)]
struct Base;

/// The two credentials: a tenant's key and the admin token, both bearer secrets.
struct Credentials;

impl utoipa::Modify for Credentials {
    fn modify(&self, doc: &mut utoipa::openapi::OpenApi) {
        let components = doc.components.get_or_insert_with(Default::default);
        let bearer = |what: &str| {
            SecurityScheme::Http(
                HttpBuilder::new()
                    .scheme(HttpAuthScheme::Bearer)
                    .description(Some(what))
                    .build(),
            )
        };
        components.add_security_scheme(
            "tenant_key",
            bearer("A tenant's API key (`[[tenants]] key` in the configuration); it reaches the adapters and splits its patterns name"),
        );
        components.add_security_scheme(
            "admin_token",
            bearer("The admin token (`server.admin_token`); without one configured the admin API refuses every request"),
        );
    }
}

// The route groups: the router puts each group behind its own credential check and body limit;
// the description takes the same groups without them.

/// Tenant-key requests.
pub(crate) fn inference_routes() -> OpenApiRouter<SharedState> {
    OpenApiRouter::new()
        .routes(routes!(inference::embed))
        .routes(routes!(inference::classify))
        .routes(routes!(inference::generate))
        .routes(routes!(splits::post_outcome))
}

/// The package upload (its own body limit).
pub(crate) fn upload_routes() -> OpenApiRouter<SharedState> {
    OpenApiRouter::new().routes(routes!(admin::upload))
}

/// The rest of the admin API.
pub(crate) fn admin_routes() -> OpenApiRouter<SharedState> {
    OpenApiRouter::new()
        .routes(routes!(admin::list))
        .routes(routes!(admin::set_live))
        .routes(routes!(admin::rollback))
        .routes(routes!(admin::retire))
        .routes(routes!(admin::pin, admin::unpin))
        .routes(routes!(splits::list))
        .routes(routes!(recent::history))
        .routes(routes!(splits::put_split, splits::delete_split))
        .routes(routes!(splits::readout))
        .routes(routes!(splits::rollout_action))
}

/// `/metrics` (admin token unless `metrics.public`).
pub(crate) fn metrics_routes() -> OpenApiRouter<SharedState> {
    OpenApiRouter::new().routes(routes!(super::metrics))
}

/// What answers without credentials.
pub(crate) fn open_routes() -> OpenApiRouter<SharedState> {
    OpenApiRouter::new()
        .routes(routes!(super::live))
        .routes(routes!(super::ready))
        .routes(routes!(status::page))
        .routes(routes!(status::style))
        .routes(routes!(status::script))
        .routes(routes!(serve))
}

/// Tenant credentials, the JSON body's refusals, and what any request that reaches the engine
/// may meet.
const TENANT: &[&str] = &["missing_key", "unknown_key"];
const ADMIN: &[&str] = &[
    "admin_token_required",
    "admin_token_wrong",
    "admin_disabled",
];
const JSON_BODY: &[&str] = &[
    "malformed_json",
    "invalid_field",
    "unreadable_body",
    "body_too_large",
];
const SERVING: &[&str] = &[
    "invalid_name",
    "ambiguous_target",
    "missing_target",
    "route_mismatch",
    "wrong_model_family",
    "untokenizable",
    "text_too_large",
    "too_many_tokens",
    "forbidden_target",
    "unknown_target",
    "unknown_split",
    "over_token_quota",
    "invalid_package",
    "queue_full",
    "tenant_queue_full",
    "rate_limited",
    "too_many_in_flight",
    "token_quota_spent",
    "memory_full",
    "store_unreachable",
    "shutting_down",
    "engine_stopped",
    "deadline_exceeded",
];
const STORE: &[&str] = &[
    "invalid_name",
    "store_contended",
    "store_unreachable",
    "store_full",
];

/// Per operation, the groups of error codes it may answer (besides `internal`, which any
/// operation may).
pub const OPERATION_ERRORS: &[(&str, &[&[&str]])] = &[
    (
        "embed",
        &[TENANT, JSON_BODY, SERVING, &["no_texts", "too_many_texts"]],
    ),
    (
        "classify",
        &[
            TENANT,
            JSON_BODY,
            SERVING,
            &["no_texts", "too_many_texts", "not_a_classifier"],
        ],
    ),
    (
        "generate",
        &[
            TENANT,
            JSON_BODY,
            SERVING,
            &[
                "empty_prompt",
                "invalid_messages",
                "no_chat_template",
                "invalid_sampling",
                "invalid_max_tokens",
                "invalid_end_at",
                "kv_budget_exceeded",
            ],
        ],
    ),
    (
        "record_outcome",
        &[
            TENANT,
            JSON_BODY,
            &[
                "invalid_outcome",
                "unknown_response",
                "outcome_recorded",
                "experiment_store_failed",
            ],
        ],
    ),
    (
        "publish_adapter",
        &[
            ADMIN,
            STORE,
            &[
                "empty_body",
                "unreadable_body",
                "body_too_large",
                "invalid_package",
            ],
        ],
    ),
    ("list_adapters", &[ADMIN, STORE]),
    (
        "set_live_version",
        &[
            ADMIN,
            JSON_BODY,
            STORE,
            &["invalid_version", "unknown_target", "unknown_version"],
        ],
    ),
    (
        "roll_back_adapter",
        &[ADMIN, STORE, &["unknown_target", "no_previous_version"]],
    ),
    (
        "retire_version",
        &[
            ADMIN,
            STORE,
            &[
                "invalid_version",
                "unknown_target",
                "unknown_version",
                "version_is_live",
                "version_held_by_split",
            ],
        ],
    ),
    ("pin_adapter", &[ADMIN, &["unknown_target", "cannot_pin"]]),
    ("unpin_adapter", &[ADMIN, &["unknown_target"]]),
    ("list_splits", &[ADMIN, &["experiment_store_failed"]]),
    ("recent_history", &[ADMIN, &["invalid_query"]]),
    (
        "put_split",
        &[
            ADMIN,
            JSON_BODY,
            &[
                "invalid_split",
                "invalid_rollout",
                "unknown_target",
                "unknown_version",
                "experiment_store_failed",
            ],
        ],
    ),
    (
        "delete_split",
        &[ADMIN, &["unknown_split", "experiment_store_failed"]],
    ),
    (
        "split_readout",
        &[ADMIN, &["unknown_split", "experiment_store_failed"]],
    ),
    (
        "rollout_action",
        &[
            ADMIN,
            JSON_BODY,
            &[
                "unknown_split",
                "no_rollout",
                "rollout_not_applicable",
                "rollout_changed",
                "experiment_store_failed",
            ],
        ],
    ),
    ("metrics", &[ADMIN]),
    ("liveness", &[&["engine_stopped"]]),
    ("readiness", &[&["not_ready"]]),
    ("status_page", &[]),
    ("status_page_style", &[]),
    ("status_page_script", &[]),
    ("api_description", &[]),
];

/// The codes one operation may answer with, `internal` included; `None` for an operation the
/// table does not list.
pub fn operation_codes(operation_id: &str) -> Option<Vec<&'static str>> {
    let (_, groups) = OPERATION_ERRORS
        .iter()
        .find(|(id, _)| *id == operation_id)?;
    let mut codes: Vec<&'static str> = groups.iter().flat_map(|g| g.iter().copied()).collect();
    codes.push("internal");
    codes.sort_unstable();
    codes.dedup();
    Some(codes)
}

/// Adds each operation's error answers and every answer's replica header.
fn add_answers(operation: &mut Operation) {
    let codes = operation
        .operation_id
        .as_deref()
        .and_then(operation_codes)
        .unwrap_or_else(|| vec!["internal"]);
    let mut by_status: BTreeMap<u16, Vec<(&str, &str)>> = BTreeMap::new();
    for code in codes {
        if let Some((_, status, when)) = ERROR_CODES.iter().find(|(c, _, _)| *c == code) {
            by_status.entry(*status).or_default().push((code, when));
        }
    }
    for (status, codes) in by_status {
        let text = codes
            .iter()
            .map(|(code, when)| format!("`{code}`: {when}"))
            .collect::<Vec<_>>()
            .join("; ");
        let mut response = ResponseBuilder::new().description(text).content(
            "application/json",
            ContentBuilder::new()
                .schema(Some(Ref::from_schema_name("ErrorBody")))
                .build(),
        );
        if status == 429 {
            response = response.header(
                "Retry-After",
                HeaderBuilder::new()
                    .schema(u32_schema())
                    .description(Some("Seconds to wait before retrying"))
                    .build(),
            );
        }
        operation
            .responses
            .responses
            .insert(status.to_string(), response.build().into());
    }
    for response in operation.responses.responses.values_mut() {
        if let utoipa::openapi::RefOr::T(response) = response {
            response.headers.insert(
                super::REPLICA_HEADER.to_owned(),
                HeaderBuilder::new()
                    .schema(string_schema())
                    .description(Some(REPLICA_HEADER_TEXT))
                    .build(),
            );
        }
    }
}

fn u32_schema() -> utoipa::openapi::schema::Object {
    utoipa::openapi::schema::ObjectBuilder::new()
        .schema_type(utoipa::openapi::schema::Type::Integer)
        .minimum(Some(0))
        .build()
}

fn string_schema() -> utoipa::openapi::schema::Object {
    utoipa::openapi::schema::ObjectBuilder::new()
        .schema_type(utoipa::openapi::schema::Type::String)
        .build()
}

/// The whole description, as the server serves it.
pub fn describe() -> utoipa::openapi::OpenApi {
    let mut doc = OpenApiRouter::with_openapi(Base::openapi())
        .merge(inference_routes())
        .merge(upload_routes())
        .merge(admin_routes())
        .merge(metrics_routes())
        .merge(open_routes())
        .into_openapi();
    doc.info.version = env!("CARGO_PKG_VERSION").to_owned();
    for item in doc.paths.paths.values_mut() {
        for operation in [
            &mut item.get,
            &mut item.put,
            &mut item.post,
            &mut item.delete,
            &mut item.patch,
        ]
        .into_iter()
        .flatten()
        {
            add_answers(operation);
        }
    }
    doc
}

/// The description as pretty JSON with a final newline: what the server answers and what
/// `docs/http-api.json` holds.
pub fn describe_json() -> &'static str {
    static TEXT: OnceLock<String> = OnceLock::new();
    TEXT.get_or_init(|| {
        let mut text = describe()
            .to_pretty_json()
            .expect("the API description serialises");
        text.push('\n');
        text
    })
}

/// `GET /reference/http-api.json`: this description.
#[utoipa::path(
    get,
    path = "/reference/http-api.json",
    operation_id = "api_description",
    tag = "operations",
    responses((status = 200, description = "This document (OpenAPI 3.1)", content_type = "application/json", body = Object)),
)]
pub async fn serve() -> impl axum::response::IntoResponse {
    (
        [(axum::http::header::CONTENT_TYPE, "application/json")],
        describe_json(),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every operation the description lists has its error codes in the table, and every code
    /// the table names is one of [`ERROR_CODES`].
    #[test]
    fn every_operation_lists_its_errors_and_every_code_is_known() {
        let doc = describe();
        let mut seen = Vec::new();
        for (path, item) in &doc.paths.paths {
            for operation in [&item.get, &item.put, &item.post, &item.delete, &item.patch]
                .into_iter()
                .flatten()
            {
                let id = operation.operation_id.clone().unwrap();
                assert!(
                    operation_codes(&id).is_some(),
                    "{path}: {id} not in the table"
                );
                seen.push(id);
            }
        }
        for (id, groups) in OPERATION_ERRORS {
            assert!(seen.iter().any(|s| s == id), "{id} is not an operation");
            for code in groups.iter().flat_map(|g| g.iter()) {
                assert!(
                    ERROR_CODES.iter().any(|(c, _, _)| c == code),
                    "{id}: unknown code {code}"
                );
            }
        }
    }

    /// Every error code the handlers send (a literal passed to an `ApiError` constructor, or an
    /// engine refusal) is in [`ERROR_CODES`] with the status they send it with.
    #[test]
    fn every_code_the_handlers_send_is_listed_with_its_status() {
        let src = concat!(env!("CARGO_MANIFEST_DIR"), "/src");
        let mut files = Vec::new();
        let mut dirs = vec![std::path::PathBuf::from(src)];
        while let Some(dir) = dirs.pop() {
            for entry in std::fs::read_dir(dir).unwrap() {
                let path = entry.unwrap().path();
                if path.is_dir() {
                    dirs.push(path);
                } else if path.extension().is_some_and(|e| e == "rs")
                    && !path.ends_with("http/description.rs")
                {
                    files.push(path);
                }
            }
        }
        let calls: &[(&str, Option<u16>)] = &[
            ("ApiError::bad_request(", Some(400)),
            ("ApiError::not_found(", Some(404)),
            ("ApiError::conflict(", Some(409)),
            ("too_large(", Some(413)),
            ("ApiError::new(", None),
        ];
        let mut found = 0;
        for file in files {
            let text = std::fs::read_to_string(&file).unwrap();
            for (call, status) in calls {
                for (at, _) in text.match_indices(call) {
                    let rest = text[at + call.len()..].trim_start();
                    let (status, rest) = match status {
                        Some(s) => (*s, rest),
                        None => {
                            let Some(named) = rest.strip_prefix("StatusCode::") else {
                                continue;
                            };
                            let end = named.find(',').unwrap();
                            let status: u16 = match &named[..end] {
                                "BAD_REQUEST" => 400,
                                "UNAUTHORIZED" => 401,
                                "FORBIDDEN" => 403,
                                "NOT_FOUND" => 404,
                                "METHOD_NOT_ALLOWED" => 405,
                                "CONFLICT" => 409,
                                "PAYLOAD_TOO_LARGE" => 413,
                                "UNPROCESSABLE_ENTITY" => 422,
                                "INTERNAL_SERVER_ERROR" => 500,
                                "SERVICE_UNAVAILABLE" => 503,
                                "GATEWAY_TIMEOUT" => 504,
                                "INSUFFICIENT_STORAGE" => 507,
                                other => panic!("{}: status {other}", file.display()),
                            };
                            (status, named[end + 1..].trim_start())
                        }
                    };
                    let Some(literal) = rest.strip_prefix('"') else {
                        continue; // a code passed through a variable
                    };
                    let code = &literal[..literal.find('"').unwrap()];
                    let listed = ERROR_CODES.iter().find(|(c, _, _)| *c == code);
                    assert_eq!(
                        listed.map(|(_, s, _)| *s),
                        Some(status),
                        "{}: code {code:?} sent with {status}",
                        file.display()
                    );
                    found += 1;
                }
            }
        }
        assert!(found > 60, "only {found} codes found: the scan is broken");
        for code in [
            "queue_full",
            "tenant_queue_full",
            "rate_limited",
            "too_many_in_flight",
            "token_quota_spent",
            "over_token_quota",
        ] {
            assert!(ERROR_CODES.iter().any(|(c, _, _)| *c == code), "{code}");
        }
    }
}
