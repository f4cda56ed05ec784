//! What goes in and out of an [`ExperimentStore`](super::ExperimentStore): plain data, no
//! database types.

use crate::splits::rollout::{ArmHealth, Rollout, RolloutEvent};
use crate::splits::{ArmSpec, BinaryTally, NumericTally, OutcomeError, Split, SplitSpec};

use super::ExperimentError;

/// One arm record: an id no other arm record of any split has, and what the arm serves.
#[derive(Debug, Clone, PartialEq)]
pub struct ArmRecord {
    pub id: i64,
    pub spec: ArmSpec,
}

/// A split's definition as stored: its generation and its current arm records, in order.
#[derive(Debug, Clone, PartialEq)]
pub struct SplitRecord {
    /// Handed out once per creation; a split deleted and created again gets a new one.
    pub generation: i64,
    pub name: String,
    pub arms: Vec<ArmRecord>,
}

impl SplitRecord {
    /// The definition a client would send for this split.
    pub fn spec(&self) -> SplitSpec {
        SplitSpec {
            name: self.name.clone(),
            arms: self.arms.iter().map(|a| a.spec.clone()).collect(),
        }
    }

    /// The validated split, for assignment. A stored definition was valid when written; one that
    /// no longer is (a rule tightened since) is refused with the reason.
    pub fn split(&self) -> Result<Split, crate::splits::SplitError> {
        Split::new(self.spec())
    }
}

/// What a split edit did.
#[derive(Debug, Clone, PartialEq)]
pub struct PutSplit {
    pub record: SplitRecord,
    /// True when the split did not exist before.
    pub created: bool,
}

/// One arm record's requests and outcomes.
#[derive(Debug, Clone, PartialEq)]
pub struct ArmTally {
    pub arm: ArmRecord,
    /// Requests assigned to this arm record (counting any that then failed).
    pub requests: u64,
    pub numeric: NumericTally,
    pub yes_no: BinaryTally,
    /// How its requests ended: errors and latencies, for the rollout guards.
    pub health: ArmHealth,
}

/// A split with the tallies of its arm records.
#[derive(Debug, Clone, PartialEq)]
pub struct SplitState {
    pub generation: i64,
    pub name: String,
    /// The current arms, in the split's order.
    pub arms: Vec<ArmTally>,
    /// Arm records an edit replaced or removed, oldest first; outcomes for responses they
    /// served still land on them.
    pub replaced: Vec<ArmTally>,
    /// The rollout policy and its progress, when the split carries one.
    pub rollout: Option<Rollout>,
    /// The rollout's history, oldest first (the last [`EVENTS_KEPT_IN_STATE`] entries).
    pub events: Vec<RolloutEvent>,
}

/// How many of a rollout's history entries a [`SplitState`] carries.
pub const EVENTS_KEPT_IN_STATE: usize = 100;

impl SplitState {
    pub fn record(&self) -> SplitRecord {
        SplitRecord {
            generation: self.generation,
            name: self.name.clone(),
            arms: self.arms.iter().map(|a| a.arm.clone()).collect(),
        }
    }
}

/// Which arm record answered a response, and for whom.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ServedResponse {
    pub response_id: String,
    pub generation: i64,
    pub arm_id: i64,
    /// The tenant the response was served to; only it may post the outcome.
    pub tenant: String,
    pub served_ms: i64,
}

/// How a request served by an arm record ended.
#[derive(Debug, Clone, PartialEq)]
pub struct FinishedRequest {
    pub arm_id: i64,
    pub failed: bool,
    /// From the arm's assignment to the end of the answer, in milliseconds.
    pub latency_ms: f64,
}

/// An outcome: a number (within [`crate::splits::MAX_OUTCOME_MAGNITUDE`]) or yes/no.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum OutcomeValue {
    Number(f64),
    YesNo(bool),
}

/// An outcome posted for a response.
#[derive(Debug, Clone, PartialEq)]
pub struct OutcomeReport {
    pub response_id: String,
    /// The tenant posting it.
    pub tenant: String,
    pub value: OutcomeValue,
    pub now_ms: i64,
}

/// Where an outcome was recorded.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RecordedOutcome {
    pub split: String,
    pub arm: String,
}

/// Why an outcome was not recorded.
#[derive(Debug, thiserror::Error)]
pub enum OutcomeRefused {
    /// No response with this id was served to this tenant through a split that still exists
    /// (or its record was pruned).
    #[error("unknown response")]
    UnknownResponse,
    #[error("the response already has an outcome")]
    AlreadyRecorded,
    #[error(transparent)]
    Invalid(#[from] OutcomeError),
    #[error(transparent)]
    Store(#[from] ExperimentError),
}
