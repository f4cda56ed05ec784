//! The status page in a real browser: starts `switchyard serve` with two adapters in its store,
//! then runs `tests/browser/status.test.mjs` (node's test runner driving headless Chromium
//! through playwright-core) against it. The browser script signs in, checks the tables and the
//! charts against the admin API, publishes, rolls back and posts split outcomes while the page
//! is open, and fails on any request that leaves 127.0.0.1.
//!
//! Needs `/usr/bin/chromium` (Debian's `chromium`) and `npm ci` in tests/browser; `scripts/test`
//! installs both. With `SWITCHYARD_STATUS_SCREENSHOTS=DIR` the script also saves the desktop and
//! phone screenshots the README shows.

use std::io::Read;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use serde_json::json;
use switchyard_tests::fixtures;
use switchyard_tests::server::{ADMIN_TOKEN, Auth, ServerSetup};

/// The whole browser run (seven steps, the slowest about 20 split requests to a debug build)
/// takes well under a minute here; past this it is killed and the test fails.
const BROWSER_RUN_LIMIT: Duration = Duration::from_secs(300);

/// The key of tenant `ridge-all`, which the browser script sends its requests and outcomes with.
const TENANT_KEY: &str = "ridge-all-key-0123456789";

fn browser_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("browser")
}

fn history_samples(server: &switchyard_tests::server::Server) -> Vec<serde_json::Value> {
    server.get("/admin/history", Auth::Admin).ok_json()["samples"]
        .as_array()
        .unwrap()
        .clone()
}

fn metric(page: &str, series: &str) -> f64 {
    page.lines()
        .find_map(|l| l.strip_prefix(series)?.strip_prefix(' '))
        .map_or(0.0, |v| v.trim().parse().unwrap())
}

/// What the page's last-hour charts and its cold/warm row read: `GET /admin/history` samples
/// memory per tier against its budget, the queue and the running counts at the configured
/// interval, `since_ms` keeps the newer ones, a bad query is refused by name, each adapter's last
/// use is listed, and an adapter's first request counts as cold, the next as warm.
#[test]
fn the_server_keeps_its_last_hour_of_samples_and_each_adapters_last_use() {
    let server = ServerSetup::encoder()
        .set("metrics", "history_interval_ms", "100")
        .start();
    server.publish("north-routing", &fixtures().join("minilm-qv-a.safetensors"));
    server.publish("south-routing", &fixtures().join("minilm-qv-a.safetensors"));
    let before = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_millis() as u64;
    for _ in 0..2 {
        server
            .embed(
                json!({"adapter": "north-routing"}),
                &["the gate opens at nine"],
            )
            .ok_json();
    }
    let listing = server.get("/admin/adapters", Auth::Admin).ok_json();
    let factors = listing["memory"]["factors"]["bytes"].as_u64().unwrap();
    assert!(factors > 0, "{listing}");
    let used = |name: &str| {
        listing["adapters"]
            .as_array()
            .unwrap()
            .iter()
            .find(|a| a["name"] == name)
            .unwrap()["last_used_ms"]
            .clone()
    };
    let north = used("north-routing")
        .as_u64()
        .expect("north-routing was used");
    assert!(north >= before, "{north} < {before}");
    assert_eq!(used("south-routing"), serde_json::Value::Null);

    // A sample taken after the requests shows them, and the factor bytes the listing shows.
    let begin = Instant::now();
    let sample = loop {
        let samples = history_samples(&server);
        if let Some(s) = samples.iter().find(|s| s["requests"].as_u64() >= Some(2)) {
            break s.clone();
        }
        assert!(begin.elapsed() < Duration::from_secs(10), "{samples:?}");
        std::thread::sleep(Duration::from_millis(50));
    };
    assert_eq!(sample["factors_bytes"].as_u64(), Some(factors), "{sample}");
    assert!(sample["factors_budget_bytes"].as_u64().unwrap() >= factors);
    assert_eq!(sample["loads"], 1, "{sample}");
    assert_eq!(sample["errors"], 0, "{sample}");
    assert!(sample["queued"].is_u64(), "{sample}");
    assert!(
        sample.get("disk_bytes").is_none(),
        "a local store has no disk tier: {sample}"
    );

    // since_ms keeps only later samples; the answer names its interval.
    let all = server.get("/admin/history", Auth::Admin).ok_json();
    assert_eq!(all["interval_ms"], 100);
    assert_eq!(all["kept"], 36_000);
    let samples = all["samples"].as_array().unwrap();
    assert!(samples.len() >= 2, "{all}");
    let cut = samples[samples.len() - 2]["at_ms"].as_u64().unwrap();
    let later = server
        .get(&format!("/admin/history?since_ms={cut}"), Auth::Admin)
        .ok_json();
    assert!(
        later["samples"]
            .as_array()
            .unwrap()
            .iter()
            .all(|s| s["at_ms"].as_u64().unwrap() > cut),
        "{later}"
    );
    server
        .get("/admin/history?since_ms=noon", Auth::Admin)
        .assert_error(400, "invalid_query");
    server
        .get("/admin/history?from=3", Auth::Admin)
        .assert_error(400, "invalid_query");
    server
        .get("/admin/history", Auth::None)
        .assert_error(401, "admin_token_required");

    // The first request loaded north-routing (cold), the second found it resident (warm).
    let page = server.get("/metrics", Auth::Admin).body;
    assert_eq!(
        metric(
            &page,
            r#"switchyard_adapter_answer_seconds_count{start="cold"}"#
        ),
        1.0
    );
    assert_eq!(
        metric(
            &page,
            r#"switchyard_adapter_answer_seconds_count{start="warm"}"#
        ),
        1.0
    );
}

#[test]
fn status_page_shows_adapters_swaps_and_readouts_live_in_headless_chromium() {
    let chromium =
        std::env::var("SWITCHYARD_CHROMIUM").unwrap_or_else(|_| "/usr/bin/chromium".to_owned());
    assert!(
        Path::new(&chromium).exists(),
        "{chromium} is missing: `apt-get install chromium` (scripts/test does it)"
    );
    assert!(
        browser_dir().join("node_modules/playwright-core").is_dir(),
        "tests/browser has no node_modules: `npm ci` there (scripts/test does it)"
    );

    // Two tenants: the page names, per adapter, the tenants whose patterns reach it.
    // Samples every 200 ms, so the history holds several before the page opens.
    let server = ServerSetup::encoder()
        .set("metrics", "history_interval_ms", "200")
        .tenant("ridge-north", "ridge-north-key-0123456789", &["north-*"])
        .tenant("ridge-all", TENANT_KEY, &["*-routing", "*-trial"])
        .start();
    server.publish("north-routing", &fixtures().join("minilm-qv-a.safetensors"));
    server.publish("south-routing", &fixtures().join("minilm-qv-a.safetensors"));
    // One request brings north-routing's factors into memory; south-routing stays on disk.
    server
        .post(
            "/embed",
            Auth::Bearer(TENANT_KEY),
            &json!({"adapter": "north-routing", "texts": ["the gate opens at nine"]}),
        )
        .ok_json();
    // The page opens with the server's history of the time before it (at least 5 samples).
    let begin = Instant::now();
    while history_samples(&server).len() < 5 {
        assert!(
            begin.elapsed() < Duration::from_secs(10),
            "no history samples"
        );
        std::thread::sleep(Duration::from_millis(100));
    }

    let url = server.url("");
    let mut child = Command::new("node")
        .args(["--test", "--test-concurrency=1", "status.test.mjs"])
        .current_dir(browser_dir())
        .env("SWITCHYARD_STATUS_URL", url.trim_end_matches('/'))
        .env("SWITCHYARD_ADMIN_TOKEN", ADMIN_TOKEN)
        .env("SWITCHYARD_TENANT_KEY", TENANT_KEY)
        .env("SWITCHYARD_FIXTURES", fixtures())
        .env("SWITCHYARD_CHROMIUM", &chromium)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start node (is Node.js installed?)");
    let (mut out, mut err) = (child.stdout.take().unwrap(), child.stderr.take().unwrap());
    let reader = std::thread::spawn(move || {
        let mut text = String::new();
        let _ = out.read_to_string(&mut text);
        let _ = err.read_to_string(&mut text);
        text
    });
    let started = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break Some(status);
        }
        if started.elapsed() > BROWSER_RUN_LIMIT {
            let _ = child.kill();
            let _ = child.wait();
            break None;
        }
        std::thread::sleep(Duration::from_millis(100));
    };
    let output = reader.join().unwrap();
    println!("{output}");
    match status {
        None => panic!("the browser run took over {BROWSER_RUN_LIMIT:?}:\n{output}"),
        Some(status) => assert!(
            status.success(),
            "the browser tests failed ({status}):\n{output}\nserver log:\n{}",
            server.log()
        ),
    }
}

/// The page and its assets answer without a token (they hold no data), carry a policy that
/// keeps the browser on this origin, and are small; the data they read still needs the token.
#[test]
fn status_page_assets_answer_without_a_token_and_hold_no_data() {
    let server = ServerSetup::encoder().start();
    server.publish("north-routing", &fixtures().join("minilm-qv-a.safetensors"));
    let mut total = 0;
    for (path, kind) in [
        ("/status", "text/html"),
        ("/status/page.css", "text/css"),
        ("/status/page.js", "text/javascript"),
    ] {
        let mut resp = ureq::get(&server.url(path)).call().expect(path);
        assert_eq!(resp.status(), 200, "{path}");
        let header = |name: &str| {
            resp.headers()
                .get(name)
                .and_then(|v| v.to_str().ok())
                .unwrap_or_default()
                .to_owned()
        };
        assert!(header("content-type").starts_with(kind), "{path}");
        let policy = header("content-security-policy");
        assert!(
            policy.contains("default-src 'none'") && policy.contains("connect-src 'self'"),
            "{path}: {policy}"
        );
        let body = resp.body_mut().read_to_string().unwrap();
        assert!(!body.contains("north-routing"), "{path} holds no data");
        assert!(!body.contains("http://") && !body.contains("https://") || path != "/status");
        total += body.len();
    }
    // The whole page, uncompressed; the README states its weight.
    assert!(total < 40_000, "the status page weighs {total} bytes");
    server
        .get("/admin/adapters", Auth::Bearer("wrong"))
        .assert_error(403, "admin_token_wrong");
}
