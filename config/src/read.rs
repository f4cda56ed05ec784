//! Reading raw values: the table of scalar keys (where each lives in the file and which
//! `SWITCHYARD_*` variable overrides it), the file's structure check (unknown sections and keys are
//! refused, with a hint when the key exists in another section), and typed getters that give the
//! environment precedence over the file and name the key and the value when they refuse.

use std::collections::BTreeMap;
use std::ops::RangeInclusive;

use toml::{Table, Value};

use crate::ConfigError;

/// One scalar setting: its `[section]`, its name there, and the environment variable that
/// overrides it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SettingKey {
    pub section: &'static str,
    pub name: &'static str,
    pub env: &'static str,
}

impl SettingKey {
    const fn new(section: &'static str, name: &'static str, env: &'static str) -> Self {
        Self { section, name, env }
    }

    /// `section.name`, as errors and the rendered settings spell it.
    pub fn dotted(&self) -> String {
        format!("{}.{}", self.section, self.name)
    }
}

pub(crate) const LISTEN: SettingKey = SettingKey::new("server", "listen", "SWITCHYARD_LISTEN");
pub(crate) const REPLICA: SettingKey =
    SettingKey::new("server", "replica", "SWITCHYARD_SERVER_REPLICA");
pub(crate) const SHUTDOWN_GRACE_MS: SettingKey = SettingKey::new(
    "server",
    "shutdown_grace_ms",
    "SWITCHYARD_SERVER_SHUTDOWN_GRACE_MS",
);
pub(crate) const HUGE_PAGES: SettingKey =
    SettingKey::new("server", "huge_pages", "SWITCHYARD_SERVER_HUGE_PAGES");
pub(crate) const MODEL_DIR: SettingKey = SettingKey::new("model", "dir", "SWITCHYARD_MODEL_DIR");
pub(crate) const MODEL_WEIGHTS: SettingKey =
    SettingKey::new("model", "weights", "SWITCHYARD_MODEL_WEIGHTS");
pub(crate) const STORE_DIR: SettingKey = SettingKey::new("store", "dir", "SWITCHYARD_STORE_DIR");
pub(crate) const STORE_BUCKET: SettingKey =
    SettingKey::new("store", "bucket", "SWITCHYARD_STORE_BUCKET");
pub(crate) const STORE_ENDPOINT: SettingKey =
    SettingKey::new("store", "endpoint", "SWITCHYARD_STORE_ENDPOINT");
pub(crate) const STORE_PREFIX: SettingKey =
    SettingKey::new("store", "prefix", "SWITCHYARD_STORE_PREFIX");
pub(crate) const STORE_REGION: SettingKey =
    SettingKey::new("store", "region", "SWITCHYARD_STORE_REGION");
pub(crate) const STORE_ACCESS_KEY_ID: SettingKey =
    SettingKey::new("store", "access_key_id", "SWITCHYARD_STORE_ACCESS_KEY_ID");
pub(crate) const STORE_SECRET_ACCESS_KEY: SettingKey = SettingKey::new(
    "store",
    "secret_access_key",
    "SWITCHYARD_STORE_SECRET_ACCESS_KEY",
);
pub(crate) const STORE_CACHE_BYTES: SettingKey =
    SettingKey::new("store", "cache_bytes", "SWITCHYARD_STORE_CACHE_BYTES");
pub(crate) const THREADS: SettingKey =
    SettingKey::new("engine", "threads", "SWITCHYARD_ENGINE_THREADS");
pub(crate) const MAX_BATCH_ROWS: SettingKey = SettingKey::new(
    "engine",
    "max_batch_rows",
    "SWITCHYARD_ENGINE_MAX_BATCH_ROWS",
);
pub(crate) const STEP_TOKENS: SettingKey =
    SettingKey::new("engine", "step_tokens", "SWITCHYARD_ENGINE_STEP_TOKENS");
pub(crate) const KV_BUDGET_BYTES: SettingKey = SettingKey::new(
    "engine",
    "kv_budget_bytes",
    "SWITCHYARD_ENGINE_KV_BUDGET_BYTES",
);
pub(crate) const PREFIX_CACHE_BYTES: SettingKey = SettingKey::new(
    "engine",
    "prefix_cache_bytes",
    "SWITCHYARD_ENGINE_PREFIX_CACHE_BYTES",
);
pub(crate) const QUEUE_DEPTH: SettingKey =
    SettingKey::new("engine", "queue_depth", "SWITCHYARD_ENGINE_QUEUE_DEPTH");
pub(crate) const SHARED_BATCH_ROWS: SettingKey = SettingKey::new(
    "engine",
    "shared_batch_rows",
    "SWITCHYARD_ENGINE_SHARED_BATCH_ROWS",
);
pub(crate) const REQUEST_TIMEOUT_MS: SettingKey = SettingKey::new(
    "engine",
    "request_timeout_ms",
    "SWITCHYARD_ENGINE_REQUEST_TIMEOUT_MS",
);
pub(crate) const INFERENCE_BODY_BYTES: SettingKey = SettingKey::new(
    "bounds",
    "inference_body_bytes",
    "SWITCHYARD_BOUNDS_INFERENCE_BODY_BYTES",
);
pub(crate) const UPLOAD_BODY_BYTES: SettingKey = SettingKey::new(
    "bounds",
    "upload_body_bytes",
    "SWITCHYARD_BOUNDS_UPLOAD_BODY_BYTES",
);
pub(crate) const TEXT_BYTES: SettingKey =
    SettingKey::new("bounds", "text_bytes", "SWITCHYARD_BOUNDS_TEXT_BYTES");
pub(crate) const PROMPT_TOKENS: SettingKey =
    SettingKey::new("bounds", "prompt_tokens", "SWITCHYARD_BOUNDS_PROMPT_TOKENS");
pub(crate) const GENERATED_TOKENS: SettingKey = SettingKey::new(
    "bounds",
    "generated_tokens",
    "SWITCHYARD_BOUNDS_GENERATED_TOKENS",
);
pub(crate) const TEXTS_PER_REQUEST: SettingKey = SettingKey::new(
    "bounds",
    "texts_per_request",
    "SWITCHYARD_BOUNDS_TEXTS_PER_REQUEST",
);
pub(crate) const FACTOR_BUDGET_BYTES: SettingKey = SettingKey::new(
    "residency",
    "factor_budget_bytes",
    "SWITCHYARD_RESIDENCY_FACTOR_BUDGET_BYTES",
);
pub(crate) const MERGED_BUDGET_BYTES: SettingKey = SettingKey::new(
    "residency",
    "merged_budget_bytes",
    "SWITCHYARD_RESIDENCY_MERGED_BUDGET_BYTES",
);
pub(crate) const PROMOTE_SHARE: SettingKey = SettingKey::new(
    "residency",
    "promote_share",
    "SWITCHYARD_RESIDENCY_PROMOTE_SHARE",
);
pub(crate) const PROMOTE_WINDOW_ROWS: SettingKey = SettingKey::new(
    "residency",
    "promote_window_rows",
    "SWITCHYARD_RESIDENCY_PROMOTE_WINDOW_ROWS",
);
pub(crate) const QUOTA_REQUESTS_PER_SECOND: SettingKey = SettingKey::new(
    "quota",
    "requests_per_second",
    "SWITCHYARD_QUOTA_REQUESTS_PER_SECOND",
);
pub(crate) const QUOTA_CONCURRENT_REQUESTS: SettingKey = SettingKey::new(
    "quota",
    "concurrent_requests",
    "SWITCHYARD_QUOTA_CONCURRENT_REQUESTS",
);
pub(crate) const QUOTA_TOKENS_PER_MINUTE: SettingKey = SettingKey::new(
    "quota",
    "tokens_per_minute",
    "SWITCHYARD_QUOTA_TOKENS_PER_MINUTE",
);
pub(crate) const ADMIN_TOKEN: SettingKey =
    SettingKey::new("admin", "token", "SWITCHYARD_ADMIN_TOKEN");
pub(crate) const METRICS_PUBLIC: SettingKey =
    SettingKey::new("metrics", "public", "SWITCHYARD_METRICS_PUBLIC");
pub(crate) const METRICS_ADAPTER_SERIES: SettingKey = SettingKey::new(
    "metrics",
    "adapter_series",
    "SWITCHYARD_METRICS_ADAPTER_SERIES",
);
pub(crate) const HISTORY_INTERVAL_MS: SettingKey = SettingKey::new(
    "metrics",
    "history_interval_ms",
    "SWITCHYARD_METRICS_HISTORY_INTERVAL_MS",
);
pub(crate) const LOG_FORMAT: SettingKey = SettingKey::new("log", "format", "SWITCHYARD_LOG_FORMAT");
pub(crate) const LOG_FILTER: SettingKey = SettingKey::new("log", "filter", "SWITCHYARD_LOG");
pub(crate) const EXPERIMENTS_DATABASE: SettingKey =
    SettingKey::new("experiments", "database", "SWITCHYARD_EXPERIMENTS_DATABASE");
pub(crate) const KEEP_RESPONSES_DAYS: SettingKey = SettingKey::new(
    "experiments",
    "keep_responses_days",
    "SWITCHYARD_EXPERIMENTS_KEEP_RESPONSES_DAYS",
);
pub(crate) const MIXING_VARIANCE: SettingKey = SettingKey::new(
    "experiments",
    "mixing_variance",
    "SWITCHYARD_EXPERIMENTS_MIXING_VARIANCE",
);
pub(crate) const ASSIGNMENT_ALARM_P: SettingKey = SettingKey::new(
    "experiments",
    "assignment_alarm_p",
    "SWITCHYARD_EXPERIMENTS_ASSIGNMENT_ALARM_P",
);
pub(crate) const ROLLOUT_CHECK_MS: SettingKey = SettingKey::new(
    "experiments",
    "rollout_check_ms",
    "SWITCHYARD_EXPERIMENTS_ROLLOUT_CHECK_MS",
);
pub(crate) const SHADOW_MAX_IN_FLIGHT: SettingKey = SettingKey::new(
    "experiments",
    "shadow_max_in_flight",
    "SWITCHYARD_EXPERIMENTS_SHADOW_MAX_IN_FLIGHT",
);
pub(crate) const SHADOW_MAX_QUEUED: SettingKey = SettingKey::new(
    "experiments",
    "shadow_max_queued",
    "SWITCHYARD_EXPERIMENTS_SHADOW_MAX_QUEUED",
);

/// Every scalar key, in the order the rendered settings list them. `[[tenants]]` is the one
/// setting that is not scalar; it comes from the file only.
pub const KEYS: &[SettingKey] = &[
    LISTEN,
    REPLICA,
    SHUTDOWN_GRACE_MS,
    HUGE_PAGES,
    MODEL_DIR,
    MODEL_WEIGHTS,
    STORE_DIR,
    STORE_BUCKET,
    STORE_ENDPOINT,
    STORE_PREFIX,
    STORE_REGION,
    STORE_ACCESS_KEY_ID,
    STORE_SECRET_ACCESS_KEY,
    STORE_CACHE_BYTES,
    THREADS,
    MAX_BATCH_ROWS,
    STEP_TOKENS,
    KV_BUDGET_BYTES,
    PREFIX_CACHE_BYTES,
    QUEUE_DEPTH,
    SHARED_BATCH_ROWS,
    REQUEST_TIMEOUT_MS,
    INFERENCE_BODY_BYTES,
    UPLOAD_BODY_BYTES,
    TEXT_BYTES,
    PROMPT_TOKENS,
    GENERATED_TOKENS,
    TEXTS_PER_REQUEST,
    FACTOR_BUDGET_BYTES,
    MERGED_BUDGET_BYTES,
    PROMOTE_SHARE,
    PROMOTE_WINDOW_ROWS,
    QUOTA_REQUESTS_PER_SECOND,
    QUOTA_CONCURRENT_REQUESTS,
    QUOTA_TOKENS_PER_MINUTE,
    ADMIN_TOKEN,
    METRICS_PUBLIC,
    METRICS_ADAPTER_SERIES,
    HISTORY_INTERVAL_MS,
    LOG_FORMAT,
    LOG_FILTER,
    EXPERIMENTS_DATABASE,
    KEEP_RESPONSES_DAYS,
    MIXING_VARIANCE,
    ASSIGNMENT_ALARM_P,
    ROLLOUT_CHECK_MS,
    SHADOW_MAX_IN_FLIGHT,
    SHADOW_MAX_QUEUED,
];

/// Keys of earlier releases and what replaced them, so an old file gets a pointer to the new key
/// instead of a bare "unknown key".
const RENAMED: &[(&str, &str)] = &[
    ("limits", "bounds"),
    (
        "limits.max_body_bytes",
        "bounds.inference_body_bytes and bounds.upload_body_bytes",
    ),
    ("limits.max_input_tokens", "bounds.prompt_tokens"),
    ("limits.max_output_tokens", "bounds.generated_tokens"),
    ("limits.max_texts_per_request", "bounds.texts_per_request"),
];

/// The top-level key that holds the array of tenant tables.
pub(crate) const TENANTS: &str = "tenants";

/// Where a value came from; it decides how an error labels the key.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Origin {
    File,
    Env(&'static str),
    CommandLine,
}

impl Origin {
    pub(crate) fn label(self, key: &SettingKey) -> String {
        match self {
            Origin::File => key.dotted(),
            Origin::Env(var) => format!("{} ({var})", key.dotted()),
            Origin::CommandLine => format!("{} (command line)", key.dotted()),
        }
    }
}

/// A raw value as found: a TOML value from the file, or text from the environment.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Raw<'a> {
    Toml(&'a Value),
    Text(&'a str),
}

impl Raw<'_> {
    /// The value as an error message shows it: strings without TOML quoting, the rest as TOML.
    pub(crate) fn shown(self) -> String {
        match self {
            Raw::Toml(Value::String(s)) => s.clone(),
            Raw::Text(s) => s.to_owned(),
            Raw::Toml(v) => v.to_string(),
        }
    }
}

/// TOML's name for the type of a value, for "expected X, found Y" messages.
pub(crate) fn type_name(value: &Value) -> &'static str {
    match value {
        Value::String(_) => "a string",
        Value::Integer(_) => "an integer",
        Value::Float(_) => "a float",
        Value::Boolean(_) => "a boolean",
        Value::Datetime(_) => "a date-time",
        Value::Array(_) => "an array",
        Value::Table(_) => "a table",
    }
}

/// The file (already structure-checked) and the `SWITCHYARD_*` environment, with getters that
/// apply "environment over file" and turn raw values into typed ones.
pub(crate) struct Sources<'a> {
    file: &'a Table,
    env: &'a BTreeMap<String, String>,
}

impl<'a> Sources<'a> {
    /// Checks the file's shape: only known sections, each a table holding only known keys, and
    /// `tenants` an array. Values are checked later, by the getters.
    pub(crate) fn new(
        file: &'a Table,
        env: &'a BTreeMap<String, String>,
    ) -> Result<Self, ConfigError> {
        for (top, value) in file {
            if top == TENANTS {
                continue; // checked where tenants are read
            }
            if !KEYS.iter().any(|k| k.section == top) {
                return Err(unknown(&key_as_written(top), &hint_for_top_level(top)));
            }
            let Value::Table(section) = value else {
                return Err(ConfigError::invalid(
                    top.as_str(),
                    Raw::Toml(value).shown(),
                    format!(
                        "expected a table (a [{top}] section), found {}",
                        type_name(value)
                    ),
                ));
            };
            for name in section.keys() {
                if !KEYS.iter().any(|k| k.section == top && k.name == name) {
                    return Err(unknown(
                        &format!("{top}.{}", key_as_written(name)),
                        &hint_in_section(top, name),
                    ));
                }
            }
        }
        Ok(Self { file, env })
    }

    /// The `[[tenants]]` value of the file, if any.
    pub(crate) fn tenants(&self) -> Option<&'a Value> {
        self.file.get(TENANTS)
    }

    /// The raw value for `key`, from the environment if set there, else from the file.
    pub(crate) fn find(&self, key: &SettingKey) -> Option<(Raw<'a>, Origin)> {
        if let Some(text) = self.env.get(key.env) {
            return Some((Raw::Text(text), Origin::Env(key.env)));
        }
        let value = self.file.get(key.section)?.as_table()?.get(key.name)?;
        Some((Raw::Toml(value), Origin::File))
    }

    /// A whole number in `range`, or `default` when the key is set nowhere.
    pub(crate) fn whole(
        &self,
        key: &SettingKey,
        default: u64,
        range: RangeInclusive<u64>,
    ) -> Result<u64, ConfigError> {
        Ok(self.optional_whole(key, range)?.unwrap_or(default))
    }

    /// A whole number in `range`, or `None` when the key is set nowhere.
    pub(crate) fn optional_whole(
        &self,
        key: &SettingKey,
        range: RangeInclusive<u64>,
    ) -> Result<Option<u64>, ConfigError> {
        self.find(key)
            .map(|(raw, origin)| whole_in(raw, &origin.label(key), range))
            .transpose()
    }

    /// A number (a TOML float or integer), or `default` when the key is set nowhere; `check`
    /// returns the rule the value breaks, if it breaks one.
    pub(crate) fn number(
        &self,
        key: &SettingKey,
        default: f64,
        check: impl Fn(f64) -> Option<&'static str>,
    ) -> Result<f64, ConfigError> {
        Ok(self.optional_number(key, check)?.unwrap_or(default))
    }

    /// A number that `check` accepts, or `None` when the key is set nowhere.
    pub(crate) fn optional_number(
        &self,
        key: &SettingKey,
        check: impl Fn(f64) -> Option<&'static str>,
    ) -> Result<Option<f64>, ConfigError> {
        self.find(key)
            .map(|(raw, origin)| number_in(raw, &origin.label(key), check))
            .transpose()
    }

    /// `true` or `false` (a TOML boolean, or the text `true` / `false` in the environment), or
    /// `default` when the key is set nowhere.
    pub(crate) fn flag(&self, key: &SettingKey, default: bool) -> Result<bool, ConfigError> {
        let Some((raw, origin)) = self.find(key) else {
            return Ok(default);
        };
        match raw {
            Raw::Toml(Value::Boolean(b)) => Ok(*b),
            Raw::Text(text) if text.trim() == "true" => Ok(true),
            Raw::Text(text) if text.trim() == "false" => Ok(false),
            Raw::Toml(other) => Err(ConfigError::invalid(
                origin.label(key),
                raw.shown(),
                format!("expected true or false, found {}", type_name(other)),
            )),
            Raw::Text(_) => Err(ConfigError::invalid(
                origin.label(key),
                raw.shown(),
                "expected true or false",
            )),
        }
    }

    /// Text for `key` with where it came from, `None` when the key is set nowhere. An empty
    /// value is refused: leaving the key out is how to say "not set". With `secret`, errors
    /// never repeat the value.
    pub(crate) fn text(
        &self,
        key: &SettingKey,
        secret: bool,
    ) -> Result<Option<(String, Origin)>, ConfigError> {
        let Some((raw, origin)) = self.find(key) else {
            return Ok(None);
        };
        let refuse = |rule: String| {
            if secret {
                ConfigError::secret(origin.label(key), rule)
            } else {
                ConfigError::invalid(origin.label(key), raw.shown(), rule)
            }
        };
        let text = match raw {
            Raw::Toml(Value::String(s)) => s.as_str(),
            Raw::Text(s) => s,
            Raw::Toml(other) => {
                return Err(refuse(format!(
                    "expected a string, found {}",
                    type_name(other)
                )));
            }
        };
        if text.is_empty() {
            return Err(refuse(
                "is empty; leave the key out (or unset the variable) to leave it unset".to_owned(),
            ));
        }
        Ok(Some((text.to_owned(), origin)))
    }
}

/// `raw` as a whole number in `range`; a refusal names `label` and the value.
pub(crate) fn whole_in(
    raw: Raw<'_>,
    label: &str,
    range: RangeInclusive<u64>,
) -> Result<u64, ConfigError> {
    let refuse = |rule: String| ConfigError::invalid(label, raw.shown(), rule);
    let number: i64 = match raw {
        Raw::Toml(Value::Integer(n)) => *n,
        Raw::Toml(other) => {
            return Err(refuse(format!(
                "expected a whole number, found {}",
                type_name(other)
            )));
        }
        Raw::Text(text) => text
            .trim()
            .replace('_', "")
            .parse()
            .map_err(|_| refuse("expected a whole number".to_owned()))?,
    };
    match u64::try_from(number) {
        Ok(n) if range.contains(&n) => Ok(n),
        _ => Err(refuse(format!(
            "must be between {} and {}",
            range.start(),
            range.end()
        ))),
    }
}

/// `raw` as a number (a TOML float or integer) that `check` accepts; a refusal names `label`
/// and the value.
pub(crate) fn number_in(
    raw: Raw<'_>,
    label: &str,
    check: impl Fn(f64) -> Option<&'static str>,
) -> Result<f64, ConfigError> {
    let refuse = |rule: String| ConfigError::invalid(label, raw.shown(), rule);
    let number = match raw {
        Raw::Toml(Value::Float(x)) => *x,
        Raw::Toml(Value::Integer(n)) => *n as f64,
        Raw::Toml(other) => {
            return Err(refuse(format!(
                "expected a number, found {}",
                type_name(other)
            )));
        }
        Raw::Text(text) => text
            .trim()
            .parse()
            .map_err(|_| refuse("expected a number".to_owned()))?,
    };
    match check(number) {
        None => Ok(number),
        Some(rule) => Err(refuse(rule.to_owned())),
    }
}

fn unknown(key: &str, hint: &str) -> ConfigError {
    ConfigError::Unknown {
        key: key.to_owned(),
        hint: hint.to_owned(),
    }
}

fn sections() -> Vec<&'static str> {
    let mut sections: Vec<&str> = KEYS.iter().map(|k| k.section).collect();
    sections.dedup();
    sections.push(TENANTS);
    sections
}

fn renamed(old: &str) -> Option<String> {
    RENAMED
        .iter()
        .find(|(was, _)| *was == old)
        .map(|(_, now)| format!("; it was renamed: use {now}"))
}

/// A key as TOML writes it: bare when it can be, else quoted and escaped (an empty key is `""`),
/// so an error never names an invisible or ambiguous key.
fn key_as_written(key: &str) -> String {
    let bare = !key.is_empty()
        && key
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-');
    if bare {
        key.to_owned()
    } else {
        toml::Value::String(key.to_owned()).to_string()
    }
}

fn hint_for_top_level(top: &str) -> String {
    if let Some(hint) = renamed(top) {
        return hint;
    }
    match KEYS.iter().find(|k| k.name == top) {
        Some(k) => format!("; did you mean `{}` (in [{}])?", k.dotted(), k.section),
        None => format!("; known sections: {}", sections().join(", ")),
    }
}

fn hint_in_section(section: &str, name: &str) -> String {
    if let Some(hint) = renamed(&format!("{section}.{name}")) {
        return hint;
    }
    if let Some(k) = KEYS.iter().find(|k| k.name == name) {
        return format!("; did you mean `{}`?", k.dotted());
    }
    let known: Vec<&str> = KEYS
        .iter()
        .filter(|k| k.section == section)
        .map(|k| k.name)
        .collect();
    format!("; known keys in [{section}]: {}", known.join(", "))
}
