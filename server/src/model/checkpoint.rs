//! Reading a checkpoint folder: config.json, the safetensors files (one, or the shards that
//! `model.safetensors.index.json` names), tokenizer.json.
//!
//! The files are memory-mapped, never read whole: [`Checkpoint`] parses their headers and hands
//! out tensors by name. A projection weight is converted from the file's own dtype (f32, f16 or
//! bf16) and packed in the model's [`WeightFormat`] straight from the mapped bytes, row by row,
//! panels in parallel ([`Weights::packed`]); its pages are then released from the process (the
//! kernel keeps them in the page cache), so loading holds the packed weights, one row per
//! thread, and the pages of the tensor being converted, and never a second copy of the model.
//! Small tensors (norms, biases, position embeddings) become f32 candle tensors.

use std::collections::{BTreeSet, HashMap};
use std::path::{Path, PathBuf};

use anyhow::{Context, bail};
use candle_core::{DType, Device, Tensor};
use candle_nn::VarBuilder;
use safetensors::Dtype;
use switchyard_kernels::pack::quant::Stored;
use switchyard_kernels::{PackedWeight, WeightFormat};

/// The index file of a sharded checkpoint.
pub const INDEX_FILE: &str = "model.safetensors.index.json";

/// Where one tensor's bytes are.
#[derive(Debug, Clone)]
struct Entry {
    file: usize,
    dtype: Dtype,
    shape: Vec<usize>,
    /// Byte range inside the file.
    start: usize,
    end: usize,
}

/// A checkpoint file's bytes: memory-mapped, or held (a checkpoint built in memory by tests).
enum Bytes {
    Mapped(memmap2::Mmap),
    Held(Vec<u8>),
}

impl Bytes {
    fn as_slice(&self) -> &[u8] {
        match self {
            Bytes::Mapped(m) => m,
            Bytes::Held(v) => v,
        }
    }

    /// Drops this process's pages of `range` (rounded out to whole pages): the data stays in
    /// the page cache, and a later read maps it back in.
    fn release(&self, range: std::ops::Range<usize>) {
        let Bytes::Mapped(map) = self else { return };
        const PAGE: usize = 4096;
        let start = range.start / PAGE * PAGE;
        let end = range.end.div_ceil(PAGE).saturating_mul(PAGE).min(map.len());
        if end <= start {
            return;
        }
        // SAFETY: the map is a read-only shared mapping of a file; MADV_DONTNEED on such a
        // mapping frees only this process's page table entries, and the next access reads the
        // same file contents back, so no slice into the map changes value. The range lies
        // inside the map (clamped above). A failure only leaves the pages resident.
        #[allow(unsafe_code)]
        let _ = unsafe {
            map.unchecked_advise_range(memmap2::UncheckedAdvice::DontNeed, start, end - start)
        };
    }
}

/// A checkpoint folder with its weights memory-mapped.
pub struct Checkpoint {
    pub dir: PathBuf,
    pub config: serde_json::Value,
    files: Vec<(PathBuf, Bytes)>,
    tensors: HashMap<String, Entry>,
}

impl Checkpoint {
    /// Reads config.json and maps the weights of `dir`: the shards named by
    /// `model.safetensors.index.json` where there is one, else every `*.safetensors` file.
    pub fn open(dir: &Path) -> anyhow::Result<Self> {
        if !dir.is_dir() {
            bail!(
                "model folder {} does not exist or is not a folder",
                dir.display()
            );
        }
        let config = read_config(dir)?;
        let index_path = dir.join(INDEX_FILE);
        let (names, wanted) = if index_path.exists() {
            let (files, map) = read_index(&index_path)?;
            (files, Some(map))
        } else {
            let mut files: Vec<String> = std::fs::read_dir(dir)
                .with_context(|| format!("listing {}", dir.display()))?
                .filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| p.extension().is_some_and(|x| x == "safetensors"))
                .filter_map(|p| p.file_name().map(|n| n.to_string_lossy().into_owned()))
                .collect();
            files.sort();
            (files, None)
        };
        if names.is_empty() {
            bail!("model folder {} holds no *.safetensors file", dir.display());
        }
        let mut files = Vec::with_capacity(names.len());
        for name in &names {
            let path = dir.join(name);
            let file = std::fs::File::open(&path)
                .with_context(|| format!("opening weights {}", path.display()))?;
            // SAFETY: the map is read-only; the checkpoint's files are not expected to change
            // while the server runs (as for any program that maps its data). A file truncated
            // meanwhile would fault on access, not give wrong values silently.
            #[allow(unsafe_code)]
            let map = unsafe { memmap2::Mmap::map(&file) }
                .with_context(|| format!("memory-mapping {}", path.display()))?;
            files.push((path, Bytes::Mapped(map)));
        }
        let ckpt = Self::from_files(dir, config, files)?;
        if let Some(map) = wanted {
            for (tensor, file) in &map {
                let found = ckpt.tensors.get(tensor).map(|e| &names[e.file]);
                if found != Some(file) {
                    bail!(
                        "{}: tensor {tensor} is listed in {file}, which does not hold it",
                        index_path.display()
                    );
                }
            }
        }
        Ok(ckpt)
    }

    /// A checkpoint of in-memory tensors, as if read from one file (for tests and tools).
    pub fn from_tensors(
        config: serde_json::Value,
        tensors: &HashMap<String, Tensor>,
    ) -> anyhow::Result<Self> {
        let mut sorted: Vec<(&String, &Tensor)> = tensors.iter().collect();
        sorted.sort_by_key(|(n, _)| n.as_str());
        let bytes = safetensors::serialize(sorted, None).context("serialising tensors")?;
        Self::from_files(
            Path::new(""),
            config,
            vec![(PathBuf::from("memory"), Bytes::Held(bytes))],
        )
    }

    fn from_files(
        dir: &Path,
        config: serde_json::Value,
        files: Vec<(PathBuf, Bytes)>,
    ) -> anyhow::Result<Self> {
        let mut tensors = HashMap::new();
        for (i, (path, bytes)) in files.iter().enumerate() {
            let data = bytes.as_slice();
            let (n, meta) = safetensors::SafeTensors::read_metadata(data)
                .map_err(|e| anyhow::anyhow!("reading the header of {}: {e}", path.display()))?;
            let base = 8 + n;
            for (name, info) in meta.tensors() {
                let (start, end) = (base + info.data_offsets.0, base + info.data_offsets.1);
                if end > data.len() {
                    bail!("{}: tensor {name} runs past the file's end", path.display());
                }
                let entry = Entry {
                    file: i,
                    dtype: info.dtype,
                    shape: info.shape.clone(),
                    start,
                    end,
                };
                if tensors.insert(name.clone(), entry).is_some() {
                    bail!("tensor {name} is in more than one checkpoint file");
                }
            }
        }
        Ok(Self {
            dir: dir.to_owned(),
            config,
            files,
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
            .map(|(n, e)| (n.clone(), e.shape.clone()))
            .collect()
    }

    /// Bytes of every tensor as stored in the files.
    pub fn stored_bytes(&self) -> usize {
        self.tensors.values().map(|e| e.end - e.start).sum()
    }

    /// The checkpoint's files (for measuring how long reading them takes).
    pub fn files(&self) -> Vec<PathBuf> {
        self.files.iter().map(|(p, _)| p.clone()).collect()
    }

    pub fn contains(&self, name: &str) -> bool {
        self.tensors.contains_key(name)
    }

    /// The stored dtype of the first projection-like tensor (2-D, floating point): what the
    /// checkpoint "is" for the startup log.
    pub fn weight_dtype(&self) -> Option<Dtype> {
        let names: BTreeSet<&String> = self.tensors.keys().collect();
        names
            .into_iter()
            .map(|n| &self.tensors[n])
            .find(|e| e.shape.len() == 2 && float_size(e.dtype).is_some())
            .map(|e| e.dtype)
    }

    fn entry(&self, name: &str, shape: &[usize]) -> anyhow::Result<&Entry> {
        let e = self
            .tensors
            .get(name)
            .ok_or_else(|| anyhow::anyhow!("the checkpoint has no tensor {name}"))?;
        if e.shape != shape {
            bail!(
                "tensor {name} has shape {:?}, the config says {shape:?}",
                e.shape
            );
        }
        if float_size(e.dtype).is_none() {
            bail!(
                "tensor {name} is {:?}; weights must be F32, F16 or BF16",
                e.dtype
            );
        }
        Ok(e)
    }

    fn bytes(&self, e: &Entry) -> &[u8] {
        &self.files[e.file].1.as_slice()[e.start..e.end]
    }

    /// A tensor as f32 values, checked against `shape`.
    pub fn f32_values(&self, name: &str, shape: &[usize]) -> anyhow::Result<Vec<f32>> {
        let e = self.entry(name, shape)?;
        let mut out = vec![0f32; e.shape.iter().product()];
        convert(e.dtype, self.bytes(e), &mut out);
        Ok(out)
    }

    /// A tensor as an f32 candle tensor, checked against `shape`.
    pub fn tensor(&self, name: &str, shape: &[usize]) -> anyhow::Result<Tensor> {
        let v = self.f32_values(name, shape)?;
        Ok(Tensor::from_vec(v, shape, &Device::Cpu)?)
    }

    /// A 2-D tensor `[out, inp]` packed in `format`, converted row by row from the mapped
    /// bytes; its pages are released afterwards.
    pub fn packed(
        &self,
        name: &str,
        out: usize,
        inp: usize,
        format: WeightFormat,
    ) -> anyhow::Result<PackedWeight> {
        let e = self.entry(name, &[out, inp])?;
        let bytes = self.bytes(e);
        let size = float_size(e.dtype).unwrap_or(4);
        let packed = PackedWeight::pack_rows(out, inp, format, |j, row| {
            convert(e.dtype, &bytes[j * inp * size..(j + 1) * inp * size], row)
        })
        .with_context(|| format!("converting {name} to {format}"))?;
        self.files[e.file].1.release(e.start..e.end);
        Ok(packed)
    }

    /// Rows `rows` of a 2-D tensor `[out, inp]` packed in `format` as a weight of their own (a
    /// projection fused with others in the checkpoint, such as Phi-3's `qkv_proj`).
    pub fn packed_rows(
        &self,
        name: &str,
        (out, inp): (usize, usize),
        rows: std::ops::Range<usize>,
        format: WeightFormat,
    ) -> anyhow::Result<PackedWeight> {
        let e = self.entry(name, &[out, inp])?;
        anyhow::ensure!(
            rows.start <= rows.end && rows.end <= out,
            "{name}: rows {rows:?} are outside its {out} rows"
        );
        let bytes = self.bytes(e);
        let size = float_size(e.dtype).unwrap_or(4);
        let first = rows.start;
        let packed = PackedWeight::pack_rows(rows.len(), inp, format, |j, row| {
            let j = first + j;
            convert(e.dtype, &bytes[j * inp * size..(j + 1) * inp * size], row)
        })
        .with_context(|| format!("converting rows {rows:?} of {name} to {format}"))?;
        // The parts are read in order; the last one releases the tensor's pages.
        if rows.end == out {
            self.files[e.file].1.release(e.start..e.end);
        }
        Ok(packed)
    }

    /// A variable builder over every floating-point tensor as f32 (a full copy: for training,
    /// whose differentiable encoder computes in f32 candle tensors).
    pub fn var_builder(&self) -> anyhow::Result<VarBuilder<'static>> {
        let mut map = HashMap::new();
        for (name, e) in &self.tensors {
            if float_size(e.dtype).is_some() {
                map.insert(name.clone(), self.tensor(name, &e.shape.clone())?);
            }
        }
        Ok(VarBuilder::from_tensors(map, DType::F32, &Device::Cpu))
    }

    pub fn tokenizer_path(&self) -> PathBuf {
        self.dir.join("tokenizer.json")
    }
}

fn read_config(dir: &Path) -> anyhow::Result<serde_json::Value> {
    let config_path = dir.join("config.json");
    let text = std::fs::read_to_string(&config_path)
        .with_context(|| format!("reading {}", config_path.display()))?;
    serde_json::from_str(&text)
        .with_context(|| format!("parsing {} as JSON", config_path.display()))
}

/// The shard files of an index (sorted, each once) and its tensor → file map.
fn read_index(path: &Path) -> anyhow::Result<(Vec<String>, HashMap<String, String>)> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let v: serde_json::Value = serde_json::from_str(&text)
        .with_context(|| format!("parsing {} as JSON", path.display()))?;
    let map = v
        .get("weight_map")
        .and_then(|m| m.as_object())
        .ok_or_else(|| anyhow::anyhow!("{}: no \"weight_map\" object", path.display()))?;
    let mut files = BTreeSet::new();
    let mut out = HashMap::new();
    for (tensor, file) in map {
        let file = file.as_str().ok_or_else(|| {
            anyhow::anyhow!(
                "{}: weight_map[{tensor:?}] is not a file name",
                path.display()
            )
        })?;
        if file.contains('/') || file.contains('\\') || file.starts_with('.') {
            bail!(
                "{}: weight_map[{tensor:?}] names {file:?}, not a file of this folder",
                path.display()
            );
        }
        files.insert(file.to_owned());
        out.insert(tensor.clone(), file.to_owned());
    }
    Ok((files.into_iter().collect(), out))
}

/// Bytes per value of a floating-point dtype the loader converts; `None` for the rest.
fn float_size(dtype: Dtype) -> Option<usize> {
    match dtype {
        Dtype::F32 => Some(4),
        Dtype::F16 | Dtype::BF16 => Some(2),
        _ => None,
    }
}

/// Little-endian values of `dtype` to f32 (exact for all three), by the kernels crate's
/// converter (optimised in every build profile: this runs over every weight at load).
fn convert(dtype: Dtype, bytes: &[u8], out: &mut [f32]) {
    let stored = match dtype {
        Dtype::F32 => Stored::F32,
        Dtype::BF16 => Stored::Bf16,
        Dtype::F16 => Stored::F16,
        other => unreachable!("{other:?} is refused before conversion"),
    };
    stored.decode_le(bytes, out);
}

/// A view of a checkpoint under a name prefix, with the format its projection weights are held
/// in: what a model's `new(cfg, weights)` reads from.
#[derive(Clone)]
pub struct Weights<'a> {
    ckpt: &'a Checkpoint,
    prefix: String,
    pub format: WeightFormat,
}

impl<'a> Weights<'a> {
    pub fn new(ckpt: &'a Checkpoint, format: WeightFormat) -> Self {
        Self {
            ckpt,
            prefix: String::new(),
            format,
        }
    }

    fn name(&self, name: &str) -> String {
        if self.prefix.is_empty() {
            name.to_owned()
        } else {
            format!("{}.{name}", self.prefix)
        }
    }

    /// The view under `prefix.`.
    pub fn pp(&self, prefix: impl AsRef<str>) -> Weights<'a> {
        Weights {
            ckpt: self.ckpt,
            prefix: self.name(prefix.as_ref()),
            format: self.format,
        }
    }

    pub fn contains(&self, name: &str) -> bool {
        self.ckpt.contains(&self.name(name))
    }

    /// A small tensor as f32 (norms, biases, position embeddings).
    pub fn tensor(&self, name: &str, shape: &[usize]) -> candle_core::Result<Tensor> {
        self.ckpt
            .tensor(&self.name(name), shape)
            .map_err(|e| candle_core::Error::Msg(format!("{e:#}")))
    }

    /// A 2-D weight `[out, inp]` packed in this view's format.
    pub fn packed(&self, name: &str, out: usize, inp: usize) -> candle_core::Result<PackedWeight> {
        self.ckpt
            .packed(&self.name(name), out, inp, self.format)
            .map_err(|e| candle_core::Error::Msg(format!("{e:#}")))
    }

    /// Rows `rows` of a 2-D weight `[out, inp]`, packed in this view's format as a weight of
    /// their own.
    pub fn packed_rows(
        &self,
        name: &str,
        shape: (usize, usize),
        rows: std::ops::Range<usize>,
    ) -> candle_core::Result<PackedWeight> {
        self.ckpt
            .packed_rows(&self.name(name), shape, rows, self.format)
            .map_err(|e| candle_core::Error::Msg(format!("{e:#}")))
    }
}

/// Loads a tokenizer.json with a message that names the file.
pub fn load_tokenizer(path: &Path) -> anyhow::Result<tokenizers::Tokenizer> {
    tokenizers::Tokenizer::from_file(path)
        .map_err(|e| anyhow::anyhow!("loading tokenizer {}: {e}", path.display()))
}
