//! The registry as the server uses it: resolve with lazy, single-flight loading; two byte-bounded
//! tiers that never free what a request holds; pinning; swaps when the store's pointer moves; and
//! the events that report all of it.

mod common;

use std::sync::{Arc, Barrier};
use std::time::Duration;

use switchyard_adapters::events::{SwapKind, Tier};
use switchyard_adapters::package::Limits;
use switchyard_adapters::registry::{BaseWeights, Registry, RegistryConfig, RegistryError};
use switchyard_adapters::store::Store;
use switchyard_adapters::{AdapterName, PackageBytes, Site};

use common::{spec, tagged, tagged_bytes, whole_tag};

const RANK: usize = 4;

fn publish(store: &Store, name: &str, tag: f32) -> String {
    let raw = tagged(RANK, tag).to_bytes().unwrap();
    let bytes = PackageBytes::from_slice(&raw, "mem", &Limits::default()).unwrap();
    store
        .publish(&AdapterName::new(name).unwrap(), bytes, name, Some(&spec()))
        .unwrap()
        .version
}

/// Base weights of the made-up model: zeros, so a merged weight is exactly `s B A`.
fn zero_base() -> Box<dyn BaseWeights> {
    let spec = spec();
    Box::new(move |site: &Site| {
        let (out, inp) = spec.shape(site)?;
        Some(std::sync::Arc::new(switchyard_kernels::PackedWeight::pack(
            &vec![0f32; out * inp],
            out,
            inp,
        )))
    })
}

fn registry(factor_budget: usize, merged_budget: usize) -> (tempfile::TempDir, Store, Registry) {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::create(dir.path(), Limits::default()).unwrap();
    let config = RegistryConfig {
        factor_budget_bytes: factor_budget,
        merged_budget_bytes: merged_budget,
    };
    let registry = Registry::new(store.clone(), spec(), config, Some(zero_base()));
    (dir, store, registry)
}

#[test]
fn a_hundred_concurrent_first_requests_cause_exactly_one_load() {
    let (_dir, store, registry) = registry(1 << 20, 1 << 20);
    let version = publish(&store, "popular", 1.0);
    let barrier = Arc::new(Barrier::new(100));
    let threads: Vec<_> = (0..100)
        .map(|_| {
            let registry = registry.clone();
            let barrier = barrier.clone();
            std::thread::spawn(move || {
                barrier.wait();
                let h = registry.resolve("popular").unwrap();
                (h.version().to_owned(), Arc::as_ptr(h.adapter()) as usize)
            })
        })
        .collect();
    let results: Vec<(String, usize)> = threads.into_iter().map(|t| t.join().unwrap()).collect();
    assert_eq!(registry.load_count(), 1);
    assert!(results.iter().all(|(v, _)| *v == version));
    let first = results[0].1;
    assert!(
        results.iter().all(|(_, p)| *p == first),
        "all share one resident copy"
    );
}

#[test]
fn the_factor_tier_evicts_least_recently_used_within_its_budget() {
    let one = tagged_bytes(RANK);
    let (_dir, store, registry) = registry(2 * one, 1 << 20);
    for (n, tag) in [("a", 1.0), ("b", 2.0), ("c", 3.0)] {
        publish(&store, n, tag);
    }
    let events = registry.subscribe(64);
    for n in ["a", "b", "a", "c"] {
        let h = registry.resolve(n).unwrap();
        assert_eq!(h.resident_bytes(), one);
    }
    // a, b loaded; a touched again; c loaded: b is the least recently used and goes.
    let resident: Vec<String> = registry
        .entries()
        .into_iter()
        .map(|e| e.name.to_string())
        .collect();
    assert_eq!(resident, vec!["a", "c"]);
    assert_eq!(registry.load_count(), 3);
    let r = registry.residency();
    assert_eq!(r.factors.bytes, 2 * one);
    assert_eq!(r.factors.held_bytes, 0);
    let evicted: Vec<String> = events
        .try_iter()
        .filter(|e| {
            e.kind
                == SwapKind::Evicted {
                    tier: Tier::Factors,
                }
        })
        .map(|e| e.name)
        .collect();
    assert_eq!(evicted, vec!["b"]);
}

#[test]
fn a_held_version_is_never_evicted_and_is_trimmed_when_released() {
    let one = tagged_bytes(RANK);
    let (_dir, store, registry) = registry(2 * one, 1 << 20);
    publish(&store, "a", 1.0);
    publish(&store, "b", 2.0);
    publish(&store, "c", 3.0);
    let a = registry.resolve("a").unwrap();
    let b = registry.resolve("b").unwrap();
    let r = registry.residency();
    assert_eq!((r.factors.bytes, r.factors.held_bytes), (2 * one, 2 * one));
    assert_eq!(whole_tag(&a), 1.0);
    drop(a);
    // `c` needs room: `a` (released) goes, `b` (held) stays.
    let c = registry.resolve("c").unwrap();
    let names: Vec<String> = registry
        .entries()
        .iter()
        .map(|e| e.name.to_string())
        .collect();
    assert_eq!(names, vec!["b", "c"]);
    drop((b, c));
    let r = registry.residency();
    assert_eq!((r.factors.bytes, r.factors.entries), (2 * one, 2));
}

/// Regression: the budget bounded only the bytes nobody held, so requests holding many distinct
/// cold versions at once could push a tier far over its budget.
#[test]
fn held_versions_count_against_the_budget_and_a_load_beyond_it_is_refused() {
    let one = tagged_bytes(RANK);
    let (_dir, store, registry) = registry(one, 1 << 20);
    publish(&store, "a", 1.0);
    publish(&store, "b", 2.0);
    let a = registry.resolve("a").unwrap();
    let refused = registry.resolve("b").unwrap_err();
    assert!(refused.is_tier_full(), "{refused}");
    assert!(refused.to_string().contains("retry"), "{refused}");
    let r = registry.residency();
    assert!(r.factors.bytes <= r.factors.budget_bytes, "{r:?}");
    drop(a);
    // Once `a` is released, `b` loads (and `a` is evicted to make room).
    assert_eq!(whole_tag(&registry.resolve("b").unwrap()), 2.0);
    assert_eq!(registry.residency().factors.bytes, one);
}

#[test]
fn a_pinned_adapter_stays_resident_and_a_pin_over_budget_is_refused() {
    let one = tagged_bytes(RANK);
    let (_dir, store, registry) = registry(2 * one, 1 << 20);
    publish(&store, "keep", 1.0);
    publish(&store, "other", 2.0);
    publish(&store, "third", 3.0);
    registry.pin("keep").unwrap();
    for _ in 0..3 {
        drop(registry.resolve("other").unwrap());
        drop(registry.resolve("third").unwrap());
    }
    let names: Vec<String> = registry
        .entries()
        .into_iter()
        .map(|e| e.name.to_string())
        .collect();
    assert_eq!(
        names,
        vec!["keep", "third"],
        "`other` and `third` take turns in the room `keep` leaves; `keep` never goes"
    );
    assert_eq!(registry.residency().factors.pinned_bytes, one);
    // `third` is resident (unpinned) beside `keep`: pinning it would fit; `other` then would not.
    registry.pin("third").unwrap();
    let e = registry.pin("other").unwrap_err();
    assert!(
        matches!(e, RegistryError::PinOverBudget { .. }) || e.is_tier_full(),
        "{e}"
    );
    // With the whole budget pinned, another version cannot come in at all.
    assert!(registry.resolve("other").unwrap_err().is_tier_full());
    registry.unpin("third").unwrap();
    registry.unpin("keep").unwrap();
    drop(registry.resolve("other").unwrap());
    let names: Vec<String> = registry
        .entries()
        .into_iter()
        .map(|e| e.name.to_string())
        .collect();
    assert_eq!(names.len(), 2, "{names:?}");
    assert!(names.contains(&"other".to_owned()), "{names:?}");
}

#[test]
fn merged_variants_are_built_once_and_bounded_by_their_own_budget() {
    // A merged variant of `tagged` holds q and v of both layers: 4 × 32 × 32 floats.
    let merged_one = 4 * 32 * 32 * 4;
    let (_dir, store, registry) = registry(1 << 20, merged_one);
    publish(&store, "a", 1.0);
    publish(&store, "b", 2.0);
    let events = registry.subscribe(64);
    let a = registry.resolve("a").unwrap();
    assert!(registry.merged_ready(&a).is_none(), "not built yet");
    let m1 = registry.merged(&a).unwrap();
    let m2 = registry.merged(&a).unwrap();
    let ready = registry.merged_ready(&a).expect("built now");
    assert_eq!(registry.merge_count(), 1);
    assert!(Arc::ptr_eq(m1.weights(), m2.weights()));
    assert!(Arc::ptr_eq(m1.weights(), ready.weights()));
    drop(ready);
    assert_eq!(m1.resident_bytes(), merged_one);
    // Zero base: merged = s·B·A with every A and B value 1 and s = alpha / r = 2, so each entry
    // is 2 × Σ_r 1·1 = 2 × 4 = 8.
    let w = m1
        .weight(&Site::new(0, switchyard_adapters::Module::AttnQ))
        .unwrap();
    let v = w.unpack();
    assert!(v.iter().all(|x| *x == 8.0), "{:?}", &v[..4]);
    let merge_event = events
        .try_iter()
        .find(|e| e.kind == SwapKind::Merged)
        .unwrap();
    assert!(merge_event.timings.merge > Duration::ZERO);
    assert_eq!(merge_event.residency.merged.bytes, merged_one);
    drop((m1, m2));
    let b = registry.resolve("b").unwrap();
    drop(registry.merged(&b).unwrap());
    let r = registry.residency();
    assert_eq!((r.merged.bytes, r.merged.entries), (merged_one, 1));
}

#[test]
fn a_pointer_flip_swaps_new_requests_and_frees_the_old_version_after_its_last_holder() {
    let (_dir, store, registry) = registry(1 << 20, 1 << 20);
    let v1 = publish(&store, "swap", 1.0);
    let events = registry.subscribe(64);
    let old = registry.resolve("swap").unwrap();
    let v2 = publish(&store, "swap", 2.0);
    // Not noticed until the registry polls: requests keep getting v1.
    assert_eq!(registry.resolve("swap").unwrap().version(), v1);
    assert_eq!(registry.poll_once(), 1);
    let new = registry.resolve("swap").unwrap();
    assert_eq!((new.version(), whole_tag(&new)), (v2.as_str(), 2.0));
    // The request admitted before the flip still holds a whole v1.
    assert_eq!((old.version(), whole_tag(&old)), (v1.as_str(), 1.0));
    let entries = registry.entries();
    assert_eq!(entries.len(), 2);
    drop(old);
    let entries = registry.entries();
    assert_eq!(entries.len(), 1, "v1 freed when its last request ended");
    assert_eq!(entries[0].version, v2);
    let kinds: Vec<SwapKind> = events.try_iter().map(|e| e.kind).collect();
    assert!(kinds.contains(&SwapKind::Flipped {
        from: Some(v1.clone())
    }));
    assert!(kinds.contains(&SwapKind::Freed {
        tier: Tier::Factors
    }));
    // Rollback is a flip back.
    store.rollback(&AdapterName::new("swap").unwrap()).unwrap();
    registry.poll_once();
    assert_eq!(registry.resolve("swap").unwrap().version(), v1);
}

#[test]
fn a_refused_new_version_leaves_the_old_one_serving() {
    let (_dir, store, registry) = registry(1 << 20, 1 << 20);
    let v1 = publish(&store, "guarded", 1.0);
    drop(registry.resolve("guarded").unwrap());
    // Another process publishes a package for a different base, skipping validation.
    let mut bad = tagged(RANK, 9.0);
    bad.meta.base_fingerprint = "badbadbadbadbadb".to_owned();
    let raw = bad.to_bytes().unwrap();
    let bytes = PackageBytes::from_slice(&raw, "mem", &Limits::default()).unwrap();
    let name = AdapterName::new("guarded").unwrap();
    store.publish(&name, bytes, "bad", None).unwrap();
    let events = registry.subscribe(64);
    assert_eq!(registry.poll_once(), 0);
    assert_eq!(registry.resolve("guarded").unwrap().version(), v1);
    let refused = events
        .try_iter()
        .find_map(|e| match e.kind {
            SwapKind::Refused { reason } => Some(reason),
            _ => None,
        })
        .unwrap();
    assert!(refused.contains("base fingerprint"), "{refused}");
    // Polling again does not read the refused file again.
    let loads = registry.load_count();
    registry.poll_once();
    assert_eq!(registry.load_count(), loads);
}

#[test]
fn load_events_carry_stage_durations_and_tier_bytes() {
    let (_dir, store, registry) = registry(1 << 20, 1 << 20);
    publish(&store, "timed", 1.0);
    let events = registry.subscribe(8);
    let h = registry.resolve("timed").unwrap();
    let e = events.try_recv().unwrap();
    assert_eq!(
        (e.name.as_str(), e.version.as_str()),
        ("timed", h.version())
    );
    assert_eq!(e.kind, SwapKind::Loaded);
    assert!(e.timings.read > Duration::ZERO && e.timings.validate > Duration::ZERO);
    assert!(e.timings.convert > Duration::ZERO);
    assert_eq!(e.timings.merge, Duration::ZERO);
    assert_eq!(e.bytes, tagged_bytes(RANK));
    assert_eq!(e.residency.factors.bytes, tagged_bytes(RANK));
    assert_eq!(e.residency.factors.held_bytes, tagged_bytes(RANK));
}

#[test]
fn unknown_and_badly_named_adapters_are_refused() {
    let (_dir, _store, registry) = registry(1 << 20, 1 << 20);
    let e = registry.resolve("ghost").unwrap_err();
    assert!(e.is_unknown_adapter(), "{e}");
    let e = registry.resolve("Ghost").unwrap_err();
    assert!(matches!(e, RegistryError::Name(_)), "{e}");
    let e = registry.resolve("base").unwrap_err();
    assert!(e.to_string().contains("reserved"), "{e}");
}

#[test]
fn the_watcher_thread_follows_a_flip_within_a_second() {
    let (_dir, store, registry) = registry(1 << 20, 1 << 20);
    publish(&store, "watched", 1.0);
    drop(registry.resolve("watched").unwrap());
    let watcher = registry.start_watcher(Duration::from_millis(50));
    let v2 = publish(&store, "watched", 2.0);
    let start = std::time::Instant::now();
    while registry.resolve("watched").unwrap().version() != v2 {
        assert!(
            start.elapsed() < Duration::from_secs(1),
            "not swapped within 1 s"
        );
        std::thread::sleep(Duration::from_millis(10));
    }
    watcher.stop();
}

#[test]
fn a_version_retired_before_the_registry_noticed_resolves_to_the_new_live_one() {
    // Room for one version: resolving `filler` evicts v1, so the next resolve of `moving` must
    // read v1's file.
    let (_dir, store, registry) = registry(tagged_bytes(RANK), 0);
    let v1 = publish(&store, "moving", 1.0);
    publish(&store, "filler", 9.0);
    assert_eq!(registry.resolve("moving").unwrap().version(), v1);
    drop(registry.resolve("filler").unwrap());
    let v2 = publish(&store, "moving", 2.0);
    store
        .retire(&AdapterName::new("moving").unwrap(), &v1)
        .unwrap();
    // No poll yet: the registry still maps the name to v1, whose file is gone.
    let h = registry.resolve("moving").unwrap();
    assert_eq!((h.version(), whole_tag(&h)), (v2.as_str(), 2.0));
}

/// Regression: an A/B arm held to the previous version loaded it from disk on every request,
/// because a version that is not live was freed as stale as soon as its request ended.
#[test]
fn a_kept_version_that_is_not_live_stays_resident_until_no_longer_kept() {
    let (_dir, store, registry) = registry(1 << 20, 1 << 20);
    let v1 = publish(&store, "trial", 1.0);
    registry.resolve("trial").unwrap();
    let v2 = publish(&store, "trial", 2.0);
    registry.poll_once();
    let name = AdapterName::new("trial").unwrap();
    registry.keep_versions([(name.clone(), v1.clone())]);
    let loads = registry.load_count();
    for _ in 0..5 {
        let old = registry.resolve_version("trial", &v1).unwrap();
        assert_eq!(whole_tag(&old), 1.0);
        let new = registry.resolve("trial").unwrap();
        assert_eq!(new.version(), v2);
    }
    assert_eq!(
        registry.load_count(),
        loads + 1,
        "v1 read once, then served from memory (v2 was already resident)"
    );
    assert_eq!(registry.entries().len(), 2);
    // No longer kept: freed, as any version that is not live.
    registry.keep_versions([]);
    let entries = registry.entries();
    assert_eq!(entries.len(), 1);
    assert_eq!(entries[0].version, v2);
}

/// Regression: a merged budget of 0 bytes, documented as "merging off", still built a merged
/// variant for every promoted batch (and freed it right after, so each batch paid a merge).
#[test]
fn a_merged_budget_of_zero_turns_merging_off() {
    let (_dir, store, off) = registry(1 << 20, 0);
    publish(&store, "solo", 1.0);
    let h = off.resolve("solo").unwrap();
    assert!(!off.merging_enabled());
    assert!(matches!(
        off.merged(&h),
        Err(RegistryError::MergingOff { .. })
    ));
    assert_eq!(off.merge_count(), 0);
    let (_dir2, store2, on) = registry(1 << 20, 1 << 20);
    publish(&store2, "solo", 1.0);
    assert!(on.merging_enabled());
    assert!(on.merged(&on.resolve("solo").unwrap()).is_ok());
}
