//! The split readout against scipy: tests/reference/fixtures/split-stats.json, written by
//! tests/reference/stats_reference.py (scipy.stats.ttest_ind with equal_var=False, t.ppf,
//! binomtest's Wilson interval, norm; see tests/reference/README.md). Every number agrees within
//! 1e-9 relative, or 1e-12 absolute for values near 0 (small p-values, differences of zero).
//! A null in the fixture is an undefined quantity and must be `None` here.

use serde_json::Value;
use switchyard_server::splits::{
    BinaryTally, Interval, NumericTally, binary_readout, numeric_readout,
};
use switchyard_tests::{fixtures, read_json};

const RELATIVE: f64 = 1e-9;
const ABSOLUTE: f64 = 1e-12;

fn fixture() -> Value {
    read_json(&fixtures().join("split-stats.json"))
}

fn assert_close(what: &str, got: f64, want: f64) {
    let tolerance = (RELATIVE * want.abs()).max(ABSOLUTE);
    assert!(
        (got - want).abs() <= tolerance,
        "{what}: got {got:e}, scipy {want:e} (off by {:e})",
        (got - want).abs()
    );
}

/// Compares an optional number with a fixture value that is a number or null.
fn assert_matches(what: &str, got: Option<f64>, want: &Value) {
    match (got, want.as_f64()) {
        (Some(got), Some(want)) => assert_close(what, got, want),
        (None, None) => assert!(want.is_null(), "{what}: fixture has {want}"),
        (got, _) => panic!("{what}: got {got:?}, scipy {want}"),
    }
}

fn assert_interval(what: &str, got: Option<Interval>, want: &Value) {
    match (got, want.as_array()) {
        (Some(got), Some(want)) => {
            assert_close(&format!("{what} low"), got.low, want[0].as_f64().unwrap());
            assert_close(&format!("{what} high"), got.high, want[1].as_f64().unwrap());
        }
        (None, None) => assert!(want.is_null(), "{what}: fixture has {want}"),
        (got, _) => panic!("{what}: got {got:?}, scipy {want}"),
    }
}

fn cases<'a>(doc: &'a Value, kind: &str) -> &'a [Value] {
    let cases = doc[kind].as_array().unwrap();
    assert!(
        cases.len() >= 5,
        "the fixture has {} {kind} cases",
        cases.len()
    );
    cases
}

#[test]
fn fixture_is_at_95_percent() {
    assert_eq!(
        fixture()["confidence_level"].as_f64(),
        Some(switchyard_server::splits::CONFIDENCE_LEVEL)
    );
}

#[test]
fn welch_readout_equals_scipy() {
    let doc = fixture();
    for case in cases(&doc, "numeric") {
        let name = case["name"].as_str().unwrap();
        let arms = case["arms"].as_array().unwrap();
        let tallies: Vec<NumericTally> = arms
            .iter()
            .map(|arm| {
                let values: Vec<f64> = arm["values"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|v| v.as_f64().unwrap())
                    .collect();
                NumericTally::from_values(&values).unwrap()
            })
            .collect();
        let lines = numeric_readout(&tallies);
        assert_eq!(lines.len(), arms.len(), "{name}");

        for (line, arm) in lines.iter().zip(arms) {
            let what = format!("{name}/{}", arm["name"].as_str().unwrap());
            assert_eq!(Some(line.summary.count), arm["n"].as_u64(), "{what} n");
            assert_matches(&format!("{what} mean"), line.summary.mean, &arm["mean"]);
            assert_matches(&format!("{what} sd"), line.summary.std_dev, &arm["std_dev"]);
            assert_interval(
                &format!("{what} mean interval"),
                line.summary.mean_interval,
                &arm["mean_interval"],
            );
        }

        assert!(lines[0].versus_first.is_none(), "{name}: first arm");
        let comparisons = case["comparisons"].as_array().unwrap();
        assert_eq!(comparisons.len(), arms.len() - 1, "{name}");
        for (line, want) in lines[1..].iter().zip(comparisons) {
            let what = format!("{name}/{} vs first", want["arm"].as_str().unwrap());
            let got = line.versus_first.unwrap();
            assert_close(
                &format!("{what} difference"),
                got.difference,
                want["difference"].as_f64().unwrap(),
            );
            assert_interval(&format!("{what} interval"), got.interval, &want["interval"]);
            assert_matches(&format!("{what} t"), got.t_statistic, &want["t_statistic"]);
            assert_matches(
                &format!("{what} df"),
                got.degrees_of_freedom,
                &want["degrees_of_freedom"],
            );
            assert_matches(&format!("{what} p"), got.p_value, &want["p_value"]);
        }
    }
}

#[test]
fn proportion_readout_equals_scipy() {
    let doc = fixture();
    for case in cases(&doc, "binary") {
        let name = case["name"].as_str().unwrap();
        let arms = case["arms"].as_array().unwrap();
        let tallies: Vec<BinaryTally> = arms
            .iter()
            .map(|arm| {
                BinaryTally::from_counts(
                    arm["n"].as_u64().unwrap(),
                    arm["successes"].as_u64().unwrap(),
                )
                .unwrap()
            })
            .collect();
        let lines = binary_readout(&tallies);
        assert_eq!(lines.len(), arms.len(), "{name}");

        for (line, arm) in lines.iter().zip(arms) {
            let what = format!("{name}/{}", arm["name"].as_str().unwrap());
            assert_matches(
                &format!("{what} proportion"),
                line.summary.proportion,
                &arm["proportion"],
            );
            assert_interval(
                &format!("{what} Wilson interval"),
                line.summary.wilson_interval,
                &arm["wilson_interval"],
            );
        }

        assert!(lines[0].versus_first.is_none(), "{name}: first arm");
        let comparisons = case["comparisons"].as_array().unwrap();
        assert_eq!(comparisons.len(), arms.len() - 1, "{name}");
        for (line, want) in lines[1..].iter().zip(comparisons) {
            let what = format!("{name}/{} vs first", want["arm"].as_str().unwrap());
            let got = line.versus_first.unwrap();
            assert_close(
                &format!("{what} difference"),
                got.difference,
                want["difference"].as_f64().unwrap(),
            );
            assert_interval(&format!("{what} interval"), got.interval, &want["interval"]);
            assert_matches(&format!("{what} z"), got.z_statistic, &want["z_statistic"]);
            assert_matches(&format!("{what} p"), got.p_value, &want["p_value"]);
        }
    }
}
