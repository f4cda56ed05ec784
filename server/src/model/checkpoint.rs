//! Reading a checkpoint folder: config.json, every *.safetensors file, tokenizer.json.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use anyhow::{Context, bail};
use candle_core::{DType, Device, Tensor};
use candle_nn::VarBuilder;

/// A checkpoint folder's weights and config, loaded into memory.
pub struct Checkpoint {
    pub dir: PathBuf,
    pub config: serde_json::Value,
    pub tensors: HashMap<String, Tensor>,
}

impl Checkpoint {
    /// Reads config.json and all *.safetensors files of `dir`.
    pub fn open(dir: &Path) -> anyhow::Result<Self> {
        if !dir.is_dir() {
            bail!(
                "model folder {} does not exist or is not a folder",
                dir.display()
            );
        }
        let config_path = dir.join("config.json");
        let text = std::fs::read_to_string(&config_path)
            .with_context(|| format!("reading {}", config_path.display()))?;
        let config: serde_json::Value = serde_json::from_str(&text)
            .with_context(|| format!("parsing {} as JSON", config_path.display()))?;
        let mut files: Vec<PathBuf> = std::fs::read_dir(dir)
            .with_context(|| format!("listing {}", dir.display()))?
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| p.extension().is_some_and(|x| x == "safetensors"))
            .collect();
        files.sort();
        if files.is_empty() {
            bail!("model folder {} holds no *.safetensors file", dir.display());
        }
        let mut tensors = HashMap::new();
        for file in &files {
            let part = candle_core::safetensors::load(file, &Device::Cpu)
                .with_context(|| format!("loading weights from {}", file.display()))?;
            tensors.extend(part);
        }
        Ok(Self {
            dir: dir.to_owned(),
            config,
            tensors,
        })
    }

    /// `config.json`'s `model_type`, or an empty string where it has none.
    pub fn model_type(&self) -> &str {
        self.config
            .get("model_type")
            .and_then(|v| v.as_str())
            .unwrap_or("")
    }

    /// Names and shapes of every tensor, for the base fingerprint.
    pub fn tensor_shapes(&self) -> Vec<(String, Vec<usize>)> {
        self.tensors
            .iter()
            .map(|(n, t)| (n.clone(), t.dims().to_vec()))
            .collect()
    }

    /// A variable builder over the weights, converting them to f32.
    pub fn var_builder(&self) -> VarBuilder<'static> {
        VarBuilder::from_tensors(self.tensors.clone(), DType::F32, &Device::Cpu)
    }

    pub fn tokenizer_path(&self) -> PathBuf {
        self.dir.join("tokenizer.json")
    }
}

/// Loads a tokenizer.json with a message that names the file.
pub fn load_tokenizer(path: &Path) -> anyhow::Result<tokenizers::Tokenizer> {
    tokenizers::Tokenizer::from_file(path)
        .map_err(|e| anyhow::anyhow!("loading tokenizer {}: {e}", path.display()))
}
