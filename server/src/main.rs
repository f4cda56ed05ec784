//! The `switchyard` binary: parses flags and hands over to the library.

use std::io::{self, BufReader};
use std::path::PathBuf;

use clap::{Parser, Subcommand};

/// A retaining allocator: model buffers of the same size come and go every forward pass, and a
/// fresh large allocation from the system costs a page fault per 4 KB (shared/PERF-NOTES.md).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;
use switchyard_kernels::WeightFormat;
use switchyard_server::commands::{adapter, embed, generate, plan, serve, similarity, tour};
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
        #[arg(long, default_value = "f32", env = "SWITCHYARD_MODEL_WEIGHTS", help = switchyard_server::commands::WEIGHTS_HELP)]
        weights: WeightFormat,
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
        #[arg(
            long,
            required_unless_present = "messages",
            conflicts_with = "messages"
        )]
        prompt: Option<String>,
        /// A JSON file holding a list of {"role", "content"} messages, rendered with the
        /// checkpoint's chat template (instead of --prompt).
        #[arg(long, value_name = "FILE.json")]
        messages: Option<PathBuf>,
        /// End the output where this text appears (not printed). Repeatable.
        #[arg(long = "end-at", value_name = "TEXT")]
        end_texts: Vec<String>,
        /// End the output when this token id is sampled (not printed). Repeatable.
        #[arg(long = "end-token", value_name = "ID")]
        end_tokens: Vec<u32>,
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
        #[arg(long, default_value = "f32", env = "SWITCHYARD_MODEL_WEIGHTS", help = switchyard_server::commands::WEIGHTS_HELP)]
        weights: WeightFormat,
    },
    /// Show how similar the texts on stdin are under the base model and under each adapter.
    Similarity {
        /// Encoder checkpoint folder.
        #[arg(long, env = "SWITCHYARD_MODEL_DIR")]
        model: PathBuf,
        /// Adapter packages to compare against the base (repeatable).
        #[arg(long = "adapter")]
        adapters: Vec<PathBuf>,
        #[arg(long, default_value = "f32", env = "SWITCHYARD_MODEL_WEIGHTS", help = switchyard_server::commands::WEIGHTS_HELP)]
        weights: WeightFormat,
    },
    /// Work with adapter packages and the adapter store: inspect, verify, pack, publish, list,
    /// live, rollback, retire.
    Adapter {
        #[command(subcommand)]
        command: adapter::AdapterCommand,
    },
    /// Plan memory: bytes of one adapter of a given rank and targets, unmerged and merged, and
    /// how many fit in a budget; needs only the model's config.json.
    Plan(plan::PlanArgs),
    /// Serve the HTTP API: one base model resident, every adapter of the store routed to,
    /// swapped live. Settings come from the config file, then SWITCHYARD_* variables, then these
    /// flags. Prints `switchyard listening on http://ADDR` once bound; stops cleanly on SIGTERM or
    /// Ctrl-C (readiness 503, in-flight work finishes within the grace period, exit 0).
    Serve {
        /// TOML settings file (see config/switchyard.example.toml).
        #[arg(long)]
        config: Option<PathBuf>,
        /// Address to listen on, e.g. 127.0.0.1:7070 (port 0 picks a free port).
        #[arg(long)]
        listen: Option<std::net::SocketAddr>,
        /// Base model checkpoint folder.
        #[arg(long)]
        model: Option<PathBuf>,
        /// Adapter store folder (created if missing).
        #[arg(long)]
        store: Option<PathBuf>,
        /// Overrides `model.weights` of the config (and SWITCHYARD_MODEL_WEIGHTS).
        #[arg(long, help = switchyard_server::commands::WEIGHTS_HELP)]
        weights: Option<WeightFormat>,
    },
    /// Walk through a running server, as the demo does: classify with each demo adapter, flip a
    /// new version live under traffic, run an A/B split with outcomes, and show the swap metrics.
    /// Exits 1 if any step gets an answer it did not expect.
    Tour(tour::TourArgs),
    /// Print the HTTP API's description (OpenAPI 3.1 JSON): every endpoint, its request and
    /// answer schemas, its error codes and its credential. The server answers the same document
    /// at GET /reference/http-api.json; docs/http-api.json is a copy.
    DescribeApi,
    /// Work with config files.
    Config {
        #[command(subcommand)]
        command: ConfigCommand,
    },
}

#[derive(Subcommand, Debug)]
enum ConfigCommand {
    /// Print the effective settings of a config file, or refuse it naming the key and the value.
    ///
    /// Loads FILE as `switchyard serve` would, with the SWITCHYARD_* environment on top, and
    /// prints the effective settings as TOML, secrets redacted. A refused setting is reported
    /// with its key and value, and the exit status is 1.
    #[command(after_long_help = switchyard_server::commands::config::environment_help())]
    Check {
        /// The TOML config file to check.
        file: PathBuf,
    },
}

fn main() {
    let cli = Cli::parse();
    // A SWITCHYARD_KERNELS naming no path, or one this CPU cannot run, stops every command here
    // with the valid names, before any kernel runs.
    if let Err(e) = switchyard_kernels::dispatch::chosen() {
        eprintln!("switchyard: error: {e}");
        std::process::exit(2);
    }
    // oneDNN (optional, found at run time) is loaded while this is the only thread: loading may
    // set OMP_WAIT_POLICY (see kernels::onednn).
    // SAFETY: no other thread has started yet.
    #[allow(unsafe_code)]
    unsafe {
        switchyard_kernels::onednn::load_at_start()
    };
    if let Command::Serve {
        config,
        listen,
        model,
        store,
        weights,
    } = cli.command
    {
        let opts = serve::ServeOptions {
            config,
            overrides: switchyard_config::Overrides {
                listen,
                model_dir: model,
                model_weights: weights,
                store_dir: store,
            },
        };
        if let Err(e) = serve::run(&opts) {
            eprintln!("switchyard: error: {e:#}");
            std::process::exit(1);
        }
        return;
    }
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_env("SWITCHYARD_LOG")
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("warn")),
        )
        .with_ansi(std::io::IsTerminal::is_terminal(&io::stderr()))
        .with_writer(io::stderr)
        .init();
    let result = match cli.command {
        Command::Embed {
            model,
            adapter,
            batch,
            weights,
        } => embed::run(
            &embed::EmbedOptions {
                model,
                adapter,
                batch,
                weights,
            },
            BufReader::new(io::stdin().lock()),
            io::stdout().lock(),
            io::stderr(),
        ),
        Command::Generate {
            model,
            adapter,
            prompt,
            messages,
            end_texts,
            end_tokens,
            limit,
            temperature,
            top_p,
            seed,
            weights,
        } => generate::run(
            &generate::GenerateOptions {
                model,
                adapter,
                input: match (prompt, messages) {
                    (Some(p), _) => generate::Input::Prompt(p),
                    (None, Some(file)) => generate::Input::Messages(file),
                    (None, None) => unreachable!("clap requires one"),
                },
                end_at: switchyard_server::engine::end_at::EndAt {
                    texts: end_texts,
                    token_ids: end_tokens,
                },
                limit,
                sampling: SamplingParams {
                    temperature,
                    top_p,
                    seed,
                },
                weights,
            },
            io::stdout().lock(),
            io::stderr(),
        ),
        Command::Similarity {
            model,
            adapters,
            weights,
        } => similarity::run(
            &similarity::SimilarityOptions {
                model,
                adapters,
                weights,
            },
            BufReader::new(io::stdin().lock()),
            io::stdout().lock(),
        ),
        Command::Adapter { command } => adapter::run(&command, io::stdout().lock()),
        Command::Plan(args) => plan::run(&args, io::stdout().lock()),
        Command::Tour(args) => tour::run(&args, &mut io::stdout().lock()),
        Command::DescribeApi => {
            use std::io::Write;
            io::stdout()
                .lock()
                .write_all(switchyard_server::http::description::describe_json().as_bytes())
                .map_err(anyhow::Error::from)
        }
        Command::Serve { .. } => unreachable!("handled above"),
        Command::Config {
            command: ConfigCommand::Check { file },
        } => {
            switchyard_server::commands::config::check(&file, std::env::vars(), io::stdout().lock())
        }
    };
    if let Err(e) = result {
        eprintln!("switchyard: error: {e:#}");
        std::process::exit(1);
    }
}
