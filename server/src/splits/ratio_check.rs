//! The assignment check: do the requests each arm received match the split's weights?
//!
//! A split that sends 50/50 by its weights but shows 5,000 against 4,700 requests is broken
//! somewhere (a client that retries on one arm only, a cache in front of one adapter, outcomes
//! lost for one version), and then no comparison of its arms can be trusted, however small its
//! p-value: the arms no longer see the same traffic. This is the sample-ratio check of the A/B
//! testing trade: Pearson's chi-square goodness-of-fit test of the observed request counts
//! against the counts the weights predict, `χ² = Σ (observed − expected)²/expected` with
//! `k − 1` degrees of freedom for `k` arms of positive weight. A mismatch is flagged when its
//! p-value is below [`super::ReadoutSettings::assignment_alarm_p`] (0.001 unless configured):
//! a small threshold, because the test runs at every readout and a false alarm would send
//! someone hunting for a bug that is not there.
//!
//! Arms of weight 0 take no part in the test, requests or not: an arm set to 0 (a candidate rolled
//! back) keeps the requests it served before, and those say nothing about today's allocation.
//! What the check cannot know: requests are counted per arm record, and an edit that only
//! changes weights keeps the records, so after a reweighting the counts mix two allocations and
//! the check compares them with the current weights only (it will flag the split until the new
//! allocation dominates; recreating the split starts the counts afresh). And with sticky
//! assignment, counts of requests (not subjects) are not independent draws, so a few heavy
//! subjects can trip it. The readout lists the counts and shares it compared.

use serde::Serialize;
use statrs::distribution::{ChiSquared, ContinuousCDF};

/// What the assignment check found.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct AssignmentCheck {
    /// Requests per arm, in the split's order.
    pub requests: Vec<u64>,
    /// Each arm's share of requests by its weight.
    pub expected_shares: Vec<f64>,
    /// Pearson's statistic over the arms of positive weight; `None` when there is no test (no
    /// requests to them, or fewer than two of them).
    pub chi_square: Option<f64>,
    /// `k − 1` for `k` arms of positive weight.
    pub degrees_of_freedom: Option<u64>,
    /// Upper tail of the chi-square distribution at the statistic; `None` when there is nothing
    /// to test.
    pub p_value: Option<f64>,
    /// The threshold below which a mismatch is flagged.
    pub alarm_below: f64,
    /// True when the p-value is below the threshold.
    pub mismatch: bool,
}

/// Tests `requests` (one count per arm) against `weights` (finite, at least 0, one positive, as
/// a validated split has them).
pub fn assignment_check(requests: &[u64], weights: &[f64], alarm_below: f64) -> AssignmentCheck {
    let largest = weights.iter().copied().fold(0.0, f64::max);
    // Divided by the largest first, so weights near f64::MAX sum without overflow.
    let scaled: Vec<f64> = weights
        .iter()
        .map(|w| if largest > 0.0 { w / largest } else { 0.0 })
        .collect();
    let total_weight: f64 = scaled.iter().sum();
    let expected_shares: Vec<f64> = scaled
        .iter()
        .map(|w| {
            if total_weight > 0.0 {
                w / total_weight
            } else {
                0.0
            }
        })
        .collect();
    let mut check = AssignmentCheck {
        requests: requests.to_vec(),
        expected_shares,
        chi_square: None,
        degrees_of_freedom: None,
        p_value: None,
        alarm_below,
        mismatch: false,
    };
    let positive = || {
        requests
            .iter()
            .zip(&check.expected_shares)
            .filter(|(_, share)| **share > 0.0)
    };
    let total: f64 = positive().map(|(&r, _)| r as f64).sum();
    let arms = positive().count() as u64;
    if total == 0.0 || arms < 2 {
        return check;
    }
    let chi_square: f64 = positive()
        .map(|(&r, &share)| {
            let expected = share * total;
            let gap = r as f64 - expected;
            gap * gap / expected
        })
        .sum();
    let df = arms - 1;
    let p_value = chi_square_tail(chi_square, df as f64);
    check.chi_square = chi_square.is_finite().then_some(chi_square);
    check.degrees_of_freedom = Some(df);
    check.p_value = p_value;
    check.mismatch = p_value.is_some_and(|p| p < alarm_below);
    check
}

/// `P(X ≥ x)` for a chi-square `X` with `df` degrees of freedom; `None` when not finite.
fn chi_square_tail(x: f64, df: f64) -> Option<f64> {
    if !x.is_finite() {
        return Some(0.0);
    }
    let distribution = ChiSquared::new(df).ok()?;
    let p = distribution.sf(x);
    p.is_finite().then_some(p.clamp(0.0, 1.0))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_that_follow_the_weights_pass() {
        let check = assignment_check(&[502, 498], &[1.0, 1.0], 0.001);
        assert_eq!(check.expected_shares, vec![0.5, 0.5]);
        // (2² + 2²)/500 = 0.016 on one degree of freedom.
        assert!((check.chi_square.unwrap() - 0.016).abs() < 1e-12);
        assert_eq!(check.degrees_of_freedom, Some(1));
        assert!(check.p_value.unwrap() > 0.8);
        assert!(!check.mismatch);
    }

    #[test]
    fn a_lopsided_split_is_flagged() {
        // 5,000 against 4,700 under 50/50: χ² = 2·150²/4,850 ≈ 9.28, p ≈ 0.0023: not yet
        // flagged at 0.001; 5,000 against 4,600 (χ² ≈ 16.7, p ≈ 4.4e-5) is.
        let near = assignment_check(&[5000, 4700], &[0.5, 0.5], 0.001);
        assert!(!near.mismatch, "{near:?}");
        let far = assignment_check(&[5000, 4600], &[0.5, 0.5], 0.001);
        assert!(far.mismatch, "{far:?}");
        assert!(far.p_value.unwrap() < 1e-4);
        // The threshold is the caller's.
        assert!(assignment_check(&[5000, 4700], &[0.5, 0.5], 0.01).mismatch);
    }

    #[test]
    fn zero_weight_arms_are_left_out_with_the_requests_they_served() {
        // A candidate rolled back to weight 0 after serving 300 requests: the other two arms
        // are tested on their own counts, one degree of freedom.
        let check = assignment_check(&[40, 300, 38], &[1.0, 0.0, 1.0], 0.001);
        assert_eq!(check.expected_shares, vec![0.5, 0.0, 0.5]);
        assert_eq!(check.degrees_of_freedom, Some(1));
        // (1² + 1²)/39.
        assert!((check.chi_square.unwrap() - 2.0 / 39.0).abs() < 1e-12);
        assert!(!check.mismatch);
    }

    #[test]
    fn nothing_to_test_without_requests_or_a_second_arm() {
        for (requests, weights) in [
            (vec![0, 0], vec![1.0, 1.0]),
            (vec![7], vec![2.0]),
            (vec![7, 0], vec![2.0, 0.0]),
        ] {
            let check = assignment_check(&requests, &weights, 0.001);
            assert_eq!(check.p_value, None, "{requests:?}");
            assert!(!check.mismatch);
        }
    }

    #[test]
    fn weights_near_the_largest_number_give_finite_shares() {
        let check = assignment_check(&[10, 10], &[f64::MAX, f64::MAX], 0.001);
        assert_eq!(check.expected_shares, vec![0.5, 0.5]);
        assert_eq!(check.chi_square, Some(0.0));
        assert_eq!(check.p_value, Some(1.0));
    }

    proptest::proptest! {
        /// Any counts against any valid weights: no panic, shares that sum to 1, a p-value in
        /// [0, 1] or none, and a mismatch only with a p-value below the threshold.
        #[test]
        fn any_counts_and_weights_give_a_sound_check(
            arms in proptest::collection::vec(
                (proptest::num::u64::ANY, 0.0..f64::MAX),
                1..6,
            )
        ) {
            let requests: Vec<u64> = arms.iter().map(|a| a.0).collect();
            let mut weights: Vec<f64> = arms.iter().map(|a| a.1).collect();
            weights[0] = weights[0].max(1.0);
            let check = assignment_check(&requests, &weights, 0.001);
            let sum: f64 = check.expected_shares.iter().sum();
            proptest::prop_assert!((sum - 1.0).abs() < 1e-9, "{:?}", check);
            if let Some(p) = check.p_value {
                proptest::prop_assert!((0.0..=1.0).contains(&p), "{:?}", check);
            }
            proptest::prop_assert_eq!(check.mismatch, check.p_value.is_some_and(|p| p < 0.001));
        }
    }
}
