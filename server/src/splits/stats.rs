//! Readout statistics for A/B splits: what each arm's outcomes say, and how each arm compares with
//! the first arm (the incumbent by convention).
//!
//! Outcomes are kept as running tallies, so a readout never needs the raw values again:
//! [`NumericTally`] (count, mean, sum of squared deviations; Welford's update) for numbers such as a
//! satisfaction score, [`BinaryTally`] (count, successes) for yes/no outcomes such as "booking
//! completed". [`numeric_readout`] and [`binary_readout`] turn one tally per arm into the readout.
//!
//! Methods, all at [`CONFIDENCE_LEVEL`] (95%), all two-sided:
//!
//! - mean of an arm: Student t interval `mean ± t(0.975, n − 1) · s / √n`, `s` the sample standard
//!   deviation (divisor `n − 1`);
//! - numeric difference `mean_i − mean_0`: Welch's t-test, standard error `√(s_i²/n_i + s_0²/n_0)`,
//!   Welch–Satterthwaite degrees of freedom, interval `d ± t(0.975, df) · se`;
//! - proportion of an arm: the Wilson score interval (no continuity correction). Chosen over the
//!   normal (Wald) interval because it stays inside [0, 1] and keeps close to its nominal coverage
//!   for small arms and for proportions near 0 or 1, where the Wald interval collapses to a point;
//! - proportion difference `p_i − p_0`: the unpooled normal interval
//!   `d ± z(0.975) · √(p_i(1 − p_i)/n_i + p_0(1 − p_0)/n_0)` (not clamped to [−1, 1]), and the
//!   two-proportion z-test, whose statistic uses the pooled proportion under the null hypothesis
//!   `p = (k_i + k_0)/(n_i + n_0)`, `z = d / √(p(1 − p)(1/n_i + 1/n_0))`.
//!
//! Undefined quantities are `None`, never NaN: a mean needs one outcome; a standard deviation
//! needs two; an interval, a test statistic and a p-value need a standard error that is positive.
//! A zero standard error (a constant arm, or both arms all-yes) would turn the statistic into a
//! division by zero and the interval into a single point, a certainty the sample cannot give.
//! The Wilson interval needs only one outcome, since it stays wide even at 0 or 1.
//!
//! The t distribution (tail and quantile) and the normal quantile come from `statrs`, the normal
//! tail from `libm`'s erfc (`two_sided_normal` says why). The numbers are checked against scipy
//! in server/tests/split_stats_reference.rs (fixture and script in tests/reference/), and the
//! distribution functions against 40-digit values in this module's tests.

use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal, StudentsT};
use thiserror::Error;

/// The confidence level of every interval in a readout.
pub const CONFIDENCE_LEVEL: f64 = 0.95;

/// A confidence interval, `low <= high`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Interval {
    pub low: f64,
    pub high: f64,
}

impl Interval {
    fn around(centre: f64, half_width: f64) -> Self {
        Self {
            low: centre - half_width,
            high: centre + half_width,
        }
    }
}

/// An outcome that a tally refuses.
#[derive(Debug, Clone, Copy, PartialEq, Error)]
pub enum OutcomeError {
    #[error("outcome {value} is not a finite number")]
    NotFinite { value: f64 },
    #[error("{successes} successes are more than the {count} outcomes")]
    SuccessesExceedCount { count: u64, successes: u64 },
}

/// Numeric outcomes of one arm, summarised as they arrive.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct NumericTally {
    count: u64,
    mean: f64,
    /// Sum of squared deviations from the running mean (Welford's M2); stable where the naive
    /// sum of squares minus square of sums cancels catastrophically.
    squared_deviations: f64,
}

impl NumericTally {
    pub fn new() -> Self {
        Self::default()
    }

    /// A tally of `values`, refusing the first one that is not finite.
    pub fn from_values(values: &[f64]) -> Result<Self, OutcomeError> {
        let mut tally = Self::new();
        for &value in values {
            tally.record(value)?;
        }
        Ok(tally)
    }

    /// Adds one outcome. NaN and infinities are refused: one of them would poison every later
    /// readout of the arm.
    pub fn record(&mut self, value: f64) -> Result<(), OutcomeError> {
        if !value.is_finite() {
            return Err(OutcomeError::NotFinite { value });
        }
        self.count += 1;
        let delta = value - self.mean;
        self.mean += delta / self.count as f64;
        self.squared_deviations += delta * (value - self.mean);
        Ok(())
    }

    pub fn count(&self) -> u64 {
        self.count
    }

    /// The mean; `None` without outcomes.
    pub fn mean(&self) -> Option<f64> {
        (self.count > 0).then_some(self.mean)
    }

    /// Sample variance (divisor n − 1); `None` below two outcomes.
    fn variance(&self) -> Option<f64> {
        (self.count >= 2).then(|| self.squared_deviations / (self.count - 1) as f64)
    }

    /// Squared standard error of the mean, `s² / n`.
    fn mean_variance(&self) -> Option<f64> {
        self.variance().map(|v| v / self.count as f64)
    }

    pub fn summary(&self) -> NumericSummary {
        let std_dev = self.variance().map(f64::sqrt);
        let mean_interval = match (self.mean(), std_dev) {
            (Some(mean), Some(sd)) if sd > 0.0 => {
                let se = sd / (self.count as f64).sqrt();
                Some(Interval::around(
                    mean,
                    t_critical((self.count - 1) as f64) * se,
                ))
            }
            _ => None,
        };
        NumericSummary {
            count: self.count,
            mean: self.mean(),
            std_dev,
            mean_interval,
        }
    }
}

/// Yes/no outcomes of one arm.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct BinaryTally {
    count: u64,
    successes: u64,
}

impl BinaryTally {
    pub fn new() -> Self {
        Self::default()
    }

    /// A tally of `successes` yes outcomes out of `count`.
    pub fn from_counts(count: u64, successes: u64) -> Result<Self, OutcomeError> {
        if successes > count {
            return Err(OutcomeError::SuccessesExceedCount { count, successes });
        }
        Ok(Self { count, successes })
    }

    pub fn record(&mut self, success: bool) {
        self.count += 1;
        self.successes += u64::from(success);
    }

    pub fn count(&self) -> u64 {
        self.count
    }

    pub fn successes(&self) -> u64 {
        self.successes
    }

    /// The share of yes outcomes; `None` without outcomes.
    pub fn proportion(&self) -> Option<f64> {
        (self.count > 0).then(|| self.successes as f64 / self.count as f64)
    }

    pub fn summary(&self) -> BinarySummary {
        BinarySummary {
            count: self.count,
            successes: self.successes,
            proportion: self.proportion(),
            wilson_interval: self.proportion().map(|p| wilson(p, self.count as f64)),
        }
    }
}

/// What one arm's numeric outcomes say on their own.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct NumericSummary {
    pub count: u64,
    /// `None` without outcomes.
    pub mean: Option<f64>,
    /// Sample standard deviation; `None` below two outcomes.
    pub std_dev: Option<f64>,
    /// Student t interval of the mean; `None` below two outcomes or when every outcome is equal.
    pub mean_interval: Option<Interval>,
}

/// One arm's numeric outcomes against the first arm's: Welch's t-test of `mean_i − mean_0`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct WelchComparison {
    /// `mean_i − mean_0`.
    pub difference: f64,
    /// `None` (as are the three below) when an arm has fewer than two outcomes or both are
    /// constant.
    pub interval: Option<Interval>,
    pub t_statistic: Option<f64>,
    /// Welch–Satterthwaite degrees of freedom.
    pub degrees_of_freedom: Option<f64>,
    /// Two-sided.
    pub p_value: Option<f64>,
}

/// What one arm's yes/no outcomes say on their own.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct BinarySummary {
    pub count: u64,
    pub successes: u64,
    /// `None` without outcomes.
    pub proportion: Option<f64>,
    /// Wilson score interval of the proportion; `None` without outcomes.
    pub wilson_interval: Option<Interval>,
}

/// One arm's yes/no outcomes against the first arm's.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ProportionComparison {
    /// `p_i − p_0`.
    pub difference: f64,
    /// Unpooled normal interval; `None` when both proportions are 0 or 1 (zero standard error).
    pub interval: Option<Interval>,
    /// Pooled two-proportion z statistic; `None` (as is the p-value) when both arms are all-yes
    /// or both all-no.
    pub z_statistic: Option<f64>,
    /// Two-sided.
    pub p_value: Option<f64>,
}

/// One arm's line of a numeric readout.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct NumericArmReadout {
    pub summary: NumericSummary,
    /// `None` for the first arm itself, and for an arm when either it or the first arm has no
    /// outcomes yet.
    pub versus_first: Option<WelchComparison>,
}

/// One arm's line of a yes/no readout.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct BinaryArmReadout {
    pub summary: BinarySummary,
    /// `None` for the first arm itself, and for an arm when either it or the first arm has no
    /// outcomes yet.
    pub versus_first: Option<ProportionComparison>,
}

/// The readout of numeric outcomes, one line per arm in the order given; arm 0 is the reference.
pub fn numeric_readout(arms: &[NumericTally]) -> Vec<NumericArmReadout> {
    readout(
        arms,
        NumericTally::summary,
        welch_comparison,
        |summary, versus_first| NumericArmReadout {
            summary,
            versus_first,
        },
    )
}

/// The readout of yes/no outcomes, one line per arm in the order given; arm 0 is the reference.
pub fn binary_readout(arms: &[BinaryTally]) -> Vec<BinaryArmReadout> {
    readout(
        arms,
        BinaryTally::summary,
        proportion_comparison,
        |summary, versus_first| BinaryArmReadout {
            summary,
            versus_first,
        },
    )
}

fn readout<T, S, C, L>(
    arms: &[T],
    summary: impl Fn(&T) -> S,
    compare: impl Fn(&T, &T) -> Option<C>,
    line: impl Fn(S, Option<C>) -> L,
) -> Vec<L> {
    let Some(first) = arms.first() else {
        return Vec::new();
    };
    arms.iter()
        .enumerate()
        .map(|(index, arm)| {
            let versus_first = (index > 0).then(|| compare(arm, first)).flatten();
            line(summary(arm), versus_first)
        })
        .collect()
}

/// Welch's t-test of `arm` against `first` (difference `arm − first`); `None` when either has no
/// outcomes, so that there is no difference to speak of.
pub fn welch_comparison(arm: &NumericTally, first: &NumericTally) -> Option<WelchComparison> {
    let difference = arm.mean()? - first.mean()?;
    let mut comparison = WelchComparison {
        difference,
        interval: None,
        t_statistic: None,
        degrees_of_freedom: None,
        p_value: None,
    };
    let (Some(va), Some(vb)) = (arm.mean_variance(), first.mean_variance()) else {
        return Some(comparison);
    };
    let se_squared = va + vb;
    if se_squared <= 0.0 {
        return Some(comparison);
    }
    let se = se_squared.sqrt();
    // Welch–Satterthwaite. The denominator is positive here: va + vb > 0 and both are >= 0.
    let df = se_squared * se_squared
        / (va * va / (arm.count - 1) as f64 + vb * vb / (first.count - 1) as f64);
    let t = difference / se;
    comparison.interval = Some(Interval::around(difference, t_critical(df) * se));
    comparison.t_statistic = Some(t);
    comparison.degrees_of_freedom = Some(df);
    comparison.p_value = Some(two_sided_t(t, df));
    Some(comparison)
}

/// The two-proportion comparison of `arm` against `first` (difference `arm − first`); `None` when
/// either has no outcomes.
pub fn proportion_comparison(
    arm: &BinaryTally,
    first: &BinaryTally,
) -> Option<ProportionComparison> {
    let (p1, p0) = (arm.proportion()?, first.proportion()?);
    let (n1, n0) = (arm.count as f64, first.count as f64);
    let difference = p1 - p0;

    let unpooled_se = (p1 * (1.0 - p1) / n1 + p0 * (1.0 - p0) / n0).sqrt();
    let interval =
        (unpooled_se > 0.0).then(|| Interval::around(difference, z_critical() * unpooled_se));

    let pooled = (arm.successes + first.successes) as f64 / (n1 + n0);
    let pooled_se = (pooled * (1.0 - pooled) * (1.0 / n1 + 1.0 / n0)).sqrt();
    let z_statistic = (pooled_se > 0.0).then(|| difference / pooled_se);

    Some(ProportionComparison {
        difference,
        interval,
        z_statistic,
        p_value: z_statistic.map(two_sided_normal),
    })
}

/// Wilson score interval for proportion `p` of `n > 0` outcomes.
fn wilson(p: f64, n: f64) -> Interval {
    let z = z_critical();
    let z2n = z * z / n;
    let centre = (p + z2n / 2.0) / (1.0 + z2n);
    let half_width = z / (1.0 + z2n) * (p * (1.0 - p) / n + z2n / (4.0 * n)).sqrt();
    // At p = 0 or 1 one end is 0 or 1 exactly in exact arithmetic; rounding must not step outside.
    Interval {
        low: (centre - half_width).max(0.0),
        high: (centre + half_width).min(1.0),
    }
}

/// Upper `(1 + CONFIDENCE_LEVEL) / 2` quantile of Student's t with `df > 0` degrees of freedom.
fn t_critical(df: f64) -> f64 {
    students_t(df).inverse_cdf(upper_quantile())
}

/// Upper `(1 + CONFIDENCE_LEVEL) / 2` quantile of the standard normal.
fn z_critical() -> f64 {
    standard_normal().inverse_cdf(upper_quantile())
}

fn upper_quantile() -> f64 {
    0.5 + CONFIDENCE_LEVEL / 2.0
}

/// Two-sided p-value of `t`; the survival function keeps precision far out in the tail, where
/// `1 − cdf` would round to 0.
fn two_sided_t(t: f64, df: f64) -> f64 {
    (2.0 * students_t(df).sf(t.abs())).min(1.0)
}

/// Two-sided p-value of a standard normal `z`: `erfc(|z| / √2)`. libm's erfc (musl's, within an
/// ulp or so) rather than statrs's, whose erf approximations are good to about 1e-10 relative
/// only; that showed as p-values 8e-11 away from scipy's.
fn two_sided_normal(z: f64) -> f64 {
    libm::erfc(z.abs() / std::f64::consts::SQRT_2).min(1.0)
}

fn students_t(df: f64) -> StudentsT {
    // Only called with df > 0 and finite (n >= 2, or Welch with a positive standard error), the
    // one condition statrs checks.
    StudentsT::new(0.0, 1.0, df).expect("degrees of freedom are positive")
}

fn standard_normal() -> Normal {
    Normal::new(0.0, 1.0).expect("the standard normal is valid")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn numeric(values: &[f64]) -> NumericTally {
        NumericTally::from_values(values).unwrap()
    }

    fn binary(count: u64, successes: u64) -> BinaryTally {
        BinaryTally::from_counts(count, successes).unwrap()
    }

    #[test]
    fn empty_arm_has_no_mean_and_no_comparison() {
        let lines = numeric_readout(&[NumericTally::new(), numeric(&[4.0, 5.0])]);
        assert_eq!(lines[0].summary.count, 0);
        assert_eq!(lines[0].summary.mean, None);
        assert_eq!(lines[0].summary.std_dev, None);
        assert_eq!(lines[0].summary.mean_interval, None);
        assert_eq!(lines[0].versus_first, None);
        assert_eq!(
            lines[1].versus_first, None,
            "no first-arm mean to compare with"
        );
    }

    #[test]
    fn single_outcome_has_a_mean_but_no_spread_interval_or_test() {
        let summary = numeric(&[3.0]).summary();
        assert_eq!(summary.mean, Some(3.0));
        assert_eq!(summary.std_dev, None);
        assert_eq!(summary.mean_interval, None);

        let cmp = welch_comparison(&numeric(&[3.0]), &numeric(&[4.0, 5.0, 2.0])).unwrap();
        assert_eq!(cmp.difference, 3.0 - 11.0 / 3.0);
        assert_eq!(cmp.interval, None);
        assert_eq!(cmp.t_statistic, None);
        assert_eq!(cmp.degrees_of_freedom, None);
        assert_eq!(cmp.p_value, None);
    }

    #[test]
    fn constant_arm_has_zero_spread_and_no_interval() {
        let summary = numeric(&[5.0; 8]).summary();
        assert_eq!(summary.mean, Some(5.0));
        assert_eq!(summary.std_dev, Some(0.0));
        assert_eq!(summary.mean_interval, None);
    }

    #[test]
    fn both_arms_constant_give_a_difference_but_no_test() {
        let cmp = welch_comparison(&numeric(&[5.0; 7]), &numeric(&[4.0; 6])).unwrap();
        assert_eq!(cmp.difference, 1.0);
        assert_eq!(cmp.p_value, None);
        assert_eq!(cmp.interval, None);
    }

    #[test]
    fn one_constant_arm_still_gets_welch_with_the_other_arms_df() {
        // With s_i = 0 Welch–Satterthwaite reduces to n_0 − 1 exactly.
        let first = numeric(&[3.0, 4.0, 2.0, 5.0, 4.0]);
        let cmp = welch_comparison(&numeric(&[5.0; 9]), &first).unwrap();
        assert!((cmp.degrees_of_freedom.unwrap() - 4.0).abs() < 1e-12);
        assert!(cmp.p_value.unwrap() > 0.0 && cmp.p_value.unwrap() < 1.0);
    }

    #[test]
    fn identical_arms_have_p_value_one() {
        let a = numeric(&[1.0, 2.0, 3.0, 4.0]);
        let cmp = welch_comparison(&a, &a).unwrap();
        assert_eq!(cmp.t_statistic, Some(0.0));
        assert_eq!(cmp.p_value, Some(1.0));
    }

    #[test]
    fn non_finite_outcomes_are_refused_and_leave_the_tally_alone() {
        let mut tally = numeric(&[1.0, 2.0]);
        for bad in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY] {
            assert!(matches!(
                tally.record(bad),
                Err(OutcomeError::NotFinite { .. })
            ));
        }
        assert_eq!(tally, numeric(&[1.0, 2.0]));
        assert_eq!(
            BinaryTally::from_counts(3, 4),
            Err(OutcomeError::SuccessesExceedCount {
                count: 3,
                successes: 4
            })
        );
    }

    #[test]
    fn welford_keeps_precision_for_large_offsets() {
        // Scores around 1e9 with spread 1: the naive sum-of-squares formula loses every digit.
        let values: Vec<f64> = [4.0, 7.0, 13.0, 16.0].iter().map(|x| 1e9 + x).collect();
        let sd = numeric(&values).summary().std_dev.unwrap();
        // Sample variance of 4, 7, 13, 16 is 30 (mean 10, squared deviations 36+9+9+36).
        assert!((sd - 30f64.sqrt()).abs() < 1e-9, "{sd}");
    }

    #[test]
    fn all_yes_arm_keeps_a_wilson_interval_inside_zero_one() {
        let summary = binary(20, 20).summary();
        assert_eq!(summary.proportion, Some(1.0));
        let interval = summary.wilson_interval.unwrap();
        assert_eq!(interval.high, 1.0);
        assert!(interval.low > 0.8 && interval.low < 1.0);

        let none = binary(0, 0).summary();
        assert_eq!(none.proportion, None);
        assert_eq!(none.wilson_interval, None);
    }

    #[test]
    fn both_arms_all_yes_have_no_interval_and_no_test() {
        let cmp = proportion_comparison(&binary(14, 14), &binary(30, 30)).unwrap();
        assert_eq!(cmp.difference, 0.0);
        assert_eq!(cmp.interval, None);
        assert_eq!(cmp.z_statistic, None);
        assert_eq!(cmp.p_value, None);
    }

    #[test]
    fn all_yes_against_all_no_is_tested_but_has_no_unpooled_interval() {
        let cmp = proportion_comparison(&binary(9, 9), &binary(12, 0)).unwrap();
        assert_eq!(cmp.difference, 1.0);
        assert_eq!(cmp.interval, None);
        // Pooled p = 9/21: z = 1 / sqrt(9/21 · 12/21 · (1/9 + 1/12)) = sqrt(21) exactly.
        assert!((cmp.z_statistic.unwrap() - 21f64.sqrt()).abs() < 1e-12);
        assert!(cmp.p_value.unwrap() < 1e-5);
    }

    #[test]
    fn readout_compares_every_arm_with_the_first() {
        let lines = binary_readout(&[binary(100, 50), binary(100, 60), BinaryTally::new()]);
        assert_eq!(lines.len(), 3);
        assert_eq!(lines[0].versus_first, None);
        let second = lines[1].versus_first.unwrap();
        assert!((second.difference - 0.1).abs() < 1e-15);
        assert_eq!(lines[2].versus_first, None, "an arm without outcomes");
        assert!(numeric_readout(&[]).is_empty());
    }

    #[test]
    fn distribution_functions_match_40_digit_values() {
        // Reference values from mpmath at 40 digits, rounded to f64: two-sided t tail
        // betainc(df/2, 1/2, 0, df/(df+t²), regularized=True), normal tail erfc(z/√2), t quantile
        // by findroot on that tail, z quantile √2·erfinv(0.95). statrs's t is the loosest: its
        // quantiles at df 76.6 and 1000 are 2.5e-13 off, its tail at p ≈ 1.6e-36 is 1.2e-13 off;
        // the rest agree to 6e-15.
        let close = |got: f64, want: f64| {
            let relative = ((got - want) / want).abs();
            assert!(relative < 1e-12, "{got:e} against {want:e}");
        };
        close(two_sided_t(2.0, 3.0), 0.1393259685588432);
        close(two_sided_t(-0.5, 11.92024044165253), 0.626177080928932);
        close(
            two_sided_t(14.083025907169574, 379.4204066751166),
            1.5743057823896843e-36,
        );
        close(two_sided_normal(1.0), 0.3173105078629141);
        close(two_sided_normal(-3.5), 0.0004652581580710501);
        close(two_sided_normal(8.0), 1.2441921148543568e-15);
        close(t_critical(1.0), 12.706204736174705);
        close(t_critical(4.5), 2.658912347204404);
        close(t_critical(76.62343869367977), 1.991410577366945);
        close(t_critical(1000.0), 1.9623390808264085);
        close(z_critical(), 1.9599639845400543);
    }
}
