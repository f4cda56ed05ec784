//! From what the fairness scenario measured to its report: the steady tenant's latency in each
//! phase against the steady tenant alone, and what each flooding tenant was answered.

use std::collections::BTreeMap;

use serde_json::{Value, json};

use super::{CAPPED, FLOOD, FairnessSettings, Measured, Plan, STEADY};
use crate::driver::Record;
use crate::report::Report;
use crate::results::Scenario;
use crate::stats::{LatencySummary, percentile, round3, sorted};

/// The goal the scenario checks: the steady tenant's p99 during a flood at most this many times
/// its p99 alone.
pub const GOAL_P99_RATIO: f64 = 2.0;

/// What a flooding tenant sent and was answered, over the measured time.
#[derive(Debug, Clone, PartialEq)]
pub struct FloodSummary {
    pub sent: usize,
    pub sent_per_s: f64,
    pub answered: usize,
    pub answered_per_s: f64,
    /// Answered 429.
    pub refused: usize,
    /// Refusals and other failures by error code (or status).
    pub codes: BTreeMap<String, usize>,
    /// The Retry-After values of the 429s, in seconds, ascending.
    pub retry_after_s: Vec<u64>,
    /// 429s that came without a Retry-After header.
    pub refused_without_retry_after: usize,
    /// Answers that were neither 200 nor 429.
    pub other_failures: usize,
}

impl FloodSummary {
    /// The summary of `scenario`, whose requests were sent over `measured_s` seconds.
    pub fn of(scenario: &Scenario, measured_s: f64) -> Self {
        let r = &scenario.records;
        let refused: Vec<_> = r.iter().filter(|x| x.status == 429).collect();
        let mut codes = BTreeMap::new();
        for x in r.iter().filter(|x| !x.ok()) {
            let code = x
                .error
                .clone()
                .unwrap_or_else(|| format!("status {}", x.status));
            *codes.entry(code).or_insert(0) += 1;
        }
        let mut retry_after_s: Vec<u64> = refused.iter().filter_map(|x| x.retry_after_s).collect();
        retry_after_s.sort_unstable();
        let answered = r.iter().filter(|x| x.ok()).count();
        let per_s = |n: usize| {
            if measured_s > 0.0 {
                n as f64 / measured_s
            } else {
                0.0
            }
        };
        Self {
            sent: r.len(),
            sent_per_s: per_s(r.len()),
            answered,
            answered_per_s: per_s(answered),
            refused: refused.len(),
            refused_without_retry_after: refused.len() - retry_after_s.len(),
            retry_after_s,
            other_failures: r.iter().filter(|x| !x.ok() && x.status != 429).count(),
            codes,
        }
    }

    /// Share of the requests sent that were answered 429.
    pub fn refused_share(&self) -> f64 {
        if self.sent == 0 {
            0.0
        } else {
            self.refused as f64 / self.sent as f64
        }
    }

    pub fn to_json(&self) -> Value {
        let values: Vec<f64> = self.retry_after_s.iter().map(|&s| s as f64).collect();
        let at = |q| percentile(&values, q);
        json!({
            "sent": self.sent,
            "sent_per_s": round3(self.sent_per_s),
            "answered": self.answered,
            "answered_per_s": round3(self.answered_per_s),
            "refused_429": self.refused,
            "refused_share": round3(self.refused_share()),
            "codes": self.codes,
            "retry_after_s": {
                "min": values.first(),
                "median": at(0.5),
                "max": values.last(),
                "missing": self.refused_without_retry_after,
            },
            "other_failures": self.other_failures,
        })
    }
}

/// The steady tenant's p50 and p99 in a phase over its p50 and p99 alone.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Slowdown {
    pub p50: f64,
    pub p99: f64,
}

impl Slowdown {
    pub fn of(phase: &LatencySummary, alone: &LatencySummary) -> Self {
        Self {
            p50: phase.p50_ms / alone.p50_ms,
            p99: phase.p99_ms / alone.p99_ms,
        }
    }

    pub fn to_json(self) -> Value {
        json!({
            "p50": round3(self.p50),
            "p99": round3(self.p99),
            "goal_p99": GOAL_P99_RATIO,
            "p99_within_goal": self.p99 <= GOAL_P99_RATIO,
        })
    }
}

fn ms(v: f64) -> String {
    format!("{v:.1}")
}

fn per_s(v: f64) -> String {
    format!("{v:.1}")
}

/// Builds the report of a run.
pub fn build_report(s: &FairnessSettings, plan: &Plan, m: &Measured) -> Report {
    let measured_s = plan.duration.as_secs_f64() * plan.rounds as f64;
    let latency = |x: &Scenario| x.latency().expect("checked by the caller");
    let alone = latency(&m.steady_alone);
    let during_flood = latency(&m.steady_during_flood);
    let during_capped = latency(&m.steady_during_capped);
    let slow_flood = Slowdown::of(&during_flood, &alone);
    let slow_capped = Slowdown::of(&during_capped, &alone);
    let flood = FloodSummary::of(&m.flood, measured_s);
    let capped = FloodSummary::of(&m.capped, measured_s);
    let steady_failures = |x: &Scenario| x.records.iter().filter(|r| !r.ok()).count();

    let header = [
        "phase",
        "tenant",
        "sent/s",
        "answered/s",
        "429 share",
        "p50 ms",
        "p90 ms",
        "p99 ms",
        "p99 / alone",
    ];
    let mut table = vec![header.map(str::to_owned).to_vec()];
    for (phase, x) in [
        ("capacity, no tenants", &m.capacity_one_tenant),
        ("capacity, three tenants", &m.capacity_tenants),
    ] {
        let l = latency(x);
        table.push(vec![
            phase.to_owned(),
            format!("closed loop of {}", plan.capacity_clients),
            "-".to_owned(),
            per_s(x.throughput()),
            "-".to_owned(),
            ms(l.p50_ms),
            ms(l.p90_ms),
            ms(l.p99_ms),
            "-".to_owned(),
        ]);
    }
    let steady_row = |phase: &str, x: &Scenario, l: &LatencySummary, ratio: Option<f64>| {
        let sent = x.records.len() as f64 / measured_s;
        let answered = x.records.iter().filter(|r| r.ok()).count() as f64 / measured_s;
        vec![
            phase.to_owned(),
            STEADY.0.to_owned(),
            per_s(sent),
            per_s(answered),
            format!(
                "{:.3}",
                steady_failures(x) as f64 / x.records.len().max(1) as f64
            ),
            ms(l.p50_ms),
            ms(l.p90_ms),
            ms(l.p99_ms),
            ratio.map_or("1.000".to_owned(), |r| format!("{r:.3}")),
        ]
    };
    let flood_row = |phase: &str, tenant: &str, x: &Scenario, f: &FloodSummary| {
        let l = x.latency();
        vec![
            phase.to_owned(),
            tenant.to_owned(),
            per_s(f.sent_per_s),
            per_s(f.answered_per_s),
            format!("{:.3}", f.refused_share()),
            l.map_or("-".to_owned(), |l| ms(l.p50_ms)),
            l.map_or("-".to_owned(), |l| ms(l.p90_ms)),
            l.map_or("-".to_owned(), |l| ms(l.p99_ms)),
            "-".to_owned(),
        ]
    };
    table.push(steady_row("steady alone", &m.steady_alone, &alone, None));
    let flood_phase = format!("flood at {}x capacity, no quota", s.flood_factor);
    table.push(steady_row(
        &flood_phase,
        &m.steady_during_flood,
        &during_flood,
        Some(slow_flood.p99),
    ));
    table.push(flood_row(&flood_phase, FLOOD.0, &m.flood, &flood));
    let capped_phase = format!(
        "flood at {}x capacity, quota {} requests/s",
        s.flood_factor, m.capped_rate
    );
    table.push(steady_row(
        &capped_phase,
        &m.steady_during_capped,
        &during_capped,
        Some(slow_capped.p99),
    ));
    table.push(flood_row(&capped_phase, CAPPED.0, &m.capped, &capped));

    let cpus = std::thread::available_parallelism().map_or(0, |n| n.get());
    let turn_cost = m.capacity_tenants.throughput() / m.capacity_one_tenant.throughput();
    let retry = |f: &FloodSummary| {
        let v: Vec<f64> = sorted(
            &f.retry_after_s
                .iter()
                .map(|&x| x as f64)
                .collect::<Vec<_>>(),
        );
        match (v.first(), percentile(&v, 0.5), v.last()) {
            (Some(lo), Some(mid), Some(hi)) => format!("{lo}, {mid} and {hi} s"),
            _ => "none".to_owned(),
        }
    };
    let notes = vec![
        format!(
            "Every request is one /embed of {} texts to the base model. Capacity is the answered \
             rate of a closed loop of {} clients ({} turns of {:.0} s measured after {:.0} s of \
             warm-up each), on a server with no tenants (batches up to engine.max_batch_rows) \
             and on one with three tenants and no quota ({}, {}, {}; batches of at most \
             engine.shared_batch_rows rows): {:.1} and {:.1} requests/s (ratio \
             {turn_cost:.3}). The phases below run on a third server with the same tenants.",
            s.texts,
            plan.capacity_clients,
            plan.capacity_rounds,
            plan.capacity_duration.as_secs_f64(),
            plan.capacity_warmup.as_secs_f64(),
            STEADY.0,
            FLOOD.0,
            CAPPED.0,
            m.capacity_one_tenant.throughput(),
            m.capacity_tenants.throughput(),
        ),
        format!(
            "The steady tenant sends open-loop Poisson arrivals at {:.2} requests/s ({} of \
             capacity); a flooding tenant sends open-loop Poisson arrivals at {:.1} requests/s \
             ({}x capacity) over {} workers. Three phases take turns in {} rounds ({:.0} s \
             measured after {:.0} s of warm-up each): the steady tenant alone; with the flood \
             tenant (no quota: its excess is refused by its share of the queue); with the capped \
             tenant (a quota of {} requests/s, half the three-tenant capacity). Latency counts from \
             each request's scheduled send time, so waiting in the client counts too.",
            m.steady_rate,
            s.steady_share,
            m.flood_rate,
            s.flood_factor,
            s.workers,
            plan.rounds,
            plan.duration.as_secs_f64(),
            plan.warmup.as_secs_f64(),
            m.capped_rate,
        ),
        format!(
            "Steady tenant p99: {:.1} ms alone, {:.1} ms during the flood ({:.2}x), {:.1} ms \
             during the capped flood ({:.2}x); the goal is at most {GOAL_P99_RATIO}x. It failed \
             {} of its requests in all phases. The flood tenant was refused {:.1}% of its \
             requests ({}), Retry-After min, median and max {}; the capped tenant {:.1}% ({}), \
             Retry-After {}. Retry-After is whole seconds, rounded up: at these rates the wait \
             each refusal computes (the rate bucket's refill, or one round of the queue at the \
             measured service rate) is well under a second, and the message body says it in \
             milliseconds.",
            alone.p99_ms,
            during_flood.p99_ms,
            slow_flood.p99,
            during_capped.p99_ms,
            slow_capped.p99,
            steady_failures(&m.steady_alone)
                + steady_failures(&m.steady_during_flood)
                + steady_failures(&m.steady_during_capped),
            flood.refused_share() * 100.0,
            codes_text(&flood.codes),
            retry(&flood),
            capped.refused_share() * 100.0,
            codes_text(&capped.codes),
            retry(&capped),
        ),
        format!(
            "Machine: {cpus} CPUs, shared by the server, this load generator and any other work on \
             it; the ratios within one run are what to read. The flooding client's threads ran at \
             niceness {} (--flood-client-niceness; 0 lets them compete with the server as equals): \
             a real flood comes from other machines, and its client's CPU is not the server's. \
             The server still parses and refuses every flood request on these cores. CPU time \
             the virtual machine's host took for other work (steal) during the phases: {} alone, \
             {} during the flood, {} during the capped flood.",
            s.flood_client_niceness,
            m.cpu[0].stolen_percent(),
            m.cpu[1].stolen_percent(),
            m.cpu[2].stolen_percent(),
        ),
    ];

    let mut extra = serde_json::Map::new();
    extra.insert(
        "settings".to_owned(),
        json!({
            "texts_per_request": s.texts,
            "flood_factor": s.flood_factor,
            "steady_share": s.steady_share,
            "flood_workers": s.workers,
            "flood_client_niceness": s.flood_client_niceness,
            "rounds": plan.rounds,
            "warmup_s": plan.warmup.as_secs_f64(),
            "measured_s_per_phase_and_round": plan.duration.as_secs_f64(),
            "capacity_clients": plan.capacity_clients,
            "capacity_rounds": plan.capacity_rounds,
            "capped_quota_requests_per_second": m.capped_rate,
            "seed": s.seed,
            "cpus": cpus,
        }),
    );
    extra.insert(
        "capacity_per_s".to_owned(),
        json!({
            "no_tenants": round3(m.capacity_one_tenant.throughput()),
            "three_tenants": round3(m.capacity_tenants.throughput()),
            "three_over_none": round3(turn_cost),
        }),
    );
    extra.insert(
        "steady".to_owned(),
        json!({
            "rate_per_s": round3(m.steady_rate),
            "alone": alone.to_json(),
            "during_flood": during_flood.to_json(),
            "during_capped_flood": during_capped.to_json(),
            "failed": {
                "alone": steady_failures(&m.steady_alone),
                "during_flood": steady_failures(&m.steady_during_flood),
                "during_capped_flood": steady_failures(&m.steady_during_capped),
            },
            "slowdown_during_flood": slow_flood.to_json(),
            "slowdown_during_capped_flood": slow_capped.to_json(),
            "machine_cpu": {
                "alone": m.cpu[0].to_json(),
                "during_flood": m.cpu[1].to_json(),
                "during_capped_flood": m.cpu[2].to_json(),
            },
            "where_the_time_went": {
                "alone": time_split(&m.steady_alone),
                "during_flood": time_split(&m.steady_during_flood),
                "during_capped_flood": time_split(&m.steady_during_capped),
            },
        }),
    );
    extra.insert(
        "floods".to_owned(),
        json!({
            "rate_per_s": round3(m.flood_rate),
            "flood": flood.to_json(),
            "capped": capped.to_json(),
        }),
    );
    Report {
        title: "switchyard fairness across tenants".to_owned(),
        command: s.command.clone(),
        notes,
        scenarios: vec![
            m.steady_alone.clone(),
            m.steady_during_flood.clone(),
            m.steady_during_capped.clone(),
            m.flood.clone(),
            m.capped.clone(),
        ],
        by_adapters: Vec::new(),
        baseline: None,
        table,
        memory: Vec::new(),
        extra,
        latency_only: true,
    }
}

/// Where a phase's answered requests spent their time, p50 and p99 of each part: waiting in the
/// server's queue (`elapsed_ms.queue`), in the server after the queue (its `total` less `queue`:
/// the batch, tokenising, writing the answer), and outside the server's count (the client's
/// latency less the server's `total`: HTTP on both sides, the client's own scheduling).
fn time_split(scenario: &Scenario) -> Value {
    let answered: Vec<&Record> = scenario
        .records
        .iter()
        .filter(|r| r.ok() && r.server_ms.is_some())
        .collect();
    let part = |f: &dyn Fn(&Record) -> Option<f64>| {
        let values = sorted(&answered.iter().filter_map(|r| f(r)).collect::<Vec<_>>());
        json!({
            "p50_ms": percentile(&values, 0.5).map(round3),
            "p99_ms": percentile(&values, 0.99).map(round3),
        })
    };
    json!({
        "queue": part(&|r| r.queue_ms),
        "in_server_after_queue": part(&|r| Some(r.server_ms? - r.queue_ms.unwrap_or(0.0))),
        "outside_server": part(&|r| Some(r.latency_ms - r.server_ms?)),
    })
}

fn codes_text(codes: &BTreeMap<String, usize>) -> String {
    if codes.is_empty() {
        return "no refusals".to_owned();
    }
    codes
        .iter()
        .map(|(code, n)| format!("{n} {code}"))
        .collect::<Vec<_>>()
        .join(", ")
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::driver::{Record, RunRecords};
    use crate::mix::Kind;

    fn record(status: u16, error: Option<&str>, retry_after_s: Option<u64>) -> Record {
        Record {
            sent_s: 2.0,
            latency_ms: 5.0,
            kind: Kind::Embed,
            target: 0,
            status,
            swap_ms: None,
            queue_ms: None,
            server_ms: None,
            merged: None,
            error: error.map(str::to_owned),
            retry_after_s,
            replica: None,
            warmup: false,
        }
    }

    #[test]
    fn a_flood_summary_counts_answers_refusals_and_retry_after() {
        let run = RunRecords {
            records: vec![
                record(200, None, None),
                record(429, Some("tenant_queue_full"), Some(1)),
                record(429, Some("tenant_queue_full"), Some(2)),
                record(429, Some("rate_limited"), None),
                record(503, Some("shutting_down"), None),
            ],
            warmup_s: 1.0,
        };
        let f = FloodSummary::of(&Scenario::new("flood", 0, &run), 2.0);
        assert_eq!((f.sent, f.answered, f.refused), (5, 1, 3));
        assert_eq!((f.sent_per_s, f.answered_per_s), (2.5, 0.5));
        assert_eq!(f.retry_after_s, vec![1, 2]);
        assert_eq!(f.refused_without_retry_after, 1);
        assert_eq!(f.other_failures, 1);
        assert!((f.refused_share() - 0.6).abs() < 1e-12);
        assert_eq!(f.codes["tenant_queue_full"], 2);
        let j = f.to_json();
        assert_eq!(j["retry_after_s"]["max"], 2.0);
        assert_eq!(j["refused_share"], 0.6);
    }

    #[test]
    fn slowdown_is_the_phase_over_alone() {
        let of = |p50, p99| LatencySummary {
            count: 10,
            mean_ms: p50,
            p50_ms: p50,
            p90_ms: p99,
            p99_ms: p99,
            max_ms: p99,
        };
        let s = Slowdown::of(&of(12.0, 45.0), &of(10.0, 30.0));
        assert_eq!(s, Slowdown { p50: 1.2, p99: 1.5 });
        assert_eq!(s.to_json()["p99_within_goal"], true);
        let bad = Slowdown::of(&of(10.0, 61.0), &of(10.0, 30.0));
        assert_eq!(bad.to_json()["p99_within_goal"], false);
    }
}
