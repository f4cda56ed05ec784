//! A real `switchyard serve` for the integration tests: [`ServerSetup`] writes a TOML config into
//! a fresh temporary directory (port 0, a store folder inside it, an admin token), [`Server`]
//! starts the binary, learns its address from the first stdout line, talks HTTP to it through a
//! blocking client, and kills it on drop. Its log goes to `server.log` in the directory and is
//! printed when a test panics.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::io::{BufRead, BufReader, Read};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use serde_json::Value;

use crate::{base_model_dir, fixtures, switchyard_bin};

/// The admin token every test server is configured with.
pub const ADMIN_TOKEN: &str = "test-admin-token-0123456789";

/// How long a server may take from start to printing its address (a debug build loading the
/// base model on a busy two-core machine).
const START_TIMEOUT: Duration = Duration::from_secs(120);

/// How long one HTTP exchange may take before the test fails instead of hanging.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(300);

/// A config to start a server with: the model, then any `[section] key = value` settings and
/// tenants on top of the defaults every test server gets.
#[derive(Debug, Clone)]
pub struct ServerSetup {
    model_dir: PathBuf,
    settings: BTreeMap<String, BTreeMap<String, String>>,
    tenants: String,
    env: Vec<(String, String)>,
}

impl ServerSetup {
    /// A server of the embedded default encoder (all-MiniLM-L6-v2).
    pub fn encoder() -> Self {
        Self::with_model(base_model_dir())
    }

    /// A server of the tiny Llama decoder fixture.
    pub fn tiny_decoder() -> Self {
        Self::with_model(fixtures().join("tiny-llama"))
    }

    /// A server of the model in `model_dir` (a folder the test made, say).
    pub fn with_model(model_dir: PathBuf) -> Self {
        Self {
            model_dir,
            settings: BTreeMap::new(),
            tenants: String::new(),
            env: Vec::new(),
        }
        .set("server", "listen", "\"127.0.0.1:0\"")
        .set("admin", "token", &format!("{ADMIN_TOKEN:?}"))
    }

    /// Sets `key` in `[section]` to `toml_value`, written as TOML (`"text"`, `16384`).
    pub fn set(mut self, section: &str, key: &str, toml_value: &str) -> Self {
        self.settings
            .entry(section.to_owned())
            .or_default()
            .insert(key.to_owned(), toml_value.to_owned());
        self
    }

    /// Sets an environment variable of the server process (the test-only fault triggers).
    pub fn env(mut self, name: &str, value: &str) -> Self {
        self.env.push((name.to_owned(), value.to_owned()));
        self
    }

    /// Adds a tenant with one key and the adapter name patterns it may use.
    pub fn tenant(mut self, name: &str, key: &str, patterns: &[&str]) -> Self {
        let patterns: Vec<String> = patterns.iter().map(|p| format!("{p:?}")).collect();
        writeln!(
            self.tenants,
            "\n[[tenants]]\nname = {name:?}\nkeys = [{key:?}]\nadapters = [{}]",
            patterns.join(", ")
        )
        .unwrap();
        self
    }

    /// Sets `key` to `toml_value` in the tenant added last (`requests_per_second`, `0.5`).
    pub fn tenant_set(mut self, key: &str, toml_value: &str) -> Self {
        assert!(!self.tenants.is_empty(), "add a tenant first");
        writeln!(self.tenants, "{key} = {toml_value}").unwrap();
        self
    }

    fn toml(&self, store_dir: &Path) -> String {
        let mut settings = self.settings.clone();
        settings
            .entry("model".to_owned())
            .or_default()
            .insert("dir".to_owned(), format!("{:?}", self.model_dir));
        // The temporary folder's store unless the test named another (`set("store", "dir", ..)`).
        settings
            .entry("store".to_owned())
            .or_default()
            .entry("dir".to_owned())
            .or_insert_with(|| format!("{store_dir:?}"));
        let mut text = String::new();
        for (section, keys) in &settings {
            writeln!(text, "[{section}]").unwrap();
            for (key, value) in keys {
                writeln!(text, "{key} = {value}").unwrap();
            }
        }
        text + &self.tenants
    }

    /// Writes the config into a fresh temporary directory and starts the server.
    pub fn start(self) -> Server {
        let dir = tempfile::tempdir().unwrap();
        let config = dir.path().join("switchyard.toml");
        std::fs::write(&config, self.toml(&dir.path().join("store"))).unwrap();
        let (child, addr) = spawn(dir.path(), &config, &self.env);
        Server {
            child: Some(child),
            addr,
            config,
            env: self.env,
            agent: agent(),
            dir,
        }
    }
}

/// An HTTP client that hands back every status as a response (no status is an error), with the
/// tests' time limit per request; for tests that talk to something other than one [`Server`].
pub fn agent() -> ureq::Agent {
    ureq::Agent::config_builder()
        .http_status_as_error(false)
        .timeout_global(Some(REQUEST_TIMEOUT))
        .build()
        .into()
}

/// Starts `switchyard serve --config CONFIG` in `dir`, with its log in `dir/server.log`, and
/// waits for the `switchyard listening on http://ADDR` line.
fn spawn(dir: &Path, config: &Path, env: &[(String, String)]) -> (Child, String) {
    let log = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(dir.join("server.log"))
        .unwrap();
    let mut command = Command::new(switchyard_bin());
    command
        .arg("serve")
        .arg("--config")
        .arg(config)
        .current_dir(dir)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(log);
    // Only the config file speaks: a SWITCHYARD_* variable of the caller's shell would win over it.
    for (name, _) in std::env::vars_os() {
        if name.to_string_lossy().starts_with("SWITCHYARD_") {
            command.env_remove(name);
        }
    }
    command.envs(env.iter().map(|(k, v)| (k, v)));
    let mut child = command.spawn().expect("start switchyard serve");
    let stdout = child.stdout.take().unwrap();
    let (tx, rx) = mpsc::channel();
    std::thread::spawn(move || {
        let mut lines = BufReader::new(stdout);
        let mut first = String::new();
        let _ = lines.read_line(&mut first);
        let _ = tx.send(first);
        // Keep draining, so the server never blocks on a full pipe.
        let _ = std::io::copy(&mut lines, &mut std::io::sink());
    });
    let first = match rx.recv_timeout(START_TIMEOUT) {
        Ok(line) => line,
        Err(_) => {
            let _ = child.kill();
            panic!(
                "switchyard serve printed no address within {START_TIMEOUT:?}; its log:\n{}",
                read_log(dir)
            );
        }
    };
    let Some(addr) = first.trim().strip_prefix("switchyard listening on http://") else {
        let _ = child.kill();
        let _ = child.wait();
        panic!(
            "switchyard serve did not start (first stdout line {first:?}); its log:\n{}",
            read_log(dir)
        );
    };
    (child, addr.to_owned())
}

fn read_log(dir: &Path) -> String {
    std::fs::read_to_string(dir.join("server.log")).unwrap_or_default()
}

/// A running `switchyard serve`.
#[derive(Debug)]
pub struct Server {
    child: Option<Child>,
    addr: String,
    config: PathBuf,
    env: Vec<(String, String)>,
    agent: ureq::Agent,
    dir: tempfile::TempDir,
}

/// One HTTP answer.
#[derive(Debug, Clone)]
pub struct Reply {
    pub status: u16,
    pub body: String,
    /// The `Retry-After` header, where the answer has one.
    pub retry_after: Option<String>,
}

impl Reply {
    /// The body as JSON; panics with the body when it is not.
    pub fn json(&self) -> Value {
        serde_json::from_str(&self.body)
            .unwrap_or_else(|e| panic!("answer {} is not JSON ({e}): {}", self.status, self.body))
    }

    /// The `error.code` of an API error body.
    pub fn error_code(&self) -> String {
        self.json()["error"]["code"]
            .as_str()
            .unwrap_or_else(|| panic!("answer {} is not an API error: {}", self.status, self.body))
            .to_owned()
    }

    /// Asserts the status and the error code of a refusal.
    pub fn assert_error(&self, status: u16, code: &str) {
        assert_eq!(
            (self.status, self.error_code().as_str()),
            (status, code),
            "answer: {}",
            self.body
        );
    }

    /// Asserts a 200 and returns the JSON body.
    pub fn ok_json(&self) -> Value {
        assert_eq!(self.status, 200, "answer: {}", self.body);
        self.json()
    }
}

/// One server-sent event.
#[derive(Debug, Clone, PartialEq)]
pub struct SseEvent {
    pub event: String,
    pub data: Value,
}

/// Who a request authenticates as.
#[derive(Debug, Clone, Copy)]
pub enum Auth<'a> {
    None,
    /// `Authorization: Bearer <token>`.
    Bearer(&'a str),
    /// The admin token.
    Admin,
}

impl Server {
    /// The server's temporary directory (its config, its store and its log).
    pub fn dir(&self) -> &Path {
        self.dir.path()
    }

    /// From here on, every request goes on a connection of its own. A test that sends bodies the
    /// server answers without reading (a method a route does not serve, say) needs it: the
    /// server then closes that connection after its answer, and a request sent on it again
    /// before the client has seen the close fails with "Peer disconnected".
    pub fn fresh_connections(&mut self) {
        self.agent = ureq::Agent::config_builder()
            .http_status_as_error(false)
            .timeout_global(Some(REQUEST_TIMEOUT))
            .max_idle_connections(0)
            .max_idle_connections_per_host(0)
            .build()
            .into();
    }

    /// The process id.
    pub fn pid(&self) -> u32 {
        self.child.as_ref().expect("server running").id()
    }

    pub fn url(&self, path: &str) -> String {
        format!("http://{}{path}", self.addr)
    }

    /// A request to `path`, carrying the credential of `auth`.
    fn builder(&self, method: &str, path: &str, auth: Auth<'_>) -> ureq::http::request::Builder {
        let builder = ureq::http::Request::builder()
            .method(method)
            .uri(self.url(path));
        let bearer = match auth {
            Auth::None => return builder,
            Auth::Bearer(token) => token,
            Auth::Admin => ADMIN_TOKEN,
        };
        builder.header("Authorization", format!("Bearer {bearer}"))
    }

    /// Sends one request; `body` is `(content type, bytes)`.
    pub fn request(
        &self,
        method: &str,
        path: &str,
        auth: Auth<'_>,
        body: Option<(&str, &[u8])>,
    ) -> Reply {
        self.try_request(method, path, auth, body)
            .unwrap_or_else(|e| panic!("{method} {path}: {e}; log:\n{}", self.log()))
    }

    /// [`Server::request`], answering a failure to connect or to read the whole answer (as when
    /// the server is killed meanwhile) with its reason instead of a panic.
    pub fn try_request(
        &self,
        method: &str,
        path: &str,
        auth: Auth<'_>,
        body: Option<(&str, &[u8])>,
    ) -> Result<Reply, String> {
        let builder = self.builder(method, path, auth);
        let result = match body {
            Some((content_type, bytes)) => self.agent.run(
                builder
                    .header("Content-Type", content_type)
                    .body(bytes)
                    .unwrap(),
            ),
            None => self.agent.run(builder.body(()).unwrap()),
        };
        let mut resp = result.map_err(|e| e.to_string())?;
        let status = resp.status().as_u16();
        let retry_after = resp
            .headers()
            .get("retry-after")
            .map(|v| v.to_str().unwrap_or("<not text>").to_owned());
        let body = resp
            .body_mut()
            .with_config()
            .limit(64 << 20)
            .read_to_string()
            .map_err(|e| format!("reading the answer: {e}"))?;
        Ok(Reply {
            status,
            body,
            retry_after,
        })
    }

    /// `POST path` with a JSON body.
    pub fn post(&self, path: &str, auth: Auth<'_>, body: &Value) -> Reply {
        let bytes = body.to_string();
        self.request(
            "POST",
            path,
            auth,
            Some(("application/json", bytes.as_bytes())),
        )
    }

    /// `GET path`.
    pub fn get(&self, path: &str, auth: Auth<'_>) -> Reply {
        self.request("GET", path, auth, None)
    }

    /// Uploads the package file `package` as a new version of adapter `name` (it goes live) and
    /// returns the version.
    pub fn publish(&self, name: &str, package: &Path) -> String {
        let bytes = std::fs::read(package)
            .unwrap_or_else(|e| panic!("reading package {}: {e}", package.display()));
        let reply = self.upload(name, &bytes);
        assert_eq!(reply.status, 201, "publishing {name}: {}", reply.body);
        reply.json()["version"].as_str().unwrap().to_owned()
    }

    /// `PUT /admin/adapters/{name}` with `bytes`, as the admin.
    pub fn upload(&self, name: &str, bytes: &[u8]) -> Reply {
        self.request(
            "PUT",
            &format!("/admin/adapters/{name}"),
            Auth::Admin,
            Some(("application/octet-stream", bytes)),
        )
    }

    /// `POST /embed` of `texts` to `target` (`{"adapter": ...}` or `{"split": ...}`, with any
    /// other fields), with no key.
    pub fn embed(&self, target: Value, texts: &[&str]) -> Reply {
        let mut body = target;
        body["texts"] = serde_json::json!(texts);
        self.post("/embed", Auth::None, &body)
    }

    /// `POST path` with a JSON body, read as a stream of server-sent events to its end.
    pub fn post_sse(&self, path: &str, auth: Auth<'_>, body: &Value) -> Vec<SseEvent> {
        let builder = self
            .builder("POST", path, auth)
            .header("Content-Type", "application/json")
            .header("Accept", "text/event-stream");
        let resp = self
            .agent
            .run(builder.body(body.to_string()).unwrap())
            .unwrap_or_else(|e| panic!("POST {path}: {e}"));
        let status = resp.status().as_u16();
        let content_type = resp
            .headers()
            .get("content-type")
            .and_then(|v| v.to_str().ok())
            .unwrap_or("")
            .to_owned();
        let mut reader = BufReader::new(resp.into_body().into_reader());
        assert!(
            status == 200 && content_type.starts_with("text/event-stream"),
            "POST {path}: expected an event stream, got {status} {content_type}: {}",
            {
                let mut rest = String::new();
                let _ = reader.read_to_string(&mut rest);
                rest
            }
        );
        read_sse(reader)
    }

    /// Sends SIGTERM.
    pub fn terminate(&self) {
        let status = Command::new("kill")
            .arg("-TERM")
            .arg(self.pid().to_string())
            .status()
            .expect("run kill");
        assert!(status.success(), "kill -TERM {} failed", self.pid());
    }

    /// Waits up to `limit` for the process to exit, and returns its status (`None` when it
    /// was still running).
    pub fn wait_exit(&mut self, limit: Duration) -> Option<ExitStatus> {
        let child = self.child.as_mut().expect("server running");
        let until = Instant::now() + limit;
        loop {
            if let Some(status) = child.try_wait().unwrap() {
                self.child = None;
                return Some(status);
            }
            if Instant::now() >= until {
                return None;
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// Stops the server with SIGTERM (it must exit 0) and starts it again on the same config and
    /// store; the new process listens on a new port.
    pub fn restart(&mut self) {
        self.terminate();
        let status = self.wait_exit(Duration::from_secs(60));
        assert!(
            status.is_some_and(|s| s.success()),
            "the server did not exit cleanly on SIGTERM ({status:?}); log:\n{}",
            self.log()
        );
        let (child, addr) = spawn(self.dir.path(), &self.config, &self.env);
        self.child = Some(child);
        self.addr = addr;
        self.agent = agent();
    }

    /// Sends SIGKILL without waiting for the process (so another thread may be mid-request);
    /// [`Server::kill`] then reaps it.
    pub fn signal_kill(&self) {
        let status = Command::new("kill")
            .arg("-KILL")
            .arg(self.pid().to_string())
            .status()
            .expect("run kill");
        assert!(status.success(), "kill -KILL {} failed", self.pid());
    }

    /// Kills the process with SIGKILL, as a crash would (no shutdown, nothing flushed), and
    /// waits for it to be gone.
    pub fn kill(&mut self) {
        let mut child = self.child.take().expect("server running");
        child.kill().expect("kill -9 the server");
        child.wait().expect("wait for the killed server");
    }

    /// Starts the server again on the same config and store, after [`Server::kill`] or an exit;
    /// the new process listens on a new port.
    pub fn start_again(&mut self) {
        assert!(self.child.is_none(), "the server is still running");
        let (child, addr) = spawn(self.dir.path(), &self.config, &self.env);
        self.child = Some(child);
        self.addr = addr;
        self.agent = agent();
    }

    /// Starts the server again after [`Server::kill`] on its old address (a restarted replica
    /// keeps its place behind a front that names it by address).
    pub fn start_again_at_same_address(&mut self) {
        assert!(self.child.is_none(), "the server is still running");
        let mut env = self.env.clone();
        env.push(("SWITCHYARD_LISTEN".to_owned(), self.addr.clone()));
        let (child, addr) = spawn(self.dir.path(), &self.config, &env);
        assert_eq!(addr, self.addr, "the restarted server listens elsewhere");
        self.child = Some(child);
        self.agent = agent();
    }

    /// Kills the server with SIGKILL and starts it again on the same config and store.
    pub fn crash_and_restart(&mut self) {
        self.kill();
        self.start_again();
    }

    /// What the server has logged so far.
    pub fn log(&self) -> String {
        read_log(self.dir.path())
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        if let Some(mut child) = self.child.take() {
            let _ = child.kill();
            let _ = child.wait();
        }
        if std::thread::panicking() {
            let log = self.log();
            let start = (log.len().saturating_sub(8000)..=log.len())
                .find(|&i| log.is_char_boundary(i))
                .unwrap_or(0);
            let tail = &log[start..];
            eprintln!(
                "---- switchyard serve log ({}) ----\n{tail}",
                self.dir().display()
            );
        }
    }
}

/// Reads `event:` / `data:` blocks up to the end of the stream; comment lines (keep-alives) are
/// skipped.
fn read_sse(reader: impl BufRead) -> Vec<SseEvent> {
    let mut events = Vec::new();
    let mut event = String::new();
    let mut data = String::new();
    for line in reader.lines() {
        let line = line.expect("reading the event stream");
        if line.is_empty() {
            if !data.is_empty() {
                events.push(SseEvent {
                    event: std::mem::take(&mut event),
                    data: serde_json::from_str(&data)
                        .unwrap_or_else(|e| panic!("event data is not JSON ({e}): {data}")),
                });
                data.clear();
            }
            event.clear();
        } else if let Some(v) = line.strip_prefix("event:") {
            event = v.trim_start().to_owned();
        } else if let Some(v) = line.strip_prefix("data:") {
            if !data.is_empty() {
                data.push('\n');
            }
            data.push_str(v.strip_prefix(' ').unwrap_or(v));
        }
    }
    events
}
