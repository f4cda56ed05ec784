//! Always-valid comparisons: figures that stay honest however often someone looks at a readout.
//!
//! The fixed-sample tests in [`super::stats`] (Welch, two-proportion z) hold their 5% error rate
//! only when the readout is read once, at a sample size fixed in advance. Read after every
//! outcome, with the split stopped at the first p-value under 0.05, they declare a difference
//! between two identical arms far more often (the simulation in this module's tests measures
//! how much more). The figures here hold their error rate at every moment at once: the chance
//! that the interval ever misses the true difference, or that the p-value ever drops under α
//! while the arms are equal, is at most α, however many times the readout is read.
//!
//! Method: the normal-mixture sequential probability ratio test (mSPRT) of Johari, Pekelis and
//! Walsh, "Always valid inference: continuous monitoring of A/B tests" (2017, Operations
//! Research 2022), on the normal approximation of the difference estimate. Its tuning parameter
//! is the mixing variance τ² ([`ReadoutSettings::mixing_variance`]): the spread of the prior on
//! the true difference that the likelihood ratio is averaged over. Here τ² is in units of the
//! outcome's variance (the difference measured in standard deviations of one outcome), so one
//! value suits satisfaction scores, latencies and yes/no rates alike.
//!
//! With `d` the observed difference, `V = se²` its squared standard error (unpooled: `s_i²/n_i +
//! s_0²/n_0` for numbers, `p_i(1 − p_i)/n_i + p_0(1 − p_0)/n_0` for yes/no), `z = d/se`, the
//! effective count `m = n_i·n_0/(n_i + n_0)` and `g = τ²·m`:
//!
//! - mixture likelihood ratio `Λ = (1 + g)^(−1/2) · exp(g/(1 + g) · z²/2)`;
//! - always-valid p-value `min(1, 1/Λ)`;
//! - confidence sequence `d ± se · √((1 + g)/g · (ln(1 + g) + 2 ln(1/α)))`, α = 1 −
//!   [`super::CONFIDENCE_LEVEL`]; it excludes a difference of 0 exactly when the p-value is
//!   below α.
//!
//! The same boundary is the two-sided normal mixture of Howard, Ramdas, McAuliffe and Sekhon
//! (2021) with intrinsic time `m` and ρ = 1/τ²; tests/reference/sequential.py checks these
//! figures against that library implementation (`confseq`).
//!
//! The figures are made from the tallies at the moment of the readout, so they need no history:
//! the p-value is `1/Λ` now, not the running minimum over past readouts. Both cross α at the
//! same first moment, so "ever below α" (what the guarantee is about) is the same event; the
//! running minimum would only keep a past crossing on show. Like Welch's test, the method
//! plugs in the observed variances, so it is valid as the counts grow (asymptotically); to keep
//! the first few outcomes' wild variance estimates out of it, no figure is given before each arm
//! has [`MIN_OUTCOMES_PER_ARM`] outcomes.

use serde::Serialize;

use super::stats::{BinaryTally, CONFIDENCE_LEVEL, Interval, NumericTally};

/// The mixing variance τ² used when the configuration does not set one: a prior on the true
/// difference with a standard deviation of about a third of one outcome's. The confidence
/// sequence is tightest near `m ≈ (2 ln(1/α) + ln(1 + 2 ln(1/α)))/τ²`, about 80 effective
/// outcomes (160 per arm in a 50/50 split) at α = 0.05, and widens only slowly (as √ln) past it.
pub const DEFAULT_MIXING_VARIANCE: f64 = 0.1;

/// The assignment check flags a mismatch below this p-value unless the configuration says
/// otherwise.
pub const DEFAULT_ASSIGNMENT_ALARM_P: f64 = 0.001;

/// No always-valid figure is given before each arm has this many outcomes (see the module doc).
pub const MIN_OUTCOMES_PER_ARM: u64 = 10;

/// The method's name as the readout states it.
pub const METHOD: &str =
    "normal-mixture sequential probability ratio test (Johari, Pekelis & Walsh 2017)";

/// The parameters a readout is made with (`[experiments]` in the configuration).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ReadoutSettings {
    /// τ² of the normal mixture, in units of one outcome's variance; positive and finite.
    pub mixing_variance: f64,
    /// The assignment check flags a mismatch when its p-value is below this.
    pub assignment_alarm_p: f64,
}

impl Default for ReadoutSettings {
    fn default() -> Self {
        Self {
            mixing_variance: DEFAULT_MIXING_VARIANCE,
            assignment_alarm_p: DEFAULT_ASSIGNMENT_ALARM_P,
        }
    }
}

/// Which guarantee a comparison's interval and p-value carry.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Validity {
    /// Valid when read once, at a sample size fixed in advance.
    FixedSample,
    /// Valid at every readout at once, however often it is read.
    AlwaysValid,
}

/// One arm's difference to the first arm, with the always-valid interval and p-value.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, utoipa::ToSchema)]
pub struct AlwaysValidComparison {
    /// Always [`Validity::AlwaysValid`]: says which kind the figures are.
    pub validity: Validity,
    /// `arm − first`, as in the fixed-sample comparison.
    pub difference: f64,
    /// The confidence sequence at this readout; `None` (as is the p-value) while either arm has
    /// fewer than [`MIN_OUTCOMES_PER_ARM`] outcomes or the standard error is 0.
    pub interval: Option<Interval>,
    /// Always-valid p-value, `min(1, 1/Λ)`.
    pub p_value: Option<f64>,
    /// `n_i·n_0/(n_i + n_0)`, the count the mixture is evaluated at.
    pub effective_count: f64,
}

/// The always-valid comparison of `arm` against `first` for numeric outcomes; `None` when either
/// has no outcomes.
pub fn always_valid_numeric(
    arm: &NumericTally,
    first: &NumericTally,
    mixing_variance: f64,
) -> Option<AlwaysValidComparison> {
    let difference = arm.mean()? - first.mean()?;
    let variance = match (arm.mean_variance(), first.mean_variance()) {
        (Some(a), Some(b)) => Some(a + b),
        _ => None,
    };
    comparison(
        difference,
        variance,
        arm.count(),
        first.count(),
        mixing_variance,
    )
}

/// The always-valid comparison of `arm` against `first` for yes/no outcomes; `None` when either
/// has no outcomes.
pub fn always_valid_proportion(
    arm: &BinaryTally,
    first: &BinaryTally,
    mixing_variance: f64,
) -> Option<AlwaysValidComparison> {
    let (p1, p0) = (arm.proportion()?, first.proportion()?);
    let (n1, n0) = (arm.count() as f64, first.count() as f64);
    let variance = p1 * (1.0 - p1) / n1 + p0 * (1.0 - p0) / n0;
    comparison(
        p1 - p0,
        Some(variance),
        arm.count(),
        first.count(),
        mixing_variance,
    )
}

/// The always-valid comparison of a difference with its variance, `n1` and `n0` the two arms'
/// counts: what [`always_valid_numeric`] and [`always_valid_proportion`] share, and what a
/// caller with a variance of its own (the rollout's error guard) calls.
pub(crate) fn comparison(
    difference: f64,
    variance: Option<f64>,
    n1: u64,
    n0: u64,
    mixing_variance: f64,
) -> Option<AlwaysValidComparison> {
    if !difference.is_finite() {
        return None;
    }
    let (a, b) = (n1 as f64, n0 as f64);
    // a·b/(a + b) written so that two counts near u64::MAX do not overflow the product.
    let effective_count = a / (1.0 + a / b);
    let mut line = AlwaysValidComparison {
        validity: Validity::AlwaysValid,
        difference,
        interval: None,
        p_value: None,
        effective_count,
    };
    if n1 < MIN_OUTCOMES_PER_ARM || n0 < MIN_OUTCOMES_PER_ARM {
        return Some(line);
    }
    let Some(variance) = variance.filter(|v| v.is_finite() && *v > 0.0) else {
        return Some(line);
    };
    let se = variance.sqrt();
    let z = difference / se;
    if let Some(p) = mixture_p_value(z, effective_count, mixing_variance) {
        line.p_value = Some(p);
    }
    line.interval = mixture_half_width(effective_count, mixing_variance, 1.0 - CONFIDENCE_LEVEL)
        .map(|w| w * se)
        .and_then(|half| Interval::around_finite(difference, half));
    Some(line)
}

/// `ln Λ` of the normal mixture at standardised difference `z` and effective count `m`.
pub fn log_mixture_ratio(z: f64, m: f64, mixing_variance: f64) -> Option<f64> {
    let g = mixing_variance * m;
    if !(g.is_finite() && g > 0.0 && z.is_finite()) {
        return None;
    }
    // g/(1 + g) as 1/(1 + 1/g) so that a huge g does not make ∞/∞.
    let share = 1.0 / (1.0 + 1.0 / g);
    let log_ratio = -0.5 * g.ln_1p() + share * z * z / 2.0;
    log_ratio.is_finite().then_some(log_ratio)
}

/// Always-valid p-value `min(1, 1/Λ)`.
pub fn mixture_p_value(z: f64, m: f64, mixing_variance: f64) -> Option<f64> {
    log_mixture_ratio(z, m, mixing_variance).map(|l| (-l).exp().min(1.0))
}

/// Half-width of the confidence sequence in units of the standard error:
/// `√((1 + g)/g · (ln(1 + g) + 2 ln(1/α)))`.
pub fn mixture_half_width(m: f64, mixing_variance: f64, alpha: f64) -> Option<f64> {
    let g = mixing_variance * m;
    if !(g.is_finite() && g > 0.0 && alpha > 0.0 && alpha < 1.0) {
        return None;
    }
    let width = ((1.0 + 1.0 / g) * (g.ln_1p() + 2.0 * (1.0 / alpha).ln())).sqrt();
    width.is_finite().then_some(width)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn numeric(values: &[f64]) -> NumericTally {
        NumericTally::from_values(values).unwrap()
    }

    #[test]
    fn mixture_ratio_matches_the_closed_form() {
        // g = τ²·m = 0.1·20 = 2: ln Λ = −½ ln 3 + (2/3)·z²/2; at z = 3 that is 3 − ½ ln 3.
        let got = log_mixture_ratio(3.0, 20.0, 0.1).unwrap();
        assert!((got - (3.0 - 0.5 * 3f64.ln())).abs() < 1e-14, "{got}");
        // The p-value is 1/Λ, capped at 1 (Λ < 1 near z = 0).
        let p = mixture_p_value(3.0, 20.0, 0.1).unwrap();
        assert!((p - 3f64.sqrt() * (-3f64).exp()).abs() < 1e-15, "{p}");
        assert_eq!(mixture_p_value(0.0, 20.0, 0.1), Some(1.0));
        // Half-width: √(3/2 · (ln 3 + 2 ln 20)).
        let w = mixture_half_width(20.0, 0.1, 0.05).unwrap();
        let want = (1.5 * (3f64.ln() + 2.0 * 20f64.ln())).sqrt();
        assert!((w - want).abs() < 1e-14, "{w} against {want}");
    }

    #[test]
    fn the_interval_excludes_zero_exactly_when_the_p_value_is_below_alpha() {
        // At z equal to the half-width, Λ = 1/α exactly: the two figures are one test.
        for m in [5.0, 80.0, 1e4, 1e9] {
            let w = mixture_half_width(m, 0.1, 0.05).unwrap();
            let p = mixture_p_value(w, m, 0.1).unwrap();
            assert!((p - 0.05).abs() < 1e-12, "m {m}: p {p}");
            assert!(mixture_p_value(w * 1.001, m, 0.1).unwrap() < 0.05);
            assert!(mixture_p_value(w * 0.999, m, 0.1).unwrap() > 0.05);
        }
    }

    #[test]
    fn always_valid_interval_is_wider_than_the_fixed_sample_one() {
        // The price of looking at will: at every count the sequence is wider than Welch's 95%
        // interval, by a factor that grows only slowly with the count.
        let z_fixed = 1.959963984540054;
        for m in [10.0, 100.0, 1e4, 1e6] {
            let w = mixture_half_width(m, DEFAULT_MIXING_VARIANCE, 0.05).unwrap();
            assert!(w > z_fixed * 1.2, "m {m}: {w}");
            assert!(w < 10.0, "m {m}: {w}");
        }
    }

    #[test]
    fn comparisons_wait_for_enough_outcomes_in_each_arm() {
        let few = numeric(&[1.0, 2.0, 3.0]);
        let many: Vec<f64> = (0..MIN_OUTCOMES_PER_ARM).map(|i| i as f64).collect();
        let many = numeric(&many);
        let line = always_valid_numeric(&few, &many, 0.1).unwrap();
        assert_eq!(line.validity, Validity::AlwaysValid);
        assert_eq!(line.difference, 2.0 - 4.5);
        assert_eq!((line.interval, line.p_value), (None, None));
        assert!(always_valid_numeric(&NumericTally::new(), &many, 0.1).is_none());

        let line = always_valid_numeric(&many, &many, 0.1).unwrap();
        assert_eq!(line.p_value, Some(1.0));
        assert_eq!(line.effective_count, MIN_OUTCOMES_PER_ARM as f64 / 2.0);
        let interval = line.interval.unwrap();
        assert!(interval.low < 0.0 && interval.high > 0.0);
    }

    #[test]
    fn constant_yes_no_arms_have_no_figures() {
        let all_yes = BinaryTally::from_counts(40, 40).unwrap();
        let line = always_valid_proportion(&all_yes, &all_yes, 0.1).unwrap();
        assert_eq!((line.interval, line.p_value), (None, None));
        // 40/40 against 20/40: se² = 0.25/40, z = 0.5/√(1/160) = √40, m = 20, g = 2.
        let half = BinaryTally::from_counts(40, 20).unwrap();
        let line = always_valid_proportion(&all_yes, &half, 0.1).unwrap();
        let want = mixture_p_value(40f64.sqrt(), 20.0, 0.1).unwrap();
        assert!((line.p_value.unwrap() - want).abs() < 1e-15);
        assert!(line.p_value.unwrap() < 1e-5);
    }

    #[test]
    fn extreme_tallies_give_finite_figures_or_none() {
        let huge = NumericTally::from_parts(super::super::NumericParts {
            count: u64::MAX,
            shift: 0.0,
            shifted_mean: 1.0,
            squared_deviations: 1e300,
        });
        let small = numeric(&[0.0; 12]);
        for (a, b) in [(huge, small), (small, huge), (huge, huge)] {
            if let Some(line) = always_valid_numeric(&a, &b, 0.1) {
                assert!(line.effective_count.is_finite());
                for x in [line.p_value, line.interval.map(|i| i.low)] {
                    assert!(x.is_none_or(f64::is_finite), "{line:?}");
                }
            }
        }
        let many = BinaryTally::from_counts(u64::MAX, u64::MAX / 2).unwrap();
        let line = always_valid_proportion(&many, &many, 1e6).unwrap();
        assert!(line.effective_count.is_finite() && line.effective_count > 1e18);
        assert_eq!(line.p_value, Some(1.0));
    }

    proptest::proptest! {
        /// Whatever stored tallies hold (any count, mean and spread, infinities and NaN included)
        /// and whatever mixing variance, the always-valid figures come without a panic, finite
        /// or absent, the p-value in [0, 1] and the interval around the difference.
        #[test]
        fn any_stored_tallies_give_finite_always_valid_figures(
            arms in proptest::collection::vec(
                (proptest::num::u64::ANY, proptest::num::f64::ANY, proptest::num::f64::ANY,
                 proptest::num::u64::ANY),
                2..3,
            ),
            tau2 in proptest::num::f64::POSITIVE,
        ) {
            let numeric: Vec<NumericTally> = arms
                .iter()
                .map(|&(n, mean, m2, _)| NumericTally::from_parts(super::super::NumericParts {
                    count: n,
                    shift: 0.0,
                    shifted_mean: mean,
                    squared_deviations: m2,
                }))
                .collect();
            let binary: Vec<BinaryTally> = arms
                .iter()
                .map(|&(n, _, _, k)| BinaryTally::from_counts(n, k.min(n)).unwrap())
                .collect();
            let lines = [
                always_valid_numeric(&numeric[1], &numeric[0], tau2),
                always_valid_proportion(&binary[1], &binary[0], tau2),
            ];
            for line in lines.into_iter().flatten() {
                proptest::prop_assert!(line.difference.is_finite(), "{:?}", line);
                if let Some(p) = line.p_value {
                    proptest::prop_assert!((0.0..=1.0).contains(&p), "{:?}", line);
                }
                if let Some(i) = line.interval {
                    proptest::prop_assert!(i.low.is_finite() && i.high.is_finite(), "{:?}", line);
                    proptest::prop_assert!(i.low <= line.difference && line.difference <= i.high);
                }
            }
        }
    }
}
