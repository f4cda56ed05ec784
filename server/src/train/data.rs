//! Labelled examples for training and evaluating a classifier: reading a JSONL file of
//! `{"text": ..., "label": ...}` lines, fixing the label order, and the held-out split that
//! `adapter train` and `adapter evaluate` must agree on.
//!
//! The split is stratified and depends only on the texts, the fraction and the seed (not on the
//! order of the lines): within each label, examples are ordered by a hash of `(seed, text)` and
//! the first `round(fraction * n)` of them (at least one) are held out.

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

use sha2::{Digest, Sha256};

/// One labelled example; `label` indexes [`Dataset::labels`].
#[derive(Debug, Clone, PartialEq)]
pub struct Example {
    pub text: String,
    pub label: usize,
    /// 1-based line number in the file, for messages.
    pub line: usize,
}

/// Every example of a file with its label names, in head order.
#[derive(Debug, Clone)]
pub struct Dataset {
    pub labels: Vec<String>,
    pub examples: Vec<Example>,
}

/// Why a data file or a split was refused.
#[derive(Debug, thiserror::Error)]
pub enum DataError {
    #[error("reading {file}: {source}")]
    Io {
        file: PathBuf,
        source: std::io::Error,
    },
    #[error("{file} holds no examples")]
    Empty { file: PathBuf },
    #[error("{file} line {line}: not a JSON object: {problem}")]
    NotJson {
        file: PathBuf,
        line: usize,
        problem: String,
    },
    #[error("{file} line {line}: {problem}")]
    BadField {
        file: PathBuf,
        line: usize,
        problem: String,
    },
    #[error(
        "{file} line {line}: the same text as line {first} (duplicates would leak into the held-out split)"
    )]
    Duplicate {
        file: PathBuf,
        line: usize,
        first: usize,
    },
    #[error("{file} line {line}: label {label:?} is not one of --labels ({known})")]
    UnknownLabel {
        file: PathBuf,
        line: usize,
        label: String,
        known: String,
    },
    #[error(
        "{file}: --labels names {listed} labels but the file uses {found} ({missing} never appears)"
    )]
    LabelCount {
        file: PathBuf,
        listed: usize,
        found: usize,
        missing: String,
    },
    #[error("{file}: only one label ({label:?}); a classifier needs at least two")]
    OneLabel { file: PathBuf, label: String },
    #[error(
        "label {label:?} has only {count} example(s); the split needs at least 2 per label, one to train on and one to hold out"
    )]
    TooFewExamples { label: String, count: usize },
    #[error("the held-out fraction {fraction} is outside (0, 1)")]
    Fraction { fraction: f64 },
}

/// Reads a JSONL file. Labels come from `labels` when given (their order is the head's order;
/// every one must appear), otherwise they are the distinct labels of the file sorted by name.
pub fn read_jsonl(path: &Path, labels: Option<&[String]>) -> Result<Dataset, DataError> {
    let text = std::fs::read_to_string(path).map_err(|source| DataError::Io {
        file: path.to_owned(),
        source,
    })?;
    parse_jsonl(&text, path, labels)
}

/// Parses the text of a JSONL file; `path` names it in errors.
pub fn parse_jsonl(
    text: &str,
    path: &Path,
    labels: Option<&[String]>,
) -> Result<Dataset, DataError> {
    let file = || path.to_owned();
    let mut rows: Vec<(String, String, usize)> = Vec::new();
    let mut seen: HashMap<String, usize> = HashMap::new();
    for (i, raw) in text.lines().enumerate() {
        let line = i + 1;
        if raw.trim().is_empty() {
            continue;
        }
        let value: serde_json::Value =
            serde_json::from_str(raw).map_err(|e| DataError::NotJson {
                file: file(),
                line,
                problem: e.to_string(),
            })?;
        let Some(obj) = value.as_object() else {
            return Err(DataError::NotJson {
                file: file(),
                line,
                problem: format!("found {}", kind(&value)),
            });
        };
        let field = |name: &str| -> Result<String, DataError> {
            match obj.get(name) {
                Some(serde_json::Value::String(s)) if !s.trim().is_empty() => Ok(s.clone()),
                Some(serde_json::Value::String(_)) => Err(DataError::BadField {
                    file: file(),
                    line,
                    problem: format!("\"{name}\" is empty"),
                }),
                Some(other) => Err(DataError::BadField {
                    file: file(),
                    line,
                    problem: format!("\"{name}\" is {}, expected a string", kind(other)),
                }),
                None => Err(DataError::BadField {
                    file: file(),
                    line,
                    problem: format!("has no \"{name}\" field"),
                }),
            }
        };
        let text = field("text")?;
        let label = field("label")?;
        if let Some(&first) = seen.get(&text) {
            return Err(DataError::Duplicate {
                file: file(),
                line,
                first,
            });
        }
        seen.insert(text.clone(), line);
        rows.push((text, label, line));
    }
    if rows.is_empty() {
        return Err(DataError::Empty { file: file() });
    }
    let labels: Vec<String> = match labels {
        Some(listed) => {
            for (_, label, line) in &rows {
                if !listed.contains(label) {
                    return Err(DataError::UnknownLabel {
                        file: file(),
                        line: *line,
                        label: label.clone(),
                        known: listed.join(", "),
                    });
                }
            }
            if let Some(missing) = listed.iter().find(|l| !rows.iter().any(|r| &r.1 == *l)) {
                let found = listed
                    .iter()
                    .filter(|l| rows.iter().any(|r| &r.1 == *l))
                    .count();
                return Err(DataError::LabelCount {
                    file: file(),
                    listed: listed.len(),
                    found,
                    missing: format!("{missing:?}"),
                });
            }
            listed.to_vec()
        }
        None => {
            let mut found: Vec<String> = rows.iter().map(|r| r.1.clone()).collect();
            found.sort();
            found.dedup();
            found
        }
    };
    if labels.len() < 2 {
        return Err(DataError::OneLabel {
            file: file(),
            label: labels[0].clone(),
        });
    }
    let examples = rows
        .into_iter()
        .map(|(text, label, line)| Example {
            label: labels.iter().position(|l| *l == label).expect("checked"),
            text,
            line,
        })
        .collect();
    Ok(Dataset { labels, examples })
}

fn kind(v: &serde_json::Value) -> &'static str {
    match v {
        serde_json::Value::Null => "null",
        serde_json::Value::Bool(_) => "a boolean",
        serde_json::Value::Number(_) => "a number",
        serde_json::Value::String(_) => "a string",
        serde_json::Value::Array(_) => "an array",
        serde_json::Value::Object(_) => "an object",
    }
}

/// Indices of the examples to train on and to hold out, each in file order.
#[derive(Debug, Clone, PartialEq)]
pub struct Split {
    pub train: Vec<usize>,
    pub holdout: Vec<usize>,
}

/// The held-out split of `data` for `fraction` and `seed` (see the module doc).
pub fn split(data: &Dataset, fraction: f64, seed: u64) -> Result<Split, DataError> {
    if !(fraction > 0.0 && fraction < 1.0) {
        return Err(DataError::Fraction { fraction });
    }
    let mut by_label: BTreeMap<usize, Vec<(u64, usize)>> = BTreeMap::new();
    for (i, ex) in data.examples.iter().enumerate() {
        by_label
            .entry(ex.label)
            .or_default()
            .push((split_key(seed, &ex.text), i));
    }
    let mut holdout = Vec::new();
    for (label, mut members) in by_label {
        if members.len() < 2 {
            return Err(DataError::TooFewExamples {
                label: data.labels[label].clone(),
                count: members.len(),
            });
        }
        members.sort_unstable();
        let n = members.len();
        let take = ((fraction * n as f64).round() as usize).clamp(1, n - 1);
        holdout.extend(members[..take].iter().map(|&(_, i)| i));
    }
    holdout.sort_unstable();
    let train = (0..data.examples.len())
        .filter(|i| holdout.binary_search(i).is_err())
        .collect();
    Ok(Split { train, holdout })
}

/// The first 8 bytes of sha256(seed as 8 little-endian bytes, text), as a number.
fn split_key(seed: u64, text: &str) -> u64 {
    let mut h = Sha256::new();
    h.update(seed.to_le_bytes());
    h.update(text.as_bytes());
    let d = h.finalize();
    u64::from_be_bytes(d[..8].try_into().expect("8 bytes"))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn data(lines: &[(&str, &str)]) -> Dataset {
        let text: String = lines
            .iter()
            .map(|(t, l)| format!("{}\n", serde_json::json!({"text": t, "label": l})))
            .collect();
        parse_jsonl(&text, Path::new("d.jsonl"), None).unwrap()
    }

    fn twenty() -> Vec<(String, &'static str)> {
        (0..20)
            .map(|i| {
                (
                    format!("message {i}"),
                    if i % 2 == 0 { "even" } else { "odd" },
                )
            })
            .collect()
    }

    #[test]
    fn split_is_stratified_and_depends_on_the_seed_not_the_line_order() {
        let rows = twenty();
        let refs: Vec<(&str, &str)> = rows.iter().map(|(t, l)| (t.as_str(), *l)).collect();
        let d = data(&refs);
        let s = split(&d, 0.2, 7).unwrap();
        // 10 examples per label, 0.2 of each held out: 2 + 2.
        assert_eq!(s.holdout.len(), 4);
        assert_eq!(s.train.len(), 16);
        for label in 0..2 {
            let held = s.holdout.iter().filter(|&&i| d.examples[i].label == label);
            assert_eq!(held.count(), 2);
        }
        assert_eq!(split(&d, 0.2, 7).unwrap(), s, "same seed, same split");
        let texts = |d: &Dataset, s: &Split| -> Vec<String> {
            let mut t: Vec<String> = s
                .holdout
                .iter()
                .map(|&i| d.examples[i].text.clone())
                .collect();
            t.sort();
            t
        };
        let mut reversed = refs.clone();
        reversed.reverse();
        let r = data(&reversed);
        assert_eq!(texts(&r, &split(&r, 0.2, 7).unwrap()), texts(&d, &s));
        // Over 20 seeds, at least one gives another held-out set (the chance that all 20 agree
        // by accident is below 1e-30).
        assert!((0..20).any(|seed| texts(&d, &split(&d, 0.2, seed).unwrap()) != texts(&d, &s)));
    }

    #[test]
    fn split_keeps_one_example_of_each_label_on_each_side() {
        let d = data(&[("a", "x"), ("b", "x"), ("c", "y"), ("d", "y"), ("e", "y")]);
        let s = split(&d, 0.01, 0).unwrap();
        assert_eq!(s.holdout.len(), 2, "at least one per label held out");
        let s = split(&d, 0.99, 0).unwrap();
        assert_eq!(s.train.len(), 2, "at least one per label kept for training");
    }

    #[test]
    fn refusals_name_what_is_wrong() {
        let p = Path::new("d.jsonl");
        let err = |text: &str, labels: Option<&[String]>| {
            parse_jsonl(text, p, labels).unwrap_err().to_string()
        };
        assert_eq!(err("\n\n", None), "d.jsonl holds no examples");
        let e = err("{\"text\": \"a\", \"label\": \"x\"}\nnot json\n", None);
        assert!(e.starts_with("d.jsonl line 2: not a JSON object"), "{e}");
        let e = err("{\"text\": \"a\"}\n", None);
        assert_eq!(e, "d.jsonl line 1: has no \"label\" field");
        let e = err("{\"text\": 3, \"label\": \"x\"}\n", None);
        assert_eq!(e, "d.jsonl line 1: \"text\" is a number, expected a string");
        let e = err(
            "{\"text\": \"a\", \"label\": \"x\"}\n{\"text\": \"a\", \"label\": \"y\"}\n",
            None,
        );
        assert!(
            e.starts_with("d.jsonl line 2: the same text as line 1"),
            "{e}"
        );
        let two = "{\"text\": \"a\", \"label\": \"x\"}\n{\"text\": \"b\", \"label\": \"y\"}\n";
        let listed = ["x".to_owned(), "y".to_owned(), "z".to_owned()];
        assert_eq!(
            err(two, Some(&listed)),
            "d.jsonl: --labels names 3 labels but the file uses 2 (\"z\" never appears)"
        );
        let e = err(two, Some(&listed[..1]));
        assert_eq!(e, "d.jsonl line 2: label \"y\" is not one of --labels (x)");
        let d = parse_jsonl(two, p, None).unwrap();
        let e = split(&d, 0.2, 0).unwrap_err().to_string();
        assert!(e.starts_with("label \"x\" has only 1 example(s)"), "{e}");
        let e = err("{\"text\": \"a\", \"label\": \"x\"}\n", None);
        assert!(e.contains("only one label"), "{e}");
    }
}
