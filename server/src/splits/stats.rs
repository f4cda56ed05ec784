//! Readout statistics for A/B splits: what each arm's outcomes say, and how each arm compares with
//! the first arm (the incumbent by convention).
//!
//! Outcomes are kept as running tallies, so a readout never needs the raw values again:
//! [`NumericTally`] (count, mean, sum of squared deviations; Welford's update on values shifted by
//! the first one) for numbers such as a
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
//! Extreme values. A numeric outcome must be finite and at most [`MAX_OUTCOME_MAGNITUDE`] (1e15)
//! in size; [`NumericTally::record`] refuses the rest. Within that bound no intermediate can
//! overflow (a squared deviation is at most 4e30, a sum of them at most 4e30 times the count),
//! and Welford's update keeps the spread exact to rounding however far the values sit from 0.
//! The readout does not rely on the bound alone: a tally can also be rebuilt from stored parts
//! ([`NumericTally::from_parts`]), so every quantity is checked to be finite where it is made,
//! the Welch–Satterthwaite degrees of freedom are computed in a scaled form (both squared standard
//! errors divided by the larger, so neither the square of the sum nor the sum of squares can
//! overflow or underflow), and anything that still comes out non-finite is `None`. No input makes
//! a readout panic.
//!
//! The t distribution (tail and quantile) and the normal quantile come from `statrs`, the normal
//! tail from `libm`'s erfc (`two_sided_normal` says why). The numbers are checked against scipy
//! in server/tests/split_stats_reference.rs (fixture and script in tests/reference/), and the
//! distribution functions against 40-digit values in this module's tests.

use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal, StudentsT};
use thiserror::Error;

use super::sequential::Validity;

/// The confidence level of every interval in a readout.
pub const CONFIDENCE_LEVEL: f64 = 0.95;

/// The largest size a numeric outcome may have: values outside `[-1e15, 1e15]` are refused.
/// Below 2^53 (about 9e15) every whole number is exact in an f64, so counts of cents, milliseconds
/// or items fit with room to spare, and squared deviations (at most 4e30) summed over any count
/// stay far inside the f64 range.
pub const MAX_OUTCOME_MAGNITUDE: f64 = 1e15;

/// A confidence interval, `low <= high`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, utoipa::ToSchema)]
pub struct Interval {
    pub low: f64,
    pub high: f64,
}

impl Interval {
    /// `centre ± half_width`; `None` when either end is not finite.
    pub(crate) fn around_finite(centre: f64, half_width: f64) -> Option<Self> {
        let interval = Self {
            low: centre - half_width,
            high: centre + half_width,
        };
        (interval.low.is_finite() && interval.high.is_finite()).then_some(interval)
    }
}

/// `Some(x)` when `x` is finite: the one gate every number of a readout passes.
fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

/// An outcome that a tally refuses.
#[derive(Debug, Clone, Copy, PartialEq, Error)]
pub enum OutcomeError {
    #[error("outcome {value} is not a finite number")]
    NotFinite { value: f64 },
    #[error(
        "outcome {value:e} is outside the accepted range: a number outcome may be at most {MAX_OUTCOME_MAGNITUDE:e} in size"
    )]
    OutOfRange { value: f64 },
    #[error("{successes} successes are more than the {count} outcomes")]
    SuccessesExceedCount { count: u64, successes: u64 },
}

/// Numeric outcomes of one arm, summarised as they arrive.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct NumericTally {
    count: u64,
    /// The first value recorded. Values are accumulated as `value − shift`: for outcomes that sit
    /// far from 0 but close together (scores near 1e15 that differ by eighths) the shifted values
    /// are exact, where a running mean of the raw values rounds every deviation.
    shift: f64,
    /// Mean of `value − shift`.
    shifted_mean: f64,
    /// Sum of squared deviations from the running mean (Welford's M2); stable where the naive
    /// sum of squares minus square of sums cancels catastrophically.
    squared_deviations: f64,
}

/// A [`NumericTally`] as a store keeps it.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct NumericParts {
    pub count: u64,
    pub shift: f64,
    pub shifted_mean: f64,
    pub squared_deviations: f64,
}

impl NumericTally {
    pub fn new() -> Self {
        Self::default()
    }

    /// A tally of `values`, refusing the first one that is not finite or beyond the bound.
    pub fn from_values(values: &[f64]) -> Result<Self, OutcomeError> {
        let mut tally = Self::new();
        for &value in values {
            tally.record(value)?;
        }
        Ok(tally)
    }

    /// A tally as stored. Any values are taken (a stored tally is not re-validated); the readout
    /// of a tally whose parts are not finite says `None` where they make a quantity undefined.
    pub fn from_parts(parts: NumericParts) -> Self {
        if parts.count == 0 {
            return Self::new();
        }
        Self {
            count: parts.count,
            shift: parts.shift,
            shifted_mean: parts.shifted_mean,
            squared_deviations: parts.squared_deviations,
        }
    }

    /// The parts [`NumericTally::from_parts`] takes back.
    pub fn parts(&self) -> NumericParts {
        NumericParts {
            count: self.count,
            shift: self.shift,
            shifted_mean: self.shifted_mean,
            squared_deviations: self.squared_deviations,
        }
    }

    /// Checks that `value` may be recorded: finite and at most [`MAX_OUTCOME_MAGNITUDE`] in size.
    pub fn check(value: f64) -> Result<(), OutcomeError> {
        if !value.is_finite() {
            return Err(OutcomeError::NotFinite { value });
        }
        if value.abs() > MAX_OUTCOME_MAGNITUDE {
            return Err(OutcomeError::OutOfRange { value });
        }
        Ok(())
    }

    /// Adds one outcome (Welford's update). NaN and infinities are refused, since one of them
    /// would poison every later readout of the arm, and so are values beyond
    /// [`MAX_OUTCOME_MAGNITUDE`]. A refused value leaves the tally as it was.
    pub fn record(&mut self, value: f64) -> Result<(), OutcomeError> {
        Self::check(value)?;
        if self.count == 0 {
            self.shift = value;
        }
        let x = value - self.shift;
        self.count = self.count.saturating_add(1);
        let delta = x - self.shifted_mean;
        self.shifted_mean += delta / self.count as f64;
        // The new mean lies between the old one and `x`, so both factors have the sign of
        // `delta` and the term is never negative.
        self.squared_deviations += delta * (x - self.shifted_mean);
        Ok(())
    }

    pub fn count(&self) -> u64 {
        self.count
    }

    /// The mean; `None` without outcomes (or when a stored mean is not finite).
    pub fn mean(&self) -> Option<f64> {
        (self.count > 0)
            .then_some(self.shift + self.shifted_mean)
            .and_then(finite)
    }

    /// Sample variance (divisor n − 1); `None` below two outcomes or when not finite.
    fn variance(&self) -> Option<f64> {
        // NaN fails the comparison too.
        if self.count < 2 || self.squared_deviations.is_nan() || self.squared_deviations < 0.0 {
            return None;
        }
        finite(self.squared_deviations / (self.count - 1) as f64)
    }

    /// Squared standard error of the mean, `s² / n`.
    pub(crate) fn mean_variance(&self) -> Option<f64> {
        self.variance().and_then(|v| finite(v / self.count as f64))
    }

    pub fn summary(&self) -> NumericSummary {
        let mean = self.mean();
        let std_dev = self.variance().map(f64::sqrt);
        let mean_interval = match (mean, std_dev) {
            (Some(mean), Some(sd)) if sd > 0.0 => {
                let se = sd / (self.count as f64).sqrt();
                t_critical((self.count - 1) as f64)
                    .and_then(|t| finite(t * se))
                    .and_then(|half| Interval::around_finite(mean, half))
            }
            _ => None,
        };
        NumericSummary {
            count: self.count,
            mean,
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
        self.count = self.count.saturating_add(1);
        if success {
            self.successes = self.successes.saturating_add(1);
        }
        self.successes = self.successes.min(self.count);
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
#[derive(Debug, Clone, Copy, PartialEq, Serialize, utoipa::ToSchema)]
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
#[derive(Debug, Clone, Copy, PartialEq, Serialize, utoipa::ToSchema)]
pub struct WelchComparison {
    /// Always [`Validity::FixedSample`]: says which kind the figures are.
    pub validity: Validity,
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
#[derive(Debug, Clone, Copy, PartialEq, Serialize, utoipa::ToSchema)]
pub struct BinarySummary {
    pub count: u64,
    pub successes: u64,
    /// `None` without outcomes.
    pub proportion: Option<f64>,
    /// Wilson score interval of the proportion; `None` without outcomes.
    pub wilson_interval: Option<Interval>,
}

/// One arm's yes/no outcomes against the first arm's.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, utoipa::ToSchema)]
pub struct ProportionComparison {
    /// Always [`Validity::FixedSample`]: says which kind the figures are.
    pub validity: Validity,
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
#[derive(Debug, Clone, Copy, PartialEq, Serialize, utoipa::ToSchema)]
pub struct NumericArmReadout {
    pub summary: NumericSummary,
    /// `None` for the first arm itself, and for an arm when either it or the first arm has no
    /// outcomes yet.
    pub versus_first: Option<WelchComparison>,
}

/// One arm's line of a yes/no readout.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, utoipa::ToSchema)]
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
    let difference = finite(arm.mean()? - first.mean()?)?;
    let mut comparison = WelchComparison {
        validity: Validity::FixedSample,
        difference,
        interval: None,
        t_statistic: None,
        degrees_of_freedom: None,
        p_value: None,
    };
    if let Some(test) = welch_test(difference, arm, first) {
        comparison.interval = Some(test.interval);
        comparison.t_statistic = Some(test.t);
        comparison.degrees_of_freedom = Some(test.df);
        comparison.p_value = Some(test.p_value);
    }
    Some(comparison)
}

/// The parts of Welch's test that need a positive, finite standard error.
struct WelchTest {
    interval: Interval,
    t: f64,
    df: f64,
    p_value: f64,
}

fn welch_test(difference: f64, arm: &NumericTally, first: &NumericTally) -> Option<WelchTest> {
    let (va, vb) = (arm.mean_variance()?, first.mean_variance()?);
    // Scaled by the larger squared standard error, so that (va + vb)² and va², vb² below can
    // neither overflow (va near 1e300) nor underflow to 0 (va near 1e-300).
    let scale = va.max(vb);
    if scale.is_nan() || scale <= 0.0 {
        return None;
    }
    let (a, b) = (va / scale, vb / scale);
    let se = finite(scale.sqrt() * (a + b).sqrt())?;
    // Welch–Satterthwaite: (va + vb)² / (va²/(n_a − 1) + vb²/(n_b − 1)), the scale cancelling.
    let df = finite(
        (a + b) * (a + b) / (a * a / (arm.count - 1) as f64 + b * b / (first.count - 1) as f64),
    )?;
    if df <= 0.0 {
        return None;
    }
    let t = finite(difference / se)?;
    let half = finite(t_critical(df)? * se)?;
    Some(WelchTest {
        interval: Interval::around_finite(difference, half)?,
        t,
        df,
        p_value: two_sided_t(t, df)?,
    })
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
    let interval = (unpooled_se > 0.0)
        .then(|| Interval::around_finite(difference, z_critical() * unpooled_se))
        .flatten();

    // In f64: two counts near u64::MAX must not overflow an integer sum.
    let pooled = (arm.successes as f64 + first.successes as f64) / (n1 + n0);
    let pooled_se = (pooled * (1.0 - pooled) * (1.0 / n1 + 1.0 / n0)).sqrt();
    let z_statistic = (pooled_se > 0.0)
        .then(|| finite(difference / pooled_se))
        .flatten();

    Some(ProportionComparison {
        validity: Validity::FixedSample,
        difference,
        interval,
        z_statistic,
        p_value: z_statistic.map(two_sided_normal).and_then(finite),
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

/// Above this many degrees of freedom the t quantile comes from an asymptotic series instead of
/// statrs, which inverts the incomplete beta function and goes wrong for large shape parameters:
/// its 97.5% quantile was 1.4e-12 off at 9,999 degrees of freedom, 7% off at 1e7, and gave no
/// answer within a minute at 1e8, counts that a split with millions of outcomes reaches. The
/// series is within 5e-16 of 40-digit values from here up.
const QUANTILE_SERIES_DF: f64 = 1e3;

/// Above this many degrees of freedom the t tail comes from Hill's transformation instead of
/// statrs (whose incomplete beta function slows down as the shape parameter grows). Hill's
/// transformation is within 1e-12 of 40-digit values from here up, out to t = 37; below, its far
/// tail drifts (5e-8 relative at t = 37 and 1,000 degrees of freedom).
const TAIL_SERIES_DF: f64 = 1e4;

/// Upper `(1 + CONFIDENCE_LEVEL) / 2` quantile of Student's t with `df` degrees of freedom;
/// `None` unless `df` is positive and finite, or if the quantile is not finite.
fn t_critical(df: f64) -> Option<f64> {
    if df > QUANTILE_SERIES_DF && df.is_finite() {
        return finite(cornish_fisher_t_quantile(z_critical(), df));
    }
    finite(students_t(df)?.inverse_cdf(upper_quantile()))
}

/// The t quantile whose normal quantile is `z`, for large `df`: the Cornish–Fisher expansion in
/// powers of 1/df (Abramowitz and Stegun 26.7.5), to the fourth power; beyond 1e3 degrees of
/// freedom the next term is below 1e-15 relative.
fn cornish_fisher_t_quantile(z: f64, df: f64) -> f64 {
    let z2 = z * z;
    let (z3, z5, z7, z9) = (z * z2, z * z2 * z2, z * z2 * z2 * z2, z * z2 * z2 * z2 * z2);
    z + (z3 + z) / (4.0 * df)
        + (5.0 * z5 + 16.0 * z3 + 3.0 * z) / (96.0 * df.powi(2))
        + (3.0 * z7 + 19.0 * z5 + 17.0 * z3 - 15.0 * z) / (384.0 * df.powi(3))
        + (79.0 * z9 + 776.0 * z7 + 1482.0 * z5 - 1920.0 * z3 - 945.0 * z) / (92160.0 * df.powi(4))
}

/// Two-sided tail of Student's t for large `df`: Hill's normalising transformation (G. W. Hill,
/// "Algorithm 395: Student's t-distribution", Communications of the ACM 13(10), 1970), whose
/// asymptotic branch maps `t` to a standard normal deviate.
fn hill_two_sided_t(t: f64, df: f64) -> f64 {
    let a = df - 0.5;
    let b = 48.0 * a * a;
    let y = a * (t * t / df).ln_1p();
    let y = (((((-0.4 * y - 3.3) * y - 24.0) * y - 85.5) / (0.8 * y * y + 100.0 + b) + y + 3.0)
        / b
        + 1.0)
        * y.sqrt();
    two_sided_normal(y)
}

/// Upper `(1 + CONFIDENCE_LEVEL) / 2` quantile of the standard normal.
fn z_critical() -> f64 {
    standard_normal().inverse_cdf(upper_quantile())
}

fn upper_quantile() -> f64 {
    0.5 + CONFIDENCE_LEVEL / 2.0
}

/// Two-sided p-value of `t`; the survival function keeps precision far out in the tail, where
/// `1 − cdf` would round to 0. `None` where [`t_critical`] is, or if the tail is not finite.
fn two_sided_t(t: f64, df: f64) -> Option<f64> {
    if df > TAIL_SERIES_DF && df.is_finite() {
        return finite(hill_two_sided_t(t, df).min(1.0));
    }
    finite((2.0 * students_t(df)?.sf(t.abs())).min(1.0))
}

/// Two-sided p-value of a standard normal `z`: `erfc(|z| / √2)`. libm's erfc (musl's, within an
/// ulp or so) rather than statrs's, whose erf approximations are good to about 1e-10 relative
/// only; that showed as p-values 8e-11 away from scipy's.
fn two_sided_normal(z: f64) -> f64 {
    libm::erfc(z.abs() / std::f64::consts::SQRT_2).min(1.0)
}

/// Student's t with `df` degrees of freedom; `None` unless `df` is positive and finite. The
/// callers never pass anything else, but a readout must not panic if one ever did: this `None`
/// was a panic that took every split down with it.
fn students_t(df: f64) -> Option<StudentsT> {
    if !(df.is_finite() && df > 0.0) {
        return None;
    }
    StudentsT::new(0.0, 1.0, df).ok()
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

    /// A stored tally with no shift.
    fn stored(count: u64, mean: f64, squared_deviations: f64) -> NumericTally {
        NumericTally::from_parts(NumericParts {
            count,
            shift: 0.0,
            shifted_mean: mean,
            squared_deviations,
        })
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
    fn shifted_welford_keeps_eighths_near_the_bound() {
        // f64 spacing just below 1e15 is 1/8: a running mean of the raw values rounds every
        // deviation to that grid (the sd came out 3% low); shifted by the first value they are
        // exact, so the spread equals that of the same eighths near 0.
        let eighths = [0.0, 3.0, 5.0, 8.0, 13.0, 2.0];
        let values: Vec<f64> = eighths.iter().map(|k| 1e15 - k / 8.0).collect();
        let small: Vec<f64> = eighths.iter().map(|k| -k / 8.0).collect();
        let (want, got) = (numeric(&small).summary(), numeric(&values).summary());
        assert_eq!(got.std_dev, want.std_dev);
        assert_eq!(got.mean, Some(1e15 + want.mean.unwrap()));
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

    /// Every number the readouts of these tallies hold, with where it sits. (Not through JSON:
    /// serde_json writes a NaN as null, which would hide exactly what this looks for.)
    fn numbers(numeric: &[NumericTally], binary: &[BinaryTally]) -> Vec<(String, f64)> {
        let mut out: Vec<(String, f64)> = Vec::new();
        let mut push = |path: String, x: Option<f64>| out.extend(x.map(|x| (path, x)));
        let interval = |i: Option<Interval>| [i.map(|i| i.low), i.map(|i| i.high)];
        for (i, line) in numeric_readout(numeric).iter().enumerate() {
            let s = &line.summary;
            push(format!("numeric[{i}].mean"), s.mean);
            push(format!("numeric[{i}].std_dev"), s.std_dev);
            for x in interval(s.mean_interval) {
                push(format!("numeric[{i}].mean_interval"), x);
            }
            if let Some(c) = &line.versus_first {
                push(format!("numeric[{i}].difference"), Some(c.difference));
                push(format!("numeric[{i}].t"), c.t_statistic);
                push(format!("numeric[{i}].df"), c.degrees_of_freedom);
                push(format!("numeric[{i}].p"), c.p_value);
                for x in interval(c.interval) {
                    push(format!("numeric[{i}].interval"), x);
                }
            }
        }
        for (i, line) in binary_readout(binary).iter().enumerate() {
            let s = &line.summary;
            push(format!("yes_no[{i}].proportion"), s.proportion);
            for x in interval(s.wilson_interval) {
                push(format!("yes_no[{i}].wilson_interval"), x);
            }
            if let Some(c) = &line.versus_first {
                push(format!("yes_no[{i}].difference"), Some(c.difference));
                push(format!("yes_no[{i}].z"), c.z_statistic);
                push(format!("yes_no[{i}].p"), c.p_value);
                for x in interval(c.interval) {
                    push(format!("yes_no[{i}].interval"), x);
                }
            }
        }
        out
    }

    /// The readout of the report: arm 0 has outcomes 1 and 2, arm 1 had 1e200 and 3.
    /// Welch's degrees of freedom came out NaN, statrs refused them, and the `expect` panicked
    /// while the split lock was held, poisoning it for every later split call.
    #[test]
    fn readout_with_extreme_outcomes_does_not_take_splits_down() {
        let first = numeric(&[1.0, 2.0]);
        let mut second = NumericTally::new();
        assert_eq!(
            second.record(1e200),
            Err(OutcomeError::OutOfRange { value: 1e200 })
        );
        second.record(3.0).unwrap();
        assert_eq!(
            second,
            numeric(&[3.0]),
            "a refused value leaves the tally alone"
        );

        // The tally the unbounded code built from 1e200 and 3 (as a stored tally could still
        // hold it): a squared deviation of 5e399 is infinite.
        let delta = 3.0 - 1e200;
        let mean = 1e200 + delta / 2.0;
        let unbounded = stored(2, mean, delta * (3.0 - mean));
        assert_eq!(unbounded.squared_deviations, f64::INFINITY);

        for arm in [second, unbounded] {
            let lines = numeric_readout(&[first, arm]);
            let cmp = lines[1].versus_first.expect("both arms have a mean");
            assert!(cmp.difference.is_finite());
            for (path, x) in numbers(&[first, arm], &[]) {
                assert!(x.is_finite(), "{path} = {x}");
            }
        }
        let lines = numeric_readout(&[first, unbounded]);
        assert_eq!(
            lines[1].summary.std_dev, None,
            "an infinite spread is undefined"
        );
        assert_eq!(lines[1].versus_first.unwrap().p_value, None);
        assert_eq!(lines[1].versus_first.unwrap().degrees_of_freedom, None);
    }

    #[test]
    fn outcomes_beyond_the_bound_are_refused_naming_it() {
        let mut tally = NumericTally::new();
        for value in [MAX_OUTCOME_MAGNITUDE, -MAX_OUTCOME_MAGNITUDE, 0.0, 5e-324] {
            tally.record(value).unwrap();
        }
        for value in [1.0000001e15, -2e15, 1e200, f64::MAX, f64::MIN] {
            let err = tally.record(value).unwrap_err();
            assert_eq!(err, OutcomeError::OutOfRange { value });
            assert!(err.to_string().contains("1e15"), "{err}");
        }
        assert_eq!(tally.count(), 4);
    }

    #[test]
    fn outcomes_at_the_bound_give_a_finite_test() {
        // The case moved inside the bound, and arms spanning the whole range.
        let cases = [
            (vec![1.0, 2.0], vec![1e15, 3.0]),
            (vec![-1e15, 1e15, 0.0], vec![1e15, -1e15, 1e15]),
            (vec![1.0, 2.0, 3.0], vec![-1e15, 1e15]),
        ];
        for (a, b) in cases {
            let (a, b) = (numeric(&a), numeric(&b));
            let cmp = welch_comparison(&b, &a).unwrap();
            let p = cmp.p_value.expect("a finite test");
            assert!((0.0..=1.0).contains(&p), "{p}");
            assert!(cmp.degrees_of_freedom.unwrap() > 0.0);
            for (path, x) in numbers(&[a, b], &[]) {
                assert!(x.is_finite(), "{path} = {x}");
            }
        }
    }

    #[test]
    fn welch_degrees_of_freedom_in_scaled_form_survive_extreme_spreads() {
        // Squared standard errors near 1e300 and 1e-300: the unscaled (va + vb)² overflows to
        // infinity and the unscaled va² underflows to 0.
        let huge = stored(3, 0.0, 2e300);
        let tiny = stored(3, 1.0, 2e-300);
        for (a, b, want) in [(huge, huge, 4.0), (tiny, tiny, 4.0), (huge, tiny, 2.0)] {
            let cmp = welch_comparison(&a, &b).unwrap();
            let df = cmp.degrees_of_freedom.expect("finite degrees of freedom");
            assert!((df - want).abs() < 1e-12, "df {df}, want {want}");
        }
    }

    #[test]
    fn huge_counts_give_finite_readouts() {
        let many = stored(u64::MAX, 3.5, 1e20);
        let few = numeric(&[3.0, 4.0, 5.0]);
        let lines = numeric_readout(&[many, few]);
        assert!(lines[0].summary.mean_interval.is_some());
        assert!(lines[1].versus_first.unwrap().p_value.is_some());
        let yes = binary(u64::MAX, u64::MAX - 1);
        let no = binary(u64::MAX, u64::MAX / 3);
        let lines = binary_readout(&[yes, no]);
        let cmp = lines[1].versus_first.unwrap();
        assert!(cmp.z_statistic.unwrap() < -1e9);
        let mut tally = binary(u64::MAX, u64::MAX);
        tally.record(true);
        assert_eq!((tally.count(), tally.successes()), (u64::MAX, u64::MAX));
        for (path, x) in numbers(&[many, few], &[yes, no, tally]) {
            assert!(x.is_finite(), "{path} = {x}");
        }
    }

    #[test]
    fn zero_weight_and_one_outcome_arms_read_out_without_tests() {
        // An arm with weight 0 gets no requests and so no outcomes; one with a single outcome
        // has a mean but no spread.
        let lines = numeric_readout(&[numeric(&[4.0]), NumericTally::new(), numeric(&[2.0])]);
        assert_eq!(lines[1].summary.mean, None);
        assert_eq!(lines[1].versus_first, None);
        let cmp = lines[2].versus_first.unwrap();
        assert_eq!(cmp.difference, -2.0);
        assert_eq!((cmp.interval, cmp.p_value), (None, None));
    }

    proptest::proptest! {
        /// Whatever a stored tally holds (any count, any mean and spread, infinities and NaN
        /// included), a readout answers without a panic and every number in it is finite.
        #[test]
        fn any_stored_tallies_read_out_without_panic_or_non_finite_numbers(
            arms in proptest::collection::vec(
                (proptest::num::u64::ANY, proptest::num::f64::ANY, proptest::num::f64::ANY,
                 proptest::num::u64::ANY, proptest::num::u64::ANY),
                1..5,
            )
        ) {
            let numeric: Vec<NumericTally> = arms
                .iter()
                .map(|&(n, mean, m2, _, _)| stored(n % 5, mean, m2))
                .chain(arms.iter().map(|&(n, shift, m2, _, _)| {
                    NumericTally::from_parts(NumericParts {
                        count: n,
                        shift,
                        shifted_mean: m2,
                        squared_deviations: m2,
                    })
                }))
                .collect();
            let binary: Vec<BinaryTally> = arms
                .iter()
                .map(|&(_, _, _, n, k)| BinaryTally::from_counts(n, k.min(n)).unwrap())
                .collect();
            for (path, x) in numbers(&numeric, &binary) {
                proptest::prop_assert!(x.is_finite(), "{} = {}", path, x);
            }
        }
    }

    #[test]
    fn t_functions_at_large_degrees_of_freedom_match_40_digit_values() {
        // mpmath at 40 digits: the 97.5% quantile by findroot on the two-sided tail
        // betainc(df/2, 1/2, 0, df/(df+t²), regularized=True), and that tail at t = 2, 10, 30.
        // 2000 is on the series' side for the quantile and on statrs's for the tail, as is 9999;
        // 10001 and up are on the series' side for both. 1e7 and 1e12 are where statrs
        // answered 7% off or not at all.
        let cases: [(f64, f64, [f64; 3]); 6] = [
            (
                2000.0,
                1.9611508260994381,
                [
                    0.04563527331169481,
                    5.2353533728509826e-23,
                    1.370773019112611e-163,
                ],
            ),
            (
                9999.0,
                1.9602012636213577,
                [
                    0.045527263361510105,
                    1.9633301506493926e-23,
                    2.0480280521865905e-189,
                ],
            ),
            (
                10001.0,
                1.9602012161646412,
                [
                    0.04552725796190077,
                    1.9632313461419824e-23,
                    2.040633428000406e-189,
                ],
            ),
            (
                1e5,
                1.9599877075346097,
                [
                    0.045502963457506464,
                    1.5633015300207278e-23,
                    7.378536872222233e-197,
                ],
            ),
            (
                1e7,
                1.9599642217672055,
                [
                    0.04550029089184295,
                    1.5243592290273756e-23,
                    1.00146136908178e-197,
                ],
            ),
            (
                1e12,
                1.9599639845424266,
                [
                    0.04550026389662837,
                    1.5239706087178774e-23,
                    9.813429845929326e-198,
                ],
            ),
        ];
        for (df, quantile, tails) in cases {
            let got = t_critical(df).unwrap();
            assert!(
                ((got - quantile) / quantile).abs() < 1e-12,
                "df {df}: quantile {got} against {quantile}"
            );
            for (t, want) in [2.0, 10.0, 30.0].into_iter().zip(tails) {
                let got = two_sided_t(t, df).unwrap();
                assert!(
                    ((got - want) / want).abs() < 1e-11,
                    "df {df}, t {t}: {got:e} against {want:e}"
                );
            }
        }
        assert_eq!(t_critical(f64::INFINITY), None);
        assert_eq!(t_critical(f64::NAN), None);
        assert_eq!(two_sided_t(1.0, 0.0), None);
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
        close(two_sided_t(2.0, 3.0).unwrap(), 0.1393259685588432);
        close(
            two_sided_t(-0.5, 11.92024044165253).unwrap(),
            0.626177080928932,
        );
        close(
            two_sided_t(14.083025907169574, 379.4204066751166).unwrap(),
            1.5743057823896843e-36,
        );
        close(two_sided_normal(1.0), 0.3173105078629141);
        close(two_sided_normal(-3.5), 0.0004652581580710501);
        close(two_sided_normal(8.0), 1.2441921148543568e-15);
        close(t_critical(1.0).unwrap(), 12.706204736174705);
        close(t_critical(4.5).unwrap(), 2.658912347204404);
        close(t_critical(76.62343869367977).unwrap(), 1.991410577366945);
        close(t_critical(1000.0).unwrap(), 1.9623390808264085);
        close(z_critical(), 1.9599639845400543);
    }
}
