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
        let head = pkg.head.map(|(weight, bias)| TaskHead {
            weight,
            bias,
            labels: pkg.meta.labels.clone(),
        });
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

    /// Bytes held by the resident factors (and head).
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
