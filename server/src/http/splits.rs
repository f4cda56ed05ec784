//! A/B splits over live traffic: the split book (definitions, per-arm request counts and outcome
//! tallies, which response went to which arm), its admin endpoints, outcome posting and the
//! readout. Definitions are saved to a JSON file beside the store so assignment, a pure function
//! of (split, subject), survives restarts; tallies live in memory.

use std::collections::{BTreeMap, HashMap, VecDeque};
use std::path::PathBuf;
use std::sync::Mutex;

use axum::Json;
use axum::extract::{Path, State};
use axum::http::{HeaderMap, StatusCode};
use serde::Deserialize;
use serde_json::{Value, json};

use crate::http::SharedState;
use crate::http::admin::require_admin;
use crate::http::error::ApiError;
use crate::http::extract::ApiJson;
use crate::splits::{
    ArmSpec, BinaryTally, NumericTally, Split, SplitSpec, binary_readout, numeric_readout,
};

/// How many recent response ids remember their arm, for outcomes posted later.
const REMEMBERED_RESPONSES: usize = 200_000;

struct Entry {
    split: Split,
    requests: Vec<u64>,
    numeric: Vec<NumericTally>,
    binary: Vec<BinaryTally>,
}

struct Book {
    splits: BTreeMap<String, Entry>,
    responses: HashMap<String, (String, usize, bool)>,
    order: VecDeque<String>,
}

/// The splits of this server.
pub struct SplitBook {
    path: Option<PathBuf>,
    book: Mutex<Book>,
}

impl std::fmt::Debug for SplitBook {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SplitBook")
            .field("path", &self.path)
            .finish()
    }
}

impl SplitBook {
    /// Loads saved definitions from `path` (absent file: no splits).
    pub fn open(path: Option<PathBuf>) -> anyhow::Result<Self> {
        let mut splits = BTreeMap::new();
        if let Some(p) = &path
            && p.is_file()
        {
            let text = std::fs::read_to_string(p)?;
            let specs: Vec<SplitSpec> = serde_json::from_str(&text)
                .map_err(|e| anyhow::anyhow!("reading splits from {}: {e}", p.display()))?;
            for spec in specs {
                let split =
                    Split::new(spec).map_err(|e| anyhow::anyhow!("{}: {e}", p.display()))?;
                splits.insert(split.name().to_owned(), fresh_entry(split));
            }
        }
        Ok(Self {
            path,
            book: Mutex::new(Book {
                splits,
                responses: HashMap::new(),
                order: VecDeque::new(),
            }),
        })
    }

    /// Tells the registry which versions split arms are held to, so those stay resident while
    /// not live. Called whenever the set of splits changes, and once at start.
    pub fn keep_arm_versions(&self, registry: &switchyard_adapters::Registry) {
        let book = self.book.lock().unwrap();
        registry.keep_versions(arm_versions(&book));
    }

    fn save(&self, book: &Book) -> Result<(), ApiError> {
        let Some(path) = &self.path else {
            return Ok(());
        };
        let specs: Vec<&SplitSpec> = book.splits.values().map(|e| e.split.spec()).collect();
        let text = serde_json::to_string_pretty(&specs).expect("specs serialise");
        let tmp = path.with_extension("json.tmp");
        std::fs::write(&tmp, text)
            .and_then(|_| std::fs::rename(&tmp, path))
            .map_err(|e| ApiError::internal(format!("saving splits to {}: {e}", path.display())))
    }

    /// Picks an arm for a request and counts it; `None` when there is no such split.
    pub fn assign(&self, name: &str, subject: Option<&str>) -> Option<(usize, ArmSpec)> {
        let mut book = self.book.lock().unwrap();
        let entry = book.splits.get_mut(name)?;
        let (index, arm) = {
            let a = entry.split.assign(subject, &mut rand::rng());
            (a.index, a.arm.clone())
        };
        entry.requests[index] += 1;
        Some((index, arm))
    }

    /// Remembers which arm answered a response, for a later outcome.
    pub fn remember(&self, response_id: &str, split: &str, arm: usize) {
        let mut book = self.book.lock().unwrap();
        book.responses
            .insert(response_id.to_owned(), (split.to_owned(), arm, false));
        book.order.push_back(response_id.to_owned());
        while book.order.len() > REMEMBERED_RESPONSES {
            if let Some(old) = book.order.pop_front() {
                book.responses.remove(&old);
            }
        }
    }
}

fn fresh_entry(split: Split) -> Entry {
    let n = split.arms().len();
    Entry {
        split,
        requests: vec![0; n],
        numeric: vec![NumericTally::new(); n],
        binary: vec![BinaryTally::new(); n],
    }
}

/// Every `(adapter, version)` an arm is held to.
fn arm_versions(book: &Book) -> Vec<(switchyard_adapters::AdapterName, String)> {
    book.splits
        .values()
        .flat_map(|e| e.split.arms())
        .filter_map(|arm| {
            let version = arm.version.clone()?;
            let name = switchyard_adapters::AdapterName::new(&arm.adapter).ok()?;
            Some((name, version))
        })
        .collect()
}

pub fn authorization(headers: &HeaderMap) -> Option<&str> {
    headers
        .get(axum::http::header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
}

/// The split a `PUT /admin/splits/{name}` body defines, validated (the fuzz target
/// `http_bodies` runs this too); whether its adapters exist is the handler's check.
pub fn split_from_body(name: &str, body: &Value) -> Result<Split, ApiError> {
    let arms = body
        .get("arms")
        .cloned()
        .ok_or_else(|| ApiError::bad_request("invalid_split", "field `arms` is missing"))?;
    let arms: Vec<ArmSpec> = serde_json::from_value(arms)
        .map_err(|e| ApiError::bad_request("invalid_split", format!("field `arms`: {e}")))?;
    Split::new(SplitSpec {
        name: name.to_owned(),
        arms,
    })
    .map_err(|e| ApiError::bad_request("invalid_split", e.to_string()))
}

/// `PUT /admin/splits/{name}`: creates or changes a split; arms that keep their name keep
/// their counts and outcomes.
pub async fn put_split(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    ApiJson(body): ApiJson<Value>,
) -> Result<(StatusCode, Json<Value>), ApiError> {
    require_admin(&state, &headers)?;
    let split = split_from_body(&name, &body)?;
    for arm in split.arms() {
        if arm.adapter != crate::splits::BASE_MODEL
            && state
                .registry
                .store()
                .pointer(
                    &switchyard_adapters::AdapterName::new(&arm.adapter)
                        .map_err(|e| ApiError::bad_request("invalid_split", e.to_string()))?,
                )
                .ok()
                .flatten()
                .is_none()
        {
            return Err(ApiError::not_found(
                "unknown_target",
                format!(
                    "arm {:?} names adapter {:?}, which has no live version",
                    arm.name, arm.adapter
                ),
            ));
        }
    }
    let mut book = state.splits.book.lock().unwrap();
    let mut entry = fresh_entry(split);
    let created = match book.splits.remove(&name) {
        None => true,
        Some(old) => {
            for (i, arm) in entry.split.arms().iter().enumerate() {
                if let Some(j) = old.split.arms().iter().position(|a| a.name == arm.name) {
                    entry.requests[i] = old.requests[j];
                    entry.numeric[i] = old.numeric[j];
                    entry.binary[i] = old.binary[j];
                }
            }
            false
        }
    };
    let spec = serde_json::to_value(entry.split.spec()).expect("serialise");
    book.splits.insert(name, entry);
    state.registry.keep_versions(arm_versions(&book));
    state.splits.save(&book)?;
    let status = if created {
        StatusCode::CREATED
    } else {
        StatusCode::OK
    };
    Ok((status, Json(spec)))
}

/// `DELETE /admin/splits/{name}`.
pub async fn delete_split(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<StatusCode, ApiError> {
    require_admin(&state, &headers)?;
    let mut book = state.splits.book.lock().unwrap();
    if book.splits.remove(&name).is_none() {
        return Err(ApiError::not_found(
            "unknown_split",
            format!("no split named {name:?}"),
        ));
    }
    state.registry.keep_versions(arm_versions(&book));
    state.splits.save(&book)?;
    Ok(StatusCode::NO_CONTENT)
}

/// `GET /admin/splits`.
pub async fn list(
    State(state): State<SharedState>,
    headers: HeaderMap,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    let book = state.splits.book.lock().unwrap();
    let splits: Vec<Value> = book
        .splits
        .values()
        .map(|e| {
            let mut v = serde_json::to_value(e.split.spec()).expect("serialise");
            v["requests"] = json!(e.requests);
            v
        })
        .collect();
    Ok(Json(json!({ "splits": splits })))
}

/// `GET /admin/splits/{name}/readout`: per arm, requests, outcomes, mean and 95% interval, and
/// the difference to the first arm with its interval and p-value (Welch's t-test for numbers,
/// the two-proportion z-test for yes/no).
pub async fn readout(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    let book = state.splits.book.lock().unwrap();
    let e = book
        .splits
        .get(&name)
        .ok_or_else(|| ApiError::not_found("unknown_split", format!("no split named {name:?}")))?;
    let numeric = numeric_readout(&e.numeric);
    let binary = binary_readout(&e.binary);
    let arms: Vec<Value> = e
        .split
        .arms()
        .iter()
        .enumerate()
        .map(|(i, arm)| {
            json!({
                "arm": arm.name,
                "adapter": arm.adapter,
                "version": arm.version,
                "weight": arm.weight,
                "requests": e.requests[i],
                "numeric": numeric[i],
                "yes_no": binary[i],
            })
        })
        .collect();
    Ok(Json(
        json!({ "split": name, "confidence": crate::splits::CONFIDENCE_LEVEL, "arms": arms }),
    ))
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OutcomeBody {
    pub response_id: String,
    pub value: Value,
}

/// Records an outcome's `value` in the tally of its kind: a number, or yes/no as a boolean (the
/// fuzz target `http_bodies` runs this too). A refused value leaves both tallies as they were.
pub fn record_outcome(
    numeric: &mut NumericTally,
    binary: &mut BinaryTally,
    value: &Value,
) -> Result<(), ApiError> {
    match value {
        Value::Bool(b) => binary.record(*b),
        Value::Number(n) => {
            let x = n.as_f64().unwrap_or(f64::NAN);
            numeric
                .record(x)
                .map_err(|e| ApiError::bad_request("invalid_outcome", e.to_string()))?;
        }
        _ => {
            return Err(ApiError::bad_request(
                "invalid_outcome",
                "field `value` must be a number or true/false",
            ));
        }
    }
    Ok(())
}

/// `POST /outcomes`: records the outcome of one response that a split served (a number, or
/// yes/no as a boolean); one outcome per response.
pub async fn post_outcome(
    State(state): State<SharedState>,
    headers: HeaderMap,
    ApiJson(body): ApiJson<OutcomeBody>,
) -> Result<Json<Value>, ApiError> {
    state.tenants.authenticate(authorization(&headers))?;
    let mut book = state.splits.book.lock().unwrap();
    let Some((split, arm, recorded)) = book.responses.get(&body.response_id).cloned() else {
        return Err(ApiError::not_found(
            "unknown_response",
            format!(
                "response {:?} was not served by a split (or is too old to remember)",
                body.response_id
            ),
        ));
    };
    if recorded {
        return Err(ApiError::conflict(
            "outcome_recorded",
            format!("response {:?} already has an outcome", body.response_id),
        ));
    }
    let entry = book.splits.get_mut(&split).ok_or_else(|| {
        ApiError::not_found("unknown_split", format!("split {split:?} was deleted"))
    })?;
    if arm >= entry.numeric.len() {
        return Err(ApiError::conflict(
            "split_changed",
            format!("split {split:?} no longer has that arm"),
        ));
    }
    record_outcome(&mut entry.numeric[arm], &mut entry.binary[arm], &body.value)?;
    let arm_name = entry.split.arms()[arm].name.clone();
    book.responses
        .get_mut(&body.response_id)
        .expect("present")
        .2 = true;
    Ok(Json(
        json!({"response_id": body.response_id, "split": split, "arm": arm_name, "recorded": true}),
    ))
}
