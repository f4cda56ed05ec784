//! Durable experiments: split definitions, which arm answered which response (and for which
//! tenant), and the outcomes posted for those responses, kept in a database so that they survive
//! a restart and a crash.
//!
//! - [`ExperimentStore`] is the one interface a database implements. [`SqliteStore`] (an embedded
//!   SQLite file, WAL journal with `synchronous = FULL`) is the default; the trait makes no
//!   SQLite-only assumption, so a server database for a fleet can implement it too.
//! - [`records`] holds what goes in and out of a store: split records with their generation and
//!   arm records, served responses, outcome reports and the tallies a readout is made from.
//! - [`arms`] holds the rule that decides, when a split is edited, which arm records go on and
//!   which start afresh; every store applies the same rule inside its write transaction.
//! - [`responses`] batches the response records of concurrent requests into one durable write
//!   (group commit), so that recording costs a request little.
//! - [`Experiments`] ([`book`]) is what the HTTP layer talks to: it keeps the current definitions
//!   in memory for assignment on every request, writes through the store, and prunes old response
//!   records in the background.
//! - [`rollouts`] runs the guarded rollouts of splits that carry a policy: every check reads the
//!   tallies, decides, and acts through the store and the registry.
//! - [`legacy`] reads the `splits.json` of earlier versions once and moves it into the store.
//!
//! Identity. A split record has a generation (an id a store never hands out twice), so a split
//! deleted and created again under the same name starts from nothing and inherits no response.
//! An arm record is the pair (arm name, what it serves: adapter and held version): an edit that
//! keeps both keeps the record (its requests and outcomes, with the new weight), an edit that
//! changes either starts a new record, and the replaced record stays readable, still taking the
//! outcomes of the responses it served. Outcomes are attributed to the arm record a response was
//! served by, never to a position in the split.

pub mod arms;
pub mod book;
pub mod legacy;
pub mod postgres;
pub mod records;
pub mod responses;
pub mod rollouts;
pub mod sqlite;

pub use book::{Experiments, SplitEditError};
pub use postgres::PostgresStore;
pub use records::{
    ArmRecord, ArmTally, FinishedRequest, OutcomeRefused, OutcomeReport, OutcomeValue, PutSplit,
    RecordedOutcome, ServedResponse, SplitRecord, SplitState,
};
pub use sqlite::SqliteStore;

use crate::splits::rollout::{Rollout, RolloutEvent, RolloutPolicy};

/// Why a store operation failed.
#[derive(Debug, thiserror::Error)]
pub enum ExperimentError {
    /// The database refused or failed; the message says what was being done.
    #[error("experiment store: {action}: {message}")]
    Database {
        action: &'static str,
        message: String,
    },
    /// The database holds something this version cannot read.
    #[error("experiment store: {0}")]
    Corrupt(String),
}

/// The database behind experiments. Every method is blocking (call it off the async workers);
/// every write is one transaction that is durable when the method returns, so an answer sent
/// after it never acknowledges what a crash could take back.
///
/// Times are milliseconds since the Unix epoch, given by the caller, so that a store holds no
/// clock of its own and tests can move time.
pub trait ExperimentStore: Send + Sync + 'static {
    /// Every split with its current arm records and the tallies of all its arm records.
    fn splits(&self) -> Result<Vec<SplitState>, ExperimentError>;

    /// One split, as [`ExperimentStore::splits`] gives it.
    fn split(&self, name: &str) -> Result<Option<SplitState>, ExperimentError>;

    /// Creates split `spec.name` with a new generation, or changes its arms, deciding which arm
    /// records go on by [`arms::plan_arms`], in one transaction. `rollout` replaces the split's
    /// rollout policy: a policy equal to the stored one over the same arm records keeps its
    /// progress; a new one, or one whose arms now serve something else, starts afresh (with a
    /// `started` entry in its history); `None` removes it.
    fn put_split(
        &self,
        spec: &crate::splits::SplitSpec,
        rollout: Option<&RolloutPolicy>,
        now_ms: i64,
    ) -> Result<PutSplit, ExperimentError>;

    /// Changes a split's rollout, only if it still reads `expected` (so that of two replicas
    /// acting on one reading, one acts): writes `new`, sets the current arms' weights to
    /// `weights` when given, and appends `event` to its history, in one transaction. False when
    /// the rollout (or the split's generation) changed meanwhile and nothing was written.
    fn change_rollout(
        &self,
        name: &str,
        generation: i64,
        expected: &Rollout,
        new: &Rollout,
        weights: Option<&[f64]>,
        event: &RolloutEvent,
    ) -> Result<bool, ExperimentError>;

    /// Deletes a split with all its arm records and response records; false when there was no
    /// such split.
    fn delete_split(&self, name: &str) -> Result<bool, ExperimentError>;

    /// Records which arm record answered each response, and counts the requests of each arm
    /// record, and adds how requests ended (`finished`: errors and latencies) to their arm
    /// records, in one transaction. A record whose arm record no longer exists (its split was
    /// deleted meanwhile) is skipped.
    fn record_responses(
        &self,
        served: &[ServedResponse],
        finished: &[FinishedRequest],
    ) -> Result<(), ExperimentError>;

    /// Records an outcome on the arm record that served the response, in one transaction with
    /// marking the response as having its outcome. A response served to another tenant is
    /// refused exactly as an unknown one is.
    fn record_outcome(&self, report: &OutcomeReport) -> Result<RecordedOutcome, OutcomeRefused>;

    /// Adds `value` to the tally of arm record `arm_id` directly, with no response behind it: how
    /// a shadow arm's answer agreed with the first arm's. False when the arm record is gone.
    fn record_agreement(&self, arm_id: i64, value: OutcomeValue) -> Result<bool, OutcomeRefused>;

    /// Deletes the records of responses served before `served_before_ms`; returns how many.
    /// Their outcomes, where posted, stay in the tallies.
    fn prune_responses(&self, served_before_ms: i64) -> Result<u64, ExperimentError>;
}

/// Milliseconds since the Unix epoch, now.
pub fn now_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX))
        .unwrap_or(0)
}
