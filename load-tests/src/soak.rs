//! The soak scenario: a long run at a steady share of the server's capacity, with adapters
//! published and rolled back live throughout, to show that nothing degrades with time: no
//! request fails, memory stays flat once warm, and the time to bring an adapter in does not
//! creep up.
//!
//! It writes synthetic adapters into a fresh store, starts its own `switchyard serve` (merging
//! on, the example config's budgets), measures the capacity of that server on the same traffic
//! (a closed loop, the most it answers per second), then sends open-loop Poisson traffic at
//! `load_share` of that capacity over all the adapters with Zipf popularity for `duration`.
//! Meanwhile an admin thread, every `flip_every`, either publishes a new version of one of the
//! most popular adapters (which goes live at once) or rolls the previous one back, and a scraper
//! reads `/metrics` for the process's resident set (and `/proc/PID/status` for its anonymous and
//! file-backed parts and its threads). The run is cut into windows; each window's
//! requests, errors, latency, swap times and memory are reported, with three verdicts:
//!
//! - errors: no request and no admin operation failed;
//! - memory: after the warm-up, the largest resident set is at most 1.10 times the smallest;
//! - swap times: the p99 of `elapsed_ms.swap` does not creep up: the median of the last third's
//!   window p99s is at most 1.5 times the median of the first third's, plus 0.5 ms (the slack
//!   keeps a sub-millisecond figure's jitter from failing it).

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use anyhow::Context;
use serde_json::{Value, json};
use switchyard_adapters::Module;

use crate::charts::{Axis, SeriesLabelPosition, line_chart};
use crate::client::{Client, RequestShape};
use crate::driver::{Pacing, Record, Workload, drive};
use crate::mix::{Kind, Mix};
use crate::proc_status::{ProcSample, ProcSampler};
use crate::results::Scenario;
use crate::scrape::{MemorySample, MemorySampler};
use crate::stats::{LatencySummary, percentile, round3, sorted};
use crate::synthetic::{SyntheticSpec, package_bytes, read_base, write_into_store};
use crate::workload::Zipf;

/// What the soak is run with.
#[derive(Debug, Clone)]
pub struct SoakSettings {
    pub server_bin: PathBuf,
    pub model_dir: PathBuf,
    /// Measured time after the warm-up.
    pub duration: Duration,
    /// Time at the start left out of the verdicts (adapters come in, caches fill).
    pub warmup: Duration,
    /// The server's residency budgets (`[residency]`), in bytes.
    pub factor_budget_bytes: u64,
    pub merged_budget_bytes: u64,
    /// Length of one reporting window.
    pub window: Duration,
    pub adapters: usize,
    pub zipf: f64,
    /// Share of the measured capacity the open loop sends.
    pub load_share: f64,
    /// How long the capacity probe runs.
    pub capacity_time: Duration,
    /// Clients of the capacity probe's closed loop.
    pub capacity_clients: usize,
    /// One publish or rollback this often.
    pub flip_every: Duration,
    /// How many of the most popular adapters the admin thread takes turns on.
    pub flipped_adapters: usize,
    pub rank: usize,
    pub targets: Vec<Module>,
    pub workers: usize,
    pub seed: u64,
    /// The command line, for the report.
    pub command: String,
}

/// One admin operation of the run.
#[derive(Debug, Clone)]
struct AdminOp {
    at_s: f64,
    what: &'static str,
    adapter: String,
    ok: bool,
    error: Option<String>,
}

/// The figures of one window.
#[derive(Debug, Clone)]
struct Window {
    start_s: f64,
    requests: usize,
    errors: usize,
    latency: Option<LatencySummary>,
    swap_p99_ms: Option<f64>,
    /// Largest resident set scraped in the window.
    rss_bytes: Option<f64>,
    /// Largest bytes of the factor and merged tiers scraped in the window.
    factors_bytes: Option<f64>,
    merged_bytes: Option<f64>,
    /// Largest anonymous and file-backed resident bytes and thread count of the server process
    /// in the window (`/proc/PID/status`; none where that cannot be read).
    anon_bytes: Option<f64>,
    file_bytes: Option<f64>,
    threads: Option<f64>,
    admin_ops: usize,
    admin_errors: usize,
}

/// The outcome: the report's JSON, a text summary, and whether every verdict passed.
#[derive(Debug, Clone)]
pub struct SoakReport {
    pub json: Value,
    pub text: String,
    pub passed: bool,
    charts: Vec<(String, String)>,
}

impl SoakReport {
    /// Writes `report.json`, `README.md` (the summary with the charts) and the charts' SVG files
    /// into `dir`; returns what it wrote.
    pub fn write(&self, dir: &Path) -> anyhow::Result<Vec<PathBuf>> {
        std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
        let mut written = Vec::new();
        let json_path = dir.join("report.json");
        std::fs::write(&json_path, serde_json::to_string_pretty(&self.json)? + "\n")?;
        written.push(json_path);
        let mut page = format!("# Soak report\n\n```text\n{}```\n", self.text);
        for (file, svg) in &self.charts {
            let path = dir.join(file);
            std::fs::write(&path, svg)?;
            page.push_str(&format!("\n![{file}]({file})\n"));
            written.push(path);
        }
        let md = dir.join("README.md");
        std::fs::write(&md, page)?;
        written.push(md);
        Ok(written)
    }
}

/// Runs the soak and returns its report (the verdicts inside; a failed verdict is not an error).
pub fn run_soak(s: &SoakSettings) -> anyhow::Result<SoakReport> {
    let work = tempfile::tempdir().context("making a folder for the soak's server")?;
    let base = read_base(&s.model_dir)?;
    let spec = SyntheticSpec {
        rank: s.rank,
        targets: s.targets.clone(),
        labels: 0,
        seed: s.seed,
    };
    let names: Vec<String> = (0..s.adapters).map(|i| format!("soak-{i}")).collect();
    let store = work.path().join("store");
    eprintln!("soak: writing {} synthetic adapters", names.len());
    write_into_store(&store, &base, &spec, &names)?;
    let mut config = crate::server::ServerConfig::new(&s.model_dir, &store, true);
    config.factor_budget_bytes = s.factor_budget_bytes;
    config.merged_budget_bytes = s.merged_budget_bytes;
    let server = crate::server::ServerProcess::start(&s.server_bin, work.path(), &config)?;
    let client = Client::new(server.url(), None, Some(config.admin_token.clone()))?;
    client.check_ready()?;

    let zipf = Zipf::new(names.len(), s.zipf).map_err(anyhow::Error::msg)?;
    let shape = RequestShape::default();
    let probe = Workload {
        targets: names.clone(),
        zipf: zipf.clone(),
        mix: Mix::only(Kind::Embed),
        shape: shape.clone(),
        pacing: Pacing::Closed {
            clients: s.capacity_clients,
        },
        warmup: Duration::from_secs(2),
        duration: Some(s.capacity_time),
        count: None,
        seed: s.seed,
    };
    let probed = Scenario::new("capacity", names.len(), &drive(&client, &probe, "capacity"));
    let capacity = probed.throughput();
    anyhow::ensure!(
        capacity > 0.0,
        "the capacity probe got no answers; see {}",
        server.log().display()
    );
    let rate = s.load_share * capacity;
    eprintln!(
        "soak: capacity {capacity:.1} requests/s; sending {rate:.1}/s for {:?} after a {:?} warm-up",
        s.duration, s.warmup
    );

    let origin = Instant::now();
    let sampler = MemorySampler::start(client.clone(), origin, Duration::from_secs(2));
    let proc_sampler = ProcSampler::start(server.pid(), origin, Duration::from_secs(2));
    let stop = Arc::new(AtomicBool::new(false));
    let admin = {
        let client = client.clone();
        let stop = Arc::clone(&stop);
        let base = base.clone();
        let spec = spec.clone();
        let flipped: Vec<String> = names.iter().take(s.flipped_adapters).cloned().collect();
        let every = s.flip_every;
        std::thread::spawn(move || {
            admin_loop(&client, &base, &spec, &flipped, every, origin, &stop)
        })
    };
    let soak = Workload {
        targets: names.clone(),
        zipf,
        mix: Mix::only(Kind::Embed),
        shape,
        pacing: Pacing::Open {
            rate,
            workers: s.workers,
        },
        warmup: s.warmup,
        duration: Some(s.duration),
        count: None,
        seed: s.seed ^ 0x50a4,
    };
    let run = drive(&client, &soak, "soak");
    stop.store(true, Ordering::Relaxed);
    let ops = admin.join().unwrap_or_default();
    let memory = sampler.finish();
    let process = proc_sampler.finish();
    drop(server);
    Ok(build_report(
        s,
        capacity,
        rate,
        &run.records,
        &ops,
        &memory,
        &process,
    ))
}

/// Every `every`: a new version of the next adapter in turn (even ticks) or a rollback of the
/// one published last (odd ticks), until `stop`.
fn admin_loop(
    client: &Client,
    base: &switchyard_adapters::BaseSpec,
    spec: &SyntheticSpec,
    adapters: &[String],
    every: Duration,
    origin: Instant,
    stop: &AtomicBool,
) -> Vec<AdminOp> {
    let mut ops = Vec::new();
    let mut tick: u64 = 0;
    while !stop.load(Ordering::Relaxed) {
        let due = every * (tick as u32 + 1);
        while origin.elapsed() < due {
            if stop.load(Ordering::Relaxed) {
                return ops;
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        let adapter = adapters[(tick / 2) as usize % adapters.len()].clone();
        let at_s = origin.elapsed().as_secs_f64();
        let (what, result) = if tick.is_multiple_of(2) {
            // Fresh factors each time, so every publish is a real new version.
            let bytes = package_bytes(base, spec, 1_000_000 + tick as usize);
            ("publish", bytes.and_then(|b| client.upload(&adapter, &b)))
        } else {
            ("rollback", client.rollback(&adapter))
        };
        ops.push(AdminOp {
            at_s,
            what,
            adapter,
            ok: result.is_ok(),
            error: result.err().map(|e| format!("{e:#}")),
        });
        tick += 1;
    }
    ops
}

fn windows(
    s: &SoakSettings,
    records: &[Record],
    ops: &[AdminOp],
    memory: &[MemorySample],
    process: &[ProcSample],
) -> Vec<Window> {
    let width = s.window.as_secs_f64().max(1.0);
    let end = s.warmup.as_secs_f64() + s.duration.as_secs_f64();
    let count = (end / width).ceil() as usize;
    (0..count)
        .map(|i| {
            let (lo, hi) = (i as f64 * width, (i as f64 + 1.0) * width);
            let mine: Vec<&Record> = records
                .iter()
                .filter(|r| r.sent_s >= lo && r.sent_s < hi)
                .collect();
            let ok: Vec<f64> = mine
                .iter()
                .filter(|r| r.ok())
                .map(|r| r.latency_ms)
                .collect();
            let swaps: Vec<f64> = mine.iter().filter_map(|r| r.swap_ms).collect();
            let my_ops: Vec<&AdminOp> =
                ops.iter().filter(|o| o.at_s >= lo && o.at_s < hi).collect();
            Window {
                start_s: lo,
                requests: mine.len(),
                errors: mine.iter().filter(|r| !r.ok()).count(),
                latency: LatencySummary::of(&ok),
                swap_p99_ms: percentile(&sorted(&swaps), 0.99),
                rss_bytes: largest(memory, lo, hi, |m| m.at_s, |m| m.process),
                factors_bytes: largest(memory, lo, hi, |m| m.at_s, |m| Some(m.factors)),
                merged_bytes: largest(memory, lo, hi, |m| m.at_s, |m| Some(m.merged)),
                anon_bytes: largest(process, lo, hi, |p| p.at_s, |p| Some(p.anon)),
                file_bytes: largest(process, lo, hi, |p| p.at_s, |p| Some(p.file)),
                threads: largest(process, lo, hi, |p| p.at_s, |p| Some(p.threads)),
                admin_ops: my_ops.len(),
                admin_errors: my_ops.iter().filter(|o| !o.ok).count(),
            }
        })
        .collect()
}

/// The largest of one figure over the samples taken in `[lo, hi)`; `at` is a sample's time.
fn largest<S>(
    samples: &[S],
    lo: f64,
    hi: f64,
    at: impl Fn(&S) -> f64,
    figure: impl Fn(&S) -> Option<f64>,
) -> Option<f64> {
    samples
        .iter()
        .filter(|m| at(m) >= lo && at(m) < hi)
        .filter_map(figure)
        .reduce(f64::max)
}

fn median(values: &[f64]) -> Option<f64> {
    percentile(&sorted(values), 0.5)
}

fn build_report(
    s: &SoakSettings,
    capacity: f64,
    rate: f64,
    records: &[Record],
    ops: &[AdminOp],
    memory: &[MemorySample],
    process: &[ProcSample],
) -> SoakReport {
    let warm_s = s.warmup.as_secs_f64();
    let windows = windows(s, records, ops, memory, process);
    let measured: Vec<&Window> = windows.iter().filter(|w| w.start_s >= warm_s).collect();
    let request_errors: usize = records.iter().filter(|r| !r.ok()).count();
    let admin_errors = ops.iter().filter(|o| !o.ok).count();
    let rss_after: Vec<f64> = memory
        .iter()
        .filter(|m| m.at_s >= warm_s)
        .filter_map(|m| m.process)
        .collect();
    let rss_ratio = match (
        rss_after.iter().copied().reduce(f64::min),
        rss_after.iter().copied().reduce(f64::max),
    ) {
        (Some(lo), Some(hi)) if lo > 0.0 => Some(hi / lo),
        _ => None,
    };
    let p99s: Vec<f64> = measured.iter().filter_map(|w| w.swap_p99_ms).collect();
    let third = (p99s.len() / 3).max(1);
    let (early, late) = if p99s.len() >= 3 {
        (median(&p99s[..third]), median(&p99s[p99s.len() - third..]))
    } else {
        (None, None)
    };
    let swap_stable = match (early, late) {
        (Some(e), Some(l)) => Some(l <= 1.5 * e + 0.5),
        _ => None,
    };
    let errors_pass = request_errors == 0 && admin_errors == 0;
    let memory_pass = rss_ratio.map(|r| r <= 1.10);
    let passed = errors_pass && memory_pass.unwrap_or(false) && swap_stable.unwrap_or(false);

    let mut text = format!(
        "capacity {capacity:.1} requests/s (closed loop, {} clients); sent {rate:.1}/s ({:.0}%) for {:.0} s after a {:.0} s warm-up\n\
         {} adapters, Zipf {}, rank {}, one publish or rollback every {:.1} s on the {} most popular\n\
         residency budgets: factors {:.0} MiB, merged {:.0} MiB\n\n",
        s.capacity_clients,
        s.load_share * 100.0,
        s.duration.as_secs_f64(),
        warm_s,
        s.adapters,
        s.zipf,
        s.rank,
        s.flip_every.as_secs_f64(),
        s.flipped_adapters,
        s.factor_budget_bytes as f64 / f64::from(1 << 20),
        s.merged_budget_bytes as f64 / f64::from(1 << 20),
    );
    text.push_str(&format!(
        "{:>8} {:>8} {:>6} {:>9} {:>9} {:>12} {:>9} {:>10} {:>9} {:>8} {:>8} {:>7} {:>6}\n",
        "from_s",
        "requests",
        "errors",
        "p50_ms",
        "p99_ms",
        "swap_p99_ms",
        "rss_MB",
        "factors_MB",
        "merged_MB",
        "anon_MB",
        "file_MB",
        "threads",
        "admin"
    ));
    let megabytes = |v: Option<f64>| v.map_or("-".to_owned(), |v| format!("{:.1}", v / 1e6));
    for w in &windows {
        let lat = |f: fn(&LatencySummary) -> f64| {
            w.latency
                .as_ref()
                .map_or("-".to_owned(), |l| format!("{:.1}", f(l)))
        };
        text.push_str(&format!(
            "{:>8.0} {:>8} {:>6} {:>9} {:>9} {:>12} {:>9} {:>10} {:>9} {:>8} {:>8} {:>7} {:>6}{}\n",
            w.start_s,
            w.requests,
            w.errors,
            lat(|l| l.p50_ms),
            lat(|l| l.p99_ms),
            w.swap_p99_ms.map_or("-".to_owned(), |v| format!("{v:.3}")),
            megabytes(w.rss_bytes),
            megabytes(w.factors_bytes),
            megabytes(w.merged_bytes),
            megabytes(w.anon_bytes),
            megabytes(w.file_bytes),
            w.threads.map_or("-".to_owned(), |t| format!("{t:.0}")),
            w.admin_ops,
            if w.start_s < warm_s {
                "  (warm-up)"
            } else {
                ""
            }
        ));
    }
    let verdict = |ok: Option<bool>| match ok {
        Some(true) => "pass",
        Some(false) => "FAIL",
        None => "FAIL (not measured)",
    };
    text.push_str(&format!(
        "\nerrors: {} ({request_errors} failed requests of {}, {admin_errors} failed admin operations of {})\n\
         memory: {} (largest / smallest resident set after the warm-up: {})\n\
         swap times: {} (median window p99 early {} ms, late {} ms)\n",
        verdict(Some(errors_pass)),
        records.len(),
        ops.len(),
        verdict(memory_pass),
        rss_ratio.map_or("-".to_owned(), |r| format!("{r:.3}")),
        verdict(swap_stable),
        early.map_or("-".to_owned(), |v| format!("{v:.3}")),
        late.map_or("-".to_owned(), |v| format!("{v:.3}")),
    ));
    let failures: Vec<Value> = ops
        .iter()
        .filter(|o| !o.ok)
        .take(20)
        .map(|o| json!({"at_s": round3(o.at_s), "what": o.what, "adapter": o.adapter, "error": o.error}))
        .collect();
    let json = json!({
        "command": s.command,
        "settings": {
            "duration_s": s.duration.as_secs_f64(),
            "warmup_s": warm_s,
            "factor_budget_bytes": s.factor_budget_bytes,
            "merged_budget_bytes": s.merged_budget_bytes,
            "window_s": s.window.as_secs_f64(),
            "adapters": s.adapters,
            "zipf": s.zipf,
            "load_share": s.load_share,
            "flip_every_s": s.flip_every.as_secs_f64(),
            "flipped_adapters": s.flipped_adapters,
            "rank": s.rank,
            "targets": s.targets.iter().map(|m| m.to_string()).collect::<Vec<_>>(),
            "texts_per_request": RequestShape::default().texts.len(),
            "seed": s.seed,
        },
        "capacity_per_s": round3(capacity),
        "rate_per_s": round3(rate),
        "requests": records.len(),
        "request_errors": request_errors,
        "admin_operations": ops.len(),
        "admin_errors": admin_errors,
        "admin_failures": failures,
        "rss_ratio_after_warmup": rss_ratio.map(round3),
        "swap_p99_ms_early": early.map(round3),
        "swap_p99_ms_late": late.map(round3),
        "verdicts": {
            "errors": errors_pass,
            "memory": memory_pass,
            "swap_times": swap_stable,
        },
        "passed": passed,
        "windows": windows.iter().map(|w| json!({
            "start_s": w.start_s,
            "warmup": w.start_s < warm_s,
            "requests": w.requests,
            "errors": w.errors,
            "latency": w.latency.as_ref().map(LatencySummary::to_json),
            "swap_p99_ms": w.swap_p99_ms.map(round3),
            "rss_bytes": w.rss_bytes,
            "factors_bytes": w.factors_bytes,
            "merged_bytes": w.merged_bytes,
            "anon_bytes": w.anon_bytes,
            "file_bytes": w.file_bytes,
            "threads": w.threads,
            "admin_operations": w.admin_ops,
            "admin_errors": w.admin_errors,
        })).collect::<Vec<_>>(),
    });
    let charts = charts(&windows, memory);
    SoakReport {
        json,
        text,
        passed,
        charts,
    }
}

fn charts(windows: &[Window], memory: &[MemorySample]) -> Vec<(String, String)> {
    let minutes = |s: f64| s / 60.0;
    let series = |label: &str, points: Vec<(f64, f64)>| crate::charts::Series {
        label: label.to_owned(),
        points,
    };
    let rss = series(
        "process resident set",
        memory
            .iter()
            .filter_map(|m| m.process.map(|p| (minutes(m.at_s), p / 1e6)))
            .collect(),
    );
    let factors = series(
        "adapter factors",
        memory
            .iter()
            .map(|m| (minutes(m.at_s), m.factors / 1e6))
            .collect(),
    );
    let p99 = series(
        "request p99",
        windows
            .iter()
            .filter_map(|w| w.latency.as_ref().map(|l| (minutes(w.start_s), l.p99_ms)))
            .collect(),
    );
    let p50 = series(
        "request p50",
        windows
            .iter()
            .filter_map(|w| w.latency.as_ref().map(|l| (minutes(w.start_s), l.p50_ms)))
            .collect(),
    );
    let swap = series(
        "swap p99 (elapsed_ms.swap)",
        windows
            .iter()
            .filter_map(|w| w.swap_p99_ms.map(|v| (minutes(w.start_s), v)))
            .collect(),
    );
    let mut out = Vec::new();
    for (file, title, y, lines) in [
        (
            "memory.svg",
            "Memory over the soak",
            "MB",
            vec![rss, factors],
        ),
        (
            "latency.svg",
            "Request latency per window",
            "ms",
            vec![p50, p99],
        ),
        ("swap-p99.svg", "Swap time p99 per window", "ms", vec![swap]),
    ] {
        if let Ok(svg) = line_chart(
            title,
            "minutes since the start",
            y,
            Axis::Linear,
            &lines,
            true,
            SeriesLabelPosition::LowerRight,
        ) {
            out.push((file.to_owned(), svg));
        }
    }
    out
}
