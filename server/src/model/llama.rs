//! The decoder family (Llama and its relatives): RMSNorm, rotary positions, grouped-query
//! attention, SwiGLU, optional biases, optional tied embeddings, and a KV cache per sequence.
//!
//! A forward pass takes a ragged batch: each sequence brings any number of new tokens (a whole
//! prompt to prefill, or one token to decode) and its own cache. All new tokens form one flat
//! `[rows, hidden]` matrix, so every projection runs once for the whole batch, whatever each
//! sequence's length; only attention, which reads each sequence's own cache, runs per sequence.

use std::collections::BTreeMap;

use std::sync::Arc;

use candle_core::{DType, Result, Tensor};
use candle_nn::{Module as _, RmsNorm};
use serde::Deserialize;
use switchyard_adapters::tensors::with_f32;
use switchyard_adapters::{BaseSpec, Module, Site};
use switchyard_kernels::{
    PackedWeight, WeightFormat, axpy, dot, matmul::LIBRARY_ROWS_F32, packed_matmul,
};

use crate::model::checkpoint::Weights;
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
    /// The share of each head's dimensions that rotate (Phi-3's configs name it; only 1 is
    /// supported).
    #[serde(default)]
    pub partial_rotary_factor: Option<f64>,
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
    /// Absent: tied for Gemma (its config's default), untied otherwise; see [`Self::tied`].
    #[serde(default)]
    pub tie_word_embeddings: Option<bool>,
    #[serde(default = "default_max_positions")]
    pub max_position_embeddings: usize,
    #[serde(default)]
    pub bos_token_id: Option<TokenIds>,
    #[serde(default)]
    pub eos_token_id: Option<TokenIds>,
    /// `llama`, `mistral` or `qwen2` (the relatives this runtime implements).
    #[serde(default = "default_model_type")]
    pub model_type: String,
    #[serde(default)]
    pub hidden_act: Option<String>,
    /// Gemma's name for the MLP activation (it takes precedence over `hidden_act` there).
    #[serde(default)]
    pub hidden_activation: Option<String>,
    /// Attention over at most this many positions (the query's own included), on the layers
    /// that slide (Mistral: every layer; Qwen2: per `use_sliding_window`, `max_window_layers`;
    /// any family: per `layer_types` where the config lists them).
    #[serde(default)]
    pub sliding_window: Option<usize>,
    #[serde(default)]
    pub use_sliding_window: Option<bool>,
    #[serde(default)]
    pub max_window_layers: Option<usize>,
    #[serde(default)]
    pub layer_types: Option<Vec<String>>,
    #[serde(default)]
    pub partial_rotary_factor: Option<f64>,
}

fn default_model_type() -> String {
    "llama".into()
}

/// The `model_type`s the decoder runtime implements.
pub const DECODER_TYPES: [&str; 5] = ["llama", "mistral", "qwen2", "gemma", "phi3"];

/// The MLP's gate activation.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Activation {
    /// `silu` (Llama, Mistral, Qwen2).
    Silu,
    /// `gelu_pytorch_tanh`: GELU by its tanh approximation (Gemma's GeGLU).
    GeluTanh,
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

    /// Refuses what this runtime does not implement, naming the config field.
    pub fn check_supported(&self) -> Result<()> {
        if !DECODER_TYPES.contains(&self.model_type.as_str()) {
            candle_core::bail!(
                "config.json: model_type {:?} is not a decoder switchyard runs (supported: {})",
                self.model_type,
                DECODER_TYPES.join(", ")
            );
        }
        self.activation()?;
        if let Some(f) = self
            .rope()
            .partial_rotary_factor
            .or(self.partial_rotary_factor)
            && f != 1.0
        {
            candle_core::bail!(
                "config.json: partial_rotary_factor {f} is not supported (only 1: every dimension of a head rotates)"
            );
        }
        if self.sliding_window == Some(0) {
            candle_core::bail!("config.json: sliding_window 0 leaves nothing to attend to");
        }
        self.windows().map(|_| ())
    }

    fn is_gemma(&self) -> bool {
        self.model_type == "gemma"
    }

    /// Whether the output head is the embedding table.
    pub fn tied(&self) -> bool {
        self.tie_word_embeddings.unwrap_or(self.is_gemma())
    }

    /// The MLP activation: Gemma's `hidden_activation` (default `gelu_pytorch_tanh`), else
    /// `hidden_act` (default `silu`); anything else is refused naming the field.
    pub fn activation(&self) -> Result<Activation> {
        let (field, name) = match (&self.hidden_activation, self.is_gemma()) {
            (Some(a), true) => ("hidden_activation", a.as_str()),
            (None, true) => (
                "hidden_act",
                self.hidden_act.as_deref().unwrap_or("gelu_pytorch_tanh"),
            ),
            _ => ("hidden_act", self.hidden_act.as_deref().unwrap_or("silu")),
        };
        match name {
            "silu" => Ok(Activation::Silu),
            "gelu_pytorch_tanh" => Ok(Activation::GeluTanh),
            other => candle_core::bail!(
                "config.json: {field} {other:?} is not supported for model_type {:?} (supported: silu, gelu_pytorch_tanh)",
                self.model_type
            ),
        }
    }

    /// Gemma scales the embedding rows by the square root of the hidden size.
    fn embed_scale(&self) -> Option<f32> {
        self.is_gemma().then(|| (self.hidden_size as f32).sqrt())
    }

    /// Each layer's attention window (`None`: every earlier position).
    pub fn windows(&self) -> Result<Vec<Option<usize>>> {
        let layers = self.num_hidden_layers;
        if let Some(types) = &self.layer_types {
            if types.len() != layers {
                candle_core::bail!(
                    "config.json: layer_types lists {} layers; num_hidden_layers is {layers}",
                    types.len()
                );
            }
            return types
                .iter()
                .enumerate()
                .map(|(i, t)| match (t.as_str(), self.sliding_window) {
                    ("full_attention", _) => Ok(None),
                    ("sliding_attention", Some(w)) => Ok(Some(w)),
                    ("sliding_attention", None) => candle_core::bail!(
                        "config.json: layer_types[{i}] is sliding_attention but sliding_window is not set"
                    ),
                    (other, _) => candle_core::bail!(
                        "config.json: layer_types[{i}] {other:?} is not supported (supported: full_attention, sliding_attention)"
                    ),
                })
                .collect();
        }
        Ok(match self.model_type.as_str() {
            "mistral" | "phi3" => vec![self.sliding_window; layers],
            // Qwen2 configs without layer_types: the layers from max_window_layers on slide
            // when use_sliding_window is set (what transformers 5.24's Qwen2Config derives for
            // its layer_types; checked with that library).
            "qwen2" if self.use_sliding_window == Some(true) => {
                let from = self.max_window_layers.unwrap_or(0);
                (0..layers)
                    .map(|i| if i >= from { self.sliding_window } else { None })
                    .collect()
            }
            _ => vec![None; layers],
        })
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

/// Keys and values of one sequence, per layer, in buffers with room to grow: each layer holds
/// `[kv_heads, capacity, head_dim]` keys and values, of which the first `len` positions are
/// filled. A step writes its new positions in place; only when a sequence outgrows the capacity
/// does the layer move to a buffer twice as large (so a long generation copies its cache a
/// logarithmic number of times, not once per token).
#[derive(Debug, Clone, Default)]
pub struct KvCache {
    layers: Vec<LayerCache>,
    len: usize,
}

/// The smallest capacity a layer's cache starts with, in positions.
const INITIAL_CAPACITY: usize = 64;

#[derive(Debug, Clone, Default)]
struct LayerCache {
    keys: Vec<f32>,
    values: Vec<f32>,
    capacity: usize,
}

impl LayerCache {
    /// Makes room for `total` positions, keeping the first `filled` of each head.
    fn reserve(&mut self, total: usize, filled: usize, heads: usize, dim: usize) {
        if total <= self.capacity {
            return;
        }
        let capacity = total.next_power_of_two().max(INITIAL_CAPACITY);
        let grow = |old: &[f32], cap: usize| {
            let mut new = vec![0f32; heads * capacity * dim];
            for g in 0..heads {
                new[g * capacity * dim..(g * capacity + filled) * dim]
                    .copy_from_slice(&old[g * cap * dim..(g * cap + filled) * dim]);
            }
            new
        };
        self.keys = grow(&self.keys, self.capacity);
        self.values = grow(&self.values, self.capacity);
        self.capacity = capacity;
    }

    /// Writes `len` new positions from `past` on; `k` and `v` are `[len, heads * dim]`.
    fn write(&mut self, past: usize, k: &[f32], v: &[f32], heads: usize, dim: usize) {
        let len = k.len() / (heads * dim);
        for j in 0..len {
            for g in 0..heads {
                let src = (j * heads + g) * dim;
                let dst = (g * self.capacity + past + j) * dim;
                self.keys[dst..dst + dim].copy_from_slice(&k[src..src + dim]);
                self.values[dst..dst + dim].copy_from_slice(&v[src..src + dim]);
            }
        }
    }

    /// A layer holding the first `len` positions of this one, with room for exactly `capacity`
    /// (at least `len`).
    fn prefix(&self, len: usize, capacity: usize, heads: usize, dim: usize) -> LayerCache {
        let capacity = capacity.max(len);
        let mut out = LayerCache {
            keys: vec![0f32; heads * capacity * dim],
            values: vec![0f32; heads * capacity * dim],
            capacity,
        };
        for g in 0..heads {
            let (k, v) = self.head(g, len, dim);
            let dst = g * out.capacity * dim;
            out.keys[dst..dst + len * dim].copy_from_slice(k);
            out.values[dst..dst + len * dim].copy_from_slice(v);
        }
        out
    }

    /// The first `len` keys and values of head `g`, `[len, dim]` each.
    fn head(&self, g: usize, len: usize, dim: usize) -> (&[f32], &[f32]) {
        let start = g * self.capacity * dim;
        (
            &self.keys[start..start + len * dim],
            &self.values[start..start + len * dim],
        )
    }
}

impl KvCache {
    /// Tokens held so far.
    pub fn len(&self) -> usize {
        self.len
    }

    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Bytes held by the cache (its capacity, filled or not).
    pub fn bytes(&self) -> usize {
        self.layers
            .iter()
            .map(|l| (l.keys.len() + l.values.len()) * 4)
            .sum()
    }

    /// Positions every layer has room for before it must grow.
    pub fn capacity(&self) -> usize {
        self.layers.iter().map(|l| l.capacity).min().unwrap_or(0)
    }
}

/// Rotary tables, `[positions, head_dim / 2]` each.
struct Rotary {
    cos: Vec<f32>,
    sin: Vec<f32>,
    half: usize,
}

impl Rotary {
    fn new(cfg: &LlamaConfig) -> Result<Self> {
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
        Ok(Self { cos, sin, half })
    }

    /// Rotates `x [rows, heads, 2 * half]` in place by each row's position (the halves
    /// convention: the first half of the head dimension pairs with the second).
    fn apply(&self, x: &mut [f32], positions: &[u32], heads: usize) {
        let half = self.half;
        let d = 2 * half;
        for (r, &p) in positions.iter().enumerate() {
            let p = p as usize;
            let cos = &self.cos[p * half..(p + 1) * half];
            let sin = &self.sin[p * half..(p + 1) * half];
            for h in 0..heads {
                let (x1, x2) = x[(r * heads + h) * d..(r * heads + h + 1) * d].split_at_mut(half);
                for i in 0..half {
                    let (a, b) = (x1[i], x2[i]);
                    x1[i] = a * cos[i] - b * sin[i];
                    x2[i] = b * cos[i] + a * sin[i];
                }
            }
        }
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
    /// Positions a query attends to at most (its own included); `None`: all earlier ones.
    window: Option<usize>,
    act: Activation,
}

impl Block {
    fn new(
        cfg: &LlamaConfig,
        layer: usize,
        window: Option<usize>,
        vb: &Weights<'_>,
    ) -> Result<Self> {
        let h = cfg.hidden_size;
        let d = cfg.head_dim();
        let q_out = cfg.num_attention_heads * d;
        let kv_out = cfg.kv_heads() * d;
        let i = cfg.intermediate_size;
        let lin = |m: Module, inp: usize, out: usize, name: &str| {
            AdaptedLinear::load(Site::new(layer, m), inp, out, &vb.pp(name))
        };
        // Phi-3 fuses q, k and v into one projection (rows in that order) and gate and up into
        // another (gate first); each part is held as its own layer.
        let part = |m: Module, fused: &str, fused_out: usize, rows: std::ops::Range<usize>| {
            AdaptedLinear::load_rows(Site::new(layer, m), h, fused_out, rows, &vb.pp(fused))
        };
        let ((q, k, v), (gate, up)) = if cfg.model_type == "phi3" {
            let qkv = q_out + 2 * kv_out;
            (
                (
                    part(Module::AttnQ, "self_attn.qkv_proj", qkv, 0..q_out)?,
                    part(
                        Module::AttnK,
                        "self_attn.qkv_proj",
                        qkv,
                        q_out..q_out + kv_out,
                    )?,
                    part(
                        Module::AttnV,
                        "self_attn.qkv_proj",
                        qkv,
                        q_out + kv_out..qkv,
                    )?,
                ),
                (
                    part(Module::MlpGate, "mlp.gate_up_proj", 2 * i, 0..i)?,
                    part(Module::MlpUp, "mlp.gate_up_proj", 2 * i, i..2 * i)?,
                ),
            )
        } else {
            (
                (
                    lin(Module::AttnQ, h, q_out, "self_attn.q_proj")?,
                    lin(Module::AttnK, h, kv_out, "self_attn.k_proj")?,
                    lin(Module::AttnV, h, kv_out, "self_attn.v_proj")?,
                ),
                (
                    lin(Module::MlpGate, h, i, "mlp.gate_proj")?,
                    lin(Module::MlpUp, h, i, "mlp.up_proj")?,
                ),
            )
        };
        Ok(Self {
            input_norm: rms_norm(cfg, &vb.pp("input_layernorm"))?,
            q,
            k,
            v,
            o: lin(Module::AttnO, q_out, h, "self_attn.o_proj")?,
            post_norm: rms_norm(cfg, &vb.pp("post_attention_layernorm"))?,
            gate,
            up,
            down: lin(Module::MlpDown, i, h, "mlp.down_proj")?,
            heads: cfg.num_attention_heads,
            kv_heads: cfg.kv_heads(),
            head_dim: d,
            window,
            act: cfg.activation()?,
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
        positions: &[u32],
        adapters: &RowAdapters,
    ) -> Result<Tensor> {
        let rows = x.dim(0)?;
        let (hq, hkv, d) = (self.heads, self.kv_heads, self.head_dim);
        let h = self.input_norm.forward(x)?;
        let (mut q, mut k, v) = with_f32(&h, |hs| -> Result<_> {
            Ok((
                self.q.forward_rows(hs, rows, adapters)?,
                self.k.forward_rows(hs, rows, adapters)?,
                self.v.forward_rows(hs, rows, adapters)?,
            ))
        })??;
        rotary.apply(&mut q, positions, hq);
        rotary.apply(&mut k, positions, hkv);
        for (&(start, len), cache) in spans.iter().zip(caches.iter_mut()) {
            let past = cache.len;
            let lc = &mut cache.layers[layer];
            lc.reserve(past + len, past, hkv, d);
            let span = start * hkv * d..(start + len) * hkv * d;
            lc.write(past, &k[span.clone()], &v[span], hkv, d);
        }
        let caches: Vec<&KvCache> = caches.iter().map(|c| &**c).collect();
        let attn = attention(&q, spans, &caches, layer, (hq, hkv, d), self.window);
        let attn = Tensor::from_vec(attn, (rows, hq * d), x.device())?;
        let x = (x + self.o.forward(&attn, adapters)?)?;
        let h = self.post_norm.forward(&x)?;
        let gate = self.gate.forward(&h, adapters)?;
        let gate = match self.act {
            Activation::Silu => gate.silu()?,
            Activation::GeluTanh => gate.gelu()?,
        };
        let gated = (gate * self.up.forward(&h, adapters)?)?;
        x + self.down.forward(&gated, adapters)?
    }
}

/// Causal attention of every new row over its own sequence's cache (which already holds the
/// new positions): `q [rows, heads, d]` → `[rows, heads * d]`. One task per query head; each
/// score row is a dot product per cached position, softmaxed in place, and the output a sum of
/// value rows weighted by it, all on plain slices (no temporary tensors, no mask).
fn attention(
    q: &[f32],
    spans: &[(usize, usize)],
    caches: &[&KvCache],
    layer: usize,
    (hq, hkv, d): (usize, usize, usize),
    window: Option<usize>,
) -> Vec<f32> {
    use rayon::prelude::*;
    let rows = q.len() / (hq * d);
    let groups = hq / hkv;
    let scale = 1.0 / (d as f32).sqrt();
    let longest = spans
        .iter()
        .zip(caches)
        .map(|(&(_, len), c)| c.len + len)
        .max()
        .unwrap_or(0);
    // Head-major while computing, so each task owns one contiguous block.
    let mut by_head = vec![0f32; hq * rows * d];
    let one_head = |h: usize, out: &mut [f32]| {
        let g = h / groups;
        let mut scores = vec![0f32; longest];
        for (&(start, len), cache) in spans.iter().zip(caches) {
            let past = cache.len;
            let (keys, values) = cache.layers[layer].head(g, past + len, d);
            for j in 0..len {
                let row = start + j;
                let qr = &q[(row * hq + h) * d..(row * hq + h + 1) * d];
                let seen = past + j + 1;
                // With a window, the query sees only the last `w` positions, its own included.
                let first = window.map_or(0, |w| seen.saturating_sub(w));
                let s = &mut scores[..seen - first];
                let mut max = f32::NEG_INFINITY;
                for (l, sl) in (first..).zip(s.iter_mut()) {
                    *sl = dot(qr, &keys[l * d..(l + 1) * d]) * scale;
                    max = max.max(*sl);
                }
                let mut sum = 0f32;
                for sl in s.iter_mut() {
                    *sl = (*sl - max).exp();
                    sum += *sl;
                }
                let o = &mut out[row * d..(row + 1) * d];
                o.fill(0.0);
                for (l, &p) in (first..).zip(s.iter()) {
                    axpy(o, p / sum, &values[l * d..(l + 1) * d]);
                }
            }
        }
    };
    let work: usize = spans
        .iter()
        .zip(caches)
        .map(|(&(_, len), c)| len * (c.len + len))
        .sum::<usize>()
        * hq
        * d;
    if work < 1 << 16 {
        by_head
            .chunks_mut(rows * d)
            .enumerate()
            .for_each(|(h, out)| one_head(h, out));
    } else {
        by_head
            .par_chunks_mut(rows * d)
            .enumerate()
            .for_each(|(h, out)| one_head(h, out));
    }
    let mut out = vec![0f32; rows * hq * d];
    for h in 0..hq {
        for r in 0..rows {
            out[(r * hq + h) * d..(r * hq + h + 1) * d]
                .copy_from_slice(&by_head[(h * rows + r) * d..(h * rows + r + 1) * d]);
        }
    }
    out
}

/// An RMS norm over the hidden size; Gemma's weights are offsets from 1 (it scales by
/// `1 + weight`), so 1 is added once at load.
fn rms_norm(cfg: &LlamaConfig, w: &Weights<'_>) -> Result<RmsNorm> {
    let weight = w.tensor("weight", &[cfg.hidden_size])?;
    let weight = if cfg.is_gemma() {
        weight.affine(1.0, 1.0)?
    } else {
        weight
    };
    Ok(RmsNorm::new(weight, cfg.rms_norm_eps))
}

/// A Llama-family decoder.
pub struct LlamaModel {
    /// The token embedding table `[vocab, hidden]`, held in the model's weight format and read
    /// one row per token.
    embed: Arc<PackedWeight>,
    blocks: Vec<Block>,
    norm: RmsNorm,
    /// The output projection, packed for the projection kernel; with tied embeddings it is the
    /// embedding table itself (one copy).
    lm_head: Arc<PackedWeight>,
    rotary: Rotary,
    pub config: LlamaConfig,
}

impl LlamaModel {
    /// Builds the decoder from `vb` at the checkpoint root (tensor names `model.*`, `lm_head.*`),
    /// every matrix held in `vb.format`.
    pub fn new(cfg: &LlamaConfig, vb: &Weights<'_>) -> Result<Self> {
        if !cfg.num_attention_heads.is_multiple_of(cfg.kv_heads()) {
            candle_core::bail!(
                "config.json: num_attention_heads {} is not a multiple of num_key_value_heads {}",
                cfg.num_attention_heads,
                cfg.kv_heads()
            );
        }
        cfg.check_supported()?;
        let m = vb.pp("model");
        let (vocab, h) = (cfg.vocab_size, cfg.hidden_size);
        let embed = Arc::new(m.pp("embed_tokens").packed("weight", vocab, h)?);
        let blocks = cfg
            .windows()?
            .into_iter()
            .enumerate()
            .map(|(i, w)| Block::new(cfg, i, w, &m.pp(format!("layers.{i}"))))
            .collect::<Result<Vec<_>>>()?;
        let norm = rms_norm(cfg, &m.pp("norm"))?;
        let lm_head = if cfg.tied() {
            embed.clone()
        } else {
            Arc::new(vb.packed("lm_head.weight", vocab, h)?)
        };
        let rotary = Rotary::new(cfg)?;
        Ok(Self {
            embed,
            blocks,
            norm,
            lm_head,
            rotary,
            config: cfg.clone(),
        })
    }

    /// Bytes one position of a sequence's KV cache holds (keys and values of every layer, f32).
    pub fn kv_bytes_per_position(&self) -> u64 {
        (self.blocks.len() * 2 * self.config.kv_heads() * self.config.head_dim() * 4) as u64
    }

    /// A cache for one new sequence.
    pub fn new_cache(&self) -> KvCache {
        KvCache {
            layers: vec![LayerCache::default(); self.blocks.len()],
            len: 0,
        }
    }

    /// A cache holding the first `len` positions of `cache` (a prompt's shared beginning), with
    /// room for `capacity` positions before it must grow.
    pub fn cache_prefix(&self, cache: &KvCache, len: usize, capacity: usize) -> KvCache {
        assert!(
            len <= cache.len,
            "a prefix of at most the cache's {} positions",
            cache.len
        );
        let (heads, dim) = (self.config.kv_heads(), self.config.head_dim());
        KvCache {
            layers: cache
                .layers
                .iter()
                .map(|l| l.prefix(len, capacity, heads, dim))
                .collect(),
            len,
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
        let dev = candle_core::Device::Cpu;
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
        let h = self.config.hidden_size;
        let mut table = vec![0f32; rows * h];
        for (row, &id) in table.chunks_mut(h).zip(&ids) {
            if id as usize >= self.config.vocab_size {
                candle_core::bail!(
                    "token id {id} is outside the vocabulary of {}",
                    self.config.vocab_size
                );
            }
            self.embed.row_into(id as usize, row);
            if let Some(scale) = self.config.embed_scale() {
                row.iter_mut().for_each(|v| *v *= scale);
            }
        }
        let mut x = Tensor::from_vec(table, (rows, h), &dev)?;
        let blocks = |x: &mut Tensor, caches: &mut [&mut KvCache]| -> Result<()> {
            for (layer, block) in self.blocks.iter().enumerate() {
                *x = block.forward(layer, x, &spans, caches, &self.rotary, &positions, adapters)?;
            }
            Ok(())
        };
        // Inside the thread pool, where a parallel section is a fork and a join between its
        // workers rather than a hand-over from this thread and a wake-up (see the same choice
        // in `bert`), except where f32 products of many rows go to oneDNN, which is called
        // from outside the pool.
        let library = self.lm_head.format() == WeightFormat::F32 && rows >= LIBRARY_ROWS_F32;
        if library {
            blocks(&mut x, caches)?;
        } else {
            rayon::scope(|_| blocks(&mut x, caches))?;
        }
        for (cache, seq) in caches.iter_mut().zip(tokens) {
            cache.len += seq.len();
        }
        self.norm.forward(&x)
    }

    /// Logits `[rows, vocab]` of hidden states `[rows, hidden]`.
    pub fn logits(&self, hidden: &Tensor) -> Result<Tensor> {
        let (rows, h) = hidden.dims2()?;
        let vocab = self.config.vocab_size;
        let hidden = hidden.to_dtype(DType::F32)?.contiguous()?;
        if h != self.lm_head.in_features() {
            candle_core::bail!(
                "hidden states have {h} features, the output projection takes {}",
                self.lm_head.in_features()
            );
        }
        let mut out = vec![0f32; rows * vocab];
        with_f32(&hidden, |x| {
            packed_matmul(&mut out, x, rows, &self.lm_head, false)
        })?;
        Tensor::from_vec(out, (rows, vocab), hidden.device())
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

    /// The configuration the model was built from.
    pub fn config(&self) -> &LlamaConfig {
        &self.config
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

    /// The base weight of one targeted matrix, as held (in the model's format).
    pub fn base_weight(&self, site: &Site) -> Option<Arc<PackedWeight>> {
        let block = self.blocks.get(site.layer)?;
        block
            .linears()
            .into_iter()
            .find(|l| l.site() == *site)
            .map(|l| l.packed_weight().clone())
    }

    /// Bytes of every weight held: the matrices in the model's format (the embedding table
    /// once, also when the output head is tied to it), norms in f32.
    pub fn resident_bytes(&self) -> usize {
        let mut n = self.embed.resident_bytes() + self.config.hidden_size * 4;
        if !Arc::ptr_eq(&self.embed, &self.lm_head) {
            n += self.lm_head.resident_bytes();
        }
        for b in &self.blocks {
            n += b
                .linears()
                .iter()
                .map(|l| l.resident_bytes())
                .sum::<usize>();
            n += 2 * self.config.hidden_size * 4;
        }
        n
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::checkpoint::Checkpoint;
    use candle_core::Device;
    use switchyard_kernels::WeightFormat;

    fn values(n: usize, seed: u64, scale: f32) -> Vec<f32> {
        let mut x = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
        (0..n)
            .map(|_| {
                x ^= x << 13;
                x ^= x >> 7;
                x ^= x << 17;
                ((x >> 40) as f32 / (1u64 << 24) as f32 * 2.0 - 1.0) * scale
            })
            .collect()
    }

    /// A tiny random decoder: 2 layers, 4 query heads over 2 key/value heads, 200 positions.
    fn tiny() -> LlamaModel {
        let cfg: LlamaConfig = serde_json::from_value(serde_json::json!({
            "vocab_size": 50, "hidden_size": 32, "intermediate_size": 48,
            "num_hidden_layers": 2, "num_attention_heads": 4, "num_key_value_heads": 2,
            "max_position_embeddings": 200, "rope_theta": 10000.0
        }))
        .unwrap();
        let mut tensors = std::collections::HashMap::new();
        let mut seed = 0;
        let mut put = |name: String, shape: &[usize], scale: f32| {
            seed += 1;
            let n = shape.iter().product();
            let t = Tensor::from_vec(values(n, seed, scale), shape, &Device::Cpu).unwrap();
            tensors.insert(name, t);
        };
        put("model.embed_tokens.weight".into(), &[50, 32], 1.0);
        put("lm_head.weight".into(), &[50, 32], 0.3);
        put("model.norm.weight".into(), &[32], 1.0);
        for l in 0..2 {
            let p = format!("model.layers.{l}");
            for (n, shape) in [
                ("self_attn.q_proj", [32, 32]),
                ("self_attn.k_proj", [16, 32]),
                ("self_attn.v_proj", [16, 32]),
                ("self_attn.o_proj", [32, 32]),
                ("mlp.gate_proj", [48, 32]),
                ("mlp.up_proj", [48, 32]),
                ("mlp.down_proj", [32, 48]),
            ] {
                put(format!("{p}.{n}.weight"), &shape, 0.4);
            }
            put(format!("{p}.input_layernorm.weight"), &[32], 1.0);
            put(format!("{p}.post_attention_layernorm.weight"), &[32], 1.0);
        }
        let ckpt = Checkpoint::from_tensors(serde_json::Value::Null, &tensors).unwrap();
        LlamaModel::new(&cfg, &Weights::new(&ckpt, WeightFormat::F32)).unwrap()
    }

    fn max_abs(a: &[f32], b: &[f32]) -> f32 {
        a.iter()
            .zip(b)
            .map(|(x, y)| (x - y).abs())
            .fold(0.0, f32::max)
    }

    #[test]
    fn a_cache_grown_token_by_token_past_its_capacity_gives_the_full_sequence_logits() {
        let model = tiny();
        let tokens: Vec<u32> = (0..150).map(|i| (i * 7 % 50) as u32).collect();
        // The whole sequence at once: one cache sized for it, causal attention inside the step.
        let mut whole = model.new_cache();
        let hidden = model
            .forward_hidden(&[&tokens], &mut [&mut whole], &RowAdapters::base(150))
            .unwrap();
        let want: Vec<Vec<f32>> = model.logits(&hidden).unwrap().to_vec2().unwrap();
        assert_eq!(whole.capacity(), 256);

        // A short prompt, then one token per step: the cache starts at 64 positions and moves
        // to 128 and then 256 on the way, keeping what it held.
        let mut cache = model.new_cache();
        let first = model
            .forward_last(&[&tokens[..10]], &mut [&mut cache], &RowAdapters::base(10))
            .unwrap()
            .to_vec2::<f32>()
            .unwrap();
        assert_eq!(cache.capacity(), INITIAL_CAPACITY);
        assert!(max_abs(&first[0], &want[9]) < 1e-4);
        let mut capacities = vec![cache.capacity()];
        for (p, t) in tokens.iter().enumerate().skip(10) {
            let got = model
                .forward_last(&[&[*t]], &mut [&mut cache], &RowAdapters::base(1))
                .unwrap()
                .to_vec2::<f32>()
                .unwrap();
            let d = max_abs(&got[0], &want[p]);
            assert!(d < 1e-4, "position {p}: logits differ by {d}");
            if capacities.last() != Some(&cache.capacity()) {
                capacities.push(cache.capacity());
            }
        }
        assert_eq!(cache.len(), 150);
        assert_eq!(capacities, vec![64, 128, 256]);
        assert_eq!(cache.bytes(), 2 * 2 * (2 * 256 * 8) * 4);
    }

    #[test]
    fn a_ragged_batch_step_equals_each_sequence_stepped_alone() {
        let model = tiny();
        let a: Vec<u32> = (0..70).map(|i| (i * 3 % 50) as u32).collect();
        let b: Vec<u32> = (0..5).map(|i| (i * 11 % 50) as u32).collect();
        let (mut ca, mut cb) = (model.new_cache(), model.new_cache());
        model
            .forward_last(&[&a], &mut [&mut ca], &RowAdapters::base(70))
            .unwrap();
        model
            .forward_last(&[&b], &mut [&mut cb], &RowAdapters::base(5))
            .unwrap();
        let (mut sa, mut sb) = (ca.clone(), cb.clone());
        // One decode token for the first, three new tokens for the second, in one pass.
        let together = model
            .forward_last(
                &[&[4], &[5, 6, 7]],
                &mut [&mut ca, &mut cb],
                &RowAdapters::base(4),
            )
            .unwrap()
            .to_vec2::<f32>()
            .unwrap();
        let alone_a = model
            .forward_last(&[&[4]], &mut [&mut sa], &RowAdapters::base(1))
            .unwrap()
            .to_vec2::<f32>()
            .unwrap();
        let alone_b = model
            .forward_last(&[&[5, 6, 7]], &mut [&mut sb], &RowAdapters::base(3))
            .unwrap()
            .to_vec2::<f32>()
            .unwrap();
        assert!(max_abs(&together[0], &alone_a[0]) < 1e-5);
        assert!(max_abs(&together[1], &alone_b[0]) < 1e-5);
        assert_eq!((ca.len(), cb.len()), (71, 8));
    }

    /// A prompt's shared beginning copied out of another prompt's cache, then the rest prefilled,
    /// gives the logits of the whole prompt prefilled from nothing.
    #[test]
    fn a_copied_cache_prefix_continues_like_a_fresh_prefill() {
        let model = tiny();
        let shared: Vec<u32> = (0..90).map(|i| (i * 7 % 50) as u32).collect();
        let first = [shared.clone(), vec![1, 2, 3]].concat();
        let second = [shared.clone(), vec![9, 8]].concat();
        let mut stored = model.new_cache();
        model
            .forward_last(&[&first], &mut [&mut stored], &RowAdapters::base(93))
            .unwrap();
        let mut reused = model.cache_prefix(&stored, 90, 100);
        assert_eq!((reused.len(), reused.capacity()), (90, 100));
        let got = model
            .forward_last(&[&[9, 8]], &mut [&mut reused], &RowAdapters::base(2))
            .unwrap()
            .to_vec2::<f32>()
            .unwrap();
        let mut fresh = model.new_cache();
        let want = model
            .forward_last(&[&second], &mut [&mut fresh], &RowAdapters::base(92))
            .unwrap()
            .to_vec2::<f32>()
            .unwrap();
        let d = max_abs(&got[0], &want[0]);
        assert!(d < 1e-5, "logits differ by {d}");
        // It grows past its capacity like any cache.
        let more: Vec<u32> = (0..20).collect();
        model
            .forward_last(&[&more], &mut [&mut reused], &RowAdapters::base(20))
            .unwrap();
        assert_eq!(reused.len(), 112);
    }

    fn config(extra: serde_json::Value) -> LlamaConfig {
        let mut v = serde_json::json!({
            "vocab_size": 8, "hidden_size": 8, "intermediate_size": 8,
            "num_hidden_layers": 3, "num_attention_heads": 2,
        });
        v.as_object_mut()
            .unwrap()
            .extend(extra.as_object().unwrap().clone());
        serde_json::from_value(v).unwrap()
    }

    fn refusal(extra: serde_json::Value) -> String {
        config(extra).check_supported().unwrap_err().to_string()
    }

    #[test]
    fn unsupported_config_values_are_refused_naming_the_field() {
        assert!(refusal(serde_json::json!({"model_type": "gpt2"})).contains("model_type \"gpt2\""));
        assert!(
            refusal(serde_json::json!({"model_type": "mistral", "hidden_act": "gelu"}))
                .contains("hidden_act \"gelu\"")
        );
        assert!(
            refusal(serde_json::json!({"layer_types": ["full_attention", "chunked_attention", "full_attention"]}))
                .contains("layer_types[1] \"chunked_attention\"")
        );
        assert!(
            refusal(serde_json::json!({"layer_types": ["full_attention"]}))
                .contains("layer_types lists 1 layers; num_hidden_layers is 3")
        );
        assert!(
            refusal(serde_json::json!({"layer_types": ["full_attention", "sliding_attention", "full_attention"]}))
                .contains("layer_types[1] is sliding_attention but sliding_window is not set")
        );
        assert!(refusal(serde_json::json!({"sliding_window": 0})).contains("sliding_window 0"));
        assert!(
            refusal(serde_json::json!({"model_type": "phi3",
                "rope_parameters": {"rope_type": "default", "partial_rotary_factor": 0.75}}))
            .contains("partial_rotary_factor 0.75")
        );
        assert!(
            refusal(serde_json::json!({"model_type": "gemma", "hidden_activation": "gelu"}))
                .contains("hidden_activation \"gelu\"")
        );
    }

    #[test]
    fn each_family_reads_its_windows_from_its_own_fields() {
        let w = |extra| config(extra).windows().unwrap();
        assert_eq!(
            w(serde_json::json!({"sliding_window": 4})),
            vec![None; 3],
            "llama has none"
        );
        assert_eq!(
            w(serde_json::json!({"model_type": "mistral", "sliding_window": 4})),
            vec![Some(4); 3]
        );
        assert_eq!(
            w(
                serde_json::json!({"model_type": "qwen2", "sliding_window": 4, "use_sliding_window": false})
            ),
            vec![None; 3]
        );
        assert_eq!(
            w(
                serde_json::json!({"model_type": "qwen2", "sliding_window": 4,
                "use_sliding_window": true, "max_window_layers": 2})
            ),
            vec![None, None, Some(4)]
        );
        assert_eq!(
            w(
                serde_json::json!({"model_type": "mistral", "sliding_window": 4,
                "layer_types": ["sliding_attention", "full_attention", "sliding_attention"]})
            ),
            vec![Some(4), None, Some(4)]
        );
    }
}
