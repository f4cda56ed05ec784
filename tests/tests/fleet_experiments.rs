//! Two replicas of the real `switchyard serve` on one adapter store and one PostgreSQL experiment
//! store (a real cluster the test starts): a split created through one replica is assigned by the
//! other at once, outcomes posted to either replica count, and the readout fetched from each
//! replica is the same.

use serde_json::{Value, json};
use switchyard_tests::fixtures;
use switchyard_tests::postgres::Postgres;
use switchyard_tests::server::{Auth, Server, ServerSetup};

/// A replica named `name` on the adapter store in `store` and the experiments in `pg`, with
/// `more` settings.
fn replica(
    name: &str,
    store: &tempfile::TempDir,
    pg: &Postgres,
    more: impl Fn(ServerSetup) -> ServerSetup,
) -> Server {
    more(
        ServerSetup::encoder()
            .set("server", "replica", &format!("{name:?}"))
            .set("store", "dir", &format!("{:?}", store.path()))
            .set("experiments", "database", &format!("{:?}", pg.url())),
    )
    .start()
}

#[test]
fn replicas_on_one_postgres_share_splits_outcomes_and_readouts() {
    let pg = Postgres::start();
    let store = tempfile::tempdir().unwrap();
    let (east, west) = (
        replica("east-1", &store, &pg, |s| s),
        replica("west-1", &store, &pg, |s| s),
    );
    assert!(
        east.log().contains("experiments opened (shared"),
        "{}",
        east.log()
    );
    east.publish("fork-advice", &fixtures().join("minilm-qv-a.safetensors"));
    let split = json!({"arms": [
        {"name": "incumbent", "adapter": "base", "weight": 1},
        {"name": "candidate", "adapter": "fork-advice", "weight": 1}
    ]});
    let created = east.request(
        "PUT",
        "/admin/splits/fork-trial",
        Auth::Admin,
        Some(("application/json", split.to_string().as_bytes())),
    );
    assert_eq!(created.status, 201, "{}", created.body);

    // The other replica assigns it at once: not knowing the split, it reads the shared
    // definitions again before refusing (its periodic reload comes only every second).
    let embed = |server: &Server, subject: &str| {
        server.post(
            "/embed",
            Auth::None,
            &json!({"split": "fork-trial", "subject": subject, "texts": ["Is my wheel true?"]}),
        )
    };
    let answer = embed(&west, "rider-0");
    assert_eq!(
        answer.status, 200,
        "west does not know the split east has just created: {}",
        answer.body
    );
    // A split no replica has is still refused, by name.
    let unknown = west.post(
        "/embed",
        Auth::None,
        &json!({"split": "no-such-trial", "texts": ["Is my wheel true?"]}),
    );
    unknown.assert_error(404, "unknown_split");

    // Twenty requests through each replica, each outcome posted to the other one.
    for i in 0..40 {
        let (serving, posting) = if i % 2 == 0 {
            (&east, &west)
        } else {
            (&west, &east)
        };
        let answer = embed(serving, &format!("rider-{i}")).ok_json();
        let id = answer["id"].as_str().unwrap();
        let arm = answer["split"]["arm"].as_str().unwrap();
        let value = if arm == "candidate" { 4.0 } else { 3.0 } + (i % 3) as f64;
        let posted = posting.post(
            "/outcomes",
            Auth::None,
            &json!({"response_id": id, "value": value}),
        );
        assert_eq!(posted.status, 200, "{}", posted.body);
    }
    let readout = |server: &Server| -> Value {
        server
            .get("/admin/splits/fork-trial/readout", Auth::Admin)
            .ok_json()
    };
    let (a, b) = (readout(&east), readout(&west));
    assert_eq!(a, b, "the readouts differ between replicas");
    let outcomes: u64 = a["arms"]
        .as_array()
        .unwrap()
        .iter()
        .map(|arm| arm["numeric"]["summary"]["count"].as_u64().unwrap())
        .sum();
    assert_eq!(outcomes, 40, "{a}");
    let requests: u64 = a["arms"]
        .as_array()
        .unwrap()
        .iter()
        .map(|arm| arm["requests"].as_u64().unwrap())
        .sum();
    assert_eq!(requests, 41, "{a}");
}

/// Two replicas on one PostgreSQL both check the rollout every 50 ms; the candidate (a version
/// without the classification head, failing every classification) is rolled back exactly once,
/// by one of them, and both replicas then send the split's traffic to the incumbent.
#[test]
fn replicas_on_one_postgres_roll_a_candidate_back_exactly_once() {
    let pg = Postgres::start();
    let store = tempfile::tempdir().unwrap();
    let every_50_ms = |s: ServerSetup| s.set("experiments", "rollout_check_ms", "50");
    let (east, west) = (
        replica("east-1", &store, &pg, every_50_ms),
        replica("west-1", &store, &pg, every_50_ms),
    );
    let root = switchyard_tests::workspace_root();
    let v1 = east.publish("desk", &root.join("demo/adapters/routing.safetensors"));
    let v2 = east.publish("desk", &fixtures().join("minilm-qv-a.safetensors"));
    let split = json!({
        "arms": [
            {"name": "incumbent", "adapter": "desk", "version": v1, "weight": 1},
            {"name": "candidate", "adapter": "desk", "version": v2, "weight": 1},
        ],
        "rollout": {"candidate": "candidate", "min_requests": 20, "guards": {"error_rate": 0.05}, "steps": [0.75]},
    });
    let created = east.request(
        "PUT",
        "/admin/splits/desk-rollout",
        Auth::Admin,
        Some(("application/json", split.to_string().as_bytes())),
    );
    assert_eq!(created.status, 201, "{}", created.body);
    let status = |server: &Server| -> String {
        server
            .get("/admin/splits/desk-rollout/readout", Auth::Admin)
            .ok_json()["rollout"]["status"]
            .as_str()
            .unwrap()
            .to_owned()
    };
    let mut sent = 0;
    while status(&east) != "rolled_back" {
        assert!(sent < 1000, "not rolled back after {sent} requests");
        let server = if sent % 2 == 0 { &east } else { &west };
        let reply = server.post(
            "/classify",
            Auth::None,
            &json!({"split": "desk-rollout", "texts": ["my chain keeps slipping"]}),
        );
        assert!(
            reply.status == 200 || reply.error_code() == "not_a_classifier",
            "{}",
            reply.body
        );
        sent += 1;
    }
    // Let both replicas check a few more times: neither may act again.
    std::thread::sleep(std::time::Duration::from_millis(500));
    let readout = west
        .get("/admin/splits/desk-rollout/readout", Auth::Admin)
        .ok_json();
    let actions: Vec<&str> = readout["rollout"]["history"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["action"].as_str().unwrap())
        .collect();
    assert_eq!(actions, ["started", "rolled_back"], "{readout:#}");
    let counted = |server: &Server| -> f64 {
        server
            .get("/metrics", Auth::Admin)
            .body
            .lines()
            .find(|l| {
                l.starts_with("switchyard_rollout_actions_total{split=\"desk-rollout\",action=\"rolled_back\"")
            })
            .and_then(|l| l.rsplit_once(' '))
            .map(|(_, v)| v.parse().unwrap())
            .unwrap_or(0.0)
    };
    assert_eq!(
        counted(&east) + counted(&west),
        1.0,
        "exactly one replica acted"
    );
    // Both replicas read the new weights (each reloads the shared definitions every second).
    std::thread::sleep(std::time::Duration::from_millis(1200));
    for server in [&east, &west] {
        for _ in 0..10 {
            let answer = server
                .post(
                    "/classify",
                    Auth::None,
                    &json!({"split": "desk-rollout", "texts": ["my chain keeps slipping"]}),
                )
                .ok_json();
            assert_eq!(answer["split"]["arm"], "incumbent");
        }
    }
}
