//! Rule files for `switchyard adapter pack --rules`: the rename rules of one layout of adapters
//! trained elsewhere, as data (TOML), with where that layout keeps its rank and alpha.
//!
//! A rule file holds `about` (one line), `rules` (`PATTERN=TEMPLATE` texts, as `--rename` takes
//! them) and optionally `[settings]`: `file` (a JSON file beside the weights), `rank` and `alpha`
//! (its keys holding them), `must_be_unset` (keys that must be absent, false, null, 0 or empty)
//! and `must_be` (keys that must hold exactly a given text). The files shipped with switchyard
//! live in `config/rename/` and are built into the binary, so `--rules NAME` works anywhere;
//! `--rules PATH` reads any other file.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use anyhow::{Context, bail};
use serde::Deserialize;
use switchyard_adapters::rename::RenameRule;

/// The rule files shipped with switchyard, by name.
pub const BUILT_IN: [(&str, &str); 2] = [
    (
        "common-bert",
        include_str!("../../../../config/rename/common-bert.toml"),
    ),
    (
        "common-llama",
        include_str!("../../../../config/rename/common-llama.toml"),
    ),
];

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct RuleFileText {
    about: String,
    rules: Vec<String>,
    settings: Option<Settings>,
}

/// Where a layout keeps its rank and alpha, and what its settings must not ask for.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Settings {
    pub file: String,
    pub rank: Option<String>,
    pub alpha: Option<String>,
    #[serde(default)]
    pub must_be_unset: Vec<String>,
    #[serde(default)]
    pub must_be: BTreeMap<String, String>,
}

/// A parsed rule file.
#[derive(Debug, Clone)]
pub struct RuleFile {
    /// The name or path it was given as.
    pub source: String,
    pub about: String,
    pub rules: Vec<RenameRule>,
    pub settings: Option<Settings>,
}

/// Rank and alpha read from a settings file.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Read {
    pub rank: Option<usize>,
    pub alpha: Option<f64>,
    pub from: Option<PathBuf>,
}

impl RuleFile {
    /// A built-in rule file by name, or a file at `name_or_path`.
    pub fn load(name_or_path: &str) -> anyhow::Result<Self> {
        let text = match BUILT_IN.iter().find(|(n, _)| *n == name_or_path) {
            Some((_, text)) => (*text).to_owned(),
            None => {
                let path = Path::new(name_or_path);
                if !path.exists() {
                    let names: Vec<&str> = BUILT_IN.iter().map(|(n, _)| *n).collect();
                    bail!(
                        "--rules {name_or_path:?} is neither a built-in rule file ({}) nor a file",
                        names.join(", ")
                    );
                }
                std::fs::read_to_string(path)
                    .with_context(|| format!("reading the rule file {}", path.display()))?
            }
        };
        Self::parse(name_or_path, &text)
    }

    /// Parses the text of a rule file; errors name `source` and what is wrong.
    pub fn parse(source: &str, text: &str) -> anyhow::Result<Self> {
        let parsed: RuleFileText =
            toml::from_str(text).with_context(|| format!("rule file {source}"))?;
        if parsed.rules.is_empty() {
            bail!("rule file {source}: `rules` is empty");
        }
        let rules = parsed
            .rules
            .iter()
            .enumerate()
            .map(|(i, r)| {
                RenameRule::parse(r).with_context(|| format!("rule file {source}: rules[{i}]"))
            })
            .collect::<anyhow::Result<Vec<_>>>()?;
        Ok(Self {
            source: source.to_owned(),
            about: parsed.about,
            rules,
            settings: parsed.settings,
        })
    }

    /// Rank and alpha from the settings file beside `weights` (nothing when the rule file names
    /// no settings file); refuses settings the package cannot express, naming the key.
    pub fn read_settings(&self, weights: &Path) -> anyhow::Result<Read> {
        let Some(s) = &self.settings else {
            return Ok(Read::default());
        };
        let (path, v) = settings_file(weights, s)
            .with_context(|| format!("rule file {} reads rank and alpha from it", self.source))?;
        let shown = path.display();
        for key in &s.must_be_unset {
            let set = match v.get(key) {
                None | Some(serde_json::Value::Null) => false,
                Some(serde_json::Value::Bool(b)) => *b,
                Some(serde_json::Value::Number(n)) => n.as_f64() != Some(0.0),
                Some(serde_json::Value::String(t)) => !t.is_empty(),
                Some(serde_json::Value::Array(a)) => !a.is_empty(),
                Some(serde_json::Value::Object(o)) => !o.is_empty(),
            };
            if set {
                bail!(
                    "{shown}: `{key}` is {}; a package holds one low-rank update per module scaled by alpha / rank, which cannot express it",
                    v[key]
                );
            }
        }
        for (key, want) in &s.must_be {
            if v.get(key).and_then(|x| x.as_str()) != Some(want.as_str()) {
                bail!(
                    "{shown}: `{key}` is {}; this layout is packed only when it is {want:?}",
                    v.get(key).cloned().unwrap_or(serde_json::Value::Null)
                );
            }
        }
        let number = |key: &Option<String>| -> anyhow::Result<Option<f64>> {
            match key {
                None => Ok(None),
                Some(k) => one_key(&v, k)
                    .with_context(|| format!("{shown}"))?
                    .and_then(|x| x.as_f64())
                    .map(Some)
                    .with_context(|| format!("{shown}: no number under a key matching `{k}`")),
            }
        };
        let rank = match number(&s.rank)? {
            Some(r) if r >= 1.0 && r.fract() == 0.0 => Some(r as usize),
            Some(r) => bail!(
                "{shown}: `{}` is {r}, not a whole rank",
                s.rank.as_deref().unwrap_or_default()
            ),
            None => None,
        };
        Ok(Read {
            rank,
            alpha: number(&s.alpha)?,
            from: Some(path),
        })
    }
}

/// Whether `name` matches `pattern`, where one `*` stands for any run of characters.
fn matches(pattern: &str, name: &str) -> bool {
    match pattern.split_once('*') {
        None => pattern == name,
        Some((head, tail)) => {
            name.len() >= head.len() + tail.len() && name.starts_with(head) && name.ends_with(tail)
        }
    }
}

/// The value under the one key of `v` that matches `pattern`; `None` when no key does, an
/// error naming them when several do.
fn one_key<'a>(
    v: &'a serde_json::Value,
    pattern: &str,
) -> anyhow::Result<Option<&'a serde_json::Value>> {
    let found: Vec<(&String, &serde_json::Value)> = v
        .as_object()
        .map(|o| o.iter().filter(|(k, _)| matches(pattern, k)).collect())
        .unwrap_or_default();
    match found[..] {
        [] => Ok(None),
        [(_, x)] => Ok(Some(x)),
        _ => {
            let keys: Vec<&str> = found.iter().map(|(k, _)| k.as_str()).collect();
            bail!("several keys match `{pattern}`: {}", keys.join(", "))
        }
    }
}

/// The settings file beside `weights`, read: the one JSON file whose name matches `s.file` and,
/// where the rule file names a rank key, holds it (a folder may keep other JSON files, a
/// tokenizer's say).
fn settings_file(weights: &Path, s: &Settings) -> anyhow::Result<(PathBuf, serde_json::Value)> {
    let folder = weights
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let mut found = Vec::new();
    for entry in
        std::fs::read_dir(folder).with_context(|| format!("listing {}", folder.display()))?
    {
        let path = entry?.path();
        let name = path
            .file_name()
            .and_then(|n| n.to_str())
            .unwrap_or_default();
        if !path.is_file() || !matches(&s.file, name) {
            continue;
        }
        let Some(v) = std::fs::read_to_string(&path)
            .ok()
            .and_then(|t| serde_json::from_str::<serde_json::Value>(&t).ok())
        else {
            continue;
        };
        let holds_rank = match &s.rank {
            None => true,
            Some(k) => one_key(&v, k).ok().flatten().is_some(),
        };
        if holds_rank {
            found.push((path, v));
        }
    }
    found.sort_by(|a, b| a.0.cmp(&b.0));
    match &mut found[..] {
        [one] => Ok(std::mem::take(one)),
        [] => bail!(
            "no file matching `{}` beside {} holds the settings",
            s.file,
            weights.display()
        ),
        many => bail!(
            "several files beside {} could hold the settings: {}",
            weights.display(),
            many.iter()
                .map(|(p, _)| p.display().to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_built_in_rule_files_parse_and_map_the_layouts_they_name() {
        let bert = RuleFile::load("common-bert").unwrap();
        let rename = |rules: &[RenameRule], n: &str| switchyard_adapters::rename::rename(rules, n);
        assert_eq!(
            rename(
                &bert.rules,
                "base_model.model.encoder.layer.3.attention.output.dense.delta_B.weight"
            )
            .as_deref(),
            Some("layers.3.attn.o.B")
        );
        assert_eq!(
            rename(
                &bert.rules,
                "base_model.model.bert.encoder.layer.0.output.dense.delta_A.weight"
            )
            .as_deref(),
            Some("layers.0.mlp.down.A")
        );
        let llama = RuleFile::load("common-llama").unwrap();
        assert_eq!(
            rename(
                &llama.rules,
                "base_model.model.model.layers.11.mlp.gate_proj.delta_A.weight"
            )
            .as_deref(),
            Some("layers.11.mlp.gate.A")
        );
        assert!(rename(&llama.rules, "base_model.model.lm_head.delta_A.weight").is_none());
    }

    #[test]
    fn settings_the_package_cannot_express_are_refused_naming_the_key() {
        let dir = tempfile::tempdir().unwrap();
        let weights = dir.path().join("factors.safetensors");
        let rules = RuleFile::load("common-llama").unwrap();
        // The settings file and its keys, as the rule file names them.
        let s = rules.settings.clone().unwrap();
        let rank = s.rank.clone().unwrap();
        // A key of our own naming that the rule file's alpha pattern matches.
        let alpha = "delta_alpha";
        assert!(matches(s.alpha.as_deref().unwrap(), alpha));
        let write = |extra: serde_json::Value, with_rank: bool| {
            let mut v = serde_json::json!({ alpha: 16, "bias": "none" });
            if with_rank {
                v[rank.as_str()] = 8.into();
            }
            for (k, x) in extra.as_object().unwrap() {
                v[k] = x.clone();
            }
            std::fs::write(dir.path().join("settings.json"), v.to_string()).unwrap()
        };
        write(serde_json::json!({"rank_pattern": {}}), true);
        let read = rules.read_settings(&weights).unwrap();
        assert_eq!((read.rank, read.alpha), (Some(8), Some(16.0)));
        write(serde_json::json!({"use_rslora": true}), true);
        let e = format!("{:#}", rules.read_settings(&weights).unwrap_err());
        assert!(e.contains("`use_rslora` is true"), "{e}");
        write(serde_json::json!({"bias": "all"}), true);
        let e = format!("{:#}", rules.read_settings(&weights).unwrap_err());
        assert!(e.contains("`bias` is \"all\""), "{e}");
        write(serde_json::json!({}), false);
        let e = format!("{:#}", rules.read_settings(&weights).unwrap_err());
        assert!(e.contains("no file matching `*.json`"), "{e}");
    }

    #[test]
    fn a_bad_rule_file_is_refused_naming_the_file_and_the_rule() {
        let e = format!(
            "{:#}",
            RuleFile::parse(
                "mine.toml",
                "about = \"x\"\nrules = [\"a.{n}=b\", \"nope\"]"
            )
            .unwrap_err()
        );
        assert!(e.contains("rule file mine.toml: rules[1]"), "{e}");
        let e = format!("{:#}", RuleFile::load("no-such-layout").unwrap_err());
        assert!(e.contains("common-bert, common-llama"), "{e}");
    }
}
