//! The header metadata of a package: which keys exist, how each is spelled, and the checks on
//! each value.

use std::collections::{BTreeMap, HashMap};

use super::{FORMAT_VERSION, Limits, PackageError, PackageMeta, Task};

/// Every metadata key a package may carry.
pub const KNOWN_KEYS: [&str; 7] = [
    "format_version",
    "base_fingerprint",
    "rank",
    "alpha",
    "task",
    "labels",
    "description",
];

/// Reads and checks the metadata map of a package.
pub(super) fn parse_meta(
    md: &HashMap<String, String>,
    file: &str,
    limits: &Limits,
) -> Result<PackageMeta, PackageError> {
    let err = |key: &str, problem: String| PackageError::Metadata {
        file: file.to_owned(),
        key: key.to_owned(),
        problem,
    };
    let mut keys: Vec<&String> = md.keys().collect();
    keys.sort();
    if let Some(unknown) = keys.into_iter().find(|k| !KNOWN_KEYS.contains(&k.as_str())) {
        return Err(err(
            unknown,
            format!("is not a known key (known: {})", KNOWN_KEYS.join(", ")),
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
        return Err(PackageError::Rank {
            file: file.to_owned(),
            tensor: "(metadata)".to_owned(),
            rank,
            problem: "is not allowed; the rank must be at least 1".to_owned(),
        });
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
    let alpha = alpha_text
        .trim()
        .parse::<f64>()
        .ok()
        .filter(|a| a.is_finite() && *a > 0.0)
        .ok_or_else(|| PackageError::Alpha {
            file: file.to_owned(),
            value: format!("{alpha_text:?}"),
        })?;
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
    if task == Task::Classify && labels.is_empty() {
        return Err(err(
            "labels",
            "is missing or empty; a classify package names its labels".to_owned(),
        ));
    }
    Ok(PackageMeta {
        base_fingerprint,
        rank,
        alpha,
        task,
        labels,
        description: md.get("description").cloned().unwrap_or_default(),
    })
}

/// The metadata map written for `meta`, in key order.
pub(super) fn meta_map(meta: &PackageMeta) -> BTreeMap<String, String> {
    let mut info = BTreeMap::new();
    info.insert("format_version".to_owned(), FORMAT_VERSION.to_string());
    info.insert("base_fingerprint".to_owned(), meta.base_fingerprint.clone());
    info.insert("rank".to_owned(), meta.rank.to_string());
    info.insert("alpha".to_owned(), meta.alpha.to_string());
    info.insert("task".to_owned(), meta.task.as_str().to_owned());
    if !meta.labels.is_empty() {
        info.insert(
            "labels".to_owned(),
            serde_json::to_string(&meta.labels).expect("strings serialise"),
        );
    }
    info.insert("description".to_owned(), meta.description.clone());
    info
}
