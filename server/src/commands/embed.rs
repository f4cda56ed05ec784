//! `switchyard embed`: one text per line on stdin, one JSON embedding (an array of numbers) per
//! line on stdout, and a summary on stderr.

use std::io::{BufRead, Write};
use std::path::PathBuf;
use std::time::Instant;

use anyhow::Context;

use switchyard_kernels::WeightFormat;

use crate::commands::model_line;
use crate::model::embedder::Embedder;
use crate::model::load_adapter;

#[derive(Debug, Clone)]
pub struct EmbedOptions {
    pub model: PathBuf,
    pub adapter: Option<PathBuf>,
    pub batch: usize,
    pub weights: WeightFormat,
}

pub fn run(
    opts: &EmbedOptions,
    input: impl BufRead,
    mut out: impl Write,
    mut err: impl Write,
) -> anyhow::Result<()> {
    anyhow::ensure!(opts.batch >= 1, "--batch must be at least 1");
    let loading = Instant::now();
    let embedder = Embedder::load_as(&opts.model, opts.weights)?;
    writeln!(
        err,
        "{}",
        model_line(
            opts.weights,
            embedder.model().resident_bytes(),
            loading.elapsed().as_secs_f64()
        )
    )?;
    let adapter = match &opts.adapter {
        Some(path) => Some(load_adapter(path, embedder.spec())?),
        None => None,
    };
    let lines: Vec<String> = input
        .lines()
        .collect::<Result<_, _>>()
        .context("reading texts from standard input")?;
    let start = Instant::now();
    for chunk in lines.chunks(opts.batch) {
        let texts: Vec<&str> = chunk.iter().map(String::as_str).collect();
        let adapters = vec![adapter.clone(); texts.len()];
        for embedding in embedder.embed(&texts, &adapters)? {
            serde_json::to_writer(&mut out, &embedding)?;
            out.write_all(b"\n")?;
        }
    }
    out.flush()?;
    let secs = start.elapsed().as_secs_f64();
    let served_by = adapter.as_ref().map(|a| a.id.as_str()).unwrap_or("base");
    writeln!(
        err,
        "embedded {} rows in {:.3} s: {:.1} rows/s (batch {}, {served_by})",
        lines.len(),
        secs,
        lines.len() as f64 / secs.max(1e-9),
        opts.batch
    )?;
    Ok(())
}
