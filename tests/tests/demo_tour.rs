//! The README's first command, `scripts/demo`, run the way the test suite runs it: with the debug
//! binary, on a free port, the tour only (`--no-serve`). If any step of the tour stops getting
//! the answer it shows (a classification, a live flip with no failed request, a split readout,
//! a rushed version rolled back by its rollout policy, the swap metrics), the tour exits 1 and this test fails, so the demo cannot silently rot.

use std::process::Command;

use switchyard_tests::{base_model_dir, switchyard_bin, workspace_root};

#[test]
fn the_demo_tour_runs_every_step_against_a_real_server() {
    let model = base_model_dir();
    let output = Command::new(workspace_root().join("scripts/demo"))
        .args(["--no-serve", "--listen", "127.0.0.1:0", "--binary"])
        .arg(switchyard_bin())
        .env("SWITCHYARD_BASE_MODEL_DIR", &model)
        .current_dir(workspace_root())
        .output()
        .expect("scripts/demo runs");
    let stdout = String::from_utf8_lossy(&output.stdout);
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        output.status.success(),
        "scripts/demo failed ({}):\n{stdout}\n{stderr}",
        output.status
    );
    // Each section of the tour printed its heading and its checked result.
    for expected in [
        "one customer message, classified by each adapter",
        "north-routing",
        "north-urgency",
        "north-sentiment",
        "asking for north-routing → 403 forbidden_target",
        "goes live while requests keep flowing",
        "failed: 0",
        "A/B split north-routing-trial",
        "incumbent",
        "candidate",
        "guarded rollout north-routing-rollout",
        "history: rolled_back by policy",
        "swap stage",
        "memory held, tier",
        "The tour is done",
    ] {
        assert!(
            stdout.contains(expected),
            "the tour did not print {expected:?}:\n{stdout}"
        );
    }
    // The demo names the status page's address.
    assert!(
        stderr.contains("== status page: http://127.0.0.1:") && stderr.contains("/status"),
        "the demo did not print the status page's address:\n{stderr}"
    );
    // --no-serve stops the server instead of waiting for Ctrl-C.
    assert!(!stdout.contains("keeps serving"), "{stdout}");
}

#[test]
fn the_demo_refuses_an_unknown_flag_and_explains_its_flags() {
    let output = Command::new(workspace_root().join("scripts/demo"))
        .arg("--no-such-flag")
        .current_dir(workspace_root())
        .output()
        .expect("scripts/demo runs");
    assert_eq!(output.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("unknown argument --no-such-flag"),
        "{stderr}"
    );
    assert!(stderr.contains("--no-tour"), "{stderr}");
}
