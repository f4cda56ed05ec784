//! The inference endpoints. Each request names an adapter (or `base`) or a split; the name is
//! resolved to `adapter@version` once, here at admission, and the handle travels with the job,
//! so a version published meanwhile never mixes into this answer. Each answer says who served
//! it (and which arm of a split) and its timings.

use std::convert::Infallible;
use std::sync::Arc;
use std::time::{Duration, Instant};

use axum::Json;
use axum::extract::State;
use axum::http::HeaderMap;
use axum::response::sse::{Event, KeepAlive, Sse};
use axum::response::{IntoResponse, Response};
use serde::Deserialize;
use serde_json::{Value, json};
use switchyard_adapters::registry::{AdapterHandle, RegistryError};
use tokio::sync::{mpsc, oneshot};

use crate::engine::{Backbone, EmbedJob, EngineError, GenEvent, GenerateJob, Job, Ticket, Timings};
use crate::http::SharedState;
use crate::http::auth::Tenant;
use crate::http::error::ApiError;
use crate::http::extract::ApiJson;
use crate::http::splits::authorization;
use crate::model::sampling::SamplingParams;

/// Who serves a request, fixed at admission.
pub struct Routed {
    pub handle: Option<AdapterHandle>,
    pub served_by: String,
    pub split: Option<(String, String)>,
    pub swap: Duration,
}

pub fn new_response_id() -> String {
    use rand::Rng;
    let n: u128 = rand::rng().random();
    format!("r-{:024x}", n & ((1u128 << 96) - 1))
}

fn registry_error(e: RegistryError, name: &str) -> ApiError {
    if e.is_unknown_adapter() {
        return ApiError::unknown_target("adapter", name);
    }
    if e.package_error().is_some() {
        return ApiError::new(
            axum::http::StatusCode::UNPROCESSABLE_ENTITY,
            "invalid_package",
            e.to_string(),
        );
    }
    match e {
        RegistryError::Name(_) => ApiError::bad_request("invalid_name", e.to_string()),
        other => ApiError::internal(other.to_string()),
    }
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
    } = target;
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
                return Err(ApiError::new(
                    axum::http::StatusCode::FORBIDDEN,
                    "forbidden_target",
                    format!("this key may not use split {s:?}"),
                ));
            }
            let (index, arm) = state
                .splits
                .assign(s, subject)
                .ok_or_else(|| ApiError::unknown_target("split", s))?;
            state.splits.remember(response_id, s, index);
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
        });
    }
    if !tenant.may_use(&name) {
        return Err(ApiError::new(
            axum::http::StatusCode::FORBIDDEN,
            "forbidden_target",
            format!("this key may not use adapter {name:?}"),
        ));
    }
    let registry = state.registry.clone();
    let start = Instant::now();
    let loads_before = registry.load_count();
    let lookup = name.clone();
    let handle = tokio::task::spawn_blocking(move || match version {
        Some(v) => registry.resolve_version(&lookup, &v),
        None => registry.resolve(&lookup),
    })
    .await
    .map_err(|e| ApiError::internal(format!("resolving the adapter: {e}")))?
    .map_err(|e| registry_error(e, &name))?;
    let outcome = if state.registry.load_count() > loads_before {
        "miss"
    } else {
        "hit"
    };
    state
        .metrics
        .cache_event(switchyard_adapters::events::Tier::Factors, outcome);
    Ok(Routed {
        served_by: handle.id(),
        handle: Some(handle),
        split: split_arm,
        swap: start.elapsed(),
    })
}

/// What a request body names: an adapter or a split, and the subject of a sticky assignment.
#[derive(Clone, Copy)]
struct Target<'a> {
    adapter: Option<&'a str>,
    split: Option<&'a str>,
    subject: Option<&'a str>,
}

impl<'a> Target<'a> {
    fn of(
        adapter: &'a Option<String>,
        split: &'a Option<String>,
        subject: &'a Option<String>,
    ) -> Self {
        Self {
            adapter: adapter.as_deref(),
            split: split.as_deref(),
            subject: subject.as_deref(),
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

/// Checks the tenant's quota for a request of `tokens` tokens, routes the request to
/// `adapter@version` and submits the job `job` builds (429 with Retry-After past the quota, the
/// tenant's share of the queue, or a full queue). Both inference paths admit through here.
async fn admit(
    state: &SharedState,
    tenant: &Tenant,
    target: Target<'_>,
    response_id: &str,
    tokens: u64,
    job: impl FnOnce(Admission) -> Job,
) -> Result<Routed, ApiError> {
    let ticket = state.engine.reserve(tenant.index, tokens)?;
    let routed = route(state, tenant, target, response_id).await?;
    let admitted = Instant::now() - routed.swap;
    state.engine.try_submit(job(Admission {
        ticket,
        adapter: routed.handle.clone(),
        admitted,
        swap: routed.swap,
        deadline: admitted + state.limits.timeout,
    }))?;
    Ok(routed)
}

fn ms(d: Duration) -> f64 {
    (d.as_secs_f64() * 1e6).round() / 1e3
}

fn timings_json(t: &Timings) -> Value {
    let mut v = json!({"queue_ms": ms(t.queue), "swap_ms": ms(t.swap), "total_ms": ms(t.total)});
    if let Some(f) = t.first_token {
        v["first_token_ms"] = json!(ms(f));
    }
    v
}

fn arm_json(routed: &Routed) -> Value {
    match &routed.split {
        Some((split, arm)) => json!({"split": split, "arm": arm}),
        None => Value::Null,
    }
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
    tracing::info!(
        id,
        endpoint,
        served_by,
        status,
        total_ms = ms(start.elapsed()),
        "request"
    );
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct EmbedBody {
    pub adapter: Option<String>,
    pub split: Option<String>,
    pub subject: Option<String>,
    pub texts: Vec<String>,
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
    headers: &HeaderMap,
    body: EmbedBody,
    endpoint: &str,
    id: &str,
) -> Result<(Routed, crate::engine::EmbedOutput), ApiError> {
    let tenant = state.tenants.authenticate(authorization(headers))?;
    encoder(state, endpoint)?;
    if body.texts.is_empty() {
        return Err(ApiError::bad_request("no_texts", "field `texts` is empty"));
    }
    if body.texts.len() > state.limits.max_texts {
        return Err(ApiError::new(
            axum::http::StatusCode::PAYLOAD_TOO_LARGE,
            "too_many_texts",
            format!(
                "{} texts in one request; the limit is {}",
                body.texts.len(),
                state.limits.max_texts
            ),
        ));
    }
    let Backbone::Encoder(e) = &*state.backbone else {
        unreachable!()
    };
    let refs: Vec<&str> = body.texts.iter().map(String::as_str).collect();
    let (ids, counts) = e
        .tokenize_counted(&refs)
        .map_err(|err| ApiError::bad_request("untokenizable", format!("{err:#}")))?;
    if let Some((i, n)) = counts
        .iter()
        .enumerate()
        .find(|(_, n)| **n > state.limits.max_input_tokens)
    {
        return Err(ApiError::new(
            axum::http::StatusCode::PAYLOAD_TOO_LARGE,
            "too_many_tokens",
            format!(
                "texts[{i}] is {n} tokens; the limit is {}",
                state.limits.max_input_tokens
            ),
        ));
    }
    let (reply, rx) = oneshot::channel();
    let target = Target::of(&body.adapter, &body.split, &body.subject);
    let tokens = ids.iter().map(|t| t.len() as u64).sum();
    let routed = admit(state, &tenant, target, id, tokens, |a| {
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
    let out = rx
        .await
        .map_err(|_| ApiError::from(EngineError::ShuttingDown))??;
    Ok((routed, out))
}

/// `POST /embed`: one unit-length embedding per text.
pub async fn embed(
    State(state): State<SharedState>,
    headers: HeaderMap,
    ApiJson(body): ApiJson<EmbedBody>,
) -> Response {
    let start = Instant::now();
    let id = new_response_id();
    match run_embed(&state, &headers, body, "embed", &id).await {
        Ok((routed, out)) => {
            finish(&state, "embed", &id, &routed.served_by, 200, start);
            Json(json!({
                "id": id,
                "served_by": routed.served_by,
                "split": arm_json(&routed),
                "merged": out.merged,
                "embeddings": out.embeddings,
                "timings": timings_json(&out.timings),
            }))
            .into_response()
        }
        Err(e) => {
            finish(&state, "embed", &id, "-", e.status.as_u16(), start);
            e.into_response()
        }
    }
}

/// `POST /classify`: a label and per-label scores per text, from the adapter's head.
pub async fn classify(
    State(state): State<SharedState>,
    headers: HeaderMap,
    ApiJson(body): ApiJson<EmbedBody>,
) -> Response {
    let start = Instant::now();
    let id = new_response_id();
    let result = async {
        if body.adapter.as_deref() == Some("base") {
            return Err(ApiError::bad_request(
                "not_a_classifier",
                "the base model has no classification head; name an adapter that carries one",
            ));
        }
        let (routed, out) = run_embed(&state, &headers, body, "classify", &id).await?;
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
        let results: Vec<Value> = out
            .embeddings
            .iter()
            .map(|e| {
                let scores = crate::model::classify::scores(e, &head).unwrap_or_default();
                let best = crate::model::sampling::argmax(&scores) as usize;
                let map: serde_json::Map<String, Value> = head
                    .labels
                    .iter()
                    .cloned()
                    .zip(scores.iter().map(|s| json!(s)))
                    .collect();
                json!({"label": head.labels.get(best), "scores": map})
            })
            .collect();
        Ok((routed, out.timings, results))
    }
    .await;
    match result {
        Ok((routed, timings, results)) => {
            finish(&state, "classify", &id, &routed.served_by, 200, start);
            Json(json!({
                "id": id,
                "served_by": routed.served_by,
                "split": arm_json(&routed),
                "results": results,
                "timings": timings_json(&timings),
            }))
            .into_response()
        }
        Err(e) => {
            finish(&state, "classify", &id, "-", e.status.as_u16(), start);
            e.into_response()
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GenerateBody {
    pub adapter: Option<String>,
    pub split: Option<String>,
    pub subject: Option<String>,
    pub prompt: String,
    pub max_tokens: Option<usize>,
    pub temperature: Option<f64>,
    pub top_p: Option<f64>,
    pub seed: Option<u64>,
    #[serde(default)]
    pub stream: bool,
}

/// `POST /generate`: a continuation, as one JSON answer or (with `"stream": true`) an SSE
/// stream of `token` events closed by a `done` event with counts and timings.
pub async fn generate(
    State(state): State<SharedState>,
    headers: HeaderMap,
    ApiJson(body): ApiJson<GenerateBody>,
) -> Response {
    let start = Instant::now();
    let id = new_response_id();
    match start_generation(&state, &headers, &body, &id).await {
        Err(e) => {
            finish(&state, "generate", &id, "-", e.status.as_u16(), start);
            e.into_response()
        }
        Ok((routed, rx)) if body.stream => {
            stream_answer(state, id, routed, rx, start).into_response()
        }
        Ok((routed, mut rx)) => {
            let mut text = String::new();
            let mut tokens = Vec::new();
            while let Some(ev) = rx.recv().await {
                match ev {
                    GenEvent::Token { id: t, text: piece } => {
                        tokens.push(t);
                        text.push_str(&piece);
                    }
                    GenEvent::Done {
                        finish: reason,
                        tail,
                        prompt_tokens,
                        output_tokens,
                        timings,
                    } => {
                        text.push_str(&tail);
                        finish(&state, "generate", &id, &routed.served_by, 200, start);
                        return Json(json!({
                            "id": id,
                            "served_by": routed.served_by,
                            "split": arm_json(&routed),
                            "text": text,
                            "token_ids": tokens,
                            "finish": reason,
                            "counts": {"prompt_tokens": prompt_tokens, "output_tokens": output_tokens},
                            "timings": timings_json(&timings),
                        }))
                        .into_response();
                    }
                    GenEvent::Failed(e) => {
                        let e = ApiError::from(e);
                        finish(
                            &state,
                            "generate",
                            &id,
                            &routed.served_by,
                            e.status.as_u16(),
                            start,
                        );
                        return e.into_response();
                    }
                }
            }
            let e = ApiError::from(EngineError::ShuttingDown);
            finish(
                &state,
                "generate",
                &id,
                &routed.served_by,
                e.status.as_u16(),
                start,
            );
            e.into_response()
        }
    }
}

async fn start_generation(
    state: &SharedState,
    headers: &HeaderMap,
    body: &GenerateBody,
    id: &str,
) -> Result<(Routed, mpsc::UnboundedReceiver<GenEvent>), ApiError> {
    let tenant = state.tenants.authenticate(authorization(headers))?;
    let Backbone::Decoder(g) = &*state.backbone else {
        return Err(ApiError::bad_request(
            "wrong_model_family",
            "/generate needs a decoder base model; this server runs an encoder (use /embed or /classify)",
        ));
    };
    let limit = body
        .max_tokens
        .unwrap_or(64.min(state.limits.max_output_tokens));
    if limit == 0 || limit > state.limits.max_output_tokens {
        return Err(ApiError::bad_request(
            "too_many_tokens",
            format!(
                "max_tokens {limit} is out of range: expected 1 to {}",
                state.limits.max_output_tokens
            ),
        ));
    }
    let sampling = SamplingParams {
        temperature: body.temperature,
        top_p: body.top_p.unwrap_or(1.0),
        seed: body.seed.unwrap_or(0),
    };
    sampling
        .validate()
        .map_err(|m| ApiError::bad_request("invalid_sampling", m))?;
    let prompt_ids = g
        .encode(&body.prompt)
        .map_err(|e| ApiError::bad_request("untokenizable", format!("{e:#}")))?;
    if prompt_ids.is_empty() {
        return Err(ApiError::bad_request(
            "empty_prompt",
            "the prompt gives no tokens",
        ));
    }
    let positions = g.model().config.max_position_embeddings;
    if prompt_ids.len() > state.limits.max_input_tokens || prompt_ids.len() + limit > positions {
        return Err(ApiError::new(
            axum::http::StatusCode::PAYLOAD_TOO_LARGE,
            "too_many_tokens",
            format!(
                "the prompt is {} tokens; the limit is {} (and prompt plus max_tokens must fit the model's {positions} positions)",
                prompt_ids.len(),
                state.limits.max_input_tokens
            ),
        ));
    }
    let (tx, rx) = mpsc::unbounded_channel();
    let target = Target::of(&body.adapter, &body.split, &body.subject);
    // The most the generation can use: its prompt and max_tokens; what it does not generate is
    // given back when it ends.
    let tokens = (prompt_ids.len() + limit) as u64;
    let routed = admit(state, &tenant, target, id, tokens, |a| {
        Job::Generate(GenerateJob {
            ticket: a.ticket,
            prompt_ids,
            adapter: a.adapter,
            sampling,
            limit,
            admitted: a.admitted,
            swap: a.swap,
            deadline: a.deadline,
            events: tx,
        })
    })
    .await?;
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
        while let Some(ev) = rx.recv().await {
            let event = match ev {
                GenEvent::Token { id: t, text } => Event::default()
                    .event("token")
                    .json_data(json!({"text": text, "token_id": t})),
                GenEvent::Done {
                    finish: reason,
                    tail,
                    prompt_tokens,
                    output_tokens,
                    timings,
                } => {
                    finish(&state, "generate", &id, &routed.served_by, 200, start);
                    let e = Event::default().event("done").json_data(json!({
                        "id": id,
                        "tail": tail,
                        "served_by": routed.served_by,
                        "split": arm_json(&routed),
                        "finish": reason,
                        "counts": {"prompt_tokens": prompt_tokens, "output_tokens": output_tokens},
                        "timings": timings_json(&timings),
                    }));
                    let _ = tx.send(e.expect("json"));
                    return;
                }
                GenEvent::Failed(err) => {
                    let err = ApiError::from(err);
                    finish(
                        &state,
                        "generate",
                        &id,
                        &routed.served_by,
                        err.status.as_u16(),
                        start,
                    );
                    let e = Event::default()
                        .event("error")
                        .json_data(json!({"code": err.code, "message": err.message}));
                    let _ = tx.send(e.expect("json"));
                    return;
                }
            };
            if tx.send(event.expect("json")).is_err() {
                // The client went away: dropping rx tells the engine to stop this sequence.
                return;
            }
        }
    });
    Sse::new(stream).keep_alive(KeepAlive::default())
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
