//! `switchyard adapter train`: fits low-rank factors and a classification head on an encoder
//! base from a JSONL file of labelled texts, and writes them as an adapter package that
//! `adapter verify` accepts and `/classify` serves.
//!
//! The maths lives in [`crate::train`]; this file reads the flags, reports each epoch on stdout
//! with a progress bar on stderr, writes the package and measures it once more through the
//! serving path.

use std::io::Write;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Instant;

use anyhow::{Context, bail};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use switchyard_adapters::package::Limits;
use switchyard_adapters::{Adapter, AdapterPackage, Module, PackageMeta, Task};

use super::base::{grouped, human_bytes};
use crate::model::checkpoint::Checkpoint;
use crate::model::embedder::Embedder;
use crate::train::data::{self, Dataset};
use crate::train::encoder::FrozenEncoder;
use crate::train::fit::{self, Event, Examples, Settings};
use crate::train::measure;

#[derive(Debug, Clone, clap::Args)]
pub struct TrainArgs {
    /// The encoder base model folder (config.json, *.safetensors, tokenizer.json).
    #[arg(long, env = "SWITCHYARD_MODEL_DIR")]
    pub model: PathBuf,
    /// Labelled examples: one JSON object per line, {"text": "...", "label": "..."}.
    #[arg(long)]
    pub data: PathBuf,
    /// What the adapter is for; only classify is trained here.
    #[arg(long, default_value = "classify")]
    pub task: String,
    /// Rank r of every factor pair.
    #[arg(long, default_value_t = 8)]
    pub rank: usize,
    /// Projections to adapt in every layer, comma-separated (attn.q, attn.k, attn.v, attn.o,
    /// mlp.up, mlp.down).
    #[arg(long, default_value = "attn.q,attn.v")]
    pub targets: String,
    /// Scale numerator: the update is (alpha / rank) B A. Default: 2 × rank.
    #[arg(long)]
    pub alpha: Option<f64>,
    /// Passes over the training examples.
    #[arg(long, default_value_t = 8)]
    pub epochs: usize,
    /// AdamW step size of the low-rank factors.
    #[arg(long, default_value_t = 2e-3)]
    pub lr: f64,
    /// AdamW step size of the head (its input is unit-length, so it needs a larger step).
    #[arg(long, default_value_t = 2e-2)]
    pub head_lr: f64,
    /// Examples per step.
    #[arg(long, default_value_t = 16)]
    pub batch: usize,
    /// Fraction of each label's examples held out from training and measured after each epoch.
    #[arg(long, default_value_t = 0.2)]
    pub holdout: f64,
    /// Seed of the initial values, the shuffles and the held-out split.
    #[arg(long, default_value_t = 0)]
    pub seed: u64,
    /// AdamW weight decay (decoupled), for factors and head.
    #[arg(long, default_value_t = 0.01)]
    pub weight_decay: f64,
    /// The labels in head order, comma-separated; each must occur in the data. Default: the
    /// data's labels sorted by name.
    #[arg(long)]
    pub labels: Option<String>,
    /// Free text stored in the package. Default: what was trained on, and how.
    #[arg(long)]
    pub description: Option<String>,
    /// Where to write the package (.safetensors).
    #[arg(long)]
    pub out: PathBuf,
    #[arg(long, default_value = "f32", env = "SWITCHYARD_MODEL_WEIGHTS", help = crate::commands::WEIGHTS_HELP)]
    pub weights: switchyard_kernels::WeightFormat,
}

/// Parses a comma-separated `--labels` value.
pub fn parse_labels(list: &str) -> anyhow::Result<Vec<String>> {
    let labels: Vec<String> = list
        .split(',')
        .map(|l| l.trim().to_owned())
        .filter(|l| !l.is_empty())
        .collect();
    let mut sorted = labels.clone();
    sorted.sort();
    if let Some(w) = sorted.windows(2).find(|w| w[0] == w[1]) {
        bail!("--labels names {:?} twice", w[0]);
    }
    if labels.is_empty() {
        bail!("--labels is empty");
    }
    Ok(labels)
}

/// Reads the data file with the labels of `--labels` (or the data's own).
pub fn read_data(path: &std::path::Path, labels: Option<&str>) -> anyhow::Result<Dataset> {
    let labels = labels.map(parse_labels).transpose()?;
    Ok(data::read_jsonl(path, labels.as_deref())?)
}

pub fn run(args: &TrainArgs, mut out: impl Write) -> anyhow::Result<()> {
    let started = Instant::now();
    match Task::parse(&args.task) {
        Some(Task::Classify) => {}
        Some(other) => bail!("--task {other}: only classify adapters are trained here"),
        None => bail!("--task {:?} is not a task; expected classify", args.task),
    }
    let modules =
        Module::parse_list(&args.targets).map_err(|e| anyhow::anyhow!("--targets: {e}"))?;
    if args.rank == 0 {
        bail!("--rank must be at least 1");
    }
    if args.epochs == 0 {
        bail!("--epochs must be at least 1");
    }
    if args.batch == 0 {
        bail!("--batch must be at least 1");
    }
    for (flag, v) in [("--lr", args.lr), ("--head-lr", args.head_lr)] {
        if !(v.is_finite() && v > 0.0) {
            bail!("{flag} {v} must be a positive number");
        }
    }
    if !(args.weight_decay.is_finite() && args.weight_decay >= 0.0) {
        bail!(
            "--weight-decay {} must be zero or positive",
            args.weight_decay
        );
    }
    let alpha = args.alpha.unwrap_or(2.0 * args.rank as f64);
    if !(alpha.is_finite() && alpha > 0.0) {
        bail!("--alpha {alpha} must be a positive number");
    }
    let dataset = read_data(&args.data, args.labels.as_deref())?;
    let split = data::split(&dataset, args.holdout, args.seed)?;

    let embedder = Embedder::load_as(&args.model, args.weights)
        .with_context(|| format!("loading the base model {}", args.model.display()))?;
    let ckpt = Checkpoint::open(&args.model)?;
    if ckpt.model_type() != "bert" {
        bail!(
            "{} has model_type {:?}; training needs an encoder (bert)",
            args.model.display(),
            ckpt.model_type()
        );
    }
    let encoder = FrozenEncoder::load_as(&ckpt, args.weights)?;
    drop(ckpt);
    let texts: Vec<&str> = dataset.examples.iter().map(|e| e.text.as_str()).collect();
    let ids = embedder.tokenize(&texts)?;
    let labels: Vec<usize> = dataset.examples.iter().map(|e| e.label).collect();

    let settings = Settings {
        modules: modules.clone(),
        rank: args.rank,
        alpha,
        epochs: args.epochs,
        lr: args.lr,
        head_lr: args.head_lr,
        batch: args.batch,
        weight_decay: args.weight_decay,
        seed: args.seed,
    };
    let module_names: Vec<&str> = modules.iter().map(|m| m.as_str()).collect();
    let hidden = encoder.hidden_size;
    writeln!(
        out,
        "training {}: {} labels ({}), {} examples to train on, {} held out (fraction {}, seed {})",
        args.out.display(),
        dataset.labels.len(),
        dataset.labels.join(", "),
        split.train.len(),
        split.holdout.len(),
        args.holdout,
        args.seed
    )?;

    let steps = fit::steps_per_epoch(split.train.len(), args.batch) * args.epochs;
    let bar = ProgressBar::with_draw_target(Some(steps as u64), ProgressDrawTarget::stderr());
    bar.set_style(
        ProgressStyle::with_template(
            "{elapsed:>4} [{bar:24}] {pos}/{len} steps, {msg}, {eta} left",
        )
        .expect("a valid template")
        .progress_chars("=> "),
    );
    let mut epoch = 1;
    let mut write_error = None;
    let trained = fit::train(
        &encoder,
        &Examples {
            ids: &ids,
            labels: &labels,
            train: &split.train,
            holdout: &split.holdout,
            num_labels: dataset.labels.len(),
        },
        &settings,
        |event| match event {
            Event::Step { loss } => {
                bar.set_message(format!("epoch {epoch}/{} loss {loss:.3}", args.epochs));
                bar.inc(1);
            }
            Event::Epoch(r) => {
                epoch = r.epoch + 1;
                bar.suspend(|| {
                    if let Err(e) = writeln!(
                        out,
                        "epoch {:>2}/{}  loss {:.4}  train accuracy {:.4}  held-out accuracy {:.4}",
                        r.epoch, args.epochs, r.loss, r.train_accuracy, r.holdout_accuracy
                    ) {
                        write_error.get_or_insert(e);
                    }
                });
            }
        },
    )?;
    bar.finish_and_clear();
    if let Some(e) = write_error {
        return Err(e.into());
    }
    let train_seconds = started.elapsed().as_secs_f64();

    let description = args.description.clone().unwrap_or_else(|| {
        format!(
            "classifier of {} trained on {} ({} epochs, held-out fraction {}, seed {})",
            dataset.labels.join(" / "),
            args.data
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default(),
            args.epochs,
            args.holdout,
            args.seed
        )
    });
    let (head_w, head_b) = trained.head;
    let pkg = AdapterPackage {
        meta: PackageMeta {
            base_fingerprint: embedder.spec().fingerprint.clone(),
            rank: args.rank,
            alpha,
            task: Task::Classify,
            labels: dataset.labels.clone(),
            description,
        },
        factors: trained.factors,
        head: Some((head_w, head_b)),
    };
    let file = args.out.display().to_string();
    pkg.validate(&file, embedder.spec(), &Limits::default())?;
    let bytes = pkg.to_bytes()?;
    let version = switchyard_adapters::package::content_version(&bytes);
    std::fs::write(&args.out, &bytes).with_context(|| format!("writing {file}"))?;
    let factor_params: usize = pkg
        .factors
        .values()
        .map(|(a, b)| a.elem_count() + b.elem_count())
        .sum();
    writeln!(
        out,
        "wrote {file} (version {version}, {}): rank {}, alpha {alpha}, {} on {} layers, {} factor parameters and {} head parameters, in {train_seconds:.1} s",
        human_bytes(bytes.len() as u64),
        args.rank,
        module_names.join(", "),
        encoder.num_layers(),
        grouped(factor_params as u64),
        grouped((dataset.labels.len() * (hidden + 1)) as u64),
    )?;

    // Once more through the serving path: what /classify will answer on the held-out examples.
    let adapter = Arc::new(Adapter::from_package(format!("trained@{version}"), pkg)?);
    let head = adapter.head.clone().expect("a classify package has a head");
    let held: Vec<_> = split
        .holdout
        .iter()
        .map(|&i| &dataset.examples[i])
        .collect();
    let tally = measure::tally(&embedder, Some(adapter), &head, &held, 32)?;
    writeln!(
        out,
        "held-out accuracy through the serving path: {:.4} ({} of {})",
        tally.accuracy(),
        tally.right(),
        tally.total()
    )?;
    Ok(())
}
