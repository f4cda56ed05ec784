//! The promotion policy: an adapter earns a merged variant when its share of the most recent
//! rows reaches a threshold. With one adapter dominating, the merged weights run with no
//! low-rank term; with traffic spread over many, the unmerged path shares one batch.

use std::collections::{HashMap, VecDeque};

/// A sliding window over the adapter (or base) of the last `window` rows.
#[derive(Debug)]
pub struct PromotionPolicy {
    window: usize,
    share: f64,
    recent: VecDeque<(String, usize)>,
    counts: HashMap<String, usize>,
    total: usize,
}

impl PromotionPolicy {
    /// `share` in (0, 1]; `window` rows; a `share` above 1 disables promotion.
    pub fn new(window: usize, share: f64) -> Self {
        Self {
            window: window.max(1),
            share,
            recent: VecDeque::new(),
            counts: HashMap::new(),
            total: 0,
        }
    }

    /// Records `rows` rows served by `key` (an adapter id, or `base`).
    pub fn record(&mut self, key: &str, rows: usize) {
        self.recent.push_back((key.to_owned(), rows));
        *self.counts.entry(key.to_owned()).or_default() += rows;
        self.total += rows;
        while self.total > self.window {
            let Some((old, n)) = self.recent.pop_front() else {
                break;
            };
            let excess = self.total - self.window;
            let drop = n.min(excess);
            if drop < n {
                self.recent.push_front((old.clone(), n - drop));
            }
            self.total -= drop;
            let c = self.counts.get_mut(&old).expect("counted");
            *c -= drop;
            if *c == 0 {
                self.counts.remove(&old);
            }
        }
    }

    /// Share of the window's rows that `key` served.
    pub fn share_of(&self, key: &str) -> f64 {
        if self.total == 0 {
            return 0.0;
        }
        *self.counts.get(key).unwrap_or(&0) as f64 / self.total as f64
    }

    /// True when `key` dominates recent traffic enough to run merged. A full window is
    /// required, so a burst at start-up does not promote.
    pub fn promotes(&self, key: &str) -> bool {
        self.share <= 1.0 && self.total >= self.window && self.share_of(key) >= self.share
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_adapter_with_most_recent_rows_is_promoted_and_loses_it_when_traffic_moves() {
        let mut p = PromotionPolicy::new(100, 0.9);
        p.record("a", 50);
        assert!(!p.promotes("a"), "window not yet full");
        p.record("a", 50);
        assert!(p.promotes("a"));
        p.record("b", 20);
        // Window now holds 80 rows of a and 20 of b: a's share 0.8 < 0.9.
        assert!((p.share_of("a") - 0.8).abs() < 1e-12);
        assert!(!p.promotes("a"));
    }

    #[test]
    fn a_share_above_one_disables_promotion() {
        let mut p = PromotionPolicy::new(10, 1.5);
        p.record("a", 10);
        assert!(!p.promotes("a"));
    }
}
