//! Sends a workload to the server and records every answer. Two ways to pace it:
//!
//! - a closed loop of N clients, each sending its next request when its last answer came
//!   (throughput is what the server sustains at that concurrency; used for the ratios);
//! - open-loop arrivals at a target rate (Poisson), fed to a pool of worker threads. Latency is
//!   measured from each request's *scheduled* send time, not from when a worker picked it up, so
//!   a server that falls behind is charged for the wait it causes (no coordinated omission).
//!
//! Requests sent before the warm-up ends are recorded but marked, and left out of results.

use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, mpsc};
use std::time::{Duration, Instant};

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::client::{Client, RequestShape};
use crate::mix::{Kind, Mix};
use crate::progress::{ProgressLine, Tally};
use crate::workload::{PoissonArrivals, Zipf};

/// How requests are paced.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Pacing {
    Closed { clients: usize },
    Open { rate: f64, workers: usize },
}

/// What to send, how fast, and for how long.
#[derive(Debug, Clone)]
pub struct Workload {
    /// Adapter names (or `base`) by popularity rank: the first is the most popular.
    pub targets: Vec<String>,
    pub zipf: Zipf,
    pub mix: Mix,
    pub shape: RequestShape,
    pub pacing: Pacing,
    pub warmup: Duration,
    /// Measured time after the warm-up; with `count`, whichever ends first.
    pub duration: Option<Duration>,
    /// Measured requests after the warm-up.
    pub count: Option<usize>,
    pub seed: u64,
}

/// One request and its answer.
#[derive(Debug, Clone, PartialEq)]
pub struct Record {
    /// Send time (scheduled, for open loop), seconds from the start of the run.
    pub sent_s: f64,
    pub latency_ms: f64,
    pub kind: Kind,
    /// Index into [`Workload::targets`].
    pub target: usize,
    pub status: u16,
    pub swap_ms: Option<f64>,
    /// The server's `elapsed_ms.queue` and `elapsed_ms.total` of a successful answer.
    pub queue_ms: Option<f64>,
    pub server_ms: Option<f64>,
    pub merged: Option<bool>,
    pub error: Option<String>,
    /// The `Retry-After` of a refusal, in whole seconds.
    pub retry_after_s: Option<u64>,
    /// The replica that answered, when the answer named one.
    pub replica: Option<String>,
    pub warmup: bool,
}

impl Record {
    pub fn ok(&self) -> bool {
        self.status == 200
    }

    pub fn done_s(&self) -> f64 {
        self.sent_s + self.latency_ms / 1e3
    }
}

/// Everything a run recorded, in completion order.
#[derive(Debug, Clone, Default)]
pub struct RunRecords {
    pub records: Vec<Record>,
    pub warmup_s: f64,
}

struct Shared {
    client: Client,
    workload: Workload,
    start: Instant,
    measured_issued: AtomicUsize,
    stop: AtomicBool,
    records: Mutex<Vec<Record>>,
    tally: Arc<Tally>,
}

impl Shared {
    /// Sends one request that was due at `due_s` and records it.
    fn send(&self, kind: Kind, target: usize, due_s: f64, warmup: bool) {
        let name = &self.workload.targets[target];
        let answer = self.client.infer(kind, name, &self.workload.shape);
        let latency_ms = (self.start.elapsed().as_secs_f64() - due_s) * 1e3;
        let record = Record {
            sent_s: due_s,
            latency_ms,
            kind,
            target,
            status: answer.status,
            swap_ms: answer.swap_ms,
            queue_ms: answer.queue_ms,
            server_ms: answer.server_ms,
            merged: answer.merged,
            error: answer.error,
            retry_after_s: answer.retry_after_s,
            replica: answer.replica,
            warmup,
        };
        if !warmup {
            self.tally.record(latency_ms, record.ok());
        }
        self.records.lock().unwrap().push(record);
    }

    /// Whether a request sent at `t_s` is still wanted, and whether it is a warm-up one; counts
    /// it when it is measured.
    fn admit(&self, t_s: f64) -> Option<bool> {
        let w = &self.workload;
        let warmup_s = w.warmup.as_secs_f64();
        if t_s < warmup_s {
            return Some(true);
        }
        if w.duration
            .is_some_and(|d| t_s >= warmup_s + d.as_secs_f64())
        {
            return None;
        }
        let issued = self.measured_issued.fetch_add(1, Ordering::Relaxed);
        if w.count.is_some_and(|c| issued >= c) {
            return None;
        }
        Some(false)
    }
}

/// Runs `workload` against `client`, with a progress line labelled `label`.
pub fn drive(client: &Client, workload: &Workload, label: &str) -> RunRecords {
    let tally = Arc::new(Tally::new());
    let progress = ProgressLine::start(label.to_owned(), Arc::clone(&tally));
    let shared = Arc::new(Shared {
        client: client.clone(),
        workload: workload.clone(),
        start: Instant::now(),
        measured_issued: AtomicUsize::new(0),
        stop: AtomicBool::new(false),
        records: Mutex::new(Vec::new()),
        tally,
    });
    match workload.pacing {
        Pacing::Closed { clients } => closed_loop(&shared, clients),
        Pacing::Open { rate, workers } => open_loop(&shared, rate, workers),
    }
    progress.finish();
    let records = std::mem::take(&mut *shared.records.lock().unwrap());
    RunRecords {
        records,
        warmup_s: workload.warmup.as_secs_f64(),
    }
}

fn closed_loop(shared: &Arc<Shared>, clients: usize) {
    let threads: Vec<_> = (0..clients)
        .map(|c| {
            let shared = Arc::clone(shared);
            std::thread::spawn(move || {
                let w = &shared.workload;
                let mut rng = ChaCha8Rng::seed_from_u64(w.seed.wrapping_add(c as u64 * 7919));
                while !shared.stop.load(Ordering::Relaxed) {
                    let now = shared.start.elapsed().as_secs_f64();
                    let Some(warmup) = shared.admit(now) else {
                        shared.stop.store(true, Ordering::Relaxed);
                        break;
                    };
                    let kind = w.mix.sample(&mut rng);
                    let target = w.zipf.sample(&mut rng);
                    shared.send(kind, target, now, warmup);
                }
            })
        })
        .collect();
    for t in threads {
        let _ = t.join();
    }
}

fn open_loop(shared: &Arc<Shared>, rate: f64, workers: usize) {
    let (tx, rx) = mpsc::channel::<(Kind, usize, f64, bool)>();
    let rx = Arc::new(Mutex::new(rx));
    let threads: Vec<_> = (0..workers)
        .map(|_| {
            let shared = Arc::clone(shared);
            let rx = Arc::clone(&rx);
            std::thread::spawn(move || {
                loop {
                    let job = rx.lock().unwrap().recv();
                    let Ok((kind, target, due_s, warmup)) = job else {
                        break;
                    };
                    shared.send(kind, target, due_s, warmup);
                }
            })
        })
        .collect();
    let w = &shared.workload;
    let mut rng = ChaCha8Rng::seed_from_u64(w.seed ^ 0x0b5e_55ed);
    for due_s in PoissonArrivals::new(rate, w.seed) {
        let Some(warmup) = shared.admit(due_s) else {
            break;
        };
        let kind = w.mix.sample(&mut rng);
        let target = w.zipf.sample(&mut rng);
        let due = shared.start + Duration::from_secs_f64(due_s);
        let now = Instant::now();
        if due > now {
            std::thread::sleep(due - now);
        }
        if tx.send((kind, target, due_s, warmup)).is_err() {
            break;
        }
    }
    drop(tx);
    for t in threads {
        let _ = t.join();
    }
}
