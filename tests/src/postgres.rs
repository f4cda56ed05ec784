//! A real PostgreSQL server for a test: Debian's `postgresql` binaries (scripts/test installs the
//! package when missing), a fresh cluster in a temporary folder, listening on 127.0.0.1 on a free
//! port, stopped when the handle drops. PostgreSQL refuses to run as root, so under root the
//! cluster belongs to `nobody` and its programs run through `runuser`.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

/// A running PostgreSQL cluster.
pub struct Postgres {
    child: Child,
    port: u16,
    bin: PathBuf,
    dir: tempfile::TempDir,
}

/// The folder of `initdb` and `postgres`: Debian keeps them under /usr/lib/postgresql/N/bin.
fn bin_dir() -> PathBuf {
    let mut found: Vec<PathBuf> = std::fs::read_dir("/usr/lib/postgresql")
        .map(|d| {
            d.filter_map(|e| e.ok().map(|e| e.path().join("bin")))
                .collect()
        })
        .unwrap_or_default();
    found.retain(|p| p.join("initdb").is_file() && p.join("postgres").is_file());
    found.sort();
    found.pop().unwrap_or_else(|| {
        panic!(
            "PostgreSQL is not installed (no /usr/lib/postgresql/*/bin/initdb): scripts/test installs it (apt-get install postgresql)"
        )
    })
}

fn is_root() -> bool {
    let out = Command::new("id").arg("-u").output().expect("run id -u");
    String::from_utf8_lossy(&out.stdout).trim() == "0"
}

/// `program args...`, as `nobody` when this process is root.
fn command(program: &Path) -> Command {
    if is_root() {
        let mut c = Command::new("runuser");
        c.args(["-u", "nobody", "--"]).arg(program);
        c
    } else {
        Command::new(program)
    }
}

impl Postgres {
    /// Creates and starts a cluster with one database, `switchyard`, whose user `switchyard`
    /// connects without a password (trust, on 127.0.0.1 only).
    pub fn start() -> Self {
        let bin = bin_dir();
        let dir = tempfile::tempdir().unwrap();
        let data = dir.path().join("data");
        if is_root() {
            let status = Command::new("chown")
                .arg("nobody:")
                .arg(dir.path())
                .status()
                .expect("run chown");
            assert!(status.success(), "chown nobody: {}", dir.path().display());
        }
        let out = command(&bin.join("initdb"))
            .arg("-D")
            .arg(&data)
            .args([
                "-U",
                "switchyard",
                "--auth=trust",
                "-E",
                "UTF8",
                "--no-sync",
            ])
            .output()
            .expect("run initdb");
        assert!(
            out.status.success(),
            "initdb failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        let port = std::net::TcpListener::bind("127.0.0.1:0")
            .unwrap()
            .local_addr()
            .unwrap()
            .port();
        let log = std::fs::File::create(dir.path().join("postgres.log")).unwrap();
        let child = command(&bin.join("postgres"))
            .arg("-D")
            .arg(&data)
            .args(["-p", &port.to_string(), "-c", "listen_addresses=127.0.0.1"])
            .arg("-k")
            .arg(dir.path())
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .expect("start postgres");
        let pg = Postgres {
            child,
            port,
            bin,
            dir,
        };
        let begin = Instant::now();
        loop {
            if let Ok(mut c) = postgres::Client::connect(&pg.url_of("postgres"), postgres::NoTls) {
                c.batch_execute("CREATE DATABASE switchyard").unwrap();
                break;
            }
            assert!(
                begin.elapsed() < Duration::from_secs(30),
                "PostgreSQL did not start: {}",
                pg.log()
            );
            std::thread::sleep(Duration::from_millis(50));
        }
        pg
    }

    fn url_of(&self, database: &str) -> String {
        format!("postgres://switchyard@127.0.0.1:{}/{database}", self.port)
    }

    /// The URL of the `switchyard` database.
    pub fn url(&self) -> String {
        self.url_of("switchyard")
    }

    /// A fresh empty database of its own, for one test of several sharing the cluster.
    pub fn database(&self, name: &str) -> String {
        let mut c = postgres::Client::connect(&self.url(), postgres::NoTls).unwrap();
        c.batch_execute(&format!("CREATE DATABASE {name}")).unwrap();
        self.url_of(name)
    }

    pub fn log(&self) -> String {
        std::fs::read_to_string(self.dir.path().join("postgres.log")).unwrap_or_default()
    }
}

impl Drop for Postgres {
    fn drop(&mut self) {
        // Through pg_ctl: under root the child is `runuser`, and killing it leaves the server
        // running. An immediate stop is all a test's throwaway cluster needs.
        let _ = command(&self.bin.join("pg_ctl"))
            .arg("-D")
            .arg(self.dir.path().join("data"))
            .args(["stop", "-m", "immediate", "-w"])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status();
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
