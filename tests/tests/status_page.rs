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
    let server = ServerSetup::encoder()
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
