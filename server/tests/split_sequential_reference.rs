//! The always-valid comparisons and the assignment check against reference libraries:
//! tests/reference/fixtures/split-sequential.json, written by tests/reference/sequential.py
//! (confseq 0.0.11's two-sided normal mixture for the comparisons, scipy.stats.chisquare for the
//! assignment check; see tests/reference/README.md). Every number agrees within 1e-9 relative, or
//! 1e-12 absolute for values near 0 (tiny p-values, differences of zero); a null in the fixture
//! must be `None` here.

use serde_json::Value;
use switchyard_server::splits::{
    AlwaysValidComparison, BinaryTally, MIN_OUTCOMES_PER_ARM, NumericTally, always_valid_numeric,
    always_valid_proportion, assignment_check,
};
use switchyard_tests::{fixtures, read_json};

const RELATIVE: f64 = 1e-9;
const ABSOLUTE: f64 = 1e-12;

fn fixture() -> Value {
    read_json(&fixtures().join("split-sequential.json"))
}

fn assert_close(what: &str, got: f64, want: f64) {
    let tolerance = (RELATIVE * want.abs()).max(ABSOLUTE);
    assert!(
        (got - want).abs() <= tolerance,
        "{what}: got {got:e}, reference {want:e} (off by {:e})",
        (got - want).abs()
    );
}

fn assert_matches(what: &str, got: Option<f64>, want: &Value) {
    match (got, want.as_f64()) {
        (Some(got), Some(want)) => assert_close(what, got, want),
        (None, None) => assert!(want.is_null(), "{what}: fixture has {want}"),
        (got, _) => panic!("{what}: got {got:?}, reference {want}"),
    }
}

fn assert_figures(what: &str, got: &AlwaysValidComparison, want: &Value) {
    assert_close(
        &format!("{what} difference"),
        got.difference,
        want["difference"].as_f64().unwrap(),
    );
    assert_close(
        &format!("{what} effective count"),
        got.effective_count,
        want["effective_count"].as_f64().unwrap(),
    );
    assert_matches(&format!("{what} p"), got.p_value, &want["p_value"]);
    match (got.interval, want["interval"].as_array()) {
        (Some(got), Some(want)) => {
            assert_close(&format!("{what} low"), got.low, want[0].as_f64().unwrap());
            assert_close(&format!("{what} high"), got.high, want[1].as_f64().unwrap());
        }
        (None, None) => {}
        (got, _) => panic!(
            "{what} interval: got {got:?}, reference {}",
            want["interval"]
        ),
    }
}

fn values(case: &Value, key: &str) -> Vec<f64> {
    case[key]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect()
}

fn count(point: &Value, key: &str) -> u64 {
    point[key].as_u64().unwrap()
}

#[test]
fn fixture_matches_the_readouts_constants() {
    let doc = fixture();
    assert_eq!(doc["alpha"].as_f64(), Some(0.05));
    assert_eq!(
        doc["min_outcomes_per_arm"].as_u64(),
        Some(MIN_OUTCOMES_PER_ARM)
    );
}

#[test]
fn numeric_always_valid_figures_match_confseq() {
    let doc = fixture();
    let cases = doc["numeric"].as_array().unwrap();
    assert!(cases.len() >= 5);
    let (mut with_p, mut significant) = (0, 0);
    for case in cases {
        let name = case["name"].as_str().unwrap();
        let tau2 = case["mixing_variance"].as_f64().unwrap();
        let (first, arm) = (values(case, "first"), values(case, "arm"));
        for point in case["checkpoints"].as_array().unwrap() {
            let (n1, n0) = (count(point, "n_arm"), count(point, "n_first"));
            let what = format!("{name} at {n1}, {n0}");
            let a = NumericTally::from_values(&arm[..n1 as usize]).unwrap();
            let b = NumericTally::from_values(&first[..n0 as usize]).unwrap();
            let got = always_valid_numeric(&a, &b, tau2).unwrap();
            assert_figures(&what, &got, point);
            with_p += usize::from(got.p_value.is_some());
            significant += usize::from(got.p_value.is_some_and(|p| p < 0.05));
        }
    }
    // The fixture covers both sides of the decision, not only p-values of 1.
    assert!(with_p >= 30 && significant >= 8, "{with_p} {significant}");
}

#[test]
fn yes_no_always_valid_figures_match_confseq() {
    let doc = fixture();
    let cases = doc["binary"].as_array().unwrap();
    assert!(cases.len() >= 4);
    let mut significant = 0;
    for case in cases {
        let name = case["name"].as_str().unwrap();
        let tau2 = case["mixing_variance"].as_f64().unwrap();
        for point in case["checkpoints"].as_array().unwrap() {
            let (n1, n0) = (count(point, "n_arm"), count(point, "n_first"));
            let a = BinaryTally::from_counts(n1, count(point, "successes_arm")).unwrap();
            let b = BinaryTally::from_counts(n0, count(point, "successes_first")).unwrap();
            let got = always_valid_proportion(&a, &b, tau2).unwrap();
            assert_figures(&format!("{name} at {n1}, {n0}"), &got, point);
            significant += usize::from(got.p_value.is_some_and(|p| p < 0.05));
        }
    }
    assert!(significant >= 5, "{significant}");
}

#[test]
fn assignment_checks_match_scipy_chisquare() {
    let doc = fixture();
    let cases = doc["assignment"].as_array().unwrap();
    assert!(cases.len() >= 6);
    for case in cases {
        let name = case["name"].as_str().unwrap();
        let requests: Vec<u64> = case["requests"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_u64().unwrap())
            .collect();
        let weights = values(case, "weights");
        let got = assignment_check(&requests, &weights, 0.001);
        for (i, (got, want)) in got
            .expected_shares
            .iter()
            .zip(values(case, "expected_shares"))
            .enumerate()
        {
            assert_close(&format!("{name} share {i}"), *got, want);
        }
        assert_matches(
            &format!("{name} chi-square"),
            got.chi_square,
            &case["chi_square"],
        );
        assert_eq!(
            got.degrees_of_freedom,
            case["degrees_of_freedom"].as_u64(),
            "{name}"
        );
        let want_p = case["p_value"].as_f64().unwrap();
        assert_matches(&format!("{name} p"), got.p_value, &case["p_value"]);
        assert_eq!(got.mismatch, want_p < 0.001, "{name}");
    }
}
