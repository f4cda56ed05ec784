//! Swap-cost benchmark (not a test): measures, side by side in one run,
//!
//! 1. the cold load of a rank-16 adapter on attn.q, attn.k, attn.v and attn.o of a 2048-wide,
//!    16-layer decoder shape (read + validate + convert, the registry's load path, and a full
//!    cold `Registry::resolve`), against reading and parsing the same file raw (the bytes plus the
//!    safetensors header, and candle's own loader, which also makes tensors);
//! 2. merging one rank-16 pair into one 2048 × 2048 matrix, in place (`LowRank::merge_in_place`)
//!    and into a new tensor (`LowRank::merge`), against `B · A` alone.
//!
//! Run: `cargo run --release -p switchyard-adapters --example load-bench` (add `-- --repeats N`).
//! Every number is the median of the repeats; the measurements interleave so that machine noise
//! hits all of them alike. Weights are synthetic (seeded), which is all load and merge cost
//! depends on.

use std::collections::BTreeMap;
use std::path::Path;
use std::time::{Duration, Instant};

use candle_core::{Device, Tensor};
use rand::{Rng, SeedableRng};
use switchyard_adapters::package::Limits;
use switchyard_adapters::registry::{Registry, RegistryConfig};
use switchyard_adapters::store::Store;
use switchyard_adapters::{
    Adapter, AdapterName, AdapterPackage, BaseSpec, LowRank, Module, PackageMeta, Site, Task,
};

const HIDDEN: usize = 2048;
const LAYERS: usize = 16;
const RANK: usize = 16;
const MODULES: [Module; 4] = [Module::AttnQ, Module::AttnK, Module::AttnV, Module::AttnO];

fn random_tensor(rng: &mut rand_chacha::ChaCha8Rng, rows: usize, cols: usize) -> Tensor {
    let values: Vec<f32> = (0..rows * cols)
        .map(|_| rng.random_range(-0.05f32..0.05))
        .collect();
    Tensor::from_vec(values, (rows, cols), &Device::Cpu).unwrap()
}

fn spec() -> BaseSpec {
    let mut targets = BTreeMap::new();
    for layer in 0..LAYERS {
        for m in MODULES {
            targets.insert(Site::new(layer, m), (HIDDEN, HIDDEN));
        }
    }
    BaseSpec {
        model_type: "llama".to_owned(),
        fingerprint: "b3e7c0de2048f16a".to_owned(),
        num_layers: LAYERS,
        hidden_size: HIDDEN,
        targets,
    }
}

fn package(spec: &BaseSpec) -> AdapterPackage {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
    let mut factors = BTreeMap::new();
    for (&site, &(out, inp)) in &spec.targets {
        factors.insert(
            site,
            (
                random_tensor(&mut rng, RANK, inp),
                random_tensor(&mut rng, out, RANK),
            ),
        );
    }
    AdapterPackage {
        meta: PackageMeta {
            base_fingerprint: spec.fingerprint.clone(),
            rank: RANK,
            alpha: 32.0,
            task: Task::Generate,
            labels: Vec::new(),
            description: "load-bench synthetic adapter".to_owned(),
        },
        factors,
        head: None,
    }
}

fn median(mut samples: Vec<Duration>) -> Duration {
    samples.sort();
    samples[samples.len() / 2]
}

fn time<T>(f: impl FnOnce() -> T) -> Duration {
    let start = Instant::now();
    std::hint::black_box(f());
    start.elapsed()
}

fn cold_load(path: &Path, spec: &BaseSpec, limits: &Limits) -> Adapter {
    let file = path.display().to_string();
    let pkg = AdapterPackage::load(path, limits).unwrap();
    pkg.validate(&file, spec, limits).unwrap();
    Adapter::from_package("bench@v".to_owned(), pkg).unwrap()
}

fn ms(d: Duration) -> String {
    format!("{:8.2} ms", d.as_secs_f64() * 1e3)
}

fn main() {
    let repeats: usize = std::env::args()
        .skip_while(|a| a != "--repeats")
        .nth(1)
        .map(|n| n.parse().expect("--repeats takes a number"))
        .unwrap_or(15);
    let spec = spec();
    let limits = Limits::default();
    let dir = tempfile::tempdir().unwrap();
    let store = Store::create(&dir.path().join("store"), limits).unwrap();
    let name = AdapterName::new("bench").unwrap();
    let pkg = package(&spec);
    let file = dir.path().join("bench.safetensors");
    pkg.write(&file).unwrap();
    store.publish_file(&name, &file, Some(&spec)).unwrap();
    let size = std::fs::metadata(&file).unwrap().len();
    // Warm the page cache so every variant reads from memory alike.
    std::hint::black_box(std::fs::read(&file).unwrap());

    let (mut raw_parse, mut raw_tensors, mut load, mut resolve) = (vec![], vec![], vec![], vec![]);
    let (mut read, mut validate, mut convert) = (vec![], vec![], vec![]);
    for _ in 0..repeats {
        raw_parse.push(time(|| {
            let bytes = std::fs::read(&file).unwrap();
            safetensors::SafeTensors::deserialize(&bytes)
                .unwrap()
                .tensors()
                .len()
        }));
        raw_tensors.push(time(|| {
            candle_core::safetensors::load(&file, &Device::Cpu).unwrap()
        }));
        load.push(time(|| cold_load(&file, &spec, &limits)));
        let registry = Registry::new(store.clone(), spec.clone(), RegistryConfig::default(), None);
        let events = registry.subscribe(4);
        resolve.push(time(|| registry.resolve("bench").unwrap()));
        let loaded = events.try_recv().expect("a load event");
        read.push(loaded.timings.read);
        validate.push(loaded.timings.validate);
        convert.push(loaded.timings.convert);
    }
    let (raw_parse, raw_tensors, load, resolve) = (
        median(raw_parse),
        median(raw_tensors),
        median(load),
        median(resolve),
    );
    let ratio = |a: Duration, b: Duration| a.as_secs_f64() / b.as_secs_f64();
    println!(
        "cold load: rank {RANK} on attn.q/k/v/o, {LAYERS} layers x {HIDDEN} wide, file {:.1} MB, median of {repeats}",
        size as f64 / 1e6
    );
    println!("  raw read + safetensors parse      {}", ms(raw_parse));
    println!("  raw read into candle tensors      {}", ms(raw_tensors));
    println!(
        "  read + validate + convert         {}   {:.2}x parse   {:.2}x candle tensors",
        ms(load),
        ratio(load, raw_parse),
        ratio(load, raw_tensors)
    );
    println!(
        "  Registry::resolve, cold           {}   {:.2}x parse   {:.2}x candle tensors",
        ms(resolve),
        ratio(resolve, raw_parse),
        ratio(resolve, raw_tensors)
    );
    println!(
        "    its stages (swap event): read {}, validate {}, convert {}",
        ms(median(read)).trim(),
        ms(median(validate)).trim(),
        ms(median(convert)).trim()
    );

    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
    let w0 = random_tensor(&mut rng, HIDDEN, HIDDEN);
    let lr = LowRank::new(
        random_tensor(&mut rng, RANK, HIDDEN),
        random_tensor(&mut rng, HIDDEN, RANK),
        2.0,
    )
    .unwrap();
    let mut w = w0.flatten_all().unwrap().to_vec1::<f32>().unwrap();
    let (mut merge, mut in_place, mut ba) = (vec![], vec![], vec![]);
    for _ in 0..repeats.max(5) {
        ba.push(time(|| lr.b().unwrap().matmul(&lr.a().unwrap()).unwrap()));
        merge.push(time(|| lr.merge(&w0).unwrap()));
        // Repeated merges accumulate into `w`; the cost does not depend on its values.
        in_place.push(time(|| lr.merge_in_place(&mut w).unwrap()));
    }
    let (merge, in_place, ba) = (median(merge), median(in_place), median(ba));
    println!("merge: rank {RANK} into one {HIDDEN} x {HIDDEN} matrix");
    println!("  B . A alone                       {}", ms(ba));
    println!(
        "  LowRank::merge_in_place (W += sBA){}   {:.2}x B.A",
        ms(in_place),
        ratio(in_place, ba)
    );
    println!(
        "  LowRank::merge (new W0 + s B A)   {}   {:.2}x B.A",
        ms(merge),
        ratio(merge, ba)
    );
}
