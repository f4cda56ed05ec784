//! The adapter package: one self-describing safetensors file per adapter version.
//!
//! Tensors are `layers.{i}.{module}.A [r, in]` and `layers.{i}.{module}.B [out, r]` in f32, plus
//! an optional task head `head.weight [labels, hidden]` and `head.bias [labels]`. The header's
//! string metadata carries `format_version`, `base_fingerprint`, `rank`, `alpha`, `task`,
//! `labels` (a JSON array, for a head) and `description`. The version of a package is a content
//! hash of its bytes.
//!
//! Reading ([`AdapterPackage::read`] or [`AdapterPackage::load`] from a file,
//! [`AdapterPackage::parse`] from [`PackageBytes`]) checks the structure of the file; [`AdapterPackage::validate`] checks it against a base model. Every
//! refusal is a [`PackageError`] naming the file, the tensor where there is one, and the rule
//! ([`RULES`] lists them). Writing is deterministic, so a package's bytes (and its version) depend
//! on its content alone.

mod bytes;
mod error;
mod meta;
mod write;

pub use bytes::PackageBytes;
pub use error::{PackageError, RULES};
pub use meta::KNOWN_KEYS;

use std::collections::BTreeMap;
use std::fmt;
use std::path::Path;

use candle_core::Tensor;
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

/// Content hash used as a package version: first 16 hex digits of the sha256 of the file.
pub fn content_version(bytes: &[u8]) -> String {
    Sha256::digest(bytes)
        .iter()
        .take(8)
        .map(|b| format!("{b:02x}"))
        .collect()
}

impl AdapterPackage {
    /// Reads and structurally checks a package file; returns it with its content version.
    pub fn read(path: &Path, limits: &Limits) -> Result<(Self, String), PackageError> {
        let bytes = PackageBytes::read(path, limits)?;
        let pkg = Self::parse(&bytes, &path.display().to_string(), limits)?;
        Ok((pkg, bytes.version()))
    }

    /// Reads and structurally checks a package file without keeping its raw bytes or hashing
    /// them: the cold load of a version whose name already is its hash.
    pub fn load(path: &Path, limits: &Limits) -> Result<Self, PackageError> {
        let file = path.display().to_string();
        let (f, size) = bytes::open_checked(path, limits)?;
        Self::from_raw(bytes::read_raw(f, size, &file, limits)?, &file, limits)
    }

    /// Parses a package from its bytes; `file` names it in errors.
    pub fn from_bytes(bytes: &[u8], file: &str, limits: &Limits) -> Result<Self, PackageError> {
        let raw = bytes::read_raw(bytes, bytes.len() as u64, file, limits)?;
        Self::from_raw(raw, file, limits)
    }

    /// Parses package bytes held for publishing.
    pub fn parse(bytes: &PackageBytes, file: &str, limits: &Limits) -> Result<Self, PackageError> {
        Self::from_bytes(bytes.as_bytes(), file, limits)
    }

    fn from_raw(raw: bytes::RawPackage, file: &str, limits: &Limits) -> Result<Self, PackageError> {
        let meta = meta::parse_meta(&raw.metadata, file, limits)?;
        let mut a_parts: BTreeMap<Site, Tensor> = BTreeMap::new();
        let mut b_parts: BTreeMap<Site, Tensor> = BTreeMap::new();
        let mut head_w = None;
        let mut head_b = None;
        for (name, tensor) in raw.tensors {
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
        let head_err = |tensor: &str, problem: &str| PackageError::HeadShape {
            file: file.to_owned(),
            tensor: tensor.to_owned(),
            problem: problem.to_owned(),
        };
        let head = match (head_w, head_b) {
            (None, None) => None,
            (Some(w), Some(b)) => Some((w, b)),
            (Some(_), None) => return Err(head_err("head.weight", "comes without head.bias")),
            (None, Some(_)) => return Err(head_err("head.bias", "comes without head.weight")),
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
        let head_err = |tensor: &str, problem: String| PackageError::HeadShape {
            file: file.to_owned(),
            tensor: tensor.to_owned(),
            problem,
        };
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
                let dims = w.dims();
                if dims.len() != 2 || dims[0] != labels {
                    return Err(head_err(
                        "head.weight",
                        format!(
                            "has shape {dims:?}, expected [{labels}, hidden] for {labels} labels"
                        ),
                    ));
                }
                if b.dims() != [labels] {
                    return Err(head_err(
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
                return Err(PackageError::HeadShape {
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

    /// Serialises the package to safetensors bytes with its metadata. The same package always
    /// gives the same bytes.
    pub fn to_bytes(&self) -> Result<Vec<u8>, PackageError> {
        let mut tensors = Vec::with_capacity(2 * self.factors.len() + 2);
        let mut push = |name: String, t: &Tensor| -> Result<(), PackageError> {
            let values = t
                .flatten_all()
                .and_then(|f| f.to_dtype(candle_core::DType::F32))
                .and_then(|f| f.to_vec1::<f32>())
                .map_err(|e| PackageError::Shape {
                    file: "<new package>".to_owned(),
                    tensor: name.clone(),
                    problem: format!("cannot be read as f32: {e}"),
                })?;
            tensors.push(write::NamedTensor {
                name,
                shape: t.dims().to_vec(),
                values,
            });
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
        Ok(write::serialize(&meta::meta_map(&self.meta), tensors))
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
    let shape_err = |tensor: String, problem: String| PackageError::Shape {
        file: file.to_owned(),
        tensor,
        problem,
    };
    let (Ok((ra, _)), Ok((_, rb))) = (a.dims2(), b.dims2()) else {
        return Err(if a.dims().len() != 2 {
            shape_err(
                site.tensor_name(Factor::A),
                format!("has shape {:?}, expected [r, in]", a.dims()),
            )
        } else {
            shape_err(
                site.tensor_name(Factor::B),
                format!("has shape {:?}, expected [out, r]", b.dims()),
            )
        });
    };
    for (tensor, found, what) in [
        (Factor::A, ra, "rows of A"),
        (Factor::B, rb, "columns of B"),
    ] {
        if found != rank {
            return Err(PackageError::Rank {
                file: file.to_owned(),
                tensor: site.tensor_name(tensor),
                rank: found,
                problem: format!("({what}) differs from the declared rank {rank}"),
            });
        }
    }
    Ok(())
}
