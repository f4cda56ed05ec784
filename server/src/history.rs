//! The server's own recent history, for the status page and anyone else who wants the last hour
//! without a time-series database: every `metrics.history_interval_ms` (10 s by default) a
//! [`Sample`] of memory per tier against its budget, the queue, and the running counts of loads,
//! evictions, requests and errors; the last hour of samples kept in memory (a ring, so its size
//! is fixed) and served at `GET /admin/history`, with when each adapter last served a request.
//! A page opened now draws the last hour, not only what it has seen since it opened.

use std::collections::{HashMap, VecDeque};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Mutex, PoisonError};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use serde::Serialize;

/// How far back the history reaches.
pub const SPAN: Duration = Duration::from_secs(3600);

/// One sample. Byte and count fields are whole numbers; the counts only grow (a chart shows
/// their differences between samples).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, utoipa::ToSchema)]
pub struct Sample {
    /// When it was taken, in milliseconds since the Unix epoch.
    pub at_ms: u64,
    pub factors_bytes: u64,
    pub factors_budget_bytes: u64,
    pub merged_bytes: u64,
    pub merged_budget_bytes: u64,
    /// The package cache in front of an object store; absent on a local-disk store.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub disk_bytes: Option<u64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub disk_budget_bytes: Option<u64>,
    /// Requests waiting for the engine.
    pub queued: u64,
    /// Adapter versions brought into the factor tier since the server started.
    pub loads: u64,
    /// Entries evicted from any tier (factors, merged, disk) since the server started.
    pub evictions: u64,
    /// Inference requests answered since the server started, and how many of them with a
    /// status of 400 or more.
    pub requests: u64,
    pub errors: u64,
}

/// The ring of samples and the last use of each adapter.
#[derive(Debug)]
pub struct History {
    interval: Duration,
    capacity: usize,
    samples: Mutex<VecDeque<Sample>>,
    last_used: Mutex<HashMap<String, u64>>,
    requests: AtomicU64,
    errors: AtomicU64,
}

/// Milliseconds since the Unix epoch, now.
pub fn now_ms() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as u64)
}

impl History {
    /// A history sampled every `interval`, keeping [`SPAN`] of samples.
    pub fn new(interval: Duration) -> Self {
        let interval = interval.max(Duration::from_millis(1));
        let capacity = (SPAN.as_millis() / interval.as_millis()).max(1) as usize;
        Self {
            interval,
            capacity,
            samples: Mutex::new(VecDeque::with_capacity(capacity)),
            last_used: Mutex::new(HashMap::new()),
            requests: AtomicU64::new(0),
            errors: AtomicU64::new(0),
        }
    }

    pub fn interval(&self) -> Duration {
        self.interval
    }

    /// Most samples kept.
    pub fn capacity(&self) -> usize {
        self.capacity
    }

    /// Counts an answered inference request; `adapter` is the adapter that served it (none
    /// for the base model or a request refused before routing). Only an answer without an
    /// error counts as the adapter's use.
    pub fn request(&self, adapter: Option<&str>, status: u16) {
        self.requests.fetch_add(1, Ordering::Relaxed);
        if status >= 400 {
            self.errors.fetch_add(1, Ordering::Relaxed);
        } else if let Some(name) = adapter {
            let mut used = self
                .last_used
                .lock()
                .unwrap_or_else(PoisonError::into_inner);
            match used.get_mut(name) {
                Some(at) => *at = now_ms(),
                None => {
                    used.insert(name.to_owned(), now_ms());
                }
            }
        }
    }

    /// When `adapter` last served a request, in milliseconds since the Unix epoch.
    pub fn last_used(&self, adapter: &str) -> Option<u64> {
        self.last_used
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .get(adapter)
            .copied()
    }

    /// (requests, errors) counted so far.
    pub fn counts(&self) -> (u64, u64) {
        (
            self.requests.load(Ordering::Relaxed),
            self.errors.load(Ordering::Relaxed),
        )
    }

    /// Appends a sample, dropping the oldest once the ring is full.
    pub fn push(&self, sample: Sample) {
        let mut samples = self.samples.lock().unwrap_or_else(PoisonError::into_inner);
        while samples.len() >= self.capacity {
            samples.pop_front();
        }
        samples.push_back(sample);
    }

    /// The samples kept, oldest first.
    pub fn samples(&self) -> Vec<Sample> {
        self.samples
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .iter()
            .cloned()
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample(at_ms: u64) -> Sample {
        Sample {
            at_ms,
            factors_bytes: 0,
            factors_budget_bytes: 0,
            merged_bytes: 0,
            merged_budget_bytes: 0,
            disk_bytes: None,
            disk_budget_bytes: None,
            queued: 0,
            loads: 0,
            evictions: 0,
            requests: 0,
            errors: 0,
        }
    }

    #[test]
    fn the_ring_keeps_one_hour_of_samples_oldest_first() {
        let h = History::new(Duration::from_secs(10));
        assert_eq!(h.capacity(), 360);
        for i in 0..400 {
            h.push(sample(i));
        }
        let kept = h.samples();
        assert_eq!(kept.len(), 360);
        assert_eq!(kept[0].at_ms, 40);
        assert_eq!(kept[359].at_ms, 399);
    }

    #[test]
    fn requests_count_errors_and_the_last_use_of_each_adapter() {
        let h = History::new(Duration::from_secs(1));
        h.request(Some("north-routing"), 200);
        h.request(None, 429);
        h.request(Some("north-routing"), 500);
        h.request(Some("north-urgency"), 500);
        assert_eq!(h.counts(), (4, 3));
        let at = h.last_used("north-routing").unwrap();
        assert!(at.abs_diff(now_ms()) < 60_000);
        assert_eq!(h.last_used("north-urgency"), None);
    }
}
