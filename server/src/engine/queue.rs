//! The engine's queue: one lane per tenant, served by start-time fair queueing (Goyal, Vin and
//! Cheng, 1996), so a tenant that sends more than the server can answer waits behind its own
//! requests, not in front of everyone else's.
//!
//! Each job has a cost (rows for an embedding job, tokens for a generation) and, when it is
//! queued, a start tag: the later of the queue's virtual time and the finish tag of the same
//! tenant's previous job; its finish tag is its start tag plus its cost. Jobs are taken in order
//! of start tag (ties in arrival order), and the virtual time is the start tag of the last job
//! taken. So a tenant's tags run ahead of the virtual time by the cost it has queued: a tenant
//! with a backlog of a hundred jobs has tags far ahead, while one that sends a job now and then
//! gets a tag at the virtual time and goes next, behind only the batch under way. One that sends
//! a job the moment its last one was taken continues from that job's finish tag (it gets its
//! share, not more).
//!
//! A tenant back from idle may start a bounded `burst` of cost *before* the virtual time: its
//! start tag is the later of (virtual time − burst) and its last finish tag. A light tenant's
//! requests come in clumps (several arrive together, then none for a while); without the burst
//! the second request of a clump would take turns with a flooding tenant's backlog, one batch
//! each, and the clump's last request would wait as many batches as the clump is long, twice
//! over. With it, the whole clump (up to `burst`) goes before the backlog. What a tenant gains so
//! is bounded: it has to be idle while the virtual time moves on by `burst` to save it up again,
//! and over any stretch in which two tenants both have jobs waiting, the cost each is served
//! differs by at most the largest job plus the burst (Goyal et al.'s bound, with the burst
//! added). A burst of 0 is plain start-time fair queueing.
//!
//! [`FairQueue::take`] fills one batch up to a budget (cost and job count), in tag order, and
//! stops at the first job that does not fit (a first job larger than the budget is taken alone).
//! The queue is bounded twice: `total` jobs in all, and `per_lane` jobs per tenant, which keeps
//! room for every tenant however hard one of them pushes; a push past either bound is refused
//! with the job handed back. A place can be held before the job exists ([`FairQueue::hold`]):
//! the server holds one before it resolves (and perhaps loads) the request's adapter, so a
//! request the queue would refuse is refused before it costs a load. Held places count against
//! both bounds until the job is pushed into them ([`FairQueue::push_held`]) or they are
//! released ([`FairQueue::release`]).
//!
//! One mutex guards everything (taken by the handlers to push and by the engine thread to take),
//! and a condition variable wakes the engine thread. A count of queued jobs kept under that mutex
//! cannot drift below zero, whatever the interleaving.

use std::collections::VecDeque;
use std::sync::{Condvar, Mutex, MutexGuard};
use std::time::{Duration, Instant};

/// What a queued job costs the engine, in the unit its tags advance in.
pub trait Cost {
    fn cost(&self) -> u64;
}

/// The queue's bounds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct QueueLimits {
    /// Jobs waiting in all lanes together.
    pub total: usize,
    /// Jobs waiting in one lane.
    pub per_lane: usize,
    /// The cost a tenant back from idle may be served ahead of the tenants with a backlog (see
    /// the module doc); 0 for none.
    pub burst: u64,
}

impl QueueLimits {
    /// `total` jobs, shared equally by `lanes` tenants: each may hold `total / lanes`, rounded
    /// down so that the shares fit in the total together (at least one each).
    pub fn shared(total: usize, lanes: usize) -> Self {
        Self {
            total: total.max(1),
            per_lane: (total / lanes.max(1)).max(1),
            burst: 0,
        }
    }

    /// These bounds with a burst of `burst` (see the module doc).
    pub fn with_burst(self, burst: u64) -> Self {
        Self { burst, ..self }
    }
}

/// Why a push was refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Refused {
    /// The whole queue holds `total` jobs.
    Full,
    /// The tenant's lane holds `per_lane` jobs.
    LaneFull,
    /// The queue is closed (shutdown).
    Closed,
}

/// How much one batch may take.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Budget {
    /// Total cost; a first job that costs more than this is still taken, alone.
    pub cost: u64,
    /// Number of jobs.
    pub jobs: usize,
}

#[derive(Debug)]
struct Queued<T> {
    job: T,
    cost: u64,
    start: u64,
    /// Arrival order, to break ties between equal start tags.
    seq: u64,
}

#[derive(Debug)]
struct Lane<T> {
    jobs: VecDeque<Queued<T>>,
    /// The finish tag of the lane's last queued job.
    finish: u64,
    /// Places held for jobs not pushed yet.
    held: usize,
}

/// How long the rate estimate looks back.
const RATE_WINDOW: Duration = Duration::from_secs(5);

#[derive(Debug)]
struct State<T> {
    lanes: Vec<Lane<T>>,
    /// The start tag of the last job taken.
    virtual_time: u64,
    seq: u64,
    queued: usize,
    /// Places held in all lanes together.
    held: usize,
    closed: bool,
    /// When the engine took how much, over the last [`RATE_WINDOW`]: the service rate.
    taken: VecDeque<(Instant, u64)>,
}

impl<T> State<T> {
    /// The lane whose front job comes next: the smallest start tag, then the earliest arrival.
    fn next_lane(&self) -> Option<usize> {
        self.lanes
            .iter()
            .enumerate()
            .filter_map(|(i, l)| l.jobs.front().map(|q| ((q.start, q.seq), i)))
            .min()
            .map(|(_, i)| i)
    }

    /// The start tag a job pushed into `lane` now gets: the later of (virtual time - `burst`)
    /// and the lane's last finish tag.
    fn next_start(&self, lane: usize, burst: u64) -> u64 {
        self.virtual_time
            .saturating_sub(burst)
            .max(self.lanes[lane].finish)
    }

    /// The cost of the jobs ordered before a job with start tag `start` that arrived after all
    /// those queued.
    fn cost_before(&self, start: u64) -> u64 {
        self.lanes
            .iter()
            .flat_map(|l| l.jobs.iter())
            .filter(|q| q.start <= start)
            .map(|q| q.cost)
            .sum()
    }
}

/// The per-tenant queue; see the module doc.
#[derive(Debug)]
pub struct FairQueue<T> {
    limits: QueueLimits,
    state: Mutex<State<T>>,
    ready: Condvar,
}

impl<T: Cost> FairQueue<T> {
    /// An empty queue with one lane per tenant.
    pub fn new(lanes: usize, limits: QueueLimits) -> Self {
        Self {
            limits,
            state: Mutex::new(State {
                lanes: (0..lanes.max(1))
                    .map(|_| Lane {
                        jobs: VecDeque::new(),
                        finish: 0,
                        held: 0,
                    })
                    .collect(),
                virtual_time: 0,
                seq: 0,
                queued: 0,
                held: 0,
                closed: false,
                taken: VecDeque::new(),
            }),
            ready: Condvar::new(),
        }
    }

    pub fn limits(&self) -> QueueLimits {
        self.limits
    }

    /// The state; no code panics while holding it, but were one to, the counts it leaves are
    /// still consistent, so a poisoned lock is taken over rather than passed on.
    fn state(&self) -> MutexGuard<'_, State<T>> {
        self.state.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Queues `job` in `lane` with its start tag, or hands it back with the reason.
    pub fn push(&self, lane: usize, job: T) -> Result<(), (Refused, T)> {
        match self.hold(lane) {
            Ok(()) => self.push_held(lane, job),
            Err(why) => Err((why, job)),
        }
    }

    /// Whether `lane` has a place free now (a hint: another push may take it first).
    pub fn room(&self, lane: usize) -> Result<(), Refused> {
        self.room_in(&self.state(), lane)
    }

    fn room_in(&self, s: &State<T>, lane: usize) -> Result<(), Refused> {
        if s.closed {
            return Err(Refused::Closed);
        }
        let l = &s.lanes[lane];
        if l.jobs.len() + l.held >= self.limits.per_lane {
            return Err(Refused::LaneFull);
        }
        if s.queued + s.held >= self.limits.total {
            return Err(Refused::Full);
        }
        Ok(())
    }

    /// Holds a place in `lane` for a job to come, or says why there is none.
    pub fn hold(&self, lane: usize) -> Result<(), Refused> {
        let mut s = self.state();
        self.room_in(&s, lane)?;
        s.lanes[lane].held += 1;
        s.held += 1;
        Ok(())
    }

    /// Gives back a place held in `lane` whose job will not come.
    pub fn release(&self, lane: usize) {
        let mut s = self.state();
        if s.lanes[lane].held > 0 {
            s.lanes[lane].held -= 1;
            s.held -= 1;
        }
    }

    /// Queues `job` in a place held in `lane` with its start tag; refused (and the place given
    /// back) only when the queue closed meanwhile.
    pub fn push_held(&self, lane: usize, job: T) -> Result<(), (Refused, T)> {
        let mut s = self.state();
        if s.lanes[lane].held > 0 {
            s.lanes[lane].held -= 1;
            s.held -= 1;
        }
        if s.closed {
            return Err((Refused::Closed, job));
        }
        let cost = job.cost();
        let start = s.next_start(lane, self.limits.burst);
        s.seq += 1;
        let seq = s.seq;
        let l = &mut s.lanes[lane];
        l.finish = start.saturating_add(cost);
        l.jobs.push_back(Queued {
            job,
            cost,
            start,
            seq,
        });
        s.queued += 1;
        drop(s);
        self.ready.notify_one();
        Ok(())
    }

    /// Takes one batch within `budget`: blocks while the queue is empty and open; `None` once it
    /// is closed and empty.
    pub fn take(&self, budget: Budget) -> Option<Vec<T>> {
        let mut s = self.state();
        while s.queued == 0 {
            if s.closed {
                return None;
            }
            s = self.ready.wait(s).unwrap_or_else(|e| e.into_inner());
        }
        Some(self.take_from(&mut s, budget, Instant::now()))
    }

    /// Takes what is there within `budget`, without waiting (possibly nothing).
    pub fn try_take(&self, budget: Budget) -> Vec<T> {
        let mut s = self.state();
        self.take_from(&mut s, budget, Instant::now())
    }

    /// Jobs in start-tag order while they fit the budget.
    fn take_from(&self, s: &mut State<T>, budget: Budget, now: Instant) -> Vec<T> {
        let mut batch = Vec::new();
        let mut cost = 0u64;
        while batch.len() < budget.jobs {
            let Some(lane) = s.next_lane() else { break };
            let next = s.lanes[lane]
                .jobs
                .front()
                .expect("the next lane holds a job");
            if !batch.is_empty() && cost.saturating_add(next.cost) > budget.cost {
                break;
            }
            let q = s.lanes[lane]
                .jobs
                .pop_front()
                .expect("the next lane holds a job");
            s.virtual_time = s.virtual_time.max(q.start);
            cost = cost.saturating_add(q.cost);
            batch.push(q.job);
        }
        s.queued -= batch.len();
        if !batch.is_empty() {
            s.taken.push_back((now, cost));
        }
        while s
            .taken
            .front()
            .is_some_and(|(at, _)| now.saturating_duration_since(*at) > RATE_WINDOW)
            || s.taken.len() > 4096
        {
            s.taken.pop_front();
        }
        batch
    }

    /// Stops taking jobs and wakes the engine thread; what is queued can still be taken.
    pub fn close(&self) {
        self.state().closed = true;
        self.ready.notify_all();
    }

    /// Jobs waiting in all lanes.
    pub fn len(&self) -> usize {
        self.state().queued
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Places held and not yet pushed into, in all lanes.
    pub fn held(&self) -> usize {
        self.state().held
    }

    /// Jobs waiting in `lane`.
    pub fn lane_len(&self, lane: usize) -> usize {
        self.state().lanes[lane].jobs.len()
    }

    /// About how long until the engine has taken one more job of `lane`: the cost ordered
    /// before and including the lane's front job (or, with none queued, a job it would push
    /// now), at the rate the engine took cost over the last few seconds. For `None`, until the
    /// next job is taken. `None` while that rate is not known (nothing taken lately).
    pub fn wait_estimate(&self, lane: Option<usize>) -> Option<Duration> {
        self.wait_estimate_at(lane, Instant::now())
    }

    fn wait_estimate_at(&self, lane: Option<usize>, now: Instant) -> Option<Duration> {
        let s = self.state();
        let rate = service_rate(&s.taken, now)?;
        let ahead = match lane {
            Some(lane) => match s.lanes[lane].jobs.front() {
                Some(front) => s.cost_before(front.start),
                None => s.cost_before(s.next_start(lane, self.limits.burst)),
            },
            None => s
                .next_lane()
                .and_then(|i| s.lanes[i].jobs.front())
                .map_or(0, |q| q.cost),
        };
        Some(Duration::from_secs_f64(ahead.max(1) as f64 / rate))
    }
}

/// Cost taken per second over the window before `now`, from the first take in it to `now`.
fn service_rate(taken: &VecDeque<(Instant, u64)>, now: Instant) -> Option<f64> {
    let recent = || {
        taken
            .iter()
            .filter(move |(at, _)| now.saturating_duration_since(*at) <= RATE_WINDOW)
    };
    let (first, _) = recent().next()?;
    let span = now.saturating_duration_since(*first).as_secs_f64();
    let total: u64 = recent().map(|(_, c)| c).sum();
    (span > 0.05 && total > 0).then(|| total as f64 / span)
}

#[cfg(test)]
mod tests;
