//! The encoder family (BERT and its small descendants such as MiniLM): embeddings, a stack of
//! post-norm transformer layers, and the hidden states they give. Pooling lives in
//! [`crate::model::embedder`]. Every projection is an [`AdaptedLinear`].

use std::collections::BTreeMap;

use candle_core::{D, DType, Result, Tensor};
use candle_nn::{Embedding, LayerNorm, Module as _, VarBuilder};
use serde::Deserialize;
use switchyard_adapters::kernels::{
    PackedWeight, gelu_erf_in_place, packed_matmul_strided, softmax_rows_in_place, with_f32,
};
use switchyard_adapters::{BaseSpec, Module, Site};

use crate::model::linear::{AdaptedLinear, RowAdapters};

/// The fields of a BERT-family config.json this runtime reads.
#[derive(Debug, Clone, Deserialize)]
pub struct BertConfig {
    pub vocab_size: usize,
    pub hidden_size: usize,
    pub num_hidden_layers: usize,
    pub num_attention_heads: usize,
    pub intermediate_size: usize,
    #[serde(default = "default_act")]
    pub hidden_act: String,
    pub max_position_embeddings: usize,
    #[serde(default = "default_type_vocab")]
    pub type_vocab_size: usize,
    #[serde(default = "default_ln_eps")]
    pub layer_norm_eps: f64,
    #[serde(default)]
    pub position_embedding_type: Option<String>,
}

fn default_act() -> String {
    "gelu".to_owned()
}
fn default_type_vocab() -> usize {
    2
}
fn default_ln_eps() -> f64 {
    1e-12
}

struct Embeddings {
    word: Embedding,
    position: Embedding,
    token_type: Embedding,
    norm: LayerNorm,
}

impl Embeddings {
    fn new(cfg: &BertConfig, vb: VarBuilder) -> Result<Self> {
        Ok(Self {
            word: candle_nn::embedding(cfg.vocab_size, cfg.hidden_size, vb.pp("word_embeddings"))?,
            position: candle_nn::embedding(
                cfg.max_position_embeddings,
                cfg.hidden_size,
                vb.pp("position_embeddings"),
            )?,
            token_type: candle_nn::embedding(
                cfg.type_vocab_size,
                cfg.hidden_size,
                vb.pp("token_type_embeddings"),
            )?,
            norm: candle_nn::layer_norm(cfg.hidden_size, cfg.layer_norm_eps, vb.pp("LayerNorm"))?,
        })
    }

    fn forward(&self, ids: &Tensor, type_ids: &Tensor) -> Result<Tensor> {
        let (_, t) = ids.dims2()?;
        let positions = Tensor::arange(0u32, t as u32, ids.device())?;
        let x = self
            .word
            .forward(ids)?
            .add(&self.token_type.forward(type_ids)?)?
            .broadcast_add(&self.position.forward(&positions)?)?;
        self.norm.forward(&x)
    }
}

struct Layer {
    q: AdaptedLinear,
    k: AdaptedLinear,
    v: AdaptedLinear,
    o: AdaptedLinear,
    attn_norm: LayerNorm,
    up: AdaptedLinear,
    down: AdaptedLinear,
    out_norm: LayerNorm,
    heads: usize,
    act: Activation,
}

#[derive(Clone, Copy)]
enum Activation {
    GeluErf,
    GeluTanh,
    Relu,
}

impl Layer {
    fn new(cfg: &BertConfig, layer: usize, vb: VarBuilder) -> Result<Self> {
        let h = cfg.hidden_size;
        let i = cfg.intermediate_size;
        let lin = |m: Module, inp: usize, out: usize, vb: VarBuilder| {
            AdaptedLinear::load(Site::new(layer, m), inp, out, vb)
        };
        let act = match cfg.hidden_act.as_str() {
            "gelu" => Activation::GeluErf,
            "gelu_new" | "gelu_pytorch_tanh" => Activation::GeluTanh,
            "relu" => Activation::Relu,
            other => candle_core::bail!("config.json hidden_act {other:?} is not supported"),
        };
        Ok(Self {
            q: lin(Module::AttnQ, h, h, vb.pp("attention.self.query"))?,
            k: lin(Module::AttnK, h, h, vb.pp("attention.self.key"))?,
            v: lin(Module::AttnV, h, h, vb.pp("attention.self.value"))?,
            o: lin(Module::AttnO, h, h, vb.pp("attention.output.dense"))?,
            attn_norm: candle_nn::layer_norm(
                h,
                cfg.layer_norm_eps,
                vb.pp("attention.output.LayerNorm"),
            )?,
            up: lin(Module::MlpUp, h, i, vb.pp("intermediate.dense"))?,
            down: lin(Module::MlpDown, i, h, vb.pp("output.dense"))?,
            out_norm: candle_nn::layer_norm(h, cfg.layer_norm_eps, vb.pp("output.LayerNorm"))?,
            heads: cfg.num_attention_heads,
            act,
        })
    }

    fn linears(&self) -> [&AdaptedLinear; 6] {
        [&self.q, &self.k, &self.v, &self.o, &self.up, &self.down]
    }

    /// `x [b, t, h]`; `key_bias [b, t]` is added to every score of that key (0 for a real
    /// token, a large negative number for padding).
    fn forward(&self, x: &Tensor, key_bias: &[f32], adapters: &RowAdapters) -> Result<Tensor> {
        let (b, t, h) = x.dims3()?;
        let x = x.contiguous()?;
        let (q, k, v) = with_f32(&x, |xs| -> Result<_> {
            Ok((
                self.q.forward_rows(xs, b * t, adapters)?,
                self.k.forward_rows(xs, b * t, adapters)?,
                self.v.forward_rows(xs, b * t, adapters)?,
            ))
        })??;
        let ctx = attention(&q, &k, &v, key_bias, b, t, h, self.heads);
        let ctx = Tensor::from_vec(ctx, (b, t, h), x.device())?;
        let x = &x;
        let attn = self
            .attn_norm
            .forward(&(self.o.forward(&ctx, adapters)? + x)?)?;
        let inner = match self.act {
            Activation::GeluErf => {
                // The projection and the exact GELU on one buffer, in place.
                let attn = attn.contiguous()?;
                let rows = b * t;
                let mut inner = with_f32(&attn, |a| self.up.forward_rows(a, rows, adapters))??;
                gelu_erf_in_place(&mut inner);
                let width = inner.len() / rows.max(1);
                Tensor::from_vec(inner, (b, t, width), attn.device())?
            }
            Activation::GeluTanh => self.up.forward(&attn, adapters)?.gelu()?,
            Activation::Relu => self.up.forward(&attn, adapters)?.relu()?,
        };
        self.out_norm
            .forward(&(self.down.forward(&inner, adapters)? + attn)?)
    }
}

/// Multi-head self-attention over `q`, `k`, `v` `[b * t, h]` (heads side by side in each row),
/// giving the context `[b * t, h]` in the same layout. Per sequence and head: that head's keys
/// and (transposed) values are packed for the projection kernel, the scores `Q K^T` run through
/// it straight from the strided query columns, then the scale, key bias and softmax (a
/// vectorised exp) in place on the score rows, then `P V` through the kernel again, written
/// straight into that head's columns of the output. Sequences run in parallel, one task each.
#[allow(clippy::too_many_arguments)]
fn attention(
    q: &[f32],
    k: &[f32],
    v: &[f32],
    key_bias: &[f32],
    b: usize,
    t: usize,
    h: usize,
    heads: usize,
) -> Vec<f32> {
    use rayon::prelude::*;
    let dh = h / heads;
    let scale = 1.0 / (dh as f32).sqrt();
    let mut ctx = vec![0f32; b * t * h];
    let one = |s: usize, out: &mut [f32]| {
        let mut scores = vec![0f32; t * t];
        let mut keys = PackedWeight::empty();
        let mut values = PackedWeight::empty();
        let bias = &key_bias[s * t..(s + 1) * t];
        let base = s * t * h;
        for hd in 0..heads {
            let off = base + hd * dh;
            // Keys as a [t, dh] weight, values transposed as a [dh, t] weight.
            keys.repack_strided(&k[off..], t, dh, h, 1);
            values.repack_strided(&v[off..], dh, t, 1, h);
            packed_matmul_strided(&mut scores, t, &q[off..], h, t, &keys, false);
            softmax_rows_in_place(&mut scores, t, scale, bias);
            packed_matmul_strided(&mut out[hd * dh..], h, &scores, t, t, &values, false);
        }
    };
    if b * heads * t * t * dh < 1 << 18 {
        ctx.chunks_mut(t * h)
            .enumerate()
            .for_each(|(s, out)| one(s, out));
    } else {
        ctx.par_chunks_mut(t * h)
            .enumerate()
            .for_each(|(s, out)| one(s, out));
    }
    ctx
}

/// A BERT-family encoder.
pub struct BertModel {
    embeddings: Embeddings,
    layers: Vec<Layer>,
    pub config: BertConfig,
}

impl BertModel {
    /// Builds the encoder from `vb`, which points at the checkpoint root; a `bert.` prefix on
    /// the tensor names is detected and skipped.
    pub fn new(cfg: &BertConfig, vb: VarBuilder) -> Result<Self> {
        if let Some(kind) = &cfg.position_embedding_type
            && kind != "absolute"
        {
            candle_core::bail!("config.json position_embedding_type {kind:?} is not supported");
        }
        let vb = if vb.contains_tensor("bert.embeddings.word_embeddings.weight") {
            vb.pp("bert")
        } else {
            vb
        };
        let embeddings = Embeddings::new(cfg, vb.pp("embeddings"))?;
        let layers = (0..cfg.num_hidden_layers)
            .map(|i| Layer::new(cfg, i, vb.pp(format!("encoder.layer.{i}"))))
            .collect::<Result<Vec<_>>>()?;
        Ok(Self {
            embeddings,
            layers,
            config: cfg.clone(),
        })
    }

    /// Hidden states `[b, t, hidden]` for token ids `[b, t]` and attention mask `[b, t]` (1 for a
    /// real token, 0 for padding). `adapters` covers `b * t` rows, sequence by sequence.
    pub fn forward(&self, ids: &Tensor, mask: &Tensor, adapters: &RowAdapters) -> Result<Tensor> {
        let _span = tracing::trace_span!("bert_forward").entered();
        let type_ids = ids.zeros_like()?;
        let mut x = self.embeddings.forward(ids, &type_ids)?;
        // Additive mask: 0 where a key is a real token, a large negative number where it is padding.
        let (b, t) = mask.dims2()?;
        let key_bias: Vec<f32> = ((mask.to_dtype(DType::F32)? - 1.0)? * 1e9)?
            .reshape(b * t)?
            .to_vec1()?;
        for layer in &self.layers {
            x = layer.forward(&x, &key_bias, adapters)?;
        }
        Ok(x)
    }

    /// The shape of every matrix an adapter may target, with the base's fingerprint.
    pub fn spec(&self, model_type: &str, fingerprint: String) -> BaseSpec {
        let mut targets = BTreeMap::new();
        for layer in &self.layers {
            for lin in layer.linears() {
                targets.insert(lin.site(), lin.shape());
            }
        }
        BaseSpec {
            model_type: model_type.to_owned(),
            fingerprint,
            num_layers: self.layers.len(),
            hidden_size: self.config.hidden_size,
            targets,
        }
    }

    /// The base weight of one targeted matrix.
    pub fn base_weight(&self, site: &Site) -> Option<Tensor> {
        let layer = self.layers.get(site.layer)?;
        layer
            .linears()
            .into_iter()
            .find(|l| l.site() == *site)
            .and_then(|l| l.weight().ok())
    }
}

/// Mean of the hidden states over real tokens, then L2-normalised: `[b, t, h]` → `[b, h]`.
pub fn mean_pool_normalise(hidden: &Tensor, mask: &Tensor) -> Result<Tensor> {
    let m = mask.to_dtype(DType::F32)?.unsqueeze(D::Minus1)?;
    let summed = hidden.broadcast_mul(&m)?.sum(1)?;
    let counts = m.sum(1)?.clamp(1e-9, f64::MAX)?;
    let mean = summed.broadcast_div(&counts)?;
    let norm = mean
        .sqr()?
        .sum_keepdim(D::Minus1)?
        .sqrt()?
        .clamp(1e-12, f64::MAX)?;
    mean.broadcast_div(&norm)
}
