//! `switchyard similarity`: embeds the texts on stdin with the base model and with each given
//! adapter, and prints, readably, how similar the texts are to each other under each, and how
//! far each adapter moves each text from its base embedding.

use std::io::{BufRead, Write};
use std::path::PathBuf;

use anyhow::Context;

use crate::model::embedder::Embedder;
use crate::model::load_adapter;

#[derive(Debug, Clone)]
pub struct SimilarityOptions {
    pub model: PathBuf,
    pub adapters: Vec<PathBuf>,
    pub weights: switchyard_kernels::WeightFormat,
}

fn cosine(a: &[f32], b: &[f32]) -> f32 {
    // Embeddings are unit length, so the dot product is the cosine.
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn short(text: &str, n: usize) -> String {
    if text.chars().count() <= n {
        text.to_owned()
    } else {
        let cut: String = text.chars().take(n - 1).collect();
        format!("{cut}…")
    }
}

pub fn run(
    opts: &SimilarityOptions,
    input: impl BufRead,
    mut out: impl Write,
) -> anyhow::Result<()> {
    let embedder = Embedder::load_as(&opts.model, opts.weights)?;
    let texts: Vec<String> = input
        .lines()
        .collect::<Result<Vec<_>, _>>()
        .context("reading texts from standard input")?
        .into_iter()
        .filter(|l| !l.trim().is_empty())
        .collect();
    anyhow::ensure!(!texts.is_empty(), "no texts on standard input");
    let refs: Vec<&str> = texts.iter().map(String::as_str).collect();
    let base = embedder.embed(&refs, &vec![None; refs.len()])?;
    writeln!(out, "texts:")?;
    for (i, t) in texts.iter().enumerate() {
        writeln!(out, "  [{}] {}", i + 1, short(t, 90))?;
    }
    print_matrix(&mut out, "base model", &base)?;
    for path in &opts.adapters {
        let adapter = load_adapter(path, embedder.spec())?;
        let adapted = embedder.embed(&refs, &vec![Some(adapter.clone()); refs.len()])?;
        print_matrix(&mut out, &format!("with adapter {}", adapter.id), &adapted)?;
        writeln!(out, "  cosine of each text to its own base embedding:")?;
        for (i, (b, a)) in base.iter().zip(&adapted).enumerate() {
            writeln!(out, "    [{}] {:.4}", i + 1, cosine(b, a))?;
        }
    }
    Ok(())
}

fn print_matrix(out: &mut impl Write, title: &str, emb: &[Vec<f32>]) -> anyhow::Result<()> {
    writeln!(out, "\ncosine similarity, {title}:")?;
    write!(out, "      ")?;
    for j in 0..emb.len() {
        write!(out, "{:>7}", format!("[{}]", j + 1))?;
    }
    writeln!(out)?;
    for (i, a) in emb.iter().enumerate() {
        write!(out, "  {:>4}", format!("[{}]", i + 1))?;
        for b in emb {
            write!(out, "{:>7.3}", cosine(a, b))?;
        }
        writeln!(out)?;
    }
    Ok(())
}
