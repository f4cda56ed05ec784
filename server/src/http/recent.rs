//! `GET /admin/history` and the task that fills it: a [`Sample`] of the server's state every
//! `metrics.history_interval_ms`, the last hour of them kept (see [`crate::history`]).

use std::time::Duration;

use axum::Json;
use axum::extract::{RawQuery, State};
use axum::http::{HeaderMap, StatusCode};
use serde::Serialize;
use utoipa::ToSchema;

use super::SharedState;
use super::admin::require_admin;
use super::error::ApiError;
use crate::history::{Sample, now_ms};

/// One sample of `state` now.
pub fn take(state: &super::AppState) -> Sample {
    let residency = state.registry.residency();
    let cache = state.registry.store().cache_stats();
    let (requests, errors) = state.history.counts();
    Sample {
        at_ms: now_ms(),
        factors_bytes: residency.factors.bytes as u64,
        factors_budget_bytes: residency.factors.budget_bytes as u64,
        merged_bytes: residency.merged.bytes as u64,
        merged_budget_bytes: residency.merged.budget_bytes as u64,
        disk_bytes: cache.map(|c| c.bytes),
        disk_budget_bytes: cache.map(|c| c.max_bytes),
        queued: state.engine.queued() as u64,
        loads: state.registry.load_count(),
        evictions: state.metrics.evictions() + cache.map_or(0, |c| c.evictions),
        requests,
        errors,
    }
}

/// Takes a sample now and then every interval, until the runtime stops.
pub async fn sample_every(state: SharedState) {
    let mut tick = tokio::time::interval(state.history.interval());
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        tick.tick().await;
        // Reading the package cache's numbers takes a lock the store's readers share: off the
        // async threads.
        let s = state.clone();
        match tokio::task::spawn_blocking(move || take(&s)).await {
            Ok(sample) => state.history.push(sample),
            Err(e) => tracing::warn!(error = %e, "taking a history sample failed"),
        }
    }
}

/// The `since_ms` of `GET /admin/history?since_ms=N`, the one query parameter it takes.
fn since_ms(query: Option<&str>) -> Result<Option<u64>, ApiError> {
    let Some(query) = query.filter(|q| !q.is_empty()) else {
        return Ok(None);
    };
    let refused =
        |message: String| ApiError::new(StatusCode::BAD_REQUEST, "invalid_query", message);
    let mut since = None;
    for pair in query.split('&') {
        match pair.split_once('=') {
            Some(("since_ms", value)) => {
                // At most i64::MAX, as the description's int64 says (a time in milliseconds
                // since the epoch is far below it).
                since = Some(value.parse::<i64>().ok().and_then(|v| u64::try_from(v).ok()).ok_or_else(|| {
                    refused(format!(
                        "since_ms must be a whole number of milliseconds since the Unix epoch, not {value:?}"
                    ))
                })?);
            }
            _ => {
                let name = pair.split('=').next().unwrap_or(pair);
                return Err(refused(format!(
                    "unknown query parameter {name:?}; /admin/history takes only since_ms"
                )));
            }
        }
    }
    Ok(since)
}

/// The answer of `GET /admin/history`.
#[derive(Debug, Serialize, ToSchema)]
pub struct HistoryAnswer {
    /// How often a sample is taken.
    pub interval_ms: u64,
    /// How many samples are kept (an hour's worth).
    pub kept: usize,
    /// The server's clock now, in milliseconds since the Unix epoch.
    pub now_ms: u64,
    /// Oldest first.
    pub samples: Vec<Sample>,
}

/// `GET /admin/history`: the samples of the last hour, oldest first, with the interval they
/// were taken at; `?since_ms=N` keeps only those taken after N (a page that has the rest).
#[utoipa::path(
    get,
    path = "/admin/history",
    operation_id = "recent_history",
    tag = "operations",
    params(("since_ms" = Option<u64>, Query, description = "Only samples taken after this time (milliseconds since the Unix epoch)")),
    responses((status = 200, description = "The samples of the last hour", body = HistoryAnswer)),
    security(("admin_token" = [])),
)]
pub async fn history(
    State(state): State<SharedState>,
    headers: HeaderMap,
    RawQuery(query): RawQuery,
) -> Result<Json<HistoryAnswer>, ApiError> {
    require_admin(&state, &headers)?;
    let since = since_ms(query.as_deref())?;
    let interval: Duration = state.history.interval();
    let mut samples = state.history.samples();
    if let Some(after) = since {
        samples.retain(|s| s.at_ms > after);
    }
    Ok(Json(HistoryAnswer {
        interval_ms: interval.as_millis() as u64,
        kept: state.history.capacity(),
        now_ms: now_ms(),
        samples,
    }))
}

#[cfg(test)]
mod tests {
    use super::since_ms;

    #[test]
    fn the_query_takes_since_ms_and_names_what_it_refuses() {
        assert_eq!(since_ms(None).unwrap(), None);
        assert_eq!(since_ms(Some("")).unwrap(), None);
        assert_eq!(
            since_ms(Some("since_ms=1700000000000")).unwrap(),
            Some(1_700_000_000_000)
        );
        let bad = since_ms(Some("since_ms=yesterday")).unwrap_err();
        assert!(bad.message.contains("\"yesterday\""), "{}", bad.message);
        // Found by the API fuzzer: the description's int64 ends at i64::MAX.
        assert!(since_ms(Some("since_ms=9223372036854775807")).is_ok());
        let over = since_ms(Some("since_ms=9223372036854775808")).unwrap_err();
        assert_eq!(over.code, "invalid_query");
        let unknown = since_ms(Some("from=3")).unwrap_err();
        assert!(unknown.message.contains("\"from\""), "{}", unknown.message);
    }
}
