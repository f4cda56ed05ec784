//! Small synthetic packages for the store and registry tests: a made-up base (two layers,
//! hidden 32) and adapters whose every factor value is one `tag`, so a test can tell from any
//! single tensor which version it holds, and whether all of a handle comes from one version.

#![allow(dead_code)]

use std::collections::BTreeMap;

use candle_core::{Device, Tensor};
use switchyard_adapters::{AdapterPackage, BaseSpec, Module, PackageMeta, Site, Task};

pub const FINGERPRINT: &str = "5e1f5e1f5e1f5e1f";
pub const HIDDEN: usize = 32;
pub const LAYERS: usize = 2;

/// The made-up base: attention projections 32×32, mlp.up 64×32, mlp.down 32×64 in each layer.
pub fn spec() -> BaseSpec {
    let mut targets = BTreeMap::new();
    for layer in 0..LAYERS {
        for m in [Module::AttnQ, Module::AttnK, Module::AttnV, Module::AttnO] {
            targets.insert(Site::new(layer, m), (HIDDEN, HIDDEN));
        }
        targets.insert(Site::new(layer, Module::MlpUp), (2 * HIDDEN, HIDDEN));
        targets.insert(Site::new(layer, Module::MlpDown), (HIDDEN, 2 * HIDDEN));
    }
    BaseSpec {
        model_type: "made-up".to_owned(),
        fingerprint: FINGERPRINT.to_owned(),
        num_layers: LAYERS,
        hidden_size: HIDDEN,
        targets,
    }
}

pub fn filled(value: f32, rows: usize, cols: usize) -> Tensor {
    Tensor::full(value, (rows, cols), &Device::Cpu).unwrap()
}

/// An adapter of rank `rank` on q and v of every layer, every value `tag`.
pub fn tagged(rank: usize, tag: f32) -> AdapterPackage {
    tagged_on(rank, tag, &[Module::AttnQ, Module::AttnV])
}

pub fn tagged_on(rank: usize, tag: f32, modules: &[Module]) -> AdapterPackage {
    let spec = spec();
    let mut factors = BTreeMap::new();
    for layer in 0..LAYERS {
        for &m in modules {
            let site = Site::new(layer, m);
            let (out, inp) = spec.shape(&site).unwrap();
            factors.insert(site, (filled(tag, rank, inp), filled(tag, out, rank)));
        }
    }
    AdapterPackage {
        meta: PackageMeta {
            base_fingerprint: FINGERPRINT.to_owned(),
            rank,
            alpha: 2.0 * rank as f64,
            task: Task::Embed,
            labels: Vec::new(),
            description: format!("tag {tag}"),
        },
        factors,
        head: None,
    }
}

/// Resident bytes of [`tagged`] at `rank`, as `Adapter::resident_bytes` counts them (the layout
/// the forward pass keeps is `LowRank`'s business); at least the 2 layers × (q, v) ×
/// r·(32 + 32) parameters in 4-byte floats.
pub fn tagged_bytes(rank: usize) -> usize {
    let bytes = switchyard_adapters::Adapter::from_package("t@0".to_owned(), tagged(rank, 0.0))
        .unwrap()
        .resident_bytes();
    assert!(bytes >= LAYERS * 2 * rank * (HIDDEN + HIDDEN) * 4);
    bytes
}

/// The tag a resident adapter carries, after checking that every value of every factor is that
/// tag (one whole version, not a mix).
pub fn whole_tag(adapter: &switchyard_adapters::Adapter) -> f32 {
    let tag: f32 = adapter
        .meta
        .description
        .strip_prefix("tag ")
        .expect("tagged description")
        .parse()
        .unwrap();
    let mut sites = 0;
    for (site, lr) in adapter.sites() {
        for t in [lr.a().unwrap(), lr.b().unwrap()] {
            let v = t.flatten_all().unwrap().to_vec1::<f32>().unwrap();
            assert!(
                v.iter().all(|x| *x == tag),
                "{site} of {} mixes values: tag {tag}",
                adapter.id
            );
        }
        sites += 1;
    }
    assert_eq!(sites, LAYERS * 2, "every targeted site present");
    tag
}
pub mod s3;
