//! Crash safety of the real server: `kill -9` at random points of publish, flip, rollback,
//! retire, split edits and outcome posting, 100 times, restarting after each kill and checking
//! what a user relies on:
//!
//! - every adapter's pointer names a version file that exists (so does every rollback entry), the
//!   server serves that version (it loads and validates it), and no unfinished temporary file is
//!   left in the store;
//! - the split reads back as the last definition acknowledged, or as the edit that was in flight
//!   when the process died;
//! - no outcome acknowledged (200 received) before a kill is lost: the tallies hold at least every
//!   acknowledged outcome (and at most one more, the one in flight), posting an acknowledged one
//!   again is refused as already recorded, and a response answered before the kill still takes
//!   its outcome.
//!
//! One worker thread sends a random sequence of those operations (seeded: set
//! SWITCHYARD_CRASH_SEED to replay one) while the test kills the process after a random delay.
//! Traffic goes to 127.0.0.1 only; the run stops after 100 kills and fails past its time limit.

use std::collections::BTreeMap;
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use rand::seq::IndexedRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::{Value, json};
use switchyard_adapters::AdapterName;
use switchyard_adapters::package::Limits;
use switchyard_adapters::store::{Store, TEMP_PREFIX};
use switchyard_tests::fixtures;
use switchyard_tests::server::{Auth, Reply, Server, ServerSetup};

const KILLS: usize = 100;
/// The whole run fails past this, so that it stays bounded on a slow machine.
const TIME_LIMIT: Duration = Duration::from_secs(600);
/// How long the worker runs before the kill, at most.
const MAX_DELAY_MS: u64 = 500;
const ADAPTERS: [&str; 2] = ["crash-a", "crash-b"];
const SPLIT: &str = "crash-trial";
/// Distinct packages (the same factors, another description, so another version).
const VARIANTS: usize = 6;

/// `base` with its description set to `variant N`: a valid package with another content hash.
fn variant(base: &[u8], n: usize) -> Vec<u8> {
    let header_len = u64::from_le_bytes(base[..8].try_into().unwrap()) as usize;
    let mut header: Value = serde_json::from_slice(&base[8..8 + header_len]).unwrap();
    header["__metadata__"]["description"] = json!(format!("crash test variant {n}"));
    let mut text = header.to_string();
    while !text.len().is_multiple_of(8) {
        text.push(' ');
    }
    let mut out = (text.len() as u64).to_le_bytes().to_vec();
    out.extend_from_slice(text.as_bytes());
    out.extend_from_slice(&base[8 + header_len..]);
    out
}

/// What the test knows from acknowledged answers.
#[derive(Debug, Default)]
struct Ledger {
    /// The split's arms as last acknowledged, and an edit sent but not acknowledged.
    split_acked: Option<Value>,
    split_in_flight: Option<Value>,
    /// Outcomes acknowledged in all, and whether one was in flight at the kill.
    outcomes_acked: u64,
    outcome_in_flight: Option<String>,
    /// Outcomes acknowledged since the last kill: posting them again must be refused.
    recent_outcomes: Vec<String>,
    /// Responses answered (200) whose outcome was not posted.
    unposted: Vec<String>,
    /// Per operation: (acknowledged, sent).
    ops: BTreeMap<&'static str, (u64, u64)>,
}

impl Ledger {
    fn count(&mut self, op: &'static str, acknowledged: bool) {
        let entry = self.ops.entry(op).or_default();
        entry.1 += 1;
        entry.0 += u64::from(acknowledged);
    }
}

/// Why the worker stopped: the server went away (as the test killed it).
struct Gone;

/// One request; a transport failure means the server is gone, which must be the test's kill.
fn send(
    server: &Server,
    killed: &AtomicBool,
    method: &str,
    path: &str,
    body: Option<(&str, &[u8])>,
) -> Result<Reply, Gone> {
    match server.try_request(method, path, Auth::Admin, body) {
        Ok(reply) => Ok(reply),
        Err(e) => {
            assert!(
                killed.load(Ordering::SeqCst),
                "{method} {path} failed before the kill: {e}; the server died on its own. Log:\n{}",
                server.log()
            );
            Err(Gone)
        }
    }
}

fn send_json(
    server: &Server,
    killed: &AtomicBool,
    method: &str,
    path: &str,
    body: &Value,
) -> Result<Reply, Gone> {
    let text = body.to_string();
    send(
        server,
        killed,
        method,
        path,
        Some(("application/json", text.as_bytes())),
    )
}

/// Every stored version of each adapter, and the live one.
fn adapters_view(
    server: &Server,
    killed: &AtomicBool,
) -> Result<Vec<(String, String, Vec<String>)>, Gone> {
    let reply = send(server, killed, "GET", "/admin/adapters", None)?;
    assert_eq!(reply.status, 200, "{}", reply.body);
    Ok(reply.json()["adapters"]
        .as_array()
        .unwrap()
        .iter()
        .map(|a| {
            let versions = a["versions"]
                .as_array()
                .unwrap()
                .iter()
                .map(|v| v["version"].as_str().unwrap().to_owned())
                .collect();
            (
                a["name"].as_str().unwrap().to_owned(),
                a["live"].as_str().unwrap_or_default().to_owned(),
                versions,
            )
        })
        .collect())
}

/// Random operations until the server is killed.
fn worker(
    server: &Server,
    killed: &AtomicBool,
    ledger: &mut Ledger,
    rng: &mut ChaCha8Rng,
    packages: &[Vec<u8>],
) -> Result<(), Gone> {
    loop {
        match rng.random_range(0..8) {
            0 => {
                let name = ADAPTERS.choose(rng).unwrap();
                let package = packages.choose(rng).unwrap();
                let reply = send(
                    server,
                    killed,
                    "PUT",
                    &format!("/admin/adapters/{name}"),
                    Some(("application/octet-stream", package)),
                )?;
                // 200 when these bytes were live already (nothing changes).
                assert!(
                    [200, 201].contains(&reply.status),
                    "publish: {}",
                    reply.body
                );
                ledger.count("publish", true);
            }
            1 => {
                let view = adapters_view(server, killed)?;
                let (name, _, versions) = view.choose(rng).unwrap();
                let version = versions.choose(rng).unwrap();
                let reply = send_json(
                    server,
                    killed,
                    "POST",
                    &format!("/admin/adapters/{name}/live"),
                    &json!({"version": version}),
                )?;
                assert_eq!(reply.status, 200, "flip: {}", reply.body);
                ledger.count("flip", true);
            }
            2 => {
                let name = ADAPTERS.choose(rng).unwrap();
                let path = format!("/admin/adapters/{name}/rollback");
                let reply = send(server, killed, "POST", &path, None)?;
                assert!(
                    [200, 409].contains(&reply.status),
                    "rollback: {}",
                    reply.body
                );
                ledger.count("rollback", reply.status == 200);
            }
            3 => {
                let view = adapters_view(server, killed)?;
                let (name, live, versions) = view.choose(rng).unwrap();
                let Some(version) = versions
                    .iter()
                    .filter(|v| *v != live)
                    .collect::<Vec<_>>()
                    .choose(rng)
                    .copied()
                else {
                    continue;
                };
                let path = format!("/admin/adapters/{name}/versions/{version}");
                let reply = send(server, killed, "DELETE", &path, None)?;
                // 409 when a split arm holds it.
                assert!([204, 409].contains(&reply.status), "retire: {}", reply.body);
                ledger.count("retire", reply.status == 204);
            }
            4 => {
                let view = adapters_view(server, killed)?;
                let arms: Vec<Value> = (0..rng.random_range(1..=3))
                    .map(|i| {
                        let mut arm = json!({
                            "name": format!("arm-{i}"),
                            "weight": *[0.5, 1.0, 2.0].choose(rng).unwrap(),
                        });
                        let serves_adapter = rng.random_bool(0.7);
                        match view.choose(rng).filter(|_| serves_adapter) {
                            Some((name, _, versions)) => {
                                arm["adapter"] = json!(name);
                                if rng.random_bool(0.3) {
                                    arm["version"] = json!(versions.choose(rng).unwrap());
                                }
                            }
                            None => arm["adapter"] = json!("base"),
                        }
                        arm
                    })
                    .collect();
                let arms = Value::Array(arms);
                ledger.split_in_flight = Some(arms.clone());
                let reply = send_json(
                    server,
                    killed,
                    "PUT",
                    &format!("/admin/splits/{SPLIT}"),
                    &json!({ "arms": arms }),
                )?;
                ledger.split_in_flight = None;
                assert_eq!(reply.status, 200, "split edit: {}", reply.body);
                ledger.split_acked = Some(arms);
                ledger.count("split edit", true);
            }
            _ => {
                let subject = format!("rider-{}", rng.random::<u32>());
                let body = json!({"split": SPLIT, "subject": subject, "texts": ["brake bleed"]});
                let reply = send_json(server, killed, "POST", "/embed", &body)?;
                assert_eq!(reply.status, 200, "split request: {}", reply.body);
                let id = reply.json()["id"].as_str().unwrap().to_owned();
                if rng.random_bool(0.25) {
                    ledger.unposted.push(id);
                    continue;
                }
                let value = if rng.random_bool(0.5) {
                    json!(rng.random_range(1..=5))
                } else {
                    json!(rng.random_bool(0.5))
                };
                ledger.outcome_in_flight = Some(id.clone());
                let reply = send_json(
                    server,
                    killed,
                    "POST",
                    "/outcomes",
                    &json!({"response_id": id, "value": value}),
                )?;
                ledger.outcome_in_flight = None;
                assert_eq!(reply.status, 200, "outcome: {}", reply.body);
                ledger.outcomes_acked += 1;
                ledger.recent_outcomes.push(id);
                ledger.count("outcome", true);
            }
        }
    }
}

/// Every file name in the adapter folders of the store, as `adapter/file`.
fn store_files(store: &Path) -> Vec<String> {
    let mut files = Vec::new();
    for dir in std::fs::read_dir(store).unwrap().flatten() {
        if dir.path().is_dir() {
            for file in std::fs::read_dir(dir.path()).unwrap().flatten() {
                files.push(format!(
                    "{}/{}",
                    dir.file_name().to_string_lossy(),
                    file.file_name().to_string_lossy()
                ));
            }
        }
    }
    files
}

fn total_outcomes(readout: &Value) -> u64 {
    ["arms", "replaced_arms"]
        .iter()
        .flat_map(|k| readout[*k].as_array().unwrap())
        .map(|arm| {
            arm["numeric"]["summary"]["count"].as_u64().unwrap()
                + arm["yes_no"]["summary"]["count"].as_u64().unwrap()
        })
        .sum()
}

/// The checks after each restart; `cycle` labels failures.
fn verify(server: &Server, ledger: &mut Ledger, cycle: usize) {
    let store_dir = server.dir().join("store");
    let leftovers: Vec<String> = store_files(&store_dir)
        .into_iter()
        .filter(|f| f.contains(TEMP_PREFIX))
        .collect();
    assert!(
        leftovers.is_empty(),
        "cycle {cycle}: unfinished writes left after the restart: {leftovers:?}"
    );

    let store = Store::open(&store_dir, Limits::default()).unwrap();
    for name in ADAPTERS {
        let adapter = AdapterName::new(name).unwrap();
        let pointer = store
            .pointer(&adapter)
            .unwrap_or_else(|e| {
                panic!("cycle {cycle}: {name}: the pointer does not read back: {e}")
            })
            .unwrap_or_else(|| panic!("cycle {cycle}: {name} lost its pointer"));
        for version in std::iter::once(&pointer.live).chain(&pointer.previous) {
            let path = store.version_path(&adapter, version).unwrap();
            assert!(
                path.is_file(),
                "cycle {cycle}: {name}'s pointer names {version}, which is not stored"
            );
        }
        let reply = server.embed(json!({"adapter": name}), &["brake bleed"]);
        assert_eq!(
            reply.status, 200,
            "cycle {cycle}: the live version of {name} does not serve: {}",
            reply.body
        );
        assert_eq!(
            reply.json()["served_by"],
            json!(format!("{name}@{}", pointer.live))
        );
    }

    let splits = server.get("/admin/splits", Auth::Admin).ok_json();
    let found = splits["splits"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["name"] == SPLIT)
        .map(|s| s["arms"].clone());
    let in_flight = ledger.split_in_flight.is_some() && found == ledger.split_in_flight;
    assert!(
        found == ledger.split_acked || in_flight,
        "cycle {cycle}: the split reads back as {found:?}, neither the acknowledged {:?} nor the in-flight {:?}",
        ledger.split_acked,
        ledger.split_in_flight
    );
    ledger.split_acked = found;
    ledger.split_in_flight = None;

    let readout = server
        .get(&format!("/admin/splits/{SPLIT}/readout"), Auth::Admin)
        .ok_json();
    let total = total_outcomes(&readout);
    let in_flight = u64::from(ledger.outcome_in_flight.is_some());
    assert!(
        (ledger.outcomes_acked..=ledger.outcomes_acked + in_flight).contains(&total),
        "cycle {cycle}: {total} outcomes in the tallies, {} acknowledged ({in_flight} in flight): {readout}",
        ledger.outcomes_acked
    );
    ledger.outcomes_acked = total;
    for id in ledger.recent_outcomes.drain(..) {
        let again = server.post(
            "/outcomes",
            Auth::None,
            &json!({"response_id": id, "value": true}),
        );
        again.assert_error(409, "outcome_recorded");
    }
    // Responses answered before the kill still take their outcome (their records are durable).
    let in_flight_id = ledger.outcome_in_flight.take();
    for id in ledger
        .unposted
        .drain(..)
        .filter(|id| Some(id) != in_flight_id.as_ref())
    {
        let reply = server.post(
            "/outcomes",
            Auth::None,
            &json!({"response_id": id, "value": false}),
        );
        assert_eq!(
            reply.status, 200,
            "cycle {cycle}: a response answered before the kill: {}",
            reply.body
        );
        ledger.outcomes_acked += 1;
    }
    assert_eq!(server.get("/health/ready", Auth::None).status, 200);
}

#[test]
fn kill_9_at_random_points_100_times_loses_nothing_acknowledged() {
    let seed: u64 = std::env::var("SWITCHYARD_CRASH_SEED")
        .ok()
        .map(|s| s.parse().expect("SWITCHYARD_CRASH_SEED is a number"))
        .unwrap_or_else(|| rand::rng().random());
    eprintln!("crash test seed {seed} (SWITCHYARD_CRASH_SEED={seed} replays it)");
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let base = std::fs::read(fixtures().join("minilm-qv-b.safetensors")).unwrap();
    let packages: Vec<Vec<u8>> = (0..VARIANTS).map(|n| variant(&base, n)).collect();

    let mut server = ServerSetup::encoder().start();
    for (name, package) in ADAPTERS.iter().zip(&packages) {
        assert_eq!(server.upload(name, package).status, 201);
    }
    let arms = json!([
        {"name": "arm-0", "adapter": "crash-a", "weight": 1.0},
        {"name": "arm-1", "adapter": "base", "weight": 1.0},
    ]);
    let put = server.request(
        "PUT",
        &format!("/admin/splits/{SPLIT}"),
        Auth::Admin,
        Some((
            "application/json",
            json!({ "arms": arms }).to_string().as_bytes(),
        )),
    );
    assert_eq!(put.status, 201, "{}", put.body);
    let mut ledger = Ledger {
        split_acked: Some(arms),
        ..Ledger::default()
    };

    let started = Instant::now();
    let mut restart_total = Duration::ZERO;
    for cycle in 0..KILLS {
        assert!(
            started.elapsed() < TIME_LIMIT,
            "only {cycle} kills within {TIME_LIMIT:?}; the machine is too slow for this test's bound"
        );
        let delay = Duration::from_millis(rng.random_range(10..=MAX_DELAY_MS));
        let killed = AtomicBool::new(false);
        let mut worker_rng = ChaCha8Rng::seed_from_u64(rng.random());
        std::thread::scope(|s| {
            let w = s.spawn(|| worker(&server, &killed, &mut ledger, &mut worker_rng, &packages));
            std::thread::sleep(delay);
            killed.store(true, Ordering::SeqCst);
            server.signal_kill();
            let _ = w.join().expect("the worker panicked");
        });
        server.kill();
        let restart = Instant::now();
        server.start_again();
        restart_total += restart.elapsed();
        verify(&server, &mut ledger, cycle);
    }
    eprintln!(
        "crash test: {KILLS} kills in {:.0} s (restarts {:.0} s); operations (acknowledged/sent): {:?}; {} outcomes acknowledged",
        started.elapsed().as_secs_f64(),
        restart_total.as_secs_f64(),
        ledger.ops,
        ledger.outcomes_acked
    );
    for op in ["publish", "flip", "split edit", "outcome"] {
        assert!(
            ledger.ops.get(op).is_some_and(|&(acked, _)| acked > 0),
            "the run never completed a {op}: {:?}",
            ledger.ops
        );
    }
}
