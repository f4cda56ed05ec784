//! `switchyard adapter ...`: the commands around adapter packages and the store.
//!
//! - [`inspect`]: what a package holds and how much of its rank each update uses;
//! - [`verify`]: every validation rule, against a base model;
//! - [`pack`]: a package from a foreign safetensors file and rename rules;
//! - [`store`]: publish, list, live, rollback and retire on a store folder;
//! - [`train`] and [`evaluate`]: fit a classify adapter on labelled texts and measure it.
//!
//! [`base`] holds what they share (base model loading, size limits, number formatting).

pub mod base;
pub mod evaluate;
pub mod inspect;
pub mod pack;
pub mod rules;
pub mod store;
pub mod train;
pub mod verify;

use std::io::Write;

/// The `switchyard adapter` subcommands.
#[derive(Debug, Clone, clap::Subcommand)]
pub enum AdapterCommand {
    /// Show a package: task, base fingerprint, rank, alpha, targets, parameters against a full
    /// update, bytes, and for each target the numerical rank of s·B·A (how many singular values
    /// carry 99% of its energy).
    Inspect(inspect::InspectArgs),
    /// Check a package against every rule of the format and against a base model; exit status
    /// 0 when it passes, 1 (with the file, tensor and rule named) when it does not.
    Verify(verify::VerifyArgs),
    /// Validate a package, store it as a new version in a store folder and make it live. A
    /// server watching the store serves it within a second; the version it replaces stays for
    /// `rollback`.
    Publish(store::PublishArgs),
    /// List the adapters in a store with their live versions, or one adapter's versions.
    List(store::ListArgs),
    /// Print an adapter's live version, or make another stored version live with --set.
    Live(store::LiveArgs),
    /// Make the previous live version live again.
    Rollback(store::Target),
    /// Delete a stored version that is not live.
    Retire(store::RetireArgs),
    /// Build a package from any safetensors file of factor tensors, mapping its tensor names
    /// onto ours with --rename rules or a rule file for a whole layout (--rules common-llama).
    Pack(pack::PackArgs),
    /// Train a classify adapter (low-rank factors and a head) on an encoder base from a JSONL
    /// file of {"text", "label"} lines; accuracy on the held-out split after every epoch.
    Train(train::TrainArgs),
    /// Accuracy of a classify package on the held-out split of a JSONL file, through the
    /// serving path, per label; or of the base model with an untrained head.
    Evaluate(evaluate::EvaluateArgs),
}

/// Runs one adapter command, writing its report to `out`.
pub fn run(command: &AdapterCommand, out: impl Write) -> anyhow::Result<()> {
    match command {
        AdapterCommand::Inspect(a) => inspect::run(a, out),
        AdapterCommand::Verify(a) => verify::run(a, out),
        AdapterCommand::Publish(a) => store::publish(a, out),
        AdapterCommand::List(a) => store::list(a, out),
        AdapterCommand::Live(a) => store::live(a, out),
        AdapterCommand::Rollback(a) => store::rollback(a, out),
        AdapterCommand::Retire(a) => store::retire(a, out),
        AdapterCommand::Pack(a) => pack::run(a, out),
        AdapterCommand::Train(a) => train::run(a, out),
        AdapterCommand::Evaluate(a) => evaluate::run(a, out),
    }
}
