//! Sentence embeddings from an encoder checkpoint: tokenise a batch (truncation, padding,
//! attention mask), run the encoder with each row's adapter, mean-pool over real tokens and
//! L2-normalise.

use std::path::Path;
use std::sync::Arc;

use anyhow::Context;
use candle_core::{Device, Tensor};
use switchyard_adapters::{Adapter, BaseSpec, base_fingerprint};
use tokenizers::{Tokenizer, TruncationParams};

use crate::model::bert::{BertConfig, BertModel, mean_pool_normalise};
use crate::model::checkpoint::{Checkpoint, load_tokenizer};

/// An encoder checkpoint ready to embed text.
pub struct Embedder {
    model: BertModel,
    tokenizer: Tokenizer,
    spec: BaseSpec,
    max_tokens: usize,
}

impl Embedder {
    /// Loads config.json, the weights and tokenizer.json from `dir`.
    pub fn load(dir: &Path) -> anyhow::Result<Self> {
        let ckpt = Checkpoint::open(dir)?;
        let cfg: BertConfig = serde_json::from_value(ckpt.config.clone()).with_context(|| {
            format!("reading {}/config.json as an encoder config", dir.display())
        })?;
        let model = BertModel::new(&cfg, ckpt.var_builder())
            .with_context(|| format!("building the encoder from {}", dir.display()))?;
        let fingerprint = base_fingerprint(ckpt.model_type(), &ckpt.tensor_shapes());
        let spec = model.spec(ckpt.model_type(), fingerprint);
        let max_tokens = sentence_max_tokens(dir).unwrap_or(cfg.max_position_embeddings);
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
            spec,
            max_tokens,
        })
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
        if ids.is_empty() {
            return Ok(Vec::new());
        }
        let dev = Device::Cpu;
        let b = ids.len();
        let t = ids.iter().map(Vec::len).max().unwrap_or(0).max(1);
        let mut flat_ids = vec![0u32; b * t];
        let mut flat_mask = vec![0u32; b * t];
        for (row, seq) in ids.iter().enumerate() {
            flat_ids[row * t..row * t + seq.len()].copy_from_slice(seq);
            flat_mask[row * t..row * t + seq.len()].fill(1);
        }
        let ids_t = Tensor::from_vec(flat_ids, (b, t), &dev)?;
        let mask_t = Tensor::from_vec(flat_mask, (b, t), &dev)?;
        let rows = crate::model::rows_for_sequences(adapters, &vec![t; b], &dev)?;
        let hidden = self.model.forward(&ids_t, &mask_t, &rows)?;
        let pooled = mean_pool_normalise(&hidden, &mask_t)?;
        Ok(pooled.to_vec2::<f32>()?)
    }
}

/// sentence-transformers' `max_seq_length` where the folder has a sentence_bert_config.json.
fn sentence_max_tokens(dir: &Path) -> Option<usize> {
    let text = std::fs::read_to_string(dir.join("sentence_bert_config.json")).ok()?;
    let v: serde_json::Value = serde_json::from_str(&text).ok()?;
    v.get("max_seq_length")?.as_u64().map(|n| n as usize)
}
