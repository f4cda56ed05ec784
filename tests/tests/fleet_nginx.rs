//! Three replicas of the real `switchyard serve` sharing one adapter store, behind a real nginx
//! running the committed `deploy/nginx/switchyard.conf` (only its addresses replaced): a publish
//! through one replica is served by every replica, each adapter's requests land on one replica
//! (the `Switchyard-Route` header hashed on a ring), every answer names its replica, a header that
//! disagrees with the body is refused, and when the replica serving an adapter is killed with
//! SIGKILL under load, nginx passes its requests to another and no client request fails; started
//! again, the replica rejoins and gets its adapters back. All traffic stays on 127.0.0.1; every
//! loop is bounded in count and time.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use serde_json::{Value, json};
use switchyard_tests::fixtures;
use switchyard_tests::server::{Server, ServerSetup, agent};

/// nginx from Debian's package, as scripts/test unpacks it into target/tools (or one on PATH).
fn nginx_bin() -> PathBuf {
    let repo = Path::new(env!("CARGO_MANIFEST_DIR")).parent().unwrap();
    let unpacked = repo.join("target/tools/usr/sbin/nginx");
    if unpacked.is_file() {
        return unpacked;
    }
    for dir in std::env::var("PATH").unwrap_or_default().split(':') {
        let p = Path::new(dir).join("nginx");
        if p.is_file() {
            return p;
        }
    }
    panic!(
        "nginx is not installed: scripts/test unpacks it (scripts/unpack-deb nginx nginx-common) into {}",
        unpacked.display()
    );
}

/// A free port on 127.0.0.1 (bound, then released for nginx to take).
fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// nginx on the committed config, with `replicas` and `listen` as its addresses.
struct Nginx {
    child: Child,
    url: String,
    dir: tempfile::TempDir,
}

impl Nginx {
    fn start(replicas: &[String]) -> Self {
        let repo = Path::new(env!("CARGO_MANIFEST_DIR")).parent().unwrap();
        let committed = std::fs::read_to_string(repo.join("deploy/nginx/switchyard.conf")).unwrap();
        let port = free_port();
        let mut servers = replicas.iter();
        let config: String = committed
            .lines()
            .map(|line| {
                let t = line.trim_start();
                if t.starts_with("server 127.0.0.1:707") {
                    let addr = servers.next().expect("a replica per server line");
                    line.replace(&t[7..21], addr)
                } else if t == "listen 127.0.0.1:7070;" {
                    line.replace("127.0.0.1:7070", &format!("127.0.0.1:{port}"))
                } else {
                    line.to_owned()
                }
            })
            .collect::<Vec<_>>()
            .join("\n");
        assert!(servers.next().is_none(), "every replica has a server line");
        let dir = tempfile::tempdir().unwrap();
        let conf = dir.path().join("nginx.conf");
        std::fs::write(&conf, config).unwrap();
        let log = std::fs::File::create(dir.path().join("nginx.log")).unwrap();
        let child = Command::new(nginx_bin())
            .arg("-p")
            .arg(dir.path())
            .arg("-c")
            .arg(&conf)
            .arg("-e")
            .arg(dir.path().join("error.log"))
            .arg("-g")
            .arg("daemon off;")
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .expect("start nginx");
        let nginx = Nginx {
            child,
            url: format!("http://127.0.0.1:{port}"),
            dir,
        };
        let start = Instant::now();
        while std::net::TcpStream::connect(("127.0.0.1", port)).is_err() {
            assert!(
                start.elapsed() < Duration::from_secs(10),
                "nginx did not listen: {}",
                nginx.log()
            );
            std::thread::sleep(Duration::from_millis(20));
        }
        nginx
    }

    fn log(&self) -> String {
        std::fs::read_to_string(self.dir.path().join("error.log")).unwrap_or_default()
            + &std::fs::read_to_string(self.dir.path().join("nginx.log")).unwrap_or_default()
    }
}

impl Drop for Nginx {
    /// SIGTERM, nginx's fast shutdown, which stops its worker too (a SIGKILL would end only the
    /// master and leave the worker running); SIGKILL if it has not exited within 5 s.
    fn drop(&mut self) {
        let _ = Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status();
        let until = Instant::now() + Duration::from_secs(5);
        while Instant::now() < until {
            if let Ok(Some(_)) = self.child.try_wait() {
                return;
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// One answer through the front: status, the replica that served it, the body.
struct Answer {
    status: u16,
    replica: Option<String>,
    body: Value,
}

fn embed(agent: &ureq::Agent, url: &str, adapter: &str, route: Option<&str>) -> Answer {
    let mut req = agent
        .post(format!("{url}/embed"))
        .header("Content-Type", "application/json");
    if let Some(r) = route {
        req = req.header("Switchyard-Route", r);
    }
    let body = json!({"adapter": adapter, "texts": ["Is the rear wheel trued yet?"]});
    match req.send(body.to_string()) {
        Ok(mut resp) => {
            let replica = resp
                .headers()
                .get("switchyard-replica")
                .map(|v| v.to_str().unwrap().to_owned());
            let status = resp.status().as_u16();
            let text = resp.body_mut().read_to_string().unwrap_or_default();
            Answer {
                status,
                replica,
                body: serde_json::from_str(&text).unwrap_or(Value::String(text)),
            }
        }
        Err(e) => Answer {
            status: 0,
            replica: None,
            body: Value::String(e.to_string()),
        },
    }
}

#[test]
fn replicas_behind_nginx_keep_adapters_apart_and_survive_a_killed_replica() {
    let store = tempfile::tempdir().unwrap();
    let start = |name: &str| -> Server {
        ServerSetup::encoder()
            .set("server", "replica", &format!("{name:?}"))
            .set("store", "dir", &format!("{:?}", store.path()))
            .start()
    };
    let mut replicas: Vec<Server> = ["north-1", "north-2", "north-3"]
        .iter()
        .map(|n| start(n))
        .collect();
    let addrs: Vec<String> = replicas
        .iter()
        .map(|r| r.url("").trim_start_matches("http://").to_owned())
        .collect();
    let nginx = Nginx::start(&addrs);
    let agent = agent();

    // Twelve adapters, published through the first replica only.
    let package = fixtures().join("minilm-qv-a.safetensors");
    let names: Vec<String> = (0..12).map(|i| format!("route-{i}")).collect();
    for name in &names {
        replicas[0].publish(name, &package);
    }
    // Every replica serves each of them within 2 s (its store watcher polls every 250 ms).
    for (r, replica) in replicas.iter().enumerate() {
        for name in &names {
            let begin = Instant::now();
            loop {
                let a = embed(&agent, &replica.url(""), name, None);
                if a.status == 200 {
                    break;
                }
                assert!(
                    begin.elapsed() < Duration::from_secs(2),
                    "replica {r} does not serve {name} 2 s after the publish: {}",
                    a.body
                );
                std::thread::sleep(Duration::from_millis(50));
            }
        }
    }

    // Affinity: 10 requests per adapter through nginx, each adapter on one replica.
    let mut placed: BTreeMap<&str, BTreeSet<String>> = BTreeMap::new();
    for name in &names {
        for _ in 0..10 {
            let a = embed(&agent, &nginx.url, name, Some(name));
            assert_eq!(a.status, 200, "{}; nginx: {}", a.body, nginx.log());
            let replica = a.replica.expect("every answer names its replica");
            placed.entry(name).or_default().insert(replica);
        }
    }
    for (name, at) in &placed {
        assert_eq!(at.len(), 1, "{name} was served by {at:?}");
    }
    let used: BTreeSet<&String> = placed.values().flatten().collect();
    assert!(used.len() >= 2, "12 adapters all on {used:?}");

    // The body decides: a header naming another adapter is refused, naming both.
    let a = embed(&agent, &nginx.url, "route-0", Some("route-1"));
    assert_eq!(a.status, 400, "{}", a.body);
    assert_eq!(a.body["error"]["code"], "route_mismatch");
    assert!(a.replica.is_some(), "an error names its replica too");

    // The load generator through the front: 100 adapters at Zipf 1.0, each request routed by
    // its adapter. At least 95% of every adapter's requests land on one replica, and the factor
    // bytes the run brought in, summed over the replicas, stay within 1.2x those adapters' bytes
    // held once (they are not loaded everywhere).
    let factors = |r: &Server| -> f64 {
        let page = r
            .get("/metrics", switchyard_tests::server::Auth::Admin)
            .body;
        page.lines()
            .find_map(|l| l.strip_prefix("switchyard_resident_bytes{tier=\"factors\"} "))
            .map_or(0.0, |v| v.trim().parse().unwrap())
    };
    let before: f64 = replicas.iter().map(factors).sum();
    let out = tempfile::tempdir().unwrap();
    let model = switchyard_tests::base_model_dir();
    let run = Command::new(switchyard_tests::switchyard_load_bin())
        .args(["run", "--url", &nginx.url, "--route-header"])
        .args(["--admin-token", switchyard_tests::server::ADMIN_TOKEN])
        .args(["--adapter-prefix", "fleet-", "--adapter-count", "100"])
        .args(["--create-adapters", "--model", model.to_str().unwrap()])
        .args(["--zipf", "1.0", "--texts", "1", "--clients", "2"])
        .args(["--count", "600", "--warmup", "0"])
        .arg("--out")
        .arg(out.path())
        .output()
        .expect("run switchyard-load");
    assert!(
        run.status.success(),
        "switchyard-load run failed:\n{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let report: Value =
        serde_json::from_str(&std::fs::read_to_string(out.path().join("report.json")).unwrap())
            .unwrap();
    let scenario = &report["scenarios"][0];
    assert_eq!(scenario["errors_by_status"], json!({}), "{scenario}");
    let spread = &scenario["replicas"];
    let least = spread["least_top_replica_share"].as_f64().unwrap();
    assert!(
        least >= 0.95,
        "an adapter's requests spread over replicas: {spread}"
    );
    assert_eq!(
        spread["requests_by_replica"].as_object().unwrap().len(),
        3,
        "{spread}"
    );
    let touched = spread["adapters"].as_u64().unwrap() as f64;
    // Rank 8 on attn.q and attn.v of MiniLM: `switchyard plan` gives 294,912 bytes each.
    let brought = replicas.iter().map(factors).sum::<f64>() - before;
    assert!(
        brought <= 1.2 * touched * 294_912.0,
        "{brought} factor bytes for {touched} adapters: loaded on several replicas"
    );
    eprintln!(
        "fleet: {spread}; factor bytes brought in {brought} for {touched} adapters ({:.3} of once)",
        brought / (touched * 294_912.0)
    );

    // Kill the replica that serves route-0 under load: no client request fails.
    let victim_name = placed["route-0"].iter().next().unwrap().clone();
    let victim = ["north-1", "north-2", "north-3"]
        .iter()
        .position(|n| *n == victim_name)
        .unwrap();
    let killed_at = std::sync::OnceLock::new();
    let answers = std::thread::scope(|scope| {
        let load = scope.spawn(|| {
            let agent = switchyard_tests::server::agent();
            let begin = Instant::now();
            let mut answers = Vec::new();
            while begin.elapsed() < Duration::from_secs(4) && answers.len() < 2_000 {
                let name = &names[answers.len() % names.len()];
                let sent = Instant::now();
                let a = embed(&agent, &nginx.url, name, Some(name));
                answers.push((name.clone(), a.status, a.replica, sent));
            }
            answers
        });
        std::thread::sleep(Duration::from_secs(1));
        replicas[victim].signal_kill();
        killed_at.set(Instant::now()).unwrap();
        load.join().unwrap()
    });
    let killed_at = *killed_at.get().unwrap();
    let failed: Vec<_> = answers.iter().filter(|(_, s, _, _)| *s != 200).collect();
    assert!(
        failed.is_empty(),
        "{} of {} requests failed during the kill: {:?}; nginx: {}",
        failed.len(),
        answers.len(),
        &failed[..failed.len().min(5)],
        nginx.log()
    );
    // The killed replica's adapters are served by the others within 2 s of the kill: the first
    // request for each of them sent after the kill was answered by another replica (nginx passed
    // it on), and answered within 2 s of the kill.
    let victims: Vec<&String> = names
        .iter()
        .filter(|n| placed[n.as_str()].contains(&victim_name))
        .collect();
    assert!(!victims.is_empty());
    for name in &victims {
        let (_, _, replica, sent) = answers
            .iter()
            .find(|(n, _, _, sent)| n == *name && *sent >= killed_at)
            .unwrap_or_else(|| panic!("no request for {name} after the kill"));
        assert_ne!(replica.as_deref(), Some(victim_name.as_str()));
        assert!(
            sent.duration_since(killed_at) < Duration::from_secs(2),
            "{name} was first asked for {:?} after the kill",
            sent.duration_since(killed_at)
        );
    }
    let after = embed(&agent, &nginx.url, "route-0", Some("route-0"));
    assert_eq!(after.status, 200);
    assert_ne!(after.replica.as_deref(), Some(victim_name.as_str()));

    // Restarted on its address, the replica rejoins: once nginx's fail_timeout (2 s) has passed,
    // its adapters come back to it (consistent hashing), served from the shared store.
    replicas[victim].kill();
    replicas[victim].start_again_at_same_address();
    let restarted = Instant::now();
    loop {
        let a = embed(&agent, &nginx.url, "route-0", Some("route-0"));
        assert_eq!(a.status, 200, "{}", a.body);
        if a.replica.as_deref() == Some(victim_name.as_str()) {
            break;
        }
        assert!(
            restarted.elapsed() < Duration::from_secs(15),
            "the restarted {victim_name} did not get route-0 back within 15 s; nginx: {}",
            nginx.log()
        );
        std::thread::sleep(Duration::from_millis(200));
    }
    eprintln!(
        "fleet: the restarted {victim_name} served route-0 again {:.2} s after it listened",
        restarted.elapsed().as_secs_f64()
    );
    for name in &victims {
        for _ in 0..5 {
            let a = embed(&agent, &nginx.url, name, Some(name));
            assert_eq!(a.status, 200, "{}", a.body);
            assert_eq!(a.replica.as_deref(), Some(victim_name.as_str()), "{name}");
        }
    }
    assert!(
        answers.len() > 20,
        "the load ran: {} requests",
        answers.len()
    );
}
