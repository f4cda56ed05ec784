//! The example configuration shipped in config/ loads, and says what its comments say.

use std::path::{Path, PathBuf};

use switchyard_config::{LogFormat, Quota, Settings};

fn example() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("switchyard.example.toml")
}

#[test]
fn example_config_loads() {
    let s = Settings::load(Some(&example()), Vec::new()).unwrap();
    assert_eq!(
        s.model_dir.as_deref(),
        Some(Path::new("models/all-minilm-l6-v2"))
    );
    assert_eq!(s.store_dir.as_deref(), Some(Path::new("var/store")));
    assert_eq!(
        s.require_model_dir().unwrap(),
        Path::new("models/all-minilm-l6-v2")
    );
    let tenants: Vec<(&str, Vec<&str>)> = s
        .tenants
        .iter()
        .map(|t| {
            (
                t.name.as_str(),
                t.adapters.iter().map(String::as_str).collect(),
            )
        })
        .collect();
    assert_eq!(
        tenants,
        vec![
            ("ridgeline-north", vec!["north-*", "shared-faq"]),
            ("ridgeline-south", vec!["south-*", "shared-faq"]),
        ]
    );
    assert_eq!(s.tenants[1].keys.len(), 2);
    // North has no quota; south holds the two limits its entry sets.
    assert!(s.tenants[0].quota.is_unlimited());
    assert_eq!(
        s.tenants[1].quota,
        Quota {
            requests_per_second: None,
            concurrent_requests: Some(4),
            tokens_per_minute: Some(30_000),
        }
    );
    assert!(s.admin_token.is_some());
    assert_eq!(s.log_format, LogFormat::Human);
}

#[test]
fn example_config_spells_out_the_defaults() {
    // Apart from the keys the comments call out (paths, the admin token, the tenants), every value
    // in the example is the built-in default, as its header promises.
    let s = Settings::load(Some(&example()), Vec::new()).unwrap();
    let defaults = Settings {
        model_dir: s.model_dir.clone(),
        store_dir: s.store_dir.clone(),
        admin_token: s.admin_token.clone(),
        tenants: s.tenants.clone(),
        ..Settings::default()
    };
    assert_eq!(s, defaults);
}

#[test]
fn example_config_renders_without_its_secrets() {
    let s = Settings::load(Some(&example()), Vec::new()).unwrap();
    let page = s.render_effective();
    assert!(!page.contains("example-north-key-not-a-secret"), "{page}");
    assert!(!page.contains("example-admin-token-change-me"), "{page}");
    assert!(page.contains("name = \"ridgeline-south\""), "{page}");
}
