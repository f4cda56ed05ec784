//! `switchyard adapter evaluate`: accuracy of a classify package on the held-out split of a
//! labelled JSONL file (the split `adapter train` made with the same --holdout and --seed),
//! measured through the serving path, so it is what `/classify` users get. With
//! `--untrained-head` it measures the base model with the head a training run starts from:
//! the baseline a trained adapter is compared against.

use std::io::Write;
use std::path::PathBuf;

use anyhow::{Context, bail};
use candle_core::{Device, Tensor};
use switchyard_adapters::TaskHead;

use super::train::read_data;
use crate::model::embedder::Embedder;
use crate::model::load_adapter;
use crate::train::data;
use crate::train::initial_head;
use crate::train::measure;

/// Which examples to measure.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Part {
    /// The held-out examples only.
    HeldOut,
    /// The examples training used.
    Train,
    /// Every example of the file.
    All,
}

#[derive(Debug, Clone, clap::Args)]
pub struct EvaluateArgs {
    /// The classify package (.safetensors); omit it with --untrained-head.
    #[arg(
        required_unless_present = "untrained_head",
        conflicts_with = "untrained_head"
    )]
    pub file: Option<PathBuf>,
    /// The encoder base model folder.
    #[arg(long, env = "SWITCHYARD_MODEL_DIR")]
    pub model: PathBuf,
    /// Labelled examples, as for `adapter train`.
    #[arg(long)]
    pub data: PathBuf,
    /// Held-out fraction; the same as at training to get the same split.
    #[arg(long, default_value_t = 0.2)]
    pub holdout: f64,
    /// Seed of the split; the same as at training.
    #[arg(long, default_value_t = 0)]
    pub seed: u64,
    /// Which examples to measure.
    #[arg(long, value_enum, default_value_t = Part::HeldOut)]
    pub part: Part,
    /// Measure the base model with the head a training run starts from (all zero: every label
    /// gets probability 1 / labels, and the first label wins the tie).
    #[arg(long)]
    pub untrained_head: bool,
    /// With --untrained-head: the labels in head order, as for `adapter train`.
    #[arg(long)]
    pub labels: Option<String>,
    /// Rows per forward pass.
    #[arg(long, default_value_t = 32)]
    pub batch: usize,
    #[arg(long, default_value = "f32", env = "SWITCHYARD_MODEL_WEIGHTS", help = crate::commands::WEIGHTS_HELP)]
    pub weights: switchyard_kernels::WeightFormat,
}

pub fn run(args: &EvaluateArgs, mut out: impl Write) -> anyhow::Result<()> {
    let embedder = Embedder::load_as(&args.model, args.weights)
        .with_context(|| format!("loading the base model {}", args.model.display()))?;
    let (adapter, head, what) = match &args.file {
        Some(file) => {
            if args.labels.is_some() {
                bail!("--labels goes with --untrained-head; a package names its own labels");
            }
            let adapter = load_adapter(file, embedder.spec())?;
            let Some(head) = adapter.head.clone() else {
                bail!(
                    "{} is a {} package with no classification head",
                    file.display(),
                    adapter.meta.task
                );
            };
            let what = format!("{} ({})", file.display(), adapter.id);
            (Some(adapter), head, what)
        }
        None => {
            let dataset = read_data(&args.data, args.labels.as_deref())?;
            let hidden = embedder.hidden_size();
            let n = dataset.labels.len();
            let (w, b) = initial_head(n, hidden);
            let head = TaskHead {
                weight: Tensor::from_vec(w, (n, hidden), &Device::Cpu)?,
                bias: Tensor::from_vec(b, n, &Device::Cpu)?,
                labels: dataset.labels,
            };
            let what = "the base model with an untrained head".to_owned();
            (None, head, what)
        }
    };
    let dataset = data::read_jsonl(&args.data, Some(&head.labels))?;
    let split = data::split(&dataset, args.holdout, args.seed)?;
    let (indices, part) = match args.part {
        Part::HeldOut => (split.holdout, "held-out"),
        Part::Train => (split.train, "training"),
        Part::All => ((0..dataset.examples.len()).collect(), "all"),
    };
    let examples: Vec<_> = indices.iter().map(|&i| &dataset.examples[i]).collect();
    let tally = measure::tally(&embedder, adapter, &head, &examples, args.batch)?;
    writeln!(
        out,
        "{what} on {} {part} examples of {} (held-out fraction {}, seed {})",
        tally.total(),
        args.data.display(),
        args.holdout,
        args.seed
    )?;
    let width = tally.labels.iter().map(String::len).max().unwrap_or(0);
    for (label, (right, total)) in tally.labels.iter().zip(&tally.per_label) {
        writeln!(
            out,
            "  {label:<width$}  {right:>4} of {total:>4} right  {:.4}",
            *right as f64 / (*total).max(1) as f64
        )?;
    }
    writeln!(
        out,
        "accuracy {:.4} ({} of {}), chance {:.4}",
        tally.accuracy(),
        tally.right(),
        tally.total(),
        1.0 / tally.labels.len() as f64
    )?;
    Ok(())
}
