//! `switchyard tour`: a short scripted walk through a running server, for the demo. It speaks HTTP
//! only, as any client would: it classifies one message with each demo adapter, shows one tenant
//! kept away from another's adapter, publishes a new version of an adapter and flips it live while
//! requests keep flowing (and counts that none failed), runs an A/B split with outcomes and prints
//! its readout, lets a guarded rollout roll a rushed version back by itself, and ends with the
//! metrics of swap latency and memory held. Every step checks what
//! it got, so the tour fails loudly (exit 1) when the server stops doing what the demo shows.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use anyhow::{Context, bail, ensure};
use serde_json::{Value, json};

use crate::http::auth::pattern_matches;

#[derive(Debug, Clone, clap::Args)]
pub struct TourArgs {
    /// Address of the running server.
    #[arg(long, default_value = "http://127.0.0.1:7070")]
    pub url: String,
    /// The server's config file: the tour reads the admin token and the tenant keys from it.
    #[arg(long, default_value = "config/switchyard.example.toml")]
    pub config: PathBuf,
    /// Folder of the demo adapter packages (routing, urgency, sentiment, routing-retrained,
    /// routing-rushed).
    #[arg(long, default_value = "demo/adapters")]
    pub adapters: PathBuf,
    /// Folder of the labelled demo messages; the A/B split sends routing-traffic.jsonl.
    #[arg(long, default_value = "demo/data")]
    pub data: PathBuf,
    /// How long to wait for the server to report ready.
    #[arg(long, value_name = "SECONDS", default_value_t = 60)]
    pub ready_within: u64,
}

/// The adapters the demo serves, as published by `scripts/demo`: store name and task file.
pub const DEMO_ADAPTERS: [(&str, &str); 3] = [
    ("north-routing", "routing"),
    ("north-urgency", "urgency"),
    ("north-sentiment", "sentiment"),
];

const SAMPLE_MESSAGE: &str = "My rear brake has been squealing since the last service and now it barely \
stops the bike. I ride to work every day, can someone look at it before Friday?";

/// A thin HTTP client: every call returns the status and the JSON (or text) body.
struct Client {
    agent: ureq::Agent,
    base: String,
}

struct Reply {
    status: u16,
    body: String,
}

impl Reply {
    fn json(&self) -> anyhow::Result<Value> {
        serde_json::from_str(&self.body)
            .with_context(|| format!("answer is not JSON: {}", self.body))
    }
}

impl Client {
    fn new(url: &str) -> Self {
        Self {
            agent: ureq::Agent::config_builder()
                .http_status_as_error(false)
                .timeout_global(Some(Duration::from_secs(60)))
                .build()
                .into(),
            base: url.trim_end_matches('/').to_owned(),
        }
    }

    fn call(
        &self,
        method: &str,
        path: &str,
        bearer: Option<&str>,
        body: Option<(&str, Vec<u8>)>,
    ) -> anyhow::Result<Reply> {
        let mut builder = ureq::http::Request::builder()
            .method(method)
            .uri(format!("{}{path}", self.base));
        if let Some(token) = bearer {
            builder = builder.header("Authorization", format!("Bearer {token}"));
        }
        let result = match body {
            Some((content_type, bytes)) => self
                .agent
                .run(builder.header("Content-Type", content_type).body(bytes)?),
            None => self.agent.run(builder.body(())?),
        };
        let mut resp = result.with_context(|| format!("{method} {}{path}", self.base))?;
        let status = resp.status().as_u16();
        let body = resp
            .body_mut()
            .read_to_string()
            .with_context(|| format!("reading the answer of {method} {path}"))?;
        Ok(Reply { status, body })
    }

    fn post_json(&self, path: &str, bearer: Option<&str>, body: &Value) -> anyhow::Result<Reply> {
        self.call(
            "POST",
            path,
            bearer,
            Some(("application/json", serde_json::to_vec(body)?)),
        )
    }

    fn expect(&self, reply: Reply, status: u16, what: &str) -> anyhow::Result<Value> {
        ensure!(
            reply.status == status,
            "{what}: expected status {status}, got {}: {}",
            reply.status,
            reply.body
        );
        reply.json()
    }
}

/// One labelled message of the demo data.
#[derive(Debug, Clone)]
struct Labelled {
    text: String,
    label: String,
}

fn read_labelled(path: &Path) -> anyhow::Result<Vec<Labelled>> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let mut rows = Vec::new();
    for (i, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let v: Value = serde_json::from_str(line)
            .with_context(|| format!("{} line {}: not JSON", path.display(), i + 1))?;
        let field = |k: &str| {
            v.get(k)
                .and_then(Value::as_str)
                .map(str::to_owned)
                .with_context(|| format!("{} line {}: no string {k:?}", path.display(), i + 1))
        };
        rows.push(Labelled {
            text: field("text")?,
            label: field("label")?,
        });
    }
    Ok(rows)
}

struct Credentials {
    admin: String,
    /// A key of the tenant whose patterns allow the demo adapters.
    owner: String,
    /// A key of another tenant, to show it is kept away.
    other: Option<(String, String)>,
}

fn credentials(config: &Path) -> anyhow::Result<Credentials> {
    let settings = switchyard_config::Settings::load(Some(config), std::iter::empty())
        .with_context(|| format!("reading {}", config.display()))?;
    let admin = settings
        .admin_token
        .clone()
        .context("the config has no admin token; the tour needs the admin API")?;
    let allows = |t: &switchyard_config::TenantSettings, name: &str| {
        t.adapters.iter().any(|p| pattern_matches(p, name))
    };
    let owner = settings
        .tenants
        .iter()
        .find(|t| allows(t, DEMO_ADAPTERS[0].0))
        .with_context(|| {
            format!(
                "no tenant of {} may use {}",
                config.display(),
                DEMO_ADAPTERS[0].0
            )
        })?;
    let other = settings
        .tenants
        .iter()
        .find(|t| !allows(t, DEMO_ADAPTERS[0].0))
        .map(|t| (t.name.clone(), t.keys[0].clone()));
    Ok(Credentials {
        admin,
        owner: owner.keys[0].clone(),
        other,
    })
}

pub fn run(args: &TourArgs, out: &mut impl Write) -> anyhow::Result<()> {
    let client = Client::new(&args.url);
    let creds = credentials(&args.config)?;
    wait_ready(&client, Duration::from_secs(args.ready_within))?;
    classify_each(&client, &creds, out)?;
    let (old, new) = flip_live(&client, &creds, args, out)?;
    split_readout(&client, &creds, args, &old, &new, out)?;
    guarded_rollout(&client, &creds, args, &new, out)?;
    show_metrics(&client, &creds, out)?;
    writeln!(
        out,
        "\nThe tour is done; every step got the answer it expected."
    )?;
    Ok(())
}

fn wait_ready(client: &Client, timeout: Duration) -> anyhow::Result<()> {
    let start = Instant::now();
    loop {
        match client.call("GET", "/health/ready", None, None) {
            Ok(r) if r.status == 200 => return Ok(()),
            _ if start.elapsed() > timeout => {
                bail!(
                    "the server at {} was not ready within {timeout:?}",
                    client.base
                )
            }
            _ => std::thread::sleep(Duration::from_millis(200)),
        }
    }
}

fn heading(out: &mut impl Write, text: &str) -> std::io::Result<()> {
    writeln!(out, "\n== {text}")
}

/// Step 1: one message through each demo adapter, and one tenant kept away from another's.
fn classify_each(client: &Client, creds: &Credentials, out: &mut impl Write) -> anyhow::Result<()> {
    heading(out, "one customer message, classified by each adapter")?;
    writeln!(out, "message: {SAMPLE_MESSAGE:?}")?;
    for (name, _) in DEMO_ADAPTERS {
        let reply = client.post_json(
            "/classify",
            Some(&creds.owner),
            &json!({"adapter": name, "texts": [SAMPLE_MESSAGE]}),
        )?;
        let v = client.expect(reply, 200, &format!("classify with {name}"))?;
        let result = &v["results"][0];
        let mut scores: Vec<(String, f64)> = result["scores"]
            .as_object()
            .context("scores is not an object")?
            .iter()
            .map(|(k, p)| (k.clone(), p.as_f64().unwrap_or(0.0)))
            .collect();
        scores.sort_by(|a, b| b.1.total_cmp(&a.1));
        let shown: Vec<String> = scores
            .iter()
            .take(3)
            .map(|(k, p)| format!("{k} {:.0}%", p * 100.0))
            .collect();
        writeln!(
            out,
            "  {name:<16} → {:<10} ({})   served by {}, swap {} ms",
            result["label"].as_str().unwrap_or("?"),
            shown.join(", "),
            v["served_by"].as_str().unwrap_or("?"),
            v["elapsed_ms"]["swap"]
        )?;
    }
    if let Some((tenant, key)) = &creds.other {
        let name = DEMO_ADAPTERS[0].0;
        let reply = client.post_json(
            "/classify",
            Some(key),
            &json!({"adapter": name, "texts": [SAMPLE_MESSAGE]}),
        )?;
        ensure!(
            reply.status == 403,
            "tenant {tenant} reached {name}: status {} {}",
            reply.status,
            reply.body
        );
        writeln!(
            out,
            "  tenant {tenant} asking for {name} → 403 {}",
            reply.json()?["error"]["code"].as_str().unwrap_or("?")
        )?;
    }
    Ok(())
}

/// Step 2: publish a retrained version of the routing adapter while two clients keep asking it;
/// returns the versions before and after.
fn flip_live(
    client: &Client,
    creds: &Credentials,
    args: &TourArgs,
    out: &mut impl Write,
) -> anyhow::Result<(String, String)> {
    let name = DEMO_ADAPTERS[0].0;
    heading(
        out,
        &format!("a new version of {name} goes live while requests keep flowing"),
    )?;
    let file = args.adapters.join("routing-retrained.safetensors");
    let bytes = std::fs::read(&file).with_context(|| format!("reading {}", file.display()))?;
    let stop = AtomicBool::new(false);
    let seen: Mutex<Vec<(u16, String)>> = Mutex::new(Vec::new());
    let body = json!({"adapter": name, "texts": [SAMPLE_MESSAGE]});
    let published = std::thread::scope(|s| -> anyhow::Result<String> {
        for _ in 0..2 {
            s.spawn(|| {
                while !stop.load(Ordering::Relaxed) {
                    let entry = match client.post_json("/classify", Some(&creds.owner), &body) {
                        Ok(r) => {
                            let by = r
                                .json()
                                .ok()
                                .and_then(|v| v["served_by"].as_str().map(str::to_owned))
                                .unwrap_or_default();
                            (r.status, by)
                        }
                        Err(_) => (0, String::new()),
                    };
                    seen.lock().unwrap().push(entry);
                }
            });
        }
        std::thread::sleep(Duration::from_millis(600));
        let result = client
            .call(
                "PUT",
                &format!("/admin/adapters/{name}"),
                Some(&creds.admin),
                Some(("application/octet-stream", bytes)),
            )
            .and_then(|r| client.expect(r, 201, &format!("publishing {}", file.display())));
        if result.is_ok() {
            // Let the clients see the new version for a while.
            std::thread::sleep(Duration::from_millis(800));
        }
        stop.store(true, Ordering::Relaxed);
        let v = result?;
        Ok(v["version"].as_str().unwrap_or_default().to_owned())
    })?;
    let seen = seen.into_inner().unwrap();
    let failed = seen.iter().filter(|(status, _)| *status != 200).count();
    let mut by_version: BTreeMap<&str, usize> = BTreeMap::new();
    let mut order: Vec<&str> = Vec::new();
    for (_, by) in &seen {
        if !order.contains(&by.as_str()) {
            order.push(by);
        }
        *by_version.entry(by).or_default() += 1;
    }
    let new = format!("{name}@{published}");
    let old = order
        .first()
        .map(|s| s.to_string())
        .context("no request was answered during the flip")?;
    writeln!(
        out,
        "  published {} as version {published}; requests during the flip: {}, failed: {failed}",
        file.display(),
        seen.len()
    )?;
    for by in &order {
        writeln!(out, "    served by {by:<32} {} requests", by_version[by])?;
    }
    ensure!(failed == 0, "{failed} requests failed during the flip");
    ensure!(
        order.last() == Some(&new.as_str()),
        "requests after the flip were not served by {new}: {order:?}"
    );
    ensure!(
        old != new,
        "the new version was already live before the flip"
    );
    Ok((old, new))
}

/// Step 3: the old and the new version side by side on live traffic, scored by whether each
/// answer's label is right, and the readout.
fn split_readout(
    client: &Client,
    creds: &Credentials,
    args: &TourArgs,
    old: &str,
    new: &str,
    out: &mut impl Write,
) -> anyhow::Result<()> {
    let split = "north-routing-trial";
    heading(
        out,
        &format!("A/B split {split}: the previous version against the new one"),
    )?;
    let version = |id: &str| id.rsplit_once('@').map(|(_, v)| v.to_owned());
    let (name, _) = old.rsplit_once('@').context("served_by has no version")?;
    let spec = json!({"arms": [
        {"name": "incumbent", "adapter": name, "version": version(old), "weight": 0.5},
        {"name": "candidate", "adapter": name, "version": version(new), "weight": 0.5},
    ]});
    let reply = client.call(
        "PUT",
        &format!("/admin/splits/{split}"),
        Some(&creds.admin),
        Some(("application/json", serde_json::to_vec(&spec)?)),
    )?;
    ensure!(
        (200..300).contains(&reply.status),
        "creating split {split}: status {} {}",
        reply.status,
        reply.body
    );
    // A day's traffic: labelled routing messages that neither version trained on. Each
    // customer is a subject, so a customer always meets the same arm.
    let data = args.data.join("routing-traffic.jsonl");
    let rows = read_labelled(&data)?;
    ensure!(!rows.is_empty(), "{} has no messages", data.display());
    let sample: Vec<&Labelled> = rows.iter().collect();
    let mut per_arm: BTreeMap<String, (usize, usize)> = BTreeMap::new();
    for (i, row) in sample.iter().enumerate() {
        let reply = client.post_json(
            "/classify",
            Some(&creds.owner),
            &json!({"split": split, "subject": format!("customer-{i}"), "texts": [row.text]}),
        )?;
        let v = client.expect(reply, 200, "classify through the split")?;
        let correct = v["results"][0]["label"].as_str() == Some(row.label.as_str());
        let arm = v["split"]["arm"].as_str().unwrap_or("?").to_owned();
        let tally = per_arm.entry(arm).or_default();
        tally.0 += 1;
        tally.1 += usize::from(correct);
        let outcome = client.post_json(
            "/outcomes",
            Some(&creds.owner),
            &json!({"response_id": v["id"], "value": correct}),
        )?;
        client.expect(outcome, 200, "posting an outcome")?;
    }
    writeln!(
        out,
        "  {} new labelled messages (demo/data/routing-traffic.jsonl) sent through the split; outcome = the label was right",
        sample.len()
    )?;
    let reply = client.call(
        "GET",
        &format!("/admin/splits/{split}/readout"),
        Some(&creds.admin),
        None,
    )?;
    let v = client.expect(reply, 200, "the split readout")?;
    for arm in v["arms"].as_array().context("readout has no arms")? {
        let yes_no = &arm["yes_no"];
        let summary = &yes_no["summary"];
        let interval = &summary["wilson_interval"];
        write!(
            out,
            "  {:<10} {:<24} requests {:>3}, right {:>3}/{:<3} = {:>5.1}% (95% interval {:.1}–{:.1}%)",
            arm["arm"].as_str().unwrap_or("?"),
            arm["version"].as_str().unwrap_or("live"),
            arm["requests"],
            summary["successes"],
            summary["count"],
            summary["proportion"].as_f64().unwrap_or(f64::NAN) * 100.0,
            interval["low"].as_f64().unwrap_or(f64::NAN) * 100.0,
            interval["high"].as_f64().unwrap_or(f64::NAN) * 100.0,
        )?;
        let versus = &yes_no["versus_first"];
        if let Some(d) = versus["difference"].as_f64() {
            write!(
                out,
                "; vs incumbent {:+.1} points, p = {}",
                d * 100.0,
                versus["p_value"]
                    .as_f64()
                    .map(|p| format!("{p:.3}"))
                    .unwrap_or_else(|| "n/a".into())
            )?;
        }
        writeln!(out)?;
    }
    let counted: u64 = v["arms"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|x| x["yes_no"]["summary"]["count"].as_u64().unwrap_or(0))
                .sum()
        })
        .unwrap_or(0);
    ensure!(
        counted as usize == sample.len(),
        "the readout counts {counted} outcomes, {} were posted",
        sample.len()
    );
    Ok(())
}

/// Step 4: a rushed version (one epoch at five times the step size) is published, so it goes live, and rolled out
/// against the good one under a policy with an outcome guard; the server rolls it back by itself
/// once its answers are right less often with always-valid confidence, and sets the live
/// version back.
fn guarded_rollout(
    client: &Client,
    creds: &Credentials,
    args: &TourArgs,
    good: &str,
    out: &mut impl Write,
) -> anyhow::Result<()> {
    let split = "north-routing-rollout";
    let (name, good_version) = good.rsplit_once('@').context("served_by has no version")?;
    heading(
        out,
        &format!("guarded rollout {split}: a rushed version of {name} rolls itself back"),
    )?;
    let file = args.adapters.join("routing-rushed.safetensors");
    let bytes = std::fs::read(&file).with_context(|| format!("reading {}", file.display()))?;
    let reply = client.call(
        "PUT",
        &format!("/admin/adapters/{name}"),
        Some(&creds.admin),
        Some(("application/octet-stream", bytes)),
    )?;
    let published = client.expect(reply, 201, &format!("publishing {}", file.display()))?;
    let rushed = published["version"].as_str().unwrap_or_default().to_owned();
    writeln!(
        out,
        "  published {} as version {rushed}: it is live now",
        file.display()
    )?;
    let policy = json!({
        "candidate": "candidate",
        "min_requests": 30,
        "step_requests": 200,
        "guards": {
            "error_rate": 0.05,
            "outcome": {"kind": "yes_no", "better": "higher", "margin": 0.05},
        },
        "steps": [0.5],
        "roll_back_live": true,
    });
    let spec = json!({
        "arms": [
            {"name": "incumbent", "adapter": name, "version": good_version, "weight": 0.5},
            {"name": "candidate", "adapter": name, "version": rushed, "weight": 0.5},
        ],
        "rollout": policy,
    });
    let reply = client.call(
        "PUT",
        &format!("/admin/splits/{split}"),
        Some(&creds.admin),
        Some(("application/json", serde_json::to_vec(&spec)?)),
    )?;
    client.expect(reply, 201, &format!("creating split {split}"))?;
    writeln!(
        out,
        "  policy: {}",
        serde_json::to_string(&policy).unwrap_or_default()
    )?;
    let rows = read_labelled(&args.data.join("routing-traffic.jsonl"))?;
    ensure!(!rows.is_empty(), "no routing traffic");
    let readout = |client: &Client| -> anyhow::Result<Value> {
        let reply = client.call(
            "GET",
            &format!("/admin/splits/{split}/readout"),
            Some(&creds.admin),
            None,
        )?;
        client.expect(reply, 200, "the rollout readout")
    };
    // Traffic with outcomes until the policy acts (the server checks it every second).
    let limit = 600;
    let (mut sent, mut failed) = (0usize, 0usize);
    let mut last = Value::Null;
    let start = Instant::now();
    while sent < limit {
        let row = &rows[sent % rows.len()];
        let reply = client.post_json(
            "/classify",
            Some(&creds.owner),
            &json!({"split": split, "texts": [row.text]}),
        )?;
        sent += 1;
        if reply.status != 200 {
            failed += 1;
            continue;
        }
        let v = reply.json()?;
        let right = v["results"][0]["label"].as_str() == Some(row.label.as_str());
        let outcome = client.post_json(
            "/outcomes",
            Some(&creds.owner),
            &json!({"response_id": v["id"], "value": right}),
        )?;
        client.expect(outcome, 200, "posting an outcome")?;
        if sent % 10 == 0 {
            last = readout(client)?;
            if last["rollout"]["status"] == "rolled_back" {
                break;
            }
        }
    }
    // The last requests may have met the check between two readouts: wait for it briefly.
    let waited = Instant::now();
    while last["rollout"]["status"] != "rolled_back" && waited.elapsed() < Duration::from_secs(5) {
        std::thread::sleep(Duration::from_millis(250));
        last = readout(client)?;
    }
    ensure!(
        last["rollout"]["status"] == "rolled_back",
        "the policy did not roll the rushed version back within {sent} requests: {}",
        last["rollout"]
    );
    writeln!(
        out,
        "  {sent} labelled messages sent through the split in {:.1} s ({failed} failed); outcome = the label was right",
        start.elapsed().as_secs_f64()
    )?;
    for arm in last["arms"].as_array().context("readout has no arms")? {
        let s = &arm["yes_no"]["summary"];
        writeln!(
            out,
            "  {:<10} {:<18} right {:>3}/{:<3} = {:>5.1}%",
            arm["arm"].as_str().unwrap_or("?"),
            arm["version"].as_str().unwrap_or("live"),
            s["successes"],
            s["count"],
            s["proportion"].as_f64().unwrap_or(f64::NAN) * 100.0,
        )?;
    }
    for event in last["rollout"]["history"].as_array().into_iter().flatten() {
        writeln!(
            out,
            "  history: {:<11} by {:<8} candidate share {:.2}: {}",
            event["action"].as_str().unwrap_or("?"),
            event["by"].as_str().unwrap_or("?"),
            event["candidate_share"].as_f64().unwrap_or(f64::NAN),
            event["reason"].as_str().unwrap_or("")
        )?;
    }
    let reply = client.call("GET", "/admin/adapters", Some(&creds.admin), None)?;
    let list = client.expect(reply, 200, "listing adapters")?;
    let live = list["adapters"]
        .as_array()
        .and_then(|a| a.iter().find(|x| x["name"] == name))
        .and_then(|x| x["live"].as_str())
        .unwrap_or_default()
        .to_owned();
    writeln!(out, "  live version of {name} set back to {live}")?;
    ensure!(
        live == good_version,
        "the live version is {live}, not {good_version}, after the rollback"
    );
    Ok(())
}

/// One sample line of the Prometheus text format: name, labels, value.
fn parse_sample(line: &str) -> Option<(&str, BTreeMap<&str, &str>, f64)> {
    if line.starts_with('#') || line.trim().is_empty() {
        return None;
    }
    let (head, value) = line.rsplit_once(' ')?;
    let value: f64 = value.parse().ok()?;
    let (name, labels) = match head.split_once('{') {
        Some((name, rest)) => {
            let inner = rest.strip_suffix('}')?;
            let labels = inner
                .split(',')
                .filter_map(|kv| {
                    let (k, v) = kv.split_once('=')?;
                    Some((k, v.trim_matches('"')))
                })
                .collect();
            (name, labels)
        }
        None => (head, BTreeMap::new()),
    };
    Some((name, labels, value))
}

/// Step 4: what swapping cost and what memory is held, from `/metrics`.
fn show_metrics(client: &Client, creds: &Credentials, out: &mut impl Write) -> anyhow::Result<()> {
    heading(out, "what swapping cost, from /metrics")?;
    let reply = client.call("GET", "/metrics", Some(&creds.admin), None)?;
    ensure!(reply.status == 200, "/metrics answered {}", reply.status);
    let mut sums: BTreeMap<String, (f64, f64)> = BTreeMap::new();
    let mut resident: Vec<(String, f64)> = Vec::new();
    let mut cache: Vec<String> = Vec::new();
    for (name, labels, value) in reply.body.lines().filter_map(parse_sample) {
        let stage = labels.get("stage").copied().unwrap_or("").to_owned();
        match name {
            "switchyard_swap_seconds_sum" => sums.entry(stage).or_default().0 = value,
            "switchyard_swap_seconds_count" => sums.entry(stage).or_default().1 = value,
            "switchyard_resident_bytes" => {
                resident.push((labels.get("tier").copied().unwrap_or("?").to_owned(), value))
            }
            "switchyard_cache_events_total" => cache.push(format!(
                "{} {}: {value}",
                labels.get("tier").copied().unwrap_or("?"),
                labels.get("outcome").copied().unwrap_or("?")
            )),
            _ => {}
        }
    }
    ensure!(
        !sums.is_empty(),
        "/metrics has no switchyard_swap_seconds samples"
    );
    for (stage, (sum, count)) in &sums {
        if *count > 0.0 {
            writeln!(
                out,
                "  swap stage {stage:<9} {count:>4} times, mean {:.2} ms",
                sum / count * 1e3
            )?;
        }
    }
    for (tier, bytes) in &resident {
        writeln!(
            out,
            "  memory held, tier {tier:<8} {:.1} KiB",
            bytes / 1024.0
        )?;
    }
    if !cache.is_empty() {
        writeln!(out, "  cache events: {}", cache.join(", "))?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn prometheus_samples_are_read_with_their_labels() {
        let (name, labels, value) =
            parse_sample(r#"switchyard_swap_seconds_sum{stage="read"} 0.0125"#).unwrap();
        assert_eq!(name, "switchyard_swap_seconds_sum");
        assert_eq!(labels["stage"], "read");
        assert_eq!(value, 0.0125);
        assert_eq!(
            parse_sample("switchyard_queue_depth 3").map(|s| s.2),
            Some(3.0)
        );
        assert!(parse_sample("# HELP switchyard_queue_depth Requests waiting.").is_none());
    }
}
