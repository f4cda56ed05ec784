//! The HTTP API description (`docs/http-api.json`, OpenAPI 3.1) against the server it describes:
//! the committed copy is what the code makes and what the server answers; an OpenAPI validator
//! from PyPI (openapi-spec-validator) accepts it; every route the server serves is in it and
//! every operation in it is served; and schemathesis (PyPI), a property-based API fuzzer, runs a
//! bounded session against a real server from it with the example config's credentials: no
//! answer may be a 5xx, undocumented, or off its documented schema, and the server still answers
//! a normal request afterwards.
//!
//! Needs tests/api/.venv (`tests/api/setup-venv.sh`, which `scripts/test` runs).
//! `SWITCHYARD_FUZZ_EXAMPLES` sets the fuzzer's examples per operation (default 100); with
//! `SWITCHYARD_FUZZ_SECONDS` set, it keeps fuzzing each server until that many seconds are spent
//! (a longer run). `SWITCHYARD_FUZZ_SEED` repeats a run (the test prints the seed it used).

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use serde_json::{Value, json};
use switchyard_tests::server::{Auth, Server, ServerSetup};
use switchyard_tests::{fixtures, switchyard_ok, workspace_root};

fn committed() -> PathBuf {
    workspace_root().join("docs/http-api.json")
}

fn venv_tool(name: &str) -> PathBuf {
    let tool = workspace_root().join("tests/api/.venv/bin").join(name);
    assert!(
        tool.exists(),
        "{} is missing: run tests/api/setup-venv.sh (scripts/test does)",
        tool.display()
    );
    tool
}

/// The admin token and the first tenant (name, first key, adapter patterns) of the example
/// config, read from the file so the fuzzer uses the credentials users start from.
struct Credentials {
    admin_token: String,
    tenant: String,
    key: String,
    patterns: Vec<String>,
}

fn example_credentials() -> Credentials {
    let text =
        std::fs::read_to_string(workspace_root().join("config/switchyard.example.toml")).unwrap();
    let value_of = |line: &str, key: &str| -> Option<String> {
        let rest = line
            .trim()
            .strip_prefix(key)?
            .trim_start()
            .strip_prefix('=')?;
        Some(rest.trim().to_owned())
    };
    let strings = |list: &str| -> Vec<String> {
        list.trim_matches(['[', ']'])
            .split(',')
            .map(|s| s.trim().trim_matches('"').to_owned())
            .filter(|s| !s.is_empty())
            .collect()
    };
    let mut section = "";
    let (mut admin_token, mut tenant, mut key, mut patterns) = (None, None, None, None);
    for line in text.lines() {
        let trimmed = line.trim();
        if trimmed.starts_with('[') {
            if section == "[[tenants]]" && tenant.is_some() {
                break; // the first tenant is read
            }
            section = trimmed;
            continue;
        }
        match section {
            "[admin]" => {
                if let Some(v) = value_of(line, "token") {
                    admin_token = Some(v.trim_matches('"').to_owned());
                }
            }
            "[[tenants]]" => {
                if let Some(v) = value_of(line, "name") {
                    tenant = Some(v.trim_matches('"').to_owned());
                } else if let Some(v) = value_of(line, "keys") {
                    key = strings(&v).into_iter().next();
                } else if let Some(v) = value_of(line, "adapters") {
                    patterns = Some(strings(&v));
                }
            }
            _ => {}
        }
    }
    Credentials {
        admin_token: admin_token.expect("[admin] token in the example config"),
        tenant: tenant.expect("a [[tenants]] name"),
        key: key.expect("a [[tenants]] key"),
        patterns: patterns.expect("a [[tenants]] adapters list"),
    }
}

fn server_with(setup: ServerSetup, creds: &Credentials) -> Server {
    let patterns: Vec<&str> = creds.patterns.iter().map(String::as_str).collect();
    setup
        .set("admin", "token", &format!("{:?}", creds.admin_token))
        .tenant(&creds.tenant, &creds.key, &patterns)
        .start()
}

/// The committed description is what `switchyard describe-api` prints and what the server
/// answers without credentials, and the validator accepts it as OpenAPI 3.1.
#[test]
fn the_committed_description_is_what_the_server_serves_and_a_validator_accepts_it() {
    let printed = switchyard_ok(&["describe-api"], &workspace_root());
    let file = std::fs::read_to_string(committed()).unwrap();
    assert!(
        printed == file,
        "docs/http-api.json is not what the code describes; regenerate it with \
         `target/debug/switchyard describe-api > docs/http-api.json`"
    );
    let creds = example_credentials();
    let server = server_with(ServerSetup::encoder(), &creds);
    let served = server.get("/reference/http-api.json", Auth::None);
    assert_eq!(served.status, 200);
    assert!(served.body == file, "the served description differs");
    let doc: Value = serde_json::from_str(&file).unwrap();
    assert_eq!(doc["openapi"], "3.1.0");

    let out = Command::new(venv_tool("openapi-spec-validator"))
        .arg(committed())
        .output()
        .unwrap();
    let said =
        String::from_utf8_lossy(&out.stdout).into_owned() + &String::from_utf8_lossy(&out.stderr);
    println!("openapi-spec-validator: {}", said.trim());
    assert!(out.status.success(), "the validator refused it: {said}");
    assert!(said.contains("OK"), "{said}");
}

const METHODS: [&str; 5] = ["get", "put", "post", "delete", "patch"];

/// Every operation in the description is served (never `no_such_endpoint` or
/// `method_not_allowed`), answers only statuses it documents, and every other method on a
/// described path is 405; the router takes every route from the described route groups (its
/// source adds none of its own), so nothing is served that the description lacks.
#[test]
fn every_route_served_is_described_and_every_described_route_is_served() {
    let router_source =
        std::fs::read_to_string(workspace_root().join("server/src/http/mod.rs")).unwrap();
    assert!(
        !router_source.contains(".route(") && !router_source.contains("routing::"),
        "server/src/http/mod.rs adds a route of its own; add it to a route group in \
         server/src/http/description.rs so the description lists it"
    );
    let creds = example_credentials();
    let mut server = server_with(ServerSetup::encoder(), &creds);
    // Bodies sent to routes that do not take them are answered unread; see fresh_connections.
    server.fresh_connections();
    let doc: Value = serde_json::from_str(&std::fs::read_to_string(committed()).unwrap()).unwrap();
    let paths = doc["paths"].as_object().unwrap();
    let mut operations = 0;
    for (path, item) in paths {
        let concrete = path
            .replace("{name}", "north-nothing")
            .replace("{version}", "0000000000000000");
        for method in METHODS {
            let auth = match item.get(method) {
                Some(op) => match op["security"][0].as_object().and_then(|s| s.keys().next()) {
                    Some(scheme) if scheme == "tenant_key" => Auth::Bearer(&creds.key),
                    Some(_) => Auth::Bearer(&creds.admin_token),
                    None => Auth::None,
                },
                None => Auth::Bearer(&creds.admin_token),
            };
            let body = matches!(method, "put" | "post").then_some(("application/json", &b"{}"[..]));
            let reply = server.request(&method.to_uppercase(), &concrete, auth, body);
            let code = serde_json::from_str::<Value>(&reply.body)
                .ok()
                .and_then(|v| v["error"]["code"].as_str().map(str::to_owned))
                .unwrap_or_default();
            match item.get(method) {
                Some(op) => {
                    operations += 1;
                    assert!(
                        reply.status != 405 && code != "no_such_endpoint",
                        "{method} {path}: described but not served ({} {code})",
                        reply.status
                    );
                    assert!(
                        op["responses"].get(reply.status.to_string()).is_some(),
                        "{method} {path}: answered {} ({code}), which it does not document",
                        reply.status
                    );
                }
                None => assert!(
                    reply.status == 405 && code == "method_not_allowed",
                    "{method} {path}: not described but answered {} {code}",
                    reply.status
                ),
            }
        }
    }
    assert!(operations >= 24, "only {operations} operations described");
    server
        .get("/no/such/thing", Auth::None)
        .assert_error(404, "no_such_endpoint");
}

fn env_number(name: &str, default: u64) -> u64 {
    std::env::var(name)
        .ok()
        .map(|v| v.parse().unwrap_or_else(|_| panic!("{name}={v:?}")))
        .unwrap_or(default)
}

/// Runs schemathesis against `server` on the operations `include` selects (a path regex), and
/// returns its summary lines; panics with its whole report when it found anything.
fn fuzz(server: &Server, creds: &Credentials, include: &str, seed: u64, dir: &Path) -> String {
    let examples = env_number("SWITCHYARD_FUZZ_EXAMPLES", 100);
    let seconds = std::env::var("SWITCHYARD_FUZZ_SECONDS")
        .ok()
        .map(|_| env_number("SWITCHYARD_FUZZ_SECONDS", 0));
    let config = dir.join("schemathesis.toml");
    std::fs::write(
        &config,
        format!(
            "[auth.openapi.tenant_key]\nbearer = {:?}\n\n[auth.openapi.admin_token]\nbearer = {:?}\n",
            creds.key, creds.admin_token
        ),
    )
    .unwrap();
    let started = Instant::now();
    // `timeout` bounds the whole run, whatever the fuzzer does.
    let mut command = Command::new("timeout");
    command
        .arg((seconds.unwrap_or(0) + 600).to_string())
        .arg(venv_tool("schemathesis"))
        .arg("--config-file")
        .arg(&config)
        .arg("run")
        .arg(committed())
        .args(["--url", &server.url("")])
        .args(["--checks", "all"])
        // A valid-looking request is often refused for what a schema cannot say (an adapter
        // that does not exist, a key that may not reach it): 4xx with a documented code.
        .args(["--exclude-checks", "positive_data_acceptance"])
        .args(["--max-examples", &examples.to_string()])
        .args(["--include-path-regex", include])
        .args(["--workers", "2", "--seed", &seed.to_string()])
        .args(["--request-timeout", "60"])
        .current_dir(dir)
        .env("NO_COLOR", "1");
    if let Some(seconds) = seconds {
        command.args(["--max-time", &seconds.to_string()]);
    }
    let out = command.output().unwrap();
    let report =
        String::from_utf8_lossy(&out.stdout).into_owned() + &String::from_utf8_lossy(&out.stderr);
    assert!(
        out.status.success(),
        "schemathesis found failures (seed {seed}, {examples} examples per operation, {:.0} s):\n{report}\nserver log:\n{}",
        started.elapsed().as_secs_f64(),
        server.log()
    );
    let summary: Vec<&str> = report
        .lines()
        .filter(|l| {
            l.contains("generated")
                || l.contains("Selected:")
                || l.contains("Tested:")
                || l.contains("passed")
        })
        .collect();
    format!(
        "schemathesis, paths {include}, seed {seed}, {examples} examples per operation, {:.0} s:\n{}",
        started.elapsed().as_secs_f64(),
        summary.join("\n")
    )
}

/// A normal request after the fuzzing: the server still serves.
fn still_serves(server: &Server, creds: &Credentials, body: Value, endpoint: &str) {
    assert_eq!(server.get("/health/ready", Auth::None).status, 200);
    let reply = server.post(endpoint, Auth::Bearer(&creds.key), &body);
    assert_eq!(
        reply.status, 200,
        "{endpoint} after fuzzing: {}",
        reply.body
    );
}

/// The fuzzer against an encoder server (every operation, an adapter and a split in place) and
/// a tiny decoder server (generation and outcomes), each seeded from the clock (printed).
#[test]
fn the_fuzzer_finds_no_server_error_and_no_answer_off_the_description() {
    let creds = example_credentials();
    let seed = env_number(
        "SWITCHYARD_FUZZ_SEED",
        std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .unwrap()
            .as_secs()
            % 1_000_000,
    );
    println!("fuzzing with seed {seed} (SWITCHYARD_FUZZ_SEED repeats it)");
    let dir = tempfile::tempdir().unwrap();

    let encoder = server_with(ServerSetup::encoder(), &creds);
    let admin = Auth::Bearer(&creds.admin_token);
    let package = std::fs::read(fixtures().join("minilm-qv-a.safetensors")).unwrap();
    let published = encoder.request(
        "PUT",
        "/admin/adapters/north-routing",
        admin,
        Some(("application/octet-stream", &package)),
    );
    assert_eq!(published.status, 201, "{}", published.body);
    let split = json!({"arms": [
        {"name": "incumbent", "adapter": "base", "weight": 1.0},
        {"name": "candidate", "adapter": "north-routing", "weight": 1.0},
    ]});
    let put = encoder.request(
        "PUT",
        "/admin/splits/north-test",
        admin,
        Some(("application/json", split.to_string().as_bytes())),
    );
    assert_eq!(put.status, 201, "{}", put.body);
    println!("{}", fuzz(&encoder, &creds, ".*", seed, dir.path()));
    still_serves(
        &encoder,
        &creds,
        json!({"adapter": "north-routing", "texts": ["the rear brake squeals"]}),
        "/embed",
    );

    let decoder = server_with(ServerSetup::tiny_decoder(), &creds);
    println!(
        "{}",
        fuzz(
            &decoder,
            &creds,
            "^/(generate|outcomes)$",
            seed + 1,
            dir.path()
        )
    );
    still_serves(
        &decoder,
        &creds,
        json!({"adapter": "base", "prompt": "The chain slipped because", "max_tokens": 4}),
        "/generate",
    );
}

/// Checks answers against the description with tests/api/check_answers.py (jsonschema), each
/// in a file of its own in a temporary folder.
struct Checker {
    dir: tempfile::TempDir,
    checked: std::cell::Cell<usize>,
}

impl Checker {
    fn new() -> Self {
        Self {
            dir: tempfile::tempdir().unwrap(),
            checked: std::cell::Cell::new(0),
        }
    }

    fn run(&self, args: &[&str], answer: &str) {
        let n = self.checked.get();
        self.checked.set(n + 1);
        let file = self.dir.path().join(format!("answer-{n}.txt"));
        std::fs::write(&file, answer).unwrap();
        let out = Command::new(venv_tool("python"))
            .arg(workspace_root().join("tests/api/check_answers.py"))
            .arg(committed())
            .args(args)
            .arg(&file)
            .output()
            .unwrap();
        let said = String::from_utf8_lossy(&out.stdout).into_owned()
            + &String::from_utf8_lossy(&out.stderr);
        println!("{}", said.trim());
        assert!(out.status.success(), "{said}\nanswer: {answer}");
    }

    /// `reply`, the answer to `method path` (as the description spells the path), fits the
    /// schema documented for its status.
    fn answer(&self, method: &str, path: &str, reply: &switchyard_tests::server::Reply) {
        let status = reply.status.to_string();
        self.run(&["answer", method, path, &status], &reply.body);
    }

    fn stream(&self, body: &str) {
        self.run(&["stream"], body);
    }
}

/// `/generate`'s answers fit the schemas the description gives them, checked by jsonschema
/// (tests/api/check_answers.py): a whole answer, one that an end token ended (`ended_by` set),
/// and a streamed one, event by event (`token` events, then `done`).
#[test]
fn generate_answers_fit_their_described_schemas_whole_and_streamed() {
    let creds = example_credentials();
    let server = server_with(ServerSetup::tiny_decoder(), &creds);
    let check = Checker::new();
    let body = json!({"adapter": "base", "prompt": "The chain slipped because", "max_tokens": 6});
    let whole = server.post("/generate", Auth::Bearer(&creds.key), &body);
    assert_eq!(whole.status, 200, "{}", whole.body);
    check.answer("POST", "/generate", &whole);

    let third = whole.json()["token_ids"][2].as_u64().unwrap();
    let mut ended = body.clone();
    ended["end_at"] = json!({"token_ids": [third]});
    let ended = server.post("/generate", Auth::Bearer(&creds.key), &ended);
    assert_eq!(ended.json()["finish"], "end_token", "{}", ended.body);
    assert_eq!(ended.json()["ended_by"], third, "{}", ended.body);
    check.answer("POST", "/generate", &ended);

    let mut streamed = body.clone();
    streamed["stream"] = json!(true);
    let stream = server.post("/generate", Auth::Bearer(&creds.key), &streamed);
    assert_eq!(stream.status, 200, "{}", stream.body);
    assert!(stream.body.contains("event: done"), "{}", stream.body);
    check.stream(&stream.body);
}

/// The answers the fuzzer rarely reaches, with real data in them, fit their schemas: a split
/// of two versions under a rollout policy, 40 requests through it with numeric and yes/no
/// outcomes, its readout (every statistic filled in, the guards read), the split and adapter
/// listings, the history, a rollout action, and refusals.
#[test]
fn answers_full_of_real_data_fit_their_described_schemas() {
    let creds = example_credentials();
    let server = server_with(
        ServerSetup::encoder().set("metrics", "history_interval_ms", "100"),
        &creds,
    );
    let check = Checker::new();
    let admin = Auth::Bearer(&creds.admin_token);
    let tenant = Auth::Bearer(&creds.key);
    let mut versions = Vec::new();
    for fixture in ["minilm-qv-a.safetensors", "minilm-qv-b.safetensors"] {
        let package = std::fs::read(fixtures().join(fixture)).unwrap();
        let published = server.request(
            "PUT",
            "/admin/adapters/north-routing",
            admin,
            Some(("application/octet-stream", &package)),
        );
        assert_eq!(published.status, 201, "{}", published.body);
        check.answer("PUT", "/admin/adapters/{name}", &published);
        versions.push(published.json()["version"].as_str().unwrap().to_owned());
    }
    let split = json!({
        "arms": [
            {"name": "incumbent", "adapter": "north-routing", "version": versions[0], "weight": 1.0},
            {"name": "candidate", "adapter": "north-routing", "version": versions[1], "weight": 1.0},
        ],
        "rollout": {
            "candidate": "candidate",
            "min_requests": 1000,
            "guards": {"error_rate": 0.05, "latency_p99_ms": 2000,
                       "outcome": {"kind": "yes_no", "better": "higher", "margin": 0.1}},
            "steps": [0.75],
        },
    });
    let put = server.request(
        "PUT",
        "/admin/splits/north-test",
        admin,
        Some(("application/json", split.to_string().as_bytes())),
    );
    assert_eq!(put.status, 201, "{}", put.body);
    check.answer("PUT", "/admin/splits/{name}", &put);

    for i in 0..40 {
        let body = json!({"split": "north-test", "subject": format!("rider-{i}"),
                          "texts": ["the rear brake squeals"]});
        let reply = server.post("/embed", tenant, &body);
        assert_eq!(reply.status, 200, "{}", reply.body);
        if i == 0 {
            check.answer("POST", "/embed", &reply);
        }
        let id = reply.json()["id"].as_str().unwrap().to_owned();
        let value = if i % 2 == 0 {
            json!(i % 3 == 0)
        } else {
            json!(0.5 + (i % 7) as f64 / 10.0)
        };
        let outcome = server.post(
            "/outcomes",
            tenant,
            &json!({"response_id": id, "value": value}),
        );
        assert_eq!(outcome.status, 200, "{}", outcome.body);
        if i < 2 {
            check.answer("POST", "/outcomes", &outcome);
        }
    }
    let readout = server.get("/admin/splits/north-test/readout", admin);
    let data = readout.json();
    assert!(
        data["arms"][1]["numeric"]["versus_first"]["interval"].is_object(),
        "{data}"
    );
    assert!(
        data["arms"][1]["yes_no"]["versus_first_always_valid"].is_object(),
        "{data}"
    );
    assert!(data["rollout"]["guards"].is_array(), "{data}");
    check.answer("GET", "/admin/splits/{name}/readout", &readout);

    let paused = server.post(
        "/admin/splits/north-test/rollout",
        admin,
        &json!({"action": "pause", "reason": "reading the labels by hand"}),
    );
    assert_eq!(paused.status, 200, "{}", paused.body);
    check.answer("POST", "/admin/splits/{name}/rollout", &paused);
    check.answer(
        "GET",
        "/admin/splits/{name}/readout",
        &server.get("/admin/splits/north-test/readout", admin),
    );
    check.answer("GET", "/admin/splits", &server.get("/admin/splits", admin));
    check.answer(
        "GET",
        "/admin/adapters",
        &server.get("/admin/adapters", admin),
    );
    std::thread::sleep(std::time::Duration::from_millis(300));
    check.answer(
        "GET",
        "/admin/history",
        &server.get("/admin/history", admin),
    );
    let pinned = server.request("PUT", "/admin/adapters/north-routing/pin", admin, None);
    check.answer("PUT", "/admin/adapters/{name}/pin", &pinned);
    let refused = server.post(
        "/embed",
        tenant,
        &json!({"adapter": "south-routing", "texts": ["x"]}),
    );
    assert_eq!(refused.status, 403, "{}", refused.body);
    check.answer("POST", "/embed", &refused);
    let busy = server.request(
        "DELETE",
        &format!("/admin/adapters/north-routing/versions/{}", versions[1]),
        admin,
        None,
    );
    assert_eq!(busy.status, 409, "{}", busy.body);
    check.answer("DELETE", "/admin/adapters/{name}/versions/{version}", &busy);
}
