//! The built-in language-model serving scenario: what the decoder scheduler buys, measured side
//! by side in one run on a decoder base (a Llama-layout model folder). It writes 8 synthetic
//! adapters into a fresh store, starts three servers on the same model, and measures:
//!
//! - **chunked prefill**: time to first token of short requests arriving every 100 ms while 4
//!   long prompts arrive at once, on a server with `engine.step_tokens = 256` (a long prompt is
//!   prefilled a chunk per step) against one with a step as large as the bounds allow (each long
//!   prompt prefilled in one pass); the prefix cache is off on both, so every prompt is computed;
//! - **decode over adapters**: generated tokens per second of 16 concurrent sequences spread over
//!   the 8 adapters, against the same 16 on the base alone (merging off, so the adapters run
//!   unmerged);
//! - **prefix cache**: per adapter, a long shared system prompt with one question, then the same
//!   system prompt with another question: the second's time to first token against the first's.
//!
//! Rounds alternate between the compared cases, so drift on a shared machine hits both.

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::{Context, bail};
use rand::SeedableRng;
use rand::seq::IndexedRandom;
use rand_chacha::ChaCha8Rng;
use serde_json::{Value, json};
use switchyard_adapters::Module;

use crate::server::{ServerConfig, ServerProcess};
use crate::stats::{percentile, round3, sorted};
use crate::synthetic::{SyntheticSpec, read_base, write_into_store};

/// What the scenario is run with.
#[derive(Debug, Clone)]
pub struct ServingSettings {
    pub server_bin: PathBuf,
    pub model_dir: PathBuf,
    pub out_dir: PathBuf,
    /// Tokens of each long prompt of the chunked-prefill case.
    pub long_tokens: usize,
    /// Tokens of the shared system prompt of the prefix-cache case.
    pub system_tokens: usize,
    /// Rounds of each case.
    pub rounds: usize,
    /// Tokens each of the 16 sequences generates in the decode case.
    pub decode_tokens: usize,
    pub seed: u64,
    pub command: String,
}

/// The scenario's results: the text table and the JSON written to `serving.json`.
#[derive(Debug, Clone)]
pub struct ServingReport {
    pub text: String,
    pub json: Value,
}

impl ServingReport {
    pub fn write(&self, out: &Path) -> anyhow::Result<Vec<PathBuf>> {
        std::fs::create_dir_all(out).with_context(|| format!("creating {}", out.display()))?;
        let json_path = out.join("serving.json");
        std::fs::write(&json_path, serde_json::to_string_pretty(&self.json)?)
            .with_context(|| format!("writing {}", json_path.display()))?;
        let text_path = out.join("serving.txt");
        std::fs::write(&text_path, &self.text)
            .with_context(|| format!("writing {}", text_path.display()))?;
        Ok(vec![json_path, text_path])
    }
}

const ADAPTERS: usize = 8;
const SEQUENCES: usize = 16;
const LONG_PROMPTS: usize = 4;
const CHUNKED_STEP: usize = 256;
/// How often a short request arrives while the long prompts are prefilled.
const SHORT_EVERY: Duration = Duration::from_millis(100);

fn adapter_names() -> Vec<String> {
    (0..ADAPTERS).map(|i| format!("serve-{i}")).collect()
}

/// Words of the prompts: a bicycle workshop's job notes, drawn at random from a seed.
const WORDS: &[&str] = &[
    "the",
    "rider",
    "brought",
    "a",
    "gravel",
    "bike",
    "with",
    "worn",
    "brake",
    "pads",
    "and",
    "a",
    "loose",
    "headset",
    "we",
    "trued",
    "rear",
    "wheel",
    "replaced",
    "chain",
    "after",
    "checking",
    "cassette",
    "wear",
    "customer",
    "asked",
    "for",
    "tubeless",
    "sealant",
    "front",
    "tyre",
    "was",
    "patched",
    "twice",
    "cable",
    "housing",
    "cracked",
    "near",
    "the",
    "shifter",
    "bottom",
    "bracket",
    "creaks",
    "under",
    "load",
    "bearings",
    "cleaned",
    "greased",
    "torque",
    "checked",
    "on",
    "stem",
    "bolts",
    "spokes",
    "tensioned",
    "evenly",
    "hub",
    "service",
    "due",
    "next",
    "month",
    "derailleur",
    "hanger",
    "bent",
    "aligned",
    "saddle",
    "height",
    "lowered",
    "by",
    "five",
    "millimetres",
    "pedals",
    "swapped",
    "booked",
    "in",
    "saturday",
    "morning",
    "quote",
    "accepted",
    "parts",
    "ordered",
    "from",
    "supplier",
    "rim",
    "tape",
    "fitted",
    "valve",
    "core",
    "leaking",
    "rotor",
    "rub",
    "fixed",
    "calipers",
    "centred",
    "fork",
    "seals",
    "serviced",
];

fn words(rng: &mut ChaCha8Rng, n: usize) -> String {
    (0..n)
        .map(|_| *WORDS.choose(rng).expect("words"))
        .collect::<Vec<_>>()
        .join(" ")
}

/// A blocking client of one server's /generate.
struct Gen {
    agent: ureq::Agent,
    url: String,
}

/// What one generation answered.
#[derive(Debug, Clone, Copy)]
struct Generated {
    prompt_tokens: usize,
    reused: usize,
    output_tokens: usize,
    /// `elapsed_ms.first_token`: from admission to the first token.
    first_token_ms: f64,
}

impl Gen {
    fn new(server: &ServerProcess) -> Self {
        Self {
            agent: ureq::Agent::config_builder()
                .http_status_as_error(false)
                .timeout_global(Some(Duration::from_secs(600)))
                .build()
                .into(),
            url: server.url().to_owned(),
        }
    }

    fn generate(
        &self,
        adapter: &str,
        prompt: &str,
        max_tokens: usize,
    ) -> anyhow::Result<Generated> {
        let body = json!({"adapter": adapter, "prompt": prompt, "max_tokens": max_tokens});
        let mut resp = self
            .agent
            .post(format!("{}/generate", self.url))
            .header("Content-Type", "application/json")
            .send(body.to_string())
            .with_context(|| format!("POST {}/generate", self.url))?;
        let status = resp.status().as_u16();
        let text = resp.body_mut().read_to_string().unwrap_or_default();
        if status != 200 {
            bail!("/generate answered {status}: {text}");
        }
        let v: Value = serde_json::from_str(&text).context("the /generate answer")?;
        let count = |k: &str| v["counts"][k].as_u64().unwrap_or(0) as usize;
        Ok(Generated {
            prompt_tokens: count("prompt_tokens"),
            reused: count("reused_prompt_tokens"),
            output_tokens: count("output_tokens"),
            first_token_ms: v["elapsed_ms"]["first_token"].as_f64().unwrap_or(f64::NAN),
        })
    }
}

/// Words per token of this model's tokenizer on the scenario's words, from one sample.
fn words_per_token(g: &Gen, rng: &mut ChaCha8Rng) -> anyhow::Result<f64> {
    let sample = 24;
    let answer = g.generate("base", &words(rng, sample), 1)?;
    Ok(sample as f64 / answer.prompt_tokens.max(1) as f64)
}

/// A text of about `tokens` tokens (a little under, so it stays within the bounds).
fn text_of(rng: &mut ChaCha8Rng, tokens: usize, words_per_token: f64) -> String {
    words(
        rng,
        ((tokens as f64 * words_per_token) * 0.97).floor().max(1.0) as usize,
    )
}

fn summary(values: &[f64]) -> Value {
    let s = sorted(values);
    json!({
        "count": s.len(),
        "p50_ms": percentile(&s, 0.5).map(round3),
        "p99_ms": percentile(&s, 0.99).map(round3),
    })
}

fn median(values: &[f64]) -> f64 {
    percentile(&sorted(values), 0.5).unwrap_or(f64::NAN)
}

/// Runs the scenario.
pub fn run_serving(s: &ServingSettings) -> anyhow::Result<ServingReport> {
    let base = read_base(&s.model_dir)?;
    if base.model_type == "bert" {
        bail!(
            "{} is an encoder; the serving scenario needs a decoder model folder",
            s.model_dir.display()
        );
    }
    let work = tempfile::tempdir().context("creating a temporary folder")?;
    let store = work.path().join("store");
    let spec = SyntheticSpec {
        rank: 16,
        targets: vec![Module::AttnQ, Module::AttnV],
        labels: 0,
        seed: s.seed,
    };
    eprintln!("writing {ADAPTERS} synthetic adapters (rank 16, attn.q,attn.v)");
    write_into_store(&store, &base, &spec, &adapter_names())?;
    let longest = s.long_tokens.max(s.system_tokens) + 64;
    let bounds = format!(
        "\n[bounds]\nprompt_tokens = {longest}\ntext_bytes = {}\ngenerated_tokens = {}\n",
        longest * 16,
        s.decode_tokens.max(16)
    );
    let start = |name: &str, engine: &str| -> anyhow::Result<ServerProcess> {
        let dir = work.path().join(name);
        std::fs::create_dir_all(&dir)?;
        let mut config = ServerConfig::new(&s.model_dir, &store, false);
        // A long prompt prefilled whole on a busy machine may take longer than the default
        // request timeout; the scenario measures waits, it does not want them cut.
        config.engine_toml = format!("{engine}request_timeout_ms = 600000\n");
        config.extra_toml = bounds.clone();
        ServerProcess::start(&s.server_bin, &dir, &config)
    };
    eprintln!("starting three servers on {}", s.model_dir.display());
    let chunked = start(
        "chunked",
        &format!("step_tokens = {CHUNKED_STEP}\nprefix_cache_bytes = 0\n"),
    )?;
    let whole = start(
        "whole",
        &format!("step_tokens = {}\nprefix_cache_bytes = 0\n", 65_536),
    )?;
    let cached = start("cached", "")?;
    let mut rng = ChaCha8Rng::seed_from_u64(s.seed);
    let wpt = words_per_token(&Gen::new(&chunked), &mut rng)?;

    // Chunked prefill: short requests while long prompts arrive.
    let mut ttft = [Vec::new(), Vec::new()];
    let mut long_ttft = [Vec::new(), Vec::new()];
    let mut long_tokens = Vec::new();
    let short = "the rider asked when the wheel would be ready";
    for round in 0..s.rounds {
        for (case, server) in [(0, &chunked), (1, &whole)] {
            let g = Gen::new(server);
            g.generate("base", short, 1)?;
            let longs: Vec<String> = (0..LONG_PROMPTS)
                .map(|_| text_of(&mut rng, s.long_tokens, wpt))
                .collect();
            let done = std::sync::atomic::AtomicUsize::new(0);
            let (short_ms, long_answers) = std::thread::scope(|scope| {
                let done = &done;
                // Short requests arrive every SHORT_EVERY (an open loop: a stalled one does not
                // hold back the next), from before the long prompts until they all answered.
                let shorts = scope.spawn(move || -> anyhow::Result<Vec<f64>> {
                    std::thread::scope(|inner| {
                        let mut sent = Vec::new();
                        while done.load(std::sync::atomic::Ordering::SeqCst) < LONG_PROMPTS {
                            sent.push(inner.spawn(move || {
                                Gen::new(server)
                                    .generate("base", short, 2)
                                    .map(|a| a.first_token_ms)
                            }));
                            std::thread::sleep(SHORT_EVERY);
                        }
                        sent.into_iter()
                            .map(|h| h.join().expect("a short request"))
                            .collect()
                    })
                });
                std::thread::sleep(SHORT_EVERY * 2);
                let longs: Vec<_> = longs
                    .iter()
                    .map(|p| {
                        scope.spawn(move || {
                            let r = Gen::new(server).generate("base", p, 2);
                            done.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
                            r
                        })
                    })
                    .collect();
                let long_answers: Vec<anyhow::Result<Generated>> = longs
                    .into_iter()
                    .map(|h| h.join().expect("a long prompt"))
                    .collect();
                (shorts.join().expect("the short requests"), long_answers)
            });
            let short_ms = short_ms?;
            // The first two short requests were sent before the long prompts arrived.
            ttft[case].extend(short_ms.into_iter().skip(2));
            for a in long_answers {
                let a = a?;
                long_ttft[case].push(a.first_token_ms);
                long_tokens.push(a.prompt_tokens);
            }
        }
        eprintln!("chunked prefill: round {} of {}", round + 1, s.rounds);
    }

    // Decode: 16 sequences over 8 adapters, against 16 on the base.
    let mut tps = [Vec::new(), Vec::new()];
    let names = adapter_names();
    let g = Gen::new(&chunked);
    for name in &names {
        g.generate(name, short, 1)?;
    }
    for round in 0..s.rounds {
        for (case, adapters) in [(0, false), (1, true)] {
            let begin = Instant::now();
            let produced: anyhow::Result<usize> = std::thread::scope(|scope| {
                let runs: Vec<_> = (0..SEQUENCES)
                    .map(|i| {
                        let target = if adapters {
                            names[i % ADAPTERS].clone()
                        } else {
                            "base".to_owned()
                        };
                        let g = Gen::new(&chunked);
                        // Every sequence runs to its limit: end-of-sequence ids are not sampled
                        // by a random model often, and a short one only lowers both cases alike.
                        scope.spawn(move || g.generate(&target, short, s.decode_tokens))
                    })
                    .collect();
                let mut total = 0;
                for r in runs {
                    total += r.join().expect("a sequence")?.output_tokens;
                }
                Ok(total)
            });
            tps[case].push(produced? as f64 / begin.elapsed().as_secs_f64());
        }
        eprintln!("decode: round {} of {}", round + 1, s.rounds);
    }

    // Prefix cache: per adapter, a system prompt with two different questions.
    let g = Gen::new(&cached);
    for name in &names {
        g.generate(name, short, 1)?;
    }
    let mut prefix_rows = Vec::new();
    for name in names.iter().take(s.rounds.clamp(1, ADAPTERS)) {
        let system = text_of(&mut rng, s.system_tokens, wpt);
        let first = g.generate(
            name,
            &format!("{system}\nquestion: {}", words(&mut rng, 8)),
            1,
        )?;
        let second = g.generate(
            name,
            &format!("{system}\nquestion: {}", words(&mut rng, 8)),
            1,
        )?;
        prefix_rows.push((first, second));
    }
    drop((chunked, whole, cached));

    let ratio = |a: f64, b: f64| round3(a / b);
    let p = |v: &[f64], q: f64| percentile(&sorted(v), q).unwrap_or(f64::NAN);
    let decode_ratio = ratio(median(&tps[0]), median(&tps[1]));
    let prefix_ratios: Vec<f64> = prefix_rows
        .iter()
        .map(|(a, b)| b.first_token_ms / a.first_token_ms)
        .collect();
    let json = json!({
        "command": s.command,
        "model": s.model_dir.display().to_string(),
        "rounds": s.rounds,
        "chunked_prefill": {
            "long_prompts": LONG_PROMPTS,
            "long_prompt_tokens": long_tokens,
            "chunked_step_tokens": CHUNKED_STEP,
            "short_first_token_chunked": summary(&ttft[0]),
            "short_first_token_whole": summary(&ttft[1]),
            "long_first_token_chunked": summary(&long_ttft[0]),
            "long_first_token_whole": summary(&long_ttft[1]),
            "p50_chunked_over_whole": ratio(p(&ttft[0], 0.5), p(&ttft[1], 0.5)),
            "p99_chunked_over_whole": ratio(p(&ttft[0], 0.99), p(&ttft[1], 0.99)),
        },
        "decode": {
            "sequences": SEQUENCES,
            "adapters": ADAPTERS,
            "tokens_each": s.decode_tokens,
            "base_tokens_per_s": tps[0].iter().map(|x| round3(*x)).collect::<Vec<_>>(),
            "adapters_tokens_per_s": tps[1].iter().map(|x| round3(*x)).collect::<Vec<_>>(),
            "base_over_adapters": decode_ratio,
            "goal": "<= 1.10",
        },
        "prefix_cache": prefix_rows.iter().map(|(a, b)| json!({
            "prompt_tokens": a.prompt_tokens,
            "first_ms": round3(a.first_token_ms),
            "second_ms": round3(b.first_token_ms),
            "second_reused_tokens": b.reused,
            "first_reused_tokens": a.reused,
        })).collect::<Vec<_>>(),
        "prefix_second_over_first_median": round3(median(&prefix_ratios)),
    });
    let mut text = String::new();
    use std::fmt::Write as _;
    let _ = writeln!(
        text,
        "language-model serving on {} ({} rounds; ratios from this one run)",
        s.model_dir.display(),
        s.rounds
    );
    let _ = writeln!(
        text,
        "time to first token of short requests while {LONG_PROMPTS} long prompts ({}-{} tokens) arrive:",
        long_tokens.iter().min().unwrap_or(&0),
        long_tokens.iter().max().unwrap_or(&0)
    );
    let _ = writeln!(
        text,
        "  {:<28} {:>10} {:>10} {:>8}",
        "", "p50 ms", "p99 ms", "count"
    );
    for (label, v) in [
        (format!("chunked (step {CHUNKED_STEP} tokens)"), &ttft[0]),
        ("whole prompts in one pass".to_owned(), &ttft[1]),
    ] {
        let _ = writeln!(
            text,
            "  {label:<28} {:>10.1} {:>10.1} {:>8}",
            p(v, 0.5),
            p(v, 0.99),
            v.len()
        );
    }
    let _ = writeln!(
        text,
        "  chunked / whole: p50 {:.3}, p99 {:.3}; the long prompts' own first token p50 {:.0} ms chunked, {:.0} ms whole",
        ratio(p(&ttft[0], 0.5), p(&ttft[1], 0.5)),
        ratio(p(&ttft[0], 0.99), p(&ttft[1], 0.99)),
        p(&long_ttft[0], 0.5),
        p(&long_ttft[1], 0.5)
    );
    let _ = writeln!(
        text,
        "decode, {SEQUENCES} sequences x {} tokens: base {:.1} tokens/s, over {ADAPTERS} adapters (rank 16, q,v) {:.1} tokens/s (medians); base / adapters {decode_ratio:.3} (goal <= 1.10)",
        s.decode_tokens,
        median(&tps[0]),
        median(&tps[1])
    );
    let _ = writeln!(
        text,
        "prefix cache, same system prompt on the same adapter:"
    );
    for (a, b) in &prefix_rows {
        let _ = writeln!(
            text,
            "  {} prompt tokens: first {:.1} ms (reused {}), second {:.1} ms (reused {}): {:.3}",
            a.prompt_tokens,
            a.first_token_ms,
            a.reused,
            b.first_token_ms,
            b.reused,
            b.first_token_ms / a.first_token_ms
        );
    }
    let _ = writeln!(
        text,
        "  second / first, median: {:.3}",
        median(&prefix_ratios)
    );
    Ok(ServingReport { text, json })
}
