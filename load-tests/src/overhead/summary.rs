//! The overhead scenario's summary: cold-start figures, ratios to base, and the report (table,
//! notes, settings) built from the pooled scenarios.

use serde_json::{Value, json};
use switchyard_adapters::BaseSpec;

use super::{OverheadSettings, Plan, targets_text};
use crate::client::RequestShape;
use crate::report::Report;
use crate::results::Scenario;
use crate::scrape::{MemorySample, SwapHistogram};
use crate::stats::{LatencySummary, round3};

/// Latencies of first and second requests to adapters that were not resident.
#[derive(Debug, Clone, Default)]
pub struct ColdStart {
    pub cold_ms: Vec<f64>,
    pub warm_ms: Vec<f64>,
    pub cold_swap_ms: Vec<f64>,
    pub warm_swap_ms: Vec<f64>,
    /// The `load` stage of `switchyard_swap_seconds` during the probes.
    pub load_metrics: SwapHistogram,
}

impl ColdStart {
    pub fn ratio(&self) -> Option<f64> {
        let c = LatencySummary::of(&self.cold_ms)?;
        let w = LatencySummary::of(&self.warm_ms)?;
        Some(c.p50_ms / w.p50_ms)
    }

    pub fn to_json(&self) -> Value {
        let summary = |v: &[f64]| LatencySummary::of(v).map(|l| l.to_json());
        json!({
            "probes": self.cold_ms.len(),
            "cold_latency_ms": summary(&self.cold_ms),
            "warm_latency_ms": summary(&self.warm_ms),
            "cold_swap_ms": summary(&self.cold_swap_ms),
            "warm_swap_ms": summary(&self.warm_swap_ms),
            "cold_to_warm_p50_ratio": self.ratio().map(round3),
            "load_from_metrics": self.load_metrics.to_json(),
        })
    }
}

/// A scenario's figures against its base.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Ratio {
    pub throughput: f64,
    pub p50: f64,
    pub p99: f64,
}

/// `scenario / base` for throughput and for p50 and p99 latency.
pub fn ratio(scenario: &Scenario, base: &Scenario) -> Option<Ratio> {
    let (s, b) = (scenario.latency()?, base.latency()?);
    Some(Ratio {
        throughput: scenario.throughput() / base.throughput(),
        p50: s.p50_ms / b.p50_ms,
        p99: s.p99_ms / b.p99_ms,
    })
}

pub(super) fn build_report(
    s: &OverheadSettings,
    plan: &Plan,
    base: &BaseSpec,
    scenarios: Vec<Scenario>,
    memory: Vec<(String, Vec<MemorySample>)>,
    cold: ColdStart,
) -> Report {
    let find = |name: &str| scenarios.iter().find(|x| x.name == name);
    let base_on = find("base (merging on)");
    let base_off = find("base");
    let mut table = vec![
        [
            "scenario",
            "adapters",
            "requests/s",
            "throughput vs base",
            "p50 ms",
            "p50 vs base",
            "p99 ms",
            "p99 vs base",
        ]
        .map(str::to_owned)
        .to_vec(),
    ];
    let mut ratios = Vec::new();
    for sc in &scenarios {
        let reference = if sc.name == "one adapter merged" || sc.name == "base (merging on)" {
            base_on
        } else {
            base_off
        };
        let Some(r) = reference.and_then(|b| ratio(sc, b)) else {
            continue;
        };
        let l = sc.latency().expect("ratio needs a latency");
        table.push(vec![
            sc.name.clone(),
            sc.adapters.to_string(),
            format!("{:.1}", sc.throughput()),
            format!("{:.3}", r.throughput),
            format!("{:.1}", l.p50_ms),
            format!("{:.3}", r.p50),
            format!("{:.1}", l.p99_ms),
            format!("{:.3}", r.p99),
        ]);
        ratios.push(json!({
            "scenario": sc.name,
            "reference": reference.map(|b| b.name.clone()),
            "throughput_ratio": round3(r.throughput),
            "p50_ratio": round3(r.p50),
            "p99_ratio": round3(r.p99),
        }));
    }
    let cold_summary = (
        LatencySummary::of(&cold.cold_ms),
        LatencySummary::of(&cold.warm_ms),
    );
    if let (Some(c), Some(w)) = cold_summary {
        table.push(vec![
            "cold start (first request)".to_owned(),
            "1".to_owned(),
            "-".to_owned(),
            "-".to_owned(),
            format!("{:.1}", c.p50_ms),
            format!("{:.3}", c.p50_ms / w.p50_ms),
            format!("{:.1}", c.p99_ms),
            "-".to_owned(),
        ]);
    }
    let by_adapters: Vec<usize> = scenarios
        .iter()
        .enumerate()
        .filter(|(_, x)| x.name.ends_with(" mixed"))
        .map(|(i, _)| i)
        .collect();
    let cpus = std::thread::available_parallelism().map_or(0, |n| n.get());
    let shape = RequestShape::default();
    let mut extra = serde_json::Map::new();
    extra.insert(
        "settings".to_owned(),
        json!({
            "quick": s.quick,
            "clients": s.clients,
            "rounds": plan.rounds,
            "warmup_s_per_round": plan.warmup.as_secs_f64(),
            "measured_s_per_round": plan.duration.as_secs_f64(),
            "zipf_exponent": 1.0,
            "adapter_rank": s.rank,
            "adapter_targets": targets_text(&s.targets),
            "base_model": base.model_type,
            "base_fingerprint": base.fingerprint,
            "request": {"endpoint": "/embed", "texts": shape.texts},
            "promote_share": 0.9,
            "promote_window_rows": plan.promote_window_rows,
            "cpus": cpus,
            "seed": s.seed,
        }),
    );
    extra.insert("ratios".to_owned(), Value::Array(ratios));
    extra.insert("cold_start".to_owned(), cold.to_json());
    Report {
        title: "switchyard swap overhead".to_owned(),
        command: s.command.clone(),
        notes: vec![
            format!(
                "Closed loop of {} clients; every request is one /embed of the same {} texts. \
                 The scenarios take turns in {} rounds (in each: warm-up {:.1} s, then {:.1} s \
                 measured), and each scenario's figures pool its rounds. Ratios are scenario / \
                 base on the same server: throughput below 1 and latency above 1 mean slower.",
                s.clients,
                shape.texts.len(),
                plan.rounds,
                plan.warmup.as_secs_f64(),
                plan.duration.as_secs_f64()
            ),
            format!(
                "Synthetic adapters of rank {} on {} (random factors, seed {}). \"N adapters \
                 mixed\" spreads traffic over N adapters by Zipf popularity (s = 1.0) with merging \
                 off, so every row runs unmerged; adapters not yet resident are loaded from the \
                 store during the run, as in production. \"one adapter merged\" runs on a second \
                 server with merging on, each round measured only after answers say merged: true.",
                s.rank,
                targets_text(&s.targets),
                s.seed
            ),
            format!(
                "Cold start: the first request to each of {} adapters that were not resident, \
                 one at a time, against the second request to the same adapter.",
                cold.cold_ms.len()
            ),
            format!(
                "Machine: {cpus} CPUs, shared with other work while it ran; absolute numbers \
                 move with the load, the ratios within one run are what to read."
            ),
        ],
        baseline: scenarios.iter().position(|x| x.name == "base"),
        scenarios,
        by_adapters,
        table,
        memory,
        extra,
        latency_only: false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::driver::{Record, RunRecords};
    use crate::mix::Kind;
    use switchyard_adapters::Module;

    fn scenario(name: &str, latencies: &[f64], window_s: f64) -> Scenario {
        let records = latencies
            .iter()
            .map(|&ms| Record {
                sent_s: 0.0,
                latency_ms: ms,
                kind: Kind::Embed,
                target: 0,
                status: 200,
                swap_ms: Some(0.01),
                queue_ms: None,
                server_ms: None,
                merged: Some(false),
                error: None,
                retry_after_s: None,
                replica: None,
                warmup: false,
            })
            .collect();
        let mut s = Scenario::new(
            name,
            1,
            &RunRecords {
                records,
                warmup_s: 0.0,
            },
        );
        s.window_s = window_s;
        s
    }

    #[test]
    fn ratios_are_against_the_base_of_the_same_server() {
        // Base: 4 answers in 1 s, p50 = 10 (2nd of 10, 10, 20, 20), p99 = 20.
        // Scenario: 2 answers in 1 s, p50 = 15, p99 = 40.
        let base = scenario("base", &[10.0, 10.0, 20.0, 20.0], 1.0);
        let other = scenario("one adapter unmerged", &[15.0, 40.0], 1.0);
        let r = ratio(&other, &base).unwrap();
        assert_eq!(
            r,
            Ratio {
                throughput: 0.5,
                p50: 1.5,
                p99: 2.0
            }
        );
        let plan = Plan::new(true);
        let settings = OverheadSettings {
            server_bin: "switchyard".into(),
            model_dir: "m".into(),
            out_dir: "o".into(),
            quick: true,
            clients: 2,
            rank: 8,
            targets: vec![Module::AttnQ, Module::AttnV],
            seed: 1,
            command: "switchyard-load overhead --quick".to_owned(),
        };
        let spec = BaseSpec {
            model_type: "bert".to_owned(),
            fingerprint: "f".to_owned(),
            num_layers: 1,
            hidden_size: 4,
            targets: Default::default(),
        };
        let cold = ColdStart {
            cold_ms: vec![30.0],
            warm_ms: vec![10.0],
            ..ColdStart::default()
        };
        let report = build_report(&settings, &plan, &spec, vec![base, other], vec![], cold);
        assert_eq!(
            report.table.len(),
            4,
            "header, base, one adapter, cold start"
        );
        assert_eq!(report.table[2][3], "0.500");
        assert_eq!(
            report.table[3][5], "3.000",
            "cold p50 is 3 times the warm one"
        );
        let j = report.json();
        assert_eq!(j["ratios"][1]["p99_ratio"], 2.0);
        assert_eq!(j["cold_start"]["cold_to_warm_p50_ratio"], 3.0);
    }
}
