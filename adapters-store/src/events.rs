//! Swap events: what the registry did (loaded, merged, evicted, freed, flipped, refused), how long
//! each stage took, and the bytes each tier holds right after. They are plain data, delivered to
//! every subscriber's bounded channel; the server turns them into metrics, and a subscriber that
//! falls behind loses events (counted) rather than slowing the registry down.

use std::sync::mpsc::{Receiver, SyncSender, TrySendError};
use std::time::{Duration, SystemTime};

use crate::sync::{AtomicU64, Mutex, Ordering};

/// The two residency tiers a registry keeps in memory.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Tier {
    /// An adapter's factors, applied per row beside the shared base matmul.
    Factors,
    /// A merged variant: the targeted base matrices with `s B A` added.
    Merged,
}

impl Tier {
    pub fn as_str(self) -> &'static str {
        match self {
            Tier::Factors => "factors",
            Tier::Merged => "merged",
        }
    }
}

/// How long each stage of bringing a version in took; zero for stages that did not run.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct StageTimings {
    /// Reading the file into memory, with the structural checks that run as it streams in
    /// (header, dtypes, spans, finite values).
    pub read: Duration,
    /// Checks against the base model (fingerprint, targets, shapes, ranks).
    pub validate: Duration,
    /// Turning the package into resident factors.
    pub convert: Duration,
    /// Building a merged variant.
    pub merge: Duration,
}

impl StageTimings {
    pub fn total(&self) -> Duration {
        self.read + self.validate + self.convert + self.merge
    }
}

/// Bytes and entries one tier holds.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct TierResidency {
    pub budget_bytes: usize,
    /// Every entry the tier holds.
    pub bytes: usize,
    pub entries: usize,
    /// Entries a request still holds a handle to; they cannot be evicted.
    pub held_bytes: usize,
    pub held_entries: usize,
    /// Entries kept by a pin (factors tier only).
    pub pinned_bytes: usize,
}

impl TierResidency {
    /// Bytes held beyond the versions in use: what the budget bounds.
    pub fn unheld_bytes(&self) -> usize {
        self.bytes - self.held_bytes
    }
}

/// A snapshot of both tiers.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Residency {
    pub factors: TierResidency,
    pub merged: TierResidency,
}

/// What happened.
#[derive(Debug, Clone, PartialEq)]
pub enum SwapKind {
    /// A version's factors became resident (a cold load).
    Loaded,
    /// A merged variant was built.
    Merged,
    /// An entry left a tier to keep it within its budget.
    Evicted { tier: Tier },
    /// An entry of a version that is no longer live left a tier once its last holder finished.
    Freed { tier: Tier },
    /// Requests resolved from now on get this version; `from` was live before.
    Flipped { from: Option<String> },
    /// A version could not be brought in; the message says why.
    Refused { reason: String },
    /// A pin was dropped because the pinned factors no longer fit the budget.
    Unpinned,
}

/// One swap event.
#[derive(Debug, Clone, PartialEq)]
pub struct SwapEvent {
    pub name: String,
    pub version: String,
    pub kind: SwapKind,
    pub timings: StageTimings,
    /// Bytes of the entry concerned (0 where there is none).
    pub bytes: usize,
    /// Both tiers right after the event.
    pub residency: Residency,
    pub at: SystemTime,
}

/// Fans events out to subscribers.
#[derive(Debug, Default)]
pub(crate) struct EventBus {
    subscribers: Mutex<Vec<SyncSender<SwapEvent>>>,
    dropped: AtomicU64,
}

impl EventBus {
    pub(crate) fn subscribe(&self, capacity: usize) -> Receiver<SwapEvent> {
        let (tx, rx) = std::sync::mpsc::sync_channel(capacity.max(1));
        self.subscribers.lock().push(tx);
        rx
    }

    pub(crate) fn emit(&self, event: SwapEvent) {
        tracing::debug!(
            adapter = %event.name,
            version = %event.version,
            kind = ?event.kind,
            total_ms = event.timings.total().as_secs_f64() * 1e3,
            "swap event"
        );
        let mut subs = self.subscribers.lock();
        subs.retain(|tx| match tx.try_send(event.clone()) {
            Ok(()) => true,
            Err(TrySendError::Full(_)) => {
                self.dropped.fetch_add(1, Ordering::Relaxed);
                true
            }
            Err(TrySendError::Disconnected(_)) => false,
        });
    }

    pub(crate) fn dropped(&self) -> u64 {
        self.dropped.load(Ordering::Relaxed)
    }
}
