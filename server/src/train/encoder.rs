//! A differentiable copy of the serving encoder ([`crate::model::bert`]) for training: the same
//! function (embeddings, post-norm layers, mean pooling over real tokens, L2 normalisation),
//! written with plain candle ops that all have a backward pass (the serving path uses fused
//! softmax and layer-norm kernels that have none). The base weights are plain tensors, so they
//! stay frozen; only the low-rank factors ([`LowRankVars`]) and the head are [`Var`]s.

use std::collections::BTreeMap;

use anyhow::{Context, bail};
use candle_core::{D, DType, Device, Tensor, Var};
use candle_nn::VarBuilder;
use rand::Rng;
use switchyard_adapters::{Module, Site};
use switchyard_kernels::{PackedWeight, WeightFormat};

use crate::model::bert::BertConfig;
use crate::model::checkpoint::Checkpoint;

/// A projection of the base: `weight [out, in]`, `bias [out]`.
struct Linear {
    weight: Tensor,
    bias: Tensor,
}

struct Norm {
    weight: Tensor,
    bias: Tensor,
}

struct Layer {
    q: Linear,
    k: Linear,
    v: Linear,
    o: Linear,
    attn_norm: Norm,
    up: Linear,
    down: Linear,
    out_norm: Norm,
}

impl Layer {
    fn linear(&self, module: Module) -> Option<&Linear> {
        match module {
            Module::AttnQ => Some(&self.q),
            Module::AttnK => Some(&self.k),
            Module::AttnV => Some(&self.v),
            Module::AttnO => Some(&self.o),
            Module::MlpUp => Some(&self.up),
            Module::MlpDown => Some(&self.down),
            Module::MlpGate => None,
        }
    }
}

/// The frozen encoder.
pub struct FrozenEncoder {
    word: Tensor,
    position: Tensor,
    token_type: Tensor,
    embed_norm: Norm,
    layers: Vec<Layer>,
    heads: usize,
    eps: f64,
    pub hidden_size: usize,
    /// The checkpoint's own pooling (sentence-transformers files), as serving applies it.
    pooling: crate::model::embedder::Pooling,
}

/// The trainable factors of one adapter: per site `A [r, in]` and `B [out, r]`, scale `alpha / r`.
pub struct LowRankVars {
    pub rank: usize,
    pub alpha: f64,
    pub factors: BTreeMap<Site, (Var, Var)>,
}

impl LowRankVars {
    /// Factors for `modules` in every layer of `encoder`, initialised as in Hu et al. (2021),
    /// section 4.1: `B = 0`, so training starts from the base model exactly, and `A` random,
    /// here uniform in `±1/sqrt(in)` (the bound of a Kaiming-uniform init with `a = sqrt(5)`).
    pub fn init(
        encoder: &FrozenEncoder,
        modules: &[Module],
        rank: usize,
        alpha: f64,
        rng: &mut impl Rng,
    ) -> anyhow::Result<Self> {
        let mut factors = BTreeMap::new();
        for (i, layer) in encoder.layers.iter().enumerate() {
            for &m in modules {
                let Some(lin) = layer.linear(m) else {
                    bail!(
                        "the encoder has no {m} module (it has attn.q, attn.k, attn.v, attn.o, mlp.up, mlp.down)"
                    );
                };
                let (out, inp) = lin.weight.dims2()?;
                if rank > inp.min(out) {
                    bail!(
                        "rank {rank} is above min(in, out) = {} of {m}",
                        inp.min(out)
                    );
                }
                let bound = 1.0 / (inp as f32).sqrt();
                let a: Vec<f32> = (0..rank * inp)
                    .map(|_| rng.random_range(-bound..bound))
                    .collect();
                let a = Var::from_tensor(&Tensor::from_vec(a, (rank, inp), &Device::Cpu)?)?;
                let b = Var::zeros((out, rank), DType::F32, &Device::Cpu)?;
                factors.insert(Site::new(i, m), (a, b));
            }
        }
        Ok(Self {
            rank,
            alpha,
            factors,
        })
    }

    pub fn vars(&self) -> Vec<Var> {
        self.factors
            .values()
            .flat_map(|(a, b)| [a.clone(), b.clone()])
            .collect()
    }

    /// The factors as plain tensors, for a package or for a forward pass that builds no graph.
    pub fn detached(&self) -> BTreeMap<Site, (Tensor, Tensor)> {
        self.factors
            .iter()
            .map(|(s, (a, b))| (*s, (a.as_tensor().detach(), b.as_tensor().detach())))
            .collect()
    }
}

/// The low-rank terms a forward pass adds: per site `(A, B)` and the one scale.
pub struct Deltas<'a> {
    pub factors: &'a BTreeMap<Site, (Tensor, Tensor)>,
    pub scale: f64,
}

/// A matrix as the serving path holds it in `format` (packed by the kernels' rounding rules),
/// back in f32; unchanged for f32.
fn as_held(w: Tensor, format: WeightFormat) -> candle_core::Result<Tensor> {
    if format == WeightFormat::F32 {
        return Ok(w);
    }
    let (out, inp) = w.dims2()?;
    let values = w.flatten_all()?.to_vec1::<f32>()?;
    let packed = PackedWeight::pack_as(&values, out, inp, format)
        .map_err(|e| candle_core::Error::Msg(e.to_string()))?;
    Tensor::from_vec(packed.unpack(), (out, inp), w.device())
}

impl FrozenEncoder {
    /// Reads the encoder weights of a checkpoint (a `bert.` prefix is skipped, as the serving
    /// encoder does).
    pub fn load(ckpt: &Checkpoint) -> anyhow::Result<Self> {
        Self::load_as(ckpt, WeightFormat::F32)
    }

    /// [`FrozenEncoder::load`] with the matrices (the projections and the word table) held as
    /// the serving encoder holds them in `format`: quantised by the same rules and back to f32,
    /// so an adapter is trained against the base it will be served on.
    pub fn load_as(ckpt: &Checkpoint, format: WeightFormat) -> anyhow::Result<Self> {
        let cfg: BertConfig = serde_json::from_value(ckpt.config.clone()).with_context(|| {
            format!(
                "reading {}/config.json as an encoder config",
                ckpt.dir.display()
            )
        })?;
        if cfg.model_type != "bert" {
            bail!(
                "training supports model_type \"bert\"; config.json has {:?} (serving it works; train the adapter elsewhere and bring it in with `adapter pack --rules`)",
                cfg.model_type
            );
        }
        if cfg.hidden_act != "gelu" {
            bail!(
                "training supports hidden_act \"gelu\"; config.json has {:?}",
                cfg.hidden_act
            );
        }
        let pooling = crate::model::embedder::Pooling::read(&ckpt.dir)?;
        let vb = ckpt.var_builder()?;
        let vb = if vb.contains_tensor("bert.embeddings.word_embeddings.weight") {
            vb.pp("bert")
        } else {
            vb
        };
        let h = cfg.hidden_size;
        let i = cfg.intermediate_size;
        let linear = |vb: VarBuilder, inp: usize, out: usize| -> candle_core::Result<Linear> {
            Ok(Linear {
                weight: as_held(vb.get((out, inp), "weight")?, format)?,
                bias: vb.get(out, "bias")?,
            })
        };
        let norm = |vb: VarBuilder| -> candle_core::Result<Norm> {
            Ok(Norm {
                weight: vb.get(h, "weight")?,
                bias: vb.get(h, "bias")?,
            })
        };
        let e = vb.pp("embeddings");
        let mut layers = Vec::with_capacity(cfg.num_hidden_layers);
        for n in 0..cfg.num_hidden_layers {
            let l = vb.pp(format!("encoder.layer.{n}"));
            layers.push(Layer {
                q: linear(l.pp("attention.self.query"), h, h)?,
                k: linear(l.pp("attention.self.key"), h, h)?,
                v: linear(l.pp("attention.self.value"), h, h)?,
                o: linear(l.pp("attention.output.dense"), h, h)?,
                attn_norm: norm(l.pp("attention.output.LayerNorm"))?,
                up: linear(l.pp("intermediate.dense"), h, i)?,
                down: linear(l.pp("output.dense"), i, h)?,
                out_norm: norm(l.pp("output.LayerNorm"))?,
            });
        }
        Ok(Self {
            word: as_held(
                e.get((cfg.vocab_size, h), "word_embeddings.weight")?,
                format,
            )?,
            position: e.get(
                (cfg.max_position_embeddings, h),
                "position_embeddings.weight",
            )?,
            token_type: e.get((cfg.type_vocab_size, h), "token_type_embeddings.weight")?,
            embed_norm: norm(e.pp("LayerNorm"))?,
            layers,
            heads: cfg.num_attention_heads,
            eps: cfg.layer_norm_eps,
            hidden_size: h,
            pooling,
        })
    }

    pub fn num_layers(&self) -> usize {
        self.layers.len()
    }

    /// Unit-length sentence embeddings `[b, hidden]` for token ids `[b, t]` and mask `[b, t]`
    /// (1 for a real token), with `deltas` added to the targeted projections.
    pub fn forward(
        &self,
        ids: &Tensor,
        mask: &Tensor,
        deltas: &Deltas,
    ) -> candle_core::Result<Tensor> {
        let (b, t) = ids.dims2()?;
        let h = self.hidden_size;
        let flat = ids.flatten_all()?;
        let positions = Tensor::arange(0u32, t as u32, ids.device())?;
        let x = self
            .word
            .index_select(&flat, 0)?
            .reshape((b, t, h))?
            .broadcast_add(&self.token_type.get(0)?)?
            .broadcast_add(&self.position.index_select(&positions, 0)?)?;
        let mut x = self.norm(&x, &self.embed_norm)?;
        let additive = ((mask.to_dtype(DType::F32)? - 1.0)? * 1e9)?.reshape((b, 1, 1, t))?;
        let dh = h / self.heads;
        for (n, layer) in self.layers.iter().enumerate() {
            let proj = |x: &Tensor, m: Module| -> candle_core::Result<Tensor> {
                let lin = layer.linear(m).expect("BERT modules");
                project(x, lin, deltas.factors.get(&Site::new(n, m)), deltas.scale)
            };
            let split = |y: Tensor| -> candle_core::Result<Tensor> {
                y.reshape((b, t, self.heads, dh))?
                    .transpose(1, 2)?
                    .contiguous()
            };
            let q = split(proj(&x, Module::AttnQ)?)?;
            let k = split(proj(&x, Module::AttnK)?)?;
            let v = split(proj(&x, Module::AttnV)?)?;
            let scores = (q.matmul(&k.t()?)? / (dh as f64).sqrt())?.broadcast_add(&additive)?;
            let probs = candle_nn::ops::softmax(&scores, D::Minus1)?;
            let ctx = probs
                .matmul(&v)?
                .transpose(1, 2)?
                .contiguous()?
                .reshape((b, t, h))?;
            let attn = self.norm(&(proj(&ctx, Module::AttnO)? + &x)?, &layer.attn_norm)?;
            let inner = proj(&attn, Module::MlpUp)?.gelu_erf()?;
            x = self.norm(&(proj(&inner, Module::MlpDown)? + attn)?, &layer.out_norm)?;
        }
        self.pooling.apply(&x, mask)
    }

    fn norm(&self, x: &Tensor, n: &Norm) -> candle_core::Result<Tensor> {
        candle_nn::ops::layer_norm_slow(x, &n.weight, &n.bias, self.eps as f32)
    }
}

/// `x W^T + bias + scale * (x A^T) B^T` for `x [b, t, in]`.
fn project(
    x: &Tensor,
    lin: &Linear,
    factors: Option<&(Tensor, Tensor)>,
    scale: f64,
) -> candle_core::Result<Tensor> {
    let (b, t, inp) = x.dims3()?;
    let rows = x.reshape((b * t, inp))?;
    let mut y = rows.matmul(&lin.weight.t()?)?.broadcast_add(&lin.bias)?;
    if let Some((a, bm)) = factors {
        let low = rows.matmul(&a.t()?)?.matmul(&bm.t()?)?;
        y = (y + (low * scale)?)?;
    }
    let out = y.dim(1)?;
    y.reshape((b, t, out))
}

#[cfg(test)]
mod tests {
    use std::sync::Arc;

    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use switchyard_adapters::{Adapter, AdapterPackage, PackageMeta, Task};

    use super::*;
    use crate::model::embedder::Embedder;
    use crate::train::batch_tensors;

    /// The serving encoder with a non-trivial adapter (B random, not zero, so the low-rank path
    /// is exercised) and this module's forward with the same factors must give the same
    /// embeddings: cosine at least 1 - 1e-5 and max abs difference at most 1e-4. Both compute
    /// in f32; the differences come from fused against composed softmax and layer norm.
    #[test]
    fn forward_matches_the_serving_embedder_with_an_adapter() {
        let dir = switchyard_tests::base_model_dir();
        let embedder = Embedder::load(&dir).unwrap();
        let ckpt = Checkpoint::open(&dir).unwrap();
        let enc = FrozenEncoder::load(&ckpt).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let vars = LowRankVars::init(
            &enc,
            &[Module::AttnQ, Module::AttnV, Module::MlpDown],
            4,
            8.0,
            &mut rng,
        )
        .unwrap();
        for (_, bvar) in vars.factors.values() {
            let (out, r) = bvar.dims2().unwrap();
            let vals: Vec<f32> = (0..out * r)
                .map(|_| rng.random_range(-0.05..0.05))
                .collect();
            bvar.set(&Tensor::from_vec(vals, (out, r), &Device::Cpu).unwrap())
                .unwrap();
        }
        let factors = vars.detached();
        let texts = [
            "My rear derailleur skips under load, can you look at it Saturday?",
            "refund please",
            "Is the 54 cm gravel frame still in stock at the Elm Street shop, or only online?",
        ];
        let pkg = AdapterPackage {
            meta: PackageMeta {
                base_fingerprint: embedder.spec().fingerprint.clone(),
                rank: 4,
                alpha: 8.0,
                task: Task::Embed,
                labels: Vec::new(),
                description: String::new(),
            },
            factors: factors.clone(),
            head: None,
        };
        let adapter = Arc::new(Adapter::from_package("t@1".to_owned(), pkg).unwrap());
        let served = embedder
            .embed(&texts, &vec![Some(adapter); texts.len()])
            .unwrap();
        let ids = embedder.tokenize(&texts).unwrap();
        let (ids_t, mask_t) = batch_tensors(&ids).unwrap();
        let ours = enc
            .forward(
                &ids_t,
                &mask_t,
                &Deltas {
                    factors: &factors,
                    scale: 2.0,
                },
            )
            .unwrap()
            .to_vec2::<f32>()
            .unwrap();
        let base = embedder.embed(&texts, &[None, None, None]).unwrap();
        for ((s, o), b) in served.iter().zip(&ours).zip(&base) {
            let cos: f32 = s.iter().zip(o).map(|(x, y)| x * y).sum();
            let diff = s
                .iter()
                .zip(o)
                .map(|(x, y)| (x - y).abs())
                .fold(0.0, f32::max);
            assert!(cos >= 1.0 - 1e-5, "cosine {cos}");
            assert!(diff <= 1e-4, "max abs difference {diff}");
            // And the adapter moved the embedding, so the check above is not base against base.
            let moved: f32 = s.iter().zip(b).map(|(x, y)| x * y).sum();
            assert!(moved < 0.999, "adapter cosine to base {moved}");
        }
    }
}
