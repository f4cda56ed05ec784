//! Tenants and the admin token, through the real server: a request needs a valid key, a tenant
//! sees only its own adapters and splits (and cannot tell whether another tenant's name
//! exists), and the admin API needs the admin token.

use serde_json::json;
use switchyard_tests::fixtures;
use switchyard_tests::server::{ADMIN_TOKEN, Auth, Reply, Server, ServerSetup};

const NORTH_KEY: &str = "north-key-0123456789abcdef";
const SOUTH_KEY: &str = "south-key-0123456789abcdef";

fn two_tenants() -> Server {
    let server = ServerSetup::encoder()
        .tenant("ridgeline-north", NORTH_KEY, &["north-*", "shared-faq"])
        .tenant("ridgeline-south", SOUTH_KEY, &["south-*", "shared-faq"])
        .start();
    let package = fixtures().join("minilm-qv-a.safetensors");
    for name in ["north-routing", "south-routing", "shared-faq"] {
        server.publish(name, &package);
    }
    server
}

fn embed_as(server: &Server, auth: Auth<'_>, target: serde_json::Value) -> Reply {
    let mut body = target;
    body["texts"] = json!(["where is my wheel"]);
    server.post("/embed", auth, &body)
}

#[test]
fn inference_without_a_key_or_with_an_unknown_key_is_401() {
    let server = two_tenants();
    embed_as(&server, Auth::None, json!({"adapter": "base"})).assert_error(401, "missing_key");
    embed_as(
        &server,
        Auth::Bearer("north-key-0123456789abcdeX"),
        json!({"adapter": "base"}),
    )
    .assert_error(401, "unknown_key");
    // The admin token is not a tenant key.
    embed_as(&server, Auth::Admin, json!({"adapter": "base"})).assert_error(401, "unknown_key");
    let outcome = server.post(
        "/outcomes",
        Auth::None,
        &json!({"response_id": "r-0", "value": 1}),
    );
    outcome.assert_error(401, "missing_key");

    let ok = embed_as(&server, Auth::Bearer(SOUTH_KEY), json!({"adapter": "base"})).ok_json();
    assert_eq!(ok["served_by"], "base");
}

#[test]
fn another_tenants_adapter_is_403_and_worded_like_a_name_that_does_not_exist() {
    let server = two_tenants();
    let north = Auth::Bearer(NORTH_KEY);

    let own = embed_as(&server, north, json!({"adapter": "north-routing"})).ok_json();
    assert!(
        own["served_by"]
            .as_str()
            .unwrap()
            .starts_with("north-routing@")
    );
    let shared = embed_as(&server, north, json!({"adapter": "shared-faq"})).ok_json();
    assert!(
        shared["served_by"]
            .as_str()
            .unwrap()
            .starts_with("shared-faq@")
    );

    let existing = embed_as(&server, north, json!({"adapter": "south-routing"}));
    let missing = embed_as(&server, north, json!({"adapter": "south-nowhere"}));
    existing.assert_error(403, "forbidden_target");
    missing.assert_error(403, "forbidden_target");
    // The same words, but for the name itself.
    let message = |r: &Reply, name: &str| {
        r.json()["error"]["message"]
            .as_str()
            .unwrap()
            .replace(name, "NAME")
    };
    assert_eq!(
        message(&existing, "south-routing"),
        message(&missing, "south-nowhere")
    );
    // A split is guarded the same way.
    embed_as(&server, north, json!({"split": "south-rollout"}))
        .assert_error(403, "forbidden_target");

    // Inside its own pattern space, a name that does not exist is simply unknown.
    embed_as(&server, north, json!({"adapter": "north-nowhere"}))
        .assert_error(404, "unknown_target");
}

#[test]
fn admin_endpoints_refuse_a_missing_token_a_wrong_one_and_a_tenant_key() {
    let server = two_tenants();
    let package = std::fs::read(fixtures().join("minilm-qv-b.safetensors")).unwrap();
    let wrong = format!("{ADMIN_TOKEN}-not");
    for (auth, status, code) in [
        (Auth::None, 401, "admin_token_required"),
        (Auth::Bearer(&wrong), 403, "admin_token_wrong"),
        (Auth::Bearer(NORTH_KEY), 403, "admin_token_wrong"),
    ] {
        server
            .get("/admin/adapters", auth)
            .assert_error(status, code);
        server
            .request(
                "PUT",
                "/admin/adapters/north-routing",
                auth,
                Some(("application/octet-stream", &package)),
            )
            .assert_error(status, code);
        server
            .request("POST", "/admin/adapters/north-routing/rollback", auth, None)
            .assert_error(status, code);
        server
            .get("/admin/splits/north-rollout/readout", auth)
            .assert_error(status, code);
    }
    // None of the refused uploads went live: the north tenant is still served the first version.
    let listing = server.get("/admin/adapters", Auth::Admin).ok_json();
    let north = listing["adapters"]
        .as_array()
        .unwrap()
        .iter()
        .find(|a| a["name"] == "north-routing")
        .unwrap_or_else(|| panic!("north-routing is listed: {listing}"));
    assert_eq!(north["versions"].as_array().unwrap().len(), 1, "{north}");
}
