//! The split endpoints: the admin API over A/B splits (create or change, list, delete, readout)
//! and `POST /outcomes`. Each handler authorizes, parses, and calls [`crate::experiments`] off
//! the async workers (every write there syncs to disk before it returns).

use axum::Json;
use axum::extract::{Path, State};
use axum::http::{HeaderMap, StatusCode};
use serde::{Deserialize, Serialize};
use serde_json::Value;
use utoipa::ToSchema;

use crate::experiments::arms::ArmProblem;
use crate::experiments::rollouts::{OperatorAction, RolloutRefused, reading};
use crate::experiments::{
    ArmTally, ExperimentError, OutcomeRefused, OutcomeValue, SplitEditError, SplitState,
};
use crate::http::SharedState;
use crate::http::admin::require_admin;
use crate::http::error::ApiError;
use crate::http::extract::ApiJson;
use crate::splits::rollout::{GuardReading, RolloutEvent, RolloutPolicy, RolloutStatus};
use crate::splits::{
    AlwaysValidComparison, ArmSpec, AssignmentCheck, BinaryArmReadout, BinarySummary, BinaryTally,
    NumericArmReadout, NumericSummary, NumericTally, ReadoutSettings, Split, SplitSpec, Validity,
    always_valid_numeric, always_valid_proportion, assignment_check, binary_readout,
    numeric_readout, sequential,
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
#[derive(Debug, Clone, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
#[schema(example = json!({"arms": [
    {"name": "incumbent", "adapter": "base", "weight": 1.0},
    {"name": "candidate", "adapter": "north-routing", "weight": 1.0},
]}))]
pub struct SplitBody {
    /// 1 to 16 arms; the first is the reference every readout compares with.
    #[schema(min_items = 1, max_items = 16)]
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

/// A split as written: its definition, generation and rollout policy.
#[derive(Debug, Serialize, ToSchema)]
pub struct SplitWritten {
    pub name: String,
    pub arms: Vec<ArmSpec>,
    /// Bumped by every change of the definition.
    pub generation: i64,
    /// The rollout policy, when the split has one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rollout: Option<RolloutPolicy>,
}

/// One split of `GET /admin/splits`.
#[derive(Debug, Serialize, ToSchema)]
pub struct SplitListed {
    pub name: String,
    pub arms: Vec<ArmSpec>,
    pub generation: i64,
    /// Requests each arm was assigned, in the order of `arms`.
    pub requests: Vec<u64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rollout: Option<RolloutPolicy>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rollout_status: Option<RolloutStatus>,
}

/// The answer of `GET /admin/splits`.
#[derive(Debug, Serialize, ToSchema)]
pub struct SplitList {
    pub splits: Vec<SplitListed>,
}

/// The path parameter `name`: a split.
#[derive(Debug, Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Path)]
pub struct SplitPath {
    /// The split's name: lowercase letters, digits and single '-' between them.
    #[param(
        pattern = r"^[a-z0-9]+(-[a-z0-9]+)*$",
        max_length = 64,
        example = "north-test"
    )]
    pub name: String,
}

/// `PUT /admin/splits/{name}`: creates or changes a split. An arm that keeps its name and what it
/// serves keeps its record (requests and outcomes); an arm whose adapter or held version changes
/// starts a new record.
#[utoipa::path(
    put,
    path = "/admin/splits/{name}",
    operation_id = "put_split",
    tag = "splits",
    params(SplitPath),
    request_body = SplitBody,
    responses(
        (status = 201, description = "The split was created", body = SplitWritten),
        (status = 200, description = "The split was changed", body = SplitWritten),
    ),
    security(("admin_token" = [])),
)]
pub async fn put_split(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    ApiJson(body): ApiJson<SplitBody>,
) -> Result<(StatusCode, Json<SplitWritten>), ApiError> {
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
    let spec = put.record.spec();
    let answer = SplitWritten {
        name: spec.name,
        arms: spec.arms,
        generation: put.record.generation,
        rollout: policy,
    };
    let status = if put.created {
        StatusCode::CREATED
    } else {
        StatusCode::OK
    };
    Ok((status, Json(answer)))
}

/// `DELETE /admin/splits/{name}`: the split, its arm records and its response records.
#[utoipa::path(
    delete,
    path = "/admin/splits/{name}",
    operation_id = "delete_split",
    tag = "splits",
    params(SplitPath),
    responses((status = 204, description = "The split and its records are gone")),
    security(("admin_token" = [])),
)]
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
#[utoipa::path(
    get,
    path = "/admin/splits",
    operation_id = "list_splits",
    tag = "splits",
    responses((status = 200, description = "Every split", body = SplitList)),
    security(("admin_token" = [])),
)]
pub async fn list(
    State(state): State<SharedState>,
    headers: HeaderMap,
) -> Result<Json<SplitList>, ApiError> {
    require_admin(&state, &headers)?;
    let splits = blocking(&state, |state| state.splits.list().map_err(store_failed)).await?;
    let splits = splits
        .iter()
        .map(|s| {
            let spec = s.record().spec();
            SplitListed {
                name: spec.name,
                arms: spec.arms,
                generation: s.generation,
                requests: s.arms.iter().map(|a| a.requests).collect(),
                rollout: s.rollout.as_ref().map(|r| r.policy.clone()),
                rollout_status: s.rollout.as_ref().map(|r| r.state.status),
            }
        })
        .collect();
    Ok(Json(SplitList { splits }))
}

/// The 50th and 99th percentile latency of an arm's finished requests, in milliseconds; null
/// without any.
#[derive(Debug, Serialize, ToSchema)]
pub struct ArmLatency {
    pub p50: Option<f64>,
    pub p99: Option<f64>,
}

/// What a shadow arm's outcomes mean.
#[derive(Debug, Serialize, ToSchema)]
pub struct ShadowNote {
    /// The share of the first arm's requests mirrored through it.
    pub share: f64,
    pub numeric: &'static str,
    pub yes_no: &'static str,
}

/// An arm's numeric outcomes: its summary, and against the first arm, the fixed-sample
/// comparison and the always-valid one (null for the first arm and without outcomes; absent on
/// a replaced arm).
#[derive(Debug, Serialize, ToSchema)]
pub struct NumericLine {
    pub summary: NumericSummary,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub versus_first: Option<Option<crate::splits::WelchComparison>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub versus_first_always_valid: Option<Option<AlwaysValidComparison>>,
}

/// An arm's yes/no outcomes, laid out as [`NumericLine`].
#[derive(Debug, Serialize, ToSchema)]
pub struct YesNoLine {
    pub summary: BinarySummary,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub versus_first: Option<Option<crate::splits::ProportionComparison>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub versus_first_always_valid: Option<Option<AlwaysValidComparison>>,
}

/// One arm of a readout.
#[derive(Debug, Serialize, ToSchema)]
pub struct ArmReadout {
    pub arm: String,
    pub adapter: String,
    /// The version the arm is held to; absent: it follows the live version.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub version: Option<String>,
    pub weight: f64,
    /// Requests assigned to it.
    pub requests: u64,
    /// Of those, the ones that ended (answered or failed), and the ones that failed.
    pub finished: u64,
    pub errors: u64,
    /// `errors / finished`; null before any finished.
    pub error_share: Option<f64>,
    pub latency_ms: ArmLatency,
    /// For a shadow arm, its share and what its outcomes mean; else null.
    pub shadow: Option<ShadowNote>,
    pub numeric: NumericLine,
    pub yes_no: YesNoLine,
}

/// The parameters of the always-valid comparisons.
#[derive(Debug, Serialize, ToSchema)]
pub struct AlwaysValidSettings {
    pub method: &'static str,
    /// The mixture's tuning parameter τ² (`[experiments] mixing_variance`).
    pub mixing_variance: f64,
    /// Outcomes each arm needs before an always-valid interval is given.
    pub min_outcomes_per_arm: u64,
}

/// A split's rollout in a readout.
#[derive(Debug, Serialize, ToSchema)]
pub struct RolloutReadout {
    pub policy: RolloutPolicy,
    pub status: RolloutStatus,
    /// Promotions taken so far, of `steps`.
    pub step: usize,
    pub steps: usize,
    /// Each guard's reading now; null when the policy does not apply (a final status).
    pub guards: Option<Vec<GuardReading>>,
    pub guards_validity: Validity,
    /// What the policy would do now, in words; null when it does not apply.
    pub next: Option<String>,
    pub history: Vec<RolloutEvent>,
}

/// The answer of `GET /admin/splits/{name}/readout`.
#[derive(Debug, Serialize, ToSchema)]
pub struct SplitReadout {
    pub split: String,
    pub generation: i64,
    /// The level of every interval (0.95).
    pub confidence: f64,
    pub always_valid: AlwaysValidSettings,
    pub assignment_check: AssignmentCheck,
    /// The current arms, in the split's order; the first is the reference.
    pub arms: Vec<ArmReadout>,
    /// Arm records that edits replaced, with their summaries only.
    pub replaced_arms: Vec<ArmReadout>,
    /// The rollout, when the split has a policy; else null.
    pub rollout: Option<RolloutReadout>,
}

/// `GET /admin/splits/{name}/readout`: per current arm, requests, outcomes, mean and 95%
/// interval, and the difference to the first arm twice over: with the fixed-sample interval and
/// p-value (Welch's t-test for numbers, the two-proportion z-test for yes/no) and with the
/// always-valid ones ([`sequential`]); the assignment check of requests against weights; then
/// the arm records edits replaced, with their own summaries.
#[utoipa::path(
    get,
    path = "/admin/splits/{name}/readout",
    operation_id = "split_readout",
    tag = "splits",
    params(SplitPath),
    responses((status = 200, description = "The split's arms, outcomes, comparisons and rollout", body = SplitReadout)),
    security(("admin_token" = [])),
)]
pub async fn readout(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<Json<SplitReadout>, ApiError> {
    require_admin(&state, &headers)?;
    let lookup = name.clone();
    let split = blocking(&state, move |state| {
        state.splits.split(&lookup).map_err(store_failed)
    })
    .await?
    .ok_or_else(|| unknown_split(&name))?;
    Ok(Json(split_readout(&split, &state.readout)))
}

fn split_readout(split: &SplitState, settings: &ReadoutSettings) -> SplitReadout {
    let numeric: Vec<NumericTally> = split.arms.iter().map(|a| a.numeric).collect();
    let binary: Vec<BinaryTally> = split.arms.iter().map(|a| a.yes_no).collect();
    let tau2 = settings.mixing_variance;
    let requests: Vec<u64> = split.arms.iter().map(|a| a.requests).collect();
    let weights: Vec<f64> = split.arms.iter().map(|a| a.arm.spec.weight).collect();
    let check = assignment_check(&requests, &weights, settings.assignment_alarm_p);
    let (numeric_lines, binary_lines) = (numeric_readout(&numeric), binary_readout(&binary));
    let arm_line = |a: &ArmTally, numeric: NumericLine, yes_no: YesNoLine| {
        let h = &a.health;
        ArmReadout {
            arm: a.arm.spec.name.clone(),
            adapter: a.arm.spec.adapter.clone(),
            version: a.arm.spec.version.clone(),
            weight: a.arm.spec.weight,
            requests: a.requests,
            finished: h.finished,
            errors: h.errors,
            error_share: (h.finished > 0).then(|| h.errors as f64 / h.finished as f64),
            latency_ms: ArmLatency {
                p50: h.latency.quantile(0.5),
                p99: h.latency.quantile(0.99),
            },
            // A shadow arm answers nobody: its `requests`, `finished` and latencies stay 0, and
            // its outcomes are how its answers agreed with the first arm's.
            shadow: a.arm.spec.shadow.map(|share| ShadowNote {
                share,
                numeric: "per mirrored request: mean cosine of the embeddings (embed), or the first token position where the outputs differ (generate; the output's length when they agree)",
                yes_no: "per mirrored request: whether every text got the same label (classify), or whether the outputs are the same tokens (generate)",
            }),
            numeric,
            yes_no,
        }
    };
    let arms = split
        .arms
        .iter()
        .enumerate()
        .zip(numeric_lines.into_iter().zip(binary_lines))
        .map(
            |((i, a), (n, b)): ((usize, &ArmTally), (NumericArmReadout, BinaryArmReadout))| {
                // The always-valid comparison with the first arm (none for the first arm itself).
                let numeric_watched = (i > 0)
                    .then(|| always_valid_numeric(&numeric[i], &numeric[0], tau2))
                    .flatten();
                let binary_watched = (i > 0)
                    .then(|| always_valid_proportion(&binary[i], &binary[0], tau2))
                    .flatten();
                arm_line(
                    a,
                    NumericLine {
                        summary: n.summary,
                        versus_first: Some(n.versus_first),
                        versus_first_always_valid: Some(numeric_watched),
                    },
                    YesNoLine {
                        summary: b.summary,
                        versus_first: Some(b.versus_first),
                        versus_first_always_valid: Some(binary_watched),
                    },
                )
            },
        )
        .collect();
    let replaced_arms = split
        .replaced
        .iter()
        .map(|a| {
            arm_line(
                a,
                NumericLine {
                    summary: a.numeric.summary(),
                    versus_first: None,
                    versus_first_always_valid: None,
                },
                YesNoLine {
                    summary: a.yes_no.summary(),
                    versus_first: None,
                    versus_first_always_valid: None,
                },
            )
        })
        .collect();
    SplitReadout {
        split: split.name.clone(),
        generation: split.generation,
        confidence: crate::splits::CONFIDENCE_LEVEL,
        always_valid: AlwaysValidSettings {
            method: sequential::METHOD,
            mixing_variance: tau2,
            min_outcomes_per_arm: crate::splits::MIN_OUTCOMES_PER_ARM,
        },
        assignment_check: check,
        arms,
        replaced_arms,
        rollout: rollout_readout(split, settings),
    }
}

/// The rollout part of a readout: policy, progress, each guard's reading (always-valid), what
/// the policy would do now, and the history; `None` without a policy.
fn rollout_readout(split: &SplitState, settings: &ReadoutSettings) -> Option<RolloutReadout> {
    let rollout = split.rollout.as_ref()?;
    let now = reading(split, settings);
    Some(RolloutReadout {
        policy: rollout.policy.clone(),
        status: rollout.state.status,
        step: rollout.state.step,
        steps: rollout.policy.steps.len(),
        guards: now.as_ref().map(|r| r.guards.clone()),
        guards_validity: Validity::AlwaysValid,
        next: now.map(|r| r.decision.describe()),
        history: split.events.clone(),
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

/// The body of `POST /admin/splits/{name}/rollout`.
#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
#[schema(example = json!({"action": "pause", "reason": "checking the candidate's labels by hand"}))]
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
#[utoipa::path(
    post,
    path = "/admin/splits/{name}/rollout",
    operation_id = "rollout_action",
    tag = "splits",
    params(SplitPath),
    request_body = RolloutBody,
    responses((status = 200, description = "Carried out; the entry it added to the rollout's history", body = RolloutApplied)),
    security(("admin_token" = [])),
)]
pub async fn rollout_action(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    ApiJson(body): ApiJson<RolloutBody>,
) -> Result<Json<RolloutApplied>, ApiError> {
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
    Ok(Json(RolloutApplied {
        split: name,
        event: applied.event,
    }))
}

/// An operator's action, carried out.
#[derive(Debug, Serialize, ToSchema)]
pub struct RolloutApplied {
    pub split: String,
    pub event: RolloutEvent,
}

/// The body of `POST /outcomes`.
#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
#[schema(example = json!({"response_id": "r-915f53db37d6863e88cd7409", "value": true}))]
pub struct OutcomeBody {
    /// The `id` of an answer a split served to this tenant.
    pub response_id: String,
    /// A number within ±1e15, or yes/no as a boolean.
    #[schema(schema_with = outcome_value_schema)]
    pub value: Value,
}

/// An outcome value: a number or a boolean.
fn outcome_value_schema() -> utoipa::openapi::schema::Schema {
    use utoipa::openapi::schema::{ObjectBuilder, OneOfBuilder, Type};
    OneOfBuilder::new()
        .item(
            ObjectBuilder::new()
                .schema_type(Type::Number)
                .minimum(Some(-1e15))
                .maximum(Some(1e15)),
        )
        .item(ObjectBuilder::new().schema_type(Type::Boolean))
        .build()
        .into()
}

/// The answer of `POST /outcomes`.
#[derive(Debug, Serialize, ToSchema)]
pub struct OutcomeRecorded {
    pub response_id: String,
    pub split: String,
    pub arm: String,
    /// Always true: the outcome is on disk.
    pub recorded: bool,
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
#[utoipa::path(
    post,
    path = "/outcomes",
    operation_id = "record_outcome",
    tag = "inference",
    request_body = OutcomeBody,
    responses((status = 200, description = "The outcome is recorded on the arm that served the response", body = OutcomeRecorded)),
    security(("tenant_key" = [])),
)]
pub async fn post_outcome(
    State(state): State<SharedState>,
    headers: HeaderMap,
    ApiJson(body): ApiJson<OutcomeBody>,
) -> Result<Json<OutcomeRecorded>, ApiError> {
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
    Ok(Json(OutcomeRecorded {
        response_id: body.response_id,
        split: recorded.split,
        arm: recorded.arm,
        recorded: true,
    }))
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
