//! The offline commands, run as a user runs them: the real `switchyard` binary in a fresh
//! temporary directory, texts on stdin, JSON on stdout, checked against the reference fixtures
//! (sentence-transformers embeddings, transformers greedy tokens; see tests/reference/README.md).

use switchyard_tests::embeddings::{cosine, rows};
use switchyard_tests::{base_model_dir, fixtures, read_json, run_switchyard};

fn embed(adapter: Option<&str>, batch: &str) -> (Vec<Vec<f64>>, String) {
    let fx = read_json(&fixtures().join("minilm-embeddings.json"));
    let input: String = fx["sentences"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| format!("{}\n", s.as_str().unwrap()))
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let model = base_model_dir();
    let mut args = vec![
        "embed",
        "--model",
        model.to_str().unwrap(),
        "--batch",
        batch,
    ];
    let adapter_path;
    if let Some(name) = adapter {
        adapter_path = fixtures().join(format!("{name}.safetensors"));
        args.extend(["--adapter", adapter_path.to_str().unwrap()]);
    }
    let out = run_switchyard(&args, &input, dir.path());
    let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
    assert!(out.status.success(), "switchyard embed failed: {stderr}");
    let lines: Vec<Vec<f64>> = String::from_utf8(out.stdout)
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    (lines, stderr)
}

#[test]
fn embed_command_prints_reference_embeddings_for_base_and_two_adapters() {
    let fx = read_json(&fixtures().join("minilm-embeddings.json"));
    for (adapter, want) in [
        (None, rows(&fx["embeddings"])),
        (
            Some("minilm-qv-a"),
            rows(&fx["adapters"]["minilm-qv-a"]["embeddings"]),
        ),
        (
            Some("minilm-qv-b"),
            rows(&fx["adapters"]["minilm-qv-b"]["embeddings"]),
        ),
    ] {
        // Batch 3 splits the 8 sentences unevenly, so padding and batching are both exercised.
        let (got, stderr) = embed(adapter, "3");
        assert_eq!(got.len(), want.len(), "one line per input");
        for (g, w) in got.iter().zip(&want) {
            assert_eq!(g.len(), 384);
            assert!(
                cosine(g, w) >= 0.99999,
                "{adapter:?}: cosine {}",
                cosine(g, w)
            );
            let d = g
                .iter()
                .zip(w)
                .map(|(a, b)| (a - b).abs())
                .fold(0.0, f64::max);
            assert!(d <= 1e-4, "{adapter:?}: max abs difference {d}");
        }
        assert!(
            stderr.contains("embedded 8 rows") && stderr.contains("rows/s"),
            "{stderr}"
        );
    }
}

#[test]
fn generate_command_prints_the_reference_greedy_continuation() {
    let fx = read_json(&fixtures().join("tiny-llama-reference.json"));
    let dir = tempfile::tempdir().unwrap();
    let model = fixtures().join("tiny-llama");
    let out = run_switchyard(
        &[
            "generate",
            "--model",
            model.to_str().unwrap(),
            "--prompt",
            fx["prompt"].as_str().unwrap(),
            "--limit",
            "16",
        ],
        "",
        dir.path(),
    );
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{stderr}");
    // The reference text is the decoding of transformers' 16 greedy tokens.
    let stdout = String::from_utf8(out.stdout).unwrap();
    assert_eq!(
        stdout.trim_end_matches('\n'),
        fx["greedy_text"].as_str().unwrap()
    );
    assert!(stderr.contains("generated 16 tokens"), "{stderr}");
}

#[test]
fn generate_command_with_seed_repeats_and_refuses_bad_top_p() {
    let fx = read_json(&fixtures().join("tiny-llama-reference.json"));
    let dir = tempfile::tempdir().unwrap();
    let model = fixtures().join("tiny-llama");
    let args = |top_p: &'static str| {
        vec![
            "generate".to_owned(),
            "--model".to_owned(),
            model.to_str().unwrap().to_owned(),
            "--prompt".to_owned(),
            fx["prompt"].as_str().unwrap().to_owned(),
            "--temperature".to_owned(),
            "0.8".to_owned(),
            "--top-p".to_owned(),
            top_p.to_owned(),
            "--seed".to_owned(),
            "5".to_owned(),
        ]
    };
    let run = |top_p| {
        let a = args(top_p);
        let refs: Vec<&str> = a.iter().map(String::as_str).collect();
        run_switchyard(&refs, "", dir.path())
    };
    let first = run("0.9");
    let second = run("0.9");
    assert!(first.status.success());
    assert_eq!(first.stdout, second.stdout);
    let bad = run("1.5");
    assert!(!bad.status.success());
    assert!(String::from_utf8_lossy(&bad.stderr).contains("top-p 1.5"));
}

#[test]
fn embed_command_refuses_an_adapter_for_another_base_naming_file_and_rule() {
    let dir = tempfile::tempdir().unwrap();
    let model = base_model_dir();
    let wrong = fixtures().join("tiny-llama-qv.safetensors");
    let out = run_switchyard(
        &[
            "embed",
            "--model",
            model.to_str().unwrap(),
            "--adapter",
            wrong.to_str().unwrap(),
        ],
        "hello\n",
        dir.path(),
    );
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("tiny-llama-qv.safetensors") && stderr.contains("base fingerprint"),
        "{stderr}"
    );
    assert!(
        out.stdout.is_empty(),
        "nothing printed on stdout for a refused run"
    );
}

#[test]
fn embed_command_names_a_missing_model_folder() {
    let dir = tempfile::tempdir().unwrap();
    let out = run_switchyard(
        &["embed", "--model", "no-such-model"],
        "hello\n",
        dir.path(),
    );
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("no-such-model") && stderr.contains("does not exist"),
        "{stderr}"
    );
}

#[test]
fn a_corrupt_adapter_file_is_refused_as_not_safetensors() {
    let dir = tempfile::tempdir().unwrap();
    let bad = dir.path().join("broken.safetensors");
    let mut bytes = std::fs::read(fixtures().join("minilm-qv-a.safetensors")).unwrap();
    bytes.truncate(bytes.len() / 2);
    std::fs::write(&bad, bytes).unwrap();
    let model = base_model_dir();
    let out = run_switchyard(
        &[
            "embed",
            "--model",
            model.to_str().unwrap(),
            "--adapter",
            bad.to_str().unwrap(),
        ],
        "hello\n",
        dir.path(),
    );
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("broken.safetensors") && stderr.contains("safetensors structure"),
        "{stderr}"
    );
}

/// `SWITCHYARD_KERNELS` naming no kernel path stops the command before any work, with the valid
/// names.
#[test]
fn an_unknown_kernel_path_is_refused_with_the_valid_names() {
    let dir = tempfile::tempdir().unwrap();
    let out = std::process::Command::new(switchyard_tests::switchyard_bin())
        .args([
            "plan",
            "--model",
            "config.json",
            "--rank",
            "8",
            "--targets",
            "attn.q",
        ])
        .current_dir(dir.path())
        .env("SWITCHYARD_KERNELS", "avx1024")
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("SWITCHYARD_KERNELS=\"avx1024\"")
            && stderr.contains("portable, avx2, avx512, avx512-bf16"),
        "{stderr}"
    );
}
