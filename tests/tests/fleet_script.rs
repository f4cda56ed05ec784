//! `scripts/fleet` as a user runs it: two replicas on a real s3s-fs object store and a real
//! PostgreSQL behind a real nginx, started in one command. Through the front it prints, the demo
//! adapters it published answer, each adapter on one replica that the answer names; the replicas
//! fetch packages from the object store and share one experiment database (a split readout is the
//! same from both); and Ctrl-C (SIGINT to the script's process group, as a terminal sends it)
//! stops every process it started and removes its folder. All on 127.0.0.1, bounded in time.

use std::collections::{BTreeMap, BTreeSet};
use std::io::{BufRead, BufReader};
use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use serde_json::{Value, json};
use switchyard_tests::server::agent;
/// The example config's tenant key and admin token, which scripts/fleet serves with.
const TENANT_KEY: &str = "example-north-key-not-a-secret";
const ADMIN_TOKEN: &str = "example-admin-token-change-me";

/// The running script. Dropping it (a test that failed midway) stops it as Ctrl-C would, so its
/// clean-up also stops PostgreSQL (which runs in a session of its own), and kills its process
/// group if it is still there after 60 s.
struct Fleet {
    child: Child,
    lines: mpsc::Receiver<String>,
    stderr: PathBuf,
    _logs: tempfile::TempDir,
}

impl Fleet {
    fn signal_group(&self, signal: &str) {
        let _ = Command::new("kill")
            .args([signal, "--", &format!("-{}", self.child.id())])
            .status();
    }

    fn stderr(&self) -> String {
        std::fs::read_to_string(&self.stderr).unwrap_or_default()
    }
}

impl Drop for Fleet {
    fn drop(&mut self) {
        if self.child.try_wait().ok().flatten().is_some() {
            return;
        }
        self.signal_group("-INT");
        let until = Instant::now() + Duration::from_secs(60);
        while Instant::now() < until {
            if let Ok(Some(_)) = self.child.try_wait() {
                return;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        self.signal_group("-KILL");
        let _ = self.child.wait();
    }
}

fn start_fleet(replicas: usize) -> Fleet {
    let repo = Path::new(env!("CARGO_MANIFEST_DIR")).parent().unwrap();
    let logs = tempfile::tempdir().unwrap();
    let stderr = logs.path().join("fleet.stderr");
    let mut child = Command::new(repo.join("scripts/fleet"))
        .args([
            "--replicas",
            &replicas.to_string(),
            "--listen",
            "127.0.0.1:0",
        ])
        .arg("--binary")
        .arg(switchyard_tests::switchyard_bin())
        .env("SWITCHYARD_MODEL_DIR", switchyard_tests::base_model_dir())
        .current_dir(repo)
        .process_group(0)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(std::fs::File::create(&stderr).unwrap())
        .spawn()
        .expect("run scripts/fleet");
    let stdout = child.stdout.take().unwrap();
    let (tx, lines) = mpsc::channel();
    std::thread::spawn(move || {
        for line in BufReader::new(stdout).lines().map_while(Result::ok) {
            if tx.send(line).is_err() {
                break;
            }
        }
    });
    Fleet {
        child,
        lines,
        stderr,
        _logs: logs,
    }
}

/// The printed `label: value` lines of the script's banner, read until the `logs:` line.
fn banner(fleet: &mut Fleet) -> BTreeMap<String, String> {
    let until = Instant::now() + Duration::from_secs(300);
    let mut fields = BTreeMap::new();
    while !fields.contains_key("logs") {
        let left = until.saturating_duration_since(Instant::now());
        match fleet.lines.recv_timeout(left) {
            Ok(line) => {
                if let Some((k, v)) = line.split_once(": ") {
                    fields.insert(k.to_owned(), v.to_owned());
                }
            }
            Err(_) => panic!(
                "scripts/fleet printed no front address within 300 s (exit: {:?}); stderr:\n{}",
                fleet.child.try_wait(),
                fleet.stderr()
            ),
        }
    }
    fields
}

/// Status, `Switchyard-Replica` and body of one request.
fn call(
    agent: &ureq::Agent,
    method: &str,
    url: &str,
    token: &str,
    route: Option<&str>,
    body: Option<&Value>,
) -> (u16, Option<String>, Value) {
    let request = ureq::http::Request::builder()
        .method(method)
        .uri(url)
        .header("Authorization", format!("Bearer {token}"))
        .header("Content-Type", "application/json");
    let request = match route {
        Some(r) => request.header("Switchyard-Route", r),
        None => request,
    };
    let text = body.map(Value::to_string).unwrap_or_default();
    let mut resp = agent
        .run(request.body(text).unwrap())
        .unwrap_or_else(|e| panic!("{method} {url}: {e}"));
    let replica = resp
        .headers()
        .get("switchyard-replica")
        .map(|v| v.to_str().unwrap().to_owned());
    let text = resp.body_mut().read_to_string().unwrap_or_default();
    let body = serde_json::from_str(&text).unwrap_or(Value::String(text));
    (resp.status().as_u16(), replica, body)
}

fn accepts(addr: &str) -> bool {
    std::net::TcpStream::connect_timeout(&addr.parse().unwrap(), Duration::from_millis(300)).is_ok()
}

#[test]
fn scripts_fleet_serves_through_its_front_and_stops_everything_on_ctrl_c() {
    let mut fleet = start_fleet(2);
    let fields = banner(&mut fleet);
    let front = fields["fleet front"].clone();
    let replicas: Vec<String> = fields["replicas"]
        .split_whitespace()
        .map(str::to_owned)
        .collect();
    assert_eq!(replicas.len(), 2, "{fields:?}");
    let agent = agent();

    // The demo adapters, published by the script through the front, answer through it; each
    // adapter's requests land on one replica, which every answer names.
    let mut placed: BTreeMap<&str, BTreeSet<String>> = BTreeMap::new();
    for adapter in ["north-routing", "north-urgency", "north-sentiment"] {
        for _ in 0..5 {
            let body = json!({"adapter": adapter, "texts": ["Is the rear wheel trued yet?"]});
            let (status, replica, answer) = call(
                &agent,
                "POST",
                &format!("{front}/embed"),
                TENANT_KEY,
                Some(adapter),
                Some(&body),
            );
            assert_eq!(status, 200, "{answer}; stderr:\n{}", fleet.stderr());
            let replica = replica.expect("every answer names its replica");
            assert!(
                replica == "replica-1" || replica == "replica-2",
                "{replica}"
            );
            placed.entry(adapter).or_default().insert(replica);
        }
    }
    for (adapter, at) in &placed {
        assert_eq!(at.len(), 1, "{adapter} was served by {at:?}");
    }

    // Both replicas see the same store: the same live version of every demo adapter. The
    // replicas that served requests fetched the packages from the object store.
    let live = |addr: &str| -> BTreeMap<String, String> {
        let (status, _, body) = call(
            &agent,
            "GET",
            &format!("http://{addr}/admin/adapters"),
            ADMIN_TOKEN,
            None,
            None,
        );
        assert_eq!(status, 200, "{body}");
        body["adapters"]
            .as_array()
            .unwrap()
            .iter()
            .map(|a| {
                (
                    a["name"].as_str().unwrap().to_owned(),
                    a["live"].to_string(),
                )
            })
            .collect()
    };
    let first = live(&replicas[0]);
    assert_eq!(first.len(), 3, "{first:?}");
    assert_eq!(first, live(&replicas[1]));
    let fetched: f64 = replicas
        .iter()
        .map(|addr| {
            let (_, _, page) = call(
                &agent,
                "GET",
                &format!("http://{addr}/metrics"),
                ADMIN_TOKEN,
                None,
                None,
            );
            page.as_str()
                .unwrap()
                .lines()
                .find_map(|l| l.strip_prefix("switchyard_package_cache_fetched_bytes_total "))
                .map_or(0.0, |v| v.trim().parse().unwrap())
        })
        .sum();
    assert!(
        fetched > 0.0,
        "no replica fetched a package from the object store"
    );

    // One experiment database: a split created through the front, with outcomes posted
    // through it, reads out the same from both replicas.
    let split = json!({"arms": [
        {"name": "incumbent", "adapter": "north-routing", "weight": 1},
        {"name": "candidate", "adapter": "north-urgency", "weight": 1}]});
    let (status, _, body) = call(
        &agent,
        "PUT",
        &format!("{front}/admin/splits/north-fleet-trial"),
        ADMIN_TOKEN,
        None,
        Some(&split),
    );
    assert_eq!(status, 201, "{body}");
    for i in 0..8 {
        let body = json!({"split": "north-fleet-trial", "subject": format!("rider-{i}"),
            "texts": ["Can I book a brake bleed for Saturday?"]});
        let (status, _, answer) = call(
            &agent,
            "POST",
            &format!("{front}/embed"),
            TENANT_KEY,
            Some("north-fleet-trial"),
            Some(&body),
        );
        assert_eq!(status, 200, "{answer}");
        let response = answer["id"].as_str().expect("a response id");
        let outcome = json!({"response_id": response, "value": i as f64});
        let (status, _, answer) = call(
            &agent,
            "POST",
            &format!("{front}/outcomes"),
            TENANT_KEY,
            None,
            Some(&outcome),
        );
        assert!(status == 200 || status == 201, "{status} {answer}");
    }
    let readout = |addr: &str| {
        let (status, _, body) = call(
            &agent,
            "GET",
            &format!("http://{addr}/admin/splits/north-fleet-trial/readout"),
            ADMIN_TOKEN,
            None,
            None,
        );
        assert_eq!(status, 200, "{body}");
        body
    };
    let a = readout(&replicas[0]);
    assert_eq!(a, readout(&replicas[1]), "the readouts differ");
    let counted: u64 = a["arms"]
        .as_array()
        .unwrap()
        .iter()
        .map(|arm| arm["numeric"]["summary"]["count"].as_u64().unwrap_or(0))
        .sum();
    assert_eq!(counted, 8, "{a}");

    // Ctrl-C: the script exits 0 within 60 s, nothing it started still listens, and its
    // folder is gone.
    let work = PathBuf::from(&fields["logs"]).parent().unwrap().to_owned();
    assert!(work.is_dir());
    let addrs: Vec<String> = replicas
        .iter()
        .cloned()
        .chain([front.trim_start_matches("http://").to_owned()])
        .chain(
            [&fields["object store"], &fields["experiments"]]
                .iter()
                .map(|s| {
                    let s = s.split_whitespace().next().unwrap();
                    let host = s.split("//").nth(1).unwrap();
                    let host = host.rsplit('@').next().unwrap();
                    host.split('/').next().unwrap().to_owned()
                }),
        )
        .collect();
    for addr in &addrs {
        assert!(accepts(addr), "{addr} does not listen while the fleet runs");
    }
    fleet.signal_group("-INT");
    let until = Instant::now() + Duration::from_secs(60);
    let status = loop {
        if let Some(status) = fleet.child.try_wait().unwrap() {
            break status;
        }
        assert!(
            Instant::now() < until,
            "scripts/fleet still runs 60 s after Ctrl-C; stderr:\n{}",
            fleet.stderr()
        );
        std::thread::sleep(Duration::from_millis(100));
    };
    assert!(status.success(), "{status}; stderr:\n{}", fleet.stderr());
    for addr in &addrs {
        assert!(!accepts(addr), "{addr} still listens after Ctrl-C");
    }
    assert!(!work.exists(), "{} was not removed", work.display());
}
