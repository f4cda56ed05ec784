//! Request schedules: Zipf-distributed adapter popularity and Poisson arrival times, both from
//! a seeded generator so that a scenario can be replayed exactly.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Draws adapter indices `0..n` with probability proportional to `1 / (rank + 1)^s`.
#[derive(Debug, Clone)]
pub struct Zipf {
    cumulative: Vec<f64>,
}

impl Zipf {
    pub fn new(n: usize, s: f64) -> Result<Self, String> {
        if n == 0 {
            return Err("the number of adapters must be at least 1".to_owned());
        }
        if !s.is_finite() || s < 0.0 {
            return Err(format!("Zipf exponent {s} must be finite and not negative"));
        }
        let weights: Vec<f64> = (1..=n).map(|k| (k as f64).powf(-s)).collect();
        let total: f64 = weights.iter().sum();
        let mut acc = 0.0;
        let cumulative = weights
            .iter()
            .map(|w| {
                acc += w / total;
                acc
            })
            .collect();
        Ok(Self { cumulative })
    }

    /// Probability of index `k`.
    pub fn probability(&self, k: usize) -> f64 {
        let prev = if k == 0 { 0.0 } else { self.cumulative[k - 1] };
        self.cumulative[k] - prev
    }

    pub fn sample(&self, rng: &mut impl Rng) -> usize {
        let u: f64 = rng.random();
        self.cumulative
            .partition_point(|&c| c < u)
            .min(self.cumulative.len() - 1)
    }
}

/// Send times (seconds from the start) of an open-loop Poisson process at `rate` per second,
/// drawn one at a time and without end; [`poisson_arrivals`] bounds them.
#[derive(Debug, Clone)]
pub struct PoissonArrivals {
    rng: ChaCha8Rng,
    rate: f64,
    t: f64,
}

impl PoissonArrivals {
    pub fn new(rate: f64, seed: u64) -> Self {
        Self {
            rng: ChaCha8Rng::seed_from_u64(seed),
            rate,
            t: 0.0,
        }
    }
}

impl Iterator for PoissonArrivals {
    type Item = f64;

    fn next(&mut self) -> Option<f64> {
        let u: f64 = self.rng.random();
        self.t += -(1.0 - u).ln() / self.rate;
        Some(self.t)
    }
}

/// Send times (seconds from the start) of an open-loop Poisson process at `rate` per second,
/// up to `duration` seconds or `limit` requests, whichever comes first.
pub fn poisson_arrivals(rate: f64, duration: f64, limit: usize, seed: u64) -> Vec<f64> {
    PoissonArrivals::new(rate, seed)
        .take_while(|&t| t <= duration)
        .take(limit)
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zipf_with_exponent_one_follows_harmonic_weights() {
        // For s = 1 and n = 4, p(k) = (1/k) / H_4 with H_4 = 25/12 (harmonic number).
        let z = Zipf::new(4, 1.0).unwrap();
        let h4 = 25.0 / 12.0;
        for k in 0..4 {
            assert!((z.probability(k) - 1.0 / ((k + 1) as f64 * h4)).abs() < 1e-12);
        }
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let n = 100_000;
        let hits = (0..n).filter(|_| z.sample(&mut rng) == 0).count();
        let share = hits as f64 / n as f64;
        assert!(
            (share - 0.48).abs() < 0.01,
            "share of the top adapter {share}"
        );
    }

    #[test]
    fn poisson_rate_matches_on_average() {
        let times = poisson_arrivals(200.0, 50.0, usize::MAX, 3);
        let rate = times.len() as f64 / 50.0;
        assert!((rate - 200.0).abs() < 6.0, "measured rate {rate}");
        assert!(times.windows(2).all(|w| w[0] < w[1]));
    }

    #[test]
    fn bad_parameters_are_refused() {
        assert!(Zipf::new(0, 1.0).is_err());
        assert!(Zipf::new(3, f64::NAN).is_err());
    }
}
