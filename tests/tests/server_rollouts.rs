//! Guarded rollouts through the real server: a candidate version that fails a fifth of its
//! requests is rolled back by the policy on its own (and the adapter's live version with it),
//! with every request answered; a sound candidate is promoted step by step and finally flipped
//! live; a person can pause, resume and override; the history survives a restart; bad policies
//! are refused by field.
//!
//! The failing candidate is a real defect, not an injected one: a version of a classifier
//! published without its classification head. The traffic is four embeddings to one
//! classification, so the candidate fails exactly the classifications (a fifth), the incumbent
//! none.

use std::sync::Mutex;
use std::time::{Duration, Instant};

use serde_json::{Value, json};
use switchyard_tests::server::{Auth, Server, ServerSetup};
use switchyard_tests::{fixtures, workspace_root};

const SPLIT: &str = "desk-rollout";
/// The most requests a test sends before it gives up waiting for the policy.
const MAX_REQUESTS: usize = 1500;
const CLIENTS: usize = 4;
const TEXT: &str = "my rear derailleur skips under load";

fn server() -> Server {
    ServerSetup::encoder()
        .set("experiments", "rollout_check_ms", "100")
        .start()
}

/// Publishes the demo's routing classifier (with its head) and then `candidate` as a second
/// version of adapter `desk`; returns (incumbent version, candidate version). The candidate is
/// live afterwards, as every upload is.
fn two_versions(server: &Server, candidate: &std::path::Path) -> (String, String) {
    let v1 = server.publish(
        "desk",
        &workspace_root().join("demo/adapters/routing.safetensors"),
    );
    let v2 = server.publish("desk", candidate);
    assert_ne!(v1, v2);
    (v1, v2)
}

/// [`two_versions`] with the retrained routing classifier (a second version with a head, so it
/// fails nothing) as the candidate, and the incumbent set live again, so that a flip at the end
/// is the policy's doing.
fn retrained_with_incumbent_live(server: &Server) -> (String, String) {
    let (v1, v2) = two_versions(
        server,
        &workspace_root().join("demo/adapters/routing-retrained.safetensors"),
    );
    let set = server.post(
        "/admin/adapters/desk/live",
        Auth::Admin,
        &json!({"version": v1}),
    );
    assert_eq!(set.status, 200, "{}", set.body);
    (v1, v2)
}

fn put_split(server: &Server, body: &Value) -> switchyard_tests::server::Reply {
    server.request(
        "PUT",
        &format!("/admin/splits/{SPLIT}"),
        Auth::Admin,
        Some(("application/json", body.to_string().as_bytes())),
    )
}

/// Creates the split with arms `incumbent` (version `v1`) and `candidate` (`v2`) at
/// `weights` carrying `rollout`, and checks that it was created.
fn put_rollout(server: &Server, v1: &str, v2: &str, weights: [f64; 2], rollout: Value) {
    let put = put_split(
        server,
        &json!({
            "arms": [
                {"name": "incumbent", "adapter": "desk", "version": v1, "weight": weights[0]},
                {"name": "candidate", "adapter": "desk", "version": v2, "weight": weights[1]},
            ],
            "rollout": rollout,
        }),
    );
    assert_eq!(put.status, 201, "{}", put.body);
}

fn readout(server: &Server) -> Value {
    server
        .get(&format!("/admin/splits/{SPLIT}/readout"), Auth::Admin)
        .ok_json()
}

struct Answer {
    status: u16,
    arm: Option<String>,
    code: String,
    classify: bool,
}

/// Sends request `i` through the split: every fifth a classification, the others embeddings.
fn send(server: &Server, i: usize) -> Answer {
    let classify = i % 5 == 4;
    let path = if classify { "/classify" } else { "/embed" };
    let reply = server
        .try_request(
            "POST",
            path,
            Auth::None,
            Some((
                "application/json",
                json!({"split": SPLIT, "texts": [TEXT]})
                    .to_string()
                    .as_bytes(),
            )),
        )
        .unwrap_or_else(|e| panic!("request {i} got no answer (lost): {e}"));
    let body: Value = serde_json::from_str(&reply.body).unwrap_or(Value::Null);
    Answer {
        status: reply.status,
        arm: body["split"]["arm"].as_str().map(str::to_owned),
        code: body["error"]["code"].as_str().unwrap_or("").to_owned(),
        classify,
    }
}

/// Sends requests from [`CLIENTS`] threads until `done` says so (checked every 20 requests) or
/// [`MAX_REQUESTS`]; returns every answer in the order sent.
fn traffic_until(server: &Server, done: impl Fn(&Value) -> bool + Sync) -> Vec<Answer> {
    let next = Mutex::new(0usize);
    let stop = std::sync::atomic::AtomicBool::new(false);
    let answers = Mutex::new(Vec::new());
    std::thread::scope(|s| {
        for _ in 0..CLIENTS {
            s.spawn(|| {
                loop {
                    if stop.load(std::sync::atomic::Ordering::SeqCst) {
                        return;
                    }
                    let i = {
                        let mut n = next.lock().unwrap();
                        if *n >= MAX_REQUESTS {
                            return;
                        }
                        *n += 1;
                        *n - 1
                    };
                    let answer = send(server, i);
                    answers.lock().unwrap().push((i, answer));
                    if i % 20 == 19 && done(&readout(server)) {
                        stop.store(true, std::sync::atomic::Ordering::SeqCst);
                    }
                }
            });
        }
    });
    let mut answers = answers.into_inner().unwrap();
    answers.sort_by_key(|(i, _)| *i);
    answers.into_iter().map(|(_, a)| a).collect()
}

fn status_of(readout: &Value) -> &str {
    readout["rollout"]["status"].as_str().unwrap_or("")
}

fn live_version(server: &Server, adapter: &str) -> String {
    let list = server.get("/admin/adapters", Auth::Admin).ok_json();
    let entry = list["adapters"]
        .as_array()
        .unwrap()
        .iter()
        .find(|a| a["name"] == adapter)
        .unwrap_or_else(|| panic!("{adapter} not listed: {list}"))
        .clone();
    entry["live"].as_str().unwrap().to_owned()
}

fn metric(server: &Server, line_start: &str) -> Option<f64> {
    let page = server.get("/metrics", Auth::Admin).body;
    page.lines()
        .find(|l| l.starts_with(line_start))
        .and_then(|l| l.rsplit_once(' '))
        .and_then(|(_, v)| v.parse().ok())
}

#[test]
fn a_candidate_failing_a_fifth_of_its_requests_is_rolled_back_by_the_policy_with_every_request_answered()
 {
    let mut server = server();
    let (v1, v2) = two_versions(&server, &fixtures().join("minilm-qv-a.safetensors"));
    assert_eq!(live_version(&server, "desk"), v2, "an upload goes live");
    let min_requests = 40;
    put_rollout(
        &server,
        &v1,
        &v2,
        [0.5, 0.5],
        json!({
            "candidate": "candidate",
            "min_requests": min_requests,
            "guards": {"error_rate": 0.05, "latency_p99_ms": 2000},
            "steps": [0.75],
            "roll_back_live": true,
        }),
    );
    let started = Instant::now();
    let answers = traffic_until(&server, |r| status_of(r) == "rolled_back");
    let took = started.elapsed();
    let after = readout(&server);
    assert_eq!(
        status_of(&after),
        "rolled_back",
        "not rolled back after {} requests: {after:#}\nthe server's warnings and errors:\n{}",
        answers.len(),
        server
            .log()
            .lines()
            .filter(|l| l.contains(" WARN ") || l.contains(" ERROR ") || l.contains("panicked"))
            .collect::<Vec<_>>()
            .join("\n")
    );

    // Every request got an answer: 200, or the candidate's own defect on a classification.
    for (i, a) in answers.iter().enumerate() {
        let defect =
            a.status == 400 && a.code == "not_a_classifier" && a.classify && a.arm.is_none();
        assert!(
            a.status == 200 || defect,
            "request {i}: status {} code {:?} arm {:?}",
            a.status,
            a.code,
            a.arm
        );
    }
    let failed = answers.iter().filter(|a| a.status != 200).count();
    let arms = after["arms"].as_array().unwrap();
    let (incumbent, candidate) = (&arms[0], &arms[1]);
    assert_eq!(incumbent["errors"], 0, "{incumbent:#}");
    assert_eq!(
        candidate["errors"].as_u64().unwrap() as usize,
        failed,
        "the candidate's counted errors are the failed answers"
    );
    let candidate_requests = candidate["finished"].as_u64().unwrap();
    println!(
        "rolled back after {} requests in {:.1} s: candidate {} finished, {} failed ({:.0}%), incumbent {} finished",
        answers.len(),
        took.as_secs_f64(),
        candidate_requests,
        failed,
        100.0 * failed as f64 / candidate_requests as f64,
        incumbent["finished"]
    );
    // The documented sample: nothing before min_requests each; the guard then needs the
    // always-valid interval of the error-share difference above the 5-point margin, which a
    // 20% failure rate reaches within a few hundred candidate requests.
    assert!(
        candidate_requests >= min_requests,
        "acted before the minimum sample: {candidate_requests}"
    );
    assert!(
        candidate_requests <= 400,
        "the guard needed {candidate_requests} candidate requests (README says at most 400 for a 20% failure rate)"
    );

    // The history says who did what and why; the weights and the live version were rolled back.
    let history = after["rollout"]["history"].as_array().unwrap();
    assert_eq!(history[0]["action"], "started", "{history:#?}");
    let last = history.last().unwrap();
    assert_eq!(
        (last["action"].as_str(), last["by"].as_str()),
        (Some("rolled_back"), Some("policy")),
        "{history:#?}"
    );
    assert!(
        last["reason"]
            .as_str()
            .unwrap()
            .contains("error_rate crossed"),
        "{last}"
    );
    assert_eq!(candidate["weight"], 0.0);
    assert_eq!(live_version(&server, "desk"), v1, "live version set back");
    assert_eq!(
        metric(
            &server,
            &format!(
                "switchyard_rollout_actions_total{{split=\"{SPLIT}\",action=\"rolled_back\",by=\"policy\"}}"
            )
        ),
        Some(1.0)
    );
    assert!(server.log().contains("rollout: candidate rolled back"));

    // From now on the split sends everything to the incumbent, and every request succeeds.
    for i in 0..40 {
        let a = send(&server, i);
        assert_eq!((a.status, a.arm.as_deref()), (200, Some("incumbent")));
    }

    // A rolled-back rollout is final: an override says so; the history survives a restart.
    let again = server.post(
        &format!("/admin/splits/{SPLIT}/rollout"),
        Auth::Admin,
        &json!({"action": "promote"}),
    );
    again.assert_error(409, "rollout_not_applicable");
    server.restart();
    let restarted = readout(&server);
    assert_eq!(status_of(&restarted), "rolled_back");
    assert_eq!(restarted["rollout"]["history"], after["rollout"]["history"]);
}

#[test]
fn a_sound_candidate_is_promoted_step_by_step_then_flipped_live_and_a_person_can_pause_and_override()
 {
    let server = server();
    let (v1, v2) = retrained_with_incumbent_live(&server);
    put_rollout(
        &server,
        &v1,
        &v2,
        [0.7, 0.3],
        json!({
            "candidate": "candidate",
            "min_requests": 20,
            "step_requests": 30,
            "guards": {"error_rate": 0.05},
            "steps": [0.5, 0.7],
        }),
    );

    // Paused, nothing acts however much traffic comes.
    let paused = server.post(
        &format!("/admin/splits/{SPLIT}/rollout"),
        Auth::Admin,
        &json!({"action": "pause", "reason": "waiting for the support desk"}),
    );
    assert_eq!(paused.status, 200, "{}", paused.body);
    assert_eq!(paused.json()["event"]["by"], "operator");
    for i in 0..300 {
        assert_eq!(send(&server, i).status, 200);
    }
    std::thread::sleep(Duration::from_millis(400));
    let r = readout(&server);
    assert_eq!(
        (status_of(&r), r["rollout"]["step"].as_u64()),
        ("paused", Some(0))
    );
    assert!(
        r["rollout"]["next"].as_str().unwrap().contains("paused"),
        "{r:#}"
    );
    let resumed = server.post(
        &format!("/admin/splits/{SPLIT}/rollout"),
        Auth::Admin,
        &json!({"action": "resume"}),
    );
    assert_eq!(resumed.status, 200, "{}", resumed.body);

    let answers = traffic_until(&server, |r| status_of(r) == "flipped");
    assert!(answers.iter().all(|a| a.status == 200));
    let done = readout(&server);
    assert_eq!(status_of(&done), "flipped", "{done:#}");
    let history: Vec<(String, String, f64)> = done["rollout"]["history"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            (
                e["action"].as_str().unwrap().to_owned(),
                e["by"].as_str().unwrap().to_owned(),
                e["candidate_share"].as_f64().unwrap(),
            )
        })
        .collect();
    let expected: Vec<(String, String, f64)> = [
        ("started", "operator", 0.3),
        ("paused", "operator", 0.3),
        ("resumed", "operator", 0.3),
        ("promoted", "policy", 0.5),
        ("promoted", "policy", 0.7),
        ("flipped", "policy", 1.0),
    ]
    .iter()
    .map(|(a, b, s)| (a.to_string(), b.to_string(), *s))
    .collect();
    assert_eq!(history.len(), expected.len(), "{history:?}");
    for (got, want) in history.iter().zip(&expected) {
        assert_eq!((&got.0, &got.1), (&want.0, &want.1), "{history:?}");
        assert!((got.2 - want.2).abs() < 1e-9, "{history:?}");
    }
    assert_eq!(
        live_version(&server, "desk"),
        v2,
        "flipped live by the policy"
    );
    let arms = done["arms"].as_array().unwrap();
    assert_eq!(
        (arms[0]["weight"].as_f64(), arms[1]["weight"].as_f64()),
        (Some(0.0), Some(1.0))
    );
    // The split stays as a pass-through to the new version, so clients naming it keep working.
    for i in 0..20 {
        let a = send(&server, i);
        assert_eq!((a.status, a.arm.as_deref()), (200, Some("candidate")));
    }
    assert_eq!(
        metric(
            &server,
            &format!(
                "switchyard_rollout_actions_total{{split=\"{SPLIT}\",action=\"promoted\",by=\"policy\"}}"
            )
        ),
        Some(2.0)
    );
}

#[test]
fn bad_policies_and_overrides_are_refused_by_name() {
    let server = server();
    let (v1, v2) = two_versions(&server, &fixtures().join("minilm-qv-a.safetensors"));
    let arms = json!([
        {"name": "incumbent", "adapter": "desk", "version": v1, "weight": 0.5},
        {"name": "candidate", "adapter": "desk", "version": v2, "weight": 0.5},
    ]);
    let cases = [
        (json!({"candidate": "incumbent"}), "rollout.candidate"),
        (
            json!({"candidate": "candidate", "steps": [0.5, 0.4]}),
            "rollout.steps[1]",
        ),
        (
            json!({"candidate": "candidate", "min_requests": 2}),
            "rollout.min_requests",
        ),
        (
            json!({"candidate": "candidate", "guards": {"error_rate": 1.5}}),
            "rollout.guards.error_rate",
        ),
    ];
    for (policy, field) in cases {
        let reply = put_split(&server, &json!({"arms": arms, "rollout": policy}));
        reply.assert_error(400, "invalid_rollout");
        assert!(reply.body.contains(field), "{field}: {}", reply.body);
    }
    // A misspelt key is named, not ignored.
    let reply = put_split(
        &server,
        &json!({"arms": arms, "rollout": {"candidate": "candidate", "gaurds": {}}}),
    );
    assert_eq!(reply.status, 400, "{}", reply.body);
    assert!(reply.body.contains("gaurds"), "{}", reply.body);
    // Overrides: an unknown split, a split without a policy, an unknown action.
    let path = format!("/admin/splits/{SPLIT}/rollout");
    server
        .post(&path, Auth::Admin, &json!({"action": "pause"}))
        .assert_error(404, "unknown_split");
    assert_eq!(put_split(&server, &json!({"arms": arms})).status, 201);
    server
        .post(&path, Auth::Admin, &json!({"action": "pause"}))
        .assert_error(409, "no_rollout");
    let reply = server.post(&path, Auth::Admin, &json!({"action": "hurry"}));
    assert_eq!(reply.status, 400, "{}", reply.body);
    assert_eq!(
        server
            .post(&path, Auth::None, &json!({"action": "pause"}))
            .status,
        401
    );
    // The server still serves.
    assert_eq!(send(&server, 0).status, 200);
}

/// A candidate that is right more often (the retrained routing version, 95.8% against 79.6% on
/// the demo's traffic, `demo/adapters/README.md`) is promoted by its outcome guard: each step
/// waits until the always-valid interval says the candidate is better, then the last step flips
/// it live.
#[test]
fn a_candidate_that_is_right_more_often_is_promoted_by_its_outcomes_and_flipped_live() {
    let server = server();
    let (v1, v2) = retrained_with_incumbent_live(&server);
    put_rollout(
        &server,
        &v1,
        &v2,
        [0.7, 0.3],
        json!({
            "candidate": "candidate",
            "min_requests": 30,
            "step_requests": 30,
            "guards": {
                "error_rate": 0.05,
                "outcome": {"kind": "yes_no", "better": "higher", "margin": 0.05},
            },
            "steps": [0.5, 0.7],
        }),
    );
    let traffic: Vec<(String, String)> =
        std::fs::read_to_string(workspace_root().join("demo/data/routing-traffic.jsonl"))
            .unwrap()
            .lines()
            .map(|l| {
                let v: Value = serde_json::from_str(l).unwrap();
                (
                    v["text"].as_str().unwrap().to_owned(),
                    v["label"].as_str().unwrap().to_owned(),
                )
            })
            .collect();
    let started = Instant::now();
    let mut sent = 0;
    let mut status = String::new();
    while sent < 2000 && status != "flipped" {
        let (text, label) = &traffic[sent % traffic.len()];
        let answer = server
            .post(
                "/classify",
                Auth::None,
                &json!({"split": SPLIT, "texts": [text]}),
            )
            .ok_json();
        sent += 1;
        let right = answer["results"][0]["label"].as_str() == Some(label.as_str());
        let posted = server.post(
            "/outcomes",
            Auth::None,
            &json!({"response_id": answer["id"], "value": right}),
        );
        assert_eq!(posted.status, 200, "{}", posted.body);
        if sent % 10 == 0 {
            status = status_of(&readout(&server)).to_owned();
        }
    }
    // The last outcomes may wait for the next check.
    let waited = Instant::now();
    while status != "flipped" && waited.elapsed() < Duration::from_secs(3) {
        std::thread::sleep(Duration::from_millis(100));
        status = status_of(&readout(&server)).to_owned();
    }
    let done = readout(&server);
    assert_eq!(status, "flipped", "{:#}", done["rollout"]);
    let actions: Vec<(&str, f64)> = done["rollout"]["history"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            (
                e["action"].as_str().unwrap(),
                e["candidate_share"].as_f64().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        actions,
        vec![
            ("started", 0.3),
            ("promoted", 0.5),
            ("promoted", 0.7),
            ("flipped", 1.0)
        ]
    );
    let arms = done["arms"].as_array().unwrap();
    let right = |a: &Value| a["yes_no"]["summary"]["proportion"].as_f64().unwrap();
    println!(
        "promoted and flipped after {sent} requests in {:.1} s: incumbent right {:.3} of {}, candidate {:.3} of {}",
        started.elapsed().as_secs_f64(),
        right(&arms[0]),
        arms[0]["yes_no"]["summary"]["count"],
        right(&arms[1]),
        arms[1]["yes_no"]["summary"]["count"]
    );
    assert!(right(&arms[1]) > right(&arms[0]));
    assert_eq!(live_version(&server, "desk"), v2);
}
