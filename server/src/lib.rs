//! switchyard's server crate: the model runtimes ([`model`]), adapter training ([`train`]) and
//! the commands the `switchyard` binary exposes ([`commands`]). `main.rs` only parses flags and
//! calls into here.

pub mod commands;
pub mod engine;
pub mod experiments;
pub mod history;
pub mod http;
pub mod metrics;
pub mod model;
pub mod numbers;
pub mod splits;
pub(crate) mod sync;
pub mod train;
