//! A real S3-compatible server for the object-store tests: `s3s-fs`, started on 127.0.0.1 on a
//! free port over a fresh temporary folder, with one bucket and SigV4 keys, and killed when the
//! handle drops. `scripts/install-s3s` builds it into `.cache/tools/bin`; `SWITCHYARD_S3S_FS`
//! names another binary.

use std::net::{SocketAddr, TcpListener, TcpStream};
use std::path::PathBuf;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use switchyard_adapters::store::RemoteConfig;

pub const BUCKET: &str = "adapters";
pub const ACCESS_KEY: &str = "switchyard-test";
pub const SECRET_KEY: &str = "switchyard-test-secret";

/// A running `s3s-fs`; dropping it stops the process and removes its folder.
pub struct S3Server {
    child: Child,
    addr: SocketAddr,
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

impl S3Server {
    /// Starts the server and waits (at most 20 s) until it accepts connections.
    pub fn start() -> Self {
        let dir = tempfile::tempdir().unwrap();
        // s3s-fs keeps a bucket as a folder under its root.
        std::fs::create_dir_all(dir.path().join(BUCKET)).unwrap();
        let port = TcpListener::bind("127.0.0.1:0")
            .unwrap()
            .local_addr()
            .unwrap()
            .port();
        let addr = SocketAddr::from(([127, 0, 0, 1], port));
        let child = Command::new(binary())
            .args(["--host", "127.0.0.1", "--port", &port.to_string()])
            .args(["--access-key", ACCESS_KEY, "--secret-key", SECRET_KEY])
            .arg(dir.path())
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("start s3s-fs");
        let mut server = Self {
            child,
            addr,
            _dir: dir,
        };
        let deadline = Instant::now() + Duration::from_secs(20);
        while TcpStream::connect_timeout(&addr, Duration::from_millis(200)).is_err() {
            if let Ok(Some(status)) = server.child.try_wait() {
                panic!("s3s-fs exited at start: {status}");
            }
            assert!(
                Instant::now() < deadline,
                "s3s-fs did not listen within 20 s"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
        server
    }

    pub fn endpoint(&self) -> String {
        format!("http://{}", self.addr)
    }

    /// The store's settings for this server, with the store under `prefix`.
    pub fn config(&self, prefix: &str) -> RemoteConfig {
        RemoteConfig {
            endpoint: Some(self.endpoint()),
            bucket: BUCKET.to_owned(),
            prefix: prefix.to_owned(),
            region: "us-east-1".to_owned(),
            access_key_id: Some(ACCESS_KEY.to_owned()),
            secret_access_key: Some(SECRET_KEY.to_owned()),
        }
    }
}

impl Drop for S3Server {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
