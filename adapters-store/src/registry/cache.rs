//! A byte-bounded least-recently-used cache whose entries may be held by requests.
//!
//! An entry is *held* while anyone besides the cache owns a clone of its `Arc` (strong count
//! above one). A held entry is never evicted: memory a request still uses is not the cache's to
//! free. The budget bounds every byte the tier holds, held or not: [`ByteLru::room_for`] says
//! whether a new entry fits once everything evictable is gone (the registry refuses a load that
//! would not), and [`ByteLru::trim`] restores the bound by dropping stale entries (versions no
//! longer live) first, then the least recently used ones, skipping held and pinned entries. The
//! cache is a plain map; the registry calls it under its one state lock.

use std::collections::HashMap;
use std::sync::Arc;

use crate::events::TierResidency;

use super::Key;

/// Something a tier can hold and measure.
pub(crate) trait Resident {
    fn resident_bytes(&self) -> usize;
}

impl Resident for crate::Adapter {
    fn resident_bytes(&self) -> usize {
        crate::Adapter::resident_bytes(self)
    }
}

impl Resident for crate::MergedWeights {
    fn resident_bytes(&self) -> usize {
        crate::MergedWeights::resident_bytes(self)
    }
}

#[derive(Debug)]
struct Entry<T> {
    value: Arc<T>,
    bytes: usize,
    last_used: u64,
    /// The entry's version is no longer live: free it as soon as nobody holds it.
    stale: bool,
}

impl<T> Entry<T> {
    fn held(&self) -> bool {
        Arc::strong_count(&self.value) > 1
    }
}

/// Why [`ByteLru::trim`] removed an entry.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Removal {
    /// Over budget, least recently used.
    Evicted,
    /// Its version is no longer live.
    Freed,
}

#[derive(Debug)]
pub(crate) struct ByteLru<T> {
    budget: usize,
    entries: HashMap<Key, Entry<T>>,
}

impl<T> ByteLru<T> {
    pub(crate) fn new(budget: usize) -> Self {
        Self {
            budget,
            entries: HashMap::new(),
        }
    }

    pub(crate) fn budget(&self) -> usize {
        self.budget
    }

    /// The entry for `key`, marked used at `tick`.
    pub(crate) fn get(&mut self, key: &Key, tick: u64) -> Option<Arc<T>> {
        let e = self.entries.get_mut(key)?;
        e.last_used = tick;
        Some(e.value.clone())
    }

    pub(crate) fn contains(&self, key: &Key) -> bool {
        self.entries.contains_key(key)
    }

    pub(crate) fn insert(&mut self, key: Key, value: Arc<T>, bytes: usize, tick: u64, stale: bool) {
        self.entries.insert(
            key,
            Entry {
                value,
                bytes,
                last_used: tick,
                stale,
            },
        );
    }

    /// Marks every entry of `name` stale unless its version is `live` (which is marked fresh).
    pub(crate) fn restale(&mut self, name: &str, live: Option<&str>) {
        for (key, e) in &mut self.entries {
            if key.0.as_str() == name {
                e.stale = Some(key.1.as_str()) != live;
            }
        }
    }

    /// Sets whether one entry, if present, is stale.
    pub(crate) fn set_stale(&mut self, key: &Key, stale: bool) {
        if let Some(e) = self.entries.get_mut(key) {
            e.stale = stale;
        }
    }

    /// Whether an entry of `bytes` fits the budget beside what cannot be evicted (held or
    /// pinned entries), were everything else evicted.
    pub(crate) fn room_for(&self, bytes: usize, pinned: impl Fn(&Key) -> bool) -> bool {
        let kept: usize = self
            .entries
            .iter()
            .filter(|(k, e)| e.held() || pinned(k))
            .map(|(_, e)| e.bytes)
            .sum();
        kept.saturating_add(bytes) <= self.budget
    }

    /// Removes entries nobody holds until the tier's bytes fit the budget: stale entries always,
    /// then the least recently used entry that is neither held nor pinned, repeatedly. Returns
    /// what it removed.
    pub(crate) fn trim(&mut self, pinned: impl Fn(&Key) -> bool) -> Vec<(Key, usize, Removal)> {
        let mut removed = Vec::new();
        let stale: Vec<Key> = self
            .entries
            .iter()
            .filter(|(_, e)| e.stale && !e.held())
            .map(|(k, _)| k.clone())
            .collect();
        for key in stale {
            let e = self.entries.remove(&key).expect("listed above");
            removed.push((key, e.bytes, Removal::Freed));
        }
        let mut total: usize = self.entries.values().map(|e| e.bytes).sum();
        if total <= self.budget {
            return removed;
        }
        let mut candidates: Vec<(u64, Key)> = self
            .entries
            .iter()
            .filter(|(k, e)| !e.held() && !pinned(k))
            .map(|(k, e)| (e.last_used, k.clone()))
            .collect();
        candidates.sort();
        for (_, key) in candidates {
            if total <= self.budget {
                break;
            }
            let e = self.entries.remove(&key).expect("listed above");
            total -= e.bytes;
            removed.push((key, e.bytes, Removal::Evicted));
        }
        removed
    }

    /// What the tier holds now; `pinned` says which entries a pin keeps.
    pub(crate) fn residency(&self, pinned: impl Fn(&Key) -> bool) -> TierResidency {
        let mut r = TierResidency {
            budget_bytes: self.budget,
            ..TierResidency::default()
        };
        for (key, e) in &self.entries {
            r.bytes += e.bytes;
            r.entries += 1;
            if e.held() {
                r.held_bytes += e.bytes;
                r.held_entries += 1;
            }
            if pinned(key) {
                r.pinned_bytes += e.bytes;
            }
        }
        r
    }

    /// Every entry: key, bytes, held.
    pub(crate) fn list(&self) -> Vec<(Key, usize, bool)> {
        let mut out: Vec<(Key, usize, bool)> = self
            .entries
            .iter()
            .map(|(k, e)| (k.clone(), e.bytes, e.held()))
            .collect();
        out.sort_by(|a, b| a.0.cmp(&b.0));
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::names::AdapterName;

    fn key(n: &str, v: &str) -> Key {
        (AdapterName::new(n).unwrap(), v.to_owned())
    }

    #[test]
    fn trim_evicts_least_recent_unheld_and_keeps_held_and_pinned() {
        let mut lru: ByteLru<u8> = ByteLru::new(25);
        lru.insert(key("a", "1"), Arc::new(1), 10, 1, false);
        lru.insert(key("b", "1"), Arc::new(2), 10, 2, false);
        lru.insert(key("c", "1"), Arc::new(3), 10, 3, false);
        let held = lru.get(&key("a", "1"), 4).unwrap();
        lru.insert(key("d", "1"), Arc::new(4), 10, 5, false);
        // All of a, b, c, d = 40 > 25. `a` is held (and now most recent), `b` is pinned, so `c`
        // and then `d` (least recent of the rest) go, leaving a + b = 20.
        let removed = lru.trim(|k| k.0.as_str() == "b");
        assert_eq!(
            removed,
            vec![
                (key("c", "1"), 10, Removal::Evicted),
                (key("d", "1"), 10, Removal::Evicted)
            ]
        );
        assert_eq!(lru.residency(|_| false).bytes, 20);
        drop(held);
        lru.insert(key("e", "1"), Arc::new(5), 10, 6, false);
        // Now a, b, e = 30: `a` (tick 4) is older than `e` (tick 6).
        let removed = lru.trim(|k| k.0.as_str() == "b");
        assert_eq!(removed, vec![(key("a", "1"), 10, Removal::Evicted)]);
    }

    #[test]
    fn budget_bounds_held_bytes_too() {
        let mut lru: ByteLru<u8> = ByteLru::new(25);
        lru.insert(key("a", "1"), Arc::new(1), 10, 1, false);
        lru.insert(key("b", "1"), Arc::new(2), 10, 2, false);
        assert!(lru.room_for(15, |_| false), "both unheld: evictable");
        let held_a = lru.get(&key("a", "1"), 3).unwrap();
        let held_b = lru.get(&key("b", "1"), 4).unwrap();
        assert!(lru.room_for(5, |_| false));
        assert!(!lru.room_for(6, |_| false), "20 held + 6 > 25");
        drop((held_a, held_b));
        assert!(lru.room_for(25, |_| false));
        assert!(!lru.room_for(20, |k| k.0.as_str() == "a"), "a is pinned");
    }

    #[test]
    fn stale_entries_are_freed_once_released_even_within_budget() {
        let mut lru: ByteLru<u8> = ByteLru::new(1000);
        lru.insert(key("a", "1"), Arc::new(1), 10, 1, false);
        let held = lru.get(&key("a", "1"), 2).unwrap();
        lru.restale("a", Some("2"));
        assert!(lru.trim(|_| false).is_empty(), "held: not freed yet");
        drop(held);
        assert_eq!(
            lru.trim(|_| false),
            vec![(key("a", "1"), 10, Removal::Freed)]
        );
    }
}
