//! Settings for switchyard, read raw from a TOML file, `SWITCHYARD_*` environment variables and
//! command-line flags, then turned into one validated [`Settings`]. Precedence, lowest first:
//! built-in defaults, the file, the environment, then the command line ([`Overrides`]).
//!
//! `read` knows where each key lives and which variable overrides it, and refuses unknown keys;
//! [`rules`] holds the rules for names, adapter patterns and secrets; `tenants` reads
//! `[[tenants]]`; `quota` reads the `[quota]` default and each tenant's own limits; `render`
//! writes the effective settings back out as TOML. A refused value is a
//! [`ConfigError`] that names the key and the value (for an API key or the admin token, only the
//! key). Paths are kept as written: a relative one is relative to the working directory of the
//! process, not to the file.

mod error;
mod quota;
mod read;
mod render;
pub mod rules;
mod tenants;

use std::collections::BTreeMap;
use std::fmt;
use std::net::{Ipv4Addr, SocketAddr};
use std::path::{Path, PathBuf};

pub use error::ConfigError;
pub use quota::{MAX_REQUESTS_PER_SECOND, Quota};
pub use read::{KEYS, SettingKey};
pub use switchyard_kernels::WeightFormat;

use read::{Origin, Sources};
use rules::secret_rule;

/// The largest batch a single forward pass accepts; beyond it one request could starve the rest.
pub const MAX_BATCH_ROWS_LIMIT: usize = 4096;

/// Bytes of text allowed per allowed prompt token when `bounds.text_bytes` is not set. Tokens of
/// ordinary text average 3 to 6 bytes (common practice for BPE and WordPiece vocabularies of
/// English text), so 64 leaves room for long words and non-Latin scripts while bounding what
/// the tokenizer is asked to read.
pub const TEXT_BYTES_PER_TOKEN: usize = 64;

const KIB: u64 = 1024;
const MIB: u64 = 1024 * KIB;
const GIB: u64 = 1024 * MIB;

/// The validated settings every part of switchyard reads.
#[derive(Clone, PartialEq)]
pub struct Settings {
    /// Address the HTTP server binds (`[server] listen`).
    pub listen: SocketAddr,
    /// This server's name among several behind one front (`[server] replica`): every response
    /// carries it. Unset: the machine's host name.
    pub replica: Option<String>,
    /// Folder of the base model checkpoint (config.json, *.safetensors, tokenizer.json).
    pub model_dir: Option<PathBuf>,
    /// The format the base model's weights are held in once loaded (`[model] weights`):
    /// converted at load from the checkpoint's own dtype.
    pub model_weights: WeightFormat,
    /// Root of the adapter store (`<store>/<name>/<version>.safetensors`); with an object store,
    /// the folder of its local package cache.
    pub store_dir: Option<PathBuf>,
    /// The S3-compatible object store holding the adapters (`[store] bucket` and the keys beside
    /// it); `None`: the store is the folder `store_dir`.
    pub object_store: Option<ObjectStoreSettings>,
    /// Bytes of package files the local cache keeps when the store is an object store.
    pub store_cache_bytes: u64,
    /// Compute threads for the model; 0 means one per core.
    pub threads: usize,
    /// Most rows (sequences) one forward pass may carry.
    pub max_batch_rows: usize,
    /// Most tokens one decoder step carries: every running generation's next token, and prompt
    /// tokens being prefilled in chunks up to this (a long prompt no longer stalls the others).
    pub step_tokens: usize,
    /// Bytes of KV cache the running generations may plan for together (positions of prompt
    /// plus max_tokens, times the model's bytes per position); 0: no limit. A generation that
    /// does not fit waits for room; one that could never fit is refused.
    pub kv_budget_bytes: u64,
    /// Bytes of finished prompts' KV cache kept for later prompts that begin the same way on the
    /// same adapter version (least recently used first out); 0: no prefix cache.
    pub prefix_cache_bytes: u64,
    /// Requests admitted and waiting for the engine; one more is answered 429. Each tenant may
    /// hold an equal share of them.
    pub queue_depth: usize,
    /// With several tenants, the most rows in one embedding batch: it bounds what a tenant's
    /// request can find running ahead of it.
    pub shared_batch_rows: usize,
    /// Deadline of one request, from admission to its last byte.
    pub request_timeout_ms: u64,
    /// Largest body of an inference or outcome request (and of any request but an upload).
    pub inference_body_bytes: usize,
    /// Largest adapter package upload.
    pub upload_body_bytes: usize,
    /// Most bytes of one input text or prompt, checked before tokenising; by default
    /// [`TEXT_BYTES_PER_TOKEN`] times `prompt_tokens`.
    pub text_bytes: usize,
    /// Most tokens one input text or prompt may have.
    pub prompt_tokens: usize,
    /// Most tokens one generation may produce.
    pub generated_tokens: usize,
    /// Most texts one embed or classify request may carry.
    pub texts_per_request: usize,
    /// Memory for resident adapter factors (A and B), least recently used evicted first.
    pub factor_budget_bytes: usize,
    /// Memory for merged variants; 0 turns merging off.
    pub merged_budget_bytes: usize,
    /// Share of the recent rows an adapter needs to earn a merged variant, in (0, 1].
    pub promote_share: f64,
    /// How many recent rows the promotion share is measured over.
    pub promote_window_rows: usize,
    /// The quota of every tenant that does not set its own (`[quota]`), and of the one open
    /// tenant when no tenants are configured.
    pub quota: Quota,
    /// Bearer token of the admin API; `None` disables the admin API.
    pub admin_token: Option<String>,
    /// Whether `/metrics` answers without the admin token (for a scraper on a private network).
    pub metrics_public: bool,
    /// Most distinct adapter names the request metrics label; the rest count as `other`.
    pub metrics_adapter_series: usize,
    /// How often the server samples its memory per tier, queue and running counts for
    /// `GET /admin/history` (the status page's last hour), in milliseconds.
    pub history_interval_ms: u64,
    /// API keys, the adapters each tenant may use and its quota; empty means open (no keys
    /// asked).
    pub tenants: Vec<TenantSettings>,
    pub log_format: LogFormat,
    /// A tracing filter (`info`, `switchyard=debug,warn`, ...).
    pub log_filter: String,
    /// How long in-flight work may take to finish after SIGTERM.
    pub shutdown_grace_ms: u64,
    /// Whether the kernel may back the server's memory with transparent huge pages. Off by
    /// default: with them, memory freed inside a 2 MiB page stays resident, and the soak
    /// measured the resident set creeping up for many minutes.
    pub huge_pages: bool,
    /// The experiment database (splits, outcomes, response records); `None` means
    /// `experiments.sqlite` in the store folder.
    pub experiments_database: Option<PathBuf>,
    /// How many days a response's record (which arm answered it) is kept for a late outcome.
    pub keep_responses_days: u64,
    /// τ² of the always-valid split comparisons (a normal mixture), in units of one outcome's
    /// variance (`[experiments] mixing_variance`).
    pub mixing_variance: f64,
    /// A split readout flags its requests per arm as not matching the weights below this
    /// chi-square p-value (`[experiments] assignment_alarm_p`).
    pub assignment_alarm_p: f64,
    /// How often the splits' rollout policies are checked and acted on
    /// (`[experiments] rollout_check_ms`).
    pub rollout_check_ms: u64,
    /// The most shadow requests running at once (`[experiments] shadow_max_in_flight`).
    pub shadow_max_in_flight: u64,
    /// Shadow work starts only while the engine's queue holds at most this many jobs
    /// (`[experiments] shadow_max_queued`).
    pub shadow_max_queued: u64,
}

/// Where the object store is and how to reach it. The secret key never appears in `{:?}` or in
/// the rendered settings.
#[derive(Clone, PartialEq, Eq)]
pub struct ObjectStoreSettings {
    pub bucket: String,
    /// The S3 endpoint (`http://127.0.0.1:9000`, say); `None` for Amazon S3.
    pub endpoint: Option<String>,
    /// Key prefix under which the store lives; empty for the bucket's root.
    pub prefix: String,
    pub region: String,
    /// SigV4 credentials; when unset the client looks in the usual places (instance metadata).
    pub access_key_id: Option<String>,
    pub secret_access_key: Option<String>,
}

impl fmt::Debug for ObjectStoreSettings {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("ObjectStoreSettings")
            .field("bucket", &self.bucket)
            .field("endpoint", &self.endpoint)
            .field("prefix", &self.prefix)
            .field("region", &self.region)
            .field("access_key_id", &self.access_key_id)
            .field(
                "secret_access_key",
                &self.secret_access_key.as_deref().map(rules::redacted),
            )
            .finish()
    }
}

/// The region asked of the object store when `[store] region` is not set.
pub const DEFAULT_STORE_REGION: &str = "us-east-1";

/// One `[[tenants]]` entry.
#[derive(Clone, PartialEq)]
pub struct TenantSettings {
    pub name: String,
    /// API keys, any of which identifies this tenant.
    pub keys: Vec<String>,
    /// Adapter (and split) name patterns, `*` matching any run of characters; `base` is always
    /// allowed and need not be listed.
    pub adapters: Vec<String>,
    /// The tenant's effective quota: its own limits, and `[quota]`'s for those it leaves out.
    pub quota: Quota,
}

/// How log lines are written.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum LogFormat {
    /// One readable line per event.
    #[default]
    Human,
    /// One JSON object per line.
    Json,
}

impl LogFormat {
    pub fn as_str(self) -> &'static str {
        match self {
            LogFormat::Human => "human",
            LogFormat::Json => "json",
        }
    }
}

impl fmt::Display for LogFormat {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Values given as command-line flags; they win over the file and the environment.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Overrides {
    pub listen: Option<SocketAddr>,
    pub model_dir: Option<PathBuf>,
    pub model_weights: Option<WeightFormat>,
    pub store_dir: Option<PathBuf>,
}

impl Default for Settings {
    fn default() -> Self {
        Self {
            listen: SocketAddr::from((Ipv4Addr::LOCALHOST, 7070)),
            replica: None,
            model_dir: None,
            model_weights: WeightFormat::F32,
            store_dir: None,
            object_store: None,
            store_cache_bytes: 4 * GIB,
            threads: 0,
            max_batch_rows: 32,
            step_tokens: 256,
            kv_budget_bytes: 0,
            prefix_cache_bytes: 256 * MIB,
            queue_depth: 256,
            shared_batch_rows: 4,
            request_timeout_ms: 30_000,
            inference_body_bytes: (2 * MIB) as usize,
            upload_body_bytes: (64 * MIB) as usize,
            text_bytes: 256 * TEXT_BYTES_PER_TOKEN,
            prompt_tokens: 256,
            generated_tokens: 256,
            texts_per_request: 64,
            factor_budget_bytes: GIB as usize,
            merged_budget_bytes: (2 * GIB) as usize,
            promote_share: 0.9,
            promote_window_rows: 512,
            quota: Quota::default(),
            admin_token: None,
            metrics_public: false,
            metrics_adapter_series: 100,
            history_interval_ms: 10_000,
            tenants: Vec::new(),
            log_format: LogFormat::Human,
            log_filter: "info".to_owned(),
            shutdown_grace_ms: 10_000,
            huge_pages: false,
            experiments_database: None,
            keep_responses_days: 30,
            mixing_variance: 0.1,
            assignment_alarm_p: 0.001,
            rollout_check_ms: 1000,
            shadow_max_in_flight: 2,
            shadow_max_queued: 0,
        }
    }
}

impl Settings {
    /// Reads settings from an optional TOML file and an environment (for the process
    /// environment, pass `std::env::vars()`); only `SWITCHYARD_*` variables are looked at.
    pub fn load(
        file: Option<&Path>,
        env: impl IntoIterator<Item = (String, String)>,
    ) -> Result<Self, ConfigError> {
        Self::load_with(file, env, &Overrides::default())
    }

    /// [`Settings::load`], with command-line values that win over both the file and the
    /// environment.
    pub fn load_with(
        file: Option<&Path>,
        env: impl IntoIterator<Item = (String, String)>,
        overrides: &Overrides,
    ) -> Result<Self, ConfigError> {
        let (text, path) = match file {
            Some(path) => {
                let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
                    path: path.to_owned(),
                    source,
                })?;
                (text, path)
            }
            None => (String::new(), Path::new("")),
        };
        Self::from_text(&text, path, env, overrides)
    }

    /// The work of [`Settings::load_with`] once the file is read; `path` only labels errors.
    /// Public for the config fuzz target, which feeds it text without a file.
    pub fn from_text(
        text: &str,
        path: &Path,
        env: impl IntoIterator<Item = (String, String)>,
        overrides: &Overrides,
    ) -> Result<Self, ConfigError> {
        let table = parse_toml(text, path)?;
        let env: BTreeMap<String, String> = env
            .into_iter()
            .filter(|(k, _)| k.starts_with("SWITCHYARD_"))
            .collect();
        Self::from_sources(&Sources::new(&table, &env)?, overrides)
    }

    /// The experiment database: [`Settings::experiments_database`], else `experiments.sqlite`
    /// in the store folder; `None` when neither is set.
    pub fn experiments_database_path(&self) -> Option<PathBuf> {
        self.experiments_database.clone().or_else(|| {
            self.store_dir
                .as_ref()
                .map(|dir| dir.join("experiments.sqlite"))
        })
    }

    /// The base model folder, which `switchyard serve` cannot run without.
    pub fn require_model_dir(&self) -> Result<&Path, ConfigError> {
        self.model_dir.as_deref().ok_or_else(|| ConfigError::Missing {
            key: read::MODEL_DIR.dotted(),
            rule: format!(
                "name the base model checkpoint folder in [{}] {} of the config file, in {}, or on the command line",
                read::MODEL_DIR.section,
                read::MODEL_DIR.name,
                read::MODEL_DIR.env
            ),
        })
    }

    /// The effective settings as TOML text in the file's layout, API keys and the admin token
    /// shown as `"<redacted, N chars>"`.
    pub fn render_effective(&self) -> String {
        render::render(self)
    }

    fn from_sources(src: &Sources<'_>, overrides: &Overrides) -> Result<Self, ConfigError> {
        let d = Settings::default();
        let listen = match overrides.listen {
            Some(addr) => addr,
            None => match src.text(&read::LISTEN, false)? {
                Some((text, origin)) => text.trim().parse().map_err(|_| {
                    ConfigError::invalid(
                        origin.label(&read::LISTEN),
                        text.as_str(),
                        "expected an address and port, such as 127.0.0.1:7070 or [::1]:7070",
                    )
                })?,
                None => d.listen,
            },
        };
        let size = |n: u64| usize::try_from(n).unwrap_or(usize::MAX);
        let default_quota = quota::read_default_quota(src)?;
        let mut tenants = tenants::read_tenants(src.tenants())?;
        for tenant in &mut tenants {
            tenant.quota = tenant.quota.or(default_quota);
        }
        let admin_token = admin_token(src, &tenants)?;
        let prompt_tokens =
            size(src.whole(&read::PROMPT_TOKENS, d.prompt_tokens as u64, 1..=131_072)?);
        let replica = match src.text(&read::REPLICA, false)? {
            None => d.replica,
            Some((text, origin)) => {
                let ok = text.len() <= 64
                    && text
                        .bytes()
                        .all(|b| b.is_ascii_alphanumeric() || b"-_.".contains(&b));
                if !ok {
                    return Err(ConfigError::invalid(
                        origin.label(&read::REPLICA),
                        text.as_str(),
                        "expected up to 64 letters, digits, '-', '_' or '.' (it goes into a response header)",
                    ));
                }
                Some(text)
            }
        };
        Ok(Settings {
            listen,
            replica,
            model_dir: dir(src, &read::MODEL_DIR, overrides.model_dir.as_deref())?,
            model_weights: match overrides.model_weights {
                Some(format) => format,
                None => match src.text(&read::MODEL_WEIGHTS, false)? {
                    None => d.model_weights,
                    Some((text, origin)) => WeightFormat::parse(text.trim()).map_err(|_| {
                        ConfigError::invalid(
                            origin.label(&read::MODEL_WEIGHTS),
                            text.as_str(),
                            format!("expected one of {}", WeightFormat::NAMES.join(", ")),
                        )
                    })?,
                },
            },
            store_dir: dir(src, &read::STORE_DIR, overrides.store_dir.as_deref())?,
            object_store: object_store(src)?,
            store_cache_bytes: src.whole(
                &read::STORE_CACHE_BYTES,
                d.store_cache_bytes,
                MIB..=1 << 50,
            )?,
            threads: size(src.whole(&read::THREADS, d.threads as u64, 0..=1024)?),
            max_batch_rows: size(src.whole(
                &read::MAX_BATCH_ROWS,
                d.max_batch_rows as u64,
                1..=MAX_BATCH_ROWS_LIMIT as u64,
            )?),
            step_tokens: size(src.whole(&read::STEP_TOKENS, d.step_tokens as u64, 1..=65_536)?),
            kv_budget_bytes: src.whole(&read::KV_BUDGET_BYTES, d.kv_budget_bytes, 0..=1 << 50)?,
            prefix_cache_bytes: src.whole(
                &read::PREFIX_CACHE_BYTES,
                d.prefix_cache_bytes,
                0..=1 << 50,
            )?,
            queue_depth: size(src.whole(&read::QUEUE_DEPTH, d.queue_depth as u64, 1..=100_000)?),
            shared_batch_rows: size(src.whole(
                &read::SHARED_BATCH_ROWS,
                d.shared_batch_rows as u64,
                1..=MAX_BATCH_ROWS_LIMIT as u64,
            )?),
            // An hour: a deadline past that is a forgotten request, not a slow one.
            request_timeout_ms: src.whole(
                &read::REQUEST_TIMEOUT_MS,
                d.request_timeout_ms,
                1..=3_600_000,
            )?,
            inference_body_bytes: size(src.whole(
                &read::INFERENCE_BODY_BYTES,
                d.inference_body_bytes as u64,
                KIB..=GIB,
            )?),
            upload_body_bytes: size(src.whole(
                &read::UPLOAD_BODY_BYTES,
                d.upload_body_bytes as u64,
                KIB..=16 * GIB,
            )?),
            text_bytes: size(src.whole(
                &read::TEXT_BYTES,
                (prompt_tokens * TEXT_BYTES_PER_TOKEN) as u64,
                1..=GIB,
            )?),
            prompt_tokens,
            generated_tokens: size(src.whole(
                &read::GENERATED_TOKENS,
                d.generated_tokens as u64,
                1..=131_072,
            )?),
            texts_per_request: size(src.whole(
                &read::TEXTS_PER_REQUEST,
                d.texts_per_request as u64,
                1..=10_000,
            )?),
            factor_budget_bytes: size(src.whole(
                &read::FACTOR_BUDGET_BYTES,
                d.factor_budget_bytes as u64,
                MIB..=1024 * GIB,
            )?),
            merged_budget_bytes: size(src.whole(
                &read::MERGED_BUDGET_BYTES,
                d.merged_budget_bytes as u64,
                0..=1024 * GIB,
            )?),
            promote_share: src.number(&read::PROMOTE_SHARE, d.promote_share, |x| {
                (!(x > 0.0 && x <= 1.0)).then_some("must be above 0 and at most 1")
            })?,
            promote_window_rows: size(src.whole(
                &read::PROMOTE_WINDOW_ROWS,
                d.promote_window_rows as u64,
                1..=1_000_000,
            )?),
            quota: default_quota,
            admin_token,
            metrics_public: src.flag(&read::METRICS_PUBLIC, d.metrics_public)?,
            metrics_adapter_series: size(src.whole(
                &read::METRICS_ADAPTER_SERIES,
                d.metrics_adapter_series as u64,
                1..=10_000,
            )?),
            // 100 ms (a test's pace) to 10 minutes; the last hour is kept either way.
            history_interval_ms: src.whole(
                &read::HISTORY_INTERVAL_MS,
                d.history_interval_ms,
                100..=600_000,
            )?,
            tenants,
            log_format: match src.text(&read::LOG_FORMAT, false)? {
                None => d.log_format,
                Some((text, origin)) => match text.as_str() {
                    "human" => LogFormat::Human,
                    "json" => LogFormat::Json,
                    _ => {
                        return Err(ConfigError::invalid(
                            origin.label(&read::LOG_FORMAT),
                            text,
                            "expected \"human\" or \"json\"",
                        ));
                    }
                },
            },
            log_filter: match src.text(&read::LOG_FILTER, false)? {
                Some((text, _)) => text,
                None => d.log_filter,
            },
            shutdown_grace_ms: src.whole(
                &read::SHUTDOWN_GRACE_MS,
                d.shutdown_grace_ms,
                0..=600_000,
            )?,
            huge_pages: src.flag(&read::HUGE_PAGES, d.huge_pages)?,
            experiments_database: src
                .text(&read::EXPERIMENTS_DATABASE, false)?
                .map(|(text, _)| PathBuf::from(text)),
            // Ten years: past that, a response record is an archive, not an experiment.
            keep_responses_days: src.whole(
                &read::KEEP_RESPONSES_DAYS,
                d.keep_responses_days,
                1..=3650,
            )?,
            mixing_variance: src.number(&read::MIXING_VARIANCE, d.mixing_variance, |x| {
                (!(x > 0.0 && x <= 1e6)).then_some("must be above 0 and at most 1e6")
            })?,
            assignment_alarm_p: src.number(
                &read::ASSIGNMENT_ALARM_P,
                d.assignment_alarm_p,
                |x| (!(x > 0.0 && x <= 0.5)).then_some("must be above 0 and at most 0.5"),
            )?,
            // 50 ms (a test's pace) to 10 minutes.
            rollout_check_ms: src.whole(
                &read::ROLLOUT_CHECK_MS,
                d.rollout_check_ms,
                50..=600_000,
            )?,
            shadow_max_in_flight: src.whole(
                &read::SHADOW_MAX_IN_FLIGHT,
                d.shadow_max_in_flight,
                1..=64,
            )?,
            shadow_max_queued: src.whole(
                &read::SHADOW_MAX_QUEUED,
                d.shadow_max_queued,
                0..=10_000,
            )?,
        })
    }
}

/// A folder from the command line, the environment or the file, in that order.
fn dir(
    src: &Sources<'_>,
    key: &SettingKey,
    command_line: Option<&Path>,
) -> Result<Option<PathBuf>, ConfigError> {
    if let Some(path) = command_line {
        if path.as_os_str().is_empty() {
            return Err(ConfigError::invalid(
                Origin::CommandLine.label(key),
                "",
                "is empty; give a folder",
            ));
        }
        return Ok(Some(path.to_owned()));
    }
    Ok(src.text(key, false)?.map(|(text, _)| PathBuf::from(text)))
}

/// `[store] bucket` and the keys that only mean something beside it.
fn object_store(src: &Sources<'_>) -> Result<Option<ObjectStoreSettings>, ConfigError> {
    let bucket = src.text(&read::STORE_BUCKET, false)?;
    let endpoint = src.text(&read::STORE_ENDPOINT, false)?;
    if let Some((text, origin)) = &endpoint
        && !(text.starts_with("http://") || text.starts_with("https://"))
    {
        return Err(ConfigError::invalid(
            origin.label(&read::STORE_ENDPOINT),
            text.as_str(),
            "expected an http:// or https:// URL, such as http://127.0.0.1:9000",
        ));
    }
    let prefix = src.text(&read::STORE_PREFIX, false)?;
    let region = src.text(&read::STORE_REGION, false)?;
    let access_key_id = src.text(&read::STORE_ACCESS_KEY_ID, false)?;
    let secret_access_key = src.text(&read::STORE_SECRET_ACCESS_KEY, true)?;
    let Some((bucket, _)) = bucket else {
        let beside = [
            (&read::STORE_ENDPOINT, endpoint.is_some()),
            (&read::STORE_PREFIX, prefix.is_some()),
            (&read::STORE_REGION, region.is_some()),
            (&read::STORE_ACCESS_KEY_ID, access_key_id.is_some()),
            (&read::STORE_SECRET_ACCESS_KEY, secret_access_key.is_some()),
        ];
        if let Some((key, _)) = beside.iter().find(|(_, set)| *set) {
            return Err(ConfigError::Missing {
                key: read::STORE_BUCKET.dotted(),
                rule: format!(
                    "{} is set, which only applies to an object store; name its bucket in [store] bucket or {}",
                    key.dotted(),
                    read::STORE_BUCKET.env
                ),
            });
        }
        return Ok(None);
    };
    Ok(Some(ObjectStoreSettings {
        bucket,
        endpoint: endpoint.map(|(text, _)| text),
        prefix: prefix.map(|(text, _)| text).unwrap_or_default(),
        region: region.map_or_else(|| DEFAULT_STORE_REGION.to_owned(), |(text, _)| text),
        access_key_id: access_key_id.map(|(text, _)| text),
        secret_access_key: secret_access_key.map(|(text, _)| text),
    }))
}

/// The admin token follows the API key rule, and differs from every tenant's key: one string
/// must not be both a tenant's key and the key to the admin API.
fn admin_token(
    src: &Sources<'_>,
    tenants: &[TenantSettings],
) -> Result<Option<String>, ConfigError> {
    let Some((token, origin)) = src.text(&read::ADMIN_TOKEN, true)? else {
        return Ok(None);
    };
    let label = origin.label(&read::ADMIN_TOKEN);
    if let Some(rule) = secret_rule(&token) {
        return Err(ConfigError::secret(label, rule));
    }
    for (i, tenant) in tenants.iter().enumerate() {
        if let Some(j) = tenant.keys.iter().position(|k| *k == token) {
            return Err(ConfigError::secret(
                label,
                format!(
                    "is the same as `tenants[{i}].keys[{j}]`; the admin token must differ from every API key"
                ),
            ));
        }
    }
    Ok(Some(token))
}

/// Parses the file into a table; a syntax error says where (line and column).
fn parse_toml(text: &str, path: &Path) -> Result<toml::Table, ConfigError> {
    text.parse::<toml::Table>().map_err(|e| {
        let place = e.span().map(|span| {
            let before = &text[..span.start.min(text.len())];
            let line = before.matches('\n').count() + 1;
            let column = before.rsplit('\n').next().unwrap_or("").chars().count() + 1;
            format!("line {line}, column {column}: ")
        });
        ConfigError::Parse {
            path: path.to_owned(),
            message: format!("{}{}", place.unwrap_or_default(), e.message()),
        }
    })
}

/// Keeps secrets out of `{:?}`: a settings value is printed in logs and test failures.
impl fmt::Debug for Settings {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Settings")
            .field("listen", &self.listen)
            .field("replica", &self.replica)
            .field("model_dir", &self.model_dir)
            .field("model_weights", &self.model_weights)
            .field("store_dir", &self.store_dir)
            .field("object_store", &self.object_store)
            .field("store_cache_bytes", &self.store_cache_bytes)
            .field("threads", &self.threads)
            .field("max_batch_rows", &self.max_batch_rows)
            .field("step_tokens", &self.step_tokens)
            .field("kv_budget_bytes", &self.kv_budget_bytes)
            .field("prefix_cache_bytes", &self.prefix_cache_bytes)
            .field("queue_depth", &self.queue_depth)
            .field("shared_batch_rows", &self.shared_batch_rows)
            .field("request_timeout_ms", &self.request_timeout_ms)
            .field("inference_body_bytes", &self.inference_body_bytes)
            .field("upload_body_bytes", &self.upload_body_bytes)
            .field("text_bytes", &self.text_bytes)
            .field("prompt_tokens", &self.prompt_tokens)
            .field("generated_tokens", &self.generated_tokens)
            .field("texts_per_request", &self.texts_per_request)
            .field("factor_budget_bytes", &self.factor_budget_bytes)
            .field("merged_budget_bytes", &self.merged_budget_bytes)
            .field("promote_share", &self.promote_share)
            .field("promote_window_rows", &self.promote_window_rows)
            .field("quota", &self.quota)
            .field(
                "admin_token",
                &self.admin_token.as_deref().map(rules::redacted),
            )
            .field("metrics_public", &self.metrics_public)
            .field("metrics_adapter_series", &self.metrics_adapter_series)
            .field("history_interval_ms", &self.history_interval_ms)
            .field("tenants", &self.tenants)
            .field("log_format", &self.log_format)
            .field("log_filter", &self.log_filter)
            .field("shutdown_grace_ms", &self.shutdown_grace_ms)
            .field("huge_pages", &self.huge_pages)
            .field("experiments_database", &self.experiments_database)
            .field("keep_responses_days", &self.keep_responses_days)
            .field("mixing_variance", &self.mixing_variance)
            .field("assignment_alarm_p", &self.assignment_alarm_p)
            .field("rollout_check_ms", &self.rollout_check_ms)
            .field("shadow_max_in_flight", &self.shadow_max_in_flight)
            .field("shadow_max_queued", &self.shadow_max_queued)
            .finish()
    }
}

impl fmt::Debug for TenantSettings {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let keys: Vec<String> = self.keys.iter().map(|k| rules::redacted(k)).collect();
        f.debug_struct("TenantSettings")
            .field("name", &self.name)
            .field("keys", &keys)
            .field("adapters", &self.adapters)
            .field("quota", &self.quota)
            .finish()
    }
}

#[cfg(test)]
mod tests;
