//! The split endpoints: the admin API over A/B splits (create or change, list, delete, readout)
//! and `POST /outcomes`. Each handler authorizes, parses, and calls [`crate::experiments`] off
//! the async workers (every write there syncs to disk before it returns).

use axum::Json;
use axum::extract::{Path, State};
use axum::http::{HeaderMap, StatusCode};
use serde::Deserialize;
use serde_json::{Value, json};

use crate::experiments::arms::ArmProblem;
use crate::experiments::rollouts::{OperatorAction, RolloutRefused, reading};
use crate::experiments::{
    ArmTally, ExperimentError, OutcomeRefused, OutcomeValue, SplitEditError, SplitState,
};
use crate::http::SharedState;
use crate::http::admin::require_admin;
use crate::http::error::ApiError;
use crate::http::extract::ApiJson;
use crate::splits::rollout::RolloutPolicy;
use crate::splits::{
    ArmSpec, BinaryTally, NumericTally, ReadoutSettings, Split, SplitSpec, always_valid_numeric,
    always_valid_proportion, assignment_check, binary_readout, numeric_readout, sequential,
};

pub fn authorization(headers: &HeaderMap) -> Option<&str> {
    headers
        .get(axum::http::header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
}

/// Runs a blocking experiments call off the async workers.
async fn blocking<T: Send + 'static>(
    state: &SharedState,
    f: impl FnOnce(&SharedState) -> Result<T, ApiError> + Send + 'static,
) -> Result<T, ApiError> {
    let state = state.clone();
    tokio::task::spawn_blocking(move || f(&state))
        .await
        .map_err(|e| ApiError::internal(format!("experiment task failed: {e}")))?
}

/// A failure of the experiment database: 500 with its own code.
pub fn store_failed(e: ExperimentError) -> ApiError {
    ApiError::new(
        StatusCode::INTERNAL_SERVER_ERROR,
        "experiment_store_failed",
        e.to_string(),
    )
}

fn edit_error(e: SplitEditError) -> ApiError {
    let text = e.to_string();
    match e {
        SplitEditError::Invalid(_) => ApiError::bad_request("invalid_split", text),
        SplitEditError::Arm(ArmProblem::UnknownAdapter { .. }) => {
            ApiError::not_found("unknown_target", text)
        }
        SplitEditError::Arm(ArmProblem::UnknownVersion { .. }) => {
            ApiError::not_found("unknown_version", text)
        }
        SplitEditError::Arm(ArmProblem::InvalidName { .. } | ArmProblem::InvalidVersion { .. }) => {
            ApiError::bad_request("invalid_split", text)
        }
        SplitEditError::Arm(ArmProblem::Store { .. }) => ApiError::internal(text),
        SplitEditError::Policy(_) => ApiError::bad_request("invalid_rollout", text),
        SplitEditError::Store(e) => store_failed(e),
    }
}

/// An admin asking for a split that does not exist (the admin sees every split, so the words
/// differ from the tenant's `ApiError::unknown_split`).
fn unknown_split(name: &str) -> ApiError {
    ApiError::not_found("unknown_split", format!("no split named {name:?}"))
}

/// The body of `PUT /admin/splits/{name}`. Like every JSON body, a field it does not know is
/// refused (400 `invalid_field`, naming the field), so a misspelt key is never silently ignored.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SplitBody {
    pub arms: Vec<ArmSpec>,
    /// A guarded rollout of the second arm (see [`crate::splits::rollout`]); absent: none.
    #[serde(default)]
    pub rollout: Option<RolloutPolicy>,
}

/// The split a `PUT /admin/splits/{name}` body defines, validated (the fuzz target
/// `http_bodies` runs this too); whether its adapters and versions exist is checked when the
/// split is written.
pub fn split_from_body(name: &str, body: SplitBody) -> Result<Split, ApiError> {
    let split = Split::new(SplitSpec {
        name: name.to_owned(),
        arms: body.arms,
    })
    .map_err(|e| ApiError::bad_request("invalid_split", e.to_string()))?;
    if let Some(policy) = &body.rollout {
        policy
            .check(&split)
            .map_err(|e| ApiError::bad_request("invalid_rollout", e.to_string()))?;
    }
    Ok(split)
}

/// `PUT /admin/splits/{name}`: creates or changes a split. An arm that keeps its name and what it
/// serves keeps its record (requests and outcomes); an arm whose adapter or held version changes
/// starts a new record.
pub async fn put_split(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    ApiJson(body): ApiJson<SplitBody>,
) -> Result<(StatusCode, Json<Value>), ApiError> {
    require_admin(&state, &headers)?;
    let policy = body.rollout.clone();
    let split = split_from_body(&name, body)?;
    let kept = policy.clone();
    let put = blocking(&state, move |state| {
        state
            .splits
            .put_split(split, kept.as_ref(), &state.registry)
            .map_err(edit_error)
    })
    .await?;
    let mut answer = serde_json::to_value(put.record.spec()).expect("a split serialises");
    answer["generation"] = json!(put.record.generation);
    if let Some(policy) = policy {
        answer["rollout"] = json!(policy);
    }
    let status = if put.created {
        StatusCode::CREATED
    } else {
        StatusCode::OK
    };
    Ok((status, Json(answer)))
}

/// `DELETE /admin/splits/{name}`: the split, its arm records and its response records.
pub async fn delete_split(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<StatusCode, ApiError> {
    require_admin(&state, &headers)?;
    blocking(&state, move |state| {
        // The arm names, current and replaced, whose request series the metrics drop.
        let arms: Vec<String> = state
            .splits
            .split(&name)
            .map_err(store_failed)?
            .map(|s| {
                s.arms
                    .iter()
                    .chain(&s.replaced)
                    .map(|a| a.arm.spec.name.clone())
                    .collect()
            })
            .unwrap_or_default();
        match state.splits.delete_split(&name, &state.registry) {
            Ok(true) => {
                state.metrics.forget_split(&name, &arms);
                Ok(StatusCode::NO_CONTENT)
            }
            Ok(false) => Err(unknown_split(&name)),
            Err(e) => Err(store_failed(e)),
        }
    })
    .await
}

/// `GET /admin/splits`: every split's definition, generation and requests per arm.
pub async fn list(
    State(state): State<SharedState>,
    headers: HeaderMap,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    let splits = blocking(&state, |state| state.splits.list().map_err(store_failed)).await?;
    let splits: Vec<Value> = splits
        .iter()
        .map(|s| {
            let mut v = serde_json::to_value(s.record().spec()).expect("a split serialises");
            v["generation"] = json!(s.generation);
            v["requests"] = json!(s.arms.iter().map(|a| a.requests).collect::<Vec<_>>());
            if let Some(r) = &s.rollout {
                v["rollout"] = json!(r.policy);
                v["rollout_status"] = json!(r.state.status);
            }
            v
        })
        .collect();
    Ok(Json(json!({ "splits": splits })))
}

/// `GET /admin/splits/{name}/readout`: per current arm, requests, outcomes, mean and 95%
/// interval, and the difference to the first arm twice over: with the fixed-sample interval and
/// p-value (Welch's t-test for numbers, the two-proportion z-test for yes/no) and with the
/// always-valid ones ([`sequential`]); the assignment check of requests against weights; then
/// the arm records edits replaced, with their own summaries.
pub async fn readout(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    let lookup = name.clone();
    let split = blocking(&state, move |state| {
        state.splits.split(&lookup).map_err(store_failed)
    })
    .await?
    .ok_or_else(|| unknown_split(&name))?;
    Ok(Json(readout_json(&split, &state.readout)))
}

fn readout_json(split: &SplitState, settings: &ReadoutSettings) -> Value {
    let numeric: Vec<NumericTally> = split.arms.iter().map(|a| a.numeric).collect();
    let binary: Vec<BinaryTally> = split.arms.iter().map(|a| a.yes_no).collect();
    let tau2 = settings.mixing_variance;
    // Per arm, the always-valid comparison with the first arm (none for the first arm itself).
    let numeric_watched: Vec<Value> = numeric
        .iter()
        .enumerate()
        .map(|(i, arm)| {
            json!(
                (i > 0)
                    .then(|| always_valid_numeric(arm, &numeric[0], tau2))
                    .flatten()
            )
        })
        .collect();
    let binary_watched: Vec<Value> = binary
        .iter()
        .enumerate()
        .map(|(i, arm)| {
            json!(
                (i > 0)
                    .then(|| always_valid_proportion(arm, &binary[0], tau2))
                    .flatten()
            )
        })
        .collect();
    let requests: Vec<u64> = split.arms.iter().map(|a| a.requests).collect();
    let weights: Vec<f64> = split.arms.iter().map(|a| a.arm.spec.weight).collect();
    let check = assignment_check(&requests, &weights, settings.assignment_alarm_p);
    let (numeric, binary) = (numeric_readout(&numeric), binary_readout(&binary));
    let arm_line = |a: &ArmTally| {
        let h = &a.health;
        json!({
            "arm": a.arm.spec.name,
            "adapter": a.arm.spec.adapter,
            "version": a.arm.spec.version,
            "weight": a.arm.spec.weight,
            "requests": a.requests,
            "finished": h.finished,
            "errors": h.errors,
            "error_share": (h.finished > 0).then(|| h.errors as f64 / h.finished as f64),
            "latency_ms": {
                "p50": h.latency.quantile(0.5),
                "p99": h.latency.quantile(0.99),
            },
            // A shadow arm answers nobody: its `requests`, `finished` and latencies stay 0, and
            // its outcomes are how its answers agreed with the first arm's.
            "shadow": a.arm.spec.shadow.map(|share| json!({
                "share": share,
                "numeric": "per mirrored request: mean cosine of the embeddings (embed), or the first token position where the outputs differ (generate; the output's length when they agree)",
                "yes_no": "per mirrored request: whether every text got the same label (classify), or whether the outputs are the same tokens (generate)",
            })),
        })
    };
    let arms: Vec<Value> = split
        .arms
        .iter()
        .zip(numeric.iter().zip(&binary))
        .zip(numeric_watched.into_iter().zip(binary_watched))
        .map(
            |((a, (numeric, binary)), (numeric_watched, binary_watched))| {
                let mut line = arm_line(a);
                line["numeric"] = json!(numeric);
                line["numeric"]["versus_first_always_valid"] = numeric_watched;
                line["yes_no"] = json!(binary);
                line["yes_no"]["versus_first_always_valid"] = binary_watched;
                line
            },
        )
        .collect();
    let replaced: Vec<Value> = split
        .replaced
        .iter()
        .map(|a| {
            let mut line = arm_line(a);
            line["numeric"] = json!({ "summary": a.numeric.summary() });
            line["yes_no"] = json!({ "summary": a.yes_no.summary() });
            line
        })
        .collect();
    json!({
        "split": split.name,
        "generation": split.generation,
        "confidence": crate::splits::CONFIDENCE_LEVEL,
        "always_valid": {
            "method": sequential::METHOD,
            "mixing_variance": tau2,
            "min_outcomes_per_arm": crate::splits::MIN_OUTCOMES_PER_ARM,
        },
        "assignment_check": check,
        "arms": arms,
        "replaced_arms": replaced,
        "rollout": rollout_json(split, settings),
    })
}

/// The rollout part of a readout: policy, progress, each guard's reading (always-valid), what
/// the policy would do now, and the history; `null` without a policy.
fn rollout_json(split: &SplitState, settings: &ReadoutSettings) -> Value {
    let Some(rollout) = &split.rollout else {
        return Value::Null;
    };
    let now = reading(split, settings);
    json!({
        "policy": rollout.policy,
        "status": rollout.state.status,
        "step": rollout.state.step,
        "steps": rollout.policy.steps.len(),
        "guards": now.as_ref().map(|r| json!(r.guards)),
        "guards_validity": crate::splits::Validity::AlwaysValid,
        "next": now.map(|r| r.decision.describe()),
        "history": split.events,
    })
}

/// Checks every split's rollout policy every `rollout_check` and carries out what it says, off
/// the async workers; runs until the server stops.
pub async fn check_rollouts_every(state: SharedState) {
    let mut tick = tokio::time::interval(state.rollout_check);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        tick.tick().await;
        let shared = state.clone();
        let applied = tokio::task::spawn_blocking(move || {
            shared
                .splits
                .run_rollouts(&shared.registry, &shared.readout)
        })
        .await
        .unwrap_or_default();
        for done in applied {
            state.metrics.count_rollout(&done.split, &done.event);
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RolloutBody {
    pub action: OperatorAction,
    /// Why, for the history; default: the action by an operator.
    pub reason: Option<String>,
}

/// The longest reason an operator may give.
const MAX_REASON_BYTES: usize = 1000;

/// `POST /admin/splits/{name}/rollout` with `{"action": "pause" | "resume" | "promote" |
/// "roll_back", "reason": "..."}`: a person's override of a split's rollout, recorded in its
/// history like an automatic action. Answers the history entry.
pub async fn rollout_action(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    ApiJson(body): ApiJson<RolloutBody>,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    if body
        .reason
        .as_ref()
        .is_some_and(|r| r.len() > MAX_REASON_BYTES)
    {
        return Err(ApiError::bad_request(
            "invalid_field",
            format!("field `reason`: at most {MAX_REASON_BYTES} bytes"),
        ));
    }
    let lookup = name.clone();
    let applied = blocking(&state, move |state| {
        state
            .splits
            .operator_rollout(&lookup, body.action, body.reason, &state.registry)
            .map_err(|e| {
                let text = e.to_string();
                match e {
                    RolloutRefused::UnknownSplit(_) => ApiError::not_found("unknown_split", text),
                    RolloutRefused::NoPolicy(_) => ApiError::conflict("no_rollout", text),
                    RolloutRefused::NotApplicable { .. } => {
                        ApiError::conflict("rollout_not_applicable", text)
                    }
                    RolloutRefused::Raced => ApiError::conflict("rollout_changed", text),
                    RolloutRefused::Live(_) => ApiError::internal(text),
                    RolloutRefused::Store(e) => store_failed(e),
                }
            })
    })
    .await?;
    state.metrics.count_rollout(&applied.split, &applied.event);
    Ok(Json(json!({"split": name, "event": applied.event})))
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OutcomeBody {
    pub response_id: String,
    pub value: Value,
}

/// An outcome's `value` as the experiments take it: a number within ±1e15, or yes/no as a
/// boolean; anything else is refused with `invalid_outcome`.
pub fn outcome_value(value: &Value) -> Result<OutcomeValue, ApiError> {
    let refused =
        |e: crate::splits::OutcomeError| ApiError::bad_request("invalid_outcome", e.to_string());
    match value {
        Value::Bool(b) => Ok(OutcomeValue::YesNo(*b)),
        Value::Number(n) => {
            let x = n.as_f64().unwrap_or(f64::NAN);
            NumericTally::check(x).map_err(refused)?;
            Ok(OutcomeValue::Number(x))
        }
        _ => Err(ApiError::bad_request(
            "invalid_outcome",
            "field `value` must be a number or true/false",
        )),
    }
}

/// Records an outcome's `value` in the tally of its kind, as the experiment store does on the
/// arm record that served the response (the fuzz target `http_bodies` runs this). A refused
/// value leaves both tallies as they were.
pub fn record_outcome(
    numeric: &mut NumericTally,
    binary: &mut BinaryTally,
    value: &Value,
) -> Result<(), ApiError> {
    match outcome_value(value)? {
        OutcomeValue::YesNo(b) => binary.record(b),
        OutcomeValue::Number(x) => numeric
            .record(x)
            .map_err(|e| ApiError::bad_request("invalid_outcome", e.to_string()))?,
    }
    Ok(())
}

/// `POST /outcomes`: records the outcome of one response that a split served (a number within
/// ±1e15, or yes/no as a boolean); one outcome per response, and only from the tenant it was
/// served to. The answer comes once the outcome is on disk.
pub async fn post_outcome(
    State(state): State<SharedState>,
    headers: HeaderMap,
    ApiJson(body): ApiJson<OutcomeBody>,
) -> Result<Json<Value>, ApiError> {
    let tenant = state.tenants.authenticate(authorization(&headers))?;
    let value = outcome_value(&body.value)?;
    let response_id = body.response_id.clone();
    let recorded = blocking(&state, move |state| {
        state
            .splits
            .post_outcome(&response_id, &tenant.name, value)
            .map_err(|e| outcome_error(e, &response_id))
    })
    .await?;
    Ok(Json(json!({
        "response_id": body.response_id,
        "split": recorded.split,
        "arm": recorded.arm,
        "recorded": true,
    })))
}

fn outcome_error(e: OutcomeRefused, response_id: &str) -> ApiError {
    match e {
        // The same words whether the id is unknown, pruned, of a deleted split or another
        // tenant's: a key learns nothing about responses it was not served.
        OutcomeRefused::UnknownResponse => ApiError::not_found(
            "unknown_response",
            format!(
                "response {response_id:?} was not served by a split to this key (or is older than the retention, or its split was deleted)"
            ),
        ),
        OutcomeRefused::AlreadyRecorded => ApiError::conflict(
            "outcome_recorded",
            format!("response {response_id:?} already has an outcome"),
        ),
        OutcomeRefused::Invalid(e) => ApiError::bad_request("invalid_outcome", e.to_string()),
        OutcomeRefused::Store(e) => store_failed(e),
    }
}
