//! The inference endpoints. Each request names an adapter (or `base`) or a split; the name is
//! resolved to `adapter@version` once, here at admission, and the handle travels with the job,
//! so a version published meanwhile never mixes into this answer. Each answer says who served
//! it (and which arm of a split) and its timings.

use std::convert::Infallible;
use std::sync::Arc;
use std::time::{Duration, Instant};

use axum::extract::State;
use axum::http::StatusCode;
use axum::response::sse::{Event, KeepAlive, Sse};
use axum::response::{IntoResponse, Response};
use axum::{Extension, Json};
use serde::{Deserialize, Serialize};
use switchyard_adapters::AdapterName;
use switchyard_adapters::registry::{AdapterHandle, RegistryError};
use tokio::sync::{mpsc, oneshot};
use utoipa::ToSchema;

use crate::engine::end_at::EndAt;
use crate::engine::{
    Backbone, EmbedJob, Finished, GenEvent, GenerateJob, Job, Stop, Ticket, Timings,
};
use crate::experiments::book::ShadowArm;
use crate::experiments::responses::{ArmWatch, Receipt};
use crate::http::auth::Tenant;
use crate::http::error::ApiError;
use crate::http::extract::ApiJson;
use crate::http::shadow::{self, Mirror, MirrorInput};
use crate::http::{Bounds, SharedState};
use crate::model::chat::ChatMessage;
use crate::model::sampling::SamplingParams;

/// Who serves a request, fixed at admission.
pub struct Routed {
    pub handle: Option<AdapterHandle>,
    pub served_by: String,
    pub split: Option<(String, String)>,
    pub swap: Duration,
    /// Through a split: says when the record of which arm answered is on disk.
    pub recorded: Option<Receipt>,
    /// Through a split: records how the request ended and how long it took, for the arm's
    /// rollout guards (counted as failed if dropped unfinished).
    pub watch: Option<ArmWatch>,
    /// The split's shadow arm, when this request (of its first arm) was drawn to be mirrored.
    pub shadow: Option<ShadowArm>,
    /// The request's inputs for its mirror, kept when it is mirrored.
    pub mirror: Option<MirrorInput>,
}

impl Routed {
    /// Records that the request was answered.
    fn answered(&self) {
        if let Some(w) = &self.watch {
            w.finish(false);
        }
    }

    /// Records that the request failed after it was routed.
    fn failed(&self) {
        if let Some(w) = &self.watch {
            w.finish(true);
        }
    }

    /// After the answer: runs the request through the split's shadow arm when it was drawn,
    /// with `make` building the mirror from the kept inputs and the answer.
    fn mirror(&self, state: &SharedState, make: impl FnOnce(MirrorInput) -> Option<Mirror>) {
        if let (Some(shadow), Some((split, _)), Some(input)) =
            (&self.shadow, &self.split, self.mirror.clone())
            && let Some(mirror) = make(input)
        {
            shadow::run(state, split, shadow.clone(), mirror);
        }
    }
}

fn random_id(prefix: &str) -> String {
    use rand::Rng;
    let n: u128 = rand::rng().random();
    format!("{prefix}-{:024x}", n & ((1u128 << 96) - 1))
}

/// The id of an answer (`r-` and 24 hex digits), which `/outcomes` refers back to.
pub fn new_response_id() -> String {
    random_id("r")
}

/// The id of a server-side failure (`e-` and 24 hex digits), shown to the client and logged.
pub fn new_error_id() -> String {
    random_id("e")
}

/// A registry failure as a tenant may see it. Details such as the package's file on the server
/// go to the log only (with the error id), never into the answer.
fn registry_error(e: RegistryError, name: &str) -> ApiError {
    if e.is_unknown_adapter() {
        return ApiError::unknown_target("adapter", name);
    }
    if e.is_tier_full() {
        tracing::warn!(adapter = name, error = %e, "adapter memory full");
        return ApiError::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "memory_full",
            "the adapter memory budget is held by requests in flight; retry shortly",
        )
        .retry_after(1);
    }
    if e.package_error().is_some() {
        let id = new_error_id();
        tracing::error!(id, adapter = name, error = %e, "a stored version failed validation");
        return ApiError {
            id: Some(id.clone()),
            ..ApiError::new(
                StatusCode::UNPROCESSABLE_ENTITY,
                "invalid_package",
                format!(
                    "the stored version of adapter {name:?} failed validation and cannot serve; an operator can find why in the server log under error id {id}"
                ),
            )
        };
    }
    match e {
        RegistryError::Name(n) => ApiError::bad_request("invalid_name", n.to_string()),
        other => ApiError::internal(other.to_string()),
    }
}

/// Refuses an adapter the tenant may not use. Through a split the answer names only the split:
/// which adapter an arm serves is the operator's business, not something to show a tenant.
fn forbidden(what: String) -> ApiError {
    ApiError::new(StatusCode::FORBIDDEN, "forbidden_target", what)
}

/// Resolves the request's adapter or split for `tenant`, refusing what the tenant may not use
/// with the same answer whether the adapter exists or not.
async fn route(
    state: &SharedState,
    tenant: &Tenant,
    target: Target<'_>,
    response_id: &str,
) -> Result<Routed, ApiError> {
    let Target {
        adapter,
        split,
        subject,
        route,
    } = target;
    // The body decides; a routing header that names something else sent the request to a
    // replica chosen for another adapter, which a client should hear about.
    if let (Some(key), Some(named)) = (route, adapter.or(split))
        && key != named
    {
        return Err(ApiError::bad_request(
            "route_mismatch",
            format!(
                "the {ROUTE_HEADER} header says {key:?} but the body names {named:?}; they must agree (the body decides what runs)"
            ),
        ));
    }
    let mut recorded = None;
    let mut watch = None;
    let mut mirrored = None;
    let (name, version, split_arm) = match (adapter, split) {
        (Some(_), Some(_)) => {
            return Err(ApiError::bad_request(
                "ambiguous_target",
                "name either `adapter` or `split`, not both",
            ));
        }
        (None, None) => {
            return Err(ApiError::bad_request(
                "missing_target",
                "name an `adapter` (use \"base\" for the base model alone) or a `split`",
            ));
        }
        (Some(a), None) => (a.to_owned(), None, None),
        (None, Some(s)) => {
            if !tenant.may_use(s) {
                return Err(forbidden(format!("this key may not use split {s:?}")));
            }
            let mut assigned = state.splits.assign(s, subject);
            if assigned.is_none() {
                // Another replica may have created it a moment ago: read the shared
                // definitions once more before refusing.
                let (shared, name) = (state.clone(), s.to_owned());
                let known =
                    tokio::task::spawn_blocking(move || shared.splits.reload_for_unknown(&name))
                        .await
                        .unwrap_or(false);
                if known {
                    assigned = state.splits.assign(s, subject);
                }
            }
            let assigned = assigned.ok_or_else(|| ApiError::unknown_split(s))?;
            // From here on a failure is the arm's: the watch counts it unless the request is
            // answered.
            watch = state.splits.watch(assigned.arm_id);
            if shadow::draw(assigned.shadow.as_ref()) {
                mirrored = assigned.shadow.clone();
            }
            let arm = assigned.arm.clone();
            if arm.adapter != "base" && !tenant.may_use(&arm.adapter) {
                return Err(forbidden(format!(
                    "split {s:?} sent this request to an arm this key may not use; ask the operator to fix the split"
                )));
            }
            recorded = Some(
                state
                    .splits
                    .record_response(response_id, &assigned, &tenant.name),
            );
            state
                .metrics
                .arm_requests
                .get_or_create(&crate::metrics::ArmLabels {
                    split: s.to_owned(),
                    arm: arm.name.clone(),
                })
                .inc();
            (
                arm.adapter.clone(),
                arm.version.clone(),
                Some((s.to_owned(), arm.name.clone())),
            )
        }
    };
    if name == "base" {
        return Ok(Routed {
            handle: None,
            served_by: "base".to_owned(),
            split: split_arm,
            swap: Duration::ZERO,
            recorded,
            watch,
            shadow: mirrored,
            mirror: None,
        });
    }
    if !tenant.may_use(&name) {
        return Err(forbidden(format!("this key may not use adapter {name:?}")));
    }
    let registry = state.registry.clone();
    let start = Instant::now();
    let lookup = name.clone();
    let handle = tokio::task::spawn_blocking(move || match version {
        Some(v) => registry.resolve_version(&lookup, &v),
        None => registry.resolve(&lookup),
    })
    .await
    .map_err(|e| ApiError::internal(format!("resolving the adapter: {e}")))?
    .map_err(|e| registry_error(e, &name))?;
    let outcome = if handle.was_resident() { "hit" } else { "miss" };
    state
        .metrics
        .cache_event(switchyard_adapters::events::Tier::Factors, outcome);
    Ok(Routed {
        served_by: handle.id(),
        handle: Some(handle),
        split: split_arm,
        swap: start.elapsed(),
        recorded,
        watch,
        shadow: mirrored,
        mirror: None,
    })
}

/// The routing key header a front hashes on to send an adapter's requests to one replica.
pub const ROUTE_HEADER: &str = "Switchyard-Route";

/// The `Switchyard-Route` header's value, when present (a value that is not text is kept as
/// its lossy text, so it can only mismatch).
fn route_header(headers: &axum::http::HeaderMap) -> Option<String> {
    headers
        .get(ROUTE_HEADER)
        .map(|v| String::from_utf8_lossy(v.as_bytes()).into_owned())
}

/// What a request body names: an adapter or a split, and the subject of a sticky assignment.
#[derive(Clone, Copy)]
struct Target<'a> {
    adapter: Option<&'a str>,
    split: Option<&'a str>,
    subject: Option<&'a str>,
    /// The routing key a front (nginx) hashed on: the `Switchyard-Route` header.
    route: Option<&'a str>,
}

impl<'a> Target<'a> {
    fn of(
        adapter: &'a Option<String>,
        split: &'a Option<String>,
        subject: &'a Option<String>,
        route: &'a Option<String>,
    ) -> Self {
        Self {
            adapter: adapter.as_deref(),
            split: split.as_deref(),
            subject: subject.as_deref(),
            route: route.as_deref(),
        }
    }
}

/// What the engine's job needs from admission: its tenant's ticket, who serves it, and the
/// request's clock (started before the adapter was resolved, so the swap counts) and deadline.
struct Admission {
    ticket: Ticket,
    adapter: Option<AdapterHandle>,
    admitted: Instant,
    swap: Duration,
    deadline: Instant,
}

/// Admits the request first, then loads: checks the tenant's quota for `tokens` tokens and holds
/// a place in its lane of the queue (429 with Retry-After past the quota, the tenant's share of
/// the queue, or a full queue), and only then routes the request to `adapter@version`, which may
/// load the adapter and evict others. So a refused request never costs a load. If routing fails
/// the ticket drops and gives back its place and its tokens (the request still counts against
/// `requests_per_second`). Then it queues the job `job` builds in the held place. Both inference
/// paths, and a split's arms, admit through here.
async fn admit(
    state: &SharedState,
    tenant: &Tenant,
    target: Target<'_>,
    response_id: &str,
    tokens: u64,
    job: impl FnOnce(Admission) -> Job,
) -> Result<Routed, ApiError> {
    let ticket = state.engine.reserve(tenant.index, tokens)?;
    let mut routed = route(state, tenant, target, response_id).await?;
    let admitted = Instant::now() - routed.swap;
    state.engine.try_submit(job(Admission {
        ticket,
        adapter: routed.handle.clone(),
        admitted,
        swap: routed.swap,
        deadline: admitted + state.bounds.timeout,
    }))?;
    // The arm's record is written while the engine computes; the answer waits for it, so a
    // response id a client holds is on disk. Serving wins over bookkeeping: a failed write is
    // logged (by the log's writer) and the answer still goes out.
    if let Some(receipt) = routed.recorded.take()
        && let Err(error) = receipt.durable().await
    {
        tracing::warn!(id = response_id, %error, "answering without a durable response record");
    }
    Ok(routed)
}

fn ms(d: Duration) -> f64 {
    (d.as_secs_f64() * 1e6).round() / 1e3
}

/// Where a request's time went, in milliseconds.
#[derive(Debug, Serialize, ToSchema)]
pub struct Elapsed {
    /// Waiting in the engine's queue.
    pub queue: f64,
    /// Bringing the adapter in (0 when it was resident).
    pub swap: f64,
    /// From admission to the answer.
    pub total: f64,
    /// Generations only: from admission to the first token.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub first_token: Option<f64>,
}

impl Elapsed {
    fn of(t: &Timings) -> Self {
        Self {
            queue: ms(t.queue),
            swap: ms(t.swap),
            total: ms(t.total),
            first_token: t.first_token.map(ms),
        }
    }
}

/// The split and arm that served a request sent through a split.
#[derive(Debug, Serialize, ToSchema)]
pub struct ServedArm {
    pub split: String,
    pub arm: String,
}

fn served_arm(routed: &Routed) -> Option<ServedArm> {
    routed.split.as_ref().map(|(split, arm)| ServedArm {
        split: split.clone(),
        arm: arm.clone(),
    })
}

/// The answer of `POST /embed`.
#[derive(Debug, Serialize, ToSchema)]
pub struct EmbedAnswer {
    /// This response's id: what `POST /outcomes` takes when a split served it.
    pub id: String,
    /// `adapter@version`, or `base`.
    pub served_by: String,
    /// The split and arm, when the request named a split; else null.
    pub split: Option<ServedArm>,
    /// Whether the adapter ran merged into the base weights.
    pub merged: bool,
    /// One unit-length embedding per text, in order.
    pub embeddings: Vec<Vec<f32>>,
    pub elapsed_ms: Elapsed,
}

/// One text's classification.
#[derive(Debug, Serialize, ToSchema)]
pub struct Classified {
    /// The label with the highest score.
    pub label: String,
    /// Every label of the head with its score (softmax probabilities).
    pub scores: std::collections::BTreeMap<String, f32>,
}

/// The answer of `POST /classify`.
#[derive(Debug, Serialize, ToSchema)]
pub struct ClassifyAnswer {
    pub id: String,
    pub served_by: String,
    pub split: Option<ServedArm>,
    /// One result per text, in order.
    pub results: Vec<Classified>,
    pub elapsed_ms: Elapsed,
}

/// How a generation ended.
#[derive(Debug, Serialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Finish {
    /// The model's end-of-sequence token.
    Eos,
    /// `max_tokens` reached.
    Limit,
    /// The request's deadline passed mid-generation: the output so far.
    Deadline,
    /// One of `end_at.token_ids`.
    EndToken,
    /// One of `end_at.texts`.
    EndText,
}

impl Finish {
    fn of(stop: &Stop) -> Self {
        match stop {
            Stop::Eos => Self::Eos,
            Stop::Limit => Self::Limit,
            Stop::Deadline => Self::Deadline,
            Stop::EndToken(_) => Self::EndToken,
            Stop::EndText(_) => Self::EndText,
        }
    }
}

/// Token counts of a generation.
#[derive(Debug, Serialize, ToSchema)]
pub struct Counts {
    pub prompt_tokens: usize,
    /// Prompt tokens whose KV cache came from the prefix cache instead of a prefill.
    pub reused_prompt_tokens: usize,
    /// Tokens generated, not counting an end-of-sequence token.
    pub output_tokens: usize,
}

/// The end text (a string) or end token id (an integer) that ended a generation.
#[derive(Debug, Serialize, ToSchema)]
#[serde(untagged)]
pub enum EndedBy {
    Text(String),
    Token(u32),
}

impl EndedBy {
    fn of(stop: &Stop) -> Option<Self> {
        match stop {
            Stop::EndToken(id) => Some(Self::Token(*id)),
            Stop::EndText(text) => Some(Self::Text(text.clone())),
            Stop::Eos | Stop::Limit | Stop::Deadline => None,
        }
    }
}

/// What a finished generation's answer says of it, streamed or not.
#[derive(Debug, Serialize, ToSchema)]
pub struct Ending {
    pub id: String,
    pub served_by: String,
    pub split: Option<ServedArm>,
    pub finish: Finish,
    /// What ended it, when `finish` is `end_text` or `end_token`; else null.
    pub ended_by: Option<EndedBy>,
    pub counts: Counts,
    pub elapsed_ms: Elapsed,
}

impl Ending {
    /// How the generation `id` that `routed` served ended.
    fn of(id: &str, routed: &Routed, done: &Finished) -> Self {
        Self {
            id: id.to_owned(),
            served_by: routed.served_by.clone(),
            split: served_arm(routed),
            finish: Finish::of(&done.stop),
            ended_by: EndedBy::of(&done.stop),
            counts: Counts {
                prompt_tokens: done.prompt_tokens,
                reused_prompt_tokens: done.reused_tokens,
                output_tokens: done.output_tokens,
            },
            elapsed_ms: Elapsed::of(&done.timings),
        }
    }
}

/// The answer of `POST /generate` without `stream`.
#[derive(Debug, Serialize, ToSchema)]
pub struct GenerateAnswer {
    #[serde(flatten)]
    pub ending: Ending,
    /// The output, decoded as a whole (without the end text that ended it).
    pub text: String,
    /// The generated token ids, in order.
    pub token_ids: Vec<u32>,
}

/// The data of a `token` event of a streamed generation.
#[derive(Debug, Serialize, ToSchema)]
pub struct TokenEvent {
    /// The text this token adds (may be empty while a character is incomplete).
    pub text: String,
    pub token_id: u32,
}

/// The data of the `done` event that ends a streamed generation.
#[derive(Debug, Serialize, ToSchema)]
pub struct DoneEvent {
    #[serde(flatten)]
    pub ending: Ending,
    /// Text not yet sent in a `token` event (usually empty).
    pub tail: String,
}

/// The data of the `error` event that ends a streamed generation which failed after it began.
#[derive(Debug, Serialize, ToSchema)]
pub struct ErrorEvent {
    #[schema(schema_with = crate::http::error::error_code_schema)]
    pub code: &'static str,
    pub message: String,
}

/// Logs and counts a request answered with an error before any adapter served it (refused by a
/// bound, a quota or a check, or unknown): counted under the adapter it named, when it named a
/// well-formed one, so each adapter's error rate includes its refusals (the series stay bounded
/// by `metrics.adapter_series`).
fn finish_refused(
    state: &SharedState,
    endpoint: &str,
    id: &str,
    asked: Option<&str>,
    status: u16,
    start: Instant,
) {
    let label = asked
        .filter(|a| *a == "base" || AdapterName::new(a).is_ok())
        .unwrap_or("-");
    state.metrics.count_request(endpoint, label, status);
    state.history.request(None, status);
    tracing::info!(
        id,
        endpoint,
        served_by = "-",
        adapter = label,
        status,
        total_ms = ms(start.elapsed()),
        "request"
    );
}

/// Logs the one line a request gets, and counts it.
fn finish(
    state: &SharedState,
    endpoint: &str,
    id: &str,
    served_by: &str,
    status: u16,
    start: Instant,
) {
    state.metrics.count_request(endpoint, served_by, status);
    let adapter = served_by.split_once('@').map(|(name, _)| name);
    state.history.request(adapter, status);
    tracing::info!(
        id,
        endpoint,
        served_by,
        status,
        total_ms = ms(start.elapsed()),
        "request"
    );
}

/// The body of `POST /embed` and `POST /classify`: name an adapter (or `base`), or a split and
/// the subject whose assignment is sticky; neither means the base model.
#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
#[schema(example = json!({"adapter": "north-routing", "texts": ["the rear brake squeals"]}))]
pub struct EmbedBody {
    /// An adapter name, or `base`; the tenant's key must reach it.
    #[schema(pattern = r"^[a-z0-9]+(-[a-z0-9]+)*$", max_length = 64)]
    pub adapter: Option<String>,
    /// A split name, instead of `adapter`.
    #[schema(pattern = r"^[a-z0-9]+(-[a-z0-9]+)*$", max_length = 64)]
    pub split: Option<String>,
    /// With `split`: who the request is for; the same subject always gets the same arm.
    pub subject: Option<String>,
    /// The texts, at most `bounds.texts_per_request` of them.
    pub texts: Vec<String>,
    /// The `Switchyard-Route` header, when the request carried one (not a body field).
    #[serde(skip)]
    pub route: Option<String>,
}

fn too_large(code: &'static str, message: String) -> ApiError {
    ApiError::new(StatusCode::PAYLOAD_TOO_LARGE, code, message)
}

/// Refuses a text over the byte bound before any tokenizer time is spent on it.
fn check_text_bytes(bounds: &Bounds, field: &str, text: &str) -> Result<(), ApiError> {
    let limit = bounds.text_bytes;
    if text.len() > limit {
        return Err(too_large(
            "text_too_large",
            format!(
                "{field} is {} bytes; the limit is {limit} bytes",
                text.len()
            ),
        ));
    }
    Ok(())
}

/// Runs the tokenizer on the blocking pool: a long text must not hold an async worker (and with
/// it health checks and every other request on that worker).
async fn off_the_runtime<T: Send + 'static>(
    f: impl FnOnce() -> anyhow::Result<T> + Send + 'static,
) -> Result<T, ApiError> {
    tokio::task::spawn_blocking(f)
        .await
        .map_err(|e| ApiError::internal(format!("tokenising task failed: {e}")))?
        .map_err(|err| ApiError::bad_request("untokenizable", format!("{err:#}")))
}

impl EmbedBody {
    /// The checks on the body alone, before anything is tokenised (the fuzz target
    /// `http_bodies` runs them too): texts present, not too many, none over the byte bound.
    pub fn check(&self, bounds: &Bounds) -> Result<(), ApiError> {
        if self.texts.is_empty() {
            return Err(ApiError::bad_request("no_texts", "field `texts` is empty"));
        }
        if self.texts.len() > bounds.texts_per_request {
            return Err(too_large(
                "too_many_texts",
                format!(
                    "{} texts in one request; the limit is {}",
                    self.texts.len(),
                    bounds.texts_per_request
                ),
            ));
        }
        for (i, text) in self.texts.iter().enumerate() {
            check_text_bytes(bounds, &format!("texts[{i}]"), text)?;
        }
        Ok(())
    }
}

fn encoder(state: &SharedState, endpoint: &str) -> Result<(), ApiError> {
    match &*state.backbone {
        Backbone::Encoder(_) => Ok(()),
        Backbone::Decoder(_) => Err(ApiError::bad_request(
            "wrong_model_family",
            format!(
                "/{endpoint} needs an encoder base model; this server runs a decoder (use /generate)"
            ),
        )),
    }
}

async fn run_embed(
    state: &SharedState,
    tenant: &Tenant,
    body: EmbedBody,
    endpoint: &str,
    id: &str,
) -> Result<(Routed, crate::engine::EmbedOutput), ApiError> {
    encoder(state, endpoint)?;
    body.check(&state.bounds)?;
    // A tenant whose share of the queue is full is refused before its texts are tokenised.
    state.engine.check_room(tenant.index)?;
    let backbone = state.backbone.clone();
    let texts = body.texts;
    let (ids, counts) = off_the_runtime(move || {
        let Backbone::Encoder(e) = &*backbone else {
            unreachable!("checked above")
        };
        let refs: Vec<&str> = texts.iter().map(String::as_str).collect();
        e.tokenize_counted(&refs)
    })
    .await?;
    if let Some((i, n)) = counts
        .iter()
        .enumerate()
        .find(|(_, n)| **n > state.bounds.prompt_tokens)
    {
        return Err(too_large(
            "too_many_tokens",
            format!(
                "texts[{i}] is {n} tokens; the limit is {}",
                state.bounds.prompt_tokens
            ),
        ));
    }
    let (reply, rx) = oneshot::channel();
    let target = Target::of(&body.adapter, &body.split, &body.subject, &body.route);
    let tokens = ids.iter().map(|t| t.len() as u64).sum();
    // Kept for a shadow arm's mirror (only a split request can be mirrored).
    let kept = body.split.is_some().then(|| ids.clone());
    let mut routed = admit(state, tenant, target, id, tokens, |a| {
        Job::Embed(EmbedJob {
            ticket: a.ticket,
            ids,
            adapter: a.adapter,
            admitted: a.admitted,
            swap: a.swap,
            deadline: a.deadline,
            reply,
        })
    })
    .await?;
    if routed.shadow.is_some() {
        routed.mirror = kept.map(MirrorInput::Texts);
    }
    // The engine finishes every job it holds, also when shutting down; a reply that never
    // comes means the batch failed inside the engine (logged there).
    let out = rx
        .await
        .map_err(|_| ApiError::internal("the engine dropped an embedding job"))??;
    Ok((routed, out))
}

/// `POST /embed`: one unit-length embedding per text.
#[utoipa::path(
    post,
    path = "/embed",
    operation_id = "embed",
    tag = "inference",
    params(
        ("Switchyard-Route" = Option<String>, Header, description = "The routing key a front hashed on; when sent it must name the body's adapter or split"),
    ),
    request_body = EmbedBody,
    responses((status = 200, description = "One embedding per text", body = EmbedAnswer)),
    security(("tenant_key" = [])),
)]
pub async fn embed(
    State(state): State<SharedState>,
    Extension(tenant): Extension<Arc<Tenant>>,
    headers: axum::http::HeaderMap,
    ApiJson(mut body): ApiJson<EmbedBody>,
) -> Response {
    body.route = route_header(&headers);
    let start = Instant::now();
    let id = new_response_id();
    let asked = body.adapter.clone();
    match run_embed(&state, &tenant, body, "embed", &id).await {
        Ok((routed, out)) => {
            routed.answered();
            finish(&state, "embed", &id, &routed.served_by, 200, start);
            routed.mirror(&state, |input| match input {
                MirrorInput::Texts(ids) => Some(Mirror::Embed {
                    ids,
                    answer: out.embeddings.clone(),
                }),
                MirrorInput::Prompt { .. } => None,
            });
            Json(EmbedAnswer {
                split: served_arm(&routed),
                id,
                served_by: routed.served_by,
                merged: out.merged,
                embeddings: out.embeddings,
                elapsed_ms: Elapsed::of(&out.timings),
            })
            .into_response()
        }
        Err(e) => {
            finish_refused(
                &state,
                "embed",
                &id,
                asked.as_deref(),
                e.status.as_u16(),
                start,
            );
            e.into_response()
        }
    }
}

/// `POST /classify`: a label and per-label scores per text, from the adapter's head.
#[utoipa::path(
    post,
    path = "/classify",
    operation_id = "classify",
    tag = "inference",
    params(
        ("Switchyard-Route" = Option<String>, Header, description = "The routing key a front hashed on; when sent it must name the body's adapter or split"),
    ),
    request_body = EmbedBody,
    responses((status = 200, description = "A label and scores per text", body = ClassifyAnswer)),
    security(("tenant_key" = [])),
)]
pub async fn classify(
    State(state): State<SharedState>,
    Extension(tenant): Extension<Arc<Tenant>>,
    headers: axum::http::HeaderMap,
    ApiJson(mut body): ApiJson<EmbedBody>,
) -> Response {
    body.route = route_header(&headers);
    let start = Instant::now();
    let id = new_response_id();
    let asked = body.adapter.clone();
    let result = async {
        if body.adapter.as_deref() == Some("base") {
            return Err(ApiError::bad_request(
                "not_a_classifier",
                "the base model has no classification head; name an adapter that carries one",
            ));
        }
        let (routed, out) = run_embed(&state, &tenant, body, "classify", &id).await?;
        let head = routed
            .handle
            .as_ref()
            .and_then(|h| h.adapter().head.clone())
            .ok_or_else(|| {
                ApiError::bad_request(
                    "not_a_classifier",
                    format!("{} carries no classification head", routed.served_by),
                )
            })?;
        let results: Vec<Classified> = out
            .embeddings
            .iter()
            .map(|e| {
                let scores = crate::model::classify::scores(e, &head).unwrap_or_default();
                let best = crate::model::sampling::argmax(&scores) as usize;
                Classified {
                    label: head.labels.get(best).cloned().unwrap_or_default(),
                    scores: head.labels.iter().cloned().zip(scores).collect(),
                }
            })
            .collect();
        Ok((routed, out.timings, results))
    }
    .await;
    match result {
        Ok((routed, timings, results)) => {
            routed.answered();
            finish(&state, "classify", &id, &routed.served_by, 200, start);
            routed.mirror(&state, |input| match input {
                MirrorInput::Texts(ids) => Some(Mirror::Classify {
                    ids,
                    labels: results.iter().map(|r| r.label.clone()).collect(),
                }),
                MirrorInput::Prompt { .. } => None,
            });
            Json(ClassifyAnswer {
                split: served_arm(&routed),
                id,
                served_by: routed.served_by,
                results,
                elapsed_ms: Elapsed::of(&timings),
            })
            .into_response()
        }
        Err(e) => {
            finish_refused(
                &state,
                "classify",
                &id,
                asked.as_deref(),
                e.status.as_u16(),
                start,
            );
            e.into_response()
        }
    }
}

/// Tokens a generation produces when the request gives no `max_tokens` (or the bound, if lower).
pub const DEFAULT_MAX_TOKENS: usize = 64;

/// The body of `POST /generate`: `prompt` or `messages`, and the adapter or split as for
/// `/embed`.
#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
#[schema(example = json!({"adapter": "base", "prompt": "The chain slipped because", "max_tokens": 8}))]
pub struct GenerateBody {
    /// An adapter name, or `base`; the tenant's key must reach it.
    #[schema(pattern = r"^[a-z0-9]+(-[a-z0-9]+)*$", max_length = 64)]
    pub adapter: Option<String>,
    /// A split name, instead of `adapter`.
    #[schema(pattern = r"^[a-z0-9]+(-[a-z0-9]+)*$", max_length = 64)]
    pub split: Option<String>,
    /// With `split`: who the request is for; the same subject always gets the same arm.
    pub subject: Option<String>,
    /// The prompt text, or (instead) `messages`.
    pub prompt: Option<String>,
    /// A conversation, rendered with the checkpoint's chat template.
    pub messages: Option<Vec<ChatMessage>>,
    /// Most tokens to generate (default 64, at most `bounds.generated_tokens`).
    pub max_tokens: Option<usize>,
    /// Sampling temperature; absent or 0: greedy.
    pub temperature: Option<f64>,
    /// Nucleus sampling: keep the smallest set of tokens whose probability reaches this.
    pub top_p: Option<f64>,
    /// The same seed gives the same output.
    pub seed: Option<u64>,
    /// Answer as server-sent events (`token`, then `done` or `error`) instead of one JSON object.
    #[serde(default)]
    pub stream: bool,
    /// Texts and token ids that end the generation; neither is part of the output.
    pub end_at: Option<EndAtBody>,
    /// The `Switchyard-Route` header, when the request carried one (not a body field).
    #[serde(skip)]
    pub route: Option<String>,
}

/// `end_at` in a generate request.
#[derive(Debug, Default, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct EndAtBody {
    #[serde(default)]
    pub texts: Vec<String>,
    #[serde(default)]
    pub token_ids: Vec<u32>,
}

/// The most end texts one request may give, and the longest one in bytes.
pub const MAX_END_TEXTS: usize = 8;
pub const MAX_END_TEXT_BYTES: usize = 256;
/// The most messages one generate request may give.
pub const MAX_MESSAGES: usize = 256;
/// The most end token ids one request may give.
pub const MAX_END_TOKENS: usize = 32;

impl EndAtBody {
    /// The request's end texts and token ids, checked (token ids against the vocabulary later,
    /// when the model is known).
    pub fn check(&self) -> Result<EndAt, ApiError> {
        let bad = |m: String| ApiError::bad_request("invalid_end_at", m);
        if self.texts.len() > MAX_END_TEXTS {
            return Err(bad(format!(
                "end_at.texts has {} texts; the limit is {MAX_END_TEXTS}",
                self.texts.len()
            )));
        }
        for (i, t) in self.texts.iter().enumerate() {
            if t.is_empty() || t.len() > MAX_END_TEXT_BYTES {
                return Err(bad(format!(
                    "end_at.texts[{i}] is {} bytes; expected 1 to {MAX_END_TEXT_BYTES}",
                    t.len()
                )));
            }
        }
        if self.token_ids.len() > MAX_END_TOKENS {
            return Err(bad(format!(
                "end_at.token_ids has {} ids; the limit is {MAX_END_TOKENS}",
                self.token_ids.len()
            )));
        }
        Ok(EndAt {
            texts: self.texts.clone(),
            token_ids: self.token_ids.clone(),
        })
    }
}

impl GenerateBody {
    /// The checks on the body alone, before the prompt is tokenised (the fuzz target
    /// `http_bodies` runs them too): the output token limit and the sampling parameters.
    /// The prompt's byte bound is checked here too, so nothing is tokenised for a huge one.
    pub fn check(&self, bounds: &Bounds) -> Result<(usize, SamplingParams), ApiError> {
        let most = bounds.generated_tokens;
        let limit = self.max_tokens.unwrap_or(DEFAULT_MAX_TOKENS.min(most));
        if limit == 0 || limit > most {
            return Err(ApiError::bad_request(
                "invalid_max_tokens",
                format!("max_tokens {limit} is out of range: expected 1 to {most}"),
            ));
        }
        // The description says int64, as most clients' integers are: a larger seed is refused
        // rather than taken silently.
        if let Some(seed) = self.seed.filter(|&s| s > i64::MAX as u64) {
            return Err(ApiError::bad_request(
                "invalid_sampling",
                format!("seed {seed} is out of range: expected 0 to {}", i64::MAX),
            ));
        }
        let sampling = SamplingParams {
            temperature: self.temperature,
            top_p: self.top_p.unwrap_or(1.0),
            seed: self.seed.unwrap_or(0),
        };
        sampling
            .validate()
            .map_err(|m| ApiError::bad_request("invalid_sampling", m))?;
        match (&self.prompt, &self.messages) {
            (Some(prompt), None) => check_text_bytes(bounds, "prompt", prompt)?,
            (None, Some(messages)) => {
                if messages.is_empty() || messages.len() > MAX_MESSAGES {
                    return Err(ApiError::bad_request(
                        "invalid_messages",
                        format!(
                            "messages has {} entries; expected 1 to {MAX_MESSAGES}",
                            messages.len()
                        ),
                    ));
                }
                let bytes: usize = messages
                    .iter()
                    .map(|m| m.role.len() + m.content.len())
                    .sum();
                if bytes > bounds.text_bytes {
                    return Err(too_large(
                        "text_too_large",
                        format!(
                            "messages are {bytes} bytes (roles and contents); the limit is {} bytes",
                            bounds.text_bytes
                        ),
                    ));
                }
            }
            (Some(_), Some(_)) => {
                return Err(ApiError::bad_request(
                    "invalid_messages",
                    "give either prompt or messages, not both",
                ));
            }
            (None, None) => {
                return Err(ApiError::bad_request(
                    "invalid_messages",
                    "give a prompt (text) or messages (a list of role and content)",
                ));
            }
        }
        if let Some(end_at) = &self.end_at {
            end_at.check()?;
        }
        Ok((limit, sampling))
    }
}

/// `POST /generate`: a continuation, as one JSON answer or (with `"stream": true`) an SSE
/// stream of `token` events closed by a `done` event with counts and elapsed times.
#[utoipa::path(
    post,
    path = "/generate",
    operation_id = "generate",
    tag = "inference",
    params(
        ("Switchyard-Route" = Option<String>, Header, description = "The routing key a front hashed on; when sent it must name the body's adapter or split"),
    ),
    request_body = GenerateBody,
    responses((status = 200, description = "The generation: one JSON object, or with `stream` server-sent events: `token` events (data: TokenEvent), then one `done` (data: DoneEvent) or `error` (data: ErrorEvent)", content(
        (GenerateAnswer = "application/json"),
        (String = "text/event-stream"),
    ))),
    security(("tenant_key" = [])),
)]
pub async fn generate(
    State(state): State<SharedState>,
    Extension(tenant): Extension<Arc<Tenant>>,
    headers: axum::http::HeaderMap,
    ApiJson(mut body): ApiJson<GenerateBody>,
) -> Response {
    body.route = route_header(&headers);
    let start = Instant::now();
    let id = new_response_id();
    let stream = body.stream;
    let asked = body.adapter.clone();
    match start_generation(&state, &tenant, body, &id).await {
        Err(e) => {
            finish_refused(
                &state,
                "generate",
                &id,
                asked.as_deref(),
                e.status.as_u16(),
                start,
            );
            e.into_response()
        }
        Ok((routed, rx)) if stream => stream_answer(state, id, routed, rx, start).into_response(),
        Ok((routed, rx)) => whole_answer(&state, &id, &routed, rx, start)
            .await
            .into_response(),
    }
}

/// The non-streamed answer: the engine's events gathered into one JSON object. The `text` is the
/// decoded output as a whole (the `done` event carries it), not the streamed pieces joined.
async fn whole_answer(
    state: &SharedState,
    id: &str,
    routed: &Routed,
    mut rx: mpsc::UnboundedReceiver<GenEvent>,
    start: Instant,
) -> Response {
    let mut tokens = Vec::new();
    let failure = loop {
        match rx.recv().await {
            Some(GenEvent::Token { id: t, .. }) => tokens.push(t),
            Some(GenEvent::Done(done)) => {
                routed.answered();
                finish(state, "generate", id, &routed.served_by, 200, start);
                routed.mirror(state, |input| generate_mirror(input, &tokens));
                return Json(GenerateAnswer {
                    ending: Ending::of(id, routed, &done),
                    text: done.text,
                    token_ids: tokens,
                })
                .into_response();
            }
            Some(GenEvent::Failed(e)) => break ApiError::from(e),
            None => break ApiError::internal("the engine dropped a generation"),
        }
    };
    routed.failed();
    finish(
        state,
        "generate",
        id,
        &routed.served_by,
        failure.status.as_u16(),
        start,
    );
    failure.into_response()
}

async fn start_generation(
    state: &SharedState,
    tenant: &Tenant,
    body: GenerateBody,
    id: &str,
) -> Result<(Routed, mpsc::UnboundedReceiver<GenEvent>), ApiError> {
    let Backbone::Decoder(g) = &*state.backbone else {
        return Err(ApiError::bad_request(
            "wrong_model_family",
            "/generate needs a decoder base model; this server runs an encoder (use /embed or /classify)",
        ));
    };
    let (limit, sampling) = body.check(&state.bounds)?;
    let end_at = body
        .end_at
        .as_ref()
        .map(EndAtBody::check)
        .transpose()?
        .unwrap_or_default();
    let vocab = g.model().config.vocab_size;
    if let Some((i, id)) = end_at
        .token_ids
        .iter()
        .enumerate()
        .find(|&(_, &id)| id as usize >= vocab)
    {
        return Err(ApiError::bad_request(
            "invalid_end_at",
            format!(
                "end_at.token_ids[{i}] is {id}; this model's token ids are 0 to {}",
                vocab - 1
            ),
        ));
    }
    // A tenant whose share of the queue is full is refused before its prompt is tokenised.
    state.engine.check_room(tenant.index)?;
    let positions = g.model().config.max_position_embeddings;
    let backbone = state.backbone.clone();
    let prompt_ids = match (body.prompt, body.messages) {
        (Some(prompt), _) => {
            off_the_runtime(move || {
                let Backbone::Decoder(g) = &*backbone else {
                    unreachable!("checked above")
                };
                g.encode(&prompt)
            })
            .await?
        }
        (None, messages) => {
            let messages = messages.unwrap_or_default();
            if g.chat_template().is_none() {
                return Err(ApiError::bad_request(
                    "no_chat_template",
                    "this model has no chat template (no chat_template.jinja, and no chat_template in its tokenizer_config.json): send a prompt instead of messages",
                ));
            }
            let rendered = off_the_runtime(move || {
                let Backbone::Decoder(g) = &*backbone else {
                    unreachable!("checked above")
                };
                let template = g.chat_template().expect("checked above");
                Ok(template
                    .render(&messages)
                    .and_then(|text| g.encode_rendered(&text).map_err(|e| e.to_string())))
            })
            .await?;
            rendered.map_err(|m| ApiError::bad_request("invalid_messages", m))?
        }
    };
    if prompt_ids.is_empty() {
        return Err(ApiError::bad_request(
            "empty_prompt",
            "the prompt gives no tokens",
        ));
    }
    let (bound, n) = (state.bounds.prompt_tokens, prompt_ids.len());
    if n > bound {
        return Err(too_large(
            "too_many_tokens",
            format!(
                "the prompt is {n} tokens, {} over this server's limit of {bound} (bounds.prompt_tokens)",
                n - bound
            ),
        ));
    }
    if n + limit > positions {
        return Err(too_large(
            "too_many_tokens",
            format!(
                "the prompt ({n} tokens) plus max_tokens ({limit}) is {} tokens, {} over the model's context of {positions} positions; lower max_tokens to {} or less",
                n + limit,
                n + limit - positions,
                positions.saturating_sub(n),
            ),
        ));
    }
    let kv_budget = state.engine.kv_budget_bytes();
    let per_position = g.model().kv_bytes_per_position();
    let kv_need = (prompt_ids.len() + limit) as u64 * per_position;
    if kv_budget > 0 && kv_need > kv_budget {
        return Err(too_large(
            "kv_budget_exceeded",
            format!(
                "this generation needs {kv_need} bytes of KV cache ({} positions of prompt and max_tokens, {per_position} bytes each); the engine's kv_budget_bytes is {kv_budget}, so prompt plus max_tokens may be at most {} positions",
                prompt_ids.len() + limit,
                kv_budget / per_position
            ),
        ));
    }
    let (tx, rx) = mpsc::unbounded_channel();
    let target = Target::of(&body.adapter, &body.split, &body.subject, &body.route);
    // The most the generation can use: its prompt and max_tokens; what it does not generate is
    // given back when it ends.
    let tokens = (prompt_ids.len() + limit) as u64;
    let kept = body.split.is_some().then(|| MirrorInput::Prompt {
        prompt_ids: prompt_ids.clone(),
        sampling,
        limit,
        end_at: end_at.clone(),
    });
    let mut routed = admit(state, tenant, target, id, tokens, |a| {
        Job::Generate(GenerateJob {
            ticket: a.ticket,
            prompt_ids,
            adapter: a.adapter,
            sampling,
            limit,
            end_at,
            admitted: a.admitted,
            swap: a.swap,
            deadline: a.deadline,
            events: tx,
        })
    })
    .await?;
    if routed.shadow.is_some() {
        routed.mirror = kept;
    }
    Ok((routed, rx))
}

fn stream_answer(
    state: SharedState,
    id: String,
    routed: Routed,
    mut rx: mpsc::UnboundedReceiver<GenEvent>,
    start: Instant,
) -> Sse<impl futures_util::Stream<Item = Result<Event, Infallible>>> {
    let routed = Arc::new(routed);
    let stream = async_stream_of(move |tx: mpsc::UnboundedSender<Event>| async move {
        // The token ids sent, for a shadow arm's mirror.
        let mut streamed = Vec::new();
        while let Some(ev) = rx.recv().await {
            let event = match ev {
                GenEvent::Token { id: t, text } => {
                    if routed.shadow.is_some() {
                        streamed.push(t);
                    }
                    Event::default()
                        .event("token")
                        .json_data(TokenEvent { text, token_id: t })
                }
                GenEvent::Done(done) => {
                    routed.answered();
                    finish(&state, "generate", &id, &routed.served_by, 200, start);
                    routed.mirror(&state, |input| generate_mirror(input, &streamed));
                    let e = Event::default().event("done").json_data(DoneEvent {
                        ending: Ending::of(&id, &routed, &done),
                        tail: done.tail,
                    });
                    let _ = tx.send(e.expect("json"));
                    return;
                }
                GenEvent::Failed(err) => {
                    let err = ApiError::from(err);
                    routed.failed();
                    finish(
                        &state,
                        "generate",
                        &id,
                        &routed.served_by,
                        err.status.as_u16(),
                        start,
                    );
                    let e = Event::default().event("error").json_data(ErrorEvent {
                        code: err.code,
                        message: err.message,
                    });
                    let _ = tx.send(e.expect("json"));
                    return;
                }
            };
            if tx.send(event.expect("json")).is_err() {
                // The client went away: dropping rx tells the engine to stop this sequence. Not
                // the arm's failure, so its guards do not count it.
                if let Some(w) = &routed.watch {
                    w.abandon();
                }
                return;
            }
        }
    });
    Sse::new(stream).keep_alive(KeepAlive::default())
}

/// The mirror of a generation whose answer was `tokens`.
fn generate_mirror(input: MirrorInput, tokens: &[u32]) -> Option<Mirror> {
    match input {
        MirrorInput::Prompt {
            prompt_ids,
            sampling,
            limit,
            end_at,
        } => Some(Mirror::Generate {
            prompt_ids,
            sampling,
            limit,
            end_at,
            answer: tokens.to_vec(),
        }),
        MirrorInput::Texts(_) => None,
    }
}

/// A stream fed by a task; when the client disconnects the stream is dropped, the task's sends
/// fail, and the task ends, dropping its engine receiver.
fn async_stream_of<F, Fut>(f: F) -> impl futures_util::Stream<Item = Result<Event, Infallible>>
where
    F: FnOnce(mpsc::UnboundedSender<Event>) -> Fut,
    Fut: std::future::Future<Output = ()> + Send + 'static,
{
    let (tx, rx) = mpsc::unbounded_channel();
    tokio::spawn(f(tx));
    futures_util::StreamExt::map(tokio_stream::wrappers::UnboundedReceiverStream::new(rx), Ok)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn bounds() -> Bounds {
        Bounds {
            inference_body_bytes: 1 << 20,
            upload_body_bytes: 1 << 20,
            text_bytes: 1000,
            prompt_tokens: 100,
            generated_tokens: 100,
            texts_per_request: 8,
            timeout: Duration::from_secs(10),
        }
    }

    /// Each way the engine stops a generation reads as the `finish` the README lists (a
    /// deadline once read as `limit` while the answers were being typed), with `ended_by` only
    /// for an end token or end text.
    #[test]
    fn every_stop_reads_as_its_documented_finish_and_ended_by() {
        for (stop, finish, ended_by) in [
            (Stop::Eos, "eos", serde_json::Value::Null),
            (Stop::Limit, "limit", serde_json::Value::Null),
            (Stop::Deadline, "deadline", serde_json::Value::Null),
            (Stop::EndToken(7), "end_token", serde_json::json!(7)),
            (
                Stop::EndText("##".into()),
                "end_text",
                serde_json::json!("##"),
            ),
        ] {
            assert_eq!(serde_json::json!(Finish::of(&stop)), finish, "{stop:?}");
            assert_eq!(serde_json::json!(EndedBy::of(&stop)), ended_by, "{stop:?}");
        }
    }

    /// Found by the API fuzzer: a seed above the int64 range the description gives was taken.
    #[test]
    fn a_seed_beyond_int64_is_refused_naming_the_range() {
        let body = |seed: u64| -> GenerateBody {
            serde_json::from_value(serde_json::json!({"prompt": "the chain", "seed": seed}))
                .unwrap()
        };
        assert!(body(i64::MAX as u64).check(&bounds()).is_ok());
        let refused = body(1 << 63).check(&bounds()).unwrap_err();
        assert_eq!(refused.code, "invalid_sampling");
        assert!(
            refused.message.contains("9223372036854775807"),
            "{}",
            refused.message
        );
    }
}
