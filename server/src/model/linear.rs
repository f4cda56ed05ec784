//! The one adapter-aware linear layer that every projection of every model family goes through.
//!
//! It computes `W0 x + s B (A x)` for a flat batch of rows where each row may carry a different
//! adapter or none: the base matmul runs once over all rows, then each group of rows that shares
//! an adapter gets that adapter's low-rank term (gathered, applied, scattered back). When the
//! whole batch runs one merged variant, the merged weight replaces `W0` and no low-rank term is
//! computed.

use std::sync::Arc;

use candle_core::{D, DType, Device, Result, Tensor};
use switchyard_adapters::{Adapter, LowRank, MergedWeights, Site};

/// Which adapter each row of a flat `[rows, in]` activation carries, grouped for the layer.
#[derive(Debug, Clone)]
pub struct RowAdapters {
    rows: usize,
    groups: Vec<RowGroup>,
    merged: Option<Arc<MergedWeights>>,
}

#[derive(Debug, Clone)]
struct RowGroup {
    adapter: Arc<Adapter>,
    /// Row indices as a u32 tensor, `None` when the group covers every row.
    index: Option<Tensor>,
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
                    index: None,
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
    pub fn per_sequence(
        adapters: &[Option<Arc<Adapter>>],
        rows_per_seq: &[usize],
        device: &Device,
    ) -> Result<Self> {
        assert_eq!(adapters.len(), rows_per_seq.len());
        let rows: usize = rows_per_seq.iter().sum();
        let mut by_adapter: Vec<(Arc<Adapter>, Vec<u32>)> = Vec::new();
        let mut start = 0u32;
        for (adapter, &n) in adapters.iter().zip(rows_per_seq) {
            if let Some(adapter) = adapter {
                let slot = match by_adapter.iter().position(|(a, _)| Arc::ptr_eq(a, adapter)) {
                    Some(i) => i,
                    None => {
                        by_adapter.push((adapter.clone(), Vec::new()));
                        by_adapter.len() - 1
                    }
                };
                by_adapter[slot].1.extend(start..start + n as u32);
            }
            start += n as u32;
        }
        let mut groups = Vec::with_capacity(by_adapter.len());
        for (adapter, idx) in by_adapter {
            let index = if idx.len() == rows {
                None
            } else {
                let n = idx.len();
                Some(Tensor::from_vec(idx, n, device)?)
            };
            groups.push(RowGroup { adapter, index });
        }
        Ok(Self {
            rows,
            groups,
            merged: None,
        })
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
#[derive(Debug, Clone)]
pub struct AdaptedLinear {
    site: Site,
    weight: Tensor,
    bias: Option<Tensor>,
}

impl AdaptedLinear {
    pub fn new(site: Site, weight: Tensor, bias: Option<Tensor>) -> Self {
        Self { site, weight, bias }
    }

    /// Loads `weight [out, in]` and, where the checkpoint has one, `bias [out]`.
    pub fn load(
        site: Site,
        in_dim: usize,
        out_dim: usize,
        vb: candle_nn::VarBuilder,
    ) -> Result<Self> {
        let weight = vb.get((out_dim, in_dim), "weight")?;
        let bias = if vb.contains_tensor("bias") {
            Some(vb.get(out_dim, "bias")?)
        } else {
            None
        };
        Ok(Self::new(site, weight, bias))
    }

    pub fn site(&self) -> Site {
        self.site
    }

    pub fn weight(&self) -> &Tensor {
        &self.weight
    }

    pub fn shape(&self) -> (usize, usize) {
        let d = self.weight.dims();
        (d[0], d[1])
    }

    /// Applies the layer to `x [..., in]` with the rows' adapters; the leading dimensions of `x`
    /// flatten to `adapters.rows()` rows.
    pub fn forward(&self, x: &Tensor, adapters: &RowAdapters) -> Result<Tensor> {
        let _span = tracing::trace_span!("adapted_linear", site = %self.site).entered();
        let dims = x.dims().to_vec();
        let in_dim = *dims.last().expect("at least one dimension");
        let rows = x.elem_count() / in_dim.max(1);
        debug_assert_eq!(rows, adapters.rows, "row count of activation and adapters");
        let x2 = x.reshape((rows, in_dim))?;
        let weight = adapters
            .merged
            .as_ref()
            .and_then(|m| m.weight(&self.site))
            .unwrap_or(&self.weight);
        let mut y = x2.matmul(&weight.t()?)?;
        if let Some(bias) = &self.bias {
            y = y.broadcast_add(bias)?;
        }
        for group in &adapters.groups {
            let Some(lr) = group.adapter.factors(&self.site) else {
                continue;
            };
            y = add_low_rank(y, &x2, lr, group.index.as_ref())?;
        }
        let mut out_dims = dims;
        *out_dims.last_mut().unwrap() = y.dim(D::Minus1)?;
        y.reshape(out_dims)
    }
}

fn add_low_rank(y: Tensor, x: &Tensor, lr: &LowRank, index: Option<&Tensor>) -> Result<Tensor> {
    match index {
        None => y + lr.delta(x)?,
        Some(index) => {
            let xs = x.index_select(index, 0)?;
            let delta = lr.delta(&xs)?.to_dtype(DType::F32)?;
            y.index_add(index, &delta, 0)
        }
    }
}
