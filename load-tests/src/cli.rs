//! The command line: `switchyard-load run` (a workload against a running server), and the
//! built-in scenarios `switchyard-load overhead` and `switchyard-load fairness`, which start
//! their own servers. Flags are
//! checked as they are parsed, so a bad value is refused with the flag and the value named.

use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::{Context, bail};
use clap::{Args, Parser, Subcommand};
use switchyard_adapters::Module;

use crate::client::{Client, RequestShape};
use crate::driver::{Pacing, Workload, drive};
use crate::fairness::{FairnessSettings, run_fairness};
use crate::mix::{Kind, Mix};
use crate::overhead::{OverheadSettings, run_overhead};
use crate::report::Report;
use crate::results::Scenario;
use crate::scrape::{MemorySampler, parse, swap_histograms};
use crate::synthetic::{SyntheticSpec, package_bytes, read_base};
use crate::workload::Zipf;

#[derive(Debug, Parser)]
#[command(
    name = "switchyard-load",
    about = "Load generator and swap-overhead report for a switchyard server (HTTP only)"
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

// Parsed once per process: the size of the larger variant costs nothing.
#[allow(clippy::large_enum_variant)]
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Send a workload to a running server and write a report.
    Run(RunArgs),
    /// The built-in swap-overhead scenario: starts `switchyard serve` itself and measures base,
    /// merged, unmerged and mixed adapters side by side.
    Overhead(OverheadArgs),
    /// The built-in fairness scenario: starts `switchyard serve` itself with three tenants and
    /// measures a steady tenant's latency alone and while another tenant floods the server.
    Fairness(FairnessArgs),
    /// The soak: starts `switchyard serve` itself, measures its capacity, then sends a share of
    /// it over many adapters for a long time while adapters are published and rolled back live;
    /// reports errors, memory and swap times per window, and exits 1 when a verdict fails.
    Soak(SoakArgs),
    /// The language-model serving scenario, on a decoder model folder: starts `switchyard serve`
    /// itself (three servers) and measures time to first token with and without chunked prefill
    /// while long prompts arrive, decode speed over 8 adapters against the base, and the prefix
    /// cache's second request against its first.
    Serving(ServingArgs),
}

#[derive(Debug, Args)]
pub struct ServingArgs {
    /// The `switchyard` binary to start (a release build: cargo build --release -p switchyard-server).
    #[arg(long)]
    pub server_bin: PathBuf,
    /// A decoder model folder (Llama layout): config.json, safetensors and tokenizer.json.
    #[arg(long)]
    pub model: PathBuf,
    /// Folder for serving.json and serving.txt.
    #[arg(long, default_value = "serving-report")]
    pub out: PathBuf,
    /// Tokens of each of the 4 long prompts that arrive while short requests run.
    #[arg(long, default_value_t = 2048, value_parser = parse_positive_count)]
    pub long_tokens: usize,
    /// Tokens of the system prompt the prefix-cache case shares.
    #[arg(long, default_value_t = 1000, value_parser = parse_positive_count)]
    pub system_tokens: usize,
    /// Tokens each of the 16 decoding sequences generates.
    #[arg(long, default_value_t = 64, value_parser = parse_positive_count)]
    pub decode_tokens: usize,
    /// Rounds of each case, alternating between the compared servers or targets.
    #[arg(long, default_value_t = 3, value_parser = parse_positive_count)]
    pub rounds: usize,
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
}

#[derive(Debug, Args)]
pub struct SoakArgs {
    /// The `switchyard` binary to start.
    #[arg(long)]
    pub server_bin: PathBuf,
    /// The base model folder (an encoder: the soak sends /embed).
    #[arg(long)]
    pub model: PathBuf,
    /// Folder for report.json, README.md and the charts.
    #[arg(long)]
    pub out: PathBuf,
    /// Measured time after the warm-up (30m, 90s, ...).
    #[arg(long, default_value = "30m", value_parser = parse_duration)]
    pub duration: Duration,
    /// Time at the start left out of the verdicts.
    #[arg(long, default_value = "2m", value_parser = parse_duration)]
    pub warmup: Duration,
    /// Length of one reporting window.
    #[arg(long, default_value = "1m", value_parser = parse_duration)]
    pub window: Duration,
    /// Synthetic adapters the traffic is spread over.
    #[arg(long, default_value_t = 1000, value_parser = parse_positive_count)]
    pub adapters: usize,
    /// Zipf exponent of adapter popularity (above 0).
    #[arg(long, default_value_t = 1.0, value_parser = parse_zipf)]
    pub zipf: f64,
    /// Share of the measured capacity to send (above 0, at most 1).
    #[arg(long, default_value_t = 0.7, value_parser = parse_share)]
    pub load: f64,
    /// How long the capacity probe runs.
    #[arg(long, default_value = "20s", value_parser = parse_duration)]
    pub capacity_time: Duration,
    /// Clients of the capacity probe's closed loop.
    #[arg(long, default_value_t = 4, value_parser = parse_positive_count)]
    pub capacity_clients: usize,
    /// One publish or rollback this often.
    #[arg(long, default_value = "2s", value_parser = parse_duration)]
    pub flip_every: Duration,
    /// How many of the most popular adapters take turns being published and rolled back.
    #[arg(long, default_value_t = 20, value_parser = parse_positive_count)]
    pub flipped_adapters: usize,
    /// The server's memory for resident adapter factors, in MiB. The default holds about a
    /// fifth of the 1,000 default adapters (rank 8 on attn.q,attn.v of a 6-layer, 384-wide
    /// encoder), so the tier fills during the warm-up and then evicts, as a server whose catalogue
    /// outgrows its memory does; a budget above the catalogue keeps growing as new adapters are
    /// first asked for, and the memory verdict then measures the catalogue, not the server.
    #[arg(long, default_value_t = 64, value_parser = parse_positive_count)]
    pub factor_budget_mib: usize,
    /// The server's memory for merged variants of popular adapters, in MiB (0 turns merging off).
    #[arg(long, default_value_t = 64)]
    pub merged_budget_mib: usize,
    /// Rank of the synthetic adapters.
    #[arg(long, default_value_t = 8, value_parser = parse_positive_count)]
    pub rank: usize,
    /// Matrices the synthetic adapters target.
    #[arg(long, default_value = "attn.q,attn.v", value_parser = parse_targets)]
    pub targets: Targets,
    /// Worker threads of the open loop.
    #[arg(long, default_value_t = 64, value_parser = parse_positive_count)]
    pub workers: usize,
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
}

/// A share: above 0 and at most 1.
pub fn parse_share(text: &str) -> Result<f64, String> {
    match text.trim().parse::<f64>() {
        Ok(x) if x > 0.0 && x <= 1.0 => Ok(x),
        _ => Err(format!(
            "expected a share above 0 and at most 1 (0.7 is 70%), got {text:?}"
        )),
    }
}

/// `switchyard-load soak`.
pub fn soak(args: &SoakArgs, command_line: &str) -> anyhow::Result<crate::soak::SoakReport> {
    if args.flipped_adapters > args.adapters {
        bail!(
            "--flipped-adapters {} is more than --adapters {}",
            args.flipped_adapters,
            args.adapters
        );
    }
    check_server_bin(&args.server_bin)?;
    crate::soak::run_soak(&crate::soak::SoakSettings {
        server_bin: absolute(&args.server_bin, "--server-bin")?,
        model_dir: absolute(&args.model, "--model")?,
        duration: args.duration,
        warmup: args.warmup,
        factor_budget_bytes: args.factor_budget_mib as u64 * (1 << 20),
        merged_budget_bytes: args.merged_budget_mib as u64 * (1 << 20),
        window: args.window,
        adapters: args.adapters,
        zipf: args.zipf,
        load_share: args.load,
        capacity_time: args.capacity_time,
        capacity_clients: args.capacity_clients,
        flip_every: args.flip_every,
        flipped_adapters: args.flipped_adapters,
        rank: args.rank,
        targets: args.targets.0.clone(),
        workers: args.workers,
        seed: args.seed,
        command: command_line.to_owned(),
    })
}

#[derive(Debug, Args)]
pub struct RunArgs {
    /// The server, as http://HOST:PORT.
    #[arg(long)]
    pub url: String,
    /// A tenant's bearer key, when the server has tenants.
    #[arg(long)]
    pub key: Option<String>,
    /// The admin token, to create adapters through the admin API.
    #[arg(long)]
    pub admin_token: Option<String>,
    /// Adapter names by popularity, most popular first (`base` for the base model alone).
    #[arg(long, value_delimiter = ',', conflicts_with = "adapter_prefix")]
    pub adapters: Vec<String>,
    /// Name adapters PREFIX0, PREFIX1, ... (with --adapter-count).
    #[arg(long, requires = "adapter_count")]
    pub adapter_prefix: Option<String>,
    /// How many adapters the prefix names.
    #[arg(long, value_parser = parse_positive_count)]
    pub adapter_count: Option<usize>,
    /// Create the prefixed adapters first: random factors, uploaded through the admin API.
    #[arg(long, requires = "adapter_prefix", requires = "model")]
    pub create_adapters: bool,
    /// The base model folder of the server, to build created adapters for.
    #[arg(long)]
    pub model: Option<PathBuf>,
    /// Rank of created adapters.
    #[arg(long, default_value_t = 8, value_parser = parse_positive_count)]
    pub rank: usize,
    /// Matrices created adapters target.
    #[arg(long, default_value = "attn.q,attn.v", value_parser = parse_targets)]
    pub targets: Targets,
    /// Zipf exponent of adapter popularity (above 0).
    #[arg(long, default_value_t = 1.0, value_parser = parse_zipf, allow_negative_numbers = true)]
    pub zipf: f64,
    /// Endpoints by weight: embed, classify and generate.
    #[arg(long, default_value = "embed", value_parser = Mix::parse)]
    pub mix: Mix,
    /// Open loop: Poisson arrivals at this many requests per second.
    #[arg(long, value_parser = parse_rate, conflicts_with = "clients", allow_negative_numbers = true)]
    pub rate: Option<f64>,
    /// Worker threads of the open loop (requests in flight at most).
    #[arg(long, default_value_t = 64, value_parser = parse_positive_count)]
    pub workers: usize,
    /// Closed loop: this many clients, each sending when its last answer came (default 2).
    #[arg(long, value_parser = parse_positive_count)]
    pub clients: Option<usize>,
    /// Measured time after the warm-up (10s, 500ms, 2m; a bare number is seconds).
    #[arg(long, value_parser = parse_duration)]
    pub duration: Option<Duration>,
    /// Measured requests after the warm-up.
    #[arg(long, value_parser = parse_positive_count)]
    pub count: Option<usize>,
    /// Time at the start whose requests are left out of the results.
    #[arg(long, default_value = "1s", value_parser = parse_duration)]
    pub warmup: Duration,
    /// Texts per embed or classify request.
    #[arg(long, default_value_t = 4, value_parser = parse_positive_count)]
    pub texts: usize,
    /// Seed of the schedule and of created adapters.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Send each request's adapter in the Switchyard-Route header too (for a front such as
    /// deploy/nginx/switchyard.conf that routes by adapter); the report then says how each
    /// adapter's requests spread over the replicas that answered.
    #[arg(long)]
    pub route_header: bool,
    /// Folder for report.json, report.html and the charts.
    #[arg(long, default_value = "load-report")]
    pub out: PathBuf,
}

#[derive(Debug, Args)]
pub struct OverheadArgs {
    /// The `switchyard` binary to start.
    #[arg(long)]
    pub server_bin: PathBuf,
    /// The base model folder (an encoder: the scenario sends /embed).
    #[arg(long)]
    pub model: PathBuf,
    /// Folder for report.json, report.html and the charts.
    #[arg(long)]
    pub out: PathBuf,
    /// A short run, for a test: fewer adapters, shorter scenarios.
    #[arg(long)]
    pub quick: bool,
    /// Clients of the closed loop.
    #[arg(long, default_value_t = 2, value_parser = parse_positive_count)]
    pub clients: usize,
    /// Rank of the synthetic adapters.
    #[arg(long, default_value_t = 8, value_parser = parse_positive_count)]
    pub rank: usize,
    /// Matrices the synthetic adapters target.
    #[arg(long, default_value = "attn.q,attn.v", value_parser = parse_targets)]
    pub targets: Targets,
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
}

#[derive(Debug, Args)]
pub struct FairnessArgs {
    /// The `switchyard` binary to start.
    #[arg(long)]
    pub server_bin: PathBuf,
    /// The base model folder (an encoder: the scenario sends /embed).
    #[arg(long)]
    pub model: PathBuf,
    /// Folder for report.json, report.html and the chart.
    #[arg(long)]
    pub out: PathBuf,
    /// A short run, for a test: one round of short phases.
    #[arg(long)]
    pub quick: bool,
    /// Texts per request, for every tenant.
    #[arg(long, default_value_t = 4, value_parser = parse_positive_count)]
    pub texts: usize,
    /// The flood's arrival rate as a multiple of the measured capacity.
    #[arg(long, default_value_t = 10.0, value_parser = parse_rate)]
    pub flood_factor: f64,
    /// The steady tenant's arrival rate as a share of the measured capacity (above 0, below 1).
    #[arg(long, default_value_t = 0.1, value_parser = parse_steady_share)]
    pub steady_share: f64,
    /// Worker threads of a flood's open loop (requests in flight at most).
    #[arg(long, default_value_t = 256, value_parser = parse_positive_count)]
    pub workers: usize,
    /// CPU niceness (0 to 19) of the flooding client's threads. A real flood comes from other
    /// machines and costs this one no client CPU; on one machine the load generator's own flood
    /// threads would compete with the server for its cores. 0 measures that worse case.
    #[arg(long, default_value_t = 19, value_parser = clap::value_parser!(i32).range(0..=19))]
    pub flood_client_niceness: i32,
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
}

/// The steady tenant's share: a number above 0 and below 1 (at 1 it alone would fill the server).
pub fn parse_steady_share(text: &str) -> Result<f64, String> {
    match text.trim().parse::<f64>() {
        Ok(x) if x > 0.0 && x < 1.0 => Ok(x),
        _ => Err(format!(
            "expected a share above 0 and below 1, got {text:?}"
        )),
    }
}

/// A Zipf exponent: finite and above 0.
pub fn parse_zipf(text: &str) -> Result<f64, String> {
    match text.trim().parse::<f64>() {
        Ok(s) if s.is_finite() && s > 0.0 => Ok(s),
        _ => Err(format!(
            "the Zipf exponent must be a number above 0, got {text:?}"
        )),
    }
}

/// An arrival rate: finite and above 0 requests per second.
pub fn parse_rate(text: &str) -> Result<f64, String> {
    match text.trim().parse::<f64>() {
        Ok(r) if r.is_finite() && r > 0.0 => Ok(r),
        _ => Err(format!(
            "the rate must be above 0 requests per second, got {text:?}"
        )),
    }
}

/// A whole number of at least 1.
pub fn parse_positive_count(text: &str) -> Result<usize, String> {
    match text.trim().parse::<usize>() {
        Ok(n) if n >= 1 => Ok(n),
        _ => Err(format!(
            "expected a whole number of at least 1, got {text:?}"
        )),
    }
}

/// The matrices adapters target, given as one comma-separated value (`attn.q,attn.v`).
#[derive(Debug, Clone, PartialEq)]
pub struct Targets(pub Vec<Module>);

pub fn parse_targets(text: &str) -> Result<Targets, String> {
    Module::parse_list(text).map(Targets)
}

/// A duration: `10s`, `500ms`, `2m`, or a bare number of seconds.
pub fn parse_duration(text: &str) -> Result<Duration, String> {
    let t = text.trim();
    let (number, scale) = if let Some(n) = t.strip_suffix("ms") {
        (n, 1e-3)
    } else if let Some(n) = t.strip_suffix('s') {
        (n, 1.0)
    } else if let Some(n) = t.strip_suffix('m') {
        (n, 60.0)
    } else {
        (t, 1.0)
    };
    match number.trim().parse::<f64>() {
        Ok(v) if v.is_finite() && v >= 0.0 => Ok(Duration::from_secs_f64(v * scale)),
        _ => Err(format!(
            "expected a duration such as 10s, 500ms or 2m, got {text:?}"
        )),
    }
}

impl RunArgs {
    /// The adapter names of the run.
    pub fn target_names(&self) -> Vec<String> {
        match (&self.adapter_prefix, self.adapter_count) {
            (Some(prefix), Some(n)) => (0..n).map(|i| format!("{prefix}{i}")).collect(),
            _ if !self.adapters.is_empty() => self.adapters.clone(),
            _ => vec!["base".to_owned()],
        }
    }

    pub fn pacing(&self) -> Pacing {
        match self.rate {
            Some(rate) => Pacing::Open {
                rate,
                workers: self.workers,
            },
            None => Pacing::Closed {
                clients: self.clients.unwrap_or(2),
            },
        }
    }
}

/// `switchyard-load run`.
pub fn run(args: &RunArgs, command_line: &str) -> anyhow::Result<Report> {
    let targets = args.target_names();
    let zipf = Zipf::new(targets.len(), args.zipf).map_err(anyhow::Error::msg)?;
    let client = Client::new(&args.url, args.key.clone(), args.admin_token.clone())?
        .with_route_header(args.route_header);
    client.check_ready()?;
    if args.create_adapters {
        let model = args
            .model
            .as_ref()
            .context("--create-adapters needs --model")?;
        let base = read_base(model)?;
        let spec = SyntheticSpec {
            rank: args.rank,
            targets: args.targets.0.clone(),
            labels: if args.mix.kinds().contains(&Kind::Classify) {
                3
            } else {
                0
            },
            seed: args.seed,
        };
        eprintln!("creating {} adapters on {}", targets.len(), client.url());
        for name in &targets {
            let bytes = package_bytes(&base, &spec, crate::synthetic::name_index(name))?;
            client.upload(name, &bytes)?;
        }
    }
    let duration = match (args.duration, args.count) {
        (None, None) => Some(Duration::from_secs(10)),
        (d, _) => d,
    };
    let texts = RequestShape::default().texts;
    let shape = RequestShape {
        texts: (0..args.texts)
            .map(|i| texts[i % texts.len()].clone())
            .collect(),
        ..RequestShape::default()
    };
    let workload = Workload {
        targets: targets.clone(),
        zipf,
        mix: args.mix.clone(),
        shape,
        pacing: args.pacing(),
        warmup: args.warmup,
        duration,
        count: args.count,
        seed: args.seed,
    };
    let origin = std::time::Instant::now();
    // /metrics takes the admin token unless the server serves it publicly; without it the run
    // goes on and reports no swap or memory figures from the server.
    let scrape = |client: &Client| match client.metrics() {
        Ok(text) => swap_histograms(&parse(&text)),
        Err(e) => {
            eprintln!(
                "switchyard-load: no figures from /metrics ({e:#}); give --admin-token for them"
            );
            Default::default()
        }
    };
    let before = scrape(&client);
    let sampler = MemorySampler::start(client.clone(), origin, Duration::from_millis(250));
    let name = format!("{} adapters", targets.len());
    let records = drive(&client, &workload, &name);
    let memory = sampler.finish();
    let after = scrape(&client);
    let mut scenario = Scenario::new(&name, targets.len(), &records);
    scenario.swap_metrics = after
        .iter()
        .map(|(stage, h)| (stage.clone(), h.since(before.get(stage))))
        .collect();
    if scenario.records.is_empty() {
        bail!("no request was measured: the warm-up took the whole run");
    }
    if let Some(spread) = scenario.replica_spread() {
        eprintln!(
            "replicas: {} answered, {} of {} adapters each on one replica, {} of requests on their adapter's most used replica",
            spread["requests_by_replica"],
            spread["adapters_on_one_replica"],
            spread["adapters"],
            spread["requests_on_their_adapters_top_replica"]
        );
    }
    let pacing = match workload.pacing {
        Pacing::Closed { clients } => format!("a closed loop of {clients} clients"),
        Pacing::Open { rate, workers } => format!(
            "open-loop Poisson arrivals at {rate} requests/s over {workers} workers; latency \
             counts from each request's scheduled send time (no coordinated omission)"
        ),
    };
    let l = scenario.latency();
    let fmt = |v: Option<f64>| v.map_or("-".to_owned(), |v| format!("{v:.1}"));
    let errors: usize = scenario.errors().values().sum();
    let table = vec![
        [
            "scenario",
            "requests",
            "errors",
            "requests/s",
            "p50 ms",
            "p90 ms",
            "p99 ms",
            "max ms",
        ]
        .map(str::to_owned)
        .to_vec(),
        vec![
            name.clone(),
            scenario.records.len().to_string(),
            errors.to_string(),
            format!("{:.1}", scenario.throughput()),
            fmt(l.map(|l| l.p50_ms)),
            fmt(l.map(|l| l.p90_ms)),
            fmt(l.map(|l| l.p99_ms)),
            fmt(l.map(|l| l.max_ms)),
        ],
    ];
    let mut extra = serde_json::Map::new();
    extra.insert(
        "settings".to_owned(),
        serde_json::json!({
            "url": client.url(),
            "adapters": targets.len(),
            "zipf_exponent": args.zipf,
            "mix": args.mix.to_string(),
            "pacing": pacing,
            "warmup_s": args.warmup.as_secs_f64(),
            "duration_s": duration.map(|d| d.as_secs_f64()),
            "count": args.count,
            "seed": args.seed,
        }),
    );
    Ok(Report {
        title: "switchyard load run".to_owned(),
        command: command_line.to_owned(),
        notes: vec![format!(
            "{} requests over {} adapters (Zipf s = {}), mix {}, {pacing}.",
            scenario.records.len(),
            targets.len(),
            args.zipf,
            args.mix
        )],
        by_adapters: vec![0],
        baseline: None,
        scenarios: vec![scenario],
        table,
        memory: vec![("server".to_owned(), memory)],
        extra,
        latency_only: false,
    })
}

/// `switchyard-load overhead`.
pub fn overhead(args: &OverheadArgs, command_line: &str) -> anyhow::Result<Report> {
    check_server_bin(&args.server_bin)?;
    run_overhead(&OverheadSettings {
        server_bin: absolute(&args.server_bin, "--server-bin")?,
        model_dir: absolute(&args.model, "--model")?,
        out_dir: args.out.clone(),
        quick: args.quick,
        clients: args.clients,
        rank: args.rank,
        targets: args.targets.0.clone(),
        seed: args.seed,
        command: command_line.to_owned(),
    })
}

/// Refuses a `--server-bin` that is not a file, saying how to build one.
fn check_server_bin(bin: &Path) -> anyhow::Result<()> {
    if !bin.is_file() {
        bail!(
            "--server-bin {} is not a file (build it: cargo build --release -p switchyard-server)",
            bin.display()
        );
    }
    Ok(())
}

/// `p` made absolute, naming `flag` when it cannot be: a scenario's servers run in their own
/// folders, so paths must not depend on this one.
fn absolute(p: &Path, flag: &str) -> anyhow::Result<PathBuf> {
    std::fs::canonicalize(p).with_context(|| format!("{flag} {}", p.display()))
}

/// `switchyard-load serving`.
pub fn serving(
    args: &ServingArgs,
    command_line: &str,
) -> anyhow::Result<crate::serving::ServingReport> {
    check_server_bin(&args.server_bin)?;
    crate::serving::run_serving(&crate::serving::ServingSettings {
        server_bin: absolute(&args.server_bin, "--server-bin")?,
        model_dir: absolute(&args.model, "--model")?,
        out_dir: args.out.clone(),
        long_tokens: args.long_tokens,
        system_tokens: args.system_tokens,
        rounds: args.rounds,
        decode_tokens: args.decode_tokens,
        seed: args.seed,
        command: command_line.to_owned(),
    })
}

/// `switchyard-load fairness`.
pub fn fairness(args: &FairnessArgs, command_line: &str) -> anyhow::Result<Report> {
    check_server_bin(&args.server_bin)?;
    run_fairness(&FairnessSettings {
        server_bin: absolute(&args.server_bin, "--server-bin")?,
        model_dir: absolute(&args.model, "--model")?,
        out_dir: args.out.clone(),
        quick: args.quick,
        texts: args.texts,
        flood_factor: args.flood_factor,
        steady_share: args.steady_share,
        workers: args.workers,
        flood_client_niceness: args.flood_client_niceness,
        seed: args.seed,
        command: command_line.to_owned(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn flags_are_checked_as_they_are_parsed() {
        assert_eq!(parse_zipf("1.2"), Ok(1.2));
        assert!(parse_zipf("0").unwrap_err().contains("above 0"));
        assert!(parse_zipf("-1").is_err());
        assert!(
            parse_rate("0")
                .unwrap_err()
                .contains("rate must be above 0")
        );
        assert_eq!(parse_rate("50"), Ok(50.0));
        assert_eq!(parse_duration("500ms"), Ok(Duration::from_millis(500)));
        assert_eq!(parse_duration("2m"), Ok(Duration::from_secs(120)));
        assert_eq!(parse_duration("1.5"), Ok(Duration::from_millis(1500)));
        assert!(parse_duration("soon").is_err());
        assert!(parse_positive_count("0").is_err());
        assert_eq!(parse_steady_share("0.1"), Ok(0.1));
        for bad in ["0", "1", "-0.5", "lots"] {
            assert!(
                parse_steady_share(bad).unwrap_err().contains("share"),
                "{bad}"
            );
        }
        assert_eq!(parse_share("1"), Ok(1.0));
        assert!(parse_share("1.5").unwrap_err().contains("share"));
    }

    #[test]
    fn names_come_from_a_list_a_prefix_or_default_to_base() {
        let parse = |args: &[&str]| {
            let mut all = vec!["switchyard-load", "run", "--url", "http://127.0.0.1:1"];
            all.extend_from_slice(args);
            match Cli::try_parse_from(all).map_err(|e| e.to_string())?.command {
                Command::Run(r) => Ok(r),
                other => Err(format!("{other:?}")),
            }
        };
        let r = parse(&["--adapter-prefix", "syn-", "--adapter-count", "3"]).unwrap();
        assert_eq!(r.target_names(), ["syn-0", "syn-1", "syn-2"]);
        assert_eq!(r.pacing(), Pacing::Closed { clients: 2 });
        let r = parse(&["--adapters", "a,b", "--rate", "20"]).unwrap();
        assert_eq!(r.target_names(), ["a", "b"]);
        assert_eq!(
            r.pacing(),
            Pacing::Open {
                rate: 20.0,
                workers: 64
            }
        );
        assert_eq!(parse(&[]).unwrap().target_names(), ["base"]);
        let e = parse(&["--mix", "embed=1,rerank=2"]).unwrap_err();
        assert!(e.contains("unknown mix entry \"rerank\""), "{e}");
        let e = parse(&["--rate", "5", "--clients", "2"]).unwrap_err();
        assert!(e.contains("cannot be used with"), "{e}");
    }
}
