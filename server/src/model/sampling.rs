//! Choosing the next token from logits: greedy (argmax), or temperature with top-p (nucleus)
//! sampling from a seeded generator, so that the same seed gives the same continuation.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// How to pick tokens.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SamplingParams {
    /// `None` for greedy decoding.
    pub temperature: Option<f64>,
    /// Keep the smallest set of tokens whose probability reaches this mass (1.0 keeps all).
    pub top_p: f64,
    pub seed: u64,
}

impl Default for SamplingParams {
    fn default() -> Self {
        Self {
            temperature: None,
            top_p: 1.0,
            seed: 0,
        }
    }
}

impl SamplingParams {
    /// Checks the ranges, naming the field that is out of range.
    pub fn validate(&self) -> Result<(), String> {
        if let Some(t) = self.temperature
            && (!t.is_finite() || !(0.0..=100.0).contains(&t))
        {
            return Err(format!(
                "temperature {} is out of range: expected 0 to 100",
                crate::numbers::short(t)
            ));
        }
        if !self.top_p.is_finite() || self.top_p <= 0.0 || self.top_p > 1.0 {
            return Err(format!(
                "top-p {} is out of range: expected above 0, at most 1",
                crate::numbers::short(self.top_p)
            ));
        }
        Ok(())
    }
}

/// Per-sequence token picker with its own random stream.
#[derive(Debug, Clone)]
pub struct Sampler {
    params: SamplingParams,
    rng: ChaCha8Rng,
}

impl Sampler {
    pub fn new(params: SamplingParams) -> Self {
        Self {
            rng: ChaCha8Rng::seed_from_u64(params.seed),
            params,
        }
    }

    /// Picks the next token id from one row of logits.
    pub fn next(&mut self, logits: &[f32]) -> u32 {
        match self.params.temperature {
            None => argmax(logits),
            Some(0.0) => argmax(logits),
            Some(t) => {
                let u: f64 = self.rng.random();
                sample_top_p(logits, t, self.params.top_p, u)
            }
        }
    }
}

/// Index of the largest logit; the first one on a tie.
pub fn argmax(logits: &[f32]) -> u32 {
    let mut best = 0;
    for (i, &v) in logits.iter().enumerate() {
        if v > logits[best] {
            best = i;
        }
    }
    best as u32
}

/// Samples with temperature `t` from the top-p nucleus, using `u` in [0, 1) as the draw.
fn sample_top_p(logits: &[f32], t: f64, top_p: f64, u: f64) -> u32 {
    let max = logits.iter().copied().fold(f32::NEG_INFINITY, f32::max) as f64;
    let mut probs: Vec<(u32, f64)> = logits
        .iter()
        .enumerate()
        .map(|(i, &l)| (i as u32, ((l as f64 - max) / t).exp()))
        .collect();
    let total: f64 = probs.iter().map(|p| p.1).sum();
    probs.iter_mut().for_each(|p| p.1 /= total);
    probs.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
    let mut kept = 0;
    let mut mass = 0.0;
    for p in &probs {
        kept += 1;
        mass += p.1;
        if mass >= top_p {
            break;
        }
    }
    let nucleus = &probs[..kept];
    let mut target = u * mass;
    for p in nucleus {
        if target < p.1 {
            return p.0;
        }
        target -= p.1;
    }
    nucleus[kept - 1].0
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn greedy_takes_the_first_maximum() {
        assert_eq!(argmax(&[0.1, 3.0, -1.0, 3.0]), 1);
    }

    #[test]
    fn same_seed_same_tokens_and_different_seed_differs() {
        let logits: Vec<f32> = (0..50).map(|i| ((i * 37) % 11) as f32 * 0.3).collect();
        let draw = |seed| {
            let mut s = Sampler::new(SamplingParams {
                temperature: Some(1.0),
                top_p: 0.95,
                seed,
            });
            (0..64).map(|_| s.next(&logits)).collect::<Vec<_>>()
        };
        assert_eq!(draw(7), draw(7));
        assert_ne!(draw(7), draw(8));
    }

    #[test]
    fn small_top_p_keeps_only_the_most_likely_token() {
        let logits = [0.0f32, 5.0, 1.0, 4.9];
        for u in [0.0, 0.3, 0.99] {
            assert_eq!(sample_top_p(&logits, 1.0, 0.01, u), 1);
        }
    }

    #[test]
    fn nucleus_never_yields_a_token_outside_it() {
        // softmax of [0, 0, -100]: the third token has no mass and sits outside any nucleus.
        let logits = [0.0f32, 0.0, -100.0];
        for i in 0..100 {
            let t = sample_top_p(&logits, 1.0, 0.9, i as f64 / 100.0);
            assert!(t < 2);
        }
    }

    #[test]
    fn bad_ranges_name_the_field() {
        let p = SamplingParams {
            temperature: Some(-1.0),
            ..Default::default()
        };
        assert!(p.validate().unwrap_err().contains("temperature"));
        let p = SamplingParams {
            top_p: 1.5,
            ..Default::default()
        };
        assert!(p.validate().unwrap_err().contains("top-p"));
    }
}
