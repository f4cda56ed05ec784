//! The offline commands of the `switchyard` binary; each takes its parsed options and the
//! standard streams, so tests can drive them without a process.

pub mod adapter;
pub mod config;
pub mod embed;
pub mod generate;
pub mod plan;
pub mod serve;
pub mod similarity;
pub mod tour;
