//! The engine's queue: one lane per tenant, served by deficit round robin (Shreedhar and
//! Varghese, 1995) with the sparse-flow priority of FQ-CoDel (RFC 8290), so a tenant that sends
//! more than the server can answer waits behind its own requests, not in front of everyone
//! else's, and a tenant that sends little is served next.
//!
//! Each job has a cost (rows for an embedding job, tokens for a generation). Lanes holding jobs
//! take turns; at the start of its turn a lane is credited `quantum`, and the turn takes jobs
//! from the lane's front while its credit covers them. A job that costs more than the credit
//! waits for later turns (credit carries over while the lane holds jobs, and is dropped when it
//! empties, so an idle tenant saves nothing up). Over any stretch in which two tenants both have
//! jobs waiting, the cost each is served differs by at most a quantum plus one job.
//!
//! Turn order: a lane that had nothing queued joins the `new` list, whose lanes go before the
//! `old` list's; after its turn a lane with jobs left joins the back of `old`. A `new` lane that
//! empties also goes to the back of `old` (empty), and leaves only when its turn there comes; a
//! job pushed meanwhile finds it listed and gets no priority. So a tenant sending one request
//! now and then waits for at most the batch under way, one that keeps its lane busy takes its
//! turn in order like everyone else, and one that pushes again right after each answer gets at
//! most two turns to a busy tenant's one.
//!
//! [`FairQueue::take`] fills one batch up to a budget (cost and job count); a turn that the
//! budget cuts short goes on in the next batch without fresh credit. The queue is bounded twice:
//! `total` jobs in all, and `per_lane` jobs per tenant, which keeps room for every tenant however
//! hard one of them pushes; a push past either bound is refused with the job handed back.
//!
//! One mutex guards everything (taken by the handlers to push and by the engine thread to take),
//! and a condition variable wakes the engine thread. A count of queued jobs kept under that mutex
//! cannot drift below zero, whatever the interleaving.

use std::collections::VecDeque;
use std::sync::{Condvar, Mutex, MutexGuard};
use std::time::{Duration, Instant};

/// What a queued job costs the engine, in the unit the lanes are credited in.
pub trait Cost {
    fn cost(&self) -> u64;
}

/// The queue's bounds and credit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct QueueLimits {
    /// Jobs waiting in all lanes together.
    pub total: usize,
    /// Jobs waiting in one lane.
    pub per_lane: usize,
    /// Credit each lane gets per turn.
    pub quantum: u64,
}

impl QueueLimits {
    /// `total` jobs, shared equally by `lanes` tenants: each may hold `total / lanes`, rounded
    /// down so that the shares fit in the total together (at least one each).
    pub fn shared(total: usize, lanes: usize, quantum: u64) -> Self {
        Self {
            total: total.max(1),
            per_lane: (total / lanes.max(1)).max(1),
            quantum: quantum.max(1),
        }
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

/// Which turn list a lane is on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum List {
    New,
    Old,
}

#[derive(Debug)]
struct Lane<T> {
    jobs: VecDeque<(T, u64)>,
    credit: u64,
    queued_cost: u64,
    /// The turn list it is on; `None` when it is on neither (and holds no jobs).
    list: Option<List>,
    /// Whether its current turn began (it was credited) in an earlier batch.
    turn_begun: bool,
}

impl<T> Lane<T> {
    fn new() -> Self {
        Self {
            jobs: VecDeque::new(),
            credit: 0,
            queued_cost: 0,
            list: None,
            turn_begun: false,
        }
    }
}

/// How long the rate estimate looks back.
const RATE_WINDOW: Duration = Duration::from_secs(5);

#[derive(Debug)]
struct State<T> {
    lanes: Vec<Lane<T>>,
    /// Lanes that had nothing queued when a job came, in arrival order: their turns come first.
    new: VecDeque<usize>,
    /// Every other listed lane, in turn order.
    old: VecDeque<usize>,
    queued: usize,
    closed: bool,
    /// When the engine took how much, over the last [`RATE_WINDOW`]: the service rate.
    taken: VecDeque<(Instant, u64)>,
}

impl<T> State<T> {
    /// The lane whose turn is next (or under way), and its list.
    fn front(&self) -> Option<(usize, List)> {
        match self.new.front() {
            Some(&lane) => Some((lane, List::New)),
            None => self.old.front().map(|&lane| (lane, List::Old)),
        }
    }

    fn listed(&self) -> usize {
        self.new.len() + self.old.len()
    }

    /// Ends the turn of `lane` (the front of `list`): a lane with jobs left goes to the back of
    /// `old`; an emptied one forgets its credit and leaves, except that a `new` lane goes to the
    /// back of `old` once more, empty.
    fn end_turn(&mut self, lane: usize, list: List) {
        match list {
            List::New => self.new.pop_front(),
            List::Old => self.old.pop_front(),
        };
        let l = &mut self.lanes[lane];
        l.turn_begun = false;
        if l.jobs.is_empty() {
            l.credit = 0;
        }
        if !l.jobs.is_empty() || list == List::New {
            l.list = Some(List::Old);
            self.old.push_back(lane);
        } else {
            l.list = None;
        }
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
                lanes: (0..lanes.max(1)).map(|_| Lane::new()).collect(),
                new: VecDeque::new(),
                old: VecDeque::new(),
                queued: 0,
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

    /// Queues `job` in `lane`'s turn order, or hands it back with the reason.
    pub fn push(&self, lane: usize, job: T) -> Result<(), (Refused, T)> {
        let mut s = self.state();
        if s.closed {
            return Err((Refused::Closed, job));
        }
        if s.lanes[lane].jobs.len() >= self.limits.per_lane {
            return Err((Refused::LaneFull, job));
        }
        if s.queued >= self.limits.total {
            return Err((Refused::Full, job));
        }
        let cost = job.cost();
        let l = &mut s.lanes[lane];
        l.jobs.push_back((job, cost));
        l.queued_cost += cost;
        if l.list.is_none() {
            l.list = Some(List::New);
            s.new.push_back(lane);
        }
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

    /// Deficit round robin over the lanes, as the module doc says.
    fn take_from(&self, s: &mut State<T>, budget: Budget, now: Instant) -> Vec<T> {
        let quantum = self.limits.quantum;
        let mut batch = Vec::new();
        let mut cost = 0u64;
        // Turns in a row that took nothing: once every lane has had one, all are short of credit.
        let mut empty_turns = 0usize;
        'turns: while let Some((lane, list)) = s.front() {
            if batch.len() >= budget.jobs || (!batch.is_empty() && cost >= budget.cost) {
                break;
            }
            if s.lanes[lane].jobs.is_empty() {
                // An emptied new lane, back on the old list for one pass.
                s.end_turn(lane, list);
                continue;
            }
            let l = &mut s.lanes[lane];
            if !l.turn_begun {
                l.credit += quantum;
                l.turn_begun = true;
            }
            let mut took = false;
            while let Some(&(_, c)) = l.jobs.front() {
                if c > l.credit {
                    break;
                }
                if batch.len() >= budget.jobs || (!batch.is_empty() && cost + c > budget.cost) {
                    // The batch is full; this turn goes on in the next one.
                    break 'turns;
                }
                let (job, c) = l.jobs.pop_front().expect("front exists");
                l.credit -= c;
                l.queued_cost -= c;
                cost += c;
                batch.push(job);
                took = true;
            }
            s.end_turn(lane, list);
            if took {
                empty_turns = 0;
            } else {
                empty_turns += 1;
                if empty_turns >= s.listed() {
                    skip_empty_rounds(s, quantum);
                    empty_turns = 0;
                }
            }
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

    /// Jobs waiting in `lane`.
    pub fn lane_len(&self, lane: usize) -> usize {
        self.state().lanes[lane].jobs.len()
    }

    /// About how long until the engine serves one more job of `lane` (for `None`, any job):
    /// the cost of one turn of every busy lane, for a lane's next job the larger of its front
    /// job and a quantum, at the rate the engine took cost over the last few seconds. `None`
    /// while that rate is not known (nothing taken lately).
    pub fn wait_estimate(&self, lane: Option<usize>) -> Option<Duration> {
        self.wait_estimate_at(lane, Instant::now())
    }

    fn wait_estimate_at(&self, lane: Option<usize>, now: Instant) -> Option<Duration> {
        let s = self.state();
        let rate = service_rate(&s.taken, now)?;
        let quantum = self.limits.quantum;
        let ahead = match lane {
            Some(lane) => {
                let front = s.lanes[lane].jobs.front().map_or(0, |(_, c)| *c);
                let busy = s.lanes.iter().filter(|l| !l.jobs.is_empty()).count() as u64;
                let others = busy - u64::from(!s.lanes[lane].jobs.is_empty());
                front.max(quantum) * (1 + others)
            }
            None => {
                let busy = s.lanes.iter().filter(|l| !l.jobs.is_empty()).count();
                quantum * busy.max(1) as u64
            }
        };
        Some(Duration::from_secs_f64(ahead as f64 / rate))
    }
}

/// When a whole round of turns took nothing (every front job costs more than its lane's
/// credit), the rounds until the first of them fits would take nothing either: credit them all
/// at once. Credits stay as round robin would have left them, one round short (the next turn
/// adds it).
fn skip_empty_rounds<T>(s: &mut State<T>, quantum: u64) {
    let waiting = || {
        s.lanes
            .iter()
            .filter(|l| l.list.is_some() && !l.jobs.is_empty())
    };
    let rounds = waiting()
        .filter_map(|l| {
            let (_, c) = l.jobs.front()?;
            Some(c.saturating_sub(l.credit).div_ceil(quantum))
        })
        .min()
        .unwrap_or(0);
    if rounds > 1 {
        for l in s.lanes.iter_mut() {
            if l.list.is_some() && !l.jobs.is_empty() {
                l.credit += (rounds - 1) * quantum;
            }
        }
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
