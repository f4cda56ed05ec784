//! Stress: 8 threads resolve, hold, merge and release 8 adapters under budgets that fit two
//! adapters' factors and one merged variant, while another thread publishes, rolls back, sets
//! live and pins, and the watcher swaps. Throughout, it checks what the registry promises:
//!
//! - neither tier ever holds more than its budget, versions in use included: a load that would
//!   not fit beside them is refused (`TierFull`), which the workers count and retry later;
//! - a version a request holds is never dropped from the registry's books while held;
//! - every resolve returns one whole version: the handle's version is the content hash of the
//!   package whose tag every one of its values carries.

mod common;

use std::collections::HashMap;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use candle_core::{DType, Device, Tensor};
use rand::{Rng, SeedableRng};
use switchyard_adapters::events::{SwapKind, Tier};
use switchyard_adapters::package::{Limits, content_version};
use switchyard_adapters::registry::{Registry, RegistryConfig};
use switchyard_adapters::store::Store;
use switchyard_adapters::{AdapterName, PackageBytes, Site};

use common::{spec, tagged, tagged_bytes, whole_tag};

const RANK: usize = 4;
const NAMES: [&str; 8] = ["n0", "n1", "n2", "n3", "n4", "n5", "n6", "n7"];
const WORKERS: usize = 8;
const RUN_FOR: Duration = Duration::from_millis(1500);

fn tag_for(name_index: usize, generation: usize) -> f32 {
    (name_index * 1000 + generation) as f32
}

#[test]
fn eight_threads_resolve_and_evict_while_another_publishes_and_rolls_back() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::create(dir.path(), Limits::default()).unwrap();
    let factor_budget = 2 * tagged_bytes(RANK);
    let merged_budget = 4 * 32 * 32 * 4; // one merged variant of q and v in both layers
    let spec_for_base = spec();
    let base = move |site: &Site| {
        let (out, inp) = spec_for_base.shape(site)?;
        Some(Tensor::zeros((out, inp), DType::F32, &Device::Cpu).unwrap())
    };
    let registry = Registry::new(
        store.clone(),
        spec(),
        RegistryConfig {
            factor_budget_bytes: factor_budget,
            merged_budget_bytes: merged_budget,
        },
        Some(Box::new(base)),
    );
    // version → tag, filled before each publish so a worker can check what it got.
    let tags: Arc<Mutex<HashMap<String, f32>>> = Arc::default();
    let publish = |name_index: usize, generation: usize| {
        let tag = tag_for(name_index, generation);
        let raw = tagged(RANK, tag).to_bytes().unwrap();
        tags.lock().unwrap().insert(content_version(&raw), tag);
        let bytes = PackageBytes::from_slice(&raw, "stress", &Limits::default()).unwrap();
        let name = AdapterName::new(NAMES[name_index]).unwrap();
        store
            .publish(&name, bytes, "stress", Some(&spec()))
            .unwrap();
    };
    for i in 0..NAMES.len() {
        publish(i, 0);
    }
    let events = registry.subscribe(1 << 16);
    let watcher = registry.start_watcher(Duration::from_millis(10));
    let stop = AtomicBool::new(false);
    let resolves = AtomicUsize::new(0);
    let refusals = AtomicUsize::new(0);
    let check_budget = |registry: &Registry| {
        let r = registry.residency();
        assert!(
            r.factors.bytes <= factor_budget,
            "factors over budget: {} > {factor_budget}",
            r.factors.bytes
        );
        assert!(
            r.merged.bytes <= merged_budget,
            "merged over budget: {} > {merged_budget}",
            r.merged.bytes
        );
    };

    std::thread::scope(|s| {
        for w in 0..WORKERS {
            let (registry, tags, stop, resolves, refusals) =
                (&registry, &tags, &stop, &resolves, &refusals);
            s.spawn(move || {
                let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(w as u64);
                while !stop.load(Ordering::Relaxed) {
                    let held: Vec<_> = (0..rng.random_range(1..=2))
                        .filter_map(|_| {
                            let name = NAMES[rng.random_range(0..NAMES.len())];
                            match registry.resolve(name) {
                                Ok(h) => Some(h),
                                Err(e) if e.is_tier_full() => {
                                    refusals.fetch_add(1, Ordering::Relaxed);
                                    None
                                }
                                Err(e) => panic!("{e}"),
                            }
                        })
                        .collect();
                    if held.is_empty() {
                        continue;
                    }
                    resolves.fetch_add(held.len(), Ordering::Relaxed);
                    for h in &held {
                        let tag = whole_tag(h);
                        assert_eq!(
                            tags.lock().unwrap().get(h.version()),
                            Some(&tag),
                            "{} is not the version of the values it holds",
                            h.id()
                        );
                    }
                    if rng.random_bool(0.2) {
                        match registry.merged(&held[0]) {
                            Ok(m) => assert_eq!(m.source, held[0].id()),
                            Err(e) if e.is_tier_full() => {
                                refusals.fetch_add(1, Ordering::Relaxed);
                            }
                            Err(e) => panic!("{e}"),
                        }
                        check_budget(registry);
                    }
                    std::thread::sleep(Duration::from_micros(rng.random_range(0..500)));
                    check_budget(registry);
                    let entries = registry.entries();
                    for h in &held {
                        assert!(
                            entries.iter().any(|e| e.tier == Tier::Factors
                                && &e.name == h.name()
                                && e.version == h.version()
                                && e.held),
                            "{} is held but the registry no longer keeps it",
                            h.id()
                        );
                    }
                    drop(held);
                    check_budget(registry);
                    std::thread::sleep(Duration::from_micros(rng.random_range(0..300)));
                }
            });
        }
        let (registry, stop, store) = (&registry, &stop, &store);
        let publish = &publish;
        s.spawn(move || {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(99);
            let mut generation = vec![0usize; NAMES.len()];
            let start = Instant::now();
            while start.elapsed() < RUN_FOR {
                let i = rng.random_range(0..NAMES.len());
                let name = AdapterName::new(NAMES[i]).unwrap();
                match rng.random_range(0..10) {
                    0..=4 => {
                        generation[i] += 1;
                        publish(i, generation[i]);
                    }
                    5..=6 => {
                        let _ = store.rollback(&name);
                    }
                    7 => {
                        let versions = store.versions(&name).unwrap();
                        let pick = &versions[rng.random_range(0..versions.len())];
                        store.set_live(&name, &pick.version).unwrap();
                    }
                    8 => {
                        // May be refused when the pins would not fit; that is fine.
                        let _ = registry.pin(NAMES[i]);
                    }
                    _ => registry.unpin(NAMES[i]).unwrap(),
                }
                if rng.random_bool(0.3) {
                    registry.poll_once();
                }
                std::thread::sleep(Duration::from_millis(rng.random_range(1..5)));
            }
            stop.store(true, Ordering::Relaxed);
        });
    });
    watcher.stop();

    let r = registry.residency();
    assert_eq!(r.factors.held_bytes, 0, "every handle released");
    assert!(r.factors.bytes <= factor_budget);
    assert!(r.merged.bytes <= merged_budget);
    let kinds: Vec<SwapKind> = events.try_iter().map(|e| e.kind).collect();
    let count = |k: &SwapKind| kinds.iter().filter(|x| *x == k).count();
    let evicted = count(&SwapKind::Evicted {
        tier: Tier::Factors,
    });
    let flipped = kinds
        .iter()
        .filter(|k| matches!(k, SwapKind::Flipped { .. }))
        .count();
    // The run must have exercised what it claims to: loads beyond one per name, evictions
    // under the tight budget, and swaps.
    eprintln!(
        "stress: {} resolves, {} loads, {evicted} evictions, {flipped} flips, {} refused for memory",
        resolves.load(Ordering::Relaxed),
        registry.load_count(),
        refusals.load(Ordering::Relaxed)
    );
    assert!(registry.load_count() > NAMES.len() as u64);
    assert!(
        evicted > 0 && flipped > 0,
        "evicted {evicted}, flipped {flipped}"
    );
    assert!(resolves.load(Ordering::Relaxed) > 100);
    assert_eq!(registry.events_dropped(), 0);
}
