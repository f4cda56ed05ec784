//! From the records of one scenario to what is reported: latency summary of the answered
//! requests, errors by status, throughput over the measured window, swap times from the answers
//! and from /metrics, and the share of answers a merged variant served.

use std::collections::BTreeMap;

use serde_json::{Value, json};

use crate::driver::{Record, RunRecords};
use crate::scrape::SwapHistogram;
use crate::stats::{LatencySummary, cdf, round3};

/// The measured part of one scenario.
#[derive(Debug, Clone)]
pub struct Scenario {
    pub name: String,
    /// Distinct adapters the traffic was spread over (0 for the base model alone).
    pub adapters: usize,
    /// Measured records (warm-up left out).
    pub records: Vec<Record>,
    /// Length of the measured window in seconds: from the end of the warm-up to the last answer.
    pub window_s: f64,
    /// `switchyard_swap_seconds` observed during the scenario, by stage.
    pub swap_metrics: BTreeMap<String, SwapHistogram>,
}

impl Scenario {
    pub fn new(name: &str, adapters: usize, run: &RunRecords) -> Self {
        let records: Vec<Record> = run.records.iter().filter(|r| !r.warmup).cloned().collect();
        let end = records.iter().map(Record::done_s).fold(0.0, f64::max);
        Self {
            name: name.to_owned(),
            adapters,
            window_s: (end - run.warmup_s).max(0.0),
            records,
            swap_metrics: BTreeMap::new(),
        }
    }

    /// Adds the records of another slice of the same scenario (another round).
    pub fn absorb(&mut self, other: Scenario) {
        self.records.extend(other.records);
        self.window_s += other.window_s;
        for (stage, h) in other.swap_metrics {
            let mine = self.swap_metrics.entry(stage).or_default();
            *mine = mine.plus(&h);
        }
    }

    /// Latencies of answered (200) requests, in milliseconds.
    pub fn latencies_ms(&self) -> Vec<f64> {
        self.records
            .iter()
            .filter(|r| r.ok())
            .map(|r| r.latency_ms)
            .collect()
    }

    pub fn latency(&self) -> Option<LatencySummary> {
        LatencySummary::of(&self.latencies_ms())
    }

    /// Failed requests by status (`no answer` when none came).
    pub fn errors(&self) -> BTreeMap<String, usize> {
        let mut out = BTreeMap::new();
        for r in self.records.iter().filter(|r| !r.ok()) {
            let key = if r.status == 0 {
                "no answer".to_owned()
            } else {
                r.status.to_string()
            };
            *out.entry(key).or_insert(0) += 1;
        }
        out
    }

    /// Answered requests per second over the measured window.
    pub fn throughput(&self) -> f64 {
        let ok = self.records.iter().filter(|r| r.ok()).count();
        if self.window_s > 0.0 {
            ok as f64 / self.window_s
        } else {
            0.0
        }
    }

    /// `elapsed_ms.swap` of every answered request.
    pub fn swap_ms(&self) -> Vec<f64> {
        self.records.iter().filter_map(|r| r.swap_ms).collect()
    }

    /// Share of answers that say `merged: true` (of those that say either).
    pub fn merged_share(&self) -> Option<f64> {
        let flags: Vec<bool> = self.records.iter().filter_map(|r| r.merged).collect();
        (!flags.is_empty())
            .then(|| flags.iter().filter(|&&m| m).count() as f64 / flags.len() as f64)
    }

    /// How answered requests spread over replicas, when answers named them (a run through a
    /// front of several): requests per replica, and per adapter the share of its requests that
    /// its most used replica served (the adapter affinity). `None` when no answer named one.
    pub fn replica_spread(&self) -> Option<Value> {
        let mut by_replica: BTreeMap<&str, usize> = BTreeMap::new();
        let mut by_target: BTreeMap<usize, BTreeMap<&str, usize>> = BTreeMap::new();
        for r in self.records.iter().filter(|r| r.ok()) {
            let Some(replica) = r.replica.as_deref() else {
                continue;
            };
            *by_replica.entry(replica).or_default() += 1;
            *by_target
                .entry(r.target)
                .or_default()
                .entry(replica)
                .or_default() += 1;
        }
        if by_replica.is_empty() {
            return None;
        }
        let (mut on_top, mut total) = (0usize, 0usize);
        let mut shares: Vec<f64> = Vec::new();
        for counts in by_target.values() {
            let n: usize = counts.values().sum();
            let top = counts.values().copied().max().unwrap_or(0);
            on_top += top;
            total += n;
            shares.push(top as f64 / n as f64);
        }
        shares.sort_by(f64::total_cmp);
        Some(json!({
            "requests_by_replica": by_replica,
            "adapters": by_target.len(),
            "adapters_on_one_replica": shares.iter().filter(|&&s| s == 1.0).count(),
            "least_top_replica_share": shares.first().map(|s| round3(*s)),
            "requests_on_their_adapters_top_replica": round3(on_top as f64 / total as f64),
        }))
    }

    pub fn to_json(&self) -> Value {
        let errors: serde_json::Map<String, Value> = self
            .errors()
            .into_iter()
            .map(|(k, v)| (k, json!(v)))
            .collect();
        let swap: serde_json::Map<String, Value> = self
            .swap_metrics
            .iter()
            .map(|(stage, h)| (stage.clone(), h.to_json()))
            .collect();
        let curve: Vec<Value> = cdf(&self.latencies_ms(), 200)
            .into_iter()
            .map(|(ms, share)| json!([round3(ms), round3(share)]))
            .collect();
        json!({
            "name": self.name,
            "adapters": self.adapters,
            "requests": self.records.len(),
            "errors_by_status": errors,
            "window_s": round3(self.window_s),
            "throughput_per_s": round3(self.throughput()),
            "latency_ms": self.latency().map(|l| l.to_json()),
            "swap_ms_from_answers": LatencySummary::of(&self.swap_ms()).map(|l| l.to_json()),
            "swap_from_metrics": swap,
            "merged_share": self.merged_share(),
            "replicas": self.replica_spread(),
            "latency_cdf": curve,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::mix::Kind;

    fn record(sent_s: f64, latency_ms: f64, status: u16, warmup: bool) -> Record {
        Record {
            sent_s,
            latency_ms,
            kind: Kind::Embed,
            target: 0,
            status,
            swap_ms: (status == 200).then_some(0.5),
            queue_ms: None,
            server_ms: None,
            merged: (status == 200).then_some(sent_s > 1.5),
            error: None,
            retry_after_s: None,
            replica: None,
            warmup,
        }
    }

    #[test]
    fn warmup_is_left_out_and_throughput_counts_answers_over_the_window() {
        let run = RunRecords {
            records: vec![
                record(0.2, 100.0, 200, true),
                record(1.0, 100.0, 200, false),
                record(1.5, 100.0, 429, false),
                record(2.0, 200.0, 200, false),
                record(2.9, 100.0, 0, false),
            ],
            warmup_s: 1.0,
        };
        let s = Scenario::new("base", 0, &run);
        assert_eq!(s.records.len(), 4);
        // The last answer comes at 2.9 + 0.1 = 3.0 s; the window is 3.0 - 1.0 = 2 s, and two
        // requests were answered: 1 per second.
        assert!((s.window_s - 2.0).abs() < 1e-9);
        assert!((s.throughput() - 1.0).abs() < 1e-9);
        assert_eq!(s.latencies_ms(), vec![100.0, 200.0]);
        let errors: Vec<(String, usize)> = s.errors().into_iter().collect();
        assert_eq!(
            errors,
            vec![("429".to_owned(), 1), ("no answer".to_owned(), 1)]
        );
        assert_eq!(s.merged_share(), Some(0.5));
        let j = s.to_json();
        assert_eq!(j["errors_by_status"]["429"], 1);
        assert_eq!(j["latency_ms"]["p50_ms"], 100.0);
        assert_eq!(j["latency_cdf"], json!([[100.0, 0.5], [200.0, 1.0]]));

        // A second round of 2 s with one answer: 3 answers over 4 s.
        let mut pooled = s.clone();
        let second = RunRecords {
            records: vec![
                record(0.5, 50.0, 200, true),
                record(1.0, 1000.0, 200, false),
            ],
            warmup_s: 0.0,
        };
        pooled.absorb(Scenario::new("base", 0, &second));
        assert_eq!(pooled.records.len(), 5);
        assert!((pooled.window_s - 4.0).abs() < 1e-9);
        assert!((pooled.throughput() - 0.75).abs() < 1e-9);
    }
}
