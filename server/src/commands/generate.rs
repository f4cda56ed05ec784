//! `switchyard generate`: continue a prompt with a decoder checkpoint, greedy unless a
//! temperature is given.

use std::io::Write;
use std::path::PathBuf;
use std::time::Instant;

use switchyard_kernels::WeightFormat;

use anyhow::Context;

use crate::commands::model_line;
use crate::engine::end_at::{EndAt, Holder, Step};
use crate::model::chat::ChatMessage;
use crate::model::generator::{GenerateRequest, Generator};
use crate::model::load_adapter;
use crate::model::sampling::SamplingParams;

/// What to continue: a prompt, or a conversation in a JSON file.
#[derive(Debug, Clone)]
pub enum Input {
    Prompt(String),
    Messages(PathBuf),
}

#[derive(Debug, Clone)]
pub struct GenerateOptions {
    pub model: PathBuf,
    pub adapter: Option<PathBuf>,
    pub input: Input,
    pub end_at: EndAt,
    pub limit: usize,
    pub sampling: SamplingParams,
    pub weights: WeightFormat,
}

pub fn run(opts: &GenerateOptions, mut out: impl Write, mut err: impl Write) -> anyhow::Result<()> {
    opts.sampling.validate().map_err(anyhow::Error::msg)?;
    let loading = Instant::now();
    let generator = Generator::load_as(&opts.model, opts.weights)?;
    writeln!(
        err,
        "{}",
        model_line(
            opts.weights,
            generator.model().resident_bytes(),
            loading.elapsed().as_secs_f64()
        )
    )?;
    let adapter = match &opts.adapter {
        Some(path) => Some(load_adapter(path, generator.spec())?),
        None => None,
    };
    let prompt_ids = match &opts.input {
        Input::Prompt(p) => generator.encode(p)?,
        Input::Messages(file) => {
            let text = std::fs::read_to_string(file)
                .with_context(|| format!("reading {}", file.display()))?;
            let messages: Vec<ChatMessage> = serde_json::from_str(&text).with_context(|| {
                format!(
                    "{} is not a JSON list of {{\"role\", \"content\"}} messages",
                    file.display()
                )
            })?;
            let template = generator.chat_template().with_context(|| {
                format!(
                    "{} has no chat template (chat_template.jinja, or chat_template in tokenizer_config.json); use --prompt",
                    opts.model.display()
                )
            })?;
            let rendered = template.render(&messages).map_err(anyhow::Error::msg)?;
            generator.encode_rendered(&rendered)?
        }
    };
    anyhow::ensure!(!prompt_ids.is_empty(), "the prompt gives no tokens");
    let start = Instant::now();
    let tokens = generator
        .generate(&[GenerateRequest {
            prompt_ids,
            adapter: adapter.clone(),
            limit: opts.limit,
            sampling: opts.sampling,
            stop_at_eos: true,
            end_at: opts.end_at.clone(),
        }])?
        .remove(0);
    let secs = start.elapsed().as_secs_f64();
    // An end token is not part of the output; an end text and what follows it are cut off.
    let mut shown = tokens.clone();
    let mut ended = None;
    if let Some(&last) = shown.last()
        && opts.end_at.token_ids.contains(&last)
    {
        shown.pop();
        ended = Some(format!("end token {last}"));
    }
    let mut text = generator.decode(&shown)?;
    if let Step::End { send, index } = Holder::default().push(&opts.end_at.texts, &text) {
        ended = Some(format!("end text {:?}", opts.end_at.texts[index]));
        text = send;
    }
    writeln!(out, "{text}")?;
    let served_by = adapter.as_ref().map(|a| a.id.as_str()).unwrap_or("base");
    writeln!(
        err,
        "generated {} tokens in {:.3} s: {:.1} tokens/s ({served_by}){}",
        tokens.len(),
        secs,
        tokens.len() as f64 / secs.max(1e-9),
        ended
            .map(|e| format!("; ended at the {e}"))
            .unwrap_or_default()
    )?;
    Ok(())
}
