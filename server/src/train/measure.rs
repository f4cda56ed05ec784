//! Accuracy through the serving path: the [`Embedder`] with the adapter on every row, then
//! [`classify::scores`] with the head, exactly what `/classify` answers.

use std::sync::Arc;

use switchyard_adapters::{Adapter, TaskHead};

use super::argmax;
use super::data::Example;
use crate::model::classify;
use crate::model::embedder::Embedder;

/// Right and total per label, in head order.
#[derive(Debug, Clone, PartialEq)]
pub struct Tally {
    pub labels: Vec<String>,
    /// `(right, total)` per label.
    pub per_label: Vec<(usize, usize)>,
}

impl Tally {
    pub fn right(&self) -> usize {
        self.per_label.iter().map(|p| p.0).sum()
    }

    pub fn total(&self) -> usize {
        self.per_label.iter().map(|p| p.1).sum()
    }

    pub fn accuracy(&self) -> f64 {
        self.right() as f64 / self.total().max(1) as f64
    }
}

/// Classifies `examples` with `adapter` (or the base model) and `head`, in batches of `batch`,
/// and counts the right answers per label.
pub fn tally(
    embedder: &Embedder,
    adapter: Option<Arc<Adapter>>,
    head: &TaskHead,
    examples: &[&Example],
    batch: usize,
) -> anyhow::Result<Tally> {
    let mut per_label = vec![(0, 0); head.labels.len()];
    for chunk in examples.chunks(batch.max(1)) {
        let texts: Vec<&str> = chunk.iter().map(|e| e.text.as_str()).collect();
        let embeddings = embedder.embed(&texts, &vec![adapter.clone(); texts.len()])?;
        for (ex, e) in chunk.iter().zip(&embeddings) {
            let predicted = argmax(&classify::scores(e, head)?);
            let slot = &mut per_label[ex.label];
            slot.1 += 1;
            if predicted == ex.label {
                slot.0 += 1;
            }
        }
    }
    Ok(Tally {
        labels: head.labels.clone(),
        per_label,
    })
}
