//! The config reader (`switchyard_config::Settings::from_text`, what `switchyard serve` and
//! `switchyard config check` run on a file's text and the `SWITCHYARD_*` environment). An input is
//! a TOML file's text, then optionally a line `#-- environment` and `NAME=value` lines (seeds:
//! `fuzz/seeds/config`, among them `config/switchyard.example.toml`; dictionary:
//! `fuzz/dicts/config.dict`).
//!
//! Properties, beyond "no panic, no overflow, no unbounded allocation":
//! - a refusal names the key it refused, unless it is a TOML syntax error (which names the file);
//! - settings that load are in the documented ranges (every number, every name and key rule,
//!   tenant names and keys unique, the admin token no tenant's key, the weight format one of
//!   `WeightFormat::NAMES`);
//! - they render (`config check`) to TOML that, with the redacted secrets put back, loads with no
//!   environment to the same settings, and renders again to the same text.
#![no_main]

use std::net::SocketAddr;
use std::path::Path;

use libfuzzer_sys::fuzz_target;
use switchyard_config::{
    ConfigError, MAX_BATCH_ROWS_LIMIT, Overrides, Quota, Settings, WeightFormat,
};

use switchyard_fuzz::split_at_line;

const FILE: &str = "fuzz-input.toml";
const MIB: usize = 1 << 20;
const GIB: usize = 1 << 30;

fn name_ok(name: &str, wildcard: bool) -> bool {
    !name.is_empty()
        && name.len() <= 64
        && name.chars().all(|c| {
            c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-' || (wildcard && c == '*')
        })
}

fn secret_ok(secret: &str) -> bool {
    (16..=512).contains(&secret.len()) && secret.chars().all(|c| c.is_ascii_graphic())
}

/// The documented range of every setting.
fn check_ranges(s: &Settings) {
    assert!(s.threads <= 1024);
    assert!((1..=MAX_BATCH_ROWS_LIMIT).contains(&s.max_batch_rows));
    assert!((1..=100_000).contains(&s.queue_depth));
    assert!((1..=MAX_BATCH_ROWS_LIMIT).contains(&s.shared_batch_rows));
    check_quota(&s.quota);
    assert!((1..=3_600_000).contains(&s.request_timeout_ms));
    assert!((1024..=GIB).contains(&s.inference_body_bytes));
    assert!((1024..=16 * GIB).contains(&s.upload_body_bytes));
    assert!((1..=GIB).contains(&s.text_bytes));
    assert!((1..=131_072).contains(&s.prompt_tokens));
    assert!((1..=131_072).contains(&s.generated_tokens));
    assert!((1..=10_000).contains(&s.texts_per_request));
    assert!((1..=10_000).contains(&s.metrics_adapter_series));
    assert!((MIB..=1024 * GIB).contains(&s.factor_budget_bytes));
    assert!(s.merged_budget_bytes <= 1024 * GIB);
    assert!(s.promote_share > 0.0 && s.promote_share <= 1.0);
    assert!((1..=1_000_000).contains(&s.promote_window_rows));
    assert!(s.shutdown_grace_ms <= 600_000);
    assert!(!s.log_filter.is_empty());
    let weights = s.model_weights.to_string();
    assert!(
        WeightFormat::NAMES.contains(&weights.as_str()),
        "weight format {weights:?}"
    );
    for dir in [&s.model_dir, &s.store_dir].into_iter().flatten() {
        assert!(!dir.as_os_str().is_empty());
    }
    let mut names = std::collections::BTreeSet::new();
    let mut keys = std::collections::BTreeSet::new();
    for t in &s.tenants {
        assert!(name_ok(&t.name, false), "tenant name {:?}", t.name);
        assert!(names.insert(t.name.as_str()), "tenant names are unique");
        assert!(!t.keys.is_empty());
        for k in &t.keys {
            assert!(secret_ok(k));
            assert!(keys.insert(k.as_str()), "keys are unique");
        }
        check_quota(&t.quota);
        for a in &t.adapters {
            assert!(name_ok(a, true), "adapter pattern {a:?}");
        }
    }
    if let Some(token) = &s.admin_token {
        assert!(secret_ok(token));
        assert!(
            !keys.contains(token.as_str()),
            "the admin token is no tenant's key"
        );
    }
}

/// Every limit a quota sets is within its documented range (README, "Tenants share the server").
fn check_quota(q: &Quota) {
    if let Some(rate) = q.requests_per_second {
        assert!(
            rate > 0.0 && rate <= 1_000_000.0,
            "requests_per_second {rate}"
        );
    }
    if let Some(n) = q.concurrent_requests {
        assert!((1..=1_000_000).contains(&n), "concurrent_requests {n}");
    }
    if let Some(n) = q.tokens_per_minute {
        assert!(
            (1..=1_000_000_000_000).contains(&n),
            "tokens_per_minute {n}"
        );
    }
}

/// The rendered text with the secrets put back where the rendering redacted them.
fn with_secrets(rendered: &str, s: &Settings) -> String {
    let mut table: toml::Table = rendered
        .parse()
        .unwrap_or_else(|e| panic!("the rendered settings are TOML: {e}\n{rendered}"));
    if let Some(token) = &s.admin_token {
        let admin = table
            .get_mut("admin")
            .and_then(toml::Value::as_table_mut)
            .expect("a set admin token renders an [admin] section");
        admin.insert("token".to_owned(), toml::Value::String(token.clone()));
    }
    if let Some(toml::Value::Array(tenants)) = table.get_mut("tenants") {
        assert_eq!(tenants.len(), s.tenants.len());
        for (rendered, tenant) in tenants.iter_mut().zip(&s.tenants) {
            let keys = tenant
                .keys
                .iter()
                .cloned()
                .map(toml::Value::String)
                .collect();
            rendered
                .as_table_mut()
                .expect("a tenant renders as a table")
                .insert("keys".to_owned(), toml::Value::Array(keys));
        }
    } else {
        assert!(s.tenants.is_empty(), "every tenant is rendered");
    }
    toml::to_string(&table).expect("a table serialises")
}

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let (file, env) = split_at_line(text, "#-- environment");
    let env: Vec<(String, String)> = env
        .unwrap_or("")
        .lines()
        .filter_map(|l| l.split_once('='))
        .map(|(k, v)| (k.to_owned(), v.to_owned()))
        .collect();
    let settings = match Settings::from_text(file, Path::new(FILE), env, &Overrides::default()) {
        Ok(s) => s,
        Err(e) => {
            match &e {
                ConfigError::Parse { path, .. } => assert_eq!(path, Path::new(FILE)),
                other => assert!(other.key().is_some_and(|k| !k.is_empty()), "{other}"),
            }
            return;
        }
    };
    check_ranges(&settings);
    let _: SocketAddr = settings.listen;

    let rendered = settings.render_effective();
    let restored = with_secrets(&rendered, &settings);
    let reloaded = Settings::from_text(
        &restored,
        Path::new(FILE),
        Vec::new(),
        &Overrides::default(),
    )
    .unwrap_or_else(|e| panic!("the rendered settings load again: {e}\n{restored}"));
    assert_eq!(
        reloaded, settings,
        "rendered settings reload to the same settings\n{restored}"
    );
    assert_eq!(reloaded.render_effective(), rendered);
});
