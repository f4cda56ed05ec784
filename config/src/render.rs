//! The effective settings as TOML text, in the file's own layout, so `switchyard config check`
//! shows what a server would run with. Secrets appear as their length only; a settings value with
//! no secrets renders to text that loads back to the same settings.

use std::fmt::Write;
use std::path::Path;

use crate::Settings;
use crate::read::{self, SettingKey};
use crate::rules::redacted;

/// TOML string syntax (quoted and escaped) for `text`.
fn quoted(text: &str) -> String {
    toml::Value::String(text.to_owned()).to_string()
}

fn path(p: &Path) -> String {
    quoted(&p.to_string_lossy())
}

/// Writes the text; one `line(key, value)` per scalar and a `# comment` for keys left unset.
struct Page {
    text: String,
    section: &'static str,
}

impl Page {
    fn line(&mut self, key: &SettingKey, value: impl std::fmt::Display) {
        self.open(key);
        let _ = writeln!(self.text, "{} = {value}", key.name);
    }

    fn unset(&mut self, key: &SettingKey, why: &str) {
        self.open(key);
        // A TOML comment may hold no control character but a tab: escape any (a path may).
        let why: String = why
            .chars()
            .map(|c| {
                if c.is_control() && c != '\t' {
                    c.escape_default().to_string()
                } else {
                    c.to_string()
                }
            })
            .collect();
        let _ = writeln!(self.text, "# {} is not set: {why}", key.name);
    }

    fn open(&mut self, key: &SettingKey) {
        if self.section != key.section {
            self.section = key.section;
            let _ = writeln!(self.text, "\n[{}]", key.section);
        }
    }
}

pub(crate) fn render(s: &Settings) -> String {
    let mut page = Page {
        text: "# effective switchyard settings: defaults, then the file, then SWITCHYARD_* \
               variables, then the command line\n"
            .to_owned(),
        section: "",
    };
    page.line(&read::LISTEN, quoted(&s.listen.to_string()));
    match &s.replica {
        Some(name) => page.line(&read::REPLICA, quoted(name)),
        None => page.unset(&read::REPLICA, "the machine's host name"),
    }
    page.line(&read::SHUTDOWN_GRACE_MS, s.shutdown_grace_ms);
    page.line(&read::HUGE_PAGES, s.huge_pages);
    match &s.model_dir {
        Some(dir) => page.line(&read::MODEL_DIR, path(dir)),
        None => page.unset(
            &read::MODEL_DIR,
            "`switchyard serve` refuses to start without it",
        ),
    }
    page.line(&read::MODEL_WEIGHTS, quoted(&s.model_weights.to_string()));
    match &s.store_dir {
        Some(dir) => page.line(&read::STORE_DIR, path(dir)),
        None => page.unset(&read::STORE_DIR, "no adapter store is configured"),
    }
    match &s.object_store {
        Some(o) => {
            page.line(&read::STORE_BUCKET, quoted(&o.bucket));
            match &o.endpoint {
                Some(url) => page.line(&read::STORE_ENDPOINT, quoted(url)),
                None => page.unset(&read::STORE_ENDPOINT, "Amazon S3"),
            }
            page.line(&read::STORE_PREFIX, quoted(&o.prefix));
            page.line(&read::STORE_REGION, quoted(&o.region));
            match &o.access_key_id {
                Some(id) => page.line(&read::STORE_ACCESS_KEY_ID, quoted(id)),
                None => page.unset(&read::STORE_ACCESS_KEY_ID, "the client's own defaults"),
            }
            match &o.secret_access_key {
                Some(secret) => {
                    page.line(&read::STORE_SECRET_ACCESS_KEY, quoted(&redacted(secret)))
                }
                None => page.unset(&read::STORE_SECRET_ACCESS_KEY, "the client's own defaults"),
            }
        }
        None => {
            let local = "the store is the local folder [store] dir";
            for key in [
                &read::STORE_BUCKET,
                &read::STORE_ENDPOINT,
                &read::STORE_PREFIX,
                &read::STORE_REGION,
                &read::STORE_ACCESS_KEY_ID,
                &read::STORE_SECRET_ACCESS_KEY,
            ] {
                page.unset(key, local);
            }
        }
    }
    page.line(&read::STORE_CACHE_BYTES, s.store_cache_bytes);
    page.line(&read::THREADS, s.threads);
    page.line(&read::MAX_BATCH_ROWS, s.max_batch_rows);
    page.line(&read::STEP_TOKENS, s.step_tokens);
    page.line(&read::KV_BUDGET_BYTES, s.kv_budget_bytes);
    page.line(&read::PREFIX_CACHE_BYTES, s.prefix_cache_bytes);
    page.line(&read::QUEUE_DEPTH, s.queue_depth);
    page.line(&read::SHARED_BATCH_ROWS, s.shared_batch_rows);
    page.line(&read::REQUEST_TIMEOUT_MS, s.request_timeout_ms);
    page.line(&read::INFERENCE_BODY_BYTES, s.inference_body_bytes);
    page.line(&read::UPLOAD_BODY_BYTES, s.upload_body_bytes);
    page.line(&read::TEXT_BYTES, s.text_bytes);
    page.line(&read::PROMPT_TOKENS, s.prompt_tokens);
    page.line(&read::GENERATED_TOKENS, s.generated_tokens);
    page.line(&read::TEXTS_PER_REQUEST, s.texts_per_request);
    page.line(&read::FACTOR_BUDGET_BYTES, s.factor_budget_bytes);
    page.line(&read::MERGED_BUDGET_BYTES, s.merged_budget_bytes);
    page.line(&read::PROMOTE_SHARE, toml::Value::Float(s.promote_share));
    page.line(&read::PROMOTE_WINDOW_ROWS, s.promote_window_rows);
    let q = &s.quota;
    let no_limit = "no limit, unless a tenant sets its own";
    match q.requests_per_second {
        Some(rate) => page.line(&read::QUOTA_REQUESTS_PER_SECOND, toml::Value::Float(rate)),
        None => page.unset(&read::QUOTA_REQUESTS_PER_SECOND, no_limit),
    }
    match q.concurrent_requests {
        Some(n) => page.line(&read::QUOTA_CONCURRENT_REQUESTS, n),
        None => page.unset(&read::QUOTA_CONCURRENT_REQUESTS, no_limit),
    }
    match q.tokens_per_minute {
        Some(n) => page.line(&read::QUOTA_TOKENS_PER_MINUTE, n),
        None => page.unset(&read::QUOTA_TOKENS_PER_MINUTE, no_limit),
    }
    match &s.admin_token {
        Some(token) => page.line(&read::ADMIN_TOKEN, quoted(&redacted(token))),
        None => page.unset(&read::ADMIN_TOKEN, "the admin API is disabled"),
    }
    page.line(&read::METRICS_PUBLIC, s.metrics_public);
    page.line(&read::METRICS_ADAPTER_SERIES, s.metrics_adapter_series);
    page.line(&read::HISTORY_INTERVAL_MS, s.history_interval_ms);
    page.line(&read::LOG_FORMAT, quoted(s.log_format.as_str()));
    page.line(&read::LOG_FILTER, quoted(&s.log_filter));
    match s.experiments_database_path() {
        Some(file) if s.experiments_database.is_some() => {
            page.line(&read::EXPERIMENTS_DATABASE, path(&file))
        }
        Some(file) => page.unset(
            &read::EXPERIMENTS_DATABASE,
            &format!("experiments are kept in {} (the store folder)", path(&file)),
        ),
        None => page.unset(&read::EXPERIMENTS_DATABASE, "no store folder either"),
    }
    page.line(&read::KEEP_RESPONSES_DAYS, s.keep_responses_days);
    page.line(&read::MIXING_VARIANCE, s.mixing_variance);
    page.line(&read::ASSIGNMENT_ALARM_P, s.assignment_alarm_p);
    page.line(&read::ROLLOUT_CHECK_MS, s.rollout_check_ms);
    page.line(&read::SHADOW_MAX_IN_FLIGHT, s.shadow_max_in_flight);
    page.line(&read::SHADOW_MAX_QUEUED, s.shadow_max_queued);

    let mut text = page.text;
    if s.tenants.is_empty() {
        text.push_str(
            "\n# no [[tenants]]: the server is open; every request is served as tenant \
             \"default\", which may use every adapter\n",
        );
    }
    for tenant in &s.tenants {
        let keys: Vec<String> = tenant.keys.iter().map(|k| quoted(&redacted(k))).collect();
        let adapters: Vec<String> = tenant.adapters.iter().map(|a| quoted(a)).collect();
        let _ = write!(
            text,
            "\n[[tenants]]\nname = {}\nkeys = [{}]\nadapters = [{}]\n",
            quoted(&tenant.name),
            keys.join(", "),
            adapters.join(", ")
        );
        let q = &tenant.quota;
        if let Some(rate) = q.requests_per_second {
            let _ = writeln!(text, "requests_per_second = {}", toml::Value::Float(rate));
        }
        if let Some(n) = q.concurrent_requests {
            let _ = writeln!(text, "concurrent_requests = {n}");
        }
        if let Some(n) = q.tokens_per_minute {
            let _ = writeln!(text, "tokens_per_minute = {n}");
        }
    }
    text
}
