//! Sentence embeddings from an encoder checkpoint: tokenise a batch (truncation, padding,
//! attention mask), run the encoder with each row's adapter, mean-pool over real tokens and
//! L2-normalise.

use std::path::Path;
use std::sync::Arc;

use anyhow::Context;
use candle_core::{Device, Tensor};
use switchyard_adapters::{Adapter, BaseSpec, base_fingerprint};
use switchyard_kernels::WeightFormat;
use tokenizers::{Tokenizer, TruncationParams};

use crate::model::bert::{BertConfig, BertModel, mean_pool_normalise};
use crate::model::checkpoint::{Checkpoint, Weights, load_tokenizer};
use crate::model::linear::RowAdapters;

/// An encoder checkpoint ready to embed text.
pub struct Embedder {
    model: BertModel,
    tokenizer: Tokenizer,
    /// The same tokenizer without truncation, to measure inputs against request limits.
    untruncated: Tokenizer,
    spec: BaseSpec,
    max_tokens: usize,
    format: WeightFormat,
}

impl Embedder {
    /// Loads config.json, the weights (as f32) and tokenizer.json from `dir`.
    pub fn load(dir: &Path) -> anyhow::Result<Self> {
        Self::load_as(dir, WeightFormat::F32)
    }

    /// Loads config.json, the weights held in `format` and tokenizer.json from `dir`.
    pub fn load_as(dir: &Path, format: WeightFormat) -> anyhow::Result<Self> {
        let ckpt = Checkpoint::open(dir)?;
        let cfg: BertConfig = serde_json::from_value(ckpt.config.clone()).with_context(|| {
            format!("reading {}/config.json as an encoder config", dir.display())
        })?;
        let model = BertModel::new(&cfg, &Weights::new(&ckpt, format))
            .with_context(|| format!("building the encoder from {}", dir.display()))?;
        let fingerprint = base_fingerprint(ckpt.model_type(), &ckpt.tensor_shapes());
        let spec = model.spec(ckpt.model_type(), fingerprint);
        let max_tokens = sentence_max_tokens(dir).unwrap_or(cfg.max_position_embeddings);
        let mut untruncated = load_tokenizer(&ckpt.tokenizer_path())?;
        untruncated
            .with_truncation(None)
            .map_err(|e| anyhow::anyhow!("clearing truncation: {e}"))?;
        untruncated.with_padding(None);
        let mut tokenizer = load_tokenizer(&ckpt.tokenizer_path())?;
        tokenizer
            .with_truncation(Some(TruncationParams {
                max_length: max_tokens,
                ..Default::default()
            }))
            .map_err(|e| anyhow::anyhow!("setting truncation: {e}"))?;
        tokenizer.with_padding(None);
        Ok(Self {
            model,
            tokenizer,
            untruncated,
            spec,
            max_tokens,
            format,
        })
    }

    /// The format the base weights are held in.
    pub fn weights_format(&self) -> WeightFormat {
        self.format
    }

    pub fn spec(&self) -> &BaseSpec {
        &self.spec
    }

    pub fn model(&self) -> &BertModel {
        &self.model
    }

    pub fn hidden_size(&self) -> usize {
        self.model.config.hidden_size
    }

    /// Most tokens per input; longer inputs are truncated.
    pub fn max_tokens(&self) -> usize {
        self.max_tokens
    }

    /// Token ids of each text, with special tokens, truncated to [`Embedder::max_tokens`].
    pub fn tokenize(&self, texts: &[&str]) -> anyhow::Result<Vec<Vec<u32>>> {
        let encodings = self
            .tokenizer
            .encode_batch(texts.to_vec(), true)
            .map_err(|e| anyhow::anyhow!("tokenising: {e}"))?;
        Ok(encodings.iter().map(|e| e.get_ids().to_vec()).collect())
    }

    /// Token ids of each text ready for the model (truncated as usual), with each text's token
    /// count before truncation: what a request limit is measured against.
    pub fn tokenize_counted(&self, texts: &[&str]) -> anyhow::Result<(Vec<Vec<u32>>, Vec<usize>)> {
        let encodings = self
            .untruncated
            .encode_batch(texts.to_vec(), true)
            .map_err(|e| anyhow::anyhow!("tokenising: {e}"))?;
        let mut out: Vec<Vec<u32>> = encodings.iter().map(|e| e.get_ids().to_vec()).collect();
        let counts = out.iter().map(Vec::len).collect();
        for (i, ids) in out.iter_mut().enumerate() {
            if ids.len() > self.max_tokens {
                *ids = self.tokenize(&texts[i..=i])?.remove(0);
            }
        }
        Ok((out, counts))
    }

    /// One unit-length embedding per text; `adapters[i]` applies to `texts[i]` (all `None` for
    /// the base model).
    pub fn embed(
        &self,
        texts: &[&str],
        adapters: &[Option<Arc<Adapter>>],
    ) -> anyhow::Result<Vec<Vec<f32>>> {
        let ids = self.tokenize(texts)?;
        self.embed_ids(&ids, adapters)
    }

    /// Like [`Embedder::embed`], from token ids.
    pub fn embed_ids(
        &self,
        ids: &[Vec<u32>],
        adapters: &[Option<Arc<Adapter>>],
    ) -> anyhow::Result<Vec<Vec<f32>>> {
        anyhow::ensure!(ids.len() == adapters.len(), "one adapter slot per input");
        let t = padded_len(ids);
        let rows = crate::model::rows_for_sequences(adapters, &vec![t; ids.len()]);
        self.embed_rows(ids, &rows)
    }

    /// Embeds token ids with a prepared row assignment (covering `ids.len()` sequences padded to
    /// the longest): the engine uses it to run a merged variant.
    pub fn embed_rows(
        &self,
        ids: &[Vec<u32>],
        rows: &RowAdapters,
    ) -> anyhow::Result<Vec<Vec<f32>>> {
        if ids.is_empty() {
            return Ok(Vec::new());
        }
        let dev = Device::Cpu;
        let b = ids.len();
        let t = padded_len(ids);
        anyhow::ensure!(
            rows.rows() == b * t,
            "row assignment covers {} rows, batch has {}",
            rows.rows(),
            b * t
        );
        let mut flat_ids = vec![0u32; b * t];
        let mut flat_mask = vec![0u32; b * t];
        for (row, seq) in ids.iter().enumerate() {
            flat_ids[row * t..row * t + seq.len()].copy_from_slice(seq);
            flat_mask[row * t..row * t + seq.len()].fill(1);
        }
        let ids_t = Tensor::from_vec(flat_ids, (b, t), &dev)?;
        let mask_t = Tensor::from_vec(flat_mask, (b, t), &dev)?;
        let hidden = self.model.forward(&ids_t, &mask_t, rows)?;
        let pooled = mean_pool_normalise(&hidden, &mask_t)?;
        Ok(pooled.to_vec2::<f32>()?)
    }
}

/// The padded length of a batch: its longest sequence (at least 1).
pub fn padded_len(ids: &[Vec<u32>]) -> usize {
    ids.iter().map(Vec::len).max().unwrap_or(0).max(1)
}

/// sentence-transformers' `max_seq_length` where the folder has a sentence_bert_config.json.
fn sentence_max_tokens(dir: &Path) -> Option<usize> {
    let text = std::fs::read_to_string(dir.join("sentence_bert_config.json")).ok()?;
    let v: serde_json::Value = serde_json::from_str(&text).ok()?;
    v.get("max_seq_length")?.as_u64().map(|n| n as usize)
}
