//! The built-in fairness scenario: does a tenant that floods the server slow another tenant
//! down? It starts `switchyard serve` itself (on 127.0.0.1, port 0) and measures, in one run:
//!
//! 1. capacity: answered /embed requests per second of a closed loop, on a server with no
//!    tenants (batches up to `max_batch_rows`) and on one with three tenants and no quota
//!    (batches up to `shared_batch_rows`), the two measured in alternation;
//! 2. on a third server with the same three tenants, the capped one with a quota of half the
//!    three-tenant capacity in requests per second, in rounds, so that other work on the
//!    machine falls on every phase alike:
//!    - the steady tenant alone, at a light open-loop rate (a share of capacity);
//!    - the steady tenant at that rate while the flood tenant (no quota) sends open-loop
//!      arrivals at a multiple (10x) of capacity;
//!    - the same with the capped tenant flooding instead.
//!
//! Every request is the same /embed of the base model. Latency counts from each request's
//! scheduled send time. The report gives the steady tenant's p50 and p99 in each phase, their
//! ratio to the steady tenant alone, and what the flooding tenants got: answers, 429s by code, and
//! the Retry-After values they were told.

mod summary;

use std::path::PathBuf;
use std::time::Duration;

use anyhow::{Context, bail};

use crate::client::{Client, RequestShape};
use crate::cpu_time::CpuTimes;
use crate::driver::{Pacing, RunRecords, Workload, drive};
use crate::mix::{Kind, Mix};
use crate::report::Report;
use crate::results::Scenario;
use crate::server::{ServerConfig, ServerProcess};
use crate::workload::Zipf;
pub use summary::{FloodSummary, build_report};

/// What the scenario is run with.
#[derive(Debug, Clone)]
pub struct FairnessSettings {
    pub server_bin: PathBuf,
    pub model_dir: PathBuf,
    pub out_dir: PathBuf,
    pub quick: bool,
    /// Texts per request, for every tenant.
    pub texts: usize,
    /// The flood's arrival rate, as a multiple of the measured capacity.
    pub flood_factor: f64,
    /// The steady tenant's arrival rate, as a share of the measured capacity.
    pub steady_share: f64,
    /// Worker threads of a flood's open loop (requests in flight at most).
    pub workers: usize,
    /// Niceness of the flooding client's threads (0 to 19, Linux): a flood from other machines
    /// costs this machine no client CPU; on one small machine the flood's own client would.
    pub flood_client_niceness: i32,
    pub seed: u64,
    /// The command line, for the report.
    pub command: String,
}

/// Sizes of one run: the full one, or `--quick` for a test.
#[derive(Debug, Clone, PartialEq)]
pub struct Plan {
    pub capacity_clients: usize,
    /// The two capacity measurements take turns this many times.
    pub capacity_rounds: usize,
    pub capacity_warmup: Duration,
    pub capacity_duration: Duration,
    pub rounds: usize,
    /// Warm-up and measured time of one phase in one round.
    pub warmup: Duration,
    pub duration: Duration,
}

impl Plan {
    pub fn new(quick: bool) -> Self {
        if quick {
            Self {
                capacity_clients: 8,
                capacity_rounds: 1,
                capacity_warmup: Duration::from_millis(500),
                capacity_duration: Duration::from_millis(1500),
                rounds: 1,
                warmup: Duration::from_millis(300),
                duration: Duration::from_millis(1500),
            }
        } else {
            Self {
                capacity_clients: 16,
                capacity_rounds: 3,
                capacity_warmup: Duration::from_secs(1),
                capacity_duration: Duration::from_secs(4),
                rounds: 4,
                warmup: Duration::from_secs(1),
                duration: Duration::from_secs(30),
            }
        }
    }
}

/// Arrivals of the steady tenant a quick run expects in each measured phase, at least.
const QUICK_STEADY_ARRIVALS: f64 = 5.0;

/// The tenants and their keys (test keys, loopback only).
pub const STEADY: (&str, &str) = ("steady", "fairness-steady-key-0123456789");
pub const FLOOD: (&str, &str) = ("flood", "fairness-flood-key-0123456789");
pub const CAPPED: (&str, &str) = ("capped", "fairness-capped-key-0123456789");

/// The `[[tenants]]` entries: every tenant may use the base model only; with `capped_rate`, the
/// capped tenant has a quota of that many requests per second.
pub fn tenants_toml(capped_rate: Option<f64>) -> String {
    let entry = |(name, key): (&str, &str)| {
        format!("\n[[tenants]]\nname = {name:?}\nkeys = [{key:?}]\nadapters = []\n")
    };
    let quota = capped_rate.map_or(String::new(), |r| format!("requests_per_second = {r:?}\n"));
    format!("{}{}{}{quota}", entry(STEADY), entry(FLOOD), entry(CAPPED))
}

/// The capped tenant's quota: half the capacity, to a tenth of a request per second.
pub fn capped_rate(capacity_per_s: f64) -> f64 {
    ((capacity_per_s / 2.0) * 10.0).round().max(1.0) / 10.0
}

/// What each phase of the rounds measured, pooled over the rounds.
#[derive(Debug, Clone)]
pub struct Measured {
    /// Answered requests per second of the closed loop: no tenants, then three tenants.
    pub capacity_one_tenant: Scenario,
    pub capacity_tenants: Scenario,
    pub capped_rate: f64,
    pub steady_rate: f64,
    pub flood_rate: f64,
    pub steady_alone: Scenario,
    pub steady_during_flood: Scenario,
    pub flood: Scenario,
    pub steady_during_capped: Scenario,
    pub capped: Scenario,
    /// The machine's CPU time during the phases: alone, flood, capped flood (all rounds).
    pub cpu: [CpuTimes; 3],
}

/// Runs the scenario and returns its report (not yet written).
pub fn run_fairness(s: &FairnessSettings) -> anyhow::Result<Report> {
    let plan = Plan::new(s.quick);
    let work = tempfile::tempdir().context("creating a temporary folder")?;
    let shape = shape(s.texts);

    // Capacity with no tenants (the reference of what small shared batches cost) and with the
    // three tenants, measured in turns so that other work on the machine falls on both alike.
    let (capacity_one_tenant, capacity_tenants) = {
        let start = |name: &str, extra_toml: String| -> anyhow::Result<ServerProcess> {
            let dir = work.path().join(name);
            std::fs::create_dir_all(&dir)?;
            let config = ServerConfig {
                extra_toml,
                ..ServerConfig::new(&s.model_dir, &dir.join("store"), false)
            };
            ServerProcess::start(&s.server_bin, &dir, &config)
        };
        let none = start("capacity-no-tenants", String::new())?;
        let three = start("capacity-three-tenants", tenants_toml(None))?;
        let none_client = Client::new(none.url(), None, None)?;
        let three_client = Client::new(three.url(), Some(FLOOD.1.to_owned()), None)?;
        let mut pooled: [Option<Scenario>; 2] = Default::default();
        for round in 0..plan.capacity_rounds {
            let tag = format!("[{}/{}]", round + 1, plan.capacity_rounds);
            for (slot, (client, name)) in pooled.iter_mut().zip([
                (&none_client, "capacity, no tenants"),
                (&three_client, "capacity, three tenants"),
            ]) {
                let mut part = capacity(client, &plan, &shape, &format!("{name} {tag}"), s.seed)?;
                part.name = name.to_owned();
                match slot {
                    Some(p) => p.absorb(part),
                    empty => *empty = Some(part),
                }
            }
        }
        let [Some(none), Some(three)] = pooled else {
            bail!("no capacity round ran");
        };
        (none, three)
    };
    let per_s = capacity_tenants.throughput();
    let capped_rate = capped_rate(per_s);

    let dir = work.path().join("tenants");
    std::fs::create_dir_all(&dir)?;
    let config = ServerConfig {
        extra_toml: tenants_toml(Some(capped_rate)),
        ..ServerConfig::new(&s.model_dir, &dir.join("store"), false)
    };
    let server = ServerProcess::start(&s.server_bin, &dir, &config)?;
    let client = |key: &str| Client::new(server.url(), Some(key.to_owned()), None);
    let (steady, flood, capped) = (client(STEADY.1)?, client(FLOOD.1)?, client(CAPPED.1)?);
    steady.check_ready()?;
    let mut steady_rate = s.steady_share * per_s;
    if s.quick {
        // A quick run's phases last 1.5 s: at its share of the measured capacity the steady
        // tenant's Poisson arrivals (about 1.2/s) left a phase empty in some runs, and a phase
        // with no answer says nothing. At least 5 arrivals are expected in each phase.
        steady_rate = steady_rate.max(QUICK_STEADY_ARRIVALS / plan.duration.as_secs_f64());
    }
    let flood_rate = s.flood_factor * per_s;
    eprintln!(
        "capacity {per_s:.1} requests/s with three tenants ({:.1} with none); steady tenant at \
         {steady_rate:.2}/s, floods at {flood_rate:.1}/s, capped tenant's quota {capped_rate}/s",
        capacity_one_tenant.throughput()
    );

    let open = |rate: f64, workers: usize| Pacing::Open { rate, workers };
    let steady_pacing = open(steady_rate, 16);
    let flood_pacing = open(flood_rate, s.workers);
    let mut pooled: [Option<Scenario>; 5] = Default::default();
    // CPU time of the machine during each phase: alone, flood, capped flood.
    let mut cpu = [CpuTimes::default(); 3];
    let mut timed = |slot: usize, f: &mut dyn FnMut()| {
        let before = CpuTimes::now();
        f();
        if let (Some(b), Some(a)) = (before, CpuTimes::now()) {
            cpu[slot] = cpu[slot].plus(&a.since(&b));
        }
    };
    for round in 0..plan.rounds {
        let tag = format!("[{}/{}]", round + 1, plan.rounds);
        let seed = s.seed.wrapping_add(round as u64 * 1000);
        let mut alone = RunRecords::default();
        timed(0, &mut || {
            let p = phase(&plan, &shape, &steady, steady_pacing, seed);
            alone = drive(p.client, &p.workload, &format!("steady tenant alone {tag}"));
        });
        let (mut with_flood, mut flood_run) = Default::default();
        timed(1, &mut || {
            (with_flood, flood_run) = side_by_side(
                phase(&plan, &shape, &steady, steady_pacing, seed + 1),
                phase(&plan, &shape, &flood, flood_pacing, seed + 2),
                &format!("steady tenant during flood {tag}"),
                &format!("flood tenant {tag}"),
                s.flood_client_niceness,
            );
        });
        let (mut with_capped, mut capped_run) = Default::default();
        timed(2, &mut || {
            (with_capped, capped_run) = side_by_side(
                phase(&plan, &shape, &steady, steady_pacing, seed + 3),
                phase(&plan, &shape, &capped, flood_pacing, seed + 4),
                &format!("steady tenant during capped flood {tag}"),
                &format!("capped tenant {tag}"),
                s.flood_client_niceness,
            );
        });
        let parts = [
            Scenario::new("steady tenant alone", 0, &alone),
            Scenario::new("steady tenant during flood", 0, &with_flood),
            Scenario::new("flood tenant (no quota)", 0, &flood_run),
            Scenario::new("steady tenant during capped flood", 0, &with_capped),
            Scenario::new("capped tenant (rate quota)", 0, &capped_run),
        ];
        for (slot, part) in pooled.iter_mut().zip(parts) {
            match slot {
                Some(p) => p.absorb(part),
                empty => *empty = Some(part),
            }
        }
    }
    drop(server);
    let [Some(a), Some(b), Some(c), Some(d), Some(e)] = pooled else {
        bail!("the scenario ran no round");
    };
    let measured = Measured {
        capacity_one_tenant,
        capacity_tenants,
        capped_rate,
        steady_rate,
        flood_rate,
        steady_alone: a,
        steady_during_flood: b,
        flood: c,
        steady_during_capped: d,
        capped: e,
        cpu,
    };
    for steady in [
        &measured.steady_alone,
        &measured.steady_during_flood,
        &measured.steady_during_capped,
    ] {
        if steady.latency().is_none() {
            bail!("{}: no request was answered", steady.name);
        }
    }
    Ok(build_report(s, &plan, &measured))
}

fn shape(texts: usize) -> RequestShape {
    let all = RequestShape::default().texts;
    RequestShape {
        texts: (0..texts).map(|i| all[i % all.len()].clone()).collect(),
        ..RequestShape::default()
    }
}

/// One tenant's part of one phase: /embed of the base model, paced as given.
struct Phase<'a> {
    client: &'a Client,
    workload: Workload,
}

fn phase<'a>(
    plan: &Plan,
    shape: &RequestShape,
    client: &'a Client,
    pacing: Pacing,
    seed: u64,
) -> Phase<'a> {
    Phase {
        client,
        workload: Workload {
            targets: vec!["base".to_owned()],
            zipf: Zipf::new(1, 1.0).expect("one target"),
            mix: Mix::only(Kind::Embed),
            shape: shape.clone(),
            pacing,
            warmup: plan.warmup,
            duration: Some(plan.duration),
            count: None,
            seed,
        },
    }
}

/// Two tenants' workloads at the same time; each returns when its last answer came. The second
/// (the flood) runs its threads at `second_niceness`.
fn side_by_side(
    first: Phase<'_>,
    second: Phase<'_>,
    first_label: &str,
    second_label: &str,
    second_niceness: i32,
) -> (RunRecords, RunRecords) {
    std::thread::scope(|scope| {
        let a = scope.spawn(|| drive(first.client, &first.workload, first_label));
        let b = scope.spawn(|| {
            lower_this_thread(second_niceness);
            drive(second.client, &second.workload, second_label)
        });
        (
            a.join().expect("the first workload's thread"),
            b.join().expect("the second workload's thread"),
        )
    })
}

/// Lowers the calling thread's CPU priority to `niceness`; on Linux the niceness is per thread and
/// the threads it then starts (the open loop's workers) inherit it. Elsewhere it does nothing.
#[allow(unsafe_code)]
fn lower_this_thread(niceness: i32) {
    #[cfg(target_os = "linux")]
    if niceness > 0 {
        // SAFETY: setpriority on the calling thread's id changes only that thread's niceness;
        // no memory is passed. Lowering one's own priority is always allowed.
        unsafe {
            let tid = libc::syscall(libc::SYS_gettid) as libc::id_t;
            libc::setpriority(libc::PRIO_PROCESS, tid, niceness);
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = niceness;
}

/// Answered requests per second of a closed loop of one tenant, measured after a warm-up.
fn capacity(
    client: &Client,
    plan: &Plan,
    shape: &RequestShape,
    name: &str,
    seed: u64,
) -> anyhow::Result<Scenario> {
    client.check_ready()?;
    let workload = Workload {
        targets: vec!["base".to_owned()],
        zipf: Zipf::new(1, 1.0).map_err(anyhow::Error::msg)?,
        mix: Mix::only(Kind::Embed),
        shape: shape.clone(),
        pacing: Pacing::Closed {
            clients: plan.capacity_clients,
        },
        warmup: plan.capacity_warmup,
        duration: Some(plan.capacity_duration),
        count: None,
        seed,
    };
    let scenario = Scenario::new(name, 0, &drive(client, &workload, name));
    if scenario.throughput() <= 0.0 {
        bail!("{name}: no request was answered ({:?})", scenario.errors());
    }
    Ok(scenario)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quick_plan_is_shorter() {
        let (q, f) = (Plan::new(true), Plan::new(false));
        assert!(q.duration < f.duration && q.rounds < f.rounds);
        assert_eq!(f.rounds, 4);
    }

    #[test]
    fn the_capped_quota_is_half_the_capacity_to_a_tenth() {
        assert_eq!(capped_rate(61.0), 30.5);
        assert_eq!(capped_rate(47.37), 23.7);
        // Never below 0.1 a second.
        assert_eq!(capped_rate(0.01), 0.1);
    }

    #[test]
    fn three_tenants_with_a_rate_quota_on_the_capped_one() {
        assert!(!tenants_toml(None).contains("requests_per_second"));
        let text = tenants_toml(Some(23.7));
        assert_eq!(text.matches("[[tenants]]").count(), 3);
        assert!(
            text.ends_with(
                "name = \"capped\"\nkeys = [\"fairness-capped-key-0123456789\"]\nadapters = []\n\
                 requests_per_second = 23.7\n"
            ),
            "{text}"
        );
    }

    /// The niceness field (19th) of a thread's /proc stat line.
    #[cfg(target_os = "linux")]
    fn niceness_of_this_thread() -> i32 {
        let stat =
            std::fs::read_to_string("/proc/thread-self/stat").expect("/proc/thread-self/stat");
        // The command name (field 2) may hold spaces; count fields after its closing parenthesis.
        let after = &stat[stat.rfind(')').expect("a stat line") + 2..];
        after
            .split(' ')
            .nth(16)
            .expect("the niceness field")
            .parse()
            .expect("a number")
    }

    /// The flood's client threads must run lowered, and so must the workers they start, or the
    /// report's "niceness" line is untrue.
    #[cfg(target_os = "linux")]
    #[test]
    fn flood_client_threads_and_their_workers_ran_lowered() {
        let before = std::thread::spawn(niceness_of_this_thread).join().unwrap();
        let (own, worker) = std::thread::spawn(move || {
            lower_this_thread((before + 7).min(19));
            let own = niceness_of_this_thread();
            (
                own,
                std::thread::spawn(niceness_of_this_thread).join().unwrap(),
            )
        })
        .join()
        .unwrap();
        assert_eq!(own, (before + 7).min(19));
        assert_eq!(
            worker, own,
            "a worker thread did not inherit the lowered priority"
        );
        // Other threads of the process are left as they were.
        assert_eq!(niceness_of_this_thread(), before);
    }
}
