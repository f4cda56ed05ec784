//! The admin API (bearer admin token): upload a package as a new version (it goes live), set
//! the live version, roll back, retire a version, pin and unpin, and list adapters with their
//! versions, residency and memory.

use axum::Json;
use axum::extract::{Path, State};
use axum::http::{HeaderMap, StatusCode};
use serde::{Deserialize, Serialize};
use switchyard_adapters::AdapterName;
use switchyard_adapters::package::PackageBytes;
use switchyard_adapters::store::StoreError;
use utoipa::ToSchema;

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

/// The answer of a publish.
#[derive(Debug, Serialize, ToSchema)]
pub struct Published {
    pub name: String,
    /// The version the package was stored as (its content fingerprint).
    pub version: String,
    /// Always true: a published version goes live.
    pub live: bool,
    /// True when these exact bytes were already the live version (nothing changed).
    pub unchanged: bool,
    /// The version that was live before, if any.
    pub replaced: Option<String>,
}

/// An adapter's live version and the earlier live versions, most recent first.
#[derive(Debug, Serialize, ToSchema)]
pub struct LiveVersion {
    pub name: String,
    pub live: String,
    pub previous: Vec<String>,
}

/// Whether an adapter's live version is pinned resident.
#[derive(Debug, Serialize, ToSchema)]
pub struct Pinned {
    pub name: String,
    pub pinned: bool,
}

/// The path parameter `name`: an adapter.
#[derive(Debug, Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Path)]
pub struct AdapterPath {
    /// The adapter's name: lowercase letters, digits and single '-' between them.
    #[param(
        pattern = r"^[a-z0-9]+(-[a-z0-9]+)*$",
        max_length = 64,
        example = "north-routing"
    )]
    pub name: String,
}

/// `PUT /admin/adapters/{name}`: the body is a package file; it is validated against the base
/// model, stored as a new version and made live.
#[utoipa::path(
    put,
    path = "/admin/adapters/{name}",
    operation_id = "publish_adapter",
    tag = "adapters",
    params(AdapterPath),
    request_body(content = Vec<u8>, content_type = "application/octet-stream",
        description = "An adapter package: a safetensors file of factor tensors and its metadata"),
    responses(
        (status = 201, description = "Stored as a new version, now live", body = Published),
        (status = 200, description = "These exact bytes were the live version already; nothing changed", body = Published),
    ),
    security(("admin_token" = [])),
)]
pub async fn upload(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    ApiBytes(body): ApiBytes,
) -> Result<(StatusCode, Json<Published>), ApiError> {
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
        Json(Published {
            name: published.name.as_str().to_owned(),
            version: published.version,
            live: true,
            unchanged: published.unchanged,
            replaced: published.replaced,
        }),
    ))
}

/// The body of `POST /admin/adapters/{name}/live`.
#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct LiveBody {
    /// A stored version of the adapter: 16 lowercase hex digits.
    #[schema(pattern = r"^[0-9a-f]{16}$", example = "cd16de49f85de03a")]
    pub version: String,
}

/// `POST /admin/adapters/{name}/live` with `{"version": "..."}`.
#[utoipa::path(
    post,
    path = "/admin/adapters/{name}/live",
    operation_id = "set_live_version",
    tag = "adapters",
    params(AdapterPath),
    request_body = LiveBody,
    responses((status = 200, description = "The version is live", body = LiveVersion)),
    security(("admin_token" = [])),
)]
pub async fn set_live(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
    ApiJson(body): ApiJson<LiveBody>,
) -> Result<Json<LiveVersion>, ApiError> {
    require_admin(&state, &headers)?;
    let name = name_of(&name)?;
    let n = name.clone();
    let pointer = blocking(&state, move |r| {
        r.store().set_live(&n, &body.version).map_err(store_error)
    })
    .await?;
    Ok(Json(LiveVersion {
        name: name.as_str().to_owned(),
        live: pointer.live,
        previous: pointer.previous,
    }))
}

/// `POST /admin/adapters/{name}/rollback`: back to the previous live version.
#[utoipa::path(
    post,
    path = "/admin/adapters/{name}/rollback",
    operation_id = "roll_back_adapter",
    tag = "adapters",
    params(AdapterPath),
    responses((status = 200, description = "The previous version is live again", body = LiveVersion)),
    security(("admin_token" = [])),
)]
pub async fn rollback(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<Json<LiveVersion>, ApiError> {
    require_admin(&state, &headers)?;
    let name = name_of(&name)?;
    let n = name.clone();
    let pointer = blocking(&state, move |r| r.store().rollback(&n).map_err(store_error)).await?;
    Ok(Json(LiveVersion {
        name: name.as_str().to_owned(),
        live: pointer.live,
        previous: pointer.previous,
    }))
}

/// `DELETE /admin/adapters/{name}/versions/{version}`: refused while that version is live or a
/// split arm holds it.
#[utoipa::path(
    delete,
    path = "/admin/adapters/{name}/versions/{version}",
    operation_id = "retire_version",
    tag = "adapters",
    params(
        ("name" = String, Path, description = "The adapter's name", pattern = r"^[a-z0-9]+(-[a-z0-9]+)*$", max_length = 64, example = "north-routing"),
        ("version" = String, Path, description = "One of its stored versions: 16 lowercase hex digits", pattern = r"^[0-9a-f]{16}$", example = "cd16de49f85de03a"),
    ),
    responses((status = 204, description = "The version is gone from the store")),
    security(("admin_token" = [])),
)]
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
#[utoipa::path(
    put,
    path = "/admin/adapters/{name}/pin",
    operation_id = "pin_adapter",
    tag = "adapters",
    params(AdapterPath),
    responses((status = 200, description = "The live version stays resident", body = Pinned)),
    security(("admin_token" = [])),
)]
pub async fn pin(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<Json<Pinned>, ApiError> {
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
    Ok(Json(Pinned { name, pinned: true }))
}

/// `DELETE /admin/adapters/{name}/pin`.
#[utoipa::path(
    delete,
    path = "/admin/adapters/{name}/pin",
    operation_id = "unpin_adapter",
    tag = "adapters",
    params(AdapterPath),
    responses((status = 200, description = "The pin is gone; the adapter may be evicted", body = Pinned)),
    security(("admin_token" = [])),
)]
pub async fn unpin(
    State(state): State<SharedState>,
    headers: HeaderMap,
    Path(name): Path<String>,
) -> Result<Json<Pinned>, ApiError> {
    require_admin(&state, &headers)?;
    let n = name.clone();
    blocking(&state, move |r| {
        r.unpin(&n)
            .map_err(|e| ApiError::not_found("unknown_target", e.to_string()))
    })
    .await?;
    Ok(Json(Pinned {
        name,
        pinned: false,
    }))
}

/// The base model as the server holds it.
#[derive(Debug, Serialize, ToSchema)]
pub struct BaseModel {
    /// The weight format (`f32`, `bf16`, `int8`, `int4` and their variants).
    pub weights: String,
    /// The kernel path the products run on (`portable`, `avx2`, `avx512`, `avx512-vnni`,
    /// `avx512-bf16`, `amx`).
    pub kernels: String,
    /// The library that runs some products, when one does (oneDNN); else null.
    pub library: Option<String>,
    /// Bytes the base model's weights hold.
    pub weight_bytes: usize,
}

/// One resident copy of an adapter version.
#[derive(Debug, Serialize, ToSchema)]
pub struct ResidentCopy {
    pub version: String,
    /// `factors` (low-rank factors) or `merged` (folded into a copy of the weights).
    pub tier: String,
    pub bytes: usize,
    /// A request in flight holds it (it cannot be evicted now).
    pub held: bool,
}

/// A stored version.
#[derive(Debug, Serialize, ToSchema)]
pub struct StoredVersion {
    pub version: String,
    pub bytes: u64,
}

/// A tenant whose key reaches an adapter, with the patterns that reach it.
#[derive(Debug, Serialize, ToSchema)]
pub struct Reach {
    pub tenant: String,
    pub patterns: Vec<String>,
}

/// One adapter of the store.
#[derive(Debug, Serialize, ToSchema)]
pub struct AdapterEntry {
    pub name: String,
    /// The live version (null only while the store is being changed).
    pub live: Option<String>,
    pub pinned: bool,
    pub versions: Vec<StoredVersion>,
    pub resident: Vec<ResidentCopy>,
    /// When it last served a request (milliseconds since the Unix epoch); null: not since start.
    pub last_used_ms: Option<u64>,
    pub tenants: Vec<Reach>,
}

/// Bytes, budget and entries of one memory tier.
#[derive(Debug, Serialize, ToSchema)]
pub struct TierMemory {
    pub bytes: usize,
    pub budget_bytes: usize,
    pub entries: usize,
}

/// Both memory tiers.
#[derive(Debug, Serialize, ToSchema)]
pub struct Memory {
    pub factors: TierMemory,
    pub merged: TierMemory,
}

/// The answer of `GET /admin/adapters`.
#[derive(Debug, Serialize, ToSchema)]
pub struct AdapterListing {
    pub base: BaseModel,
    pub adapters: Vec<AdapterEntry>,
    pub memory: Memory,
}

/// `GET /admin/adapters`: every adapter in the store with its versions, which is live, what is
/// resident in which tier, the tenants whose patterns reach it, and the bytes each tier holds.
#[utoipa::path(
    get,
    path = "/admin/adapters",
    operation_id = "list_adapters",
    tag = "adapters",
    responses((status = 200, description = "The base model, every adapter and the memory tiers", body = AdapterListing)),
    security(("admin_token" = [])),
)]
pub async fn list(
    State(state): State<SharedState>,
    headers: HeaderMap,
) -> Result<Json<AdapterListing>, ApiError> {
    require_admin(&state, &headers)?;
    let base = BaseModel {
        weights: state.backbone.weights_format().to_string(),
        kernels: switchyard_kernels::dispatch::active().name().to_owned(),
        library: switchyard_kernels::onednn::in_use(
            switchyard_kernels::dispatch::active(),
            state.backbone.weights_format(),
        ),
        weight_bytes: state.backbone.weight_bytes(),
    };
    let shared = state.clone();
    blocking(&state, move |r| {
        let names = r.store().names().map_err(store_error)?;
        let entries = r.entries();
        let pinned = r.pinned();
        let mut adapters = Vec::new();
        for name in names {
            let versions = r.store().versions(&name).map_err(store_error)?;
            let live = r.store().live(&name).ok();
            let resident = entries
                .iter()
                .filter(|e| e.name == name)
                .map(|e| ResidentCopy {
                    version: e.version.clone(),
                    tier: e.tier.as_str().to_owned(),
                    bytes: e.bytes,
                    held: e.held,
                })
                .collect();
            adapters.push(AdapterEntry {
                name: name.as_str().to_owned(),
                live,
                pinned: pinned.contains(&name),
                versions: versions
                    .iter()
                    .map(|v| StoredVersion {
                        version: v.version.clone(),
                        bytes: v.bytes,
                    })
                    .collect(),
                resident,
                last_used_ms: shared.history.last_used(name.as_str()),
                tenants: shared
                    .tenants
                    .reaching(name.as_str())
                    .into_iter()
                    .map(|(tenant, patterns)| Reach {
                        tenant: tenant.to_owned(),
                        patterns: patterns.into_iter().map(str::to_owned).collect(),
                    })
                    .collect(),
            });
        }
        let res = r.residency();
        let tier = |t: &switchyard_adapters::events::TierResidency| TierMemory {
            bytes: t.bytes,
            budget_bytes: t.budget_bytes,
            entries: t.entries,
        };
        Ok(Json(AdapterListing {
            base,
            adapters,
            memory: Memory {
                factors: tier(&res.factors),
                merged: tier(&res.merged),
            },
        }))
    })
    .await
}
