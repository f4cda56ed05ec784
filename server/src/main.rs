//! The `switchyard` binary: parses flags and hands over to the library.

use std::io::{self, BufReader};
use std::path::PathBuf;

use clap::{Parser, Subcommand};
use switchyard_server::commands::{embed, generate, similarity};
use switchyard_server::model::sampling::SamplingParams;

/// switchyard: one base model resident, many low-rank adapters served from it.
#[derive(Parser, Debug)]
#[command(name = "switchyard", version, about, long_about = None)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Embed texts with an encoder model: one text per line on stdin, one JSON array per line
    /// on stdout, a rows/s summary on stderr.
    Embed {
        /// Checkpoint folder (config.json, *.safetensors, tokenizer.json).
        #[arg(long, env = "SWITCHYARD_MODEL_DIR")]
        model: PathBuf,
        /// Adapter package (.safetensors) to apply to every row.
        #[arg(long)]
        adapter: Option<PathBuf>,
        /// Rows per forward pass.
        #[arg(long, default_value_t = 32)]
        batch: usize,
    },
    /// Continue a prompt with a decoder model; greedy unless --temperature is given.
    Generate {
        /// Checkpoint folder (config.json, *.safetensors, tokenizer.json).
        #[arg(long, env = "SWITCHYARD_MODEL_DIR")]
        model: PathBuf,
        /// Adapter package (.safetensors) to apply.
        #[arg(long)]
        adapter: Option<PathBuf>,
        /// The text to continue.
        #[arg(long)]
        prompt: String,
        /// Most new tokens to generate.
        #[arg(long, default_value_t = 64)]
        limit: usize,
        /// Sampling temperature; omit for greedy decoding.
        #[arg(long)]
        temperature: Option<f64>,
        /// Nucleus mass kept when sampling (0 < p <= 1).
        #[arg(long, default_value_t = 1.0)]
        top_p: f64,
        /// Seed of the sampling stream; the same seed gives the same text.
        #[arg(long, default_value_t = 0)]
        seed: u64,
    },
    /// Show how similar the texts on stdin are under the base model and under each adapter.
    Similarity {
        /// Encoder checkpoint folder.
        #[arg(long, env = "SWITCHYARD_MODEL_DIR")]
        model: PathBuf,
        /// Adapter packages to compare against the base (repeatable).
        #[arg(long = "adapter")]
        adapters: Vec<PathBuf>,
    },
}

fn main() {
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_env("SWITCHYARD_LOG")
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("warn")),
        )
        .with_writer(io::stderr)
        .init();
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Embed {
            model,
            adapter,
            batch,
        } => embed::run(
            &embed::EmbedOptions {
                model,
                adapter,
                batch,
            },
            BufReader::new(io::stdin().lock()),
            io::stdout().lock(),
            io::stderr(),
        ),
        Command::Generate {
            model,
            adapter,
            prompt,
            limit,
            temperature,
            top_p,
            seed,
        } => generate::run(
            &generate::GenerateOptions {
                model,
                adapter,
                prompt,
                limit,
                sampling: SamplingParams {
                    temperature,
                    top_p,
                    seed,
                },
            },
            io::stdout().lock(),
            io::stderr(),
        ),
        Command::Similarity { model, adapters } => similarity::run(
            &similarity::SimilarityOptions { model, adapters },
            BufReader::new(io::stdin().lock()),
            io::stdout().lock(),
        ),
    };
    if let Err(e) = result {
        eprintln!("switchyard: error: {e:#}");
        std::process::exit(1);
    }
}
