//! Reading a package: the structural pass over a safetensors file, streamed.
//!
//! The header is read and checked first (size limit, JSON, metadata map, every tensor's dtype,
//! shape and byte span, spans contiguous and covering the data exactly). The data is then read
//! in chunks small enough to stay in cache, each converted to `f32` and scanned for non-finite
//! values straight after it arrives, so reading, converting and scanning cost about one pass over
//! memory. All tensors end up as views into one buffer. The same code reads from a file or from
//! bytes already in memory ([`PackageBytes`], for publishing, which needs the raw bytes to hash
//! and store).

use std::collections::HashMap;
use std::io::Read;
use std::path::Path;

use candle_core::{Device, Tensor};

use super::{Limits, PackageError, content_version};

/// Bytes converted per chunk: large enough for few system calls, small enough for L2.
const CHUNK: usize = 256 * 1024;

/// A package file's raw bytes, for hashing and storing.
#[derive(Debug, Clone)]
pub struct PackageBytes {
    bytes: Vec<u8>,
}

impl PackageBytes {
    /// Reads `path`, refusing a file over `limits.max_file_bytes` before reading it.
    pub fn read(path: &Path, limits: &Limits) -> Result<Self, PackageError> {
        let file = path.display().to_string();
        let (mut f, size) = open_checked(path, limits)?;
        let mut bytes = Vec::with_capacity(size as usize);
        f.read_to_end(&mut bytes)
            .map_err(|source| PackageError::Io { file, source })?;
        Ok(Self { bytes })
    }

    /// Takes bytes already in memory (an upload); `file` names them in errors.
    pub fn from_vec(bytes: Vec<u8>, file: &str, limits: &Limits) -> Result<Self, PackageError> {
        check_file_size(file, bytes.len() as u64, limits)?;
        Ok(Self { bytes })
    }

    /// Copies bytes already in memory; `file` names them in errors.
    pub fn from_slice(bytes: &[u8], file: &str, limits: &Limits) -> Result<Self, PackageError> {
        Self::from_vec(bytes.to_vec(), file, limits)
    }

    pub fn as_bytes(&self) -> &[u8] {
        &self.bytes
    }

    pub fn len(&self) -> usize {
        self.bytes.len()
    }

    pub fn is_empty(&self) -> bool {
        self.bytes.is_empty()
    }

    /// The content version of these bytes (see [`content_version`]).
    pub fn version(&self) -> String {
        content_version(&self.bytes)
    }
}

/// Opens `path` and checks its size against the limit before anything is read.
pub(super) fn open_checked(
    path: &Path,
    limits: &Limits,
) -> Result<(std::fs::File, u64), PackageError> {
    let file = path.display().to_string();
    let io = |source| PackageError::Io {
        file: file.clone(),
        source,
    };
    let f = std::fs::File::open(path).map_err(io)?;
    let size = f.metadata().map_err(io)?.len();
    check_file_size(&file, size, limits)?;
    Ok((f, size))
}

fn check_file_size(file: &str, size: u64, limits: &Limits) -> Result<(), PackageError> {
    if size > limits.max_file_bytes {
        return Err(PackageError::FileTooLarge {
            file: file.to_owned(),
            size,
            limit: limits.max_file_bytes,
        });
    }
    Ok(())
}

/// What the structural pass finds: the header's string metadata and every tensor, by name, in
/// name order.
pub(super) struct RawPackage {
    pub metadata: HashMap<String, String>,
    pub tensors: Vec<(String, Tensor)>,
}

/// One tensor's place in the data section, in bytes from its start.
struct Span {
    name: String,
    shape: Vec<usize>,
    begin: usize,
    end: usize,
}

/// Reads a whole package of `size` bytes from `reader`.
pub(super) fn read_raw(
    mut reader: impl Read,
    size: u64,
    file: &str,
    limits: &Limits,
) -> Result<RawPackage, PackageError> {
    let not_st = |reason: String| PackageError::NotSafetensors {
        file: file.to_owned(),
        reason,
    };
    let truncated = |e: std::io::Error| match e.kind() {
        std::io::ErrorKind::UnexpectedEof => not_st("the file is truncated".to_owned()),
        _ => PackageError::Io {
            file: file.to_owned(),
            source: e,
        },
    };
    check_file_size(file, size, limits)?;
    if size < 8 {
        return Err(not_st(format!(
            "{size} bytes is too short for a header length"
        )));
    }
    let mut head = [0u8; 8];
    reader.read_exact(&mut head).map_err(truncated)?;
    let header_len = u64::from_le_bytes(head);
    if header_len > limits.max_header_bytes as u64 {
        return Err(PackageError::HeaderTooLarge {
            file: file.to_owned(),
            size: header_len,
            limit: limits.max_header_bytes,
        });
    }
    if 8 + header_len > size {
        return Err(not_st(format!(
            "the header length {header_len} runs past the end of the {size}-byte file"
        )));
    }
    let mut header = vec![0u8; header_len as usize];
    reader.read_exact(&mut header).map_err(truncated)?;
    let (metadata, spans) = parse_header(&header).map_err(not_st)?;
    for s in &spans {
        if let Some(dtype) = &s.dtype_problem {
            return Err(PackageError::Dtype {
                file: file.to_owned(),
                tensor: s.span.name.clone(),
                dtype: dtype.clone(),
            });
        }
    }
    let mut spans: Vec<Span> = spans.into_iter().map(|s| s.span).collect();
    let data_len = (size - 8 - header_len) as usize;
    check_spans(&mut spans, data_len).map_err(not_st)?;

    let words = read_words(&mut reader, data_len).map_err(|e| match e {
        WordsError::Io(e) => truncated(e),
        WordsError::NonFinite(at) => {
            let s = spans
                .iter()
                .find(|s| s.begin / 4 <= at && at < s.end / 4)
                .expect("every word belongs to a tensor");
            PackageError::NonFinite {
                file: file.to_owned(),
                tensor: s.name.clone(),
                index: at - s.begin / 4,
            }
        }
    })?;
    let storage = Tensor::from_vec(words, data_len / 4, &Device::Cpu)
        .map_err(|e| not_st(format!("cannot hold the data: {e}")))?;
    spans.sort_by(|a, b| a.name.cmp(&b.name));
    let mut tensors = Vec::with_capacity(spans.len());
    for s in spans {
        let t = storage
            .narrow(0, s.begin / 4, (s.end - s.begin) / 4)
            .and_then(|t| t.reshape(s.shape))
            .map_err(|e| PackageError::Shape {
                file: file.to_owned(),
                tensor: s.name.clone(),
                problem: format!("cannot be built: {e}"),
            })?;
        tensors.push((s.name, t));
    }
    Ok(RawPackage { metadata, tensors })
}

struct HeaderSpan {
    span: Span,
    /// The dtype as written, when it is not F32.
    dtype_problem: Option<String>,
}

/// Parses the JSON header: the `__metadata__` string map and every tensor entry.
fn parse_header(header: &[u8]) -> Result<(HashMap<String, String>, Vec<HeaderSpan>), String> {
    let text = std::str::from_utf8(header).map_err(|e| format!("the header is not UTF-8: {e}"))?;
    let value: serde_json::Value =
        serde_json::from_str(text).map_err(|e| format!("the header is not JSON: {e}"))?;
    let serde_json::Value::Object(entries) = value else {
        return Err("the header is not a JSON object".to_owned());
    };
    let mut metadata = HashMap::new();
    let mut spans = Vec::new();
    for (name, entry) in entries {
        if name == "__metadata__" {
            let map = entry
                .as_object()
                .ok_or("`__metadata__` is not a map of strings")?;
            for (k, v) in map {
                let v = v
                    .as_str()
                    .ok_or_else(|| format!("`__metadata__` value `{k}` is not a string"))?;
                metadata.insert(k.clone(), v.to_owned());
            }
            continue;
        }
        let bad = |what: &str| format!("tensor `{name}`: {what}");
        let dtype = entry
            .get("dtype")
            .and_then(|d| d.as_str())
            .ok_or_else(|| bad("no dtype"))?;
        let shape: Vec<usize> = entry
            .get("shape")
            .and_then(|s| s.as_array())
            .ok_or_else(|| bad("no shape"))?
            .iter()
            .map(|d| d.as_u64().map(|d| d as usize))
            .collect::<Option<_>>()
            .ok_or_else(|| bad("shape is not a list of whole numbers"))?;
        let offsets: Vec<usize> = entry
            .get("data_offsets")
            .and_then(|s| s.as_array())
            .ok_or_else(|| bad("no data_offsets"))?
            .iter()
            .map(|d| d.as_u64().map(|d| d as usize))
            .collect::<Option<_>>()
            .filter(|o: &Vec<usize>| o.len() == 2)
            .ok_or_else(|| bad("data_offsets is not [begin, end]"))?;
        let (begin, end) = (offsets[0], offsets[1]);
        let dtype_problem = (dtype != "F32").then(|| dtype.to_owned());
        if dtype_problem.is_none() {
            let bytes = shape
                .iter()
                .try_fold(4usize, |acc, &d| acc.checked_mul(d))
                .ok_or_else(|| bad("shape overflows"))?;
            if end < begin || end - begin != bytes {
                return Err(bad(&format!(
                    "data_offsets [{begin}, {end}] do not hold the {bytes} bytes its shape {shape:?} needs"
                )));
            }
        }
        spans.push(HeaderSpan {
            span: Span {
                name,
                shape,
                begin,
                end,
            },
            dtype_problem,
        });
    }
    spans.sort_by(|a, b| a.span.name.cmp(&b.span.name));
    Ok((metadata, spans))
}

/// Checks that the spans tile the data section exactly, in offset order.
fn check_spans(spans: &mut [Span], data_len: usize) -> Result<(), String> {
    spans.sort_by_key(|s| s.begin);
    let mut expected = 0;
    for s in spans.iter() {
        if s.begin != expected {
            return Err(format!(
                "tensor `{}` starts at data byte {}, expected {expected} (overlapping or gapped data)",
                s.name, s.begin
            ));
        }
        expected = s.end;
    }
    match expected.cmp(&data_len) {
        std::cmp::Ordering::Equal => Ok(()),
        std::cmp::Ordering::Greater => Err(format!(
            "the file is truncated: the tensors need {expected} data bytes, the file has {data_len}"
        )),
        std::cmp::Ordering::Less => Err(format!(
            "{} bytes follow the last tensor",
            data_len - expected
        )),
    }
}

enum WordsError {
    Io(std::io::Error),
    /// Index (in words) of the first non-finite value.
    NonFinite(usize),
}

/// Reads `len` bytes (a multiple of 4) of little-endian f32 data straight into the result, one
/// chunk at a time, scanning each chunk while it is still in cache. Growing the result a chunk at
/// a time keeps the zero-fill that safe Rust needs before a read in cache too.
fn read_words(reader: &mut impl Read, len: usize) -> Result<Vec<f32>, WordsError> {
    let total = len / 4;
    let mut words: Vec<f32> = Vec::with_capacity(total);
    while words.len() < total {
        let start = words.len();
        let n = (CHUNK / 4).min(total - start);
        words.resize(start + n, 0.0);
        let chunk = &mut words[start..];
        reader
            .read_exact(bytemuck::cast_slice_mut(chunk))
            .map_err(WordsError::Io)?;
        if cfg!(target_endian = "big") {
            for w in chunk.iter_mut() {
                *w = f32::from_bits(u32::from_le(w.to_bits()));
            }
        }
        if let Some(i) = first_non_finite(chunk) {
            return Err(WordsError::NonFinite(start + i));
        }
    }
    Ok(words)
}

/// Index of the first NaN or infinity. Scans in blocks without early exit inside a block, so the
/// common all-finite case runs at memory speed.
fn first_non_finite(values: &[f32]) -> Option<usize> {
    const BLOCK: usize = 1024;
    for (b, block) in values.chunks(BLOCK).enumerate() {
        let all_finite = block.iter().fold(true, |ok, v| ok & v.is_finite());
        if !all_finite {
            return block
                .iter()
                .position(|v| !v.is_finite())
                .map(|i| b * BLOCK + i);
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn first_non_finite_finds_the_index_across_blocks() {
        let mut v = vec![1f32; 5000];
        assert_eq!(first_non_finite(&v), None);
        v[3001] = f32::NAN;
        v[4000] = f32::INFINITY;
        assert_eq!(first_non_finite(&v), Some(3001));
        assert_eq!(first_non_finite(&v[3500..]), Some(500));
    }

    #[test]
    fn words_are_read_across_chunk_boundaries() {
        let n = CHUNK / 4 * 2 + 3;
        let raw: Vec<u8> = (0..n).flat_map(|i| (i as f32).to_le_bytes()).collect();
        let Ok(words) = read_words(&mut raw.as_slice(), raw.len()) else {
            panic!("finite data reads");
        };
        assert_eq!(words.len(), n);
        assert_eq!(words[n - 1], (n - 1) as f32);
        let mut bad = raw.clone();
        let at = CHUNK / 4 + 7;
        bad[4 * at..4 * at + 4].copy_from_slice(&f32::NAN.to_le_bytes());
        assert!(matches!(
            read_words(&mut bad.as_slice(), bad.len()),
            Err(WordsError::NonFinite(i)) if i == at
        ));
    }
}
