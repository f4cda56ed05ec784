//! Guarded rollouts: a split of two arms (the first is the incumbent, the other the candidate)
//! may carry a [`RolloutPolicy`]. The server then watches the candidate and acts on its own:
//!
//! - it **rolls the candidate back** (its weight to 0, and optionally the adapter's live version
//!   back) as soon as a guard is crossed with always-valid confidence: the candidate's error
//!   share is above the incumbent's by more than a margin, its 99th-percentile latency is above
//!   the incumbent's by more than a margin, or its outcome is worse by more than a margin;
//! - it **promotes the candidate** step by step (its share of traffic raised to each of
//!   [`RolloutPolicy::steps`] in turn, each step held for [`RolloutPolicy::step_requests`]
//!   candidate requests with no guard crossed, and, when an outcome guard is set, the outcome
//!   better with always-valid confidence), and at the end **flips its version live**.
//!
//! Nothing acts before each arm has finished [`RolloutPolicy::min_requests`] requests. The
//! confidence statements are the normal-mixture ones of [`super::sequential`] (valid however
//! often they are read, which a controller checking every second does): for error shares and
//! outcomes the two-arm comparison; for latency a one-sample test that more than 1% of the
//! candidate's requests are slower than the incumbent's p99 plus the margin (the incumbent's p99
//! is taken as measured, its own uncertainty is not part of the test).
//!
//! This module is pure: it reads tallies and says what to do ([`decide`]); the experiments
//! layer applies the decision through the store (once, across replicas) and the registry.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use super::sequential::{
    AlwaysValidComparison, MIN_OUTCOMES_PER_ARM, always_valid_numeric, always_valid_proportion,
    comparison, mixture_half_width, mixture_p_value,
};
use super::stats::{BinaryTally, CONFIDENCE_LEVEL, NumericTally};
use super::{BASE_MODEL, Split};

/// `min_requests` when a policy does not give one.
pub const DEFAULT_MIN_REQUESTS: u64 = 200;
/// The most promotion steps a policy may have.
pub const MAX_STEPS: usize = 16;
/// The share of requests the latency guard allows above the incumbent's p99 plus the margin.
pub const SLOW_SHARE: f64 = 0.01;

/// Request latencies in buckets that grow by 10% each, from 0.1 ms: a quantile read from them
/// is within 10% of the true one. Bucket `b` holds latencies in `[0.1·1.1^b, 0.1·1.1^(b+1))` ms;
/// the last bucket ([`LatencyHistogram::BUCKETS`] − 1) takes everything longer (about 16 min).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct LatencyHistogram {
    counts: BTreeMap<u16, u64>,
}

const BUCKET_BASE_MS: f64 = 0.1;
const BUCKET_RATIO: f64 = 1.1;

impl LatencyHistogram {
    pub const BUCKETS: u16 = 170;

    /// The bucket a latency of `ms` milliseconds falls in.
    pub fn bucket_of(ms: f64) -> u16 {
        if ms.is_nan() || ms <= BUCKET_BASE_MS {
            return 0;
        }
        let b = ((ms / BUCKET_BASE_MS).ln() / BUCKET_RATIO.ln()).floor();
        (b as u16).min(Self::BUCKETS - 1)
    }

    /// The lowest latency of bucket `b`, in ms.
    pub fn lower_edge(b: u16) -> f64 {
        if b == 0 {
            0.0
        } else {
            BUCKET_BASE_MS * BUCKET_RATIO.powi(i32::from(b))
        }
    }

    /// The highest latency of bucket `b`, in ms.
    pub fn upper_edge(b: u16) -> f64 {
        BUCKET_BASE_MS * BUCKET_RATIO.powi(i32::from(b) + 1)
    }

    pub fn record(&mut self, ms: f64) {
        self.add(Self::bucket_of(ms), 1);
    }

    /// Adds `n` latencies to bucket `b` (a bucket past the last counts in the last).
    pub fn add(&mut self, b: u16, n: u64) {
        if n > 0 {
            let slot = self.counts.entry(b.min(Self::BUCKETS - 1)).or_default();
            *slot = slot.saturating_add(n);
        }
    }

    /// Non-empty buckets and their counts, lowest first.
    pub fn buckets(&self) -> impl Iterator<Item = (u16, u64)> + '_ {
        self.counts.iter().map(|(b, n)| (*b, *n))
    }

    pub fn count(&self) -> u64 {
        self.counts.values().sum()
    }

    /// The `q` quantile, as the upper edge of the bucket it falls in (so never below the true
    /// value, and at most 10% above it); `None` when empty.
    pub fn quantile(&self, q: f64) -> Option<f64> {
        let total = self.count();
        if total == 0 {
            return None;
        }
        let rank = (q.clamp(0.0, 1.0) * total as f64).ceil().max(1.0) as u64;
        let mut seen = 0;
        for (b, n) in self.buckets() {
            seen += n;
            if seen >= rank {
                return Some(Self::upper_edge(b));
            }
        }
        self.counts.keys().last().map(|b| Self::upper_edge(*b))
    }

    /// How many latencies are surely above `ms`: those in buckets whose lower edge is at least
    /// `ms` (a bucket that straddles `ms` is not counted, so this never overcounts).
    pub fn surely_above(&self, ms: f64) -> u64 {
        self.buckets()
            .filter(|(b, _)| Self::lower_edge(*b) >= ms)
            .map(|(_, n)| n)
            .sum()
    }
}

/// How the requests an arm served ended: the evidence of the error and latency guards.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ArmHealth {
    /// Requests that ended (answered or failed) after this arm was assigned.
    pub finished: u64,
    /// Of those, the ones that failed.
    pub errors: u64,
    /// The latency of each finished request, from assignment to its end.
    pub latency: LatencyHistogram,
}

/// What a guarded outcome is: numbers or yes/no.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum OutcomeKind {
    Number,
    YesNo,
}

/// Which way an outcome is better.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Better {
    #[default]
    Higher,
    Lower,
}

/// The outcome guard: the candidate is rolled back when its outcome is worse than the
/// incumbent's by more than `margin` (in the outcome's units; for yes/no, a share such as 0.02),
/// and, where promotion waits for it, counts as winning when it is better at all.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct OutcomeGuard {
    pub kind: OutcomeKind,
    #[serde(default)]
    pub better: Better,
    #[serde(default)]
    pub margin: f64,
}

/// The guards of a rollout; each is optional.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct Guards {
    /// Rolled back when the candidate's error share is above the incumbent's by more than this
    /// (a share: 0.01 is one point).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub error_rate: Option<f64>,
    /// Rolled back when more than 1% of the candidate's requests take longer than the
    /// incumbent's p99 plus this many milliseconds.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub latency_p99_ms: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub outcome: Option<OutcomeGuard>,
}

/// The rollout policy a split may carry (`rollout` in `PUT /admin/splits/{name}`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RolloutPolicy {
    /// The arm being rolled out: the split's second arm (the first is the incumbent).
    pub candidate: String,
    /// Requests each arm must have finished before anything acts.
    #[serde(default = "default_min_requests")]
    pub min_requests: u64,
    #[serde(default)]
    pub guards: Guards,
    /// The candidate's share of traffic after each promotion, rising, each in (0, 1). Empty:
    /// the candidate is guarded but never promoted by steps.
    #[serde(default)]
    pub steps: Vec<f64>,
    /// Candidate requests each step holds (no guard crossed) before the next; default
    /// `min_requests`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub step_requests: Option<u64>,
    /// After the last step holds, set the candidate's version live and send the split's whole
    /// traffic to it (default true). False: stay on the last step, still guarded.
    #[serde(default = "yes")]
    pub flip_live: bool,
    /// On a rollback, also set the adapter's live version back when the candidate's version is
    /// live (to the incumbent's held version, else to the previous live one).
    #[serde(default)]
    pub roll_back_live: bool,
}

fn default_min_requests() -> u64 {
    DEFAULT_MIN_REQUESTS
}

fn yes() -> bool {
    true
}

/// A policy that does not fit its split, naming the field.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("rollout.{field}: {message}")]
pub struct PolicyError {
    pub field: String,
    pub message: String,
}

fn refuse(field: &str, message: impl Into<String>) -> PolicyError {
    PolicyError {
        field: field.to_owned(),
        message: message.into(),
    }
}

impl RolloutPolicy {
    /// Checks the policy against its split: two arms, the candidate the second one and holding
    /// a version of an adapter, sane numbers.
    pub fn check(&self, split: &Split) -> Result<(), PolicyError> {
        let arms = split.arms();
        if arms.len() != 2 {
            return Err(refuse(
                "candidate",
                format!(
                    "a rollout needs exactly two arms, the incumbent first and the candidate second; this split has {}",
                    arms.len()
                ),
            ));
        }
        if arms[1].name != self.candidate {
            return Err(refuse(
                "candidate",
                format!(
                    "{:?} is not the split's second arm (its arms are {:?} and {:?}; the first is the incumbent)",
                    self.candidate, arms[0].name, arms[1].name
                ),
            ));
        }
        let candidate = &arms[1];
        if candidate.adapter == BASE_MODEL || candidate.version.is_none() {
            return Err(refuse(
                "candidate",
                format!(
                    "arm {:?} must hold a version of an adapter (`version`), the one a promotion sets live",
                    self.candidate
                ),
            ));
        }
        if !(MIN_OUTCOMES_PER_ARM..=1_000_000_000).contains(&self.min_requests) {
            return Err(refuse(
                "min_requests",
                format!("must be from {MIN_OUTCOMES_PER_ARM} to 1000000000"),
            ));
        }
        if let Some(n) = self.step_requests
            && !(1..=1_000_000_000).contains(&n)
        {
            return Err(refuse("step_requests", "must be from 1 to 1000000000"));
        }
        if self.steps.len() > MAX_STEPS {
            return Err(refuse("steps", format!("at most {MAX_STEPS} steps")));
        }
        let mut last = 0.0;
        for (i, s) in self.steps.iter().enumerate() {
            if !(s.is_finite() && *s > last && *s < 1.0) {
                return Err(refuse(
                    &format!("steps[{i}]"),
                    "each step is the candidate's share of traffic, above the step before and below 1",
                ));
            }
            last = *s;
        }
        let g = &self.guards;
        if let Some(m) = g.error_rate
            && !(m.is_finite() && (0.0..1.0).contains(&m))
        {
            return Err(refuse(
                "guards.error_rate",
                "a margin in shares, at least 0 and below 1",
            ));
        }
        if let Some(m) = g.latency_p99_ms
            && !(m.is_finite() && m >= 0.0)
        {
            return Err(refuse(
                "guards.latency_p99_ms",
                "a margin in milliseconds, at least 0",
            ));
        }
        if let Some(o) = g.outcome
            && !(o.margin.is_finite() && o.margin >= 0.0)
        {
            return Err(refuse(
                "guards.outcome.margin",
                "a finite margin, at least 0",
            ));
        }
        Ok(())
    }

    pub fn step_requests(&self) -> u64 {
        self.step_requests.unwrap_or(self.min_requests)
    }
}

/// Where a rollout is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum RolloutStatus {
    /// Guards and promotion act.
    Watching,
    /// A person paused it: nothing acts until resumed.
    Paused,
    /// The candidate was rolled back; the split sends it nothing. Final.
    RolledBack,
    /// The candidate's version is live and takes the split's traffic. Final.
    Flipped,
}

/// A rollout's progress, kept with the split in the experiment store.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RolloutState {
    pub status: RolloutStatus,
    /// Promotions taken so far (0: the split's weights as first written).
    pub step: usize,
    /// The candidate's finished requests when the current step began.
    pub step_began_at: u64,
    /// Bumped by every change, so that two replicas acting at once act once.
    pub revision: u64,
}

impl RolloutState {
    pub fn start() -> Self {
        Self {
            status: RolloutStatus::Watching,
            step: 0,
            step_began_at: 0,
            revision: 0,
        }
    }
}

/// A policy with its progress: what the store keeps in a split's `rollout` column.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Rollout {
    pub policy: RolloutPolicy,
    pub state: RolloutState,
}

/// What happened to a rollout.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum RolloutAction {
    Started,
    Promoted,
    Flipped,
    RolledBack,
    Paused,
    Resumed,
}

impl RolloutAction {
    pub fn as_str(&self) -> &'static str {
        match self {
            Self::Started => "started",
            Self::Promoted => "promoted",
            Self::Flipped => "flipped",
            Self::RolledBack => "rolled_back",
            Self::Paused => "paused",
            Self::Resumed => "resumed",
        }
    }
}

/// Who acted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum Actor {
    /// The server, by the policy.
    Policy,
    /// A person, through the admin API.
    Operator,
}

/// One entry of a rollout's history.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct RolloutEvent {
    pub at_ms: i64,
    pub action: RolloutAction,
    pub by: Actor,
    /// The candidate's share of traffic after the action.
    pub candidate_share: f64,
    /// Why, in words with the figures that decided it.
    pub reason: String,
}

/// How one guard reads now.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct GuardReading {
    /// `error_rate`, `latency_p99_ms` or `outcome`.
    pub guard: &'static str,
    pub incumbent: Option<f64>,
    pub candidate: Option<f64>,
    pub margin: f64,
    /// Always-valid p-value of "crossed" (1 while the data point the other way).
    pub p_value: Option<f64>,
    /// `too_few` (not enough data), `crossed` (worse by more than the margin, with always-valid
    /// confidence), `clear` (within the margin with the same confidence; for the latency guard,
    /// at most 1% of requests slow so far) or `undecided` (neither yet).
    pub status: &'static str,
    /// For the outcome guard: whether the candidate is better with always-valid confidence.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub candidate_better: Option<bool>,
}

impl GuardReading {
    pub fn crossed(&self) -> bool {
        self.status == "crossed"
    }

    pub fn clear(&self) -> bool {
        self.status == "clear"
    }
}

/// One arm's evidence.
#[derive(Debug, Clone, Copy)]
pub struct Evidence<'a> {
    pub health: &'a ArmHealth,
    pub numeric: &'a NumericTally,
    pub yes_no: &'a BinaryTally,
}

fn alpha() -> f64 {
    1.0 - CONFIDENCE_LEVEL
}

/// Reads every guard of `guards` on the incumbent and the candidate.
pub fn read_guards(
    guards: &Guards,
    incumbent: Evidence<'_>,
    candidate: Evidence<'_>,
    mixing_variance: f64,
) -> Vec<GuardReading> {
    let mut out = Vec::new();
    if let Some(margin) = guards.error_rate {
        let share = |h: &ArmHealth| {
            (h.finished > 0).then(|| h.errors.min(h.finished) as f64 / h.finished as f64)
        };
        let cmp = error_comparison(incumbent.health, candidate.health, mixing_variance);
        let (p_value, status) = match cmp.and_then(|c| c.interval.map(|iv| (c, iv))) {
            None => (None, "too_few"),
            Some((cmp, iv)) => {
                let status = if iv.low > margin {
                    "crossed"
                } else if iv.high < margin {
                    "clear"
                } else {
                    "undecided"
                };
                (
                    shifted_p(cmp.difference - margin, cmp, mixing_variance),
                    status,
                )
            }
        };
        out.push(GuardReading {
            guard: "error_rate",
            incumbent: share(incumbent.health),
            candidate: share(candidate.health),
            margin,
            p_value,
            status,
            candidate_better: None,
        });
    }
    if let Some(margin) = guards.latency_p99_ms {
        let p99_incumbent = incumbent.health.latency.quantile(0.99);
        let p99_candidate = candidate.health.latency.quantile(0.99);
        let n = candidate.health.latency.count();
        let (p_value, status) = match p99_incumbent {
            Some(p99)
                if n >= MIN_OUTCOMES_PER_ARM
                    && incumbent.health.latency.count() >= MIN_OUTCOMES_PER_ARM =>
            {
                let slow = candidate.health.latency.surely_above(p99 + margin);
                let share = slow as f64 / n as f64;
                let se = (SLOW_SHARE * (1.0 - SLOW_SHARE) / n as f64).sqrt();
                let z = (share - SLOW_SHARE) / se;
                let p = if z > 0.0 {
                    mixture_p_value(z, n as f64, mixing_variance).unwrap_or(1.0)
                } else {
                    1.0
                };
                let status = if p < alpha() {
                    "crossed"
                } else if share <= SLOW_SHARE {
                    "clear"
                } else {
                    "undecided"
                };
                (Some(p), status)
            }
            _ => (None, "too_few"),
        };
        out.push(GuardReading {
            guard: "latency_p99_ms",
            incumbent: p99_incumbent,
            candidate: p99_candidate,
            margin,
            p_value,
            status,
            candidate_better: None,
        });
    }
    if let Some(guard) = guards.outcome {
        let (cmp, incumbent_value, candidate_value) = match guard.kind {
            OutcomeKind::Number => (
                always_valid_numeric(candidate.numeric, incumbent.numeric, mixing_variance),
                incumbent.numeric.mean(),
                candidate.numeric.mean(),
            ),
            OutcomeKind::YesNo => (
                always_valid_proportion(candidate.yes_no, incumbent.yes_no, mixing_variance),
                incumbent.yes_no.proportion(),
                candidate.yes_no.proportion(),
            ),
        };
        // Oriented so that positive is better for the candidate.
        let sign = match guard.better {
            Better::Higher => 1.0,
            Better::Lower => -1.0,
        };
        let reading = cmp.and_then(|c| c.interval.map(|iv| (c, iv)));
        let (p_value, status, better) = match reading {
            None => (None, "too_few", None),
            Some((cmp, iv)) => {
                let (low, high) = if sign > 0.0 {
                    (iv.low, iv.high)
                } else {
                    (-iv.high, -iv.low)
                };
                let status = if high < -guard.margin {
                    "crossed"
                } else if low > -guard.margin {
                    "clear"
                } else {
                    "undecided"
                };
                (
                    shifted_p(
                        -(sign * cmp.difference) - guard.margin,
                        cmp,
                        mixing_variance,
                    ),
                    status,
                    Some(low > 0.0),
                )
            }
        };
        out.push(GuardReading {
            guard: "outcome",
            incumbent: incumbent_value,
            candidate: candidate_value,
            margin: guard.margin,
            p_value,
            status,
            candidate_better: better,
        });
    }
    out
}

/// The always-valid comparison of the error shares (candidate − incumbent); no interval while
/// either arm has fewer than [`MIN_OUTCOMES_PER_ARM`] finished requests. Each arm's variance is
/// floored at that of one failure in its `n` requests (`(1/n)(1 − 1/n)/n`), so that two arms
/// without a single failure do not read as known exactly: an arm that has failed nothing in 50
/// requests is not known to fail less than 1 in 100.
fn error_comparison(
    incumbent: &ArmHealth,
    candidate: &ArmHealth,
    mixing_variance: f64,
) -> Option<AlwaysValidComparison> {
    let arm = |h: &ArmHealth| {
        let n = h.finished as f64;
        let p = h.errors.min(h.finished) as f64 / n;
        (p, (p * (1.0 - p)).max((1.0 / n) * (1.0 - 1.0 / n)) / n)
    };
    if incumbent.finished == 0 || candidate.finished == 0 {
        return None;
    }
    let ((p0, v0), (p1, v1)) = (arm(incumbent), arm(candidate));
    comparison(
        p1 - p0,
        Some(v0 + v1),
        candidate.finished,
        incumbent.finished,
        mixing_variance,
    )
}

/// The always-valid p-value that the (oriented) difference exceeds the margin, given the
/// comparison's standard error: `excess` is `difference − margin` in the bad direction.
fn shifted_p(excess: f64, cmp: AlwaysValidComparison, mixing_variance: f64) -> Option<f64> {
    let interval = cmp.interval?;
    let half = (interval.high - interval.low) / 2.0;
    let width = mixture_half_width(cmp.effective_count, mixing_variance, alpha())?;
    let se = half / width;
    if se.is_nan() || se <= 0.0 {
        return None;
    }
    if excess <= 0.0 {
        return Some(1.0);
    }
    mixture_p_value(excess / se, cmp.effective_count, mixing_variance)
}

/// What the policy says to do now.
#[derive(Debug, Clone, PartialEq)]
pub enum Decision {
    /// Nothing yet; why.
    Wait(String),
    RollBack(String),
    /// Raise the candidate's share to `share`.
    Promote {
        share: f64,
        reason: String,
    },
    /// Set the candidate's version live and give it all traffic.
    Flip(String),
}

impl Decision {
    pub fn describe(&self) -> String {
        match self {
            Self::Wait(why) => format!("waiting: {why}"),
            Self::RollBack(why) => format!("roll back: {why}"),
            Self::Promote { share, reason } => format!("promote to {share}: {reason}"),
            Self::Flip(why) => format!("flip live: {why}"),
        }
    }
}

fn figure(x: Option<f64>) -> String {
    x.map(|v| format!("{v:.4}")).unwrap_or_else(|| "n/a".into())
}

/// What `rollout` should do given both arms' evidence and the guard readings.
pub fn decide(
    rollout: &Rollout,
    incumbent: Evidence<'_>,
    candidate: Evidence<'_>,
    readings: &[GuardReading],
) -> Decision {
    let (policy, state) = (&rollout.policy, &rollout.state);
    match state.status {
        RolloutStatus::Watching => {}
        RolloutStatus::Paused => return Decision::Wait("paused by an operator".into()),
        RolloutStatus::RolledBack => return Decision::Wait("rolled back (final)".into()),
        RolloutStatus::Flipped => return Decision::Wait("flipped live (final)".into()),
    }
    let (ni, nc) = (incumbent.health.finished, candidate.health.finished);
    if ni < policy.min_requests || nc < policy.min_requests {
        return Decision::Wait(format!(
            "minimum sample: incumbent {ni} and candidate {nc} of {} finished requests each",
            policy.min_requests
        ));
    }
    let crossed: Vec<String> = readings
        .iter()
        .filter(|r| r.crossed())
        .map(|r| {
            format!(
                "{} crossed (incumbent {}, candidate {}, margin {}, always-valid p {})",
                r.guard,
                figure(r.incumbent),
                figure(r.candidate),
                r.margin,
                figure(r.p_value)
            )
        })
        .collect();
    if !crossed.is_empty() {
        return Decision::RollBack(format!(
            "{} after {nc} candidate and {ni} incumbent requests",
            crossed.join("; ")
        ));
    }
    if policy.steps.is_empty() && !policy.flip_live {
        return Decision::Wait("guarding only (no steps, no flip)".into());
    }
    let held = nc.saturating_sub(state.step_began_at);
    if held < policy.step_requests() {
        return Decision::Wait(format!(
            "step {} holds: {held} of {} candidate requests",
            state.step,
            policy.step_requests()
        ));
    }
    if let Some(r) = readings.iter().find(|r| r.guard == "outcome")
        && r.candidate_better != Some(true)
    {
        return Decision::Wait(format!(
            "outcome not yet better with always-valid confidence (incumbent {}, candidate {})",
            figure(r.incumbent),
            figure(r.candidate)
        ));
    }
    let pending: Vec<String> = readings
        .iter()
        .filter(|r| !r.clear())
        .map(|r| {
            format!(
                "{} {} (incumbent {}, candidate {}, margin {})",
                r.guard,
                r.status.replace('_', " "),
                figure(r.incumbent),
                figure(r.candidate),
                r.margin
            )
        })
        .collect();
    if !pending.is_empty() {
        return Decision::Wait(format!("guards not yet clear: {}", pending.join("; ")));
    }
    let why = format!(
        "step {} held {held} candidate requests with every guard clear",
        state.step
    );
    match policy.steps.get(state.step) {
        Some(&share) => Decision::Promote { share, reason: why },
        None if policy.flip_live => Decision::Flip(why),
        None => Decision::Wait("on the last step (flip_live is false)".into()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::splits::{ArmSpec, SplitSpec};

    fn split(arms: usize) -> Split {
        let mut list = vec![ArmSpec {
            name: "incumbent".into(),
            adapter: "desk".into(),
            version: Some("00000000000000aa".into()),
            weight: 0.9,
            shadow: None,
        }];
        for i in 1..arms {
            list.push(ArmSpec {
                name: if i == 1 {
                    "candidate".into()
                } else {
                    format!("other{i}")
                },
                adapter: "desk".into(),
                version: Some("00000000000000bb".into()),
                weight: 0.1,
                shadow: None,
            });
        }
        Split::new(SplitSpec {
            name: "trial".into(),
            arms: list,
        })
        .unwrap()
    }

    fn policy() -> RolloutPolicy {
        serde_json::from_value(serde_json::json!({
            "candidate": "candidate",
            "min_requests": 100,
            "guards": {"error_rate": 0.02, "latency_p99_ms": 50},
            "steps": [0.25, 0.5],
        }))
        .unwrap()
    }

    fn health(finished: u64, errors: u64, ms: f64) -> ArmHealth {
        let mut h = ArmHealth {
            finished,
            errors,
            latency: LatencyHistogram::default(),
        };
        h.latency.add(LatencyHistogram::bucket_of(ms), finished);
        h
    }

    fn evidence<'a>(h: &'a ArmHealth, n: &'a NumericTally, b: &'a BinaryTally) -> Evidence<'a> {
        Evidence {
            health: h,
            numeric: n,
            yes_no: b,
        }
    }

    #[test]
    fn policies_that_do_not_fit_are_refused_by_field() {
        assert!(policy().check(&split(2)).is_ok());
        assert_eq!(policy().check(&split(3)).unwrap_err().field, "candidate");
        let mut p = policy();
        p.candidate = "incumbent".into();
        assert_eq!(p.check(&split(2)).unwrap_err().field, "candidate");
        let mut p = policy();
        p.steps = vec![0.5, 0.25];
        assert_eq!(p.check(&split(2)).unwrap_err().field, "steps[1]");
        let mut p = policy();
        p.steps = vec![1.0];
        assert_eq!(p.check(&split(2)).unwrap_err().field, "steps[0]");
        let mut p = policy();
        p.min_requests = 3;
        assert_eq!(p.check(&split(2)).unwrap_err().field, "min_requests");
        let mut p = policy();
        p.guards.error_rate = Some(f64::NAN);
        assert_eq!(p.check(&split(2)).unwrap_err().field, "guards.error_rate");
        // A field the policy does not know is refused by name.
        let e = serde_json::from_value::<RolloutPolicy>(
            serde_json::json!({"candidate": "c", "guard": {}}),
        )
        .unwrap_err();
        assert!(e.to_string().contains("guard"), "{e}");
    }

    #[test]
    fn histogram_quantiles_are_within_ten_percent_and_never_below() {
        let mut h = LatencyHistogram::default();
        for i in 1..=1000 {
            h.record(f64::from(i));
        }
        let p99 = h.quantile(0.99).unwrap();
        assert!((990.0..=990.0 * 1.1).contains(&p99), "{p99}");
        let p50 = h.quantile(0.5).unwrap();
        assert!((500.0..=550.0).contains(&p50), "{p50}");
        // Latencies of exactly bucket edges and beyond the last bucket land somewhere sane.
        assert_eq!(LatencyHistogram::bucket_of(0.0), 0);
        assert_eq!(LatencyHistogram::bucket_of(f64::NAN), 0);
        assert_eq!(
            LatencyHistogram::bucket_of(1e12),
            LatencyHistogram::BUCKETS - 1
        );
        assert!(h.surely_above(2000.0) == 0 && h.surely_above(0.0) == 1000);
    }

    #[test]
    fn a_candidate_failing_a_fifth_of_its_requests_is_rolled_back() {
        let (n, b) = (NumericTally::new(), BinaryTally::new());
        let rollout = Rollout {
            policy: policy(),
            state: RolloutState::start(),
        };
        let inc = health(900, 2, 20.0);
        // Below the minimum sample nothing acts, however bad it looks.
        let cand = health(50, 10, 20.0);
        let readings = read_guards(
            &rollout.policy.guards,
            evidence(&inc, &n, &b),
            evidence(&cand, &n, &b),
            0.1,
        );
        assert!(matches!(
            decide(
                &rollout,
                evidence(&inc, &n, &b),
                evidence(&cand, &n, &b),
                &readings
            ),
            Decision::Wait(_)
        ));
        let cand = health(100, 20, 20.0);
        let readings = read_guards(
            &rollout.policy.guards,
            evidence(&inc, &n, &b),
            evidence(&cand, &n, &b),
            0.1,
        );
        let error = &readings[0];
        assert_eq!((error.guard, error.status), ("error_rate", "crossed"));
        assert!(error.p_value.unwrap() < 0.05);
        match decide(
            &rollout,
            evidence(&inc, &n, &b),
            evidence(&cand, &n, &b),
            &readings,
        ) {
            Decision::RollBack(why) => assert!(why.contains("error_rate crossed"), "{why}"),
            other => panic!("{other:?}"),
        }
    }

    /// Not crossed is not clear: at a small sample a candidate failing a fifth of its requests
    /// (or one that has failed nothing yet) is undecided, and nothing is promoted until every
    /// guard reads clear.
    #[test]
    fn a_small_sample_is_undecided_and_promotes_nothing() {
        let (n, b) = (NumericTally::new(), BinaryTally::new());
        let mut rollout = Rollout {
            policy: policy(),
            state: RolloutState::start(),
        };
        rollout.policy.min_requests = 40;
        rollout.policy.guards.error_rate = Some(0.05);
        let inc = health(40, 0, 20.0);
        for cand in [health(40, 8, 20.0), health(40, 0, 20.0)] {
            let readings = read_guards(
                &rollout.policy.guards,
                evidence(&inc, &n, &b),
                evidence(&cand, &n, &b),
                0.1,
            );
            assert_eq!(readings[0].status, "undecided", "{readings:?}");
            match decide(
                &rollout,
                evidence(&inc, &n, &b),
                evidence(&cand, &n, &b),
                &readings,
            ) {
                Decision::Wait(why) => assert!(why.contains("guards not yet clear"), "{why}"),
                other => panic!("{other:?}"),
            }
        }
        // With enough requests and no failure on either side the error guard clears.
        let (inc, cand) = (health(150, 0, 20.0), health(150, 0, 20.0));
        let readings = read_guards(
            &rollout.policy.guards,
            evidence(&inc, &n, &b),
            evidence(&cand, &n, &b),
            0.1,
        );
        assert_eq!(readings[0].status, "clear", "{readings:?}");
    }

    #[test]
    fn a_slow_candidate_crosses_the_latency_guard_and_a_sound_one_is_promoted_then_flipped() {
        let (n, b) = (NumericTally::new(), BinaryTally::new());
        let mut rollout = Rollout {
            policy: policy(),
            state: RolloutState::start(),
        };
        let inc = health(900, 0, 20.0);
        let slow = health(200, 0, 200.0);
        let readings = read_guards(
            &rollout.policy.guards,
            evidence(&inc, &n, &b),
            evidence(&slow, &n, &b),
            0.1,
        );
        assert_eq!(readings[1].status, "crossed", "{readings:?}");
        let sound = health(200, 0, 21.0);
        let readings = read_guards(
            &rollout.policy.guards,
            evidence(&inc, &n, &b),
            evidence(&sound, &n, &b),
            0.1,
        );
        assert!(readings.iter().all(|r| r.status == "clear"), "{readings:?}");
        let decide_now = |r: &Rollout| {
            decide(
                r,
                evidence(&inc, &n, &b),
                evidence(&sound, &n, &b),
                &readings,
            )
        };
        assert!(matches!(decide_now(&rollout), Decision::Promote { share, .. } if share == 0.25));
        rollout.state.step = 1;
        rollout.state.step_began_at = 150;
        assert!(matches!(decide_now(&rollout), Decision::Wait(_)));
        rollout.state.step_began_at = 100;
        assert!(matches!(decide_now(&rollout), Decision::Promote { share, .. } if share == 0.5));
        rollout.state.step = 2;
        assert!(matches!(decide_now(&rollout), Decision::Flip(_)));
        rollout.policy.flip_live = false;
        assert!(matches!(decide_now(&rollout), Decision::Wait(_)));
        rollout.state.status = RolloutStatus::Paused;
        rollout.policy.flip_live = true;
        assert!(matches!(decide_now(&rollout), Decision::Wait(w) if w.contains("paused")));
    }

    #[test]
    fn the_outcome_guard_rolls_back_a_worse_candidate_and_waits_for_a_better_one() {
        let mut rollout = Rollout {
            policy: policy(),
            state: RolloutState::start(),
        };
        rollout.policy.guards = Guards {
            outcome: Some(OutcomeGuard {
                kind: OutcomeKind::YesNo,
                better: Better::Higher,
                margin: 0.05,
            }),
            ..Guards::default()
        };
        let n = NumericTally::new();
        let h = health(300, 0, 10.0);
        let inc = BinaryTally::from_counts(300, 270).unwrap();
        let worse = BinaryTally::from_counts(300, 150).unwrap();
        let readings = read_guards(
            &rollout.policy.guards,
            evidence(&h, &n, &inc),
            evidence(&h, &n, &worse),
            0.1,
        );
        assert_eq!(readings[0].status, "crossed");
        assert!(matches!(
            decide(
                &rollout,
                evidence(&h, &n, &inc),
                evidence(&h, &n, &worse),
                &readings
            ),
            Decision::RollBack(_)
        ));
        // Equal: not crossed, but neither better nor yet within the margin with confidence
        // (the interval is ±0.075 wide at 300 each), so no promotion.
        let readings = read_guards(
            &rollout.policy.guards,
            evidence(&h, &n, &inc),
            evidence(&h, &n, &inc),
            0.1,
        );
        assert_eq!(readings[0].status, "undecided");
        assert!(matches!(
            decide(&rollout, evidence(&h, &n, &inc), evidence(&h, &n, &inc), &readings),
            Decision::Wait(w) if w.contains("not yet better")
        ));
        let better = BinaryTally::from_counts(300, 297).unwrap();
        let readings = read_guards(
            &rollout.policy.guards,
            evidence(&h, &n, &inc),
            evidence(&h, &n, &better),
            0.1,
        );
        assert_eq!(readings[0].candidate_better, Some(true));
        assert!(matches!(
            decide(
                &rollout,
                evidence(&h, &n, &inc),
                evidence(&h, &n, &better),
                &readings
            ),
            Decision::Promote { .. }
        ));
        // Lower is better: a candidate at 90% against an incumbent at 50% is worse.
        rollout.policy.guards.outcome.as_mut().unwrap().better = Better::Lower;
        let readings = read_guards(
            &rollout.policy.guards,
            evidence(&h, &n, &worse),
            evidence(&h, &n, &inc),
            0.1,
        );
        assert_eq!(readings[0].status, "crossed");
        assert_eq!(readings[0].candidate_better, Some(false));
    }

    /// The guard's promise under a controller that checks after every request: seeded A/A
    /// rollouts (both arms fail 2% of requests) read after each of 1,000 requests roll the
    /// candidate back (wrongly) in at most 5%; with a true effect (the candidate fails 20%) the
    /// guard acts in every run, and the median number of candidate requests it needed is
    /// printed (`cargo test -p switchyard-server --lib guard_simulation -- --nocapture`).
    #[test]
    fn guard_simulation_false_rollbacks_stay_under_five_percent_and_true_ones_are_found() {
        use rand::{Rng, SeedableRng};
        use rand_chacha::ChaCha8Rng;
        const RUNS: usize = 2_000;
        const REQUESTS: usize = 1_000;
        let guards = Guards {
            error_rate: Some(0.0),
            ..Guards::default()
        };
        let (n, b) = (NumericTally::new(), BinaryTally::new());
        let run = |seed: u64, candidate_failure: f64| -> Option<u64> {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let (mut inc, mut cand) = (ArmHealth::default(), ArmHealth::default());
            for _ in 0..REQUESTS {
                let (arm, p) = if rng.random::<bool>() {
                    (&mut cand, candidate_failure)
                } else {
                    (&mut inc, 0.02)
                };
                arm.finished += 1;
                arm.errors += u64::from(rng.random::<f64>() < p);
                if inc.finished >= MIN_OUTCOMES_PER_ARM && cand.finished >= MIN_OUTCOMES_PER_ARM {
                    let r = read_guards(
                        &guards,
                        evidence(&inc, &n, &b),
                        evidence(&cand, &n, &b),
                        0.1,
                    );
                    if r[0].crossed() {
                        return Some(cand.finished);
                    }
                }
            }
            None
        };
        let false_alarms = (0..RUNS as u64).filter(|&s| run(s, 0.02).is_some()).count();
        let mut needed: Vec<u64> = (0..RUNS as u64)
            .filter_map(|s| run(1_000_000 + s, 0.2))
            .collect();
        needed.sort_unstable();
        let share = false_alarms as f64 / RUNS as f64;
        println!(
            "guard simulation: A/A rolled back in {share:.4} of {RUNS} runs read after every request; \
             a candidate failing 20% against 2% was rolled back in {} of {RUNS}, after a median of {} \
             candidate requests (90th percentile {})",
            needed.len(),
            needed[needed.len() / 2],
            needed[needed.len() * 9 / 10]
        );
        assert!(share <= 0.05, "false rollbacks {share}");
        assert_eq!(needed.len(), RUNS, "the guard missed a true effect");
    }
}
