//! The encoder family (BERT and its descendants: MiniLM, RoBERTa, XLM-R, MPNet): embeddings, a
//! stack of post-norm transformer layers, and the hidden states they give. What MPNet adds (its
//! relative position bias) lives in [`crate::model::mpnet`]; pooling in
//! [`crate::model::embedder`]. Every projection is an [`AdaptedLinear`].

use std::collections::BTreeMap;

use std::sync::Arc;

use candle_core::{DType, Result, Tensor};
use serde::Deserialize;
use switchyard_adapters::{BaseSpec, Module, Site};
use switchyard_kernels::{
    AttendScratch, Head, PackedWeight, WeightFormat, add_layer_norm_in_place, attend_head,
    attend_head_rounded, gelu_erf_in_place, prefetch_to_l2,
};

use crate::model::checkpoint::Weights;
use crate::model::linear::{AdaptedLinear, RowAdapters};
use crate::model::mpnet::{self, RelativePositionBias};

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
    /// `bert`, `roberta`, `xlm-roberta` or `mpnet` (see [`BertConfig::position_offset`]).
    #[serde(default = "default_encoder_type")]
    pub model_type: String,
    #[serde(default)]
    pub pad_token_id: Option<u32>,
    /// MPNet's count of relative position buckets.
    #[serde(default = "default_buckets")]
    pub relative_attention_num_buckets: usize,
}

fn default_buckets() -> usize {
    32
}

fn default_encoder_type() -> String {
    "bert".to_owned()
}

/// The `model_type`s the encoder runtime implements.
pub const ENCODER_TYPES: [&str; 4] = ["bert", "roberta", "xlm-roberta", "mpnet"];

impl BertConfig {
    /// The first position id of a sequence: 0 for BERT; RoBERTa and XLM-R count from
    /// `pad_token_id + 1` (their position table keeps the first rows for padding); MPNet from 2
    /// whatever its `pad_token_id` (transformers' MPNetEmbeddings fixes its padding index at 1).
    pub fn position_offset(&self) -> usize {
        match self.model_type.as_str() {
            "roberta" | "xlm-roberta" => self.pad_token_id.unwrap_or(1) as usize + 1,
            "mpnet" => 2,
            _ => 0,
        }
    }

    fn is_mpnet(&self) -> bool {
        self.model_type == "mpnet"
    }

    /// The most tokens one sequence may have.
    pub fn max_tokens(&self) -> usize {
        self.max_position_embeddings
            .saturating_sub(self.position_offset())
    }
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

/// The input embeddings: the word table is held in the model's weight format (it is the one
/// large matrix besides the projections) and read one row per token; the position table (with
/// token type 0's row added to it) and the layer norm stay f32.
struct Embeddings {
    word: Arc<PackedWeight>,
    /// `[positions, hidden]`: each position's row plus token type 0's (every token has type 0,
    /// one segment per input; MPNet has no token types).
    position: Vec<f32>,
    /// The position id of a sequence's first token.
    position_offset: usize,
    norm: Norm,
}

impl Embeddings {
    fn new(cfg: &BertConfig, vb: &Weights<'_>) -> Result<Self> {
        let h = cfg.hidden_size;
        let table = |name: &str, rows: usize| -> Result<Vec<f32>> {
            vb.pp(name)
                .tensor("weight", &[rows, h])?
                .flatten_all()?
                .to_vec1()
        };
        let mut position = table("position_embeddings", cfg.max_position_embeddings)?;
        if !cfg.is_mpnet() {
            let types = table("token_type_embeddings", cfg.type_vocab_size)?;
            let Some(first) = types.get(..h) else {
                candle_core::bail!("the token type table has no rows");
            };
            for row in position.chunks_mut(h) {
                row.iter_mut().zip(first).for_each(|(p, t)| *p += t);
            }
        }
        Ok(Self {
            word: Arc::new(
                vb.pp("word_embeddings")
                    .packed("weight", cfg.vocab_size, h)?,
            ),
            position,
            position_offset: cfg.position_offset(),
            norm: Norm::load(h, cfg.layer_norm_eps, &vb.pp("LayerNorm"))?,
        })
    }

    /// `[b * t, hidden]` for the token ids of `b` sequences of `t` (row-major): each token's
    /// word row plus its position's, layer-normed, one sequence per task across the pool.
    fn forward(&self, ids: &[u32], b: usize, t: usize) -> Result<Vec<f32>> {
        use rayon::prelude::*;
        let (vocab, h) = (self.word.out_features(), self.word.in_features());
        if let Some(id) = ids.iter().find(|&&id| id as usize >= vocab) {
            candle_core::bail!("token id {id} is outside the vocabulary of {vocab}");
        }
        let positions = self.position.len() / h.max(1);
        if ids.len() != b * t || self.position_offset + t > positions {
            candle_core::bail!(
                "{b} x {t} tokens ({} ids) do not fit the model's {} positions",
                ids.len(),
                positions.saturating_sub(self.position_offset)
            );
        }
        let pos = &self.position[self.position_offset * h..(self.position_offset + t) * h];
        let mut x = vec![0f32; b * t * h];
        if h == 0 || t == 0 {
            return Ok(x);
        }
        let norm = self.norm.after(pos, h)?;
        x.par_chunks_mut(t * h)
            .zip(ids.par_chunks(t))
            .for_each(|(seq, ids)| {
                for (row, &id) in seq.chunks_mut(h).zip(ids) {
                    self.word.row_into(id as usize, row);
                }
                norm(0, seq);
            });
        Ok(x)
    }
}

/// Where a layer's parts sit under `encoder.layer.{i}`, by family.
pub(crate) struct LayerNames {
    pub q: &'static str,
    pub k: &'static str,
    pub v: &'static str,
    pub o: &'static str,
    pub attn_norm: &'static str,
    pub up: &'static str,
    pub down: &'static str,
    pub out_norm: &'static str,
}

/// BERT's names, which RoBERTa and XLM-R keep.
const BERT_LAYER_NAMES: LayerNames = LayerNames {
    q: "attention.self.query",
    k: "attention.self.key",
    v: "attention.self.value",
    o: "attention.output.dense",
    attn_norm: "attention.output.LayerNorm",
    up: "intermediate.dense",
    down: "output.dense",
    out_norm: "output.LayerNorm",
};

struct Layer {
    q: AdaptedLinear,
    k: AdaptedLinear,
    v: AdaptedLinear,
    o: AdaptedLinear,
    attn_norm: Norm,
    up: AdaptedLinear,
    down: AdaptedLinear,
    out_norm: Norm,
    heads: usize,
    act: Activation,
}

#[derive(Clone, Copy)]
enum Activation {
    GeluErf,
    GeluTanh,
    Relu,
}

impl Activation {
    /// The activation on `xs` in place.
    fn apply(self, xs: &mut [f32]) {
        match self {
            Activation::GeluErf => gelu_erf_in_place(xs),
            Activation::GeluTanh => xs.iter_mut().for_each(|v| {
                let u = 0.797_884_6 * (*v + 0.044_715 * *v * *v * *v);
                *v = 0.5 * *v * (1.0 + u.tanh());
            }),
            Activation::Relu => xs.iter_mut().for_each(|v| *v = v.max(0.0)),
        }
    }
}

impl Layer {
    fn new(cfg: &BertConfig, layer: usize, vb: &Weights<'_>) -> Result<Self> {
        let h = cfg.hidden_size;
        let i = cfg.intermediate_size;
        let lin = |m: Module, inp: usize, out: usize, name: &str| {
            AdaptedLinear::load(Site::new(layer, m), inp, out, &vb.pp(name))
        };
        let names = match cfg.is_mpnet() {
            true => &mpnet::LAYER_NAMES,
            false => &BERT_LAYER_NAMES,
        };
        let eps = cfg.layer_norm_eps;
        let act = match cfg.hidden_act.as_str() {
            "gelu" => Activation::GeluErf,
            "gelu_new" | "gelu_pytorch_tanh" => Activation::GeluTanh,
            "relu" => Activation::Relu,
            other => candle_core::bail!("config.json hidden_act {other:?} is not supported"),
        };
        Ok(Self {
            q: lin(Module::AttnQ, h, h, names.q)?,
            k: lin(Module::AttnK, h, h, names.k)?,
            v: lin(Module::AttnV, h, h, names.v)?,
            o: lin(Module::AttnO, h, h, names.o)?,
            attn_norm: Norm::load(h, eps, &vb.pp(names.attn_norm))?,
            up: lin(Module::MlpUp, h, i, names.up)?,
            down: lin(Module::MlpDown, i, h, names.down)?,
            out_norm: Norm::load(h, eps, &vb.pp(names.out_norm))?,
            heads: cfg.num_attention_heads,
            act,
        })
    }

    fn linears(&self) -> [&AdaptedLinear; 6] {
        [&self.q, &self.k, &self.v, &self.o, &self.up, &self.down]
    }

    /// `x [b * t, h]` into `a.out`; `bias` is added to the attention scores. Everything runs
    /// on plain slices in the reused buffers of `a`: the projections write straight into them,
    /// the activation and the residual add with its layer norm run in place.
    fn forward(
        &self,
        x: &[f32],
        b: usize,
        t: usize,
        bias: &ScoreBias<'_>,
        adapters: &RowAdapters,
        a: &mut Activations,
    ) -> Result<()> {
        let rows = b * t;
        let h = x.len() / rows.max(1);
        self.q.forward_rows_into(x, rows, adapters, &mut a.q)?;
        self.k.forward_rows_into(x, rows, adapters, &mut a.k)?;
        self.v.forward_rows_into(x, rows, adapters, &mut a.v)?;
        // A bf16 model's heads round their inputs to bf16 too, as its projections do (and
        // run on the tile unit where the path has it).
        let rounded = self.q.packed_weight().format() == WeightFormat::Bf16;
        let heads = (self.heads, rounded);
        attention(&a.q, &a.k, &a.v, bias, b, t, h, heads, &mut a.ctx);
        // The residual adds with their layer norms and the activation run on each block of
        // rows as the product finishes it, while it is in cache.
        let attn_norm = self.attn_norm.after(x, h)?;
        self.o
            .forward_rows_then(&a.ctx, rows, adapters, &mut a.attn, Some(&attn_norm))?;
        let act = self.act;
        self.up.forward_rows_then(
            &a.attn,
            rows,
            adapters,
            &mut a.inner,
            Some(&|_, block: &mut [f32]| act.apply(block)),
        )?;
        let out_norm = self.out_norm.after(&a.attn, h)?;
        self.down
            .forward_rows_then(&a.inner, rows, adapters, &mut a.out, Some(&out_norm))?;
        Ok(())
    }
}

/// One layer's activations, kept from layer to layer and from call to call (per thread), so a
/// forward pass allocates, faults in and zeroes nothing once they have grown to its batch size.
#[derive(Default)]
struct Activations {
    q: Vec<f32>,
    k: Vec<f32>,
    v: Vec<f32>,
    ctx: Vec<f32>,
    attn: Vec<f32>,
    inner: Vec<f32>,
    out: Vec<f32>,
}

impl Activations {
    fn bytes(&self) -> usize {
        [
            &self.q,
            &self.k,
            &self.v,
            &self.ctx,
            &self.attn,
            &self.inner,
            &self.out,
        ]
        .iter()
        .map(|v| v.capacity() * 4)
        .sum()
    }
}

/// Activations larger than this (a very large batch) are freed after the pass instead of kept:
/// 64 MB holds those of 32 sequences of 128 tokens on a MiniLM-sized encoder.
const KEEP_ACTIVATION_BYTES: usize = 64 << 20;

thread_local! {
    static ACTIVATIONS: std::cell::RefCell<Activations> =
        std::cell::RefCell::new(Activations::default());
}

/// A layer norm's parameters as plain vectors, applied after a residual add in place.
struct Norm {
    gamma: Vec<f32>,
    beta: Vec<f32>,
    eps: f32,
}

impl Norm {
    fn load(size: usize, eps: f64, vb: &Weights<'_>) -> Result<Self> {
        let gamma = vb.tensor("weight", &[size])?.to_vec1()?;
        let beta = if vb.contains("bias") {
            vb.tensor("bias", &[size])?.to_vec1()?
        } else {
            vec![0.0; size]
        };
        Ok(Self {
            gamma,
            beta,
            eps: eps as f32,
        })
    }

    /// `rows <- LayerNorm(rows + residual)` for rows from `first` of a product's output of
    /// `width` columns (the hidden size), `residual` holding every row: the work a projection
    /// runs on its finished rows.
    fn after<'a>(
        &'a self,
        residual: &'a [f32],
        width: usize,
    ) -> Result<impl Fn(usize, &mut [f32]) + Sync + 'a> {
        if width != self.gamma.len() || !residual.len().is_multiple_of(width) {
            candle_core::bail!(
                "layer norm over rows of {width} with {} weights and a residual of {}",
                self.gamma.len(),
                residual.len()
            );
        }
        Ok(move |first: usize, rows: &mut [f32]| {
            let res = &residual[first * width..first * width + rows.len()];
            add_layer_norm_in_place(rows, res, &self.gamma, &self.beta, self.eps);
        })
    }
}

/// What is added to the scaled attention scores before the softmax.
struct ScoreBias<'a> {
    /// `[b, t]`: added to every score of that key (0 for a real token, a large negative number
    /// for padding).
    keys: &'a [f32],
    /// `[heads, t, t]`, the same for every sequence: MPNet's relative position bias.
    positions: Option<&'a [f32]>,
}

/// Multi-head self-attention over `q`, `k`, `v` `[b * t, h]` (heads side by side in each row),
/// giving the context `[b * t, h]` in the same layout. Each sequence and head goes to
/// [`attend_head`] (scores, scale, bias and softmax, then the probabilities times the values),
/// which reads the head's columns in place and writes its columns of the output; with
/// `rounded` (a bf16 model) to [`attend_head_rounded`]. Sequences run in parallel, one task
/// each.
#[allow(clippy::too_many_arguments)]
fn attention(
    q: &[f32],
    k: &[f32],
    v: &[f32],
    bias: &ScoreBias<'_>,
    b: usize,
    t: usize,
    h: usize,
    (heads, rounded): (usize, bool),
    ctx: &mut Vec<f32>,
) {
    use rayon::prelude::*;
    let dh = h / heads;
    let scale = 1.0 / (dh as f32).sqrt();
    // Every value is overwritten: each head writes its columns of every row.
    ctx.resize(b * t * h, 0.0);
    let one = |s: usize, out: &mut [f32]| {
        let mut scratch = AttendScratch::default();
        let keys = &bias.keys[s * t..(s + 1) * t];
        let base = s * t * h;
        // The heads read two lines of each row, a row apart; the sequence's rows are one
        // block in each of q, k and v, asked for all at once.
        for x in [q, k, v] {
            prefetch_to_l2(&x[base..base + t * h]);
        }
        for hd in 0..heads {
            let off = base + hd * dh;
            let head = Head {
                q: &q[off..],
                k: &k[off..],
                v: &v[off..],
                ld: h,
                t,
                dh,
                scale,
                key_bias: keys,
                positions: bias.positions.map(|p| &p[hd * t * t..(hd + 1) * t * t]),
            };
            if rounded {
                attend_head_rounded(&head, &mut out[hd * dh..], h, &mut scratch);
            } else {
                attend_head(&head, &mut out[hd * dh..], h, &mut scratch);
            }
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
}

/// A BERT-family encoder.
pub struct BertModel {
    embeddings: Embeddings,
    layers: Vec<Layer>,
    /// MPNet's, shared by every layer.
    relative_bias: Option<RelativePositionBias>,
    pub config: BertConfig,
}

impl BertModel {
    /// Builds the encoder from `vb`, which points at the checkpoint root; a `bert.`, `roberta.`
    /// or `mpnet.` prefix on the tensor names is detected and skipped. Every matrix is held in
    /// `vb.format`.
    pub fn new(cfg: &BertConfig, vb: &Weights<'_>) -> Result<Self> {
        if let Some(kind) = &cfg.position_embedding_type
            && kind != "absolute"
        {
            candle_core::bail!("config.json position_embedding_type {kind:?} is not supported");
        }
        if !ENCODER_TYPES.contains(&cfg.model_type.as_str()) {
            candle_core::bail!(
                "config.json: model_type {:?} is not an encoder switchyard runs (supported: {})",
                cfg.model_type,
                ENCODER_TYPES.join(", ")
            );
        }
        let vb = ["bert", "roberta", "mpnet"]
            .into_iter()
            .find(|p| vb.contains(&format!("{p}.embeddings.word_embeddings.weight")))
            .map_or_else(|| vb.clone(), |p| vb.pp(p));
        let embeddings = Embeddings::new(cfg, &vb.pp("embeddings"))?;
        let layers = (0..cfg.num_hidden_layers)
            .map(|i| Layer::new(cfg, i, &vb.pp(format!("encoder.layer.{i}"))))
            .collect::<Result<Vec<_>>>()?;
        let relative_bias = match cfg.is_mpnet() {
            true => Some(RelativePositionBias::load(cfg, &vb.pp("encoder"))?),
            false => None,
        };
        Ok(Self {
            embeddings,
            layers,
            relative_bias,
            config: cfg.clone(),
        })
    }

    /// Hidden states `[b, t, hidden]` for token ids `[b, t]` and attention mask `[b, t]` (1 for a
    /// real token, 0 for padding). `adapters` covers `b * t` rows, sequence by sequence.
    pub fn forward(&self, ids: &Tensor, mask: &Tensor, adapters: &RowAdapters) -> Result<Tensor> {
        let _span = tracing::trace_span!("bert_forward").entered();
        let (b, t) = ids.dims2()?;
        let h = self.embeddings.word.in_features();
        let flat: Vec<u32> = ids.flatten_all()?.to_vec1()?;
        let mut x = self.embeddings.forward(&flat, b, t)?;
        // Additive mask: 0 where a key is a real token, a large negative number where it is padding.
        let key_bias: Vec<f32> = ((mask.to_dtype(DType::F32)? - 1.0)? * 1e9)?
            .reshape(b * t)?
            .to_vec1()?;
        if key_bias.len() != b * t {
            candle_core::bail!(
                "attention mask has {} values for {b} x {t} tokens",
                key_bias.len()
            );
        }
        let positions = self.relative_bias.as_ref().map(|r| r.for_length(t));
        let bias = ScoreBias {
            keys: &key_bias,
            positions: positions.as_deref(),
        };
        let layers = |x: &mut Vec<f32>| {
            // Taken out of the thread-local, not borrowed: a rayon wait inside may run other
            // work here.
            let mut acts = ACTIVATIONS.with_borrow_mut(std::mem::take);
            let done = self.layers.iter().try_for_each(|layer| {
                layer.forward(x, b, t, &bias, adapters, &mut acts)?;
                std::mem::swap(x, &mut acts.out);
                Ok::<_, candle_core::Error>(())
            });
            if acts.bytes() <= KEEP_ACTIVATION_BYTES {
                ACTIVATIONS.with_borrow_mut(|a| *a = acts);
            }
            done
        };
        // The layers make dozens of parallel sections per pass; from outside the thread pool
        // each one hands its work to the pool and waits to be woken, which for one sequence
        // costs more than the work (bf16 MiniLM, one 64-token sequence: 3.9 ms on two threads,
        // 2.7 ms on one). So the whole pass runs inside the pool, where a section is a fork
        // and a join between its workers. Not for f32 weights: their large products go to
        // oneDNN, which is only called from outside the pool (see switchyard_kernels::onednn).
        let in_pool = self
            .layers
            .first()
            .is_some_and(|l| l.q.packed_weight().format() != WeightFormat::F32);
        if in_pool {
            rayon::scope(|_| layers(&mut x))?;
        } else {
            layers(&mut x)?;
        }
        Tensor::from_vec(x, (b, t, h), ids.device())
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

    /// The base weight of one targeted matrix, as held (in the model's format).
    pub fn base_weight(&self, site: &Site) -> Option<Arc<PackedWeight>> {
        let layer = self.layers.get(site.layer)?;
        layer
            .linears()
            .into_iter()
            .find(|l| l.site() == *site)
            .map(|l| l.packed_weight().clone())
    }

    /// Bytes of every weight held: the matrices (and the word table) in the model's format,
    /// the rest in f32.
    pub fn resident_bytes(&self) -> usize {
        let e = &self.embeddings;
        let mut n = e.word.resident_bytes()
            + e.position.len() * 4
            + self
                .relative_bias
                .as_ref()
                .map_or(0, |r| r.resident_bytes())
            + 2 * self.config.hidden_size * 4;
        for l in &self.layers {
            n += l
                .linears()
                .iter()
                .map(|x| x.resident_bytes())
                .sum::<usize>();
            n += 4 * self.config.hidden_size * 4;
        }
        n
    }
}
