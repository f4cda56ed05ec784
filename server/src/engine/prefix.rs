//! The prefix cache: the KV cache of prompts already prefilled, kept so that a later prompt
//! beginning with the same tokens on the same adapter version (a shared system prompt, a
//! conversation's earlier turns) starts from a copy instead of prefilling those tokens again.
//!
//! Entries are keyed by the adapter version that computed them (`name@version`, or `base`): keys
//! and values depend on the adapter's factors on every projection before the attention, so a
//! cache made under one adapter or version is never given to another. Within a key the longest
//! common beginning wins. The bytes held are bounded; the least recently used entry leaves first.

/// One kept prompt.
struct Entry<C> {
    key: String,
    tokens: Vec<u32>,
    cache: C,
    bytes: u64,
    /// The clock reading of the last find or keep that used it.
    used: u64,
}

/// Prompts' KV caches (`C`), at most `budget` bytes of them.
pub struct PrefixCache<C> {
    budget: u64,
    held: u64,
    clock: u64,
    entries: Vec<Entry<C>>,
}

/// A stored prompt whose beginning a new prompt shares.
pub struct Found<'a, C> {
    /// The stored cache; its first `shared` positions are the new prompt's.
    pub cache: &'a C,
    pub shared: usize,
}

/// Shortest shared beginning worth reusing: below it the copy saves nearly nothing, and every
/// prompt shares its first token or two (a start-of-text token) with every other.
pub const MIN_SHARED_TOKENS: usize = 4;

fn common_len(a: &[u32], b: &[u32]) -> usize {
    a.iter().zip(b).take_while(|(x, y)| x == y).count()
}

impl<C> PrefixCache<C> {
    pub fn new(budget: u64) -> Self {
        PrefixCache {
            budget,
            held: 0,
            clock: 0,
            entries: Vec::new(),
        }
    }

    pub fn enabled(&self) -> bool {
        self.budget > 0
    }

    /// Bytes held now.
    pub fn held_bytes(&self) -> u64 {
        self.held
    }

    pub fn len(&self) -> usize {
        self.entries.len()
    }

    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }

    /// The stored prompt under `key` sharing the longest beginning with `prompt`, counting at
    /// most `limit` tokens (a new prompt must still prefill at least its last token, whose
    /// logits give the first new token), when that is at least [`MIN_SHARED_TOKENS`].
    pub fn find(&mut self, key: &str, prompt: &[u32], limit: usize) -> Option<Found<'_, C>> {
        let (best, shared) = self
            .entries
            .iter()
            .enumerate()
            .filter(|(_, e)| e.key == key)
            .map(|(i, e)| (i, common_len(&e.tokens, prompt).min(limit)))
            .max_by_key(|&(_, n)| n)?;
        if shared < MIN_SHARED_TOKENS {
            return None;
        }
        self.clock += 1;
        let entry = &mut self.entries[best];
        entry.used = self.clock;
        Some(Found {
            cache: &entry.cache,
            shared,
        })
    }

    /// Keeps the cache of a prefilled prompt under `key`: `make` copies it and is called only
    /// when it is kept. Nothing is kept when a stored prompt under the same key already begins
    /// with all of `prompt`, or when it is larger than the whole budget. Stored prompts the new
    /// one extends are dropped (it covers them), then the least recently used until the budget
    /// holds. Returns whether it was kept.
    pub fn keep(
        &mut self,
        key: &str,
        prompt: &[u32],
        bytes: u64,
        make: impl FnOnce() -> C,
    ) -> bool {
        if !self.enabled() || bytes > self.budget || prompt.len() < MIN_SHARED_TOKENS {
            return false;
        }
        self.clock += 1;
        if let Some(e) = self.entries.iter_mut().find(|e| {
            e.key == key && e.tokens.len() >= prompt.len() && e.tokens.starts_with(prompt)
        }) {
            e.used = self.clock;
            return false;
        }
        let held = &mut self.held;
        self.entries.retain(|e| {
            let covered = e.key == key && prompt.starts_with(&e.tokens);
            if covered {
                *held -= e.bytes;
            }
            !covered
        });
        while self.held + bytes > self.budget {
            let oldest = self
                .entries
                .iter()
                .enumerate()
                .min_by_key(|(_, e)| e.used)
                .map(|(i, _)| i)
                .expect("bytes are held, so an entry is");
            let gone = self.entries.swap_remove(oldest);
            self.held -= gone.bytes;
        }
        self.held += bytes;
        self.entries.push(Entry {
            key: key.to_owned(),
            tokens: prompt.to_vec(),
            cache: make(),
            bytes,
            used: self.clock,
        });
        true
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A stand-in cache: the prompt it was made from.
    fn keep(c: &mut PrefixCache<Vec<u32>>, key: &str, prompt: &[u32]) -> bool {
        c.keep(key, prompt, prompt.len() as u64 * 10, || prompt.to_vec())
    }

    fn found(
        c: &mut PrefixCache<Vec<u32>>,
        key: &str,
        prompt: &[u32],
    ) -> Option<(Vec<u32>, usize)> {
        c.find(key, prompt, prompt.len() - 1)
            .map(|f| (f.cache.clone(), f.shared))
    }

    #[test]
    fn a_prompt_finds_the_longest_shared_beginning_under_its_own_key_only() {
        let mut c = PrefixCache::new(10_000);
        let system: Vec<u32> = (100..120).collect();
        let first = [system.clone(), vec![1, 2, 3]].concat();
        assert!(keep(&mut c, "qa@v1", &first));
        let second = [system.clone(), vec![7, 8]].concat();
        assert_eq!(found(&mut c, "qa@v1", &second), Some((first.clone(), 20)));
        // Another version, another adapter, the base: nothing.
        assert_eq!(found(&mut c, "qa@v2", &second), None);
        assert_eq!(found(&mut c, "tone@v1", &second), None);
        assert_eq!(found(&mut c, "base", &second), None);
        // The same prompt again shares all but its last token.
        assert_eq!(found(&mut c, "qa@v1", &first), Some((first.clone(), 22)));
        // A beginning shorter than the minimum is not worth it.
        assert_eq!(found(&mut c, "qa@v1", &[100, 101, 102, 9, 9, 9]), None);
    }

    #[test]
    fn a_covered_prompt_is_not_kept_twice_and_a_longer_one_replaces_it() {
        let mut c = PrefixCache::new(10_000);
        let long: Vec<u32> = (0..30).collect();
        assert!(keep(&mut c, "base", &long));
        assert!(!keep(&mut c, "base", &long[..10]), "already covered");
        assert_eq!((c.len(), c.held_bytes()), (1, 300));
        let longer: Vec<u32> = (0..40).collect();
        assert!(keep(&mut c, "base", &longer));
        assert_eq!(
            (c.len(), c.held_bytes()),
            (1, 400),
            "the longer replaced it"
        );
        // The same tokens under another key are another entry.
        assert!(keep(&mut c, "qa@v1", &long));
        assert_eq!((c.len(), c.held_bytes()), (2, 700));
    }

    #[test]
    fn the_budget_holds_by_dropping_the_least_recently_used() {
        let mut c = PrefixCache::new(1_000);
        let a: Vec<u32> = (0..40).collect();
        let b: Vec<u32> = (100..140).collect();
        let d: Vec<u32> = (200..240).collect();
        assert!(keep(&mut c, "base", &a));
        assert!(keep(&mut c, "base", &b));
        assert!(found(&mut c, "base", &a).is_some(), "a used after b");
        assert!(keep(&mut c, "base", &d));
        assert!(c.held_bytes() <= 1_000);
        assert!(
            found(&mut c, "base", &b).is_none(),
            "b was least recently used"
        );
        assert!(found(&mut c, "base", &a).is_some());
        assert!(found(&mut c, "base", &d).is_some());
        // Larger than the whole budget: not kept, nothing dropped for it.
        let huge: Vec<u32> = (0..200).map(|i| i + 1000).collect();
        assert!(!keep(&mut c, "base", &huge));
        assert_eq!(c.len(), 2);
        // Off: nothing is kept.
        let mut off = PrefixCache::new(0);
        assert!(!keep(&mut off, "base", &a));
    }
}
