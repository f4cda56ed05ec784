//! Two replicas of the real `switchyard serve` on one adapter store and one PostgreSQL experiment
//! store (a real cluster the test starts): a split created through one replica is assigned by the
//! other at once, outcomes posted to either replica count, and the readout fetched from each
//! replica is the same.

use serde_json::{Value, json};
use switchyard_tests::fixtures;
use switchyard_tests::postgres::Postgres;
use switchyard_tests::server::{Auth, Server, ServerSetup};

#[test]
fn replicas_on_one_postgres_share_splits_outcomes_and_readouts() {
    let pg = Postgres::start();
    let store = tempfile::tempdir().unwrap();
    let start = |name: &str| -> Server {
        ServerSetup::encoder()
            .set("server", "replica", &format!("{name:?}"))
            .set("store", "dir", &format!("{:?}", store.path()))
            .set("experiments", "database", &format!("{:?}", pg.url()))
            .start()
    };
    let (east, west) = (start("east-1"), start("west-1"));
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
