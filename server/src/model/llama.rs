//! The decoder family (Llama and its relatives): RMSNorm, rotary positions, grouped-query
//! attention, SwiGLU, optional biases, optional tied embeddings, and a KV cache per sequence.
//!
//! A forward pass takes a ragged batch: each sequence brings any number of new tokens (a whole
//! prompt to prefill, or one token to decode) and its own cache. All new tokens form one flat
//! `[rows, hidden]` matrix, so every projection runs once for the whole batch, whatever each
//! sequence's length; only attention, which reads each sequence's own cache, runs per sequence.

use std::collections::BTreeMap;

use candle_core::{D, DType, Device, Result, Tensor};
use candle_nn::{Embedding, Module as _, RmsNorm, VarBuilder};
use serde::Deserialize;
use switchyard_adapters::{BaseSpec, Module, Site};

use crate::model::linear::{AdaptedLinear, RowAdapters};

/// Rope settings, as found in `rope_parameters` (newer checkpoints) or `rope_scaling` (older).
#[derive(Debug, Clone, Default, Deserialize)]
pub struct RopeParameters {
    #[serde(default)]
    pub rope_theta: Option<f64>,
    #[serde(default, alias = "type")]
    pub rope_type: Option<String>,
    #[serde(default)]
    pub factor: Option<f64>,
    #[serde(default)]
    pub low_freq_factor: Option<f64>,
    #[serde(default)]
    pub high_freq_factor: Option<f64>,
    #[serde(default)]
    pub original_max_position_embeddings: Option<usize>,
}

/// A token id field that checkpoints write either as one number or as a list.
#[derive(Debug, Clone, Deserialize)]
#[serde(untagged)]
pub enum TokenIds {
    One(u32),
    Many(Vec<u32>),
}

impl TokenIds {
    pub fn to_vec(&self) -> Vec<u32> {
        match self {
            TokenIds::One(id) => vec![*id],
            TokenIds::Many(ids) => ids.clone(),
        }
    }
}

/// The fields of a Llama-family config.json, read the way different library versions write them.
#[derive(Debug, Clone, Deserialize)]
pub struct LlamaConfig {
    pub vocab_size: usize,
    pub hidden_size: usize,
    pub intermediate_size: usize,
    pub num_hidden_layers: usize,
    pub num_attention_heads: usize,
    #[serde(default)]
    pub num_key_value_heads: Option<usize>,
    #[serde(default)]
    pub head_dim: Option<usize>,
    #[serde(default)]
    pub rope_theta: Option<f64>,
    #[serde(default)]
    pub rope_parameters: Option<RopeParameters>,
    #[serde(default)]
    pub rope_scaling: Option<RopeParameters>,
    #[serde(default = "default_rms_eps")]
    pub rms_norm_eps: f64,
    #[serde(default)]
    pub tie_word_embeddings: bool,
    #[serde(default = "default_max_positions")]
    pub max_position_embeddings: usize,
    #[serde(default)]
    pub bos_token_id: Option<TokenIds>,
    #[serde(default)]
    pub eos_token_id: Option<TokenIds>,
}

fn default_rms_eps() -> f64 {
    1e-6
}
fn default_max_positions() -> usize {
    2048
}

impl LlamaConfig {
    pub fn kv_heads(&self) -> usize {
        self.num_key_value_heads.unwrap_or(self.num_attention_heads)
    }

    pub fn head_dim(&self) -> usize {
        self.head_dim
            .unwrap_or(self.hidden_size / self.num_attention_heads)
    }

    fn rope(&self) -> RopeParameters {
        self.rope_parameters
            .clone()
            .or_else(|| self.rope_scaling.clone())
            .unwrap_or_default()
    }

    /// The rope base: top-level `rope_theta`, else inside `rope_parameters` / `rope_scaling`,
    /// else 10000 (the original Llama value).
    pub fn theta(&self) -> f64 {
        self.rope_theta
            .or(self.rope().rope_theta)
            .unwrap_or(10_000.0)
    }

    pub fn eos_ids(&self) -> Vec<u32> {
        self.eos_token_id
            .as_ref()
            .map(TokenIds::to_vec)
            .unwrap_or_default()
    }

    /// Inverse frequencies of the rotary embedding, with the checkpoint's scaling rule.
    fn inv_freq(&self) -> Result<Vec<f64>> {
        let d = self.head_dim();
        let theta = self.theta();
        let base: Vec<f64> = (0..d / 2)
            .map(|i| 1.0 / theta.powf(2.0 * i as f64 / d as f64))
            .collect();
        let rope = self.rope();
        match rope.rope_type.as_deref().unwrap_or("default") {
            "default" => Ok(base),
            "linear" => {
                let factor = rope.factor.unwrap_or(1.0);
                Ok(base.into_iter().map(|f| f / factor).collect())
            }
            "llama3" => {
                let factor = rope.factor.unwrap_or(8.0);
                let low = rope.low_freq_factor.unwrap_or(1.0);
                let high = rope.high_freq_factor.unwrap_or(4.0);
                let old = rope.original_max_position_embeddings.unwrap_or(8192) as f64;
                let low_wavelen = old / low;
                let high_wavelen = old / high;
                Ok(base
                    .into_iter()
                    .map(|f| {
                        let wavelen = 2.0 * std::f64::consts::PI / f;
                        if wavelen < high_wavelen {
                            f
                        } else if wavelen > low_wavelen {
                            f / factor
                        } else {
                            let smooth = (old / wavelen - low) / (high - low);
                            (1.0 - smooth) * f / factor + smooth * f
                        }
                    })
                    .collect())
            }
            other => candle_core::bail!(
                "config.json rope type {other:?} is not supported (supported: default, linear, llama3)"
            ),
        }
    }
}

/// Keys and values of one sequence, per layer: `[kv_heads, len, head_dim]`.
#[derive(Debug, Clone, Default)]
pub struct KvCache {
    layers: Vec<Option<(Tensor, Tensor)>>,
    len: usize,
}

impl KvCache {
    /// Tokens held so far.
    pub fn len(&self) -> usize {
        self.len
    }

    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Bytes held by the cache.
    pub fn bytes(&self) -> usize {
        self.layers
            .iter()
            .flatten()
            .map(|(k, v)| (k.elem_count() + v.elem_count()) * 4)
            .sum()
    }
}

struct Rotary {
    cos: Tensor,
    sin: Tensor,
}

impl Rotary {
    fn new(cfg: &LlamaConfig, dev: &Device) -> Result<Self> {
        let inv = cfg.inv_freq()?;
        let n = cfg.max_position_embeddings;
        let half = inv.len();
        let mut cos = Vec::with_capacity(n * half);
        let mut sin = Vec::with_capacity(n * half);
        for p in 0..n {
            for f in &inv {
                let angle = p as f64 * f;
                cos.push(angle.cos() as f32);
                sin.push(angle.sin() as f32);
            }
        }
        Ok(Self {
            cos: Tensor::from_vec(cos, (n, half), dev)?,
            sin: Tensor::from_vec(sin, (n, half), dev)?,
        })
    }

    /// Rotates `x [rows, heads, d]` by each row's position (the halves convention: the first
    /// half of the head dimension pairs with the second).
    fn apply(&self, x: &Tensor, cos: &Tensor, sin: &Tensor) -> Result<Tensor> {
        let d = x.dim(D::Minus1)?;
        let x1 = x.narrow(D::Minus1, 0, d / 2)?;
        let x2 = x.narrow(D::Minus1, d / 2, d / 2)?;
        let r1 = (x1.broadcast_mul(cos)? - x2.broadcast_mul(sin)?)?;
        let r2 = (x2.broadcast_mul(cos)? + x1.broadcast_mul(sin)?)?;
        Tensor::cat(&[r1, r2], D::Minus1)
    }
}

struct Block {
    input_norm: RmsNorm,
    q: AdaptedLinear,
    k: AdaptedLinear,
    v: AdaptedLinear,
    o: AdaptedLinear,
    post_norm: RmsNorm,
    gate: AdaptedLinear,
    up: AdaptedLinear,
    down: AdaptedLinear,
    heads: usize,
    kv_heads: usize,
    head_dim: usize,
}

impl Block {
    fn new(cfg: &LlamaConfig, layer: usize, vb: VarBuilder) -> Result<Self> {
        let h = cfg.hidden_size;
        let d = cfg.head_dim();
        let q_out = cfg.num_attention_heads * d;
        let kv_out = cfg.kv_heads() * d;
        let i = cfg.intermediate_size;
        let lin = |m: Module, inp: usize, out: usize, vb: VarBuilder| {
            AdaptedLinear::load(Site::new(layer, m), inp, out, vb)
        };
        Ok(Self {
            input_norm: candle_nn::rms_norm(h, cfg.rms_norm_eps, vb.pp("input_layernorm"))?,
            q: lin(Module::AttnQ, h, q_out, vb.pp("self_attn.q_proj"))?,
            k: lin(Module::AttnK, h, kv_out, vb.pp("self_attn.k_proj"))?,
            v: lin(Module::AttnV, h, kv_out, vb.pp("self_attn.v_proj"))?,
            o: lin(Module::AttnO, q_out, h, vb.pp("self_attn.o_proj"))?,
            post_norm: candle_nn::rms_norm(h, cfg.rms_norm_eps, vb.pp("post_attention_layernorm"))?,
            gate: lin(Module::MlpGate, h, i, vb.pp("mlp.gate_proj"))?,
            up: lin(Module::MlpUp, h, i, vb.pp("mlp.up_proj"))?,
            down: lin(Module::MlpDown, i, h, vb.pp("mlp.down_proj"))?,
            heads: cfg.num_attention_heads,
            kv_heads: cfg.kv_heads(),
            head_dim: d,
        })
    }

    fn linears(&self) -> [&AdaptedLinear; 7] {
        [
            &self.q, &self.k, &self.v, &self.o, &self.gate, &self.up, &self.down,
        ]
    }

    #[allow(clippy::too_many_arguments)]
    fn forward(
        &self,
        layer: usize,
        x: &Tensor,
        spans: &[(usize, usize)],
        caches: &mut [&mut KvCache],
        rotary: &Rotary,
        cos: &Tensor,
        sin: &Tensor,
        adapters: &RowAdapters,
    ) -> Result<Tensor> {
        let rows = x.dim(0)?;
        let (hq, hkv, d) = (self.heads, self.kv_heads, self.head_dim);
        let h = self.input_norm.forward(x)?;
        let q = self.q.forward(&h, adapters)?.reshape((rows, hq, d))?;
        let k = self.k.forward(&h, adapters)?.reshape((rows, hkv, d))?;
        let v = self.v.forward(&h, adapters)?.reshape((rows, hkv, d))?;
        let q = rotary.apply(&q, cos, sin)?;
        let k = rotary.apply(&k, cos, sin)?;
        let scale = 1.0 / (d as f64).sqrt();
        let groups = hq / hkv;
        let mut outs = Vec::with_capacity(spans.len());
        for (&(start, len), cache) in spans.iter().zip(caches.iter_mut()) {
            let qi = q.narrow(0, start, len)?.transpose(0, 1)?.contiguous()?;
            let ki = k.narrow(0, start, len)?.transpose(0, 1)?.contiguous()?;
            let vi = v.narrow(0, start, len)?.transpose(0, 1)?.contiguous()?;
            let past = cache.len;
            let (k_all, v_all) = match &cache.layers[layer] {
                Some((pk, pv)) => (Tensor::cat(&[pk, &ki], 1)?, Tensor::cat(&[pv, &vi], 1)?),
                None => (ki, vi),
            };
            cache.layers[layer] = Some((k_all.clone(), v_all.clone()));
            let total = past + len;
            let (k_rep, v_rep) = if groups == 1 {
                (k_all, v_all)
            } else {
                let rep = |t: Tensor| -> Result<Tensor> {
                    t.unsqueeze(1)?
                        .expand((hkv, groups, total, d))?
                        .reshape((hq, total, d))
                };
                (rep(k_all)?, rep(v_all)?)
            };
            let mut scores = (qi.matmul(&k_rep.t()?)? * scale)?;
            if len > 1 {
                scores = scores.broadcast_add(&causal_mask(len, past, x.device())?)?;
            }
            let probs = candle_nn::ops::softmax_last_dim(&scores)?;
            let out = probs
                .matmul(&v_rep)?
                .transpose(0, 1)?
                .reshape((len, hq * d))?;
            outs.push(out);
        }
        let attn = if outs.len() == 1 {
            outs.pop().unwrap()
        } else {
            Tensor::cat(&outs, 0)?
        };
        let x = (x + self.o.forward(&attn, adapters)?)?;
        let h = self.post_norm.forward(&x)?;
        let gated = (self.gate.forward(&h, adapters)?.silu()? * self.up.forward(&h, adapters)?)?;
        x + self.down.forward(&gated, adapters)?
    }
}

/// `[len, past + len]` additive mask: query j (at position past + j) sees keys 0..=past + j.
fn causal_mask(len: usize, past: usize, dev: &Device) -> Result<Tensor> {
    let total = past + len;
    let mask: Vec<f32> = (0..len)
        .flat_map(|j| (0..total).map(move |l| if l > past + j { f32::NEG_INFINITY } else { 0.0 }))
        .collect();
    Tensor::from_vec(mask, (len, total), dev)
}

/// A Llama-family decoder.
pub struct LlamaModel {
    embed: Embedding,
    blocks: Vec<Block>,
    norm: RmsNorm,
    lm_head: Tensor,
    rotary: Rotary,
    pub config: LlamaConfig,
}

impl LlamaModel {
    /// Builds the decoder from `vb` at the checkpoint root (tensor names `model.*`, `lm_head.*`).
    pub fn new(cfg: &LlamaConfig, vb: VarBuilder) -> Result<Self> {
        if !cfg.num_attention_heads.is_multiple_of(cfg.kv_heads()) {
            candle_core::bail!(
                "config.json: num_attention_heads {} is not a multiple of num_key_value_heads {}",
                cfg.num_attention_heads,
                cfg.kv_heads()
            );
        }
        let m = vb.pp("model");
        let embed = candle_nn::embedding(cfg.vocab_size, cfg.hidden_size, m.pp("embed_tokens"))?;
        let blocks = (0..cfg.num_hidden_layers)
            .map(|i| Block::new(cfg, i, m.pp(format!("layers.{i}"))))
            .collect::<Result<Vec<_>>>()?;
        let norm = candle_nn::rms_norm(cfg.hidden_size, cfg.rms_norm_eps, m.pp("norm"))?;
        let lm_head = if cfg.tie_word_embeddings {
            embed.embeddings().clone()
        } else {
            vb.get((cfg.vocab_size, cfg.hidden_size), "lm_head.weight")?
        };
        let rotary = Rotary::new(cfg, vb.device())?;
        Ok(Self {
            embed,
            blocks,
            norm,
            lm_head,
            rotary,
            config: cfg.clone(),
        })
    }

    /// A cache for one new sequence.
    pub fn new_cache(&self) -> KvCache {
        KvCache {
            layers: vec![None; self.blocks.len()],
            len: 0,
        }
    }

    /// Runs new tokens of several sequences in one pass and returns the final hidden state of
    /// every new token, `[sum of lengths, hidden]`, sequence after sequence. Each cache grows by
    /// its sequence's tokens. `adapters` covers the same rows.
    pub fn forward_hidden(
        &self,
        tokens: &[&[u32]],
        caches: &mut [&mut KvCache],
        adapters: &RowAdapters,
    ) -> Result<Tensor> {
        let _span = tracing::trace_span!("llama_forward", seqs = tokens.len()).entered();
        assert_eq!(tokens.len(), caches.len(), "one cache per sequence");
        let dev = self.lm_head.device().clone();
        let mut ids = Vec::new();
        let mut positions = Vec::new();
        let mut spans = Vec::with_capacity(tokens.len());
        for (seq, cache) in tokens.iter().zip(caches.iter()) {
            if seq.is_empty() {
                candle_core::bail!("a sequence brought no new tokens");
            }
            let past = cache.len;
            if past + seq.len() > self.config.max_position_embeddings {
                candle_core::bail!(
                    "sequence of {} tokens exceeds the model's {} positions",
                    past + seq.len(),
                    self.config.max_position_embeddings
                );
            }
            spans.push((ids.len(), seq.len()));
            ids.extend_from_slice(seq);
            positions.extend((past..past + seq.len()).map(|p| p as u32));
        }
        let rows = ids.len();
        let ids = Tensor::from_vec(ids, rows, &dev)?;
        let pos = Tensor::from_vec(positions, rows, &dev)?;
        let cos = self.rotary.cos.index_select(&pos, 0)?.unsqueeze(1)?;
        let sin = self.rotary.sin.index_select(&pos, 0)?.unsqueeze(1)?;
        let mut x = self.embed.forward(&ids)?;
        for (layer, block) in self.blocks.iter().enumerate() {
            x = block.forward(
                layer,
                &x,
                &spans,
                caches,
                &self.rotary,
                &cos,
                &sin,
                adapters,
            )?;
        }
        for (cache, seq) in caches.iter_mut().zip(tokens) {
            cache.len += seq.len();
        }
        self.norm.forward(&x)
    }

    /// Logits `[rows, vocab]` of hidden states `[rows, hidden]`.
    pub fn logits(&self, hidden: &Tensor) -> Result<Tensor> {
        hidden.matmul(&self.lm_head.t()?)?.to_dtype(DType::F32)
    }

    /// Logits of the last new token of each sequence, `[sequences, vocab]`.
    pub fn forward_last(
        &self,
        tokens: &[&[u32]],
        caches: &mut [&mut KvCache],
        adapters: &RowAdapters,
    ) -> Result<Tensor> {
        let hidden = self.forward_hidden(tokens, caches, adapters)?;
        let mut last = Vec::with_capacity(tokens.len());
        let mut end = 0u32;
        for seq in tokens {
            end += seq.len() as u32;
            last.push(end - 1);
        }
        let n = last.len();
        let idx = Tensor::from_vec(last, n, hidden.device())?;
        self.logits(&hidden.index_select(&idx, 0)?)
    }

    pub fn spec(&self, model_type: &str, fingerprint: String) -> BaseSpec {
        let mut targets = BTreeMap::new();
        for block in &self.blocks {
            for lin in block.linears() {
                targets.insert(lin.site(), lin.shape());
            }
        }
        BaseSpec {
            model_type: model_type.to_owned(),
            fingerprint,
            num_layers: self.blocks.len(),
            hidden_size: self.config.hidden_size,
            targets,
        }
    }

    pub fn base_weight(&self, site: &Site) -> Option<Tensor> {
        let block = self.blocks.get(site.layer)?;
        block
            .linears()
            .into_iter()
            .find(|l| l.site() == *site)
            .map(|l| l.weight().clone())
    }
}
