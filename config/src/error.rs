//! The one error type of this crate. Every refusal names the key it is about (dotted, as the file
//! spells it, with the environment variable or the command line in parentheses when the value came
//! from there) and the value it refused; a secret value is never repeated.

use std::path::PathBuf;

/// Why a configuration was refused.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    /// The cause is in `source` (shown by `{:#}` with anyhow), not repeated in the message.
    #[error("cannot read config file {path}")]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("config file {path} is not valid TOML: {message}")]
    Parse { path: PathBuf, message: String },
    #[error("invalid value {value:?} for `{key}`: {rule}")]
    Invalid {
        key: String,
        value: String,
        rule: String,
    },
    /// Like [`ConfigError::Invalid`], for an API key or the admin token: the value stays out of
    /// the message (and out of every log line that prints it).
    #[error("invalid value <redacted> for `{key}`: {rule}")]
    InvalidSecret { key: String, rule: String },
    #[error("unknown key `{key}`{hint}")]
    Unknown { key: String, hint: String },
    #[error("`{key}` is not set: {rule}")]
    Missing { key: String, rule: String },
}

impl ConfigError {
    pub(crate) fn invalid(
        key: impl Into<String>,
        value: impl Into<String>,
        rule: impl Into<String>,
    ) -> Self {
        Self::Invalid {
            key: key.into(),
            value: value.into(),
            rule: rule.into(),
        }
    }

    pub(crate) fn secret(key: impl Into<String>, rule: impl Into<String>) -> Self {
        Self::InvalidSecret {
            key: key.into(),
            rule: rule.into(),
        }
    }

    /// The dotted key the error is about, where there is one (a read or syntax error has none).
    pub fn key(&self) -> Option<&str> {
        match self {
            Self::Read { .. } | Self::Parse { .. } => None,
            Self::Invalid { key, .. }
            | Self::InvalidSecret { key, .. }
            | Self::Unknown { key, .. }
            | Self::Missing { key, .. } => Some(key),
        }
    }
}
