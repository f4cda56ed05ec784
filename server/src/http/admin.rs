//! The admin API (bearer admin token): upload a package as a new version (it goes live), set
//! the live version, roll back, retire a version, pin and unpin, and list adapters with their
//! versions, residency and memory.

use axum::Json;
use axum::extract::{Path, State};
use axum::http::{HeaderMap, StatusCode};
use serde::Deserialize;
use serde_json::{Value, json};
use switchyard_adapters::AdapterName;
use switchyard_adapters::package::PackageBytes;
use switchyard_adapters::store::StoreError;

use crate::http::SharedState;
use crate::http::error::ApiError;
use crate::http::extract::{ApiBytes, ApiJson};
use crate::http::splits::authorization;

/// Refuses a request without the configured admin token.
pub(crate) fn require_admin(state: &SharedState, headers: &HeaderMap) -> Result<(), ApiError> {
    crate::http::auth::check_admin(state.admin_token.as_deref(), authorization(headers))?;
    Ok(())
}

fn name_of(raw: &str) -> Result<AdapterName, ApiError> {
    AdapterName::new(raw).map_err(|e| ApiError::bad_request("invalid_name", e.to_string()))
}

fn store_error(e: StoreError) -> ApiError {
    let text = e.to_string();
    match &e {
        StoreError::Package(_) => {
            ApiError::new(StatusCode::UNPROCESSABLE_ENTITY, "invalid_package", text)
        }
        StoreError::Name(_) => ApiError::bad_request("invalid_name", text),
        StoreError::BadVersion { .. } => ApiError::bad_request("invalid_version", text),
        StoreError::UnknownAdapter { .. } => ApiError::not_found("unknown_target", text),
        StoreError::UnknownVersion { .. } => ApiError::not_found("unknown_version", text),
        StoreError::NothingToRollBack { .. } => ApiError::conflict("no_previous_version", text),
        StoreError::RetireLive { .. } => ApiError::conflict("version_is_live", text),
        StoreError::Conflict { .. } => ApiError::conflict("store_contended", text),
        StoreError::Remote { .. } => {
            ApiError::new(StatusCode::SERVICE_UNAVAILABLE, "store_unreachable", text)
        }
        StoreError::Io { .. } if e.is_storage_full() => {
            ApiError::new(StatusCode::INSUFFICIENT_STORAGE, "store_full", text)
        }
        _ => ApiError::internal(text),
    }
}

/// Runs a blocking store or registry call off the async workers, then makes this process's
/// registry see the change at once (other processes see it through the watcher).
async fn blocking<T: Send + 'static>(
    state: &SharedState,
    f: impl FnOnce(&switchyard_adapters::registry::Registry) -> Result<T, ApiError> + Send + 'static,
) -> Result<T, ApiError> {
    let registry = state.registry.clone();
    tokio::task::spawn_blocking(move || {
        let out = f(&registry);
        registry.poll_once();
        out
    })
    .await
    .map_err(|e| ApiError::internal(format!("admin task failed: {e}")))?
}

/// `PUT /admin/adapters/{name}`: the body is a package file; it is validated against the base
/// model, stored as a new version and made live.
pub async fn upload(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    ApiBytes(body): ApiBytes,
) -> Result<(StatusCode, Json<Value>), ApiError> {
    require_admin(&state, &headers)?;
    let name = name_of(&name)?;
    if body.is_empty() {
        return Err(ApiError::bad_request(
            "empty_body",
            "the body must be an adapter package (a safetensors file)",
        ));
    }
    let spec = state.backbone.spec().clone();
    let source = format!("upload for {name}");
    let published = blocking(&state, move |registry| {
        let limits = *registry.store().limits();
        let bytes = PackageBytes::from_vec(body.to_vec(), &source, &limits)
            .map_err(|e| store_error(e.into()))?;
        registry
            .store()
            .publish(&name, bytes, &source, Some(&spec))
            .map_err(store_error)
    })
    .await?;
    if published.unchanged {
        tracing::info!(adapter = %published.name, version = %published.version, "upload was the live version already; nothing changed");
    } else {
        tracing::info!(adapter = %published.name, version = %published.version, "version published and live");
    }
    // An identical re-upload changes nothing: 200 and `unchanged`, not 201.
    let status = if published.unchanged {
        StatusCode::OK
    } else {
        StatusCode::CREATED
    };
    Ok((
        status,
        Json(json!({
            "name": published.name.as_str(),
            "version": published.version,
            "live": true,
            "unchanged": published.unchanged,
            "replaced": published.replaced,
        })),
    ))
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LiveBody {
    pub version: String,
}

/// `POST /admin/adapters/{name}/live` with `{"version": "..."}`.
pub async fn set_live(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    ApiJson(body): ApiJson<LiveBody>,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    let name = name_of(&name)?;
    let n = name.clone();
    let pointer = blocking(&state, move |r| {
        r.store().set_live(&n, &body.version).map_err(store_error)
    })
    .await?;
    Ok(Json(
        json!({"name": name.as_str(), "live": pointer.live, "previous": pointer.previous}),
    ))
}

/// `POST /admin/adapters/{name}/rollback`: back to the previous live version.
pub async fn rollback(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    let name = name_of(&name)?;
    let n = name.clone();
    let pointer = blocking(&state, move |r| r.store().rollback(&n).map_err(store_error)).await?;
    Ok(Json(
        json!({"name": name.as_str(), "live": pointer.live, "previous": pointer.previous}),
    ))
}

/// `DELETE /admin/adapters/{name}/versions/{version}`: refused while that version is live or a
/// split arm holds it.
pub async fn retire(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path((name, version)): Path<(String, String)>,
) -> Result<StatusCode, ApiError> {
    require_admin(&state, &headers)?;
    let name = name_of(&name)?;
    let splits = state.clone();
    blocking(&state, move |r| {
        // Refused while a split arm holds the version; the guard keeps split edits from
        // starting to hold it until the file is gone.
        let _held = splits
            .splits
            .guard_retire(name.as_str(), &version)
            .map_err(|e| ApiError::conflict("version_held_by_split", e.to_string()))?;
        r.store().retire(&name, &version).map_err(store_error)
    })
    .await?;
    Ok(StatusCode::NO_CONTENT)
}

/// `PUT /admin/adapters/{name}/pin`: keeps the live version resident.
pub async fn pin(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    let n = name.clone();
    blocking(&state, move |r| {
        r.pin(&n).map_err(|e| {
            if e.is_unknown_adapter() {
                ApiError::unknown_target("adapter", &n)
            } else {
                ApiError::conflict("cannot_pin", e.to_string())
            }
        })
    })
    .await?;
    Ok(Json(json!({"name": name, "pinned": true})))
}

/// `DELETE /admin/adapters/{name}/pin`.
pub async fn unpin(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    let n = name.clone();
    blocking(&state, move |r| {
        r.unpin(&n)
            .map_err(|e| ApiError::not_found("unknown_target", e.to_string()))
    })
    .await?;
    Ok(Json(json!({"name": name, "pinned": false})))
}

/// `GET /admin/adapters`: every adapter in the store with its versions, which is live, what is
/// resident in which tier, the tenants whose patterns reach it, and the bytes each tier holds.
pub async fn list(
    State(state): State<SharedState>,
    headers: HeaderMap,
) -> Result<Json<Value>, ApiError> {
    require_admin(&state, &headers)?;
    let base = json!({
        "weights": state.backbone.weights_format().to_string(),
        "kernels": switchyard_kernels::dispatch::active().name(),
        "library": switchyard_kernels::onednn::in_use(
            switchyard_kernels::dispatch::active(),
            state.backbone.weights_format(),
        ),
        "weight_bytes": state.backbone.weight_bytes(),
    });
    let shared = state.clone();
    blocking(&state, move |r| {
        let names = r.store().names().map_err(store_error)?;
        let entries = r.entries();
        let pinned = r.pinned();
        let mut adapters = Vec::new();
        for name in names {
            let versions = r.store().versions(&name).map_err(store_error)?;
            let live = r.store().live(&name).ok();
            let resident: Vec<Value> = entries
                .iter()
                .filter(|e| e.name == name)
                .map(|e| json!({"version": e.version, "tier": e.tier.as_str(), "bytes": e.bytes, "held": e.held}))
                .collect();
            adapters.push(json!({
                "name": name.as_str(),
                "live": live,
                "pinned": pinned.contains(&name),
                "versions": versions.iter().map(|v| json!({"version": v.version, "bytes": v.bytes})).collect::<Vec<_>>(),
                "resident": resident,
                "last_used_ms": shared.history.last_used(name.as_str()),
                "tenants": shared.tenants.reaching(name.as_str()).into_iter()
                    .map(|(tenant, patterns)| json!({"tenant": tenant, "patterns": patterns}))
                    .collect::<Vec<_>>(),
            }));
        }
        let res = r.residency();
        Ok(Json(json!({
            "base": base,
            "adapters": adapters,
            "memory": {
                "factors": {"bytes": res.factors.bytes, "budget_bytes": res.factors.budget_bytes, "entries": res.factors.entries},
                "merged": {"bytes": res.merged.bytes, "budget_bytes": res.merged.budget_bytes, "entries": res.merged.entries},
            },
        })))
    })
    .await
}
