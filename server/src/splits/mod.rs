//! A/B splits: one name that spreads requests over several arms, each an adapter (or the base
//! model) with a weight, and the statistics that say which arm does better.
//!
//! [`assign`] holds the definition ([`SplitSpec`], validated into a [`Split`]) and picks an arm
//! per request: sticky by subject key through a stable hash, otherwise at random. [`stats`] turns
//! the outcomes callers report per arm ([`NumericTally`], [`BinaryTally`]) into a readout: each
//! arm's mean or proportion with its 95% interval, and its difference to the first arm with an
//! interval and a p-value, valid when read once at a planned sample size. [`sequential`] adds
//! the always-valid figures (a confidence sequence and a p-value that stay valid however often
//! the readout is read), [`ratio_check`] tests the requests per arm against the weights, and
//! [`rollout`] decides what a split's guarded rollout does next (roll back, promote, flip live).
//! None of these parts knows about HTTP or the registry; the HTTP layer keeps the splits and
//! tallies and calls in here.

pub mod assign;
#[cfg(test)]
mod peeking;
pub mod ratio_check;
pub mod rollout;
pub mod sequential;
pub mod stats;

pub use assign::{
    ArmSpec, Assignment, BASE_MODEL, MAX_ARMS, MAX_NAME_LEN, NameProblem, Split, SplitError,
    SplitSpec, check_name, subject_point,
};
pub use ratio_check::{AssignmentCheck, assignment_check};
pub use sequential::{
    AlwaysValidComparison, DEFAULT_ASSIGNMENT_ALARM_P, DEFAULT_MIXING_VARIANCE,
    MIN_OUTCOMES_PER_ARM, ReadoutSettings, Validity, always_valid_numeric, always_valid_proportion,
};
pub use stats::{
    BinaryArmReadout, BinarySummary, BinaryTally, CONFIDENCE_LEVEL, Interval,
    MAX_OUTCOME_MAGNITUDE, NumericArmReadout, NumericParts, NumericSummary, NumericTally,
    OutcomeError, ProportionComparison, WelchComparison, binary_readout, numeric_readout,
    proportion_comparison, welch_comparison,
};
