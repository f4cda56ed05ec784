//! Shadow traffic through the real server: a split's shadow arm answers nobody, a share of the
//! first arm's requests is run through it after the answer, and how the answers agree lands in
//! the readout as the shadow arm's outcomes (embedding cosine, label agreement, token
//! agreement, first divergence). Answers are never changed, and under load shadow work is skipped and counted.

use std::time::{Duration, Instant};

use serde_json::{Value, json};
use switchyard_tests::server::{Auth, Server, ServerSetup};
use switchyard_tests::{fixtures, workspace_root};

const SPLIT: &str = "desk-shadow";
const TEXTS: [&str; 4] = [
    "my rear derailleur skips under load",
    "can I rent a tandem for the weekend",
    "the invoice charged me twice for the tune-up",
    "the frame cracked after two months, is that covered",
];

fn put_split(server: &Server, arms: Value) {
    let reply = server.request(
        "PUT",
        &format!("/admin/splits/{SPLIT}"),
        Auth::Admin,
        Some((
            "application/json",
            json!({"arms": arms}).to_string().as_bytes(),
        )),
    );
    assert!(reply.status == 200 || reply.status == 201, "{}", reply.body);
}

fn metric(server: &Server, result: &str) -> u64 {
    let start =
        format!("switchyard_shadow_requests_total{{split=\"{SPLIT}\",result=\"{result}\"}}");
    let page = server.get("/metrics", Auth::Admin).body;
    page.lines()
        .find(|l| l.starts_with(&start))
        .and_then(|l| l.rsplit_once(' '))
        .map(|(_, v)| v.parse::<f64>().unwrap() as u64)
        .unwrap_or(0)
}

/// Waits until `n` shadow requests ran or failed (they run after the answers left).
fn wait_for_shadows(server: &Server, n: u64) {
    let start = Instant::now();
    while metric(server, "ran") + metric(server, "failed") < n {
        assert!(
            start.elapsed() < Duration::from_secs(60),
            "only {} of {n} shadow requests ran; log:\n{}",
            metric(server, "ran"),
            server.log()
        );
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn readout(server: &Server) -> Value {
    server
        .get(&format!("/admin/splits/{SPLIT}/readout"), Auth::Admin)
        .ok_json()
}

fn send(server: &Server, path: &str, text: &str) -> Value {
    server
        .post(path, Auth::None, &json!({"split": SPLIT, "texts": [text]}))
        .ok_json()
}

#[test]
fn a_shadow_arm_measures_agreement_without_changing_an_answer_and_stops_under_load() {
    let server = ServerSetup::encoder()
        .set("experiments", "shadow_max_in_flight", "1")
        .start();
    let v1 = server.publish(
        "desk",
        &workspace_root().join("demo/adapters/routing.safetensors"),
    );
    let v2 = server.publish(
        "desk",
        &workspace_root().join("demo/adapters/routing-retrained.safetensors"),
    );
    let incumbent = json!({"name": "incumbent", "adapter": "desk", "version": v1, "weight": 1.0});

    // The answers without a shadow, to compare with.
    put_split(&server, json!([incumbent]));
    let plain: Vec<(Value, Value)> = TEXTS
        .iter()
        .map(|t| (send(&server, "/embed", t), send(&server, "/classify", t)))
        .collect();

    // A shadow of the very same version: agreement must be exact (cosine 1, same labels).
    put_split(
        &server,
        json!([incumbent, {"name": "mirror", "adapter": "desk", "version": v1, "weight": 0.0, "shadow": 1.0}]),
    );
    for (i, t) in TEXTS.iter().enumerate() {
        // One at a time, so the server is idle and every mirror runs.
        let e = send(&server, "/embed", t);
        wait_for_shadows(&server, 2 * i as u64 + 1);
        let c = send(&server, "/classify", t);
        wait_for_shadows(&server, 2 * i as u64 + 2);
        assert_eq!(e["split"]["arm"], "incumbent");
        assert_eq!(e["served_by"], format!("desk@{v1}"));
        assert_eq!(
            e["embeddings"], plain[i].0["embeddings"],
            "a shadow changed an answer"
        );
        assert_eq!(
            c["results"], plain[i].1["results"],
            "a shadow changed an answer"
        );
    }
    let r = readout(&server);
    let mirror = &r["arms"][1];
    assert_eq!(mirror["shadow"]["share"], 1.0, "{mirror:#}");
    assert_eq!(mirror["requests"], 0, "a shadow arm answers nobody");
    let cos = &mirror["numeric"]["summary"];
    assert_eq!(cos["count"], TEXTS.len());
    assert!(
        (cos["mean"].as_f64().unwrap() - 1.0).abs() < 1e-5,
        "same version, cosine {cos}"
    );
    let labels = &mirror["yes_no"]["summary"];
    assert_eq!(
        (labels["count"].as_u64(), labels["successes"].as_u64()),
        (Some(4), Some(4))
    );

    // A shadow of the retrained version: its embeddings differ, so the cosine is below 1.
    put_split(
        &server,
        json!([incumbent, {"name": "retrained", "adapter": "desk", "version": v2, "weight": 0.0, "shadow": 1.0}]),
    );
    let before = metric(&server, "ran");
    for (i, t) in TEXTS.iter().enumerate() {
        send(&server, "/embed", t);
        wait_for_shadows(&server, before + i as u64 + 1);
    }
    let r = readout(&server);
    let cos = &r["arms"][1]["numeric"]["summary"];
    let mean = cos["mean"].as_f64().unwrap();
    println!(
        "shadow cosine of the retrained version against the incumbent: {mean:.4} over {} texts",
        cos["count"]
    );
    assert!(mean < 0.9999 && mean > 0.0, "{cos}");

    // Under load (8 clients at once, at most one shadow request in flight, none while anything
    // waits), mirrors are skipped and counted; every client still gets its answer.
    let skipped_before = metric(&server, "skipped_busy");
    std::thread::scope(|s| {
        for c in 0..8 {
            let server = &server;
            s.spawn(move || {
                for i in 0..6 {
                    let a = send(server, "/embed", TEXTS[(c + i) % TEXTS.len()]);
                    assert_eq!(a["split"]["arm"], "incumbent");
                }
            });
        }
    });
    let skipped = metric(&server, "skipped_busy") - skipped_before;
    println!("under load: {skipped} of 48 mirrors skipped");
    assert!(skipped > 0, "no mirror was skipped under load");
    // Shadow work is not counted as requests of the adapter.
    let page = server.get("/metrics", Auth::Admin).body;
    assert!(page.contains("switchyard_shadow_requests_total"), "{page}");
}

#[test]
fn a_shadow_arm_of_a_decoder_measures_token_agreement() {
    let server = ServerSetup::tiny_decoder().start();
    let v1 = server.publish("helper", &fixtures().join("tiny-llama-qv.safetensors"));
    let v2 = server.publish("helper", &fixtures().join("tiny-llama-all.safetensors"));
    let arms = |shadow: &str| {
        json!({"arms": [
            {"name": "incumbent", "adapter": "helper", "version": v1, "weight": 1.0},
            {"name": "mirror", "adapter": "helper", "version": shadow, "weight": 0.0, "shadow": 1.0},
        ]})
    };
    let generate = |server: &Server, stream: bool| {
        let body =
            json!({"split": SPLIT, "prompt": "the chain", "max_tokens": 12, "stream": stream});
        if stream {
            let events = server.post_sse("/generate", Auth::None, &body);
            assert!(events.iter().any(|e| e.event == "done"), "{events:?}");
        } else {
            server.post("/generate", Auth::None, &body).ok_json();
        }
    };
    let reply = server.request(
        "PUT",
        &format!("/admin/splits/{SPLIT}"),
        Auth::Admin,
        Some(("application/json", arms(&v1).to_string().as_bytes())),
    );
    assert_eq!(reply.status, 201, "{}", reply.body);
    generate(&server, false);
    wait_for_shadows(&server, 1);
    generate(&server, true);
    wait_for_shadows(&server, 2);
    let r = readout(&server);
    let exact = &r["arms"][1]["yes_no"]["summary"];
    assert_eq!(
        (exact["count"].as_u64(), exact["successes"].as_u64()),
        (Some(2), Some(2)),
        "greedy decoding of the same version gives the same tokens: {exact}"
    );
    let first = &r["arms"][1]["numeric"]["summary"];
    assert_eq!(first["count"], 2);
    assert_eq!(
        first["mean"], 12.0,
        "identical outputs: the divergence is at their length (max_tokens)"
    );

    let reply = server.request(
        "PUT",
        &format!("/admin/splits/{SPLIT}"),
        Auth::Admin,
        Some(("application/json", arms(&v2).to_string().as_bytes())),
    );
    assert_eq!(reply.status, 200, "{}", reply.body);
    generate(&server, false);
    wait_for_shadows(&server, 3);
    let r = readout(&server);
    // A new arm record: the shadow now serves another version.
    let exact = &r["arms"][1]["yes_no"]["summary"];
    let first = &r["arms"][1]["numeric"]["summary"];
    println!("another version: same tokens {exact}, first divergence {first}");
    assert_eq!(
        (exact["count"].as_u64(), first["count"].as_u64()),
        (Some(1), Some(1))
    );
    let position = first["mean"].as_f64().unwrap();
    assert!((0.0..=12.0).contains(&position), "{first}");
    assert_eq!(
        exact["successes"].as_u64() == Some(1),
        position == 12.0,
        "same tokens exactly when they never diverge"
    );
}
