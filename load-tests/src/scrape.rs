//! Reading the server's `/metrics` page (Prometheus text format): memory held per residency tier
//! and by the process, sampled every quarter second while a run goes on, and the swap-time
//! histogram, whose difference between two scrapes covers what happened in between.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use serde_json::{Value, json};

use crate::client::Client;
use crate::stats::round3;

/// One sample line: metric name, labels, value.
#[derive(Debug, Clone, PartialEq)]
pub struct Sample {
    pub name: String,
    pub labels: BTreeMap<String, String>,
    pub value: f64,
}

/// Parses the sample lines of a text exposition (comments and malformed lines are skipped).
pub fn parse(text: &str) -> Vec<Sample> {
    let mut out = Vec::new();
    for line in text.lines().map(str::trim) {
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        let split = if line.contains('{') {
            line.rfind('}').map(|i| (&line[..=i], &line[i + 1..]))
        } else {
            line.split_once(' ')
        };
        let Some((head, value)) = split else {
            continue;
        };
        // A timestamp may follow the value.
        let value = value.split_whitespace().next().unwrap_or("");
        let Ok(value) = value.parse::<f64>() else {
            continue;
        };
        let (name, labels) = match head.split_once('{') {
            Some((name, rest)) => (name, parse_labels(rest.trim_end_matches('}'))),
            None => (head.trim(), BTreeMap::new()),
        };
        out.push(Sample {
            name: name.to_owned(),
            labels,
            value,
        });
    }
    out
}

fn parse_labels(text: &str) -> BTreeMap<String, String> {
    let mut labels = BTreeMap::new();
    let mut rest = text;
    while let Some((key, after)) = rest.split_once("=\"") {
        let mut value = String::new();
        let mut chars = after.char_indices();
        let mut end = after.len();
        while let Some((i, c)) = chars.next() {
            match c {
                '\\' => {
                    if let Some((_, n)) = chars.next() {
                        value.push(if n == 'n' { '\n' } else { n });
                    }
                }
                '"' => {
                    end = i + 1;
                    break;
                }
                c => value.push(c),
            }
        }
        labels.insert(key.trim_matches([',', ' ']).to_owned(), value);
        rest = &after[end..];
    }
    labels
}

/// The value of `name` with label `label = value`, if the page has it.
pub fn value_of(samples: &[Sample], name: &str, label: Option<(&str, &str)>) -> Option<f64> {
    samples
        .iter()
        .find(|s| {
            s.name == name
                && label.is_none_or(|(k, v)| s.labels.get(k).map(String::as_str) == Some(v))
        })
        .map(|s| s.value)
}

/// One stage of `switchyard_swap_seconds`: cumulative bucket counts by upper bound, sum, count.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct SwapHistogram {
    pub buckets: Vec<(f64, f64)>,
    pub sum_s: f64,
    pub count: f64,
}

/// `switchyard_swap_seconds` by stage.
pub fn swap_histograms(samples: &[Sample]) -> BTreeMap<String, SwapHistogram> {
    let mut out: BTreeMap<String, SwapHistogram> = BTreeMap::new();
    for s in samples {
        let Some(stage) = s.labels.get("stage") else {
            continue;
        };
        let h = out.entry(stage.clone()).or_default();
        match s.name.as_str() {
            "switchyard_swap_seconds_bucket" => {
                let le = s
                    .labels
                    .get("le")
                    .map_or(f64::INFINITY, |le| le.parse().unwrap_or(f64::INFINITY));
                h.buckets.push((le, s.value));
            }
            "switchyard_swap_seconds_sum" => h.sum_s = s.value,
            "switchyard_swap_seconds_count" => h.count = s.value,
            _ => {}
        }
    }
    for h in out.values_mut() {
        h.buckets.sort_by(|a, b| a.0.total_cmp(&b.0));
    }
    out
}

impl SwapHistogram {
    /// What was observed after `earlier` was scraped.
    pub fn since(&self, earlier: Option<&SwapHistogram>) -> SwapHistogram {
        let Some(e) = earlier else {
            return self.clone();
        };
        let before = |le: f64| e.buckets.iter().find(|b| b.0 == le).map_or(0.0, |b| b.1);
        SwapHistogram {
            buckets: self
                .buckets
                .iter()
                .map(|&(le, c)| (le, c - before(le)))
                .collect(),
            sum_s: self.sum_s - e.sum_s,
            count: self.count - e.count,
        }
    }

    /// The observations of both, as one histogram.
    pub fn plus(&self, other: &SwapHistogram) -> SwapHistogram {
        let mut buckets = self.buckets.clone();
        for &(le, c) in &other.buckets {
            match buckets.iter_mut().find(|b| b.0 == le) {
                Some(b) => b.1 += c,
                None => buckets.push((le, c)),
            }
        }
        buckets.sort_by(|a, b| a.0.total_cmp(&b.0));
        SwapHistogram {
            buckets,
            sum_s: self.sum_s + other.sum_s,
            count: self.count + other.count,
        }
    }

    /// The upper bound of the bucket that holds the `q`-th share of observations.
    pub fn quantile_bound_s(&self, q: f64) -> Option<f64> {
        if self.count <= 0.0 {
            return None;
        }
        let want = q * self.count;
        self.buckets.iter().find(|b| b.1 >= want).map(|b| b.0)
    }

    pub fn to_json(&self) -> Value {
        let ms = |s: Option<f64>| s.filter(|s| s.is_finite()).map(|s| round3(s * 1e3));
        json!({
            "count": self.count,
            "mean_ms": (self.count > 0.0).then(|| round3(self.sum_s / self.count * 1e3)),
            "p50_bound_ms": ms(self.quantile_bound_s(0.5)),
            "p99_bound_ms": ms(self.quantile_bound_s(0.99)),
        })
    }
}

/// Memory held at one moment, in bytes.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MemorySample {
    pub at_s: f64,
    pub factors: f64,
    pub merged: f64,
    /// The server process's resident set, when /metrics reports it.
    pub process: Option<f64>,
}

/// The memory figures of one scrape.
pub fn memory_sample(samples: &[Sample], at_s: f64) -> MemorySample {
    let tier = |t| value_of(samples, "switchyard_resident_bytes", Some(("tier", t))).unwrap_or(0.0);
    MemorySample {
        at_s,
        factors: tier("factors"),
        merged: tier("merged"),
        process: value_of(samples, "switchyard_process_resident_bytes", None),
    }
}

/// A reading taken every `period` on its own thread until stopped: what the samplers of a run
/// share. `read` gets the seconds since `origin` and returns the sample, or nothing when that
/// reading failed.
#[derive(Debug)]
pub struct Periodic<T> {
    stop: Arc<AtomicBool>,
    thread: JoinHandle<Vec<T>>,
}

impl<T: Send + 'static> Periodic<T> {
    pub fn start(
        origin: Instant,
        period: Duration,
        mut read: impl FnMut(f64) -> Option<T> + Send + 'static,
    ) -> Self {
        let stop = Arc::new(AtomicBool::new(false));
        let flag = Arc::clone(&stop);
        let thread = std::thread::spawn(move || {
            let mut out = Vec::new();
            while !flag.load(Ordering::Relaxed) {
                let at = origin.elapsed().as_secs_f64();
                out.extend(read(at));
                let next = Duration::from_secs_f64(at) + period;
                while !flag.load(Ordering::Relaxed) && origin.elapsed() < next {
                    std::thread::sleep(Duration::from_millis(10));
                }
            }
            out
        });
        Self { stop, thread }
    }

    /// Stops and returns the samples.
    pub fn finish(self) -> Vec<T> {
        self.stop.store(true, Ordering::Relaxed);
        self.thread.join().unwrap_or_default()
    }
}

/// Scrapes /metrics every `period` on its own thread until stopped.
#[derive(Debug)]
pub struct MemorySampler(Periodic<MemorySample>);

impl MemorySampler {
    /// Starts sampling; times are seconds since `origin`.
    pub fn start(client: Client, origin: Instant, period: Duration) -> Self {
        Self(Periodic::start(origin, period, move |at| {
            client
                .metrics()
                .ok()
                .map(|text| memory_sample(&parse(&text), at))
        }))
    }

    /// Stops and returns the samples.
    pub fn finish(self) -> Vec<MemorySample> {
        self.0.finish()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const PAGE: &str = r#"# HELP switchyard_resident_bytes Bytes held by each residency tier (factors, merged).
# TYPE switchyard_resident_bytes gauge
switchyard_resident_bytes{tier="factors"} 294912
switchyard_resident_bytes{tier="merged"} 0
switchyard_process_resident_bytes 123456789
# TYPE switchyard_swap_seconds histogram
switchyard_swap_seconds_sum{stage="load"} 0.006
switchyard_swap_seconds_count{stage="load"} 3
switchyard_swap_seconds_bucket{le="0.001",stage="load"} 1
switchyard_swap_seconds_bucket{le="0.002",stage="load"} 2
switchyard_swap_seconds_bucket{le="0.004",stage="load"} 3
switchyard_swap_seconds_bucket{le="+Inf",stage="load"} 3
switchyard_requests_total{endpoint="embed",adapter="a \"q\"",status="200"} 7
"#;

    #[test]
    fn samples_and_labels_are_read() {
        let s = parse(PAGE);
        assert_eq!(
            value_of(&s, "switchyard_resident_bytes", Some(("tier", "factors"))),
            Some(294_912.0)
        );
        assert_eq!(
            value_of(
                &s,
                "switchyard_requests_total",
                Some(("adapter", "a \"q\""))
            ),
            Some(7.0)
        );
        let m = memory_sample(&s, 1.5);
        assert_eq!(
            m,
            MemorySample {
                at_s: 1.5,
                factors: 294_912.0,
                merged: 0.0,
                process: Some(123_456_789.0)
            }
        );
    }

    #[test]
    fn swap_histogram_difference_and_bounds() {
        let now = swap_histograms(&parse(PAGE))["load"].clone();
        assert_eq!(now.count, 3.0);
        // Cumulative 1, 2, 3 of 3: the median (1.5 observations) lies in the bucket ≤ 2 ms,
        // the 99th percentile (2.97) in the bucket ≤ 4 ms.
        assert_eq!(now.quantile_bound_s(0.5), Some(0.002));
        assert_eq!(now.quantile_bound_s(0.99), Some(0.004));
        let earlier = SwapHistogram {
            buckets: vec![
                (0.001, 1.0),
                (0.002, 1.0),
                (0.004, 1.0),
                (f64::INFINITY, 1.0),
            ],
            sum_s: 0.001,
            count: 1.0,
        };
        let d = now.since(Some(&earlier));
        assert_eq!(d.count, 2.0);
        assert_eq!(d.buckets[0], (0.001, 0.0));
        assert_eq!(d.quantile_bound_s(0.5), Some(0.002));
        let twice = d.plus(&d);
        assert_eq!(twice.count, 4.0);
        assert_eq!(twice.buckets[1], (0.002, 2.0));
        assert_eq!(SwapHistogram::default().plus(&d), d);
        let j = d.to_json();
        assert_eq!(j["mean_ms"], 2.5);
        assert_eq!(j["p99_bound_ms"], 4.0);
    }
}
