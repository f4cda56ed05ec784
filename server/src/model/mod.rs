//! Model runtimes: the encoder (BERT family, with RoBERTa, XLM-R and MPNet) and decoder (Llama
//! family) families, the one adapter-aware linear layer both use, checkpoint loading and
//! sampling.

pub mod bert;
pub mod chat;
pub mod checkpoint;
pub mod classify;
pub mod embedder;
pub mod generator;
pub mod linear;
pub mod llama;
pub mod mpnet;
pub mod sampling;

use std::path::Path;
use std::sync::Arc;

use anyhow::Context;
use switchyard_adapters::package::Limits;
use switchyard_adapters::{Adapter, AdapterPackage, BaseSpec};

use crate::model::linear::RowAdapters;

/// Groups the rows of a batch of sequences by adapter; a batch where every sequence carries the
/// same adapter (or none) takes the fast path with no gather or scatter.
pub fn rows_for_sequences(
    adapters: &[Option<Arc<Adapter>>],
    rows_per_seq: &[usize],
) -> RowAdapters {
    let rows = rows_per_seq.iter().sum();
    let first = adapters.first().cloned().flatten();
    let uniform = adapters.iter().all(|a| match (a, &first) {
        (None, None) => true,
        (Some(a), Some(f)) => Arc::ptr_eq(a, f),
        _ => false,
    });
    if uniform {
        RowAdapters::uniform(first, rows)
    } else {
        RowAdapters::per_sequence(adapters, rows_per_seq)
    }
}

/// Reads an adapter package, validates it against `spec`, and makes it resident.
pub fn load_adapter(path: &Path, spec: &BaseSpec) -> anyhow::Result<Arc<Adapter>> {
    let limits = Limits::default();
    let (pkg, version) = AdapterPackage::read(path, &limits)?;
    pkg.validate(&path.display().to_string(), spec, &limits)?;
    let name = path
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "adapter".to_owned());
    let adapter = Adapter::from_package(format!("{name}@{version}"), pkg)
        .with_context(|| format!("making {} resident", path.display()))?;
    Ok(Arc::new(adapter))
}
