//! Synthetic adapters for a load run: random low-rank factors (seeded, so a run can be
//! replayed) of a chosen rank on chosen targets, built for the base model in a folder and
//! written with the adapter store's own package writer. The base's fingerprint and matrix shapes
//! are read from the folder's config.json and safetensors headers; no weights are loaded.

use std::collections::BTreeMap;
use std::io::Read;
use std::path::Path;

use anyhow::{Context, bail};
use candle_core::{Device, Tensor};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use switchyard_adapters::package::Limits;
use switchyard_adapters::{
    AdapterName, AdapterPackage, BaseSpec, Module, PackageBytes, PackageMeta, Site, Store, Task,
    base_fingerprint,
};

/// The base model's description that packages are built against.
pub fn read_base(dir: &Path) -> anyhow::Result<BaseSpec> {
    let config_path = dir.join("config.json");
    let text = std::fs::read_to_string(&config_path)
        .with_context(|| format!("reading {}", config_path.display()))?;
    let config: serde_json::Value = serde_json::from_str(&text)
        .with_context(|| format!("parsing {} as JSON", config_path.display()))?;
    let model_type = config["model_type"]
        .as_str()
        .with_context(|| format!("{} has no model_type", config_path.display()))?
        .to_owned();
    let mut tensors = Vec::new();
    let mut files: Vec<_> = std::fs::read_dir(dir)
        .with_context(|| format!("listing {}", dir.display()))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|x| x == "safetensors"))
        .collect();
    files.sort();
    if files.is_empty() {
        bail!("model folder {} holds no *.safetensors file", dir.display());
    }
    for file in &files {
        tensors.extend(safetensors_shapes(file)?);
    }
    let fingerprint = base_fingerprint(&model_type, &tensors);
    let get = |key: &str| -> anyhow::Result<usize> {
        config[key]
            .as_u64()
            .map(|v| v as usize)
            .with_context(|| format!("{} has no number {key}", config_path.display()))
    };
    let hidden = get("hidden_size")?;
    let inter = get("intermediate_size")?;
    let layers = get("num_hidden_layers")?;
    let shapes: Vec<(Module, (usize, usize))> = match model_type.as_str() {
        "bert" => vec![
            (Module::AttnQ, (hidden, hidden)),
            (Module::AttnK, (hidden, hidden)),
            (Module::AttnV, (hidden, hidden)),
            (Module::AttnO, (hidden, hidden)),
            (Module::MlpUp, (inter, hidden)),
            (Module::MlpDown, (hidden, inter)),
        ],
        "llama" => {
            let heads = get("num_attention_heads")?;
            let kv_heads = get("num_key_value_heads").unwrap_or(heads);
            let head_dim = get("head_dim").unwrap_or(hidden / heads);
            vec![
                (Module::AttnQ, (heads * head_dim, hidden)),
                (Module::AttnK, (kv_heads * head_dim, hidden)),
                (Module::AttnV, (kv_heads * head_dim, hidden)),
                (Module::AttnO, (hidden, heads * head_dim)),
                (Module::MlpGate, (inter, hidden)),
                (Module::MlpUp, (inter, hidden)),
                (Module::MlpDown, (hidden, inter)),
            ]
        }
        other => bail!(
            "{} has model_type {other:?}; synthetic adapters know bert and llama",
            config_path.display()
        ),
    };
    let mut targets = BTreeMap::new();
    for layer in 0..layers {
        for (module, shape) in &shapes {
            targets.insert(Site::new(layer, *module), *shape);
        }
    }
    Ok(BaseSpec {
        model_type,
        fingerprint,
        num_layers: layers,
        hidden_size: hidden,
        targets,
    })
}

/// Names and shapes of the tensors in one safetensors file, from its header alone.
fn safetensors_shapes(file: &Path) -> anyhow::Result<Vec<(String, Vec<usize>)>> {
    let mut f = std::fs::File::open(file).with_context(|| format!("opening {}", file.display()))?;
    let mut len = [0u8; 8];
    f.read_exact(&mut len)
        .with_context(|| format!("reading the header length of {}", file.display()))?;
    let len = u64::from_le_bytes(len);
    if len > 100 << 20 {
        bail!("{} has a header of {len} bytes", file.display());
    }
    let mut header = vec![0u8; len as usize];
    f.read_exact(&mut header)
        .with_context(|| format!("reading the header of {}", file.display()))?;
    let header: serde_json::Map<String, serde_json::Value> = serde_json::from_slice(&header)
        .with_context(|| format!("parsing the header of {}", file.display()))?;
    let mut out = Vec::new();
    for (name, entry) in header {
        if name == "__metadata__" {
            continue;
        }
        let shape = entry["shape"]
            .as_array()
            .and_then(|dims| {
                dims.iter()
                    .map(|d| d.as_u64().map(|d| d as usize))
                    .collect()
            })
            .with_context(|| format!("{}: tensor {name} has no shape", file.display()))?;
        out.push((name, shape));
    }
    Ok(out)
}

/// What synthetic adapters look like.
#[derive(Debug, Clone, PartialEq)]
pub struct SyntheticSpec {
    pub rank: usize,
    pub targets: Vec<Module>,
    /// Labels of a classification head; none for an adapter without a head.
    pub labels: usize,
    pub seed: u64,
}

/// The package bytes of synthetic adapter number `index` (its own random factors).
pub fn package_bytes(
    base: &BaseSpec,
    spec: &SyntheticSpec,
    index: usize,
) -> anyhow::Result<Vec<u8>> {
    let mut rng = ChaCha8Rng::seed_from_u64(spec.seed ^ (index as u64).wrapping_mul(0x9e37_79b9));
    let mut uniform = |n: usize, bound: f32| -> Vec<f32> {
        (0..n)
            .map(|_| rng.random_range(-bound..bound))
            .collect::<Vec<f32>>()
    };
    let r = spec.rank;
    let mut factors = BTreeMap::new();
    for layer in 0..base.num_layers {
        for &module in &spec.targets {
            let site = Site::new(layer, module);
            let Some((out, inp)) = base.shape(&site) else {
                bail!(
                    "the base model ({}) has no {module} matrix",
                    base.model_type
                );
            };
            // A is scaled like a random projection, B small, so the update is a visible but
            // modest change of the base's output.
            let a = uniform(r * inp, 1.0 / (inp as f32).sqrt());
            let b = uniform(out * r, 0.05);
            let a = Tensor::from_vec(a, (r, inp), &Device::Cpu)?;
            let b = Tensor::from_vec(b, (out, r), &Device::Cpu)?;
            factors.insert(site, (a, b));
        }
    }
    let head = if spec.labels > 0 {
        let h = base.hidden_size;
        let w = Tensor::from_vec(
            uniform(spec.labels * h, 1.0),
            (spec.labels, h),
            &Device::Cpu,
        )?;
        let bias = Tensor::zeros(spec.labels, candle_core::DType::F32, &Device::Cpu)?;
        Some((w, bias))
    } else {
        None
    };
    let task = if spec.labels > 0 {
        Task::Classify
    } else if base.model_type == "llama" {
        Task::Generate
    } else {
        Task::Embed
    };
    let pkg = AdapterPackage {
        meta: PackageMeta {
            base_fingerprint: base.fingerprint.clone(),
            rank: r,
            alpha: r as f64,
            task,
            labels: (0..spec.labels).map(|k| format!("label-{k}")).collect(),
            description: format!("synthetic load-test adapter {index} (seed {})", spec.seed),
        },
        factors,
        head,
    };
    let limits = Limits::default();
    pkg.validate("<synthetic>", base, &limits)
        .context("a synthetic adapter does not fit the base")?;
    Ok(pkg.to_bytes()?)
}

/// A number of its own for each adapter name (FNV-1a), so that every name gets other factors
/// whichever list it was created in.
pub fn name_index(name: &str) -> usize {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in name.bytes() {
        h = (h ^ u64::from(b)).wrapping_mul(0x0100_0000_01b3);
    }
    h as usize
}

/// Publishes synthetic adapters `names` into the store folder `dir` (created when missing),
/// each made live; used before a server starts, so that none of them is resident yet.
pub fn write_into_store(
    dir: &Path,
    base: &BaseSpec,
    spec: &SyntheticSpec,
    names: &[String],
) -> anyhow::Result<()> {
    let store = if dir.is_dir() {
        Store::open(dir, Limits::default())
    } else {
        Store::create(dir, Limits::default())
    }
    .with_context(|| format!("opening the adapter store {}", dir.display()))?;
    for name in names {
        let adapter = AdapterName::new(name)?;
        let bytes = package_bytes(base, spec, name_index(name))?;
        let bytes = PackageBytes::from_vec(bytes, name, store.limits())?;
        store
            .publish(&adapter, bytes, name, Some(base))
            .with_context(|| format!("publishing {name} into {}", dir.display()))?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A two-layer BERT-shaped base written as a config and a safetensors header with data.
    fn tiny_base(dir: &Path) {
        std::fs::write(
            dir.join("config.json"),
            r#"{"model_type": "bert", "hidden_size": 8, "intermediate_size": 16, "num_hidden_layers": 2}"#,
        )
        .unwrap();
        let header = r#"{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[0,24]}}"#;
        let mut bytes = (header.len() as u64).to_le_bytes().to_vec();
        bytes.extend_from_slice(header.as_bytes());
        bytes.extend_from_slice(&[0u8; 24]);
        std::fs::write(dir.join("model.safetensors"), bytes).unwrap();
    }

    #[test]
    fn base_is_read_from_the_folder_headers() {
        let dir = tempfile::tempdir().unwrap();
        tiny_base(dir.path());
        let base = read_base(dir.path()).unwrap();
        // The fingerprint of model_type "bert" and one tensor w of shape 2x3.
        assert_eq!(
            base.fingerprint,
            base_fingerprint("bert", &[("w".to_owned(), vec![2, 3])])
        );
        assert_eq!(base.shape(&Site::new(1, Module::MlpUp)), Some((16, 8)));
        assert_eq!(base.shape(&Site::new(0, Module::MlpDown)), Some((8, 16)));
        assert_eq!(base.shape(&Site::new(0, Module::MlpGate)), None);
        assert_eq!(base.targets.len(), 12);
    }

    #[test]
    fn packages_are_seeded_valid_and_land_in_a_store() {
        let dir = tempfile::tempdir().unwrap();
        tiny_base(dir.path());
        let base = read_base(dir.path()).unwrap();
        let spec = SyntheticSpec {
            rank: 2,
            targets: vec![Module::AttnQ, Module::AttnV],
            labels: 3,
            seed: 5,
        };
        let a = package_bytes(&base, &spec, 0).unwrap();
        assert_eq!(a, package_bytes(&base, &spec, 0).unwrap(), "same seed");
        assert_ne!(a, package_bytes(&base, &spec, 1).unwrap(), "another index");
        let pkg = AdapterPackage::from_bytes(&a, "a", &Limits::default()).unwrap();
        assert_eq!(pkg.meta.rank, 2);
        assert_eq!(pkg.meta.task, Task::Classify);
        assert_eq!(pkg.targets().len(), 4, "2 layers x 2 targets");
        let store_dir = dir.path().join("store");
        let names = vec!["syn-0".to_owned(), "syn-1".to_owned()];
        write_into_store(&store_dir, &base, &spec, &names).unwrap();
        let store = Store::open(&store_dir, Limits::default()).unwrap();
        assert_eq!(store.names().unwrap().len(), 2);
        let wrong = SyntheticSpec {
            targets: vec![Module::MlpGate],
            ..spec
        };
        let e = package_bytes(&base, &wrong, 0).unwrap_err().to_string();
        assert!(e.contains("no mlp.gate matrix"), "{e}");
    }
}
