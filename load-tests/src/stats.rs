//! Summaries of measured latencies: nearest-rank percentiles, the empirical CDF drawn in the
//! report, and a histogram with logarithmic bins for swap times (which span 0.01 ms to seconds).

use serde_json::{Value, json};

/// The `q`-th percentile (0 < q ≤ 1) of ascending `sorted` by the nearest-rank rule: the smallest
/// value with at least a share `q` of the samples at or below it. `None` for no samples.
pub fn percentile(sorted: &[f64], q: f64) -> Option<f64> {
    if sorted.is_empty() {
        return None;
    }
    let rank = (q * sorted.len() as f64).ceil() as usize;
    Some(sorted[rank.clamp(1, sorted.len()) - 1])
}

/// Sorts latencies ascending (NaN never occurs: they are measured durations).
pub fn sorted(values: &[f64]) -> Vec<f64> {
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    v
}

/// Count, mean and percentiles of a set of latencies, in milliseconds.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LatencySummary {
    pub count: usize,
    pub mean_ms: f64,
    pub p50_ms: f64,
    pub p90_ms: f64,
    pub p99_ms: f64,
    pub max_ms: f64,
}

impl LatencySummary {
    /// `None` when there are no samples.
    pub fn of(latencies_ms: &[f64]) -> Option<Self> {
        let s = sorted(latencies_ms);
        Some(Self {
            count: s.len(),
            mean_ms: s.iter().sum::<f64>() / s.len().max(1) as f64,
            p50_ms: percentile(&s, 0.50)?,
            p90_ms: percentile(&s, 0.90)?,
            p99_ms: percentile(&s, 0.99)?,
            max_ms: *s.last()?,
        })
    }

    pub fn to_json(&self) -> Value {
        json!({
            "count": self.count,
            "mean_ms": round3(self.mean_ms),
            "p50_ms": round3(self.p50_ms),
            "p90_ms": round3(self.p90_ms),
            "p99_ms": round3(self.p99_ms),
            "max_ms": round3(self.max_ms),
        })
    }
}

/// Rounds to three decimals (microseconds, for values in milliseconds) for the JSON output.
pub fn round3(x: f64) -> f64 {
    (x * 1e3).round() / 1e3
}

/// The empirical CDF of `values`: `(value, share of samples at or below it)` for each distinct
/// value, ascending; at most `max_points` points, thinned evenly but always keeping the last.
pub fn cdf(values: &[f64], max_points: usize) -> Vec<(f64, f64)> {
    let s = sorted(values);
    let n = s.len() as f64;
    let mut points: Vec<(f64, f64)> = Vec::new();
    for (i, &v) in s.iter().enumerate() {
        let share = (i + 1) as f64 / n;
        match points.last_mut() {
            Some(last) if last.0 == v => last.1 = share,
            _ => points.push((v, share)),
        }
    }
    if points.len() > max_points && max_points >= 2 {
        let step = (points.len() - 1) as f64 / (max_points - 1) as f64;
        points = (0..max_points)
            .map(|k| points[((k as f64 * step).round() as usize).min(points.len() - 1)])
            .collect();
    }
    points
}

/// One bin of a histogram: `[low, high)` and how many values fell in it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Bin {
    pub low: f64,
    pub high: f64,
    pub count: usize,
}

/// A histogram of positive `values` in bins whose edges are `floor * 10^(k / per_decade)`;
/// values below `floor` count in the first bin. Empty bins between the first and the last
/// occupied one are kept, so the bars sit on a continuous axis.
pub fn log_histogram(values: &[f64], floor: f64, per_decade: u32) -> Vec<Bin> {
    let index = |v: f64| -> i64 {
        if v <= floor {
            0
        } else {
            // A small epsilon keeps exact edges (1.0, 10.0) in the bin they open.
            ((v / floor).log10() * f64::from(per_decade) + 1e-9).floor() as i64
        }
    };
    let Some(last) = values.iter().map(|&v| index(v)).max() else {
        return Vec::new();
    };
    let edge = |k: i64| floor * 10f64.powf(k as f64 / f64::from(per_decade));
    let mut bins: Vec<Bin> = (0..=last)
        .map(|k| Bin {
            low: edge(k),
            high: edge(k + 1),
            count: 0,
        })
        .collect();
    for &v in values {
        bins[index(v) as usize].count += 1;
    }
    let first = bins.iter().position(|b| b.count > 0).unwrap_or(0);
    bins.drain(..first);
    bins
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nearest_rank_percentiles_match_hand_computed_values() {
        // 1..=100: p50 is the 50th value, p90 the 90th, p99 the 99th (ceil(q * 100)).
        let v: Vec<f64> = (1..=100).map(f64::from).collect();
        assert_eq!(percentile(&v, 0.50), Some(50.0));
        assert_eq!(percentile(&v, 0.90), Some(90.0));
        assert_eq!(percentile(&v, 0.99), Some(99.0));
        assert_eq!(percentile(&v, 1.0), Some(100.0));
        // Four values: ceil(0.5 * 4) = 2nd, ceil(0.9 * 4) = 4th, ceil(0.99 * 4) = 4th.
        let four = [4.0, 1.0, 3.0, 2.0];
        let s = sorted(&four);
        assert_eq!(percentile(&s, 0.5), Some(2.0));
        assert_eq!(percentile(&s, 0.9), Some(4.0));
        assert_eq!(percentile(&[7.0], 0.5), Some(7.0));
        assert_eq!(percentile(&[], 0.5), None);
    }

    #[test]
    fn summary_of_known_latencies() {
        // Ten values 10, 20, ..., 100 ms: mean 55, p50 = 5th = 50, p90 = 9th = 90,
        // p99 = ceil(9.9) = 10th = 100.
        let v: Vec<f64> = (1..=10).rev().map(|k| f64::from(k) * 10.0).collect();
        let s = LatencySummary::of(&v).unwrap();
        assert_eq!(
            s,
            LatencySummary {
                count: 10,
                mean_ms: 55.0,
                p50_ms: 50.0,
                p90_ms: 90.0,
                p99_ms: 100.0,
                max_ms: 100.0,
            }
        );
        assert_eq!(s.to_json()["p90_ms"], 90.0);
        assert!(LatencySummary::of(&[]).is_none());
    }

    #[test]
    fn cdf_steps_by_share_and_merges_ties() {
        // 1, 2, 2, 4: P(X ≤ 1) = 1/4, P(X ≤ 2) = 3/4, P(X ≤ 4) = 1.
        let c = cdf(&[2.0, 4.0, 1.0, 2.0], 100);
        assert_eq!(c, vec![(1.0, 0.25), (2.0, 0.75), (4.0, 1.0)]);
        let many: Vec<f64> = (1..=1000).map(f64::from).collect();
        let thin = cdf(&many, 11);
        assert_eq!(thin.len(), 11);
        assert_eq!(thin[0], (1.0, 0.001));
        assert_eq!(*thin.last().unwrap(), (1000.0, 1.0));
        assert!(thin.windows(2).all(|w| w[0].0 < w[1].0 && w[0].1 < w[1].1));
    }

    #[test]
    fn log_histogram_bins_by_decade() {
        // Floor 0.01 with one bin per decade: [0.01, 0.1), [0.1, 1), [1, 10), [10, 100).
        let bins = log_histogram(&[0.005, 0.02, 0.5, 0.7, 1.0, 50.0], 0.01, 1);
        let counts: Vec<usize> = bins.iter().map(|b| b.count).collect();
        assert_eq!(counts, vec![2, 2, 1, 1]);
        assert!((bins[2].low - 1.0).abs() < 1e-12 && (bins[2].high - 10.0).abs() < 1e-12);
        // Leading empty bins are dropped, inner ones kept.
        let bins = log_histogram(&[1.5, 150.0], 0.01, 1);
        let counts: Vec<usize> = bins.iter().map(|b| b.count).collect();
        assert_eq!(counts, vec![1, 0, 1]);
        assert!(log_histogram(&[], 0.01, 4).is_empty());
    }
}
