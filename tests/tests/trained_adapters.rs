//! The trained demo adapters and the commands that make and measure them, run as a user runs
//! them: the real `switchyard` binary in a fresh temporary directory.
//!
//! The committed adapters (demo/adapters/, made by scripts/train-demo-adapters from
//! demo/data/*.jsonl) are measured through the serving path by `adapter evaluate`; a short real
//! training run shows the loss falling and a package `adapter verify` accepts; and bad input is
//! refused with a message that names what is wrong.

use std::path::{Path, PathBuf};

use serde_json::json;
use switchyard_tests::server::ServerSetup;
use switchyard_tests::{base_model_dir, run_switchyard, switchyard_ok, workspace_root};

/// Each committed adapter: file, data, label count, and the seed scripts/train-demo-adapters
/// trained it with (its held-out split is the one of that seed, fraction 0.2).
const ADAPTERS: [(&str, &str, usize, u64); 4] = [
    ("routing", "routing", 5, 1),
    ("urgency", "urgency", 3, 2),
    ("sentiment", "sentiment", 3, 3),
    ("routing-retrained", "routing", 5, 4),
];

fn demo(path: &str) -> PathBuf {
    workspace_root().join("demo").join(path)
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The number after `key` in the last line of `report` that starts with `key`.
fn number_after(report: &str, key: &str) -> f64 {
    let line = report
        .lines()
        .rev()
        .find(|l| l.trim_start().starts_with(key))
        .unwrap_or_else(|| panic!("no line starting with {key:?} in:\n{report}"));
    line.trim_start()[key.len()..]
        .split_whitespace()
        .next()
        .unwrap()
        .parse()
        .unwrap_or_else(|_| panic!("no number after {key:?} in {line:?}"))
}

/// `adapter evaluate` on the held-out split of `data` with `seed`; `file` None for the base
/// model with an untrained head.
fn evaluate(file: Option<&Path>, data: &str, seed: u64) -> String {
    let dir = tempfile::tempdir().unwrap();
    let model = base_model_dir();
    let data = demo(&format!("data/{data}.jsonl"));
    let seed = seed.to_string();
    let mut args = vec!["adapter", "evaluate"];
    match file {
        Some(f) => args.push(s(f)),
        None => args.push("--untrained-head"),
    }
    args.extend([
        "--model",
        s(&model),
        "--data",
        s(&data),
        "--holdout",
        "0.2",
        "--seed",
        &seed,
    ]);
    switchyard_ok(&args, dir.path())
}

#[test]
fn each_committed_adapter_reaches_85_percent_on_its_held_out_split() {
    for (name, data, labels, seed) in ADAPTERS {
        let file = demo(&format!("adapters/{name}.safetensors"));
        let report = evaluate(Some(&file), data, seed);
        let accuracy = number_after(&report, "accuracy");
        // 300 messages, 0.2 of each label held out: 60.
        assert!(report.contains("on 60 held-out examples"), "{report}");
        assert!(
            accuracy >= 0.85,
            "{name}: held-out accuracy {accuracy}\n{report}"
        );
        assert_eq!(
            report.lines().filter(|l| l.contains(" right ")).count(),
            labels,
            "one line per label\n{report}"
        );
    }
}

/// The untrained head is all zero (server/src/train/mod.rs, `initial_head`): every label gets
/// probability 1 / labels, the first label wins the tie, and on these balanced splits that is
/// right for exactly 1 / labels of the messages (0.2000 and 0.3333 in demo/adapters/README.md).
#[test]
fn the_base_with_an_untrained_head_stays_within_ten_points_of_chance() {
    for (name, data, labels, seed) in ADAPTERS {
        let report = evaluate(None, data, seed);
        let accuracy = number_after(&report, "accuracy");
        let chance = 1.0 / labels as f64;
        assert!(
            (accuracy - chance).abs() <= 0.10,
            "{name}: untrained accuracy {accuracy} against chance {chance}\n{report}"
        );
    }
}

#[test]
fn committed_adapters_fit_the_base_and_carry_their_labels() {
    let model = base_model_dir();
    let dir = tempfile::tempdir().unwrap();
    for (name, ..) in ADAPTERS {
        let file = demo(&format!("adapters/{name}.safetensors"));
        let out = switchyard_ok(
            &["adapter", "verify", s(&file), "--model", s(&model)],
            dir.path(),
        );
        assert!(out.starts_with("ok: "), "{out}");
        // rank 8 on attn.q and attn.v of all 6 layers: 12 targets.
        assert!(out.contains("rank 8, 12 targets"), "{out}");
    }
}

/// 8 messages of each of three routing labels: a slice small enough for the debug build.
fn small_slice(dir: &Path) -> PathBuf {
    let text = std::fs::read_to_string(demo("data/routing.jsonl")).unwrap();
    let mut kept = Vec::new();
    for label in ["billing", "rentals", "repairs"] {
        kept.extend(
            text.lines()
                .filter(|l| l.contains(&format!("\"label\": \"{label}\"")))
                .take(8),
        );
    }
    let path = dir.join("slice.jsonl");
    std::fs::write(&path, kept.join("\n") + "\n").unwrap();
    path
}

#[test]
fn a_short_training_run_lowers_the_loss_and_writes_a_package_verify_accepts() {
    let dir = tempfile::tempdir().unwrap();
    let model = base_model_dir();
    let data = small_slice(dir.path());
    let out_file = dir.path().join("small.safetensors");
    let report = switchyard_ok(
        &[
            "adapter",
            "train",
            "--model",
            s(&model),
            "--data",
            s(&data),
            "--task",
            "classify",
            "--rank",
            "4",
            "--targets",
            "attn.q,attn.v",
            "--epochs",
            "3",
            "--batch",
            "6",
            "--seed",
            "5",
            "--out",
            s(&out_file),
        ],
        dir.path(),
    );
    // 24 examples, 0.2 of each label's 8 held out (round(1.6) = 2): 18 to train on, 6 held out.
    assert!(
        report
            .contains("3 labels (billing, rentals, repairs), 18 examples to train on, 6 held out"),
        "{report}"
    );
    let losses: Vec<f64> = report
        .lines()
        .filter(|l| l.starts_with("epoch"))
        .map(|l| number_after(l, &l[..l.find("loss").unwrap() + 4]))
        .collect();
    assert_eq!(losses.len(), 3, "{report}");
    assert!(
        losses[2] < losses[0],
        "train loss did not fall: {losses:?}\n{report}"
    );
    assert!(
        report.contains("held-out accuracy through the serving path"),
        "{report}"
    );

    let verified = switchyard_ok(
        &["adapter", "verify", s(&out_file), "--model", s(&model)],
        dir.path(),
    );
    assert!(verified.contains("rank 4, 12 targets"), "{verified}");
    let inspected = switchyard_ok(&["adapter", "inspect", s(&out_file)], dir.path());
    assert!(inspected.contains("classify"), "{inspected}");
}

#[test]
fn the_server_classifies_with_a_committed_adapter() {
    let server = ServerSetup::encoder().start();
    let version = server.publish("routing", &demo("adapters/routing.safetensors"));
    // Messages written for this test (not in demo/data), one per desk.
    let texts = [
        "My back brake squeals and the wheel wobbles, can you fix it this week?",
        "I was billed twice for my tune-up, please refund the extra charge.",
        "Can we hire three bikes for Sunday afternoon?",
    ];
    let answer = server
        .post(
            "/classify",
            switchyard_tests::server::Auth::None,
            &json!({"adapter": "routing", "texts": texts}),
        )
        .ok_json();
    assert_eq!(answer["served_by"], format!("routing@{version}"));
    let labels: Vec<&str> = answer["results"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["label"].as_str().unwrap())
        .collect();
    assert_eq!(labels, ["repairs", "billing", "rentals"], "{answer}");
}

/// Runs `adapter train` on `jsonl` (written to a file) with `extra` flags; returns stderr of
/// the refusal.
fn refused(jsonl: &str, extra: &[&str]) -> String {
    let dir = tempfile::tempdir().unwrap();
    let model = base_model_dir();
    let data = dir.path().join("data.jsonl");
    std::fs::write(&data, jsonl).unwrap();
    let out_file = dir.path().join("out.safetensors");
    let mut args = vec![
        "adapter",
        "train",
        "--model",
        s(&model),
        "--data",
        s(&data),
        "--out",
        s(&out_file),
    ];
    args.extend(extra);
    let out = run_switchyard(&args, "", dir.path());
    assert_eq!(out.status.code(), Some(1), "{args:?} should fail");
    assert!(!out_file.exists(), "no package written on a refusal");
    String::from_utf8(out.stderr)
        .unwrap()
        .replace(s(&data), "DATA")
}

fn lines(rows: &[(&str, &str)]) -> String {
    rows.iter()
        .map(|(t, l)| format!("{}\n", json!({"text": t, "label": l})))
        .collect()
}

#[test]
fn bad_training_input_is_refused_with_a_message_naming_the_problem() {
    let good = lines(&[
        ("brakes squeal", "repairs"),
        ("wheel wobbles", "repairs"),
        ("refund please", "billing"),
        ("charged twice", "billing"),
    ]);
    let cases: Vec<(String, Vec<&str>, &str)> = vec![
        ("".to_owned(), vec![], "DATA holds no examples"),
        (
            format!("{}{{\"text\": \"oops\", label: 3}}\n", good),
            vec![],
            "DATA line 5: not a JSON object",
        ),
        (
            format!("{}{{\"text\": \"new chain\"}}\n", good),
            vec![],
            "DATA line 5: has no \"label\" field",
        ),
        (
            format!("{}{}", good, lines(&[("bike hire", "rentals")])),
            vec![],
            "label \"rentals\" has only 1 example(s)",
        ),
        (
            good.clone(),
            vec!["--labels", "repairs,billing,rentals"],
            "DATA: --labels names 3 labels but the file uses 2 (\"rentals\" never appears)",
        ),
        (
            good.clone(),
            vec!["--labels", "repairs"],
            "DATA line 3: label \"billing\" is not one of --labels (repairs)",
        ),
        (
            good.clone(),
            vec!["--targets", "attn.q,attn.z"],
            "--targets: unknown module \"attn.z\"",
        ),
        (
            good.clone(),
            vec!["--targets", "mlp.gate"],
            "the encoder has no mlp.gate module",
        ),
        (
            good.clone(),
            vec!["--task", "generate"],
            "--task generate: only classify adapters are trained here",
        ),
        (
            good.clone(),
            vec!["--holdout", "1.5"],
            "the held-out fraction 1.5 is outside (0, 1)",
        ),
        (
            lines(&[("a", "x"), ("b", "x")]),
            vec![],
            "only one label (\"x\"); a classifier needs at least two",
        ),
    ];
    for (jsonl, extra, want) in cases {
        let stderr = refused(&jsonl, &extra);
        assert!(
            stderr.contains(want),
            "{extra:?}: want {want:?} in {stderr:?}"
        );
    }
}
