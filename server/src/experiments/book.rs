//! [`Experiments`]: the splits of this server, as the HTTP layer uses them. The current
//! definitions live in memory for the assignment every split request makes; every change goes
//! through the [`ExperimentStore`] first and reaches memory only once it is durable. Response
//! records go through the group-committing [`ResponseLog`]; outcomes and edits are written
//! directly. A background thread prunes response records older than the retention.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::sync::mpsc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use switchyard_adapters::AdapterName;
use switchyard_adapters::registry::Registry;

use crate::splits::rollout::{PolicyError, RolloutPolicy};
use crate::splits::{ArmSpec, NumericTally, Split, SplitError};
use crate::sync::{Mutex, MutexGuard, RwLock};

use super::arms::{ArmProblem, check_arms};
use super::records::{
    OutcomeRefused, OutcomeReport, OutcomeValue, PutSplit, RecordedOutcome, ServedResponse,
    SplitRecord, SplitState,
};
use super::responses::{ArmWatch, Receipt, ResponseLog};
use super::{ExperimentError, ExperimentStore, now_ms};

/// How often old response records are pruned.
const PRUNE_EVERY: Duration = Duration::from_secs(3600);

/// A split as assignment needs it.
struct LiveSplit {
    generation: i64,
    split: Split,
    /// The arm record of each arm, in the split's order.
    arm_ids: Vec<i64>,
    /// Whether the split carries a rollout policy (the rollout checks read only those).
    has_rollout: bool,
}

impl LiveSplit {
    fn from_record(record: &SplitRecord, has_rollout: bool) -> Result<Self, SplitError> {
        Ok(Self {
            has_rollout,
            generation: record.generation,
            split: record.split()?,
            arm_ids: record.arms.iter().map(|a| a.id).collect(),
        })
    }
}

/// The arm a request was given.
#[derive(Debug, Clone, PartialEq)]
pub struct Assigned {
    pub generation: i64,
    pub arm_id: i64,
    pub arm: ArmSpec,
    /// When the arm is the split's first and the split has a shadow arm: the shadow arm, to
    /// mirror this request through with its share.
    pub shadow: Option<ShadowArm>,
}

/// A split's shadow arm, as a request of its first arm needs it.
#[derive(Debug, Clone, PartialEq)]
pub struct ShadowArm {
    pub arm_id: i64,
    pub arm: ArmSpec,
    /// The share of the first arm's requests to mirror.
    pub share: f64,
}

/// Why a split definition was refused.
#[derive(Debug, thiserror::Error)]
pub enum SplitEditError {
    #[error(transparent)]
    Invalid(#[from] SplitError),
    #[error(transparent)]
    Arm(#[from] ArmProblem),
    #[error(transparent)]
    Policy(#[from] PolicyError),
    #[error(transparent)]
    Store(#[from] ExperimentError),
}

/// A split arm that holds the version someone wants to retire.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error(
    "version {version} of {adapter:?} is held by arm {arm:?} of split {split:?}; change or delete the split before retiring it"
)]
pub struct HeldBySplit {
    pub adapter: String,
    pub version: String,
    pub split: String,
    pub arm: String,
}

/// Held while a split is edited, and while a version is retired: a split can never come to hold
/// a version that is being retired.
pub struct EditGuard<'a>(#[allow(dead_code)] MutexGuard<'a, ()>);

/// The splits of this server.
pub struct Experiments {
    pub(super) store: Arc<dyn ExperimentStore>,
    live: Arc<RwLock<BTreeMap<String, LiveSplit>>>,
    pub(super) edits: Arc<Mutex<()>>,
    log: ResponseLog,
    pruner: Option<Pruner>,
    refresher: Option<Pruner>,
    /// On a shared store, when a request last named a split this replica did not know and the
    /// definitions were read again for it (at most once per [`MISS_RELOAD_GAP`]).
    miss_reloaded: Option<Mutex<Option<Instant>>>,
}

/// The shortest time between two reads of the shared definitions that requests naming an
/// unknown split cause, so a flood of such requests costs the database little.
const MISS_RELOAD_GAP: Duration = Duration::from_millis(100);

/// Reads the definitions again into `live`, under the edit lock so that a local edit is never
/// overwritten by an older read.
fn reload_live(
    store: &dyn ExperimentStore,
    live: &RwLock<BTreeMap<String, LiveSplit>>,
    edits: &Mutex<()>,
) {
    let _edit = edits.lock();
    match load_live(store) {
        Ok(fresh) => *live.write() = fresh,
        Err(e) => {
            tracing::warn!(error = %e, "reading the shared splits failed; keeping the last ones")
        }
    }
}

/// The split definitions in `store`, as assignment needs them.
fn load_live(store: &dyn ExperimentStore) -> anyhow::Result<BTreeMap<String, LiveSplit>> {
    let mut live = BTreeMap::new();
    for state in store.splits()? {
        let record = state.record();
        let split = LiveSplit::from_record(&record, state.rollout.is_some())
            .map_err(|e| anyhow::anyhow!("stored split {:?}: {e}", record.name))?;
        live.insert(record.name, split);
    }
    Ok(live)
}

impl std::fmt::Debug for Experiments {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Experiments").finish_non_exhaustive()
    }
}

impl Experiments {
    /// The splits that carry a rollout policy, as this replica last read them.
    pub(super) fn rollout_splits(&self) -> Vec<String> {
        self.live
            .read()
            .iter()
            .filter(|(_, s)| s.has_rollout)
            .map(|(name, _)| name.clone())
            .collect()
    }

    /// Reads the split definitions again into memory (after a rollout changed weights).
    pub(super) fn reload(&self) {
        reload_live(self.store.as_ref(), &self.live, &self.edits);
    }

    /// Loads the splits of `store`, starts the response log, and (with `keep_responses`) prunes
    /// response records older than that now and every hour. With `reload_every` (a store that
    /// other replicas write too) the definitions are read again at that interval, so a split
    /// created or edited through another replica is assigned here as well.
    pub fn open(
        store: Arc<dyn ExperimentStore>,
        keep_responses: Option<Duration>,
        reload_every: Option<Duration>,
    ) -> anyhow::Result<Self> {
        let live = Arc::new(RwLock::new(load_live(store.as_ref())?));
        let edits = Arc::new(Mutex::new(()));
        let log = ResponseLog::start(store.clone())?;
        let pruner = keep_responses
            .map(|keep| Pruner::start(store.clone(), keep))
            .transpose()?;
        let refresher = reload_every
            .map(|every| {
                let (store, live, edits) = (store.clone(), live.clone(), edits.clone());
                Pruner::every("switchyard-splits", every, move || {
                    reload_live(store.as_ref(), &live, &edits)
                })
            })
            .transpose()?;
        Ok(Self {
            store,
            live,
            edits,
            log,
            pruner,
            miss_reloaded: reload_every.map(|_| Mutex::new(None)),
            refresher,
        })
    }

    /// On a store other replicas share, reads the split definitions again because a request
    /// named `name`, which this replica does not know (another replica may have just created
    /// it); true when `name` is known afterwards. At most once per 100 ms; false at once on a
    /// store of this replica's own. Blocking: call it off the async threads.
    pub fn reload_for_unknown(&self, name: &str) -> bool {
        let Some(last) = &self.miss_reloaded else {
            return false;
        };
        {
            let mut last = last.lock();
            if last.is_some_and(|t| t.elapsed() < MISS_RELOAD_GAP) {
                return self.live.read().contains_key(name);
            }
            *last = Some(Instant::now());
        }
        reload_live(self.store.as_ref(), &self.live, &self.edits);
        self.live.read().contains_key(name)
    }

    /// Picks an arm of split `name` for a request; `None` when there is no such split.
    pub fn assign(&self, name: &str, subject: Option<&str>) -> Option<Assigned> {
        let live = self.live.read();
        let entry = live.get(name)?;
        let assignment = entry.split.assign(subject, &mut rand::rng());
        let shadow = (assignment.index == 0)
            .then(|| {
                entry.split.arms().iter().enumerate().find_map(|(i, arm)| {
                    Some(ShadowArm {
                        arm_id: entry.arm_ids[i],
                        arm: arm.clone(),
                        share: arm.shadow?,
                    })
                })
            })
            .flatten();
        Some(Assigned {
            generation: entry.generation,
            arm_id: entry.arm_ids[assignment.index],
            arm: assignment.arm.clone(),
            shadow,
        })
    }

    /// Records how a shadow arm's answer agreed with the first arm's (blocking).
    pub fn record_agreement(&self, arm_id: i64, value: OutcomeValue) {
        if let Err(e) = self.store.record_agreement(arm_id, value) {
            tracing::warn!(arm_id, error = %e, "a shadow agreement was not recorded");
        }
    }

    /// Records that `assigned` answers response `response_id` for `tenant`; the receipt says when
    /// the record is durable.
    pub fn record_response(&self, response_id: &str, assigned: &Assigned, tenant: &str) -> Receipt {
        self.log.record(ServedResponse {
            response_id: response_id.to_owned(),
            generation: assigned.generation,
            arm_id: assigned.arm_id,
            tenant: tenant.to_owned(),
            served_ms: now_ms(),
        })
    }

    /// Starts watching a request that arm record `arm_id` serves (see [`ArmWatch`]).
    pub fn watch(&self, arm_id: i64) -> Option<ArmWatch> {
        self.log.watch(arm_id)
    }

    /// Creates or changes a split (validated by [`Split::new`]), with its rollout policy (checked
    /// against the split) or none, after checking that every arm serves something `registry`'s
    /// store has; durable when it returns. The registry is told which versions arms hold.
    pub fn put_split(
        &self,
        split: Split,
        rollout: Option<&RolloutPolicy>,
        registry: &Registry,
    ) -> Result<PutSplit, SplitEditError> {
        if let Some(policy) = rollout {
            policy.check(&split)?;
        }
        let _edit = self.edits.lock();
        check_arms(registry.store(), &split)?;
        let put = self.store.put_split(split.spec(), rollout, now_ms())?;
        let live = LiveSplit::from_record(&put.record, rollout.is_some())?;
        self.live.write().insert(put.record.name.clone(), live);
        self.keep_arm_versions(registry);
        Ok(put)
    }

    /// Deletes a split with its records; false when there was none.
    pub fn delete_split(&self, name: &str, registry: &Registry) -> Result<bool, ExperimentError> {
        let _edit = self.edits.lock();
        let deleted = self.store.delete_split(name)?;
        self.live.write().remove(name);
        self.keep_arm_versions(registry);
        Ok(deleted)
    }

    /// Every split with its tallies.
    pub fn list(&self) -> Result<Vec<SplitState>, ExperimentError> {
        self.store.splits()
    }

    /// One split with its tallies.
    pub fn split(&self, name: &str) -> Result<Option<SplitState>, ExperimentError> {
        self.store.split(name)
    }

    /// Records an outcome posted by `tenant`; durable when it returns. A number beyond the bound
    /// is refused before the response is looked up.
    pub fn post_outcome(
        &self,
        response_id: &str,
        tenant: &str,
        value: OutcomeValue,
    ) -> Result<RecordedOutcome, OutcomeRefused> {
        if let OutcomeValue::Number(x) = value {
            NumericTally::check(x)?;
        }
        self.store.record_outcome(&OutcomeReport {
            response_id: response_id.to_owned(),
            tenant: tenant.to_owned(),
            value,
            now_ms: now_ms(),
        })
    }

    /// Tells the registry which versions split arms hold, so those stay resident while not live.
    pub fn keep_arm_versions(&self, registry: &Registry) {
        let held: Vec<(AdapterName, String)> = self
            .live
            .read()
            .values()
            .flat_map(|entry| entry.split.arms())
            .filter_map(|arm| {
                let version = arm.version.clone()?;
                Some((AdapterName::new(&arm.adapter).ok()?, version))
            })
            .collect();
        registry.keep_versions(held);
    }

    /// Refuses when an arm holds `version` of `adapter`; otherwise returns a guard under which no
    /// split edit can start holding it, to keep while the version is retired.
    pub fn guard_retire(&self, adapter: &str, version: &str) -> Result<EditGuard<'_>, HeldBySplit> {
        let guard = self.edits.lock();
        for (name, entry) in self.live.read().iter() {
            if let Some(arm) = entry
                .split
                .arms()
                .iter()
                .find(|a| a.adapter == adapter && a.version.as_deref() == Some(version))
            {
                return Err(HeldBySplit {
                    adapter: adapter.to_owned(),
                    version: version.to_owned(),
                    split: name.clone(),
                    arm: arm.name.clone(),
                });
            }
        }
        Ok(EditGuard(guard))
    }
}

impl Drop for Experiments {
    fn drop(&mut self) {
        if let Some(pruner) = self.pruner.take() {
            pruner.stop();
        }
        if let Some(refresher) = self.refresher.take() {
            refresher.stop();
        }
    }
}

/// A background thread: the one that prunes old response records, or the one that reads the
/// shared split definitions again.
struct Pruner {
    stop: mpsc::Sender<()>,
    thread: JoinHandle<()>,
}

impl Pruner {
    fn start(store: Arc<dyn ExperimentStore>, keep: Duration) -> std::io::Result<Self> {
        let (stop, stopped) = mpsc::channel::<()>();
        let thread = std::thread::Builder::new()
            .name("switchyard-prune".into())
            .spawn(move || {
                loop {
                    let keep_ms = i64::try_from(keep.as_millis()).unwrap_or(i64::MAX);
                    match store.prune_responses(now_ms().saturating_sub(keep_ms)) {
                        Ok(0) => {}
                        Ok(pruned) => tracing::info!(pruned, "old response records pruned"),
                        Err(e) => tracing::error!(error = %e, "pruning response records failed"),
                    }
                    if !matches!(
                        stopped.recv_timeout(PRUNE_EVERY),
                        Err(mpsc::RecvTimeoutError::Timeout)
                    ) {
                        return;
                    }
                }
            })?;
        Ok(Self { stop, thread })
    }

    /// A thread named `name` that runs `work` now and then every `every` until stopped.
    fn every(
        name: &str,
        every: Duration,
        mut work: impl FnMut() + Send + 'static,
    ) -> std::io::Result<Self> {
        let (stop, stopped) = mpsc::channel::<()>();
        let thread = std::thread::Builder::new()
            .name(name.into())
            .spawn(move || {
                loop {
                    if !matches!(
                        stopped.recv_timeout(every),
                        Err(mpsc::RecvTimeoutError::Timeout)
                    ) {
                        return;
                    }
                    work();
                }
            })?;
        Ok(Self { stop, thread })
    }

    fn stop(self) {
        let _ = self.stop.send(());
        let _ = self.thread.join();
    }
}
