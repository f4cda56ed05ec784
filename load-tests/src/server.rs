//! A `switchyard serve` child process for the built-in scenarios: a generated TOML config in a
//! temporary folder with its own store, port 0, and the address read from the
//! `switchyard listening on http://ADDR` line the server prints first. Its log goes to
//! `server.log` beside the config; the process is killed when the handle is dropped.

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::time::Duration;

use anyhow::{Context, bail};

/// The settings a scenario's server gets; everything else keeps its default.
#[derive(Debug, Clone, PartialEq)]
pub struct ServerConfig {
    pub model_dir: PathBuf,
    pub store_dir: PathBuf,
    pub admin_token: String,
    /// 0 turns merged variants off.
    pub merged_budget_bytes: u64,
    pub factor_budget_bytes: u64,
    pub promote_share: f64,
    pub promote_window_rows: usize,
    pub queue_depth: usize,
    /// More `[engine]` settings, as TOML lines.
    pub engine_toml: String,
    /// TOML appended as it is, such as `[[tenants]]` entries.
    pub extra_toml: String,
}

impl ServerConfig {
    /// Defaults of the example config, with merging on or off; off is a merged budget of 0.
    pub fn new(model_dir: &Path, store_dir: &Path, merging: bool) -> Self {
        Self {
            model_dir: model_dir.to_owned(),
            store_dir: store_dir.to_owned(),
            admin_token: "load-test-admin-token-0123456789".to_owned(),
            merged_budget_bytes: if merging { 2 << 30 } else { 0 },
            factor_budget_bytes: 1 << 30,
            promote_share: 0.9,
            promote_window_rows: 512,
            queue_depth: 256,
            engine_toml: String::new(),
            extra_toml: String::new(),
        }
    }

    /// The TOML text of the config file.
    pub fn toml(&self) -> String {
        // Rust's debug form of a string is a valid TOML basic string for the paths and the
        // token used here (quotes and backslashes escaped the same way).
        format!(
            "[server]\nlisten = \"127.0.0.1:0\"\n\n\
             [model]\ndir = {:?}\n\n\
             [store]\ndir = {:?}\n\n\
             [engine]\nqueue_depth = {}\n{}\n\
             [residency]\nfactor_budget_bytes = {}\nmerged_budget_bytes = {}\n\
             promote_share = {:?}\npromote_window_rows = {}\n\n\
             [admin]\ntoken = {:?}\n\n\
             [log]\nfilter = \"warn\"\n{}",
            self.model_dir.display().to_string(),
            self.store_dir.display().to_string(),
            self.queue_depth,
            self.engine_toml,
            self.factor_budget_bytes,
            self.merged_budget_bytes,
            self.promote_share,
            self.promote_window_rows,
            self.admin_token,
            self.extra_toml,
        )
    }
}

/// A running server.
#[derive(Debug)]
pub struct ServerProcess {
    child: Child,
    url: String,
    log: PathBuf,
}

/// How long a server may take to print its address (a debug build on a busy machine).
const START_TIMEOUT: Duration = Duration::from_secs(180);

impl ServerProcess {
    /// Writes `config` to `dir/switchyard.toml` and starts `bin serve` on it.
    pub fn start(bin: &Path, dir: &Path, config: &ServerConfig) -> anyhow::Result<Self> {
        let config_path = dir.join("switchyard.toml");
        std::fs::write(&config_path, config.toml())
            .with_context(|| format!("writing {}", config_path.display()))?;
        let log = dir.join("server.log");
        let log_file =
            std::fs::File::create(&log).with_context(|| format!("creating {}", log.display()))?;
        let mut command = Command::new(bin);
        command
            .arg("serve")
            .arg("--config")
            .arg(&config_path)
            .current_dir(dir)
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(log_file);
        // Only the generated config speaks: a SWITCHYARD_* variable would win over it.
        for (name, _) in std::env::vars_os() {
            if name.to_string_lossy().starts_with("SWITCHYARD_") {
                command.env_remove(name);
            }
        }
        let mut child = command
            .spawn()
            .with_context(|| format!("starting {} serve", bin.display()))?;
        let stdout = child.stdout.take().context("the server's stdout")?;
        let (tx, rx) = mpsc::channel();
        std::thread::spawn(move || {
            let mut lines = BufReader::new(stdout);
            let mut first = String::new();
            let _ = lines.read_line(&mut first);
            let _ = tx.send(first);
            // Keep draining, so the server never blocks on a full pipe.
            let _ = std::io::copy(&mut lines, &mut std::io::sink());
        });
        let first = rx.recv_timeout(START_TIMEOUT).unwrap_or_default();
        let Some(addr) = first.trim().strip_prefix("switchyard listening on http://") else {
            let _ = child.kill();
            let _ = child.wait();
            let text = std::fs::read_to_string(&log).unwrap_or_default();
            let tail: String = text
                .lines()
                .rev()
                .take(20)
                .collect::<Vec<_>>()
                .into_iter()
                .rev()
                .collect::<Vec<_>>()
                .join("\n");
            bail!(
                "{} serve did not start (first line {:?}); the end of its log {}:\n{tail}",
                bin.display(),
                first.trim(),
                log.display()
            );
        };
        Ok(Self {
            url: format!("http://{addr}"),
            child,
            log,
        })
    }

    /// The server's process id.
    pub fn pid(&self) -> u32 {
        self.child.id()
    }

    pub fn url(&self) -> &str {
        &self.url
    }

    pub fn log(&self) -> &Path {
        &self.log
    }
}

impl Drop for ServerProcess {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn config_turns_merging_on_or_off_and_listens_on_port_zero() {
        let c = ServerConfig::new(Path::new("/m/minilm"), Path::new("/t/store"), false);
        assert_eq!(
            c.toml(),
            "[server]\nlisten = \"127.0.0.1:0\"\n\n\
             [model]\ndir = \"/m/minilm\"\n\n\
             [store]\ndir = \"/t/store\"\n\n\
             [engine]\nqueue_depth = 256\n\n\
             [residency]\nfactor_budget_bytes = 1073741824\nmerged_budget_bytes = 0\n\
             promote_share = 0.9\npromote_window_rows = 512\n\n\
             [admin]\ntoken = \"load-test-admin-token-0123456789\"\n\n\
             [log]\nfilter = \"warn\"\n"
        );
        let on = ServerConfig {
            promote_window_rows: 64,
            ..ServerConfig::new(Path::new("m"), Path::new("s"), true)
        };
        let text = on.toml();
        assert!(
            text.contains("merged_budget_bytes = 2147483648\n"),
            "{text}"
        );
        assert!(text.contains("promote_window_rows = 64\n"), "{text}");
    }

    #[test]
    fn a_binary_that_prints_no_address_is_reported_with_its_log() {
        let dir = tempfile::tempdir().unwrap();
        let c = ServerConfig::new(Path::new("m"), Path::new("s"), false);
        // `false` exits at once without printing anything.
        let e = ServerProcess::start(Path::new("false"), dir.path(), &c).unwrap_err();
        assert!(e.to_string().contains("serve did not start"), "{e}");
    }
}
