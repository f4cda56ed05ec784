//! `switchyard config check FILE`: loads a config file the way `switchyard serve` would (with the
//! `SWITCHYARD_*` environment on top), and prints the effective settings as TOML, secrets
//! redacted; a refused setting is an error that names the key and the value.

use std::io::Write;
use std::path::Path;

use switchyard_config::{KEYS, Settings};

/// Checks `file` under `env` (pass `std::env::vars()` for the process environment) and writes
/// the effective settings to `out`.
pub fn check(
    file: &Path,
    env: impl IntoIterator<Item = (String, String)>,
    mut out: impl Write,
) -> anyhow::Result<()> {
    let settings = Settings::load(Some(file), env).map_err(|e| match e.key() {
        // A read or syntax error names the file already; a refused value names only its key.
        None => anyhow::Error::new(e),
        Some(_) => anyhow::Error::new(e).context(format!("{} is refused", file.display())),
    })?;
    out.write_all(settings.render_effective().as_bytes())?;
    out.flush()?;
    Ok(())
}

/// The `--help` epilogue: every environment variable and the key it overrides, from the same
/// table the config crate reads, so the list cannot drift from what is read.
pub fn environment_help() -> String {
    let mut text = String::from(
        "Precedence, lowest first: built-in defaults, the file, SWITCHYARD_* environment \
         variables, command-line flags. API keys and the admin token are shown as their length \
         only. An example with every key lives in config/switchyard.example.toml.\n\n\
         Environment (variable, key it overrides):\n",
    );
    let width = KEYS.iter().map(|k| k.env.len()).max().unwrap_or(0);
    for key in KEYS {
        text.push_str(&format!("  {:width$}  {}\n", key.env, key.dotted()));
    }
    text
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write_config(text: &str) -> (tempfile::TempDir, std::path::PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("switchyard.toml");
        std::fs::write(&path, text).unwrap();
        (dir, path)
    }

    #[test]
    fn check_prints_effective_settings_with_environment_applied() {
        let (_dir, path) = write_config("[engine]\nqueue_depth = 12\n");
        let env = [(
            "SWITCHYARD_ENGINE_MAX_BATCH_ROWS".to_owned(),
            "5".to_owned(),
        )];
        let mut out = Vec::new();
        check(&path, env, &mut out).unwrap();
        let page = String::from_utf8(out).unwrap();
        assert!(page.contains("queue_depth = 12\n"), "{page}");
        assert!(page.contains("max_batch_rows = 5\n"), "{page}");
    }

    #[test]
    fn check_refusal_names_file_key_and_value() {
        let (_dir, path) = write_config("[engine]\nqueue_depth = 0\n");
        let err = check(&path, Vec::new(), Vec::new()).unwrap_err();
        let text = format!("{err:#}");
        assert!(text.contains("switchyard.toml is refused"), "{text}");
        assert!(
            text.contains("`engine.queue_depth`") && text.contains("\"0\""),
            "{text}"
        );
    }

    #[test]
    fn help_lists_every_variable() {
        let help = environment_help();
        for key in KEYS {
            assert!(help.contains(key.env), "{}", key.env);
        }
    }
}
