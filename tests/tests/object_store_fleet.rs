//! Two `switchyard serve` replicas on one object store (a real `s3s-fs` on 127.0.0.1): a version
//! published through one replica's admin API is served by the other within 2 s, and the other's
//! `/metrics` shows the package cache, the disk tier in front of the object store.

// The adapter store's own S3 test server helper, shared rather than copied.
#[path = "../../adapters-store/tests/common/s3.rs"]
#[allow(dead_code)]
mod s3;

use std::time::{Duration, Instant};

use serde_json::json;
use switchyard_tests::fixtures;
use switchyard_tests::server::{Auth, Server, ServerSetup};

fn replica(server: &s3::S3Server) -> Server {
    // A TOML string; Rust's `{:?}` quotes these plain values the same way.
    let text = |value: &str| format!("{value:?}");
    ServerSetup::encoder()
        .set("store", "bucket", &text(server.bucket()))
        .set("store", "endpoint", &text(server.endpoint()))
        .set("store", "prefix", &text(&server.key("fleet")))
        .set("store", "region", &text(server.region()))
        .set("store", "access_key_id", &text(server.access_key()))
        .env("SWITCHYARD_STORE_SECRET_ACCESS_KEY", server.secret_key())
        .start()
}

fn served_by(server: &Server) -> String {
    let reply = server.embed(json!({"adapter": "north-routing"}), &["where is my parcel"]);
    assert_eq!(reply.status, 200, "{}", reply.body);
    reply.json()["served_by"].as_str().unwrap().to_owned()
}

#[test]
fn a_version_published_through_one_replica_is_served_by_the_other_within_two_seconds() {
    let s3 = s3::S3Server::start();
    let a = replica(&s3);
    let b = replica(&s3);
    let v1 = a.publish("north-routing", &fixtures().join("minilm-qv-a.safetensors"));
    assert_eq!(served_by(&b), format!("north-routing@{v1}"));
    let v2 = a.publish("north-routing", &fixtures().join("minilm-qv-b.safetensors"));
    assert_ne!(v1, v2);
    let start = Instant::now();
    while served_by(&b) != format!("north-routing@{v2}") {
        assert!(
            start.elapsed() < Duration::from_secs(2),
            "replica b still serves {v1} 2 s after the publish"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
    let page = b.get("/metrics", Auth::Admin).body;
    for line in [
        "switchyard_cache_events_total{tier=\"disk\",outcome=\"miss\"} 2",
        "switchyard_package_cache_limit_bytes 4294967296",
    ] {
        assert!(page.contains(line), "{line} missing from\n{page}");
    }
    switchyard_tests::assert_promtool_accepts(&page);
    // The secret key is in neither replica's log.
    for server in [&a, &b] {
        let log = std::fs::read_to_string(server.dir().join("server.log")).unwrap();
        assert!(!log.contains(s3.secret_key()), "{log}");
    }
}
