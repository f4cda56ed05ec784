//! The one adapter-aware linear layer that every projection of every model family goes through.
//!
//! It computes `W0 x + s B (A x)` for a flat batch of rows where each row may carry a different
//! adapter or none. The base matmul runs once over all rows, straight into the output buffer
//! (the bias, if any, added as the kernel stores each tile), and each run of consecutive rows
//! that shares an adapter carries that adapter's low-rank term into the same kernel call, which
//! fuses it into the base product (no gather, no scatter, no temporary output, no pass of its own). When the
//! whole batch runs one merged variant, the merged weight replaces `W0` and no low-rank term is
//! computed.

use std::ops::Range;
use std::sync::Arc;

use candle_core::{DType, Result, Tensor};
use switchyard_adapters::tensors::{pack_tensor, unpack_tensor, with_f32};
use switchyard_adapters::{Adapter, MergedWeights, Site};
use switchyard_kernels::{PackedWeight, RowTerm, RowsDone, packed_matmul_then, packed_matmul_with};

use crate::model::checkpoint::Weights;

/// Which adapter each row of a flat `[rows, in]` activation carries, grouped for the layer.
#[derive(Debug, Clone)]
pub struct RowAdapters {
    rows: usize,
    groups: Vec<RowGroup>,
    merged: Option<Arc<MergedWeights>>,
}

/// The rows of one adapter, as runs of consecutive rows.
#[derive(Debug, Clone)]
struct RowGroup {
    adapter: Arc<Adapter>,
    runs: Vec<Range<usize>>,
}

impl RowAdapters {
    /// Every row runs the base model alone.
    pub fn base(rows: usize) -> Self {
        Self {
            rows,
            groups: Vec::new(),
            merged: None,
        }
    }

    /// Every row carries the same adapter (or none).
    pub fn uniform(adapter: Option<Arc<Adapter>>, rows: usize) -> Self {
        Self {
            rows,
            groups: adapter
                .into_iter()
                .map(|adapter| RowGroup {
                    adapter,
                    runs: std::iter::once(0..rows).collect(),
                })
                .collect(),
            merged: None,
        }
    }

    /// Every row runs with a merged variant's weights.
    pub fn merged(weights: Arc<MergedWeights>, rows: usize) -> Self {
        Self {
            rows,
            groups: Vec::new(),
            merged: Some(weights),
        }
    }

    /// Sequence `i` has `rows_per_seq[i]` consecutive rows and carries `adapters[i]`.
    pub fn per_sequence(adapters: &[Option<Arc<Adapter>>], rows_per_seq: &[usize]) -> Self {
        assert_eq!(adapters.len(), rows_per_seq.len());
        let mut groups: Vec<RowGroup> = Vec::new();
        let mut start = 0;
        for (adapter, &n) in adapters.iter().zip(rows_per_seq) {
            if let Some(adapter) = adapter {
                let run = start..start + n;
                match groups.iter_mut().find(|g| Arc::ptr_eq(&g.adapter, adapter)) {
                    Some(group) => match group.runs.last_mut() {
                        // Neighbouring sequences of one adapter become one run.
                        Some(last) if last.end == run.start => last.end = run.end,
                        _ => group.runs.push(run),
                    },
                    None => groups.push(RowGroup {
                        adapter: adapter.clone(),
                        runs: vec![run],
                    }),
                }
            }
            start += n;
        }
        Self {
            rows: start,
            groups,
            merged: None,
        }
    }

    pub fn rows(&self) -> usize {
        self.rows
    }

    /// True when no row carries an adapter.
    pub fn is_base_only(&self) -> bool {
        self.groups.is_empty() && self.merged.is_none()
    }
}

/// A projection `y = W0 x (+ bias)` that knows its site, so each row's adapter can add its term.
/// The weight is held only in the packed layout the projection kernel reads (see
/// [`PackedWeight`]); [`AdaptedLinear::weight`] gives it back row-major where a merge needs it.
#[derive(Debug, Clone)]
pub struct AdaptedLinear {
    site: Site,
    weight: Arc<PackedWeight>,
    bias: Option<Vec<f32>>,
}

impl AdaptedLinear {
    /// A layer over a weight already packed (in any format) and an optional f32 bias.
    pub fn new(site: Site, weight: PackedWeight, bias: Option<Vec<f32>>) -> Result<Self> {
        if let Some(b) = &bias
            && b.len() != weight.out_features()
        {
            candle_core::bail!(
                "{site}: bias has {} values, the weight {} output features",
                b.len(),
                weight.out_features()
            );
        }
        Ok(Self {
            site,
            weight: Arc::new(weight),
            bias,
        })
    }

    /// A layer over a `[out, in]` tensor, packed as f32 (tests and tools).
    pub fn from_tensor(site: Site, weight: &Tensor, bias: Option<&Tensor>) -> Result<Self> {
        let bias = match bias {
            Some(b) => Some(b.to_dtype(DType::F32)?.flatten_all()?.to_vec1::<f32>()?),
            None => None,
        };
        Self::new(site, pack_tensor(weight)?, bias)
    }

    /// Loads `weight [out, in]` in the checkpoint view's format and, where the checkpoint has
    /// one, `bias [out]` in f32.
    pub fn load(site: Site, in_dim: usize, out_dim: usize, w: &Weights<'_>) -> Result<Self> {
        let weight = w.packed("weight", out_dim, in_dim)?;
        let bias = if w.contains("bias") {
            Some(w.tensor("bias", &[out_dim])?.to_vec1::<f32>()?)
        } else {
            None
        };
        Self::new(site, weight, bias)
    }

    /// Rows `rows` of a fused projection `[fused_out, in_dim]` (no bias) as a layer of its own:
    /// Phi-3's `qkv_proj` gives `attn.q`, `attn.k` and `attn.v` this way, `gate_up_proj` gives
    /// `mlp.gate` and `mlp.up`, so adapters target the same canonical modules as elsewhere.
    pub fn load_rows(
        site: Site,
        in_dim: usize,
        fused_out: usize,
        rows: std::ops::Range<usize>,
        w: &Weights<'_>,
    ) -> Result<Self> {
        let weight = w.packed_rows("weight", (fused_out, in_dim), rows)?;
        if w.contains("bias") {
            candle_core::bail!("a fused projection with a bias is not supported");
        }
        Self::new(site, weight, None)
    }

    /// The base weight as held (packed, in the model's format): what a merged variant of this
    /// layer is built from.
    pub fn packed_weight(&self) -> &Arc<PackedWeight> {
        &self.weight
    }

    pub fn site(&self) -> Site {
        self.site
    }

    /// The base weight `[out, in]`, row-major: a new tensor, unpacked from the kernel's layout.
    pub fn weight(&self) -> Result<Tensor> {
        unpack_tensor(&self.weight)
    }

    /// Bytes held: the packed weight and the bias.
    pub fn resident_bytes(&self) -> usize {
        self.weight.resident_bytes() + self.bias.as_ref().map_or(0, |b| b.len() * 4)
    }

    pub fn shape(&self) -> (usize, usize) {
        (self.weight.out_features(), self.weight.in_features())
    }

    /// Applies the layer to `x [..., in]` with the rows' adapters; the leading dimensions of `x`
    /// flatten to `adapters.rows()` rows.
    pub fn forward(&self, x: &Tensor, adapters: &RowAdapters) -> Result<Tensor> {
        let _span = tracing::trace_span!("adapted_linear", site = %self.site).entered();
        let dims = x.dims().to_vec();
        let in_dim = *dims.last().expect("at least one dimension");
        let rows = x.elem_count() / in_dim.max(1);
        if rows != adapters.rows {
            candle_core::bail!(
                "{}: activation has {rows} rows but the batch assigns {}",
                self.site,
                adapters.rows
            );
        }
        let (out_dim, w_in) = self.shape();
        if w_in != in_dim {
            candle_core::bail!(
                "{}: input has {in_dim} features, weight takes {w_in}",
                self.site
            );
        }
        let x2 = x
            .reshape((rows, in_dim))?
            .to_dtype(DType::F32)?
            .contiguous()?;
        let y = with_f32(&x2, |xs| self.forward_rows(xs, rows, adapters))??;
        let mut out_dims = dims;
        *out_dims.last_mut().unwrap() = out_dim;
        Tensor::from_vec(y, out_dims, x.device())
    }

    /// [`Self::forward`] on a plain row-major `[rows, in]` slice, giving `[rows, out]` as a
    /// vector: what model code that keeps activations in slices calls.
    pub fn forward_rows(
        &self,
        xs: &[f32],
        rows: usize,
        adapters: &RowAdapters,
    ) -> Result<Vec<f32>> {
        let mut y = Vec::new();
        self.forward_rows_into(xs, rows, adapters, &mut y)?;
        Ok(y)
    }

    /// [`Self::forward_rows`] into a reused buffer: `y` is resized to `[rows, out]` and every
    /// value of it overwritten, so a buffer kept from an earlier call of the same size costs
    /// no allocation, no page faults and no zeroing.
    pub fn forward_rows_into(
        &self,
        xs: &[f32],
        rows: usize,
        adapters: &RowAdapters,
        y: &mut Vec<f32>,
    ) -> Result<()> {
        self.forward_rows_then(xs, rows, adapters, y, None)
    }

    /// [`Self::forward_rows_into`], then `then` on every row of `y`: in the product's own
    /// tasks, on rows they just finished, where the kernel splits by rows (see
    /// [`switchyard_kernels::packed_matmul_then`]); an activation or a residual add with a
    /// layer norm costs no pass of its own over the output then.
    pub fn forward_rows_then(
        &self,
        xs: &[f32],
        rows: usize,
        adapters: &RowAdapters,
        y: &mut Vec<f32>,
        then: Option<RowsDone<'_>>,
    ) -> Result<()> {
        let (out_dim, in_dim) = self.shape();
        if rows != adapters.rows || xs.len() != rows * in_dim {
            candle_core::bail!(
                "{}: activation holds {} values, expected {} rows x {in_dim}",
                self.site,
                xs.len(),
                adapters.rows
            );
        }
        let weight = adapters
            .merged
            .as_ref()
            .and_then(|m| m.weight(&self.site))
            .unwrap_or(&self.weight);
        y.resize(rows * out_dim, 0.0);
        // Every run of rows that carries an adapter with a factor pair here becomes one term
        // of the base product, fused into it by the kernel.
        let mut terms: Vec<RowTerm<'_>> = Vec::new();
        for group in &adapters.groups {
            let Some(lr) = group.adapter.factors(&self.site) else {
                continue;
            };
            if (lr.out_features(), lr.in_features()) != (out_dim, in_dim) {
                candle_core::bail!(
                    "{}: adapter {} has factors for {} x {}, the layer is {out_dim} x {in_dim}",
                    self.site,
                    group.adapter.id,
                    lr.out_features(),
                    lr.in_features()
                );
            }
            terms.extend(group.runs.iter().map(|run| lr.term(run.clone())));
        }
        let bias = self.bias.as_deref();
        match then {
            Some(then) => packed_matmul_then(y, xs, rows, weight, false, bias, &terms, then),
            None => packed_matmul_with(y, xs, rows, weight, false, bias, &terms),
        }
        Ok(())
    }
}
