//! A resident adapter: one validated package version turned into the form the forward pass uses.

use std::collections::HashMap;

use candle_core::Tensor;

use crate::lowrank::LowRank;
use crate::package::{AdapterPackage, PackageMeta};
use crate::site::Site;

/// A classification head carried by an adapter: `weight [labels, hidden]`, `bias [labels]`.
#[derive(Debug, Clone)]
pub struct TaskHead {
    pub weight: Tensor,
    pub bias: Tensor,
    pub labels: Vec<String>,
}

/// One adapter version, resident and ready to apply.
#[derive(Debug)]
pub struct Adapter {
    /// `name@version`, as reported in responses.
    pub id: String,
    pub meta: PackageMeta,
    factors: HashMap<Site, LowRank>,
    pub head: Option<TaskHead>,
}

impl Adapter {
    /// Converts a package (already validated against the base) into resident factors.
    pub fn from_package(id: String, pkg: AdapterPackage) -> candle_core::Result<Self> {
        let scale = pkg.meta.scale();
        let mut factors = HashMap::with_capacity(pkg.factors.len());
        for (site, (a, b)) in pkg.factors {
            factors.insert(site, LowRank::new(a, b, scale)?);
        }
        let head = match pkg.head {
            Some((weight, bias)) => Some(TaskHead {
                weight: owned(&weight)?,
                bias: owned(&bias)?,
                labels: pkg.meta.labels.clone(),
            }),
            None => None,
        };
        Ok(Self {
            id,
            meta: pkg.meta,
            factors,
            head,
        })
    }

    /// The factor pair for one base matrix, if this adapter targets it.
    pub fn factors(&self, site: &Site) -> Option<&LowRank> {
        self.factors.get(site)
    }

    /// Every targeted site with its factors.
    pub fn sites(&self) -> impl Iterator<Item = (&Site, &LowRank)> {
        self.factors.iter()
    }

    /// Bytes held by the resident factors (and head). Every tensor counted here owns its memory
    /// (see `owned`), so this is what the adapter really keeps alive.
    pub fn resident_bytes(&self) -> usize {
        let head = self
            .head
            .as_ref()
            .map(|h| (h.weight.elem_count() + h.bias.elem_count()) * 4)
            .unwrap_or(0);
        self.factors
            .values()
            .map(LowRank::resident_bytes)
            .sum::<usize>()
            + head
    }
}

/// A copy of `t` in storage of its own. A package's tensors are views into one buffer holding the
/// whole file; keeping such a view (a classification head) would keep the whole file resident
/// while the tiers counted only the head's bytes.
fn owned(t: &Tensor) -> candle_core::Result<Tensor> {
    let data = t.flatten_all()?.to_vec1::<f32>()?;
    Tensor::from_vec(data, t.shape(), t.device())
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::{Device, Storage};

    fn storage_len(t: &Tensor) -> usize {
        let (storage, _) = t.storage_and_layout();
        match &*storage {
            Storage::Cpu(candle_core::CpuStorage::F32(v)) => v.len(),
            other => panic!("unexpected storage {:?}", other.dtype()),
        }
    }

    #[test]
    fn classify_head_owns_its_memory_instead_of_a_view_into_the_package() {
        // A head of 2 x 3 cut out of a 1000-element buffer, as the package reader makes it.
        let file = Tensor::arange(0f32, 1000.0, &Device::Cpu).unwrap();
        let view = file.narrow(0, 100, 6).unwrap().reshape((2, 3)).unwrap();
        assert_eq!(storage_len(&view), 1000, "the view shares the whole buffer");
        let head = owned(&view).unwrap();
        assert_eq!(storage_len(&head), 6);
        assert_eq!(
            head.to_vec2::<f32>().unwrap(),
            vec![vec![100.0, 101.0, 102.0], vec![103.0, 104.0, 105.0]]
        );
    }
}
