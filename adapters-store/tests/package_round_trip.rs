//! Property: any package we can build writes to bytes that read back to the same package (same
//! metadata, same targets, bit-identical values), the content version is the hash of those
//! bytes, and writing the same package twice gives the same bytes.

mod common;

use std::collections::BTreeMap;

use candle_core::{Device, Tensor};
use proptest::prelude::*;
use switchyard_adapters::package::{Limits, content_version};
use switchyard_adapters::{AdapterPackage, Module, PackageMeta, Site, Task};

fn values(t: &Tensor) -> Vec<u32> {
    // Compared as bits, so -0.0 and 0.0 (and every rounding) must survive exactly.
    t.flatten_all()
        .unwrap()
        .to_vec1::<f32>()
        .unwrap()
        .into_iter()
        .map(f32::to_bits)
        .collect()
}

fn tensor(seed: &[f32], rows: usize, cols: usize) -> Tensor {
    let v: Vec<f32> = (0..rows * cols).map(|i| seed[i % seed.len()]).collect();
    Tensor::from_vec(v, (rows, cols), &Device::Cpu).unwrap()
}

prop_compose! {
    fn package()(
        rank in 1usize..5,
        layers in proptest::collection::btree_set(0usize..4, 1..3),
        modules in proptest::sample::subsequence(Module::ALL.to_vec(), 1..4),
        dims in (1usize..9, 1usize..9),
        seed in proptest::collection::vec(-1e6f32..1e6, 1..16),
        alpha in 0.001f64..1000.0,
        task in 0usize..3,
        labels in proptest::collection::vec("[a-z ]{0,8}", 1..4),
        description in "\\PC{0,40}",
    ) -> AdapterPackage {
        let (inp, out) = dims;
        let mut factors = BTreeMap::new();
        for &layer in &layers {
            for &m in &modules {
                factors.insert(
                    Site::new(layer, m),
                    (tensor(&seed, rank, inp), tensor(&seed, out, rank)),
                );
            }
        }
        let task = [Task::Generate, Task::Embed, Task::Classify][task];
        let (labels, head) = if task == Task::Classify {
            let n = labels.len();
            (labels, Some((tensor(&seed, n, 6), tensor(&seed, 1, n).reshape(n).unwrap())))
        } else {
            (Vec::new(), None)
        };
        AdapterPackage {
            meta: PackageMeta {
                base_fingerprint: "0123456789abcdef".to_owned(),
                rank,
                alpha,
                task,
                labels,
                description,
            },
            factors,
            head,
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    #[test]
    fn write_then_read_gives_back_the_same_package(pkg in package()) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("p.safetensors");
        let version = pkg.write(&path).unwrap();
        let bytes = std::fs::read(&path).unwrap();
        prop_assert_eq!(&version, &content_version(&bytes));
        prop_assert_eq!(pkg.to_bytes().unwrap(), bytes, "writing is deterministic");

        let (back, read_version) = AdapterPackage::read(&path, &Limits::default()).unwrap();
        prop_assert_eq!(read_version, version);
        prop_assert_eq!(&back.meta, &pkg.meta);
        prop_assert_eq!(back.targets(), pkg.targets());
        for (site, (a, b)) in &pkg.factors {
            let (ra, rb) = &back.factors[site];
            prop_assert_eq!(ra.dims(), a.dims());
            prop_assert_eq!(rb.dims(), b.dims());
            prop_assert_eq!(values(ra), values(a));
            prop_assert_eq!(values(rb), values(b));
        }
        match (&pkg.head, &back.head) {
            (None, None) => {}
            (Some((w, b)), Some((rw, rb))) => {
                prop_assert_eq!(values(rw), values(w));
                prop_assert_eq!(values(rb), values(b));
            }
            _ => prop_assert!(false, "head lost or invented"),
        }
    }
}
