//! The adapter and plan commands, run as a user runs them: the real `switchyard` binary in a
//! fresh temporary directory, against the committed fixtures (tests/reference/README.md) and
//! small files the tests write. The last test runs a registry in this process while the binary,
//! a second process, publishes, rolls back and sets live in the same store.

use std::collections::BTreeMap;
use std::path::Path;
use std::time::{Duration, Instant};

use switchyard_tests::{
    base_model_dir, fixtures, run_switchyard, switchyard_ok, write_safetensors,
};

fn json(text: &str) -> serde_json::Value {
    serde_json::from_str(text).unwrap_or_else(|e| panic!("not JSON ({e}): {text}"))
}

fn path(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// A foreign file for layer 0's q projection: A = [[10, 0, 0, 0], [0, 1, 0, 0]] (r = 2, in = 4)
/// and B = the first two unit columns of a 4 × 2 matrix, so B·A has singular values 10 and 1.
fn write_foreign(dir: &Path) -> std::path::PathBuf {
    let file = dir.join("foreign.safetensors");
    write_safetensors(
        &file,
        &[
            (
                "net.blocks.0.wq.lora_down",
                &[2, 4],
                &[10.0, 0.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0],
            ),
            (
                "net.blocks.0.wq.lora_up",
                &[4, 2],
                &[1.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 0.0],
            ),
            ("net.step", &[1], &[0.0]),
        ],
    );
    file
}

fn pack_foreign(dir: &Path, extra: &[&str]) -> std::process::Output {
    let input = write_foreign(dir);
    let out = dir.join("packed.safetensors");
    let mut args = vec![
        "adapter",
        "pack",
        path(&input),
        "--output",
        path(&out),
        "--rename",
        "net.blocks.{layer}.wq.lora_down=layers.{layer}.attn.q.A",
        "--rename",
        "net.blocks.{layer}.wq.lora_up=layers.{layer}.attn.q.B",
        "--alpha",
        "4",
        "--task",
        "generate",
        "--fingerprint",
        "0123456789abcdef",
    ];
    args.extend_from_slice(extra);
    run_switchyard(&args, "", dir)
}

#[test]
fn pack_maps_foreign_names_and_inspect_reports_the_numerical_rank() {
    let dir = tempfile::tempdir().unwrap();
    // `net.step` matches no rule: refused unless dropped.
    let refused = pack_foreign(dir.path(), &[]);
    assert_eq!(refused.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&refused.stderr);
    assert!(
        stderr.contains("net.step") && stderr.contains("--drop-unmatched"),
        "{stderr}"
    );
    let packed = pack_foreign(dir.path(), &["--drop-unmatched"]);
    assert!(
        packed.status.success(),
        "{}",
        String::from_utf8_lossy(&packed.stderr)
    );

    let file = dir.path().join("packed.safetensors");
    let report = json(&switchyard_ok(
        &["adapter", "inspect", path(&file), "--json"],
        dir.path(),
    ));
    assert_eq!(report["rank"], 2, "rank taken from the factors");
    assert_eq!(report["alpha"], 4.0);
    assert_eq!(report["targets"], serde_json::json!(["layers.0.attn.q"]));
    // r·(in + out) = 2·(4 + 4) = 16, and in·out = 16 for the full update.
    assert_eq!(report["factor_parameters"], 16);
    assert_eq!(report["full_update_parameters"], 16);
    let target = &report["numerical_rank"][0];
    // s = alpha / r = 2, so s·B·A has singular values 20 and 2: energy 400 + 4, and the top
    // one carries 400 / 404 = 99.0%, so one value reaches 99% and it takes both for 99.9%.
    let sv: Vec<f64> = serde_json::from_value(target["singular_values"].clone()).unwrap();
    assert!(
        (sv[0] - 20.0).abs() < 1e-9 && (sv[1] - 2.0).abs() < 1e-9,
        "{sv:?}"
    );
    assert_eq!(target["rank"], 1);
    let stricter = json(&switchyard_ok(
        &[
            "adapter",
            "inspect",
            path(&file),
            "--json",
            "--energy",
            "0.999",
        ],
        dir.path(),
    ));
    assert_eq!(stricter["numerical_rank"][0]["rank"], 2);
}

#[test]
fn inspect_prints_a_fixture_readably() {
    let dir = tempfile::tempdir().unwrap();
    let file = fixtures().join("minilm-qv-a.safetensors");
    let text = switchyard_ok(&["adapter", "inspect", path(&file)], dir.path());
    // minilm-qv-a: rank 8, alpha 16 on attn.q and attn.v of MiniLM's 6 layers (384 wide):
    // 12 × 8 × (384 + 384) = 73,728 factor parameters, 12 × 384² = 1,769,472 for a full update.
    for want in [
        "task              embed",
        "base fingerprint  cd3b3fa15f0b0d0e",
        "rank              8",
        "alpha             16 (scale s = alpha / rank = 2)",
        "12 matrices: attn.q, attn.v in layers 0-5",
        "73,728 in the factors, against 1,769,472",
        "layers.5.attn.v",
    ] {
        assert!(text.contains(want), "missing {want:?} in:\n{text}");
    }
}

#[test]
fn verify_passes_fitting_packages_and_exits_1_naming_file_and_rule() {
    let dir = tempfile::tempdir().unwrap();
    let minilm = base_model_dir();
    let tiny = fixtures().join("tiny-llama");
    for (file, model) in [
        ("minilm-qv-a.safetensors", minilm.as_path()),
        ("tiny-llama-all.safetensors", tiny.as_path()),
    ] {
        let f = fixtures().join(file);
        let out = switchyard_ok(
            &["adapter", "verify", path(&f), "--model", path(model)],
            dir.path(),
        );
        assert!(
            out.starts_with("ok: ") && out.contains("rules passed"),
            "{out}"
        );
    }
    let wrong = fixtures().join("tiny-llama-qv.safetensors");
    let out = run_switchyard(
        &["adapter", "verify", path(&wrong), "--model", path(&minilm)],
        "",
        dir.path(),
    );
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("tiny-llama-qv.safetensors") && stderr.contains("(rule: base fingerprint)"),
        "{stderr}"
    );
    // A NaN written into the first data word of a copy.
    let mut bytes = std::fs::read(&wrong).unwrap();
    let data = 8 + u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    bytes[data..data + 4].copy_from_slice(&f32::NAN.to_le_bytes());
    let bad = dir.path().join("tiny-bad.safetensors");
    std::fs::write(&bad, bytes).unwrap();
    let out = run_switchyard(
        &["adapter", "verify", path(&bad), "--model", path(&tiny)],
        "",
        dir.path(),
    );
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("tiny-bad.safetensors")
            && stderr.contains("tensor `layers.")
            && stderr.contains("(rule: finite values)"),
        "{stderr}"
    );
}

#[test]
fn publish_list_live_rollback_and_retire_on_a_store() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    let tiny = fixtures().join("tiny-llama");
    let publish = |file: &str| {
        let f = fixtures().join(file);
        let out = switchyard_ok(
            &[
                "adapter",
                "publish",
                path(&f),
                "--store",
                path(&store),
                "--name",
                "tiny",
                "--model",
                path(&tiny),
            ],
            dir.path(),
        );
        let first = out.lines().next().unwrap();
        first.strip_prefix("published tiny@").unwrap().to_owned()
    };
    let v1 = publish("tiny-llama-qv.safetensors");
    let v2 = publish("tiny-llama-all.safetensors");
    assert_ne!(v1, v2);
    let live = switchyard_ok(
        &["adapter", "live", "--store", path(&store), "--name", "tiny"],
        dir.path(),
    );
    assert_eq!(live.trim(), format!("tiny@{v2}"));
    let list = switchyard_ok(&["adapter", "list", "--store", path(&store)], dir.path());
    assert!(list.contains("tiny") && list.contains(&v2), "{list}");
    let versions = switchyard_ok(
        &["adapter", "list", "--store", path(&store), "--name", "tiny"],
        dir.path(),
    );
    let state_of = |v: &str| {
        versions
            .lines()
            .find(|l| l.starts_with(v))
            .unwrap_or_else(|| panic!("{v} not listed:\n{versions}"))
            .to_owned()
    };
    assert!(state_of(&v2).ends_with("live"), "{versions}");
    assert!(state_of(&v1).ends_with("next rollback"), "{versions}");

    let retire_live = run_switchyard(
        &[
            "adapter",
            "retire",
            "--store",
            path(&store),
            "--name",
            "tiny",
            &v2,
        ],
        "",
        dir.path(),
    );
    assert_eq!(retire_live.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&retire_live.stderr).contains("is live"));

    let back = switchyard_ok(
        &[
            "adapter",
            "rollback",
            "--store",
            path(&store),
            "--name",
            "tiny",
        ],
        dir.path(),
    );
    assert!(back.starts_with(&format!("tiny@{v1} is live")), "{back}");
    switchyard_ok(
        &[
            "adapter",
            "retire",
            "--store",
            path(&store),
            "--name",
            "tiny",
            &v2,
        ],
        dir.path(),
    );
    assert!(
        !store
            .join("tiny")
            .join(format!("{v2}.safetensors"))
            .exists()
    );

    // A package for another base is refused at publish when --model is given.
    let minilm_pkg = fixtures().join("minilm-qv-a.safetensors");
    let out = run_switchyard(
        &[
            "adapter",
            "publish",
            path(&minilm_pkg),
            "--store",
            path(&store),
            "--name",
            "tiny",
            "--model",
            path(&tiny),
        ],
        "",
        dir.path(),
    );
    assert_eq!(out.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&out.stderr).contains("(rule: base fingerprint)"));
}

#[test]
fn concurrent_publishing_processes_leave_a_whole_store() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    let files = [
        "tiny-llama-qv.safetensors",
        "tiny-llama-all.safetensors",
        "tiny-llama-bias-tied-qv.safetensors",
        "minilm-qv-a.safetensors",
        "minilm-qv-b.safetensors",
        "minilm-all.safetensors",
    ];
    // Six processes publish six different packages under one name at the same moment.
    let children: Vec<_> = files
        .iter()
        .map(|f| {
            std::process::Command::new(switchyard_tests::switchyard_bin())
                .args(["adapter", "publish"])
                .arg(fixtures().join(f))
                .args(["--store", path(&store), "--name", "shared"])
                .current_dir(dir.path())
                .stdout(std::process::Stdio::piped())
                .stderr(std::process::Stdio::piped())
                .spawn()
                .unwrap()
        })
        .collect();
    for c in children {
        let out = c.wait_with_output().unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let live = switchyard_ok(
        &[
            "adapter",
            "live",
            "--store",
            path(&store),
            "--name",
            "shared",
        ],
        dir.path(),
    );
    let version = live.trim().strip_prefix("shared@").unwrap().to_owned();
    let live_file = store.join("shared").join(format!("{version}.safetensors"));
    let report = json(&switchyard_ok(
        &["adapter", "inspect", path(&live_file), "--json"],
        dir.path(),
    ));
    assert_eq!(
        report["version"],
        version.as_str(),
        "the live file is whole"
    );
    let versions = switchyard_ok(
        &[
            "adapter",
            "list",
            "--store",
            path(&store),
            "--name",
            "shared",
        ],
        dir.path(),
    );
    assert_eq!(versions.lines().count(), 1 + files.len(), "{versions}");
    for entry in std::fs::read_dir(store.join("shared")).unwrap() {
        let name = entry.unwrap().file_name().to_string_lossy().into_owned();
        assert!(
            !name.starts_with(".incoming-"),
            "temporary file {name} left behind"
        );
    }
}

#[test]
fn bad_adapter_names_are_refused_with_the_rule_they_break() {
    let dir = tempfile::tempdir().unwrap();
    let f = fixtures().join("minilm-qv-a.safetensors");
    for (name, why) in [
        ("../escape", "path separator"),
        ("Support", "only lowercase letters"),
        ("base", "reserved for the base model"),
        ("", "empty"),
    ] {
        let out = run_switchyard(
            &[
                "adapter",
                "publish",
                path(&f),
                "--store",
                "store",
                "--name",
                name,
            ],
            "",
            dir.path(),
        );
        assert!(!out.status.success(), "{name:?} accepted");
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert!(stderr.contains(why), "{name:?}: {stderr}");
    }
    assert!(
        !dir.path().join("store").exists(),
        "nothing written for a refused name"
    );
}

/// `plan` computes from config.json what `inspect` measures on real packages for the same base:
/// MiniLM (encoder), the tiny decoder with grouped-query attention, and the tied variant with an
/// explicit head_dim of 32.
#[test]
fn plan_matches_what_inspect_measures_on_real_packages() {
    let dir = tempfile::tempdir().unwrap();
    let minilm = base_model_dir();
    let cases = [
        (minilm, "minilm-qv-a.safetensors", "8", "attn.q,attn.v"),
        (
            fixtures().join("tiny-llama"),
            "tiny-llama-all.safetensors",
            "4",
            "attn.q,attn.k,attn.v,attn.o,mlp.gate,mlp.up,mlp.down",
        ),
        (
            fixtures().join("tiny-llama-bias-tied"),
            "tiny-llama-bias-tied-qv.safetensors",
            "4",
            "attn.q,attn.v",
        ),
    ];
    for (model, file, rank, targets) in cases {
        let plan = json(&switchyard_ok(
            &[
                "plan",
                "--model",
                path(&model),
                "--rank",
                rank,
                "--targets",
                targets,
                "--json",
            ],
            dir.path(),
        ));
        let f = fixtures().join(file);
        let inspect = json(&switchyard_ok(
            &["adapter", "inspect", path(&f), "--json"],
            dir.path(),
        ));
        for (p, i) in [
            ("factor_parameters", "factor_parameters"),
            ("full_update_parameters", "full_update_parameters"),
            ("unmerged_bytes", "resident_bytes"),
        ] {
            assert_eq!(plan[p], inspect[i], "{file}: plan {p} vs inspect {i}");
        }
        let about = plan["file_bytes_about"].as_f64().unwrap();
        let real = inspect["file_bytes"].as_f64().unwrap();
        assert!(
            (about - real).abs() / real < 0.05,
            "{file}: file about {about}, real {real}"
        );
    }
}

#[test]
fn plan_works_from_a_config_without_weights() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("config.json"),
        r#"{"model_type":"llama","hidden_size":2048,"intermediate_size":5632,
            "num_hidden_layers":16,"num_attention_heads":32}"#,
    )
    .unwrap();
    let plan = json(&switchyard_ok(
        &[
            "plan",
            "--model",
            ".",
            "--rank",
            "16",
            "--targets",
            "attn.q,attn.k,attn.v,attn.o",
            "--budget",
            "1GiB",
            "--json",
        ],
        dir.path(),
    ));
    // 16 layers × 4 matrices × 16 × (2048 + 2048) factor parameters; merged: 64 × 2048² f32.
    assert_eq!(plan["factor_parameters"], 4_194_304);
    assert_eq!(plan["merged_bytes"], 64u64 * 2048 * 2048 * 4);
    let unmerged = plan["unmerged_bytes"].as_u64().unwrap();
    assert_eq!(plan["fit_unmerged"], (1u64 << 30) / unmerged);
    // A merged variant is 64 × 2048² × 4 bytes = exactly 1 GiB.
    assert_eq!(plan["fit_merged"], 1);
    let text = switchyard_ok(
        &[
            "plan",
            "--model",
            "config.json",
            "--rank",
            "16",
            "--targets",
            "attn.q",
        ],
        dir.path(),
    );
    assert!(text.contains("rank 16 on attn.q"), "{text}");
    let out = run_switchyard(
        &[
            "plan",
            "--model",
            ".",
            "--rank",
            "16",
            "--targets",
            "attn.x",
        ],
        "",
        dir.path(),
    );
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("attn.x"));
}

#[test]
fn every_new_command_explains_itself_in_help() {
    let dir = tempfile::tempdir().unwrap();
    for cmd in [
        &["adapter", "--help"][..],
        &["adapter", "inspect", "--help"],
        &["adapter", "verify", "--help"],
        &["adapter", "publish", "--help"],
        &["adapter", "list", "--help"],
        &["adapter", "live", "--help"],
        &["adapter", "rollback", "--help"],
        &["adapter", "retire", "--help"],
        &["adapter", "pack", "--help"],
        &["plan", "--help"],
    ] {
        let text = switchyard_ok(cmd, dir.path());
        assert!(
            text.contains("Usage:") && text.lines().count() > 4,
            "{cmd:?}:\n{text}"
        );
    }
}

/// The tiny decoder as the registry validates against it: tests/reference/README.md gives its
/// fingerprint and shapes (hidden 64, 2 layers, 4 heads of 16, 2 key/value heads, MLP 128).
fn tiny_llama_spec() -> switchyard_adapters::BaseSpec {
    use switchyard_adapters::{Module, Site};
    let mut targets = BTreeMap::new();
    for layer in 0..2 {
        for (m, shape) in [
            (Module::AttnQ, (64, 64)),
            (Module::AttnK, (32, 64)),
            (Module::AttnV, (32, 64)),
            (Module::AttnO, (64, 64)),
            (Module::MlpGate, (128, 64)),
            (Module::MlpUp, (128, 64)),
            (Module::MlpDown, (64, 128)),
        ] {
            targets.insert(Site::new(layer, m), shape);
        }
    }
    switchyard_adapters::BaseSpec {
        model_type: "llama".to_owned(),
        fingerprint: "5754de3c2ddde7e7".to_owned(),
        num_layers: 2,
        hidden_size: 64,
        targets,
    }
}

#[test]
fn a_watching_registry_follows_another_process_publishing_rolling_back_and_setting_live() {
    use switchyard_adapters::package::Limits;
    use switchyard_adapters::store::Store;
    use switchyard_adapters::watcher::DEFAULT_POLL_INTERVAL;
    use switchyard_adapters::{Registry, RegistryConfig};

    let dir = tempfile::tempdir().unwrap();
    let store_dir = dir.path().join("store");
    let run = |args: &[&str]| {
        let mut all = args.to_vec();
        all.extend(["--store", path(&store_dir), "--name", "tiny"]);
        switchyard_ok(&all, dir.path())
    };
    let qv = fixtures().join("tiny-llama-qv.safetensors");
    let all = fixtures().join("tiny-llama-all.safetensors");
    let version_of = |out: &str| {
        out.lines()
            .next()
            .unwrap()
            .rsplit('@')
            .next()
            .unwrap()
            .to_owned()
    };
    let v1 = version_of(&run(&["adapter", "publish", path(&qv)]));

    let store = Store::open(&store_dir, Limits::default()).unwrap();
    let registry = Registry::new(store, tiny_llama_spec(), RegistryConfig::default(), None);
    let first = registry.resolve("tiny").unwrap();
    assert_eq!(first.version(), v1);
    assert_eq!(
        first.sites().count(),
        4,
        "tiny-llama-qv: q and v of 2 layers"
    );
    let _watcher = registry.start_watcher(DEFAULT_POLL_INTERVAL);

    let wait_for = |want: &str, after: &str| {
        let start = Instant::now();
        loop {
            let h = registry.resolve("tiny").unwrap();
            if h.version() == want {
                return (start.elapsed(), h);
            }
            assert!(
                start.elapsed() < Duration::from_secs(1),
                "{after}: still {} after 1 s, expected {want}",
                h.version()
            );
            std::thread::sleep(Duration::from_millis(10));
        }
    };
    let v2 = version_of(&run(&["adapter", "publish", path(&all)]));
    let (took, second) = wait_for(&v2, "publish");
    assert_eq!(
        second.sites().count(),
        14,
        "tiny-llama-all: 7 modules in 2 layers"
    );
    // The request admitted before the swap still holds all of v1.
    assert_eq!((first.version(), first.sites().count()), (v1.as_str(), 4));
    eprintln!("swap after publish noticed in {took:?}");

    run(&["adapter", "rollback"]);
    wait_for(&v1, "rollback");
    run(&["adapter", "live", "--set", &v2]);
    wait_for(&v2, "live --set");
    assert!(registry.load_count() >= 2);
}
