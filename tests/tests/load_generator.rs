//! The load generator (`switchyard-load`) against the real server: the built-in overhead
//! scenario in its quick form, a run with synthetic adapters it creates through the admin API
//! (closed and open loop), and the refusals of bad arguments. Times are never asserted; only
//! that every scenario is there, every ratio is a positive number and no request failed.

use std::path::Path;
use std::process::{Command, Output};

use serde_json::Value;
use switchyard_tests::server::{ADMIN_TOKEN, Auth, ServerSetup};
use switchyard_tests::{base_model_dir, read_json, switchyard_bin, switchyard_load_bin};

fn load(args: &[&str], cwd: &Path) -> Output {
    Command::new(switchyard_load_bin())
        .args(args)
        .current_dir(cwd)
        .output()
        .expect("start switchyard-load")
}

fn load_ok(args: &[&str], cwd: &Path) -> String {
    let out = load(args, cwd);
    assert!(
        out.status.success(),
        "switchyard-load {} failed:\n{}",
        args.join(" "),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

/// Every scenario of a report answered all its requests.
fn assert_no_failures(report: &Value) {
    for s in report["scenarios"].as_array().unwrap() {
        assert!(s["requests"].as_u64().unwrap() > 0, "{}", s["name"]);
        assert_eq!(
            s["errors_by_status"],
            serde_json::json!({}),
            "scenario {}",
            s["name"]
        );
    }
}

fn assert_charts(dir: &Path, files: &[&str]) {
    let html = std::fs::read_to_string(dir.join("report.html")).unwrap();
    assert_eq!(html.matches("<svg").count(), files.len(), "inline charts");
    for f in files {
        let svg = std::fs::read_to_string(dir.join(f)).unwrap();
        assert!(
            svg.starts_with("<svg") && svg.trim_end().ends_with("</svg>"),
            "{f}"
        );
    }
}

const CHARTS: [&str; 5] = [
    "latency-cdf.svg",
    "adapters-throughput.svg",
    "adapters-p99.svg",
    "swap-histogram.svg",
    "memory.svg",
];

#[test]
fn quick_overhead_scenario_reports_every_scenario_as_a_ratio_to_base() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("report");
    let bin = switchyard_bin();
    let model = base_model_dir();
    let table = load_ok(
        &[
            "overhead",
            "--server-bin",
            bin.to_str().unwrap(),
            "--model",
            model.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--quick",
        ],
        dir.path(),
    );
    let report = read_json(&out.join("report.json"));
    let names: Vec<&str> = report["scenarios"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["name"].as_str().unwrap())
        .collect();
    // The quick plan mixes 1 and 10 adapters; the full one also 100 and 1000.
    assert_eq!(
        names,
        [
            "base (merging on)",
            "one adapter merged",
            "base",
            "one adapter unmerged",
            "1 adapter mixed",
            "10 adapters mixed"
        ]
    );
    assert_no_failures(&report);
    let ratios = report["ratios"].as_array().unwrap();
    assert_eq!(ratios.len(), names.len());
    for r in ratios {
        for key in ["throughput_ratio", "p50_ratio", "p99_ratio"] {
            let v = r[key].as_f64().unwrap();
            assert!(v.is_finite() && v > 0.0, "{key} of {}: {v}", r["scenario"]);
        }
    }
    // A base is its own reference.
    assert_eq!(ratios[0]["throughput_ratio"], 1.0);
    assert_eq!(ratios[2]["reference"], "base");
    assert_eq!(ratios[1]["reference"], "base (merging on)");
    // The merged scenario was measured on a merged variant, the unmerged one never was.
    let scenario = |name: &str| {
        report["scenarios"]
            .as_array()
            .unwrap()
            .iter()
            .find(|s| s["name"] == name)
            .unwrap()
            .clone()
    };
    assert!(
        scenario("one adapter merged")["merged_share"]
            .as_f64()
            .unwrap()
            >= 0.9
    );
    assert_eq!(scenario("one adapter unmerged")["merged_share"], 0.0);
    assert_eq!(scenario("10 adapters mixed")["adapters"], 10);
    let cold = &report["cold_start"];
    assert_eq!(cold["probes"], 3);
    assert_eq!(
        cold["load_from_metrics"]["count"], 3.0,
        "one load per probe"
    );
    assert!(cold["cold_to_warm_p50_ratio"].as_f64().unwrap() > 0.0);
    // Memory was sampled from /metrics on both servers, the process's resident set included.
    let memory = report["memory"].as_array().unwrap();
    assert_eq!(memory.len(), 2);
    for m in memory {
        let last = m["samples"].as_array().unwrap().last().unwrap().clone();
        assert!(last["process_bytes"].as_f64().unwrap() > 1e6, "{last}");
    }
    assert!(table.contains("one adapter merged"), "{table}");
    assert!(table.contains("cold start"), "{table}");
    assert_charts(&out, &CHARTS);
}

#[test]
fn quick_fairness_scenario_reports_the_steady_tenant_in_every_phase_and_the_floods_refusals() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("fairness");
    let bin = switchyard_bin();
    let model = base_model_dir();
    let table = load_ok(
        &[
            "fairness",
            "--server-bin",
            bin.to_str().unwrap(),
            "--model",
            model.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--quick",
        ],
        dir.path(),
    );
    let report = read_json(&out.join("report.json"));
    let names: Vec<&str> = report["scenarios"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["name"].as_str().unwrap())
        .collect();
    assert_eq!(
        names,
        [
            "steady tenant alone",
            "steady tenant during flood",
            "steady tenant during capped flood",
            "flood tenant (no quota)",
            "capped tenant (rate quota)"
        ]
    );
    // The steady tenant was answered every time, in every phase.
    let steady = &report["steady"];
    for phase in ["alone", "during_flood", "during_capped_flood"] {
        assert_eq!(steady["failed"][phase], 0, "{phase}");
        assert!(steady[phase]["count"].as_u64().unwrap() > 0, "{phase}");
    }
    for phase in ["slowdown_during_flood", "slowdown_during_capped_flood"] {
        let r = steady[phase]["p99"].as_f64().unwrap();
        assert!(r.is_finite() && r > 0.0, "{phase}: {r}");
    }
    // Each flooding tenant was refused with its own code, every 429 with a Retry-After.
    for (tenant, code) in [("flood", "tenant_queue_full"), ("capped", "rate_limited")] {
        let f = &report["floods"][tenant];
        assert!(f["refused_429"].as_u64().unwrap() > 0, "{tenant}: {f}");
        assert!(f["codes"][code].as_u64().unwrap() > 0, "{tenant}: {f}");
        assert_eq!(f["retry_after_s"]["missing"], 0, "{tenant}: {f}");
        assert!(
            f["retry_after_s"]["min"].as_f64().unwrap() >= 1.0,
            "{tenant}"
        );
        assert_eq!(f["other_failures"], 0, "{tenant}: {f}");
    }
    assert!(report["capacity_per_s"]["three_tenants"].as_f64().unwrap() > 0.0);
    assert!(table.contains("steady alone"), "{table}");
    assert_charts(&out, &["latency-cdf.svg"]);
}

#[test]
fn run_creates_synthetic_adapters_and_drives_both_loops() {
    let server = ServerSetup::encoder().start();
    let dir = tempfile::tempdir().unwrap();
    let model = base_model_dir();
    let url = server.url("");
    let closed = dir.path().join("closed");
    load_ok(
        &[
            "run",
            "--url",
            &url,
            "--admin-token",
            ADMIN_TOKEN,
            "--adapter-prefix",
            "syn-",
            "--adapter-count",
            "3",
            "--create-adapters",
            "--model",
            model.to_str().unwrap(),
            "--mix",
            "embed=3,classify=1",
            "--clients",
            "2",
            "--count",
            "12",
            "--warmup",
            "0",
            "--out",
            closed.to_str().unwrap(),
        ],
        dir.path(),
    );
    let adapters = server.get("/admin/adapters", Auth::Admin).ok_json();
    let listed = adapters.to_string();
    for name in ["syn-0", "syn-1", "syn-2"] {
        assert!(listed.contains(name), "{name} not published: {listed}");
    }
    let report = read_json(&closed.join("report.json"));
    assert_no_failures(&report);
    assert_eq!(report["scenarios"][0]["requests"], 12, "--count 12");
    assert_eq!(report["scenarios"][0]["adapters"], 3);
    assert_charts(&closed, &CHARTS);

    // Open loop over the adapters just created, bounded by time.
    let open = dir.path().join("open");
    load_ok(
        &[
            "run",
            "--url",
            &url,
            "--adapters",
            "syn-0,syn-1,base",
            "--rate",
            "8",
            "--duration",
            "1500ms",
            "--warmup",
            "200ms",
            "--out",
            open.to_str().unwrap(),
        ],
        dir.path(),
    );
    let report = read_json(&open.join("report.json"));
    assert_no_failures(&report);
    let pacing = report["settings"]["pacing"].as_str().unwrap();
    assert!(pacing.contains("scheduled send time"), "{pacing}");
}

#[test]
fn bad_arguments_are_refused_with_the_reason() {
    let dir = tempfile::tempdir().unwrap();
    let refused = |args: &[&str], expected: &str| {
        let mut all = vec!["run"];
        all.extend_from_slice(args);
        let out = load(&all, dir.path());
        let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
        assert!(!out.status.success(), "{args:?} was accepted");
        assert!(stderr.contains(expected), "{args:?}: {stderr}");
    };
    let url = "http://127.0.0.1:1";
    refused(
        &["--url", url, "--mix", "embed=8,translate=1"],
        "unknown mix entry \"translate\"",
    );
    refused(
        &["--url", url, "--zipf", "0"],
        "Zipf exponent must be a number above 0",
    );
    refused(&["--url", url, "--zipf", "-0.5"], "above 0");
    refused(&["--url", url, "--rate", "0"], "rate must be above 0");
    refused(&["--url", url, "--rate", "-3"], "rate must be above 0");
    // A port nothing listens on: bound, then released.
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let unreachable = format!("http://127.0.0.1:{port}");
    refused(
        &["--url", &unreachable, "--count", "1"],
        &format!("cannot reach the server at {unreachable}"),
    );
}

/// The soak in miniature (the committed 30-minute report is docs/soak/): capacity probe, open
/// loop at 70% with publishes and rollbacks every second, and its verdicts. Only errors are
/// asserted here, since memory and swap-time verdicts need a long run to mean anything.
#[test]
fn soak_in_miniature_answers_every_request_and_every_publish_and_rollback() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("soak");
    let bin = switchyard_bin();
    let model = base_model_dir();
    let args = [
        "soak",
        "--server-bin",
        bin.to_str().unwrap(),
        "--model",
        model.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
        "--duration",
        "12s",
        "--warmup",
        "3s",
        "--window",
        "3s",
        "--adapters",
        "30",
        "--flipped-adapters",
        "4",
        "--flip-every",
        "1s",
        "--capacity-time",
        "4s",
    ];
    // The exit status also reflects the memory and swap verdicts, which a 12-second run on a
    // shared machine cannot settle; the report says what each was.
    let output = load(&args, dir.path());
    let report = read_json(&out.join("report.json"));
    assert_eq!(
        report["request_errors"],
        0,
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    assert_eq!(report["admin_errors"], 0, "{report}");
    assert!(
        report["admin_operations"].as_u64().unwrap() >= 8,
        "{report}"
    );
    assert!(report["requests"].as_u64().unwrap() > 20, "{report}");
    assert!(report["capacity_per_s"].as_f64().unwrap() > 0.0);
    let windows = report["windows"].as_array().unwrap();
    assert!(!windows.is_empty());
    // The windows say what the factor tier held and, on Linux, the server process's anonymous
    // and file-backed memory and threads: what tells a filling cache from a leak. (Samples come
    // every 2 s into 3-s windows; a scrape slowed by a busy machine may leave one window out.)
    let having = |key: &str| windows.iter().filter(|w| w[key].as_f64().is_some()).count();
    assert!(2 * having("factors_bytes") > windows.len(), "{report}");
    if cfg!(target_os = "linux") {
        assert!(2 * having("anon_bytes") > windows.len(), "{report}");
        assert!(
            windows
                .iter()
                .filter_map(|w| w["threads"].as_f64())
                .all(|t| t >= 2.0),
            "{report}"
        );
    }
    for chart in ["memory.svg", "latency.svg", "swap-p99.svg"] {
        let svg = std::fs::read_to_string(out.join(chart)).unwrap();
        assert!(svg.starts_with("<svg"), "{chart}");
    }
    assert!(
        std::fs::read_to_string(out.join("README.md"))
            .unwrap()
            .contains("errors: pass")
    );
}

/// The serving scenario on the tiny decoder, with prompts cut to its 128 positions: it starts its
/// three servers, every case answers, the decode case produced tokens on both sides, and the
/// prefix case's second request reused the shared system prompt while its first reused nothing.
/// Times are not asserted.
#[test]
fn the_serving_scenario_measures_each_case_on_a_decoder() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("serving");
    let model = switchyard_tests::fixtures().join("tiny-llama");
    let text = load_ok(
        &[
            "serving",
            "--server-bin",
            switchyard_bin().to_str().unwrap(),
            "--model",
            model.to_str().unwrap(),
            "--long-tokens",
            "90",
            "--system-tokens",
            "60",
            "--decode-tokens",
            "4",
            "--rounds",
            "2",
            "--out",
            out.to_str().unwrap(),
        ],
        dir.path(),
    );
    assert!(text.contains("chunked / whole"), "{text}");
    let report = read_json(&out.join("serving.json"));
    let chunked = &report["chunked_prefill"];
    for key in ["short_first_token_chunked", "short_first_token_whole"] {
        assert!(
            chunked[key]["count"].as_u64().unwrap() > 0,
            "{key}: {report}"
        );
    }
    // 2 rounds x 2 servers x 4 long prompts.
    assert_eq!(chunked["long_prompt_tokens"].as_array().unwrap().len(), 16);
    let decode = &report["decode"];
    for key in ["base_tokens_per_s", "adapters_tokens_per_s"] {
        let v = decode[key].as_array().unwrap();
        assert_eq!(v.len(), 2);
        assert!(
            v.iter().all(|x| x.as_f64().unwrap() > 0.0),
            "{key}: {report}"
        );
    }
    let rows = report["prefix_cache"].as_array().unwrap();
    assert_eq!(rows.len(), 2);
    for row in rows {
        assert_eq!(row["first_reused_tokens"], 0, "{row}");
        let reused = row["second_reused_tokens"].as_u64().unwrap();
        assert!(reused >= 40, "the system prompt was reused: {row}");
    }
}
