//! The adapter package: one self-describing safetensors file per adapter version.
//!
//! Tensors are `layers.{i}.{module}.A [r, in]` and `layers.{i}.{module}.B [out, r]` in f32, plus
//! an optional task head `head.weight [labels, hidden]` and `head.bias [labels]`. The header's
//! string metadata carries `format_version`, `base_fingerprint`, `rank`, `alpha`, `task`,
//! `labels` (a JSON array, for a head) and `description`. The version of a package is a content
//! hash of its bytes.
//!
//! Reading checks the structure of the file; [`AdapterPackage::validate`] checks it against a
//! base model. Every refusal is a [`PackageError`] naming the file, the tensor where there is one,
//! and the rule.

use std::collections::{BTreeMap, HashMap};
use std::fmt;
use std::path::Path;

use candle_core::{Device, Tensor};
use safetensors::{Dtype, SafeTensors};
use sha2::{Digest, Sha256};

use crate::fingerprint::BaseSpec;
use crate::site::{Factor, Site};

/// The package format version this build reads and writes.
pub const FORMAT_VERSION: u32 = 1;

/// Size limits applied before anything is parsed or resident.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Limits {
    pub max_header_bytes: usize,
    pub max_file_bytes: u64,
    pub max_rank: usize,
}

impl Default for Limits {
    fn default() -> Self {
        Self {
            max_header_bytes: 1 << 20,
            max_file_bytes: 1 << 30,
            max_rank: 256,
        }
    }
}

/// What the adapter is for; decides which endpoints may use it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Task {
    Generate,
    Embed,
    Classify,
}

impl Task {
    pub fn as_str(self) -> &'static str {
        match self {
            Task::Generate => "generate",
            Task::Embed => "embed",
            Task::Classify => "classify",
        }
    }

    pub fn parse(s: &str) -> Option<Task> {
        match s {
            "generate" => Some(Task::Generate),
            "embed" => Some(Task::Embed),
            "classify" => Some(Task::Classify),
            _ => None,
        }
    }
}

impl fmt::Display for Task {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// The header metadata of a package.
#[derive(Debug, Clone, PartialEq)]
pub struct PackageMeta {
    pub base_fingerprint: String,
    pub rank: usize,
    pub alpha: f64,
    pub task: Task,
    pub labels: Vec<String>,
    pub description: String,
}

impl PackageMeta {
    /// The scale `s = alpha / r` applied to `B A`.
    pub fn scale(&self) -> f64 {
        self.alpha / self.rank as f64
    }
}

/// A package as read from (or about to be written to) a file.
#[derive(Debug, Clone)]
pub struct AdapterPackage {
    pub meta: PackageMeta,
    /// `(A [r, in], B [out, r])` per targeted site.
    pub factors: BTreeMap<Site, (Tensor, Tensor)>,
    /// `(weight [labels, hidden], bias [labels])`.
    pub head: Option<(Tensor, Tensor)>,
}

/// Why a package was refused. Every variant names the file it came from.
#[derive(Debug, thiserror::Error)]
pub enum PackageError {
    #[error("{file}: cannot read the package: {source}")]
    Io {
        file: String,
        source: std::io::Error,
    },
    #[error("{file}: file is {size} bytes, over the limit of {limit} bytes (rule: file size)")]
    FileTooLarge { file: String, size: u64, limit: u64 },
    #[error("{file}: header is {size} bytes, over the limit of {limit} bytes (rule: header size)")]
    HeaderTooLarge {
        file: String,
        size: usize,
        limit: usize,
    },
    #[error("{file}: not a readable safetensors file: {reason} (rule: safetensors structure)")]
    NotSafetensors { file: String, reason: String },
    #[error("{file}: metadata `{key}`: {problem} (rule: metadata)")]
    Metadata {
        file: String,
        key: String,
        problem: String,
    },
    #[error(
        "{file}: tensor `{tensor}` is not a canonical name; expected layers.N.MODULE.A or .B with MODULE one of attn.q, attn.k, attn.v, attn.o, mlp.gate, mlp.up, mlp.down, or head.weight / head.bias (rule: tensor names)"
    )]
    UnknownTensor { file: String, tensor: String },
    #[error("{file}: tensor `{tensor}` has dtype {dtype}, only F32 is accepted (rule: dtype)")]
    Dtype {
        file: String,
        tensor: String,
        dtype: String,
    },
    #[error(
        "{file}: `{site}` has factor {present} but not its pair {missing} (rule: factor pairs)"
    )]
    MissingFactor {
        file: String,
        site: String,
        present: String,
        missing: String,
    },
    #[error("{file}: tensor `{tensor}` {problem} (rule: shapes)")]
    Shape {
        file: String,
        tensor: String,
        problem: String,
    },
    #[error("{file}: tensor `{tensor}`: rank {rank} {problem} (rule: rank)")]
    Rank {
        file: String,
        tensor: String,
        rank: usize,
        problem: String,
    },
    #[error(
        "{file}: tensor `{tensor}` holds a non-finite value at flat index {index} (rule: finite values)"
    )]
    NonFinite {
        file: String,
        tensor: String,
        index: usize,
    },
    #[error(
        "{file}: built for base model {found}, but the loaded base is {expected} (rule: base fingerprint)"
    )]
    Fingerprint {
        file: String,
        expected: String,
        found: String,
    },
    #[error("{file}: the package holds no factor tensors (rule: tensor names)")]
    Empty { file: String },
    #[error(
        "{file}: tensor `{tensor}` targets a matrix the base model does not have (rule: shapes)"
    )]
    NoSuchTarget { file: String, tensor: String },
}

/// Content hash used as a package version: first 16 hex digits of the sha256 of the file.
pub fn content_version(bytes: &[u8]) -> String {
    Sha256::digest(bytes)
        .iter()
        .take(8)
        .map(|b| format!("{b:02x}"))
        .collect()
}

impl AdapterPackage {
    /// Reads and structurally checks a package file.
    pub fn read(path: &Path, limits: &Limits) -> Result<(Self, String), PackageError> {
        let file = path.display().to_string();
        let size = std::fs::metadata(path)
            .map_err(|source| PackageError::Io {
                file: file.clone(),
                source,
            })?
            .len();
        if size > limits.max_file_bytes {
            return Err(PackageError::FileTooLarge {
                file,
                size,
                limit: limits.max_file_bytes,
            });
        }
        let bytes = std::fs::read(path).map_err(|source| PackageError::Io {
            file: file.clone(),
            source,
        })?;
        let pkg = Self::from_bytes(&bytes, &file, limits)?;
        Ok((pkg, content_version(&bytes)))
    }

    /// Parses a package from its bytes; `file` names it in errors.
    pub fn from_bytes(bytes: &[u8], file: &str, limits: &Limits) -> Result<Self, PackageError> {
        let not_st = |reason: String| PackageError::NotSafetensors {
            file: file.to_owned(),
            reason,
        };
        if bytes.len() as u64 > limits.max_file_bytes {
            return Err(PackageError::FileTooLarge {
                file: file.to_owned(),
                size: bytes.len() as u64,
                limit: limits.max_file_bytes,
            });
        }
        if bytes.len() < 8 {
            return Err(not_st(format!(
                "{} bytes is too short for a header length",
                bytes.len()
            )));
        }
        let header_len = u64::from_le_bytes(bytes[..8].try_into().unwrap());
        if header_len > limits.max_header_bytes as u64 {
            return Err(PackageError::HeaderTooLarge {
                file: file.to_owned(),
                size: header_len.min(usize::MAX as u64) as usize,
                limit: limits.max_header_bytes,
            });
        }
        let (_, header) = SafeTensors::read_metadata(bytes).map_err(|e| not_st(e.to_string()))?;
        let st = SafeTensors::deserialize(bytes).map_err(|e| not_st(e.to_string()))?;
        let empty = HashMap::new();
        let metadata = header.metadata().as_ref().unwrap_or(&empty);
        let meta = parse_meta(metadata, file, limits)?;

        let mut a_parts: BTreeMap<Site, Tensor> = BTreeMap::new();
        let mut b_parts: BTreeMap<Site, Tensor> = BTreeMap::new();
        let mut head_w = None;
        let mut head_b = None;
        let mut names: Vec<String> = st.names().into_iter().map(|n| n.to_string()).collect();
        names.sort();
        for name in names {
            let view = st.tensor(&name).map_err(|e| not_st(e.to_string()))?;
            if view.dtype() != Dtype::F32 {
                return Err(PackageError::Dtype {
                    file: file.to_owned(),
                    tensor: name,
                    dtype: format!("{:?}", view.dtype()),
                });
            }
            let tensor = to_tensor(view.data(), view.shape(), file, &name)?;
            match name.as_str() {
                "head.weight" => head_w = Some(tensor),
                "head.bias" => head_b = Some(tensor),
                _ => match Site::parse_tensor_name(&name) {
                    Some((site, Factor::A)) => {
                        a_parts.insert(site, tensor);
                    }
                    Some((site, Factor::B)) => {
                        b_parts.insert(site, tensor);
                    }
                    None => {
                        return Err(PackageError::UnknownTensor {
                            file: file.to_owned(),
                            tensor: name,
                        });
                    }
                },
            }
        }

        let mut factors = BTreeMap::new();
        for (site, a) in a_parts {
            let Some(b) = b_parts.remove(&site) else {
                return Err(missing(file, site, Factor::A));
            };
            check_factor_shapes(file, site, &a, &b, meta.rank)?;
            factors.insert(site, (a, b));
        }
        if let Some((&site, _)) = b_parts.iter().next() {
            return Err(missing(file, site, Factor::B));
        }
        if factors.is_empty() {
            return Err(PackageError::Empty {
                file: file.to_owned(),
            });
        }
        let head = match (head_w, head_b) {
            (None, None) => None,
            (Some(w), Some(b)) => Some((w, b)),
            (Some(_), None) => {
                return Err(PackageError::Shape {
                    file: file.to_owned(),
                    tensor: "head.weight".to_owned(),
                    problem: "comes without head.bias".to_owned(),
                });
            }
            (None, Some(_)) => {
                return Err(PackageError::Shape {
                    file: file.to_owned(),
                    tensor: "head.bias".to_owned(),
                    problem: "comes without head.weight".to_owned(),
                });
            }
        };
        let pkg = AdapterPackage {
            meta,
            factors,
            head,
        };
        pkg.check_head(file)?;
        Ok(pkg)
    }

    fn check_head(&self, file: &str) -> Result<(), PackageError> {
        let labels = self.meta.labels.len();
        match (&self.head, self.meta.task) {
            (None, Task::Classify) => Err(PackageError::Metadata {
                file: file.to_owned(),
                key: "task".to_owned(),
                problem: "is classify but the package has no head.weight / head.bias".to_owned(),
            }),
            (Some(_), task) if task != Task::Classify => Err(PackageError::Metadata {
                file: file.to_owned(),
                key: "task".to_owned(),
                problem: format!("is {task} but the package carries a classification head"),
            }),
            (Some((w, b)), _) => {
                let shape_err = |tensor: &str, problem: String| PackageError::Shape {
                    file: file.to_owned(),
                    tensor: tensor.to_owned(),
                    problem,
                };
                let dims = w.dims();
                if dims.len() != 2 || dims[0] != labels {
                    return Err(shape_err(
                        "head.weight",
                        format!(
                            "has shape {dims:?}, expected [{labels}, hidden] for {labels} labels"
                        ),
                    ));
                }
                if b.dims() != [labels] {
                    return Err(shape_err(
                        "head.bias",
                        format!(
                            "has shape {:?}, expected [{labels}] for {labels} labels",
                            b.dims()
                        ),
                    ));
                }
                Ok(())
            }
            (None, _) => Ok(()),
        }
    }

    /// Checks the package against a base model: fingerprint, targets, shapes and ranks.
    pub fn validate(
        &self,
        file: &str,
        base: &BaseSpec,
        limits: &Limits,
    ) -> Result<(), PackageError> {
        if self.meta.base_fingerprint != base.fingerprint {
            return Err(PackageError::Fingerprint {
                file: file.to_owned(),
                expected: base.fingerprint.clone(),
                found: self.meta.base_fingerprint.clone(),
            });
        }
        for (site, (a, b)) in &self.factors {
            let a_name = site.tensor_name(Factor::A);
            let Some((out, inp)) = base.shape(site) else {
                return Err(PackageError::NoSuchTarget {
                    file: file.to_owned(),
                    tensor: a_name,
                });
            };
            let (r, a_in) = a.dims2().expect("checked at read");
            let (b_out, _) = b.dims2().expect("checked at read");
            if a_in != inp {
                return Err(PackageError::Shape {
                    file: file.to_owned(),
                    tensor: a_name,
                    problem: format!("has {a_in} columns, but the base matrix takes {inp} inputs"),
                });
            }
            if b_out != out {
                return Err(PackageError::Shape {
                    file: file.to_owned(),
                    tensor: site.tensor_name(Factor::B),
                    problem: format!("has {b_out} rows, but the base matrix gives {out} outputs"),
                });
            }
            if r > inp.min(out) {
                return Err(PackageError::Rank {
                    file: file.to_owned(),
                    tensor: a_name,
                    rank: r,
                    problem: format!("is above min(in, out) = {}", inp.min(out)),
                });
            }
            if r > limits.max_rank {
                return Err(PackageError::Rank {
                    file: file.to_owned(),
                    tensor: a_name,
                    rank: r,
                    problem: format!("is above the configured maximum {}", limits.max_rank),
                });
            }
        }
        if let Some((w, _)) = &self.head {
            let hidden = w.dims()[1];
            if hidden != base.hidden_size {
                return Err(PackageError::Shape {
                    file: file.to_owned(),
                    tensor: "head.weight".to_owned(),
                    problem: format!(
                        "has {hidden} columns, but the base model's hidden size is {}",
                        base.hidden_size
                    ),
                });
            }
        }
        Ok(())
    }

    /// Serialises the package to safetensors bytes with its metadata.
    pub fn to_bytes(&self) -> Result<Vec<u8>, PackageError> {
        let mut named: Vec<(String, Vec<usize>, Vec<u8>)> = Vec::new();
        let mut push = |name: String, t: &Tensor| -> Result<(), PackageError> {
            let values = t
                .flatten_all()
                .and_then(|f| f.to_vec1::<f32>())
                .map_err(|e| PackageError::Shape {
                    file: "<new package>".to_owned(),
                    tensor: name.clone(),
                    problem: format!("cannot be read as f32: {e}"),
                })?;
            let bytes = values.iter().flat_map(|v| v.to_le_bytes()).collect();
            named.push((name, t.dims().to_vec(), bytes));
            Ok(())
        };
        for (site, (a, b)) in &self.factors {
            push(site.tensor_name(Factor::A), a)?;
            push(site.tensor_name(Factor::B), b)?;
        }
        if let Some((w, b)) = &self.head {
            push("head.weight".to_owned(), w)?;
            push("head.bias".to_owned(), b)?;
        }
        let views: Vec<(String, safetensors::tensor::TensorView<'_>)> = named
            .iter()
            .map(|(n, shape, bytes)| {
                let view = safetensors::tensor::TensorView::new(Dtype::F32, shape.clone(), bytes)
                    .expect("shape and byte length agree by construction");
                (n.clone(), view)
            })
            .collect();
        let mut info = HashMap::new();
        info.insert("format_version".to_owned(), FORMAT_VERSION.to_string());
        info.insert(
            "base_fingerprint".to_owned(),
            self.meta.base_fingerprint.clone(),
        );
        info.insert("rank".to_owned(), self.meta.rank.to_string());
        info.insert("alpha".to_owned(), self.meta.alpha.to_string());
        info.insert("task".to_owned(), self.meta.task.as_str().to_owned());
        if !self.meta.labels.is_empty() {
            info.insert(
                "labels".to_owned(),
                serde_json::to_string(&self.meta.labels).expect("strings serialise"),
            );
        }
        info.insert("description".to_owned(), self.meta.description.clone());
        safetensors::tensor::serialize(views, Some(info)).map_err(|e| {
            PackageError::NotSafetensors {
                file: "<new package>".to_owned(),
                reason: e.to_string(),
            }
        })
    }

    /// Writes the package to `path` and returns its content version.
    pub fn write(&self, path: &Path) -> Result<String, PackageError> {
        let bytes = self.to_bytes()?;
        std::fs::write(path, &bytes).map_err(|source| PackageError::Io {
            file: path.display().to_string(),
            source,
        })?;
        Ok(content_version(&bytes))
    }

    /// The sites this package targets, in canonical order.
    pub fn targets(&self) -> Vec<Site> {
        self.factors.keys().copied().collect()
    }
}

fn missing(file: &str, site: Site, present: Factor) -> PackageError {
    let (p, m) = match present {
        Factor::A => (Factor::A, Factor::B),
        Factor::B => (Factor::B, Factor::A),
    };
    PackageError::MissingFactor {
        file: file.to_owned(),
        site: site.to_string(),
        present: site.tensor_name(p),
        missing: site.tensor_name(m),
    }
}

fn check_factor_shapes(
    file: &str,
    site: Site,
    a: &Tensor,
    b: &Tensor,
    rank: usize,
) -> Result<(), PackageError> {
    let a_name = site.tensor_name(Factor::A);
    let b_name = site.tensor_name(Factor::B);
    let shape_err = |tensor: String, problem: String| PackageError::Shape {
        file: file.to_owned(),
        tensor,
        problem,
    };
    if a.dims().len() != 2 {
        return Err(shape_err(
            a_name,
            format!("has shape {:?}, expected [r, in]", a.dims()),
        ));
    }
    if b.dims().len() != 2 {
        return Err(shape_err(
            b_name,
            format!("has shape {:?}, expected [out, r]", b.dims()),
        ));
    }
    let (ra, _) = a.dims2().unwrap();
    let (_, rb) = b.dims2().unwrap();
    if ra != rank {
        return Err(PackageError::Rank {
            file: file.to_owned(),
            tensor: a_name,
            rank: ra,
            problem: format!("(rows of A) differs from the declared rank {rank}"),
        });
    }
    if rb != rank {
        return Err(PackageError::Rank {
            file: file.to_owned(),
            tensor: b_name,
            rank: rb,
            problem: format!("(columns of B) differs from the declared rank {rank}"),
        });
    }
    Ok(())
}

fn to_tensor(data: &[u8], shape: &[usize], file: &str, name: &str) -> Result<Tensor, PackageError> {
    let values: Vec<f32> = data
        .chunks_exact(4)
        .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
        .collect();
    if let Some(index) = values.iter().position(|v| !v.is_finite()) {
        return Err(PackageError::NonFinite {
            file: file.to_owned(),
            tensor: name.to_owned(),
            index,
        });
    }
    Tensor::from_vec(values, shape, &Device::Cpu).map_err(|e| PackageError::Shape {
        file: file.to_owned(),
        tensor: name.to_owned(),
        problem: format!("cannot be built: {e}"),
    })
}

fn parse_meta(
    md: &HashMap<String, String>,
    file: &str,
    limits: &Limits,
) -> Result<PackageMeta, PackageError> {
    let err = |key: &str, problem: String| PackageError::Metadata {
        file: file.to_owned(),
        key: key.to_owned(),
        problem,
    };
    const KNOWN: [&str; 7] = [
        "format_version",
        "base_fingerprint",
        "rank",
        "alpha",
        "task",
        "labels",
        "description",
    ];
    let mut keys: Vec<&String> = md.keys().collect();
    keys.sort();
    if let Some(unknown) = keys.into_iter().find(|k| !KNOWN.contains(&k.as_str())) {
        return Err(err(
            unknown,
            format!("is not a known key (known: {})", KNOWN.join(", ")),
        ));
    }
    let get = |key: &str| md.get(key).ok_or_else(|| err(key, "is missing".to_owned()));
    let version = get("format_version")?;
    if version.trim() != FORMAT_VERSION.to_string() {
        return Err(err(
            "format_version",
            format!("is {version:?}, this build reads version {FORMAT_VERSION}"),
        ));
    }
    let base_fingerprint = get("base_fingerprint")?.clone();
    if base_fingerprint.is_empty() {
        return Err(err("base_fingerprint", "is empty".to_owned()));
    }
    let rank_text = get("rank")?;
    let rank: usize = rank_text
        .trim()
        .parse()
        .map_err(|_| err("rank", format!("is {rank_text:?}, not a whole number")))?;
    if rank == 0 {
        return Err(err("rank", "is 0; the rank must be at least 1".to_owned()));
    }
    if rank > limits.max_rank {
        return Err(PackageError::Rank {
            file: file.to_owned(),
            tensor: "(metadata)".to_owned(),
            rank,
            problem: format!("is above the configured maximum {}", limits.max_rank),
        });
    }
    let alpha_text = get("alpha")?;
    let alpha: f64 = alpha_text
        .trim()
        .parse()
        .map_err(|_| err("alpha", format!("is {alpha_text:?}, not a number")))?;
    if !alpha.is_finite() || alpha <= 0.0 {
        return Err(err(
            "alpha",
            format!("is {alpha}; it must be finite and positive"),
        ));
    }
    let task_text = get("task")?;
    let task = Task::parse(task_text.trim()).ok_or_else(|| {
        err(
            "task",
            format!("is {task_text:?}; expected generate, embed or classify"),
        )
    })?;
    let labels = match md.get("labels") {
        None => Vec::new(),
        Some(text) => serde_json::from_str::<Vec<String>>(text)
            .map_err(|e| err("labels", format!("is not a JSON array of strings: {e}")))?,
    };
    Ok(PackageMeta {
        base_fingerprint,
        rank,
        alpha,
        task,
        labels,
        description: md.get("description").cloned().unwrap_or_default(),
    })
}
