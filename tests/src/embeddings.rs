//! The sentence-transformers reference embeddings (tests/reference/fixtures/minilm-embeddings.json,
//! written by tests/reference/generate.py) and the one closeness rule every server test holds an
//! embedding to.

use std::collections::BTreeMap;

use serde_json::Value;

use crate::{fixtures, read_json};

/// Least cosine similarity between a served embedding and its reference. Both are unit length,
/// so this bounds the angle between them to about 0.26 degrees: batching, padding and merged
/// weights change float rounding, never the meaning.
pub const MIN_COSINE: f64 = 0.99999;

/// Largest difference in any one coordinate.
pub const MAX_ABS_DIFF: f64 = 1e-4;

/// The reference sentences and their embeddings under the base model and each adapter fixture.
#[derive(Debug, Clone)]
pub struct EmbeddingReference {
    pub sentences: Vec<String>,
    base: Vec<Vec<f64>>,
    adapters: BTreeMap<String, Vec<Vec<f64>>>,
}

impl EmbeddingReference {
    pub fn load() -> Self {
        let fx = read_json(&fixtures().join("minilm-embeddings.json"));
        let sentences = fx["sentences"]
            .as_array()
            .unwrap()
            .iter()
            .map(|s| s.as_str().unwrap().to_owned())
            .collect();
        let adapters = fx["adapters"]
            .as_object()
            .unwrap()
            .iter()
            .map(|(name, a)| (name.clone(), rows(&a["embeddings"])))
            .collect();
        Self {
            sentences,
            base: rows(&fx["embeddings"]),
            adapters,
        }
    }

    /// The sentences as `&str`s, for a request body.
    pub fn texts(&self) -> Vec<&str> {
        self.sentences.iter().map(String::as_str).collect()
    }

    /// Embeddings under the base model, one per sentence.
    pub fn base(&self) -> &[Vec<f64>] {
        &self.base
    }

    /// Embeddings under the adapter fixture `<fixture>.safetensors`, one per sentence.
    pub fn adapter(&self, fixture: &str) -> &[Vec<f64>] {
        self.adapters
            .get(fixture)
            .unwrap_or_else(|| panic!("no reference embeddings for adapter fixture {fixture}"))
    }
}

/// A JSON array of arrays of numbers.
pub fn rows(v: &Value) -> Vec<Vec<f64>> {
    v.as_array()
        .unwrap_or_else(|| panic!("expected an array of embeddings, got {v}"))
        .iter()
        .map(|r| {
            r.as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap())
                .collect()
        })
        .collect()
}

pub fn cosine(a: &[f64], b: &[f64]) -> f64 {
    let dot: f64 = a.iter().zip(b).map(|(x, y)| x * y).sum();
    let norm = |v: &[f64]| v.iter().map(|x| x * x).sum::<f64>().sqrt();
    dot / (norm(a) * norm(b))
}

/// Asserts that `got` is `want` within [`MIN_COSINE`] and [`MAX_ABS_DIFF`]; `what` names it.
pub fn assert_embedding_close(got: &[f64], want: &[f64], what: &str) {
    assert_eq!(got.len(), want.len(), "{what}: dimension");
    let cos = cosine(got, want);
    let diff = got
        .iter()
        .zip(want)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max);
    assert!(
        cos >= MIN_COSINE && diff <= MAX_ABS_DIFF,
        "{what}: cosine {cos} (at least {MIN_COSINE}), max abs diff {diff} (at most {MAX_ABS_DIFF})"
    );
}

/// Asserts that every row of an `embeddings` array is the matching reference row.
pub fn assert_embeddings_close(got: &Value, want: &[Vec<f64>], what: &str) {
    let got = rows(got);
    assert_eq!(got.len(), want.len(), "{what}: number of embeddings");
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        assert_embedding_close(g, w, &format!("{what}, sentence {i}"));
    }
}
