//! Helpers for the integration tests: find the built `switchyard` binary, the reference
//! fixtures and the fetched models, each with a message that says how to get it when it is
//! missing.
//! [`server`] runs `switchyard serve` and talks HTTP to it; [`embeddings`] holds the reference
//! embeddings and the closeness rule.

pub mod embeddings;
pub mod postgres;
pub mod server;

use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

/// The workspace root.
pub fn workspace_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .unwrap()
        .to_owned()
}

/// The committed reference fixtures.
pub fn fixtures() -> PathBuf {
    workspace_root().join("tests/reference/fixtures")
}

/// The embedded default base model; panics with instructions when it is not there.
pub fn base_model_dir() -> PathBuf {
    fetched_model_dir(
        "the base model",
        "SWITCHYARD_BASE_MODEL_DIR",
        "all-minilm-l6-v2",
        "fetch-base-model.sh",
    )
}

/// all-mpnet-base-v2, the second real encoder the reference checks run; panics with
/// instructions when it is not there.
pub fn mpnet_model_dir() -> PathBuf {
    fetched_model_dir(
        "all-mpnet-base-v2",
        "SWITCHYARD_MPNET_DIR",
        "all-mpnet-base-v2",
        "fetch-mpnet.sh",
    )
}

/// A model a script fetches into `models/{folder}` (or where `env` points): its folder, or a
/// panic that names the script.
fn fetched_model_dir(what: &str, env: &str, folder: &str, script: &str) -> PathBuf {
    let dir = std::env::var_os(env)
        .map(PathBuf::from)
        .unwrap_or_else(|| workspace_root().join("models").join(folder));
    assert!(
        dir.join("model.safetensors").is_file(),
        "{what} is not at {}: run scripts/{script} (the test command does)",
        dir.display()
    );
    dir
}

/// The fetched 32,000-token Llama-2 vocabulary tokenizer.json (`SWITCHYARD_L2_TOKENIZER_DIR`,
/// else models/l2-tokenizer); panics with instructions when it is not there, so a test that
/// needs it fails rather than passes unchecked.
pub fn l2_tokenizer() -> PathBuf {
    let dir = std::env::var_os("SWITCHYARD_L2_TOKENIZER_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| workspace_root().join("models/l2-tokenizer"));
    let file = dir.join("tokenizer.json");
    assert!(
        file.is_file(),
        "the Llama-2 vocabulary tokenizer is not at {}: run scripts/fetch-tokenizer.sh (the test command does)",
        file.display()
    );
    file
}

/// The `switchyard` binary built next to the running test executable.
pub fn switchyard_bin() -> PathBuf {
    built_bin("switchyard", "switchyard-server")
}

/// The `switchyard-load` binary (the load generator) built next to the running test executable.
pub fn switchyard_load_bin() -> PathBuf {
    built_bin("switchyard-load", "switchyard-load")
}

/// Binary `name` of package `package` in the profile folder of the running test executable.
fn built_bin(name: &str, package: &str) -> PathBuf {
    let exe = std::env::current_exe().unwrap();
    let profile_dir = exe.parent().unwrap().parent().unwrap();
    let bin = profile_dir.join(format!("{name}{}", std::env::consts::EXE_SUFFIX));
    assert!(
        bin.is_file(),
        "{} is missing: build it first with `cargo build -p {package}` (scripts/test does)",
        bin.display()
    );
    bin
}

/// Runs `switchyard` with `args` in `cwd`, feeding `stdin`, and returns what it did.
pub fn run_switchyard(args: &[&str], stdin: &str, cwd: &Path) -> Output {
    use std::io::Write;
    let mut child = Command::new(switchyard_bin())
        .args(args)
        .current_dir(cwd)
        .env_remove("SWITCHYARD_MODEL_DIR")
        .env_remove("SWITCHYARD_MODEL_WEIGHTS")
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start switchyard");
    child
        .stdin
        .take()
        .unwrap()
        .write_all(stdin.as_bytes())
        .unwrap();
    child.wait_with_output().unwrap()
}

/// Reads a JSON fixture.
pub fn read_json(path: &Path) -> serde_json::Value {
    let text = std::fs::read_to_string(path)
        .unwrap_or_else(|e| panic!("reading fixture {}: {e}", path.display()));
    serde_json::from_str(&text).unwrap()
}

/// Writes a safetensors file of f32 tensors, `(name, shape, values)`, laid out as the format
/// describes (8-byte little-endian header length, JSON header padded to 8 bytes, data), so a
/// test can make "foreign" files without any library.
pub fn write_safetensors(path: &Path, tensors: &[(&str, &[usize], &[f32])]) {
    let mut header = serde_json::Map::new();
    let mut data: Vec<u8> = Vec::new();
    for (name, shape, values) in tensors {
        assert_eq!(shape.iter().product::<usize>(), values.len(), "{name}");
        let begin = data.len();
        data.extend(values.iter().flat_map(|v| v.to_le_bytes()));
        header.insert(
            (*name).to_owned(),
            serde_json::json!({"dtype": "F32", "shape": shape, "data_offsets": [begin, data.len()]}),
        );
    }
    let mut text = serde_json::Value::Object(header).to_string();
    while !text.len().is_multiple_of(8) {
        text.push(' ');
    }
    let mut bytes = (text.len() as u64).to_le_bytes().to_vec();
    bytes.extend_from_slice(text.as_bytes());
    bytes.extend_from_slice(&data);
    std::fs::write(path, bytes).unwrap_or_else(|e| panic!("writing {}: {e}", path.display()));
}

/// Runs `switchyard` with `args` (no stdin) and returns stdout, panicking with stderr when it
/// does not exit 0.
pub fn switchyard_ok(args: &[&str], cwd: &Path) -> String {
    let out = run_switchyard(args, "", cwd);
    assert!(
        out.status.success(),
        "switchyard {} failed: {}",
        args.join(" "),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

/// Asserts that `promtool check metrics` (Debian's `prometheus` package, which scripts/test
/// unpacks) reports nothing on a `/metrics` page.
pub fn assert_promtool_accepts(page: &str) {
    use std::io::Write;
    use std::process::{Command, Stdio};

    let mut promtool = Command::new("promtool")
        .args(["check", "metrics"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("promtool is not installed: `apt-get install prometheus` (scripts/test does it)");
    promtool
        .stdin
        .take()
        .unwrap()
        .write_all(page.as_bytes())
        .unwrap();
    let out = promtool.wait_with_output().unwrap();
    let report = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        out.status.success() && report.trim().is_empty(),
        "promtool check metrics reported:\n{report}\non:\n{page}"
    );
}
