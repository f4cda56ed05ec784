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

use crate::model::bert::{BertConfig, BertModel};
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
    pooling: Pooling,
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
        let max_tokens = sentence_max_tokens(dir)
            .unwrap_or(cfg.max_tokens())
            .min(cfg.max_tokens());
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
        let pooling = Pooling::read(dir)?;
        Ok(Self {
            model,
            tokenizer,
            untruncated,
            spec,
            max_tokens,
            format,
            pooling,
        })
    }

    /// How token states become the sentence vector (from the sentence-transformers files).
    pub fn pooling(&self) -> Pooling {
        self.pooling
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
        let pooled = self.pooling.apply(&hidden, &mask_t)?;
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

/// How token states become one sentence vector, as a sentence-transformers folder describes it
/// (`modules.json`, and the pooling module's `config.json`): the mean over real tokens, the first
/// token (CLS) or the last real token, then L2-normalised when a `Normalize` module follows.
/// A folder without `modules.json` gets the mean, normalised (what MiniLM-style models use).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Pooling {
    pub mode: PoolingMode,
    pub normalize: bool,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PoolingMode {
    Mean,
    Cls,
    LastToken,
}

impl PoolingMode {
    pub fn name(self) -> &'static str {
        match self {
            PoolingMode::Mean => "mean",
            PoolingMode::Cls => "cls",
            PoolingMode::LastToken => "last token",
        }
    }
}

impl Default for Pooling {
    fn default() -> Self {
        Self {
            mode: PoolingMode::Mean,
            normalize: true,
        }
    }
}

impl Pooling {
    /// Reads the sentence-transformers files in `dir`; refuses modules and pooling modes this
    /// runtime does not implement, naming the file and the field.
    pub fn read(dir: &Path) -> anyhow::Result<Self> {
        let modules_path = dir.join("modules.json");
        if !modules_path.exists() {
            return Ok(Self::default());
        }
        let shown = modules_path.display();
        let modules: Vec<serde_json::Value> = serde_json::from_str(
            &std::fs::read_to_string(&modules_path).with_context(|| format!("reading {shown}"))?,
        )
        .with_context(|| format!("{shown} is not a JSON list of modules"))?;
        let mut pooling = None;
        let mut normalize = false;
        for (i, m) in modules.iter().enumerate() {
            let kind = m["type"].as_str().unwrap_or_default();
            match kind.rsplit('.').next().unwrap_or_default() {
                "Transformer" => {}
                "Pooling" => {
                    let path = dir.join(m["path"].as_str().unwrap_or_default());
                    pooling = Some(Self::read_pooling(&path.join("config.json"))?);
                }
                "Normalize" => normalize = true,
                _ => anyhow::bail!(
                    "{shown}: module {i} is {kind:?}; switchyard runs Transformer, Pooling and Normalize modules only"
                ),
            }
        }
        Ok(Self {
            mode: pooling.with_context(|| format!("{shown} lists no Pooling module"))?,
            normalize,
        })
    }

    fn read_pooling(path: &Path) -> anyhow::Result<PoolingMode> {
        let shown = path.display();
        let v: serde_json::Value = serde_json::from_str(
            &std::fs::read_to_string(path).with_context(|| format!("reading {shown}"))?,
        )
        .with_context(|| format!("{shown} is not JSON"))?;
        let on = |k: &str| v.get(k).and_then(|x| x.as_bool()).unwrap_or(false);
        for k in [
            "pooling_mode_max_tokens",
            "pooling_mode_mean_sqrt_len_tokens",
            "pooling_mode_weightedmean_tokens",
        ] {
            if on(k) {
                anyhow::bail!(
                    "{shown}: {k} is true; switchyard pools by mean, CLS token or last token"
                );
            }
        }
        let modes: Vec<PoolingMode> = [
            ("pooling_mode_mean_tokens", PoolingMode::Mean),
            ("pooling_mode_cls_token", PoolingMode::Cls),
            ("pooling_mode_lasttoken", PoolingMode::LastToken),
        ]
        .into_iter()
        .filter(|(k, _)| on(k))
        .map(|(_, m)| m)
        .collect();
        match modes[..] {
            [one] => Ok(one),
            [] => anyhow::bail!("{shown}: no pooling mode is true"),
            _ => anyhow::bail!(
                "{shown}: more than one pooling mode is true (their vectors would be joined); switchyard takes one"
            ),
        }
    }

    /// `[b, t, h]` token states and their `[b, t]` mask (real tokens first in each row) →
    /// `[b, h]` sentence vectors.
    pub fn apply(&self, hidden: &Tensor, mask: &Tensor) -> candle_core::Result<Tensor> {
        use candle_core::{D, DType};
        let pooled = match self.mode {
            PoolingMode::Mean => {
                let m = mask.to_dtype(DType::F32)?.unsqueeze(D::Minus1)?;
                let summed = hidden.broadcast_mul(&m)?.sum(1)?;
                let counts = m.sum(1)?.clamp(1e-9, f64::MAX)?;
                summed.broadcast_div(&counts)?
            }
            PoolingMode::Cls => hidden.narrow(1, 0, 1)?.squeeze(1)?,
            PoolingMode::LastToken => {
                let lens: Vec<u32> = mask.to_dtype(DType::U32)?.sum(1)?.to_vec1()?;
                let rows = lens
                    .iter()
                    .enumerate()
                    .map(|(b, &n)| hidden.get(b)?.get(n.saturating_sub(1) as usize))
                    .collect::<candle_core::Result<Vec<_>>>()?;
                Tensor::stack(&rows, 0)?
            }
        };
        if !self.normalize {
            return Ok(pooled);
        }
        let norm = pooled
            .sqr()?
            .sum_keepdim(D::Minus1)?
            .sqrt()?
            .clamp(1e-12, f64::MAX)?;
        pooled.broadcast_div(&norm)
    }
}
