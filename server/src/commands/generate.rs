//! `switchyard generate`: continue a prompt with a decoder checkpoint, greedy unless a
//! temperature is given.

use std::io::Write;
use std::path::PathBuf;
use std::time::Instant;

use switchyard_kernels::WeightFormat;

use crate::commands::model_line;
use crate::model::generator::{GenerateRequest, Generator};
use crate::model::load_adapter;
use crate::model::sampling::SamplingParams;

#[derive(Debug, Clone)]
pub struct GenerateOptions {
    pub model: PathBuf,
    pub adapter: Option<PathBuf>,
    pub prompt: String,
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
    let prompt_ids = generator.encode(&opts.prompt)?;
    anyhow::ensure!(!prompt_ids.is_empty(), "the prompt gives no tokens");
    let start = Instant::now();
    let tokens = generator
        .generate(&[GenerateRequest {
            prompt_ids,
            adapter: adapter.clone(),
            limit: opts.limit,
            sampling: opts.sampling,
            stop_at_eos: true,
        }])?
        .remove(0);
    let secs = start.elapsed().as_secs_f64();
    writeln!(out, "{}", generator.decode(&tokens)?)?;
    let served_by = adapter.as_ref().map(|a| a.id.as_str()).unwrap_or("base");
    writeln!(
        err,
        "generated {} tokens in {:.3} s: {:.1} tokens/s ({served_by})",
        tokens.len(),
        secs,
        tokens.len() as f64 / secs.max(1e-9)
    )?;
    Ok(())
}
