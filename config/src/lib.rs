//! Settings for switchyard, read raw from a TOML file and `SWITCHYARD_*` environment variables,
//! then turned into one validated [`Settings`]. Precedence, lowest first: built-in defaults, the
//! file, the environment, then whatever the caller (the CLI) overrides explicitly.
//!
//! A refused value is reported as a [`ConfigError`] that names the key and the value.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::Deserialize;

/// Why a configuration was refused.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read config file {path}: {source}")]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("config file {path} is not valid TOML for switchyard: {message}")]
    Parse { path: PathBuf, message: String },
    #[error("invalid value {value:?} for `{key}`: {rule}")]
    Invalid {
        key: String,
        value: String,
        rule: String,
    },
}

/// Raw, optional settings exactly as a file spells them; unknown keys are refused.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSettings {
    #[serde(default)]
    model: RawModel,
    #[serde(default)]
    engine: RawEngine,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawModel {
    dir: Option<PathBuf>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawEngine {
    threads: Option<i64>,
    max_batch_rows: Option<i64>,
}

/// The validated settings every part of switchyard reads.
#[derive(Debug, Clone, PartialEq)]
pub struct Settings {
    /// Folder of the base model checkpoint (config.json, *.safetensors, tokenizer.json).
    pub model_dir: Option<PathBuf>,
    /// Compute threads for the model; 0 means one per core.
    pub threads: usize,
    /// Most rows (sequences) one forward pass may carry.
    pub max_batch_rows: usize,
}

impl Default for Settings {
    fn default() -> Self {
        Self {
            model_dir: None,
            threads: 0,
            max_batch_rows: 32,
        }
    }
}

/// The largest batch a single forward pass accepts; beyond it one request could starve the rest.
pub const MAX_BATCH_ROWS_LIMIT: usize = 4096;

impl Settings {
    /// Reads settings from an optional TOML file and an environment map (for the process
    /// environment, pass `std::env::vars()`); only `SWITCHYARD_*` keys are looked at.
    pub fn load(
        file: Option<&Path>,
        env: impl IntoIterator<Item = (String, String)>,
    ) -> Result<Self, ConfigError> {
        let raw = match file {
            Some(path) => {
                let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
                    path: path.to_owned(),
                    source,
                })?;
                toml::from_str::<RawSettings>(&text).map_err(|e| ConfigError::Parse {
                    path: path.to_owned(),
                    message: e.message().to_owned(),
                })?
            }
            None => RawSettings::default(),
        };
        let env: BTreeMap<String, String> = env
            .into_iter()
            .filter(|(k, _)| k.starts_with("SWITCHYARD_"))
            .collect();
        Self::from_raw(raw, &env)
    }

    fn from_raw(raw: RawSettings, env: &BTreeMap<String, String>) -> Result<Self, ConfigError> {
        let defaults = Settings::default();
        let model_dir = env
            .get("SWITCHYARD_MODEL_DIR")
            .map(PathBuf::from)
            .or(raw.model.dir);
        let threads = match env.get("SWITCHYARD_ENGINE_THREADS") {
            Some(v) => parse_int("engine.threads (SWITCHYARD_ENGINE_THREADS)", v)?,
            None => raw.engine.threads.unwrap_or(defaults.threads as i64),
        };
        let max_batch_rows = match env.get("SWITCHYARD_ENGINE_MAX_BATCH_ROWS") {
            Some(v) => parse_int(
                "engine.max_batch_rows (SWITCHYARD_ENGINE_MAX_BATCH_ROWS)",
                v,
            )?,
            None => raw
                .engine
                .max_batch_rows
                .unwrap_or(defaults.max_batch_rows as i64),
        };
        let settings = Settings {
            model_dir,
            threads: in_range("engine.threads", threads, 0, 1024)?,
            max_batch_rows: in_range(
                "engine.max_batch_rows",
                max_batch_rows,
                1,
                MAX_BATCH_ROWS_LIMIT,
            )?,
        };
        Ok(settings)
    }
}

fn parse_int(key: &str, value: &str) -> Result<i64, ConfigError> {
    value.trim().parse().map_err(|_| ConfigError::Invalid {
        key: key.to_owned(),
        value: value.to_owned(),
        rule: "expected a whole number".to_owned(),
    })
}

fn in_range(key: &str, value: i64, min: usize, max: usize) -> Result<usize, ConfigError> {
    if value < min as i64 || value > max as i64 {
        return Err(ConfigError::Invalid {
            key: key.to_owned(),
            value: value.to_string(),
            rule: format!("must be between {min} and {max}"),
        });
    }
    Ok(value as usize)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write(text: &str) -> (tempfile_dir::Dir, PathBuf) {
        let dir = tempfile_dir::Dir::new();
        let path = dir.path().join("switchyard.toml");
        std::fs::write(&path, text).unwrap();
        (dir, path)
    }

    /// A tiny temporary directory, to keep this crate free of test-only dependencies.
    mod tempfile_dir {
        use std::path::{Path, PathBuf};
        pub struct Dir(PathBuf);
        impl Dir {
            pub fn new() -> Self {
                use std::sync::atomic::{AtomicUsize, Ordering};
                static N: AtomicUsize = AtomicUsize::new(0);
                let p = std::env::temp_dir().join(format!(
                    "switchyard-config-test-{}-{}",
                    std::process::id(),
                    N.fetch_add(1, Ordering::SeqCst)
                ));
                std::fs::create_dir_all(&p).unwrap();
                Dir(p)
            }
            pub fn path(&self) -> &Path {
                &self.0
            }
        }
        impl Drop for Dir {
            fn drop(&mut self) {
                let _ = std::fs::remove_dir_all(&self.0);
            }
        }
    }

    #[test]
    fn defaults_apply_without_file_or_environment() {
        let s = Settings::load(None, Vec::new()).unwrap();
        assert_eq!(s, Settings::default());
    }

    #[test]
    fn environment_overrides_file() {
        let (_d, path) = write("[engine]\nmax_batch_rows = 8\nthreads = 2\n");
        let env = vec![(
            "SWITCHYARD_ENGINE_MAX_BATCH_ROWS".to_owned(),
            "16".to_owned(),
        )];
        let s = Settings::load(Some(&path), env).unwrap();
        assert_eq!(s.max_batch_rows, 16);
        assert_eq!(s.threads, 2);
    }

    #[test]
    fn out_of_range_value_names_key_and_value() {
        let (_d, path) = write("[engine]\nmax_batch_rows = 0\n");
        let err = Settings::load(Some(&path), Vec::new())
            .unwrap_err()
            .to_string();
        assert!(err.contains("engine.max_batch_rows"), "{err}");
        assert!(err.contains("\"0\""), "{err}");
    }

    #[test]
    fn unknown_key_is_refused_with_its_name() {
        let (_d, path) = write("[engine]\nmax_rows = 3\n");
        let err = Settings::load(Some(&path), Vec::new())
            .unwrap_err()
            .to_string();
        assert!(err.contains("max_rows"), "{err}");
    }

    #[test]
    fn non_numeric_environment_value_is_refused() {
        let env = vec![("SWITCHYARD_ENGINE_THREADS".to_owned(), "two".to_owned())];
        let err = Settings::load(None, env).unwrap_err().to_string();
        assert!(
            err.contains("SWITCHYARD_ENGINE_THREADS") && err.contains("two"),
            "{err}"
        );
    }
}
