//! A merged variant: the matrices one adapter targets with `W0 + s B A` materialised, so a batch
//! that runs only that adapter pays no low-rank term at all. Every matrix the adapter does not
//! target is shared with the base and not copied.

use std::collections::HashMap;

use candle_core::{Result, Tensor};

use switchyard_kernels::PackedWeight;

use crate::tensors::pack_tensor;

use crate::adapter::Adapter;
use crate::site::Site;

/// The targeted matrices of one adapter merged into the base (`W0 + s B A`); every other matrix is
/// shared with the base.
#[derive(Debug)]
pub struct MergedWeights {
    /// `name@version` of the adapter these weights were merged from.
    pub source: String,
    weights: HashMap<Site, PackedWeight>,
}

impl MergedWeights {
    /// Builds the merged variant of `adapter` from the base weights it targets.
    pub fn build(adapter: &Adapter, base_weight: impl Fn(&Site) -> Option<Tensor>) -> Result<Self> {
        let mut weights = HashMap::new();
        for (site, lr) in adapter.sites() {
            let w0 = base_weight(site).ok_or_else(|| {
                candle_core::Error::Msg(format!("base model has no matrix {site}"))
            })?;
            weights.insert(*site, pack_tensor(&lr.merge(&w0)?)?);
        }
        Ok(Self {
            source: adapter.id.clone(),
            weights,
        })
    }

    /// Builds the merged variant of `adapter` held in the base's own format: each targeted
    /// matrix merged into the packed base weight by [`crate::LowRank::merged_packed`] (what that
    /// rounds is said there).
    pub fn build_packed<'w>(
        adapter: &Adapter,
        base_weight: impl Fn(&Site) -> Option<&'w PackedWeight>,
    ) -> Result<Self> {
        let mut weights = HashMap::new();
        for (site, lr) in adapter.sites() {
            let w0 = base_weight(site).ok_or_else(|| {
                candle_core::Error::Msg(format!("base model has no matrix {site}"))
            })?;
            weights.insert(*site, lr.merged_packed(w0)?);
        }
        Ok(Self {
            source: adapter.id.clone(),
            weights,
        })
    }

    /// Bytes held by the merged matrices.
    pub fn resident_bytes(&self) -> usize {
        self.weights
            .values()
            .map(PackedWeight::resident_bytes)
            .sum()
    }

    /// The merged matrix at `site`, if the adapter targets it, packed for the projection kernel.
    pub fn weight(&self, site: &Site) -> Option<&PackedWeight> {
        self.weights.get(site)
    }
}
