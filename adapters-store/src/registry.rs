//! The registry: resolves an adapter name to a resident version and keeps memory within budget.
//!
//! [`Registry::resolve`] maps `name` to the version the registry holds live for it (read from the
//! store's pointer the first time, then kept current by [`Registry::poll_once`], which the
//! [`crate::watcher`] thread calls), and returns a [`Handle`] to that version's factors, loading
//! them on first use. Loads are single-flight: concurrent first requests for one version share one
//! load (`flight`). Factors live in one byte-bounded LRU, merged variants ([`Registry::merged`])
//! in a second; both are `cache::ByteLru`s, which never evict what a handle still holds. A
//! pinned adapter's live version is never evicted. Each thing that happens is a
//! [`SwapEvent`] sent to subscribers.
//!
//! All shared state sits behind one lock (through `crate::sync`); loading and merging run
//! outside it.

mod cache;
mod error;
mod flight;
mod handle;

use std::collections::{HashMap, HashSet};
use std::panic::AssertUnwindSafe;
use std::sync::mpsc::Receiver;
use std::time::{Duration, Instant, SystemTime};

use switchyard_kernels::PackedWeight;

use crate::events::{EventBus, Residency, StageTimings, SwapEvent, SwapKind, Tier};
use crate::fingerprint::BaseSpec;
use crate::names::AdapterName;
use crate::site::Site;
use crate::store::Store;
use crate::sync::{Arc, AtomicU64, Mutex, Ordering};
use crate::{Adapter, MergedWeights};

use cache::{ByteLru, Removal, Resident};
use flight::Flight;

pub use error::RegistryError;
pub use handle::{AdapterHandle, Handle, MergedHandle};

/// `(name, version)`: one entry of a tier.
pub(crate) type Key = (AdapterName, String);

/// Where the registry gets a base matrix to merge into, as the model holds it (packed, in the
/// base's weight format, which the merged variant keeps); the server supplies it, so this crate
/// needs to know nothing about models. Any `Fn(&Site) -> Option<Arc<PackedWeight>>` will do.
pub trait BaseWeights: Send + Sync {
    fn base_weight(&self, site: &Site) -> Option<std::sync::Arc<PackedWeight>>;
}

impl<F> BaseWeights for F
where
    F: Fn(&Site) -> Option<std::sync::Arc<PackedWeight>> + Send + Sync,
{
    fn base_weight(&self, site: &Site) -> Option<std::sync::Arc<PackedWeight>> {
        self(site)
    }
}

/// Budgets of the two tiers, in bytes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RegistryConfig {
    /// Bytes of resident factors kept beyond the versions in use.
    pub factor_budget_bytes: usize,
    /// Bytes of merged variants kept beyond the ones in use.
    pub merged_budget_bytes: usize,
}

impl Default for RegistryConfig {
    fn default() -> Self {
        Self {
            factor_budget_bytes: 1 << 30,
            merged_budget_bytes: 2 << 30,
        }
    }
}

/// One entry of a tier, as listed.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ResidentEntry {
    pub name: AdapterName,
    pub version: String,
    pub tier: Tier,
    pub bytes: usize,
    /// A request holds it.
    pub held: bool,
    pub pinned: bool,
    /// It is the version the registry resolves the name to.
    pub live: bool,
}

/// The registry; cheap to clone, every clone shares one state.
#[derive(Clone)]
pub struct Registry {
    inner: Arc<Inner>,
}

impl std::fmt::Debug for Registry {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Registry")
            .field("store", &self.inner.store.root())
            .finish_non_exhaustive()
    }
}

struct TierState<T> {
    lru: ByteLru<T>,
    flights: HashMap<Key, Arc<Flight<T>>>,
}

struct State {
    /// The version each name resolves to.
    live: HashMap<AdapterName, String>,
    /// Versions whose load was refused for good (a bad package), so they are not read again.
    refused: HashMap<Key, RegistryError>,
    factors: TierState<Adapter>,
    merged: TierState<MergedWeights>,
    pinned: HashSet<AdapterName>,
    /// Versions that stay resident like live ones although they are not live (a split arm held
    /// to one version names them), so each request to them is not a fresh load.
    kept: HashSet<Key>,
    clock: u64,
}

impl State {
    fn is_live(&self, key: &Key) -> bool {
        self.live.get(&key.0) == Some(&key.1)
    }

    /// Live or kept: an entry of such a version is never freed as stale.
    fn is_wanted(&self, key: &Key) -> bool {
        self.is_live(key) || self.kept.contains(key)
    }

    /// Marks the entries of `name` in both tiers stale unless their version is `live` or kept.
    fn restale(&mut self, name: &AdapterName, live: Option<&str>) {
        self.factors.lru.restale(name.as_str(), live);
        self.merged.lru.restale(name.as_str(), live);
        for key in self.kept.iter().filter(|k| &k.0 == name) {
            self.factors.lru.set_stale(key, false);
            self.merged.lru.set_stale(key, false);
        }
    }
}

pub(crate) struct Inner {
    store: Store,
    spec: BaseSpec,
    base_weights: Option<Box<dyn BaseWeights>>,
    /// Base weights to merge into and a merged budget above 0; fixed for the registry's life.
    merging: bool,
    state: Mutex<State>,
    loads: AtomicU64,
    merges: AtomicU64,
    events: EventBus,
}

impl Registry {
    /// A registry over `store` for the base described by `spec`. `base_weights` is needed only
    /// for merged variants.
    pub fn new(
        store: Store,
        spec: BaseSpec,
        config: RegistryConfig,
        base_weights: Option<Box<dyn BaseWeights>>,
    ) -> Self {
        let state = State {
            live: HashMap::new(),
            refused: HashMap::new(),
            factors: TierState {
                lru: ByteLru::new(config.factor_budget_bytes),
                flights: HashMap::new(),
            },
            merged: TierState {
                lru: ByteLru::new(config.merged_budget_bytes),
                flights: HashMap::new(),
            },
            pinned: HashSet::new(),
            kept: HashSet::new(),
            clock: 0,
        };
        Self {
            inner: Arc::new(Inner {
                store,
                spec,
                merging: base_weights.is_some() && config.merged_budget_bytes > 0,
                base_weights,
                state: Mutex::new(state),
                loads: AtomicU64::new(0),
                merges: AtomicU64::new(0),
                events: EventBus::default(),
            }),
        }
    }

    pub fn store(&self) -> &Store {
        &self.inner.store
    }

    pub fn spec(&self) -> &BaseSpec {
        &self.inner.spec
    }

    /// A handle to the live version of `name`, loading its factors on first use.
    pub fn resolve(&self, name: &str) -> Result<AdapterHandle, RegistryError> {
        let name = AdapterName::new(name)?;
        let mut retried = false;
        loop {
            let version = self.inner.live_version(&name)?;
            let key = (name.clone(), version.clone());
            match self.inner.factors(&key) {
                // Retired between reading the pointer and opening the file: read it again.
                Err(e) if !retried && e.is_missing_file() => {
                    retried = true;
                    self.inner.refresh(&name)?;
                }
                Err(e) => return Err(e),
                Ok((value, hit)) => {
                    return Ok(Handle::new(name, version, value, hit, self.inner.clone()));
                }
            }
        }
    }

    /// A handle to one given version of `name` (an A/B arm held to a version), loading it on
    /// first use; the version need not be live.
    pub fn resolve_version(
        &self,
        name: &str,
        version: &str,
    ) -> Result<AdapterHandle, RegistryError> {
        let name = AdapterName::new(name)?;
        let key = (name.clone(), version.to_owned());
        let (value, hit) = self.inner.factors(&key)?;
        Ok(Handle::new(
            name,
            version.to_owned(),
            value,
            hit,
            self.inner.clone(),
        ))
    }

    /// Whether merged variants may be built: a merged budget of 0 bytes turns merging off.
    pub fn merging_enabled(&self) -> bool {
        self.inner.merging
    }

    /// The merged variant of the version `handle` holds, building it on first use.
    pub fn merged(&self, handle: &AdapterHandle) -> Result<MergedHandle, RegistryError> {
        let inner = &self.inner;
        if !self.merging_enabled() {
            return Err(RegistryError::MergingOff { id: handle.id() });
        }
        let base = inner
            .base_weights
            .as_ref()
            .ok_or_else(|| RegistryError::NoBaseWeights { id: handle.id() })?;
        let key = (handle.name().clone(), handle.version().to_owned());
        let adapter = handle.adapter().clone();
        let (value, hit) = inner.get_or_load(
            Tier::Merged,
            &key,
            |s| &mut s.merged,
            || {
                inner.merges.fetch_add(1, Ordering::Relaxed);
                let start = Instant::now();
                let merged = MergedWeights::build_packed(&adapter, |s| base.base_weight(s))
                    .map_err(|e| RegistryError::Merge {
                        id: adapter.id.clone(),
                        message: e.to_string(),
                    })?;
                let timings = StageTimings {
                    merge: start.elapsed(),
                    ..StageTimings::default()
                };
                Ok((merged, timings))
            },
        )?;
        Ok(Handle::new(key.0, key.1, value, hit, inner.clone()))
    }

    /// The merged variant of the version `handle` holds when it is already built, without
    /// building it (the engine asks this on its own thread and builds elsewhere).
    pub fn merged_ready(&self, handle: &AdapterHandle) -> Option<MergedHandle> {
        let key = (handle.name().clone(), handle.version().to_owned());
        let value = {
            let mut st = self.inner.state.lock();
            st.clock += 1;
            let tick = st.clock;
            st.merged.lru.get(&key, tick)?
        };
        Some(Handle::new(key.0, key.1, value, true, self.inner.clone()))
    }

    /// Keeps the live version of `name` resident, loading it now; refused when the pinned
    /// factors would not fit the factor budget.
    pub fn pin(&self, name: &str) -> Result<(), RegistryError> {
        let handle = self.resolve(name)?;
        let result = {
            let mut st = self.inner.state.lock();
            if st.pinned.contains(handle.name()) {
                Ok(())
            } else {
                let pinned = st
                    .factors
                    .lru
                    .residency(|k| pinned_key(&st, k))
                    .pinned_bytes;
                let needed = pinned + handle.resident_bytes();
                let budget = st.factors.lru.budget();
                if needed > budget {
                    Err(RegistryError::PinOverBudget {
                        name: handle.name().to_string(),
                        needed,
                        budget,
                    })
                } else {
                    st.pinned.insert(handle.name().clone());
                    Ok(())
                }
            }
        };
        drop(handle);
        result
    }

    /// Replaces the set of versions kept resident although not live: a version a client asks
    /// for by name (an A/B split arm held to one version) would otherwise be freed as stale when
    /// its last request ends and read from disk again on the next. Kept versions still count
    /// against the tier budgets and are evicted as any other unpinned entry. Versions no longer
    /// kept, and not live, are freed once unheld.
    pub fn keep_versions(&self, versions: impl IntoIterator<Item = (AdapterName, String)>) {
        let mut st = self.inner.state.lock();
        let before: HashSet<Key> = std::mem::replace(&mut st.kept, versions.into_iter().collect());
        let names: HashSet<AdapterName> = before
            .iter()
            .chain(st.kept.iter())
            .map(|k| k.0.clone())
            .collect();
        for name in names {
            let live = st.live.get(&name).cloned();
            st.restale(&name, live.as_deref());
        }
        self.inner.trim(&mut st);
    }

    /// Lets `name` be evicted again.
    pub fn unpin(&self, name: &str) -> Result<(), RegistryError> {
        let name = AdapterName::new(name)?;
        let mut st = self.inner.state.lock();
        st.pinned.remove(&name);
        self.inner.trim(&mut st);
        Ok(())
    }

    /// Names currently pinned, in order.
    pub fn pinned(&self) -> Vec<AdapterName> {
        let st = self.inner.state.lock();
        let mut names: Vec<AdapterName> = st.pinned.iter().cloned().collect();
        names.sort();
        names
    }

    /// Re-reads the pointer of every name the registry has resolved, and swaps each whose live
    /// version changed on disk. A name whose old version is resident (or pinned) has its new
    /// version loaded first, so requests never wait on the swap; if that load is refused, the
    /// old version keeps serving. Returns how many names flipped.
    pub fn poll_once(&self) -> usize {
        let known: Vec<(AdapterName, String)> = {
            let st = self.inner.state.lock();
            st.live
                .iter()
                .map(|(n, v)| (n.clone(), v.clone()))
                .collect()
        };
        let mut flipped = 0;
        for (name, current) in known {
            match self.inner.store.pointer(&name) {
                Ok(Some(p)) if p.live != current => {
                    if self.inner.flip(&name, &current, &p.live) {
                        flipped += 1;
                    }
                }
                Ok(Some(_)) => {}
                Ok(None) => self.inner.forget(&name),
                Err(e) => tracing::warn!(adapter = %name, error = %e, "cannot read the pointer"),
            }
        }
        flipped
    }

    /// Subscribes to swap events; a subscriber more than `capacity` events behind loses events.
    pub fn subscribe(&self, capacity: usize) -> Receiver<SwapEvent> {
        self.inner.events.subscribe(capacity)
    }

    /// Events lost because a subscriber was full.
    pub fn events_dropped(&self) -> u64 {
        self.inner.events.dropped()
    }

    /// Bytes and entries of both tiers now.
    pub fn residency(&self) -> Residency {
        let st = self.inner.state.lock();
        residency(&st)
    }

    /// Every resident entry of both tiers.
    pub fn entries(&self) -> Vec<ResidentEntry> {
        let st = self.inner.state.lock();
        let mut out = Vec::new();
        let tiers = [
            (Tier::Factors, st.factors.lru.list()),
            (Tier::Merged, st.merged.lru.list()),
        ];
        for (tier, list) in tiers {
            for (key, bytes, held) in list {
                out.push(ResidentEntry {
                    pinned: tier == Tier::Factors && pinned_key(&st, &key),
                    live: st.is_live(&key),
                    name: key.0,
                    version: key.1,
                    tier,
                    bytes,
                    held,
                });
            }
        }
        out
    }

    /// The version each resolved name maps to now.
    pub fn live_versions(&self) -> Vec<(AdapterName, String)> {
        let st = self.inner.state.lock();
        let mut out: Vec<(AdapterName, String)> = st
            .live
            .iter()
            .map(|(n, v)| (n.clone(), v.clone()))
            .collect();
        out.sort();
        out
    }

    /// How many times factors were actually loaded from the store.
    pub fn load_count(&self) -> u64 {
        self.inner.loads.load(Ordering::Relaxed)
    }

    /// How many merged variants were actually built.
    pub fn merge_count(&self) -> u64 {
        self.inner.merges.load(Ordering::Relaxed)
    }

    pub(crate) fn downgrade(&self) -> crate::sync::Weak<Inner> {
        Arc::downgrade(&self.inner)
    }

    pub(crate) fn from_inner(inner: Arc<Inner>) -> Self {
        Self { inner }
    }
}

fn pinned_key(st: &State, key: &Key) -> bool {
    st.pinned.contains(&key.0) && st.is_live(key)
}

fn residency(st: &State) -> Residency {
    Residency {
        factors: st.factors.lru.residency(|k| pinned_key(st, k)),
        merged: st.merged.lru.residency(|_| false),
    }
}

impl Inner {
    fn emit(&self, st: &State, key: &Key, kind: SwapKind, timings: StageTimings, bytes: usize) {
        self.events.emit(SwapEvent {
            name: key.0.to_string(),
            version: key.1.clone(),
            kind,
            timings,
            bytes,
            residency: residency(st),
            at: SystemTime::now(),
        });
    }

    /// The version `name` resolves to, reading the store's pointer the first time.
    fn live_version(&self, name: &AdapterName) -> Result<String, RegistryError> {
        if let Some(v) = self.state.lock().live.get(name) {
            return Ok(v.clone());
        }
        let version = self.store.live(name)?;
        let mut st = self.state.lock();
        Ok(st.live.entry(name.clone()).or_insert(version).clone())
    }

    /// Reads `name`'s pointer again and adopts it without preloading.
    fn refresh(&self, name: &AdapterName) -> Result<(), RegistryError> {
        let version = self.store.live(name)?;
        let mut st = self.state.lock();
        self.adopt(&mut st, name, &version);
        Ok(())
    }

    /// Makes `to` the version `name` resolves to, and frees what only the old version used.
    fn adopt(&self, st: &mut State, name: &AdapterName, to: &str) {
        let from = st.live.insert(name.clone(), to.to_owned());
        if from.as_deref() == Some(to) {
            return;
        }
        st.refused.retain(|k, _| &k.0 != name || k.1 == to);
        st.restale(name, Some(to));
        let key = (name.clone(), to.to_owned());
        if st.pinned.contains(name) {
            let r = st.factors.lru.residency(|k| pinned_key(st, k));
            if r.pinned_bytes > r.budget_bytes {
                st.pinned.remove(name);
                self.emit(st, &key, SwapKind::Unpinned, StageTimings::default(), 0);
            }
        }
        self.trim(st);
        self.emit(
            st,
            &key,
            SwapKind::Flipped { from },
            StageTimings::default(),
            0,
        );
    }

    /// Swaps `name` from `from` to `to`; false when the new version was refused or the flip was
    /// superseded (see below).
    fn flip(&self, name: &AdapterName, from: &str, to: &str) -> bool {
        let warm = {
            let st = self.state.lock();
            st.factors.lru.contains(&(name.clone(), from.to_owned())) || st.pinned.contains(name)
        };
        // Held until the flip is done, so the preloaded version cannot be trimmed before it is
        // live; released after the lock.
        let mut preloaded = None;
        if warm {
            match self.factors(&(name.clone(), to.to_owned())) {
                Ok(a) => preloaded = Some(a),
                Err(e) => {
                    tracing::warn!(adapter = %name, version = to, error = %e, "new version refused; the old one keeps serving");
                    return false;
                }
            }
        }
        // Adopt only if nothing moved meanwhile: the registry still resolves `name` to `from`
        // and the pointer still names `to`. A slow flip (its preload took a while) that lost a
        // race with a rollback or another flip must not install a version the pointer left;
        // reading the small pointer file under the lock keeps every adoption in pointer order.
        let adopted = {
            let mut st = self.state.lock();
            let still_from = st.live.get(name).map(String::as_str) == Some(from);
            let still_to = matches!(self.store.pointer(name), Ok(Some(p)) if p.live == to);
            if still_from && still_to {
                self.adopt(&mut st, name, to);
            } else {
                tracing::debug!(adapter = %name, from, to, "flip superseded before it finished; left to the next poll");
            }
            still_from && still_to
        };
        if let Some((a, _)) = preloaded {
            self.release(a);
        }
        adopted
    }

    /// The adapter left the store entirely: stop resolving it.
    fn forget(&self, name: &AdapterName) {
        let mut st = self.state.lock();
        st.live.remove(name);
        st.pinned.remove(name);
        st.refused.retain(|k, _| &k.0 != name);
        st.restale(name, None);
        self.trim(&mut st);
    }

    /// The factors of one version, resident (loaded now if they were not), and whether they
    /// were resident already.
    fn factors(&self, key: &Key) -> Result<(Arc<Adapter>, bool), RegistryError> {
        if let Some(e) = self.state.lock().refused.get(key) {
            return Err(e.clone());
        }
        self.get_or_load(Tier::Factors, key, |s| &mut s.factors, || self.load(key))
    }

    /// Reads, validates and converts one version from the store.
    fn load(&self, key: &Key) -> Result<(Adapter, StageTimings), RegistryError> {
        self.loads.fetch_add(1, Ordering::Relaxed);
        let limits = *self.store.limits();
        let start = Instant::now();
        // Reading streams the file through the structural checks (see `package::bytes`), so
        // `read` covers both; `validate` is the check against the base. From an object store
        // `read` includes fetching the file into the package cache on a miss.
        let (pkg, file) = self.store.load_package(&key.0, &key.1)?;
        let read = start.elapsed();
        pkg.validate(&file, &self.spec, &limits)?;
        let validate = start.elapsed() - read;
        let id = format!("{}@{}", key.0, key.1);
        let adapter =
            Adapter::from_package(id.clone(), pkg).map_err(|e| RegistryError::Convert {
                id,
                message: e.to_string(),
            })?;
        let convert = start.elapsed() - read - validate;
        let timings = StageTimings {
            read,
            validate,
            convert,
            merge: Duration::ZERO,
        };
        Ok((adapter, timings))
    }

    /// The entry for `key` in one tier, or the outcome of loading it: the first caller loads,
    /// every concurrent caller waits on that one load. The flag says whether the entry was
    /// resident already (a cache hit); a caller that waited on another's load missed too.
    /// A loaded entry that would not fit the tier's budget beside what requests hold is refused
    /// ([`RegistryError::TierFull`]), so memory stays bounded however many versions are in use.
    fn get_or_load<T: Resident>(
        &self,
        tier: Tier,
        key: &Key,
        pick: fn(&mut State) -> &mut TierState<T>,
        load: impl FnOnce() -> Result<(T, StageTimings), RegistryError>,
    ) -> Result<(Arc<T>, bool), RegistryError> {
        let flight = {
            let mut st = self.state.lock();
            st.clock += 1;
            let tick = st.clock;
            let ts = pick(&mut st);
            if let Some(v) = ts.lru.get(key, tick) {
                return Ok((v, true));
            }
            if let Some(f) = ts.flights.get(key) {
                let f = f.clone();
                drop(st);
                return f.wait().map(|v| (v, false));
            }
            let f = Arc::new(Flight::new());
            ts.flights.insert(key.clone(), f.clone());
            f
        };
        let outcome = std::panic::catch_unwind(AssertUnwindSafe(load));
        let mut st = self.state.lock();
        pick(&mut st).flights.remove(key);
        let result = match outcome {
            Ok(Ok((value, timings))) => {
                let bytes = value.resident_bytes();
                let fits = {
                    let State {
                        factors,
                        merged,
                        pinned,
                        live,
                        ..
                    } = &*st;
                    match tier {
                        Tier::Factors => factors.lru.room_for(bytes, |k| {
                            pinned.contains(&k.0) && live.get(&k.0) == Some(&k.1)
                        }),
                        Tier::Merged => merged.lru.room_for(bytes, |_| false),
                    }
                };
                if !fits {
                    let r = residency(&st);
                    let held = match tier {
                        Tier::Factors => r.factors,
                        Tier::Merged => r.merged,
                    };
                    let e = RegistryError::TierFull {
                        id: format!("{}@{}", key.0, key.1),
                        tier: tier.as_str(),
                        needed: bytes,
                        kept: held.held_bytes.max(held.pinned_bytes),
                        budget: held.budget_bytes,
                    };
                    let reason = e.to_string();
                    self.emit(
                        &st,
                        key,
                        SwapKind::Refused { reason },
                        StageTimings::default(),
                        0,
                    );
                    drop(st);
                    flight.complete(Err(e.clone()));
                    return Err(e);
                }
                let value = Arc::new(value);
                let stale = !st.is_wanted(key);
                st.clock += 1;
                let tick = st.clock;
                pick(&mut st)
                    .lru
                    .insert(key.clone(), value.clone(), bytes, tick, stale);
                self.trim(&mut st);
                let kind = match tier {
                    Tier::Factors => SwapKind::Loaded,
                    Tier::Merged => SwapKind::Merged,
                };
                self.emit(&st, key, kind, timings, bytes);
                Ok(value)
            }
            Ok(Err(e)) => {
                if tier == Tier::Factors && e.is_permanent() {
                    st.refused.insert(key.clone(), e.clone());
                }
                let reason = e.to_string();
                self.emit(
                    &st,
                    key,
                    SwapKind::Refused { reason },
                    StageTimings::default(),
                    0,
                );
                Err(e)
            }
            Err(panic) => {
                drop(st);
                flight.complete(Err(RegistryError::Panicked {
                    id: format!("{}@{}", key.0, key.1),
                }));
                std::panic::resume_unwind(panic);
            }
        };
        drop(st);
        flight.complete(result.clone());
        result.map(|v| (v, false))
    }

    /// Drops a reference under the state lock, then brings the tiers back within budget.
    pub(crate) fn release<T>(&self, value: Arc<T>) {
        let mut st = self.state.lock();
        drop(value);
        self.trim(&mut st);
    }

    /// Frees stale entries nobody holds and evicts until each tier's unheld bytes fit its budget.
    fn trim(&self, st: &mut State) {
        let removed_factors = {
            let State {
                factors,
                pinned,
                live,
                ..
            } = &mut *st;
            factors
                .lru
                .trim(|k| pinned.contains(&k.0) && live.get(&k.0) == Some(&k.1))
        };
        let removed_merged = st.merged.lru.trim(|_| false);
        for (tier, removed) in [
            (Tier::Factors, removed_factors),
            (Tier::Merged, removed_merged),
        ] {
            for (key, bytes, why) in removed {
                let kind = match why {
                    Removal::Evicted => SwapKind::Evicted { tier },
                    Removal::Freed => SwapKind::Freed { tier },
                };
                self.emit(st, &key, kind, StageTimings::default(), bytes);
            }
        }
    }
}

#[cfg(test)]
#[path = "../tests/common/mod.rs"]
mod test_packages;

#[cfg(test)]
mod race_tests {
    use super::*;
    use crate::package::{Limits, PackageBytes};

    fn publish(store: &Store, name: &AdapterName, tag: f32) -> String {
        let raw = test_packages::tagged(4, tag).to_bytes().unwrap();
        let bytes = PackageBytes::from_slice(&raw, "mem", &Limits::default()).unwrap();
        store
            .publish(name, bytes, "mem", Some(&test_packages::spec()))
            .unwrap()
            .version
    }

    /// The rollback race: a poll read the pointer at v2 and began a slow flip (preloading v2);
    /// meanwhile the operator rolled back to v1. The late flip must not install v2, which the
    /// pointer has left; before the fix it did, until the next poll.
    #[test]
    fn flip_that_finishes_after_a_rollback_does_not_adopt_the_version_the_pointer_left() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::create(dir.path(), Limits::default()).unwrap();
        let registry = Registry::new(
            store.clone(),
            test_packages::spec(),
            RegistryConfig::default(),
            None,
        );
        let name = AdapterName::new("north-routing").unwrap();
        let v1 = publish(&store, &name, 1.0);
        assert_eq!(registry.resolve(name.as_str()).unwrap().version(), v1);
        let v2 = publish(&store, &name, 2.0);
        // The slow flip from v1 to v2 is under way (it read the pointer at v2) when the
        // rollback lands.
        store.rollback(&name).unwrap();
        assert!(!registry.inner.flip(&name, &v1, &v2), "superseded flip");
        assert_eq!(registry.resolve(name.as_str()).unwrap().version(), v1);
        // A flip that is still current is adopted.
        let v3 = publish(&store, &name, 3.0);
        assert!(registry.inner.flip(&name, &v1, &v3));
        assert_eq!(registry.resolve(name.as_str()).unwrap().version(), v3);
        // And one whose starting point moved meanwhile (ABA through another flip) is not.
        assert!(!registry.inner.flip(&name, &v1, &v3));
    }
}
