//! The built-in swap-overhead scenario: what serving through adapters costs against the base
//! model alone, measured side by side in one run. It writes synthetic adapters into fresh stores,
//! starts two servers (merging off, and merging on with a promotion policy that promotes the one
//! adapter all traffic goes to), and measures with the same request (one /embed of the same
//! texts) in a closed loop:
//!
//! - base only (on each server, the reference of its ratios);
//! - one adapter merged (merging on; answers checked for `merged: true` before measuring);
//! - one adapter unmerged (merging off);
//! - N adapters mixed, N = 1, 10, 100, 1000, Zipf s = 1.0 (merging off);
//! - cold start: the first request to an adapter that is not resident, against the next one.

mod summary;

use std::path::PathBuf;
use std::time::{Duration, Instant};

use anyhow::{Context, bail};
use switchyard_adapters::Module;

use crate::client::{Client, RequestShape};
use crate::driver::{Pacing, Workload, drive};
use crate::mix::{Kind, Mix};
use crate::report::Report;
use crate::results::Scenario;
use crate::scrape::{MemorySampler, SwapHistogram, parse, swap_histograms};
use crate::server::{ServerConfig, ServerProcess};
use crate::synthetic::{SyntheticSpec, read_base, write_into_store};
use crate::workload::Zipf;
use summary::build_report;
pub use summary::{ColdStart, Ratio, ratio};

/// What the scenario is run with.
#[derive(Debug, Clone)]
pub struct OverheadSettings {
    pub server_bin: PathBuf,
    pub model_dir: PathBuf,
    pub out_dir: PathBuf,
    pub quick: bool,
    pub clients: usize,
    pub rank: usize,
    pub targets: Vec<Module>,
    pub seed: u64,
    /// The command line, for the report.
    pub command: String,
}

/// Sizes of one run: the full one, or `--quick` for a test.
#[derive(Debug, Clone, PartialEq)]
pub struct Plan {
    /// Every scenario is measured once per round, the rounds one after the other.
    pub rounds: usize,
    /// Warm-up and measured time of one scenario in one round.
    pub warmup: Duration,
    pub duration: Duration,
    pub mixed: Vec<usize>,
    pub cold_probes: usize,
    pub promote_window_rows: usize,
}

impl Plan {
    pub fn new(quick: bool) -> Self {
        if quick {
            Self {
                rounds: 2,
                warmup: Duration::from_millis(300),
                duration: Duration::from_millis(600),
                mixed: vec![1, 10],
                cold_probes: 3,
                promote_window_rows: 32,
            }
        } else {
            Self {
                rounds: 4,
                warmup: Duration::from_secs(1),
                duration: Duration::from_secs(6),
                mixed: vec![1, 10, 100, 1000],
                cold_probes: 30,
                promote_window_rows: 64,
            }
        }
    }
}

const SOLO: &str = "solo";

fn mixed_names(n: usize) -> Vec<String> {
    (0..n).map(|i| format!("mix-{i}")).collect()
}

/// `1 adapter mixed`, `10 adapters mixed`.
pub fn mixed_name(n: usize) -> String {
    format!("{n} adapter{} mixed", if n == 1 { "" } else { "s" })
}

fn cold_names(n: usize) -> Vec<String> {
    (0..n).map(|i| format!("cold-{i}")).collect()
}

/// Runs the scenario and returns its report (not yet written).
pub fn run_overhead(s: &OverheadSettings) -> anyhow::Result<Report> {
    let plan = Plan::new(s.quick);
    let base = read_base(&s.model_dir)?;
    let work = tempfile::tempdir().context("creating a temporary folder")?;
    let spec = SyntheticSpec {
        rank: s.rank,
        targets: s.targets.clone(),
        labels: 0,
        seed: s.seed,
    };
    let most = plan.mixed.iter().copied().max().unwrap_or(0);
    eprintln!(
        "writing {} synthetic adapters (rank {}, {}) into fresh stores",
        2 + most + plan.cold_probes,
        s.rank,
        targets_text(&s.targets)
    );
    let store_off = work.path().join("store-merging-off");
    let store_on = work.path().join("store-merging-on");
    write_into_store(&store_off, &base, &spec, &[SOLO.to_owned()])?;
    write_into_store(&store_off, &base, &spec, &mixed_names(most))?;
    write_into_store(&store_off, &base, &spec, &cold_names(plan.cold_probes))?;
    write_into_store(&store_on, &base, &spec, &[SOLO.to_owned()])?;

    // Both servers run for the whole scenario, so that the rounds below can interleave them.
    let dir_on = work.path().join("merging-on");
    let dir_off = work.path().join("merging-off");
    std::fs::create_dir_all(&dir_on)?;
    std::fs::create_dir_all(&dir_off)?;
    let config_on = ServerConfig {
        promote_window_rows: plan.promote_window_rows,
        ..ServerConfig::new(&s.model_dir, &store_on, true)
    };
    let config_off = ServerConfig::new(&s.model_dir, &store_off, false);
    let server_on = ServerProcess::start(&s.server_bin, &dir_on, &config_on)?;
    let server_off = ServerProcess::start(&s.server_bin, &dir_off, &config_off)?;
    // The admin token also opens /metrics, which the scenario scrapes.
    let client_on = Client::new(server_on.url(), None, Some(config_on.admin_token.clone()))?;
    let client_off = Client::new(server_off.url(), None, Some(config_off.admin_token.clone()))?;
    let origin = Instant::now();
    let period = Duration::from_millis(250);
    let sampler_on = MemorySampler::start(client_on.clone(), origin, period);
    let sampler_off = MemorySampler::start(client_off.clone(), origin, period);
    let on = Runner {
        client: &client_on,
        plan: &plan,
        clients: s.clients,
        seed: s.seed,
    };
    let off = Runner {
        client: &client_off,
        ..on
    };

    // (name, merging on, targets, distinct adapters), in report order.
    let mut specs: Vec<(String, bool, Vec<String>, usize)> = vec![
        (
            "base (merging on)".to_owned(),
            true,
            vec!["base".to_owned()],
            0,
        ),
        (
            "one adapter merged".to_owned(),
            true,
            vec![SOLO.to_owned()],
            1,
        ),
        ("base".to_owned(), false, vec!["base".to_owned()], 0),
        (
            "one adapter unmerged".to_owned(),
            false,
            vec![SOLO.to_owned()],
            1,
        ),
    ];
    for &n in &plan.mixed {
        specs.push((mixed_name(n), false, mixed_names(n), n));
    }
    // Each scenario is measured in a slice of every round, so that a burst of other work on
    // this machine falls on all of them alike rather than on whichever ran at that moment.
    let mut pooled: Vec<Option<Scenario>> = vec![None; specs.len()];
    for round in 0..plan.rounds {
        for (i, (name, merging, targets, adapters)) in specs.iter().enumerate() {
            let run = if *merging { &on } else { &off };
            let label = format!("{name} [{}/{}]", round + 1, plan.rounds);
            if *merging && *adapters == 1 {
                run.await_merged(SOLO)?;
            }
            let targets: Vec<&str> = targets.iter().map(String::as_str).collect();
            let mut part = run.measure(&label, &targets, *adapters)?;
            part.name = name.clone();
            match &mut pooled[i] {
                Some(p) => p.absorb(part),
                slot => *slot = Some(part),
            }
        }
    }
    let scenarios: Vec<Scenario> = pooled.into_iter().flatten().collect();
    let share = |name: &str| {
        scenarios
            .iter()
            .find(|x| x.name == name)
            .and_then(Scenario::merged_share)
            .unwrap_or(0.0)
    };
    if share("one adapter merged") < 0.9 {
        bail!(
            "only {:.0}% of the answers of the merged scenario ran a merged variant",
            share("one adapter merged") * 100.0
        );
    }
    if share("one adapter unmerged") > 0.0 {
        bail!(
            "the server with merging off answered merged: true in the unmerged scenario; its \
             config is {}",
            dir_off.join("switchyard.toml").display()
        );
    }
    let cold = off.cold_start(&cold_names(plan.cold_probes))?;
    let memory = vec![
        ("merging on".to_owned(), sampler_on.finish()),
        ("merging off".to_owned(), sampler_off.finish()),
    ];
    drop((server_on, server_off));

    let failed: usize = scenarios
        .iter()
        .map(|s| s.errors().values().sum::<usize>())
        .sum();
    if failed > 0 {
        let detail: Vec<String> = scenarios
            .iter()
            .filter(|s| !s.errors().is_empty())
            .map(|s| format!("{}: {:?}", s.name, s.errors()))
            .collect();
        eprintln!("warning: {failed} requests failed ({})", detail.join("; "));
    }
    Ok(build_report(s, &plan, &base, scenarios, memory, cold))
}

fn targets_text(targets: &[Module]) -> String {
    targets
        .iter()
        .map(|m| m.as_str())
        .collect::<Vec<_>>()
        .join(",")
}

/// Runs scenarios against one server.
struct Runner<'a> {
    client: &'a Client,
    plan: &'a Plan,
    clients: usize,
    seed: u64,
}

impl Runner<'_> {
    fn swap_now(&self) -> anyhow::Result<std::collections::BTreeMap<String, SwapHistogram>> {
        Ok(swap_histograms(&parse(&self.client.metrics()?)))
    }

    /// One closed-loop scenario over `targets` (Zipf s = 1.0 by list order).
    fn measure(&self, name: &str, targets: &[&str], adapters: usize) -> anyhow::Result<Scenario> {
        let before = self.swap_now()?;
        let workload = Workload {
            targets: targets.iter().map(|t| (*t).to_owned()).collect(),
            zipf: Zipf::new(targets.len(), 1.0).map_err(anyhow::Error::msg)?,
            mix: Mix::only(Kind::Embed),
            shape: RequestShape::default(),
            pacing: Pacing::Closed {
                clients: self.clients,
            },
            warmup: self.plan.warmup,
            duration: Some(self.plan.duration),
            count: None,
            seed: self.seed,
        };
        let run = drive(self.client, &workload, name);
        let mut scenario = Scenario::new(name, adapters, &run);
        let after = self.swap_now()?;
        scenario.swap_metrics = after
            .iter()
            .map(|(stage, h)| (stage.clone(), h.since(before.get(stage))))
            .collect();
        if scenario.latency().is_none() {
            bail!("scenario {name}: no request was answered");
        }
        Ok(scenario)
    }

    /// Sends requests to `name` one at a time until an answer says it ran merged.
    fn await_merged(&self, name: &str) -> anyhow::Result<()> {
        let shape = RequestShape::default();
        let deadline = Instant::now() + Duration::from_secs(120);
        let mut sent = 0;
        while Instant::now() < deadline {
            let a = self.client.infer(Kind::Embed, name, &shape);
            sent += 1;
            if a.status != 200 {
                bail!("{name} answered {} ({:?})", a.status, a.error);
            }
            if a.merged == Some(true) {
                eprintln!("{name} runs merged after {sent} requests");
                return Ok(());
            }
        }
        bail!("{name} was not promoted to a merged variant after {sent} requests")
    }

    /// For each adapter (none resident yet): one request (cold), then another (warm).
    fn cold_start(&self, names: &[String]) -> anyhow::Result<ColdStart> {
        let shape = RequestShape::default();
        let before = self.swap_now()?;
        let mut cold = ColdStart::default();
        for name in names {
            for warm in [false, true] {
                let t = Instant::now();
                let a = self.client.infer(Kind::Embed, name, &shape);
                let ms = t.elapsed().as_secs_f64() * 1e3;
                if a.status != 200 {
                    bail!(
                        "cold-start probe {name} answered {} ({:?})",
                        a.status,
                        a.error
                    );
                }
                let swap = a.swap_ms.unwrap_or(0.0);
                if warm {
                    cold.warm_ms.push(ms);
                    cold.warm_swap_ms.push(swap);
                } else {
                    cold.cold_ms.push(ms);
                    cold.cold_swap_ms.push(swap);
                }
            }
        }
        let after = self.swap_now()?;
        cold.load_metrics = after
            .get("load")
            .map(|h| h.since(before.get("load")))
            .unwrap_or_default();
        Ok(cold)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quick_plan_is_smaller() {
        let (q, f) = (Plan::new(true), Plan::new(false));
        assert_eq!(f.mixed, vec![1, 10, 100, 1000]);
        assert_eq!(mixed_name(1), "1 adapter mixed");
        assert_eq!(mixed_name(10), "10 adapters mixed");
        assert!(q.duration < f.duration && q.mixed.len() < f.mixed.len());
    }
}
