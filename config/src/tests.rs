//! Unit tests: defaults, precedence, and one refusal per rule, each checked for the key and the
//! value it names (and, for secrets, for not repeating the value).

use super::*;

/// Settings from TOML text and `NAME=value` environment pairs, as `load_with` would read them.
fn load_text_with(
    text: &str,
    env: &[(&str, &str)],
    overrides: &Overrides,
) -> Result<Settings, ConfigError> {
    let env = env.iter().map(|(k, v)| (k.to_string(), v.to_string()));
    Settings::from_text(text, Path::new("switchyard.toml"), env, overrides)
}

fn load_text(text: &str, env: &[(&str, &str)]) -> Result<Settings, ConfigError> {
    load_text_with(text, env, &Overrides::default())
}

fn refusal(text: &str, env: &[(&str, &str)]) -> String {
    load_text(text, env).unwrap_err().to_string()
}

const NORTH_KEY: &str = "north-key-0123456789";
const SOUTH_KEY: &str = "south-key-0123456789";

fn two_tenants() -> String {
    format!(
        "[[tenants]]\nname = \"ridgeline-north\"\nkeys = [\"{NORTH_KEY}\"]\nadapters = [\"north-*\"]\n\
         [[tenants]]\nname = \"ridgeline-south\"\nkeys = [\"{SOUTH_KEY}\"]\nadapters = [\"south-*\", \"shared-faq\"]\n"
    )
}

#[test]
fn defaults_apply_without_file_or_environment() {
    let s = Settings::load(None, Vec::new()).unwrap();
    assert_eq!(s, Settings::default());
    // The values the brief promises, spelled out so a changed default is a visible decision.
    assert_eq!(s.listen.to_string(), "127.0.0.1:7070");
    assert_eq!(s.max_batch_rows, 32);
    assert_eq!(s.queue_depth, 256);
    assert_eq!(s.shared_batch_rows, 4);
    assert_eq!(s.request_timeout_ms, 30_000);
    assert_eq!(
        (s.inference_body_bytes, s.upload_body_bytes),
        (2 << 20, 64 << 20)
    );
    assert_eq!(
        (
            s.prompt_tokens,
            s.generated_tokens,
            s.texts_per_request,
            s.text_bytes
        ),
        (256, 256, 64, 256 * 64)
    );
    assert!(!s.metrics_public);
    assert_eq!(s.metrics_adapter_series, 100);
    assert_eq!(s.history_interval_ms, 10_000);
    assert_eq!(s.factor_budget_bytes, 1 << 30);
    assert_eq!(s.merged_budget_bytes, 2 << 30);
    assert_eq!((s.promote_share, s.promote_window_rows), (0.9, 512));
    assert_eq!(
        (s.log_format, s.log_filter.as_str()),
        (LogFormat::Human, "info")
    );
    assert_eq!(s.shutdown_grace_ms, 10_000);
    assert!(!s.huge_pages);
    assert!(s.admin_token.is_none() && s.tenants.is_empty() && s.model_dir.is_none());
    assert!(s.quota.is_unlimited(), "no quota unless one is configured");
}

#[test]
fn environment_overrides_file() {
    let s = load_text(
        "[engine]\nmax_batch_rows = 8\nthreads = 2\n",
        &[("SWITCHYARD_ENGINE_MAX_BATCH_ROWS", "16")],
    )
    .unwrap();
    assert_eq!(s.max_batch_rows, 16);
    assert_eq!(s.threads, 2);
}

#[test]
fn command_line_overrides_environment_which_overrides_file() {
    let file = "[server]\nlisten = \"127.0.0.1:1001\"\n[model]\ndir = \"file-model\"\n\
                [store]\ndir = \"file-store\"\n";
    let env = [
        ("SWITCHYARD_LISTEN", "127.0.0.1:2002"),
        ("SWITCHYARD_MODEL_DIR", "env-model"),
        ("SWITCHYARD_STORE_DIR", "env-store"),
    ];
    let cli = Overrides {
        listen: Some("127.0.0.1:3003".parse().unwrap()),
        model_dir: Some("cli-model".into()),
        store_dir: Some("cli-store".into()),
        ..Overrides::default()
    };

    let from_file = load_text(file, &[]).unwrap();
    assert_eq!(from_file.listen.port(), 1001);
    assert_eq!(from_file.model_dir, Some("file-model".into()));
    assert_eq!(from_file.store_dir, Some("file-store".into()));

    let from_env = load_text(file, &env).unwrap();
    assert_eq!(from_env.listen.port(), 2002);
    assert_eq!(from_env.model_dir, Some("env-model".into()));
    assert_eq!(from_env.store_dir, Some("env-store".into()));

    let from_cli = load_text_with(file, &env, &cli).unwrap();
    assert_eq!(from_cli.listen.port(), 3003);
    assert_eq!(from_cli.model_dir, Some("cli-model".into()));
    assert_eq!(from_cli.store_dir, Some("cli-store".into()));

    // One override leaves the others to the lower layers.
    let only_listen = Overrides {
        listen: cli.listen,
        ..Overrides::default()
    };
    let mixed = load_text_with(file, &env[1..], &only_listen).unwrap();
    assert_eq!(mixed.listen.port(), 3003);
    assert_eq!(mixed.model_dir, Some("env-model".into()));
}

#[test]
fn every_scalar_key_is_read_from_the_file_and_from_its_variable() {
    // One value per key, none of them the default, so a key that is not wired up shows.
    let values: &[(&SettingKey, &str, &str)] = &[
        (&read::LISTEN, "\"0.0.0.0:9000\"", "0.0.0.0:9000"),
        (&read::REPLICA, "\"north-2\"", "north-2"),
        (&read::SHUTDOWN_GRACE_MS, "1234", "1234"),
        (&read::HUGE_PAGES, "true", "true"),
        (&read::MODEL_DIR, "\"m\"", "m"),
        (&read::MODEL_WEIGHTS, "\"int4-g64\"", "int4-g64"),
        (&read::STORE_DIR, "\"s\"", "s"),
        (&read::THREADS, "3", "3"),
        (&read::MAX_BATCH_ROWS, "7", "7"),
        (&read::STEP_TOKENS, "77", "77"),
        (&read::KV_BUDGET_BYTES, "123456", "123456"),
        (&read::PREFIX_CACHE_BYTES, "654321", "654321"),
        (&read::QUEUE_DEPTH, "9", "9"),
        (&read::SHARED_BATCH_ROWS, "2", "2"),
        (&read::REQUEST_TIMEOUT_MS, "1500", "1500"),
        (&read::INFERENCE_BODY_BYTES, "4096", "4096"),
        (&read::UPLOAD_BODY_BYTES, "8192", "8192"),
        (&read::TEXT_BYTES, "1000", "1000"),
        (&read::PROMPT_TOKENS, "128", "128"),
        (&read::GENERATED_TOKENS, "64", "64"),
        (&read::TEXTS_PER_REQUEST, "8", "8"),
        (&read::FACTOR_BUDGET_BYTES, "2097152", "2097152"),
        (&read::MERGED_BUDGET_BYTES, "0", "0"),
        (&read::PROMOTE_SHARE, "0.5", "0.5"),
        (&read::PROMOTE_WINDOW_ROWS, "100", "100"),
        (&read::QUOTA_REQUESTS_PER_SECOND, "2.5", "2.5"),
        (&read::QUOTA_CONCURRENT_REQUESTS, "4", "4"),
        (&read::QUOTA_TOKENS_PER_MINUTE, "60000", "60000"),
        (
            &read::ADMIN_TOKEN,
            "\"admin-token-0123456789\"",
            "admin-token-0123456789",
        ),
        (&read::METRICS_PUBLIC, "true", "true"),
        (&read::METRICS_ADAPTER_SERIES, "7", "7"),
        (&read::HISTORY_INTERVAL_MS, "500", "500"),
        (&read::LOG_FORMAT, "\"json\"", "json"),
        (&read::LOG_FILTER, "\"debug\"", "debug"),
        (&read::EXPERIMENTS_DATABASE, "\"e.sqlite\"", "e.sqlite"),
        (&read::KEEP_RESPONSES_DAYS, "7", "7"),
        (&read::MIXING_VARIANCE, "0.25", "0.25"),
        (&read::ASSIGNMENT_ALARM_P, "0.01", "0.01"),
        (&read::ROLLOUT_CHECK_MS, "250", "250"),
        (&read::SHADOW_MAX_IN_FLIGHT, "3", "3"),
        (&read::SHADOW_MAX_QUEUED, "5", "5"),
        (&read::STORE_BUCKET, "\"adapters\"", "adapters"),
        (
            &read::STORE_ENDPOINT,
            "\"http://127.0.0.1:9000\"",
            "http://127.0.0.1:9000",
        ),
        (&read::STORE_PREFIX, "\"fleet\"", "fleet"),
        (&read::STORE_REGION, "\"eu-west-1\"", "eu-west-1"),
        (&read::STORE_ACCESS_KEY_ID, "\"key-id\"", "key-id"),
        (
            &read::STORE_SECRET_ACCESS_KEY,
            "\"secret-0123456789\"",
            "secret-0123456789",
        ),
        (&read::STORE_CACHE_BYTES, "1048576", "1048576"),
    ];
    assert_eq!(values.len(), KEYS.len(), "a key in KEYS is missing here");
    let mut file = String::new();
    let mut env = Vec::new();
    for (key, toml_value, env_value) in values {
        // Dotted keys at the top level, since a [section] may not be opened twice.
        file.push_str(&format!("{} = {toml_value}\n", key.dotted()));
        env.push((key.env, *env_value));
    }
    let from_file = load_text(&file, &[]).unwrap();
    let from_env = load_text("", &env).unwrap();
    assert_eq!(from_file, from_env);
    let expected = Settings {
        listen: "0.0.0.0:9000".parse().unwrap(),
        replica: Some("north-2".to_owned()),
        model_dir: Some("m".into()),
        model_weights: WeightFormat::parse("int4-g64").unwrap(),
        store_dir: Some("s".into()),
        object_store: Some(ObjectStoreSettings {
            bucket: "adapters".into(),
            endpoint: Some("http://127.0.0.1:9000".into()),
            prefix: "fleet".into(),
            region: "eu-west-1".into(),
            access_key_id: Some("key-id".into()),
            secret_access_key: Some("secret-0123456789".into()),
        }),
        store_cache_bytes: 1 << 20,
        threads: 3,
        max_batch_rows: 7,
        step_tokens: 77,
        kv_budget_bytes: 123456,
        prefix_cache_bytes: 654321,
        queue_depth: 9,
        shared_batch_rows: 2,
        request_timeout_ms: 1500,
        inference_body_bytes: 4096,
        upload_body_bytes: 8192,
        text_bytes: 1000,
        prompt_tokens: 128,
        generated_tokens: 64,
        texts_per_request: 8,
        factor_budget_bytes: 2 << 20,
        merged_budget_bytes: 0,
        promote_share: 0.5,
        promote_window_rows: 100,
        quota: Quota {
            requests_per_second: Some(2.5),
            concurrent_requests: Some(4),
            tokens_per_minute: Some(60_000),
        },
        admin_token: Some("admin-token-0123456789".into()),
        metrics_public: true,
        metrics_adapter_series: 7,
        history_interval_ms: 500,
        tenants: Vec::new(),
        log_format: LogFormat::Json,
        log_filter: "debug".into(),
        shutdown_grace_ms: 1234,
        huge_pages: true,
        experiments_database: Some("e.sqlite".into()),
        keep_responses_days: 7,
        mixing_variance: 0.25,
        assignment_alarm_p: 0.01,
        rollout_check_ms: 250,
        shadow_max_in_flight: 3,
        shadow_max_queued: 5,
    };
    assert_eq!(from_file, expected);
}

#[test]
fn out_of_range_value_names_key_and_value() {
    let err = refusal("[engine]\nmax_batch_rows = 0\n", &[]);
    assert!(err.contains("engine.max_batch_rows"), "{err}");
    assert!(err.contains("\"0\""), "{err}");
}

#[test]
fn each_range_is_enforced_at_both_ends() {
    // (file text, key named, value named); the bounds are the ones documented in lib.rs.
    let cases = [
        ("[engine]\nthreads = 1025", "engine.threads", "1025"),
        (
            "[engine]\nmax_batch_rows = 4097",
            "engine.max_batch_rows",
            "4097",
        ),
        ("[engine]\nqueue_depth = 0", "engine.queue_depth", "0"),
        (
            "[engine]\nqueue_depth = 100001",
            "engine.queue_depth",
            "100001",
        ),
        ("[engine]\nqueue_depth = -5", "engine.queue_depth", "-5"),
        (
            "[engine]\nshared_batch_rows = 0",
            "engine.shared_batch_rows",
            "0",
        ),
        (
            "[engine]\nshared_batch_rows = 4097",
            "engine.shared_batch_rows",
            "4097",
        ),
        (
            "[engine]\nrequest_timeout_ms = 0",
            "engine.request_timeout_ms",
            "0",
        ),
        (
            "[bounds]\ninference_body_bytes = 1023",
            "bounds.inference_body_bytes",
            "1023",
        ),
        (
            "[bounds]\nupload_body_bytes = 1023",
            "bounds.upload_body_bytes",
            "1023",
        ),
        ("[bounds]\ntext_bytes = 0", "bounds.text_bytes", "0"),
        ("[bounds]\nprompt_tokens = 0", "bounds.prompt_tokens", "0"),
        (
            "[bounds]\ngenerated_tokens = 0",
            "bounds.generated_tokens",
            "0",
        ),
        (
            "[bounds]\ntexts_per_request = 0",
            "bounds.texts_per_request",
            "0",
        ),
        (
            "[metrics]\nadapter_series = 0",
            "metrics.adapter_series",
            "0",
        ),
        (
            "[metrics]\nhistory_interval_ms = 50",
            "metrics.history_interval_ms",
            "50",
        ),
        (
            "[residency]\nfactor_budget_bytes = 0",
            "residency.factor_budget_bytes",
            "0",
        ),
        (
            "[residency]\npromote_share = 0",
            "residency.promote_share",
            "0",
        ),
        (
            "[residency]\npromote_share = 0.0",
            "residency.promote_share",
            "0.0",
        ),
        (
            "[residency]\npromote_share = 1.01",
            "residency.promote_share",
            "1.01",
        ),
        (
            "[residency]\npromote_share = nan",
            "residency.promote_share",
            "nan",
        ),
        (
            "[residency]\npromote_window_rows = 0",
            "residency.promote_window_rows",
            "0",
        ),
        (
            "[server]\nshutdown_grace_ms = 600001",
            "server.shutdown_grace_ms",
            "600001",
        ),
        (
            "[experiments]\nkeep_responses_days = 0",
            "experiments.keep_responses_days",
            "0",
        ),
        (
            "[experiments]\nkeep_responses_days = 3651",
            "experiments.keep_responses_days",
            "3651",
        ),
        (
            "[experiments]\nmixing_variance = 0",
            "experiments.mixing_variance",
            "0",
        ),
        (
            "[experiments]\nassignment_alarm_p = 0.6",
            "experiments.assignment_alarm_p",
            "0.6",
        ),
        (
            "[experiments]\nrollout_check_ms = 10",
            "experiments.rollout_check_ms",
            "10",
        ),
        (
            "[experiments]\nshadow_max_in_flight = 0",
            "experiments.shadow_max_in_flight",
            "0",
        ),
        ("[experiments]\ndatabase = \"\"", "experiments.database", ""),
    ];
    for (text, key, value) in cases {
        let err = refusal(text, &[]);
        assert!(err.contains(&format!("`{key}`")), "{text}: {err}");
        assert!(err.contains(&format!("\"{value}\"")), "{text}: {err}");
    }
    // The top ends are accepted.
    let s = load_text(
        "[engine]\nmax_batch_rows = 4096\nqueue_depth = 100000\n[residency]\npromote_share = 1\n",
        &[],
    )
    .unwrap();
    assert_eq!(
        (s.max_batch_rows, s.queue_depth, s.promote_share),
        (4096, 100_000, 1.0)
    );
}

#[test]
fn wrong_type_in_file_names_key_value_and_types() {
    let err = refusal("[engine]\nqueue_depth = \"lots\"\n", &[]);
    assert_eq!(
        err,
        "invalid value \"lots\" for `engine.queue_depth`: expected a whole number, found a string"
    );
    let err = refusal("[model]\ndir = 3\n", &[]);
    assert!(
        err.contains("`model.dir`") && err.contains("expected a string"),
        "{err}"
    );
    let err = refusal("engine = 3\n", &[]);
    assert!(err.contains("`engine`") && err.contains("a table"), "{err}");
}

#[test]
fn non_numeric_environment_value_is_refused() {
    let err = refusal("", &[("SWITCHYARD_ENGINE_THREADS", "two")]);
    assert!(
        err.contains("SWITCHYARD_ENGINE_THREADS") && err.contains("two"),
        "{err}"
    );
    let err = refusal("", &[("SWITCHYARD_RESIDENCY_PROMOTE_SHARE", "most")]);
    assert!(
        err.contains("residency.promote_share (SWITCHYARD_RESIDENCY_PROMOTE_SHARE)")
            && err.contains("\"most\""),
        "{err}"
    );
}

#[test]
fn bad_listen_address_names_key_and_value() {
    let err = refusal("[server]\nlisten = \"localhost\"\n", &[]);
    assert!(
        err.contains("`server.listen`") && err.contains("\"localhost\""),
        "{err}"
    );
    let err = refusal("", &[("SWITCHYARD_LISTEN", "7070")]);
    assert!(err.contains("server.listen (SWITCHYARD_LISTEN)"), "{err}");
}

#[test]
fn model_weights_default_to_f32_and_refuse_an_unknown_format_listing_the_valid_ones() {
    assert_eq!(load_text("", &[]).unwrap().model_weights, WeightFormat::F32);
    let s = load_text(
        "[model]\nweights = \"bf16\"\n",
        &[("SWITCHYARD_MODEL_WEIGHTS", "int8")],
    );
    assert_eq!(s.unwrap().model_weights.to_string(), "int8");
    let err = refusal("[model]\nweights = \"int3\"\n", &[]);
    assert!(
        err.contains("`model.weights`")
            && err.contains("\"int3\"")
            && err.contains("f32, bf16, int8, int8-g32"),
        "{err}"
    );
    let err = refusal("", &[("SWITCHYARD_MODEL_WEIGHTS", "fp8")]);
    assert!(
        err.contains("model.weights (SWITCHYARD_MODEL_WEIGHTS)"),
        "{err}"
    );
    let flags = Overrides {
        model_weights: Some(WeightFormat::Bf16),
        ..Overrides::default()
    };
    let s = load_text_with("", &[("SWITCHYARD_MODEL_WEIGHTS", "int8")], &flags).unwrap();
    assert_eq!(s.model_weights, WeightFormat::Bf16);
}

#[test]
fn log_format_is_human_or_json() {
    let s = load_text("", &[("SWITCHYARD_LOG_FORMAT", "json")]).unwrap();
    assert_eq!(s.log_format, LogFormat::Json);
    let err = refusal("[log]\nformat = \"yaml\"\n", &[]);
    assert!(
        err.contains("`log.format`") && err.contains("\"yaml\""),
        "{err}"
    );
    let s = load_text("", &[("SWITCHYARD_LOG", "switchyard=debug,warn")]).unwrap();
    assert_eq!(s.log_filter, "switchyard=debug,warn");
}

#[test]
fn empty_values_are_refused_rather_than_read_as_unset() {
    let err = refusal("", &[("SWITCHYARD_MODEL_DIR", "")]);
    assert!(
        err.contains("model.dir (SWITCHYARD_MODEL_DIR)") && err.contains("empty"),
        "{err}"
    );
    let err = refusal("[log]\nfilter = \"\"\n", &[]);
    assert!(err.contains("`log.filter`"), "{err}");
    let cli = Overrides {
        store_dir: Some(PathBuf::new()),
        ..Overrides::default()
    };
    let err = load_text_with("", &[], &cli).unwrap_err().to_string();
    assert!(err.contains("store.dir (command line)"), "{err}");
}

#[test]
fn variables_outside_switchyard_are_ignored() {
    let s = load_text("", &[("LISTEN", "nonsense"), ("SWITCHYARD_UNRELATED", "x")]).unwrap();
    assert_eq!(s, Settings::default());
}

#[test]
fn unknown_key_is_refused_with_its_name() {
    let err = refusal("[engine]\nmax_rows = 3\n", &[]);
    assert!(err.contains("engine.max_rows"), "{err}");
    assert!(
        err.contains("max_batch_rows"),
        "lists the known keys: {err}"
    );
}

#[test]
fn unknown_section_or_misplaced_key_gets_a_hint() {
    let err = refusal("[cache]\nsize = 3\n", &[]);
    assert!(
        err.contains("`cache`") && err.contains("known sections"),
        "{err}"
    );
    let err = refusal("listen = \"127.0.0.1:1\"\n", &[]);
    assert!(err.contains("did you mean `server.listen`"), "{err}");
    let err = refusal("[engine]\nprompt_tokens = 3\n", &[]);
    assert!(err.contains("did you mean `bounds.prompt_tokens`"), "{err}");
}

#[test]
fn keys_of_the_old_limits_section_point_to_their_new_names() {
    let err = refusal("[limits]\nmax_input_tokens = 3\n", &[]);
    assert!(
        err.contains("limits") && err.contains("renamed") && err.contains("bounds"),
        "{err}"
    );
}

#[test]
fn text_bytes_follows_prompt_tokens_unless_set() {
    let s = load_text("[bounds]\nprompt_tokens = 10\n", &[]).unwrap();
    assert_eq!(s.text_bytes, 10 * crate::TEXT_BYTES_PER_TOKEN);
    let s = load_text("[bounds]\nprompt_tokens = 10\ntext_bytes = 5\n", &[]).unwrap();
    assert_eq!(s.text_bytes, 5);
}

#[test]
fn metrics_public_takes_only_true_or_false() {
    let err = refusal("[metrics]\npublic = \"yes\"\n", &[]);
    assert!(
        err.contains("metrics.public") && err.contains("true or false"),
        "{err}"
    );
    let err = refusal("", &[("SWITCHYARD_METRICS_PUBLIC", "1")]);
    assert!(err.contains("SWITCHYARD_METRICS_PUBLIC"), "{err}");
}

#[test]
fn syntax_error_says_where() {
    let err = refusal("[engine]\nthreads = = 3\n", &[]);
    assert!(
        err.contains("switchyard.toml") && err.contains("line 2"),
        "{err}"
    );
}

#[test]
fn missing_file_is_a_read_error_naming_the_path() {
    let path = Path::new("/nonexistent/switchyard-config-test.toml");
    let err = Settings::load(Some(path), Vec::new()).unwrap_err();
    assert!(matches!(err, ConfigError::Read { .. }));
    assert!(
        err.to_string().contains("switchyard-config-test.toml"),
        "{err}"
    );
}

#[test]
fn tenants_are_read_with_keys_and_patterns() {
    let s = load_text(&two_tenants(), &[]).unwrap();
    assert_eq!(s.tenants.len(), 2);
    assert_eq!(s.tenants[0].name, "ridgeline-north");
    assert_eq!(s.tenants[0].keys, vec![NORTH_KEY.to_owned()]);
    assert_eq!(s.tenants[1].adapters, vec!["south-*", "shared-faq"]);
}

#[test]
fn tenant_without_adapters_is_allowed_and_holds_no_patterns() {
    let text = format!("[[tenants]]\nname = \"walk-in\"\nkeys = [\"{NORTH_KEY}\"]\n");
    let s = load_text(&text, &[]).unwrap();
    assert!(s.tenants[0].adapters.is_empty());
}

#[test]
fn tenant_names_follow_the_name_rule() {
    for (name, why) in [
        ("Ridgeline", "'R'"),
        ("ridge_line", "'_'"),
        ("", "empty"),
        (&"a".repeat(65), "65 characters"),
    ] {
        let text = format!("[[tenants]]\nname = \"{name}\"\nkeys = [\"{NORTH_KEY}\"]\n");
        let err = refusal(&text, &[]);
        assert!(err.contains("`tenants[0].name`"), "{err}");
        assert!(err.contains(why), "{name}: {err}");
    }
    let err = refusal("[[tenants]]\nkeys = []\n", &[]);
    assert!(err.contains("`tenants[0].name` is not set"), "{err}");
}

#[test]
fn tenant_names_are_unique() {
    let text = two_tenants().replace("ridgeline-south", "ridgeline-north");
    let err = refusal(&text, &[]);
    assert!(
        err.contains("`tenants[1].name`") && err.contains("tenants[0] already has this name"),
        "{err}"
    );
}

#[test]
fn keys_are_long_printable_and_never_echoed() {
    for (key, why) in [
        ("short-key", "9 characters, fewer than the minimum of 16"),
        ("has a space in it ok", "character 4 is a space"),
        ("tab\tseparated-key-0", "character 4"),
        ("naïve-key-0123456789", "not ASCII"),
    ] {
        let text = format!(
            "[[tenants]]\nname = \"north\"\nkeys = [\"{NORTH_KEY}\", {}]\n",
            toml::Value::String(key.to_owned())
        );
        let err = refusal(&text, &[]);
        assert!(err.contains("`tenants[0].keys[1]`"), "{err}");
        assert!(err.contains(why), "{key}: {err}");
        assert!(err.contains("<redacted>") && !err.contains(key), "{err}");
    }
    let err = refusal("[[tenants]]\nname = \"north\"\nkeys = []\n", &[]);
    assert!(err.contains("`tenants[0].keys` is not set"), "{err}");
    let err = refusal(
        "[[tenants]]\nname = \"north\"\nkeys = [12345678901234567]\n",
        &[],
    );
    assert!(
        err.contains("`tenants[0].keys[0]`") && !err.contains("1234"),
        "{err}"
    );
}

#[test]
fn keys_are_unique_across_tenants() {
    let text = two_tenants().replace(SOUTH_KEY, NORTH_KEY);
    let err = refusal(&text, &[]);
    assert!(err.contains("`tenants[1].keys[0]`"), "{err}");
    assert!(err.contains("same key as `tenants[0].keys[0]`"), "{err}");
    assert!(!err.contains(NORTH_KEY), "{err}");
}

#[test]
fn adapter_patterns_are_names_with_wildcards() {
    for pattern in ["*", "north-*", "*-faq", "n*rth-*-v2", "shared-faq"] {
        let text = format!(
            "[[tenants]]\nname = \"north\"\nkeys = [\"{NORTH_KEY}\"]\nadapters = [\"{pattern}\"]\n"
        );
        load_text(&text, &[]).unwrap_or_else(|e| panic!("{pattern}: {e}"));
    }
    for (pattern, why) in [
        ("North-*", "'N'"),
        ("north_*", "'_'"),
        ("north/*", "'/'"),
        ("", "empty"),
    ] {
        let text = format!(
            "[[tenants]]\nname = \"north\"\nkeys = [\"{NORTH_KEY}\"]\nadapters = [\"ok-*\", \"{pattern}\"]\n"
        );
        let err = refusal(&text, &[]);
        assert!(err.contains("`tenants[0].adapters[1]`"), "{err}");
        assert!(
            err.contains(&format!("{pattern:?}")) && err.contains(why),
            "{err}"
        );
    }
}

#[test]
fn unknown_tenant_field_is_refused() {
    let text = format!("[[tenants]]\nname = \"north\"\nkeys = [\"{NORTH_KEY}\"]\nquota = 3\n");
    let err = refusal(&text, &[]);
    assert!(err.contains("unknown key `tenants[0].quota`"), "{err}");
    let err = refusal("tenants = \"all\"\n", &[]);
    assert!(
        err.contains("`tenants`") && err.contains("array of tables"),
        "{err}"
    );
}

#[test]
fn admin_token_follows_the_key_rule_without_echo() {
    let err = refusal("[admin]\ntoken = \"hunter2\"\n", &[]);
    assert_eq!(
        err,
        "invalid value <redacted> for `admin.token`: is 7 characters, fewer than the minimum of 16"
    );
    let err = refusal("", &[("SWITCHYARD_ADMIN_TOKEN", "hunter2")]);
    assert!(err.contains("admin.token (SWITCHYARD_ADMIN_TOKEN)") && !err.contains("hunter2"));
    let err = refusal("[admin]\ntoken = 1234567890123456789\n", &[]);
    assert!(
        err.contains("`admin.token`") && !err.contains("1234"),
        "{err}"
    );
}

#[test]
fn admin_token_must_differ_from_every_api_key() {
    let text = format!("{}[admin]\ntoken = \"{SOUTH_KEY}\"\n", two_tenants());
    let err = refusal(&text, &[]);
    assert!(
        err.contains("`admin.token`") && err.contains("tenants[1].keys[0]"),
        "{err}"
    );
    assert!(!err.contains(SOUTH_KEY), "{err}");
}

#[test]
fn require_model_dir_names_the_key() {
    let err = Settings::default()
        .require_model_dir()
        .unwrap_err()
        .to_string();
    assert!(err.starts_with("`model.dir` is not set"), "{err}");
    assert!(err.contains("SWITCHYARD_MODEL_DIR"), "{err}");
    let s = load_text("[model]\ndir = \"models/x\"\n", &[]).unwrap();
    assert_eq!(s.require_model_dir().unwrap(), Path::new("models/x"));
}

#[test]
fn rendered_settings_redact_secrets_and_show_lengths() {
    let text = format!(
        "{}[admin]\ntoken = \"admin-token-0123456789\"\n",
        two_tenants()
    );
    let s = load_text(&text, &[]).unwrap();
    let page = s.render_effective();
    assert!(
        !page.contains(NORTH_KEY) && !page.contains("admin-token-0123456789"),
        "{page}"
    );
    assert!(page.contains("token = \"<redacted, 22 chars>\""), "{page}");
    assert!(page.contains("keys = [\"<redacted, 20 chars>\"]"), "{page}");
    assert!(
        page.contains("adapters = [\"south-*\", \"shared-faq\"]"),
        "{page}"
    );
    let debug = format!("{s:?}");
    assert!(
        !debug.contains(NORTH_KEY) && !debug.contains("admin-token-0123456789"),
        "{debug}"
    );
}

#[test]
fn rendered_settings_without_secrets_load_back_unchanged() {
    let s = load_text(
        "[model]\ndir = \"models/all-minilm-l6-v2\"\n[engine]\nqueue_depth = 17\n\
         [residency]\npromote_share = 0.75\n[log]\nformat = \"json\"\n",
        &[("SWITCHYARD_STORE_DIR", "demo/store")],
    )
    .unwrap();
    let page = s.render_effective();
    let again = load_text(&page, &[]).unwrap();
    assert_eq!(again, s, "{page}");
    for key in KEYS {
        assert!(
            page.contains(&format!("\n{} = ", key.name))
                || page.contains(&format!("# {} is not set", key.name)),
            "{} missing from\n{page}",
            key.dotted()
        );
    }
    assert!(page.contains("no [[tenants]]"), "{page}");
}

#[test]
fn tenant_quota_keys_win_over_the_default_key_by_key() {
    let text = format!(
        "[quota]\nrequests_per_second = 20\ntokens_per_minute = 90_000\n\
         [[tenants]]\nname = \"ridgeline-north\"\nkeys = [\"{NORTH_KEY}\"]\n\
         requests_per_second = 0.5\nconcurrent_requests = 3\n\
         [[tenants]]\nname = \"ridgeline-south\"\nkeys = [\"{SOUTH_KEY}\"]\n"
    );
    let s = load_text(&text, &[]).unwrap();
    let default = Quota {
        requests_per_second: Some(20.0),
        concurrent_requests: None,
        tokens_per_minute: Some(90_000),
    };
    assert_eq!(s.quota, default);
    // North sets its rate and concurrency and keeps the default's tokens per minute.
    assert_eq!(
        s.tenants[0].quota,
        Quota {
            requests_per_second: Some(0.5),
            concurrent_requests: Some(3),
            tokens_per_minute: Some(90_000),
        }
    );
    // South sets nothing: the default entire.
    assert_eq!(s.tenants[1].quota, default);
    // Without [quota], a tenant without limits has none.
    let s = load_text(&two_tenants(), &[]).unwrap();
    assert!(s.tenants.iter().all(|t| t.quota.is_unlimited()));
}

#[test]
fn quota_values_are_refused_naming_the_field_and_the_value() {
    let tenant =
        |line: &str| format!("[[tenants]]\nname = \"north\"\nkeys = [\"{NORTH_KEY}\"]\n{line}\n");
    let cases = [
        (
            tenant("requests_per_second = 0"),
            "`tenants[0].requests_per_second`",
            "\"0\"",
            "must be above 0",
        ),
        (
            tenant("requests_per_second = -2.5"),
            "`tenants[0].requests_per_second`",
            "\"-2.5\"",
            "must be above 0",
        ),
        (
            tenant("requests_per_second = nan"),
            "`tenants[0].requests_per_second`",
            "\"nan\"",
            "must be above 0",
        ),
        (
            tenant("requests_per_second = 2000000"),
            "`tenants[0].requests_per_second`",
            "\"2000000\"",
            "at most 1000000",
        ),
        (
            tenant("requests_per_second = \"fast\""),
            "`tenants[0].requests_per_second`",
            "\"fast\"",
            "expected a number, found a string",
        ),
        (
            tenant("concurrent_requests = 0"),
            "`tenants[0].concurrent_requests`",
            "\"0\"",
            "between 1 and 1000000",
        ),
        (
            tenant("concurrent_requests = 1.5"),
            "`tenants[0].concurrent_requests`",
            "\"1.5\"",
            "expected a whole number, found a float",
        ),
        (
            tenant("tokens_per_minute = 0"),
            "`tenants[0].tokens_per_minute`",
            "\"0\"",
            "between 1 and 1000000000000",
        ),
        (
            "[quota]\ntokens_per_minute = -1\n".to_owned(),
            "`quota.tokens_per_minute`",
            "\"-1\"",
            "between 1 and",
        ),
        (
            "[quota]\nconcurrent_requests = true\n".to_owned(),
            "`quota.concurrent_requests`",
            "\"true\"",
            "expected a whole number, found a boolean",
        ),
    ];
    for (text, key, value, rule) in cases {
        let err = refusal(&text, &[]);
        assert!(
            err.contains(key) && err.contains(value) && err.contains(rule),
            "{text}: {err}"
        );
    }
    let err = refusal("", &[("SWITCHYARD_QUOTA_REQUESTS_PER_SECOND", "0")]);
    assert!(
        err.contains("`quota.requests_per_second (SWITCHYARD_QUOTA_REQUESTS_PER_SECOND)`"),
        "{err}"
    );
    let err = refusal("[quota]\nrequests_per_minute = 3\n", &[]);
    assert!(
        err.contains("unknown key `quota.requests_per_minute`")
            && err.contains("requests_per_second"),
        "{err}"
    );
}

#[test]
fn rendered_quotas_load_back_unchanged() {
    let text = format!(
        "[quota]\nconcurrent_requests = 8\n\
         [[tenants]]\nname = \"ridgeline-north\"\nkeys = [\"{NORTH_KEY}\"]\n\
         requests_per_second = 12.5\ntokens_per_minute = 6000\n"
    );
    let s = load_text(&text, &[]).unwrap();
    let page = s.render_effective();
    assert!(
        page.contains("[quota]\n# requests_per_second is not set"),
        "{page}"
    );
    assert!(page.contains("\nconcurrent_requests = 8\n"), "{page}");
    assert!(
        page.contains(
            "requests_per_second = 12.5\nconcurrent_requests = 8\ntokens_per_minute = 6000\n"
        ),
        "{page}"
    );
    // The keys are redacted in the page; put the real one back to load it.
    let page = page.replace("\"<redacted, 20 chars>\"", &format!("\"{NORTH_KEY}\""));
    assert_eq!(load_text(&page, &[]).unwrap(), s, "{page}");
}

/// Found by the config fuzz target: a store folder whose name held a control character (here a
/// NUL, from `SWITCHYARD_STORE_DIR`) went raw into the rendered comment naming the experiment
/// database, so `config check` printed text that is not TOML.
#[test]
fn store_dir_with_a_control_character_broke_the_rendered_comment() {
    let s = load_text(
        "[model]\ndir = \"models/m\"\n",
        &[("SWITCHYARD_STORE_DIR", "store dir/\u{0}\u{7}x")],
    )
    .unwrap();
    let page = s.render_effective();
    let table: toml::Table = page
        .parse()
        .unwrap_or_else(|e| panic!("the rendered settings are TOML: {e}\n{page}"));
    assert_eq!(
        table["store"]["dir"].as_str(),
        Some("store dir/\u{0}\u{7}x"),
        "{page}"
    );
    assert!(
        page.contains("experiments are kept in \"store dir/"),
        "{page}"
    );
}

/// Found by the config fuzz target: a file with an empty key (`"" = 30`) was refused as
/// "unknown key ``", naming no key at all.
#[test]
fn empty_key_was_refused_without_naming_it() {
    let err = refusal("\"\" = 30\n", &[]);
    assert!(err.contains("`\"\"`"), "{err}");
    let err = refusal("[engine]\n\"\" = 30\n", &[]);
    assert!(err.contains("`engine.\"\"`"), "{err}");
}

#[test]
fn object_store_keys_need_a_bucket_and_keep_the_secret_out_of_sight() {
    let err = refusal(
        "[store]\ndir = \"cache\"\nendpoint = \"http://127.0.0.1:9000\"\n",
        &[],
    );
    assert!(
        err.contains("store.bucket") && err.contains("store.endpoint"),
        "{err}"
    );
    let err = refusal(
        "[store]\nbucket = \"b\"\nendpoint = \"127.0.0.1:9000\"\n",
        &[],
    );
    assert!(
        err.contains("store.endpoint") && err.contains("http://"),
        "{err}"
    );
    let s = load_text(
        "[store]\ndir = \"cache\"\nbucket = \"adapters\"\n",
        &[("SWITCHYARD_STORE_SECRET_ACCESS_KEY", "very-secret-value-42")],
    )
    .unwrap();
    let o = s.object_store.as_ref().unwrap();
    assert_eq!(o.region, DEFAULT_STORE_REGION);
    assert_eq!(o.prefix, "");
    assert_eq!(s.store_cache_bytes, 4 << 30, "the default cache budget");
    let page = s.render_effective();
    let debug = format!("{s:?}");
    for shown in [&page, &debug] {
        assert!(!shown.contains("very-secret-value-42"), "{shown}");
        assert!(shown.contains("<redacted, 20 chars>"), "{shown}");
    }
}
