//! A real S3-compatible server for the object-store tests. By default `s3s-fs`, started on
//! 127.0.0.1 on a free port over a fresh temporary folder, with one bucket and SigV4 keys, and
//! killed when the handle drops. `scripts/install-s3s` builds it into `.cache/tools/bin`;
//! `SWITCHYARD_S3S_FS` names another binary.
//!
//! With `SWITCHYARD_TEST_S3_ENDPOINT` set, the tests use that server instead (garage, which
//! `scripts/garage-check` starts) and start nothing. `SWITCHYARD_TEST_S3_BUCKET`,
//! `SWITCHYARD_TEST_S3_ACCESS_KEY`, `SWITCHYARD_TEST_S3_SECRET_KEY` and
//! `SWITCHYARD_TEST_S3_REGION` must be set with it. The bucket is shared by every test, so each
//! handle keeps its objects under a key prefix of its own, and tests running at once never see
//! each other's objects; nothing is deleted afterwards, so give it a throwaway bucket.

use std::net::{SocketAddr, TcpListener, TcpStream};
use std::path::PathBuf;
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use switchyard_adapters::store::RemoteConfig;

// The local `s3s-fs`'s bucket, keys and region.
const LOCAL_BUCKET: &str = "adapters";
const LOCAL_ACCESS_KEY: &str = "switchyard-test";
const LOCAL_SECRET_KEY: &str = "switchyard-test-secret";
const LOCAL_REGION: &str = "us-east-1";

/// An S3 server the tests can reach, and the part of its bucket this handle owns. Dropping it
/// stops the local `s3s-fs` and removes its folder; an external server is left as it is.
pub struct S3Server {
    endpoint: String,
    bucket: String,
    region: String,
    access_key: String,
    secret_key: String,
    /// Key prefix of this handle's objects: empty on the local server, which has no other user.
    prefix: String,
    /// `None` on an external server.
    _local: Option<LocalServer>,
}

/// The `s3s-fs` process and the folder it keeps the bucket in.
struct LocalServer {
    child: Child,
    _dir: tempfile::TempDir,
}

fn binary() -> PathBuf {
    if let Some(path) = std::env::var_os("SWITCHYARD_S3S_FS") {
        return PathBuf::from(path);
    }
    let workspace = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("..");
    let path = workspace.join(".cache/tools/bin/s3s-fs");
    assert!(
        path.is_file(),
        "{} is missing: run scripts/install-s3s (scripts/test does) to build the S3 test server",
        path.display()
    );
    path
}

fn required_env(name: &str) -> String {
    std::env::var(name)
        .unwrap_or_else(|_| panic!("SWITCHYARD_TEST_S3_ENDPOINT is set, so {name} must be set too"))
}

/// A key prefix no other handle, in this process or any other run, has used.
fn unique_prefix() -> String {
    static HANDLES: AtomicUsize = AtomicUsize::new(0);
    let nanos = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .unwrap()
        .as_nanos();
    format!(
        "switchyard-test/{nanos}-{}-{}",
        std::process::id(),
        HANDLES.fetch_add(1, Ordering::Relaxed)
    )
}

impl S3Server {
    /// The external server `SWITCHYARD_TEST_S3_ENDPOINT` names, under a fresh key prefix, or
    /// else a new local `s3s-fs`.
    pub fn start() -> Self {
        match std::env::var("SWITCHYARD_TEST_S3_ENDPOINT") {
            Ok(endpoint) => Self {
                endpoint,
                bucket: required_env("SWITCHYARD_TEST_S3_BUCKET"),
                region: required_env("SWITCHYARD_TEST_S3_REGION"),
                access_key: required_env("SWITCHYARD_TEST_S3_ACCESS_KEY"),
                secret_key: required_env("SWITCHYARD_TEST_S3_SECRET_KEY"),
                prefix: unique_prefix(),
                _local: None,
            },
            Err(_) => Self::start_local(),
        }
    }

    /// Starts `s3s-fs` and waits (at most 20 s) until it accepts connections.
    fn start_local() -> Self {
        let dir = tempfile::tempdir().unwrap();
        // s3s-fs keeps a bucket as a folder under its root.
        std::fs::create_dir_all(dir.path().join(LOCAL_BUCKET)).unwrap();
        let port = TcpListener::bind("127.0.0.1:0")
            .unwrap()
            .local_addr()
            .unwrap()
            .port();
        let addr = SocketAddr::from(([127, 0, 0, 1], port));
        let child = Command::new(binary())
            .args(["--host", "127.0.0.1", "--port", &port.to_string()])
            .args(["--access-key", LOCAL_ACCESS_KEY])
            .args(["--secret-key", LOCAL_SECRET_KEY])
            .arg(dir.path())
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("start s3s-fs");
        let mut local = LocalServer { child, _dir: dir };
        let deadline = Instant::now() + Duration::from_secs(20);
        while TcpStream::connect_timeout(&addr, Duration::from_millis(200)).is_err() {
            if let Ok(Some(status)) = local.child.try_wait() {
                panic!("s3s-fs exited at start: {status}");
            }
            assert!(
                Instant::now() < deadline,
                "s3s-fs did not listen within 20 s"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
        Self {
            endpoint: format!("http://{addr}"),
            bucket: LOCAL_BUCKET.to_owned(),
            region: LOCAL_REGION.to_owned(),
            access_key: LOCAL_ACCESS_KEY.to_owned(),
            secret_key: LOCAL_SECRET_KEY.to_owned(),
            prefix: String::new(),
            _local: Some(local),
        }
    }

    pub fn endpoint(&self) -> &str {
        &self.endpoint
    }

    pub fn bucket(&self) -> &str {
        &self.bucket
    }

    pub fn region(&self) -> &str {
        &self.region
    }

    pub fn access_key(&self) -> &str {
        &self.access_key
    }

    pub fn secret_key(&self) -> &str {
        &self.secret_key
    }

    /// The bucket key of `path` inside this handle's part of the bucket: what a test that
    /// talks to the bucket directly, or names a store's prefix, must use.
    pub fn key(&self, path: &str) -> String {
        match (self.prefix.is_empty(), path.is_empty()) {
            (true, _) => path.to_owned(),
            (false, true) => self.prefix.clone(),
            (false, false) => format!("{}/{path}", self.prefix),
        }
    }

    /// The store's settings for this server, with the store under `prefix`.
    pub fn config(&self, prefix: &str) -> RemoteConfig {
        RemoteConfig {
            endpoint: Some(self.endpoint.clone()),
            bucket: self.bucket.clone(),
            prefix: self.key(prefix),
            region: self.region.clone(),
            access_key_id: Some(self.access_key.clone()),
            secret_access_key: Some(self.secret_key.clone()),
        }
    }
}

impl Drop for LocalServer {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
