//! Tenants share the server fairly, through the real binary: a tenant that floods the server is
//! refused with 429 and a Retry-After header while another tenant's requests all succeed, and
//! each quota (requests per second, tokens per minute, concurrent requests) refuses past its
//! limit with a Retry-After computed from that limit.

use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use serde_json::json;
use switchyard_tests::server::{Auth, Reply, Server, ServerSetup};

const FLOOD_KEY: &str = "flood-key-0123456789abcdef";
const CALM_KEY: &str = "calm-key-0123456789abcdef";

fn embed_as(server: &Server, key: &str, adapter: &str, texts: &[&str]) -> Reply {
    server.post(
        "/embed",
        Auth::Bearer(key),
        &json!({"adapter": adapter, "texts": texts}),
    )
}

/// The Retry-After header of a 429, as whole seconds; panics when it is missing or not a number.
fn retry_after_seconds(reply: &Reply) -> u64 {
    let value = reply
        .retry_after
        .as_deref()
        .unwrap_or_else(|| panic!("a {} without Retry-After: {}", reply.status, reply.body));
    value
        .parse()
        .unwrap_or_else(|_| panic!("Retry-After {value:?} is not whole seconds"))
}

/// Two tenants on one server with `[engine] queue_depth` 4: each may hold 2 waiting requests.
/// Before the per-tenant queue, the flood filled the one shared queue and the calm tenant got
/// `queue_full` too.
#[test]
fn a_flooding_tenant_gets_429_with_retry_after_while_the_other_tenants_requests_all_succeed() {
    let server = ServerSetup::encoder()
        .set("engine", "queue_depth", "4")
        .tenant("flood", FLOOD_KEY, &[])
        .tenant("calm", CALM_KEY, &[])
        .start();
    let flood_texts = [
        "flood text one",
        "flood text two",
        "flood text three",
        "flood text four",
    ];
    let calm_done = AtomicBool::new(false);
    let (flood, calm) = std::thread::scope(|scope| {
        let flooders: Vec<_> = (0..8)
            .map(|_| {
                scope.spawn(|| {
                    let mut replies = Vec::new();
                    while !calm_done.load(Ordering::SeqCst) {
                        replies.push(embed_as(&server, FLOOD_KEY, "base", &flood_texts));
                    }
                    replies
                })
            })
            .collect();
        // Let the flood fill its share of the queue first.
        std::thread::sleep(Duration::from_millis(300));
        let calm: Vec<Reply> = (0..10)
            .map(|_| embed_as(&server, CALM_KEY, "base", &["where is my wheel"]))
            .collect();
        calm_done.store(true, Ordering::SeqCst);
        let flood: Vec<Reply> = flooders
            .into_iter()
            .flat_map(|f| f.join().unwrap())
            .collect();
        (flood, calm)
    });
    for reply in &calm {
        let answer = reply.ok_json();
        assert_eq!(answer["embeddings"].as_array().unwrap().len(), 1);
    }
    let refused: Vec<&Reply> = flood.iter().filter(|r| r.status == 429).collect();
    assert!(
        !refused.is_empty(),
        "8 flooding clients against a share of 2 were never refused ({} answers)",
        flood.len()
    );
    assert!(
        flood.iter().any(|r| r.status == 200),
        "the flood is served too, at its share"
    );
    for reply in &flood {
        assert!(
            reply.status == 200 || reply.status == 429,
            "flood answer {}: {}",
            reply.status,
            reply.body
        );
    }
    for reply in &refused {
        reply.assert_error(429, "tenant_queue_full");
        assert!(retry_after_seconds(reply) >= 1);
    }
    // The refusals are counted by tenant and reason; the calm tenant has none.
    let metrics = server.get("/metrics", Auth::Admin).body;
    let line = format!(
        "switchyard_refusals_total{{tenant=\"flood\",reason=\"tenant_queue_full\"}} {}",
        refused.len()
    );
    assert!(metrics.contains(&line), "no {line:?} in\n{metrics}");
    assert!(!metrics.contains("tenant=\"calm\""), "{metrics}");
}

#[test]
fn retry_after_comes_from_the_request_rate_quota() {
    // One request every 4 s for the flooding tenant; the other tenant has no quota.
    let server = ServerSetup::encoder()
        .tenant("flood", FLOOD_KEY, &[])
        .tenant_set("requests_per_second", "0.25")
        .tenant("calm", CALM_KEY, &[])
        .start();
    // The first request takes the one request the bucket holds (an adapter outside the
    // tenant's patterns: refused once admitted, at once), so the next comes milliseconds later
    // and must wait the whole 4 s.
    embed_as(&server, FLOOD_KEY, "elsewhere", &["one"]).assert_error(403, "forbidden_target");
    let refused = embed_as(&server, FLOOD_KEY, "base", &["two"]);
    refused.assert_error(429, "rate_limited");
    assert_eq!(retry_after_seconds(&refused), 4, "{}", refused.body);
    assert!(
        refused.body.contains("0.25 requests per second"),
        "{}",
        refused.body
    );
    // Over its rate, a request is refused before its texts are tokenised: a text of some 1,000
    // tokens, over `prompt_tokens` (256) but under `text_bytes`, is not read by the tokenizer,
    // so the answer is the rate's 429, not the 413 tokenising would have found.
    let long = "wheel ".repeat(1000);
    embed_as(&server, FLOOD_KEY, "base", &[&long]).assert_error(429, "rate_limited");
    for _ in 0..5 {
        embed_as(&server, CALM_KEY, "base", &["where is my wheel"]).ok_json();
    }
}

#[test]
fn retry_after_comes_from_the_tokens_per_minute_quota() {
    // "where is my wheel" is 6 tokens with [CLS] and [SEP]; 6 tokens a minute is one such
    // request a minute, and the next waits about 60 s (less the time the first took).
    let server = ServerSetup::encoder()
        .tenant("flood", FLOOD_KEY, &[])
        .tenant_set("tokens_per_minute", "6")
        .start();
    embed_as(&server, FLOOD_KEY, "base", &["where is my wheel"]).ok_json();
    let refused = embed_as(&server, FLOOD_KEY, "base", &["where is my wheel"]);
    refused.assert_error(429, "token_quota_spent");
    let wait = retry_after_seconds(&refused);
    assert!(
        (50..=60).contains(&wait),
        "Retry-After {wait} for 6 tokens at 6 a minute: {}",
        refused.body
    );
    // More than a whole minute's worth can never pass: not a 429 to retry, a 413.
    let too_big = embed_as(
        &server,
        FLOOD_KEY,
        "base",
        &["where is my wheel", "where is my wheel"],
    );
    too_big.assert_error(413, "over_token_quota");
    assert!(too_big.retry_after.is_none(), "{too_big:?}");
    assert!(too_big.body.contains("needs 12 tokens"), "{}", too_big.body);
}

#[test]
fn a_tenant_at_its_concurrent_requests_is_refused_until_one_finishes() {
    let server = ServerSetup::encoder()
        .tenant("flood", FLOOD_KEY, &[])
        .tenant_set("concurrent_requests", "1")
        .tenant("calm", CALM_KEY, &[])
        .start();
    let long: Vec<String> = (0..64)
        .map(|i| format!("a long request, text number {i}, about a wheel"))
        .collect();
    let long: Vec<&str> = long.iter().map(String::as_str).collect();
    let first_done = AtomicBool::new(false);
    let (first, attempts, calm) = std::thread::scope(|scope| {
        let first = scope.spawn(|| {
            // A short request may hold the one place when this one arrives: retry until served.
            let mut refused = Vec::new();
            loop {
                let reply = embed_as(&server, FLOOD_KEY, "base", &long);
                if reply.status != 429 {
                    first_done.store(true, Ordering::SeqCst);
                    return (reply, refused);
                }
                refused.push(reply);
            }
        });
        let attempts = scope.spawn(|| {
            let mut replies = Vec::new();
            while !first_done.load(Ordering::SeqCst) {
                replies.push(embed_as(&server, FLOOD_KEY, "base", &["short"]));
            }
            replies
        });
        let calm = scope.spawn(|| embed_as(&server, CALM_KEY, "base", &["where is my wheel"]));
        (
            first.join().unwrap(),
            attempts.join().unwrap(),
            calm.join().unwrap(),
        )
    });
    let (first, mut attempts) = (first.0, [first.1, attempts].concat());
    attempts.retain(|r| r.status != 200);
    first.ok_json();
    calm.ok_json();
    assert!(
        !attempts.is_empty(),
        "no attempt was refused while a 64-text request was in flight"
    );
    for reply in &attempts {
        reply.assert_error(429, "too_many_in_flight");
        assert!(retry_after_seconds(reply) >= 1);
    }
    // Once it finished, the tenant is admitted again.
    embed_as(&server, FLOOD_KEY, "base", &["after"]).ok_json();
}

/// The factor-tier misses counted in /metrics: each is a load from the store.
fn factor_misses(server: &Server) -> u64 {
    let metrics = server.get("/metrics", Auth::Admin).body;
    metrics
        .lines()
        .find(|l| {
            l.starts_with("switchyard_cache_events_total{")
                && l.contains("tier=\"factors\"")
                && l.contains("outcome=\"miss\"")
        })
        .map_or(0, |l| {
            l.rsplit(' ')
                .next()
                .and_then(|v| v.parse::<f64>().ok())
                .unwrap_or_else(|| panic!("unreadable counter line {l:?}")) as u64
        })
}

fn queue_depth(server: &Server) -> u64 {
    let metrics = server.get("/metrics", Auth::Admin).body;
    metrics
        .lines()
        .find_map(|l| l.strip_prefix("switchyard_queue_depth "))
        .and_then(|v| v.trim().parse::<f64>().ok())
        .unwrap_or_else(|| panic!("no switchyard_queue_depth in\n{metrics}")) as u64
}

/// What /admin/adapters says is resident: (name, version, tier) for every entry.
fn resident(server: &Server) -> Vec<(String, String, String)> {
    let list = server.get("/admin/adapters", Auth::Admin).ok_json();
    let mut out = Vec::new();
    for a in list["adapters"].as_array().expect("adapters") {
        for r in a["resident"].as_array().expect("resident") {
            out.push((
                a["name"].as_str().unwrap().to_owned(),
                r["version"].as_str().unwrap().to_owned(),
                r["tier"].as_str().unwrap().to_owned(),
            ));
        }
    }
    out.sort();
    out
}

/// Before the fix, a request for a cold adapter was routed (the adapter loaded from the store,
/// perhaps evicting others) and only then offered to the queue, which refused it with
/// `tenant_queue_full`: the refused request still cost a load. Now the queue place is held
/// first. The tenant's lane (queue_depth 2 shared by two tenants: one place) is filled by one
/// long request waiting behind another that is running; then a request for a cold adapter is
/// refused, and neither the resident set nor the load count changed.
#[test]
fn refused_request_did_not_load_or_evict_an_adapter() {
    let server = ServerSetup::encoder()
        .set("engine", "queue_depth", "2")
        .tenant("flood", FLOOD_KEY, &["north-*"])
        .tenant("calm", CALM_KEY, &[])
        .start();
    server.publish(
        "north-warm",
        &switchyard_tests::fixtures().join("minilm-qv-a.safetensors"),
    );
    server.publish(
        "north-cold",
        &switchyard_tests::fixtures().join("minilm-qv-b.safetensors"),
    );
    embed_as(&server, FLOOD_KEY, "north-warm", &["warm it up"]).ok_json();
    let resident_before = resident(&server);
    let misses_before = factor_misses(&server);
    assert_eq!(misses_before, 1, "north-warm loaded once");
    assert!(
        resident_before
            .iter()
            .all(|(name, ..)| name != "north-cold"),
        "{resident_before:?}"
    );

    // 64 texts of about 120 tokens: seconds of work for the engine.
    let long: Vec<String> = (0..64)
        .map(|i| {
            format!(
                "text {i}: {}",
                "the wheel turns slowly in the rain ".repeat(15)
            )
        })
        .collect();
    let long: Vec<&str> = long.iter().map(String::as_str).collect();
    let probe = std::thread::scope(|scope| {
        // Two long requests: one runs, the other waits in the tenant's one place (a try that
        // finds the place taken is refused and sent again).
        let busy: Vec<_> = (0..2)
            .map(|_| {
                scope.spawn(|| {
                    loop {
                        let reply = embed_as(&server, FLOOD_KEY, "base", &long);
                        if reply.status == 200 {
                            return;
                        }
                        reply.assert_error(429, "tenant_queue_full");
                    }
                })
            })
            .collect();
        // Wait until one long request is waiting (so the other is running), then ask for the
        // cold adapter.
        let deadline = std::time::Instant::now() + Duration::from_secs(60);
        while queue_depth(&server) < 1 {
            assert!(
                std::time::Instant::now() < deadline,
                "no request ever waited in the queue"
            );
            std::thread::sleep(Duration::from_millis(5));
        }
        let probe = embed_as(
            &server,
            FLOOD_KEY,
            "north-cold",
            &["a request for a cold adapter"],
        );
        for b in busy {
            b.join().unwrap();
        }
        probe
    });
    probe.assert_error(429, "tenant_queue_full");
    assert!(probe.retry_after.is_some(), "{probe:?}");
    assert_eq!(
        resident(&server),
        resident_before,
        "the refused request changed residency"
    );
    assert_eq!(
        factor_misses(&server),
        misses_before,
        "the refused request loaded an adapter"
    );
    // The place is free again once the lane drains: the same request now loads and answers.
    embed_as(
        &server,
        FLOOD_KEY,
        "north-cold",
        &["a request for a cold adapter"],
    )
    .ok_json();
    assert_eq!(factor_misses(&server), misses_before + 1);
}

/// Each thread of a running process as (name, niceness), from `/proc/PID/task/*/stat`.
#[cfg(target_os = "linux")]
fn thread_niceness(pid: u32) -> Vec<(String, i64)> {
    let mut threads = Vec::new();
    for entry in std::fs::read_dir(format!("/proc/{pid}/task")).unwrap() {
        let Ok(stat) = std::fs::read_to_string(entry.unwrap().path().join("stat")) else {
            continue; // the thread ended
        };
        let open = stat.find('(').unwrap();
        let close = stat.rfind(')').unwrap();
        let name = stat[open + 1..close].to_owned();
        // After the name: state is field 3 of proc(5), niceness field 19.
        let fields: Vec<&str> = stat[close + 2..].split_whitespace().collect();
        threads.push((name, fields[16].parse().unwrap()));
    }
    threads
}

/// On two cores, the HTTP threads reading and refusing a flood competed with the engine thread
/// on equal terms, and every tenant's batch waited for CPU behind the refusals (the fairness
/// scenario's steady tenant: p99 2.2x to 3.8x its idle p99). The HTTP threads, the blocking pool's
/// included, now run 5 niceness steps below the engine thread.
#[cfg(target_os = "linux")]
#[test]
fn http_threads_competed_with_the_engine_thread_for_cpu() {
    let server = ServerSetup::encoder().start();
    // Tokenising runs on the blocking pool: one request starts its first thread.
    let answer = server
        .post(
            "/embed",
            Auth::None,
            &json!({"adapter": "base", "texts": ["the night shift"]}),
        )
        .ok_json();
    assert_eq!(answer["embeddings"].as_array().unwrap().len(), 1);
    let threads = thread_niceness(server.pid());
    let engine: Vec<i64> = threads
        .iter()
        .filter(|(name, _)| name.starts_with("switchyard-engi"))
        .map(|(_, nice)| *nice)
        .collect();
    let http: Vec<i64> = threads
        .iter()
        .filter(|(name, _)| name.starts_with("switchyard-http"))
        .map(|(_, nice)| *nice)
        .collect();
    assert_eq!(engine.len(), 1, "one engine thread: {threads:?}");
    assert!(
        http.len() >= 3,
        "the HTTP workers and a blocking thread: {threads:?}"
    );
    for nice in &http {
        assert_eq!(
            *nice,
            (engine[0] + 5).min(19),
            "every HTTP thread 5 steps below the engine thread: {threads:?}"
        );
    }
}
