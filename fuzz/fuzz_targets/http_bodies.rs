//! The JSON bodies of the HTTP API, through the code the handlers run: the body extractor
//! (`ApiJson`, axum's JSON reader with our refusals) and then each endpoint's own checks on the
//! body (`EmbedBody::check`, `GenerateBody::check`, `record_outcome`, `split_from_body`). An input
//! is the endpoint's path on the first line (`/embed`, `/classify`, `/generate`, `/outcomes`,
//! `/admin/splits/NAME`) and the body after it (seeds: `fuzz/seeds/http_bodies`; dictionary:
//! `fuzz/dicts/http_bodies.dict`). The limits are the defaults of `switchyard serve`.
//!
//! Properties, beyond "no panic, no overflow, no unbounded allocation":
//! - a refused body is a 400 or a 413 with one of the endpoint's documented codes;
//! - a body that passes has its fields in range: 1 to `texts_per_request` texts, each at most
//!   `text_bytes`; `max_tokens` 1 to `generated_tokens` (64 or the bound when absent), a prompt
//!   or (exclusively) messages of at most `text_bytes`, temperature finite in [0, 100], top-p
//!   finite in (0, 1]; an outcome lands in exactly one tally, a number finite, and a refused one
//!   in none;
//! - a split that passes has a valid name, 1 to 16 arms with unique valid names, finite weights
//!   at least 0 with a finite sum and one positive, versions only on adapters; the definition
//!   the handler answers with reads back through the body path to the same split, the
//!   definition it writes to the experiment store (SQLite, as `switchyard serve` opens it) reads
//!   back from the store to the same split, and a subject is never assigned to an arm of
//!   weight 0.
//!
//! The experiment database is a file of this process under `/dev/shm` (or the temporary
//! folder), emptied of the split after each input; a leftover file of the same process id is
//! removed when the target starts, and `scripts/fuzz` removes them after each run.
#![no_main]

use std::sync::OnceLock;

use axum::body::Body;
use axum::extract::FromRequest;
use axum::http::{Request, StatusCode, header};
use libfuzzer_sys::fuzz_target;
use serde_json::{Value, json};
use switchyard_config::Settings;
use switchyard_server::experiments::{ExperimentStore, SqliteStore};
use switchyard_server::http::Bounds;
use switchyard_server::http::error::ApiError;
use switchyard_server::http::extract::ApiJson;
use switchyard_server::http::inference::{EmbedBody, GenerateBody};
use switchyard_server::http::splits::{OutcomeBody, SplitBody, record_outcome, split_from_body};
use switchyard_server::splits::{BinaryTally, MAX_ARMS, NumericTally, check_name};

use switchyard_fuzz as _;

fn runtime() -> &'static tokio::runtime::Runtime {
    static RT: OnceLock<tokio::runtime::Runtime> = OnceLock::new();
    RT.get_or_init(|| {
        tokio::runtime::Builder::new_current_thread()
            .build()
            .expect("a current-thread runtime")
    })
}

/// The experiment store splits are written to, opened once per process.
fn experiments() -> &'static SqliteStore {
    static STORE: OnceLock<SqliteStore> = OnceLock::new();
    STORE.get_or_init(|| {
        let dir = std::path::Path::new("/dev/shm");
        let dir = if dir.is_dir() {
            dir.to_owned()
        } else {
            std::env::temp_dir()
        };
        let path = dir.join(format!(
            "switchyard-fuzz-experiments-{}.sqlite",
            std::process::id()
        ));
        for suffix in ["", "-wal", "-shm"] {
            let _ = std::fs::remove_file(format!("{}{suffix}", path.display()));
        }
        SqliteStore::open(&path).expect("the experiment database opens")
    })
}

/// The bounds `switchyard serve` runs with under the default settings.
fn limits() -> Bounds {
    let s = Settings::default();
    Bounds {
        inference_body_bytes: s.inference_body_bytes,
        upload_body_bytes: s.upload_body_bytes,
        text_bytes: s.text_bytes,
        prompt_tokens: s.prompt_tokens,
        generated_tokens: s.generated_tokens,
        texts_per_request: s.texts_per_request,
        timeout: std::time::Duration::from_millis(s.request_timeout_ms),
    }
}

/// The body through the extractor the handler declares.
fn extract<T: serde::de::DeserializeOwned>(path: &str, body: &[u8]) -> Result<T, ApiError> {
    let request = Request::builder()
        .method("POST")
        .uri(path)
        .header(header::CONTENT_TYPE, "application/json")
        .body(Body::from(body.to_vec()))
        .expect("a request");
    runtime()
        .block_on(ApiJson::<T>::from_request(request, &()))
        .map(|ApiJson(v)| v)
}

fn refused(e: &ApiError, codes: &[&str]) {
    assert!(
        matches!(
            e.status,
            StatusCode::BAD_REQUEST | StatusCode::PAYLOAD_TOO_LARGE
        ),
        "{e:?}"
    );
    assert!(codes.contains(&e.code), "{e:?}");
    assert!(!e.message.is_empty());
}

const JSON_CODES: &[&str] = &["malformed_json", "invalid_field", "body_too_large"];

fn embed(body: &[u8], limits: &Bounds) {
    let body: EmbedBody = match extract("/embed", body) {
        Ok(b) => b,
        Err(e) => return refused(&e, JSON_CODES),
    };
    match body.check(limits) {
        Ok(()) => {
            assert!((1..=limits.texts_per_request).contains(&body.texts.len()));
            assert!(body.texts.iter().all(|t| t.len() <= limits.text_bytes));
        }
        Err(e) => refused(&e, &["no_texts", "too_many_texts", "text_too_large"]),
    }
}

fn generate(body: &[u8], limits: &Bounds) {
    let body: GenerateBody = match extract("/generate", body) {
        Ok(b) => b,
        Err(e) => return refused(&e, JSON_CODES),
    };
    match body.check(limits) {
        Ok((max_tokens, sampling)) => {
            assert!((1..=limits.generated_tokens).contains(&max_tokens));
            if body.max_tokens.is_none() {
                assert_eq!(max_tokens, 64.min(limits.generated_tokens));
            }
            // Exactly one of prompt and messages, within the byte bound.
            match (&body.prompt, &body.messages) {
                (Some(p), None) => assert!(p.len() <= limits.text_bytes),
                (None, Some(m)) => {
                    assert!(!m.is_empty());
                    let bytes: usize = m.iter().map(|m| m.role.len() + m.content.len()).sum();
                    assert!(bytes <= limits.text_bytes);
                }
                other => panic!("passed with prompt and messages {other:?}"),
            }
            if let Some(t) = sampling.temperature {
                assert!(
                    t.is_finite() && (0.0..=100.0).contains(&t),
                    "temperature {t}"
                );
            }
            let p = sampling.top_p;
            assert!(p.is_finite() && p > 0.0 && p <= 1.0, "top-p {p}");
        }
        Err(e) => refused(
            &e,
            &[
                "invalid_max_tokens",
                "invalid_sampling",
                "text_too_large",
                "invalid_messages",
                "invalid_end_at",
            ],
        ),
    }
}

fn outcome(body: &[u8]) {
    let body: OutcomeBody = match extract("/outcomes", body) {
        Ok(b) => b,
        Err(e) => return refused(&e, JSON_CODES),
    };
    let (mut numeric, mut binary) = (NumericTally::new(), BinaryTally::new());
    match record_outcome(&mut numeric, &mut binary, &body.value) {
        Ok(()) => {
            assert_eq!(numeric.count() + binary.count(), 1, "one tally counts it");
            match &body.value {
                Value::Bool(b) => assert_eq!(binary.successes(), u64::from(*b)),
                Value::Number(n) => {
                    let mean = numeric.mean().expect("counted");
                    assert!(mean.is_finite());
                    assert_eq!(Some(mean), n.as_f64());
                }
                other => panic!("{other} was recorded"),
            }
        }
        Err(e) => {
            refused(&e, &["invalid_outcome"]);
            assert_eq!(
                (numeric.count(), binary.count()),
                (0, 0),
                "a refusal counts nothing"
            );
        }
    }
}

fn put_split(name: &str, body: &[u8]) {
    // The name travels in the path, which the extractor does not read.
    let body: SplitBody = match extract("/admin/splits/name", body) {
        Ok(b) => b,
        Err(e) => return refused(&e, JSON_CODES),
    };
    let split = match split_from_body(name, body) {
        Ok(split) => split,
        Err(e) => return refused(&e, &["invalid_split", "invalid_rollout"]),
    };
    assert_eq!(split.name(), name);
    assert!(check_name("name", name).is_ok() && name != "base");
    let arms = split.arms();
    assert!((1..=MAX_ARMS).contains(&arms.len()));
    for (i, arm) in arms.iter().enumerate() {
        assert!(
            check_name("arm", &arm.name).is_ok() && check_name("adapter", &arm.adapter).is_ok()
        );
        assert!(
            !arms[..i].iter().any(|a| a.name == arm.name),
            "arm names are unique"
        );
        assert!(arm.weight.is_finite() && arm.weight >= 0.0);
        if let Some(share) = arm.shadow {
            assert!(i > 0 && share > 0.0 && share <= 1.0 && arm.weight == 0.0);
            assert!(arm.version.is_some(), "a shadow arm holds a version");
        }
        if let Some(v) = &arm.version {
            assert!(arm.adapter != "base");
            assert_eq!(v.len(), 16, "a version is 16 hex digits");
            assert!(
                v.bytes()
                    .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
            );
        }
    }
    assert!(arms.iter().any(|a| a.weight > 0.0));
    assert!(arms.iter().map(|a| a.weight).sum::<f64>().is_finite());

    // What the handler answers with, sent again as a body: the same split.
    let answered = serde_json::to_value(split.spec()).expect("a spec serialises");
    let resent = serde_json::to_vec(&json!({"arms": answered["arms"]})).expect("serialises");
    let again = extract::<SplitBody>("/admin/splits/name", &resent)
        .and_then(|body| split_from_body(name, body))
        .unwrap_or_else(|e| panic!("the answered definition is accepted again: {e:?}"));
    assert_eq!(again, split);

    // What the handler writes to the experiment store, read back from it: the same split.
    let store = experiments();
    let put = store
        .put_split(split.spec(), None, 0)
        .unwrap_or_else(|e| panic!("a valid split is written: {e}"));
    assert_eq!(put.record.split().as_ref(), Ok(&split), "as written");
    let stored = store
        .split(name)
        .expect("the store reads")
        .expect("the split is stored");
    let reread = stored
        .record()
        .split()
        .unwrap_or_else(|e| panic!("a stored split is valid: {e}"));
    assert_eq!(reread, split, "as read back from the store");
    assert!(store.delete_split(name).expect("the store deletes"));

    for subject in ["", "rider-1", "rider-2", name] {
        let a = split.assign_subject(subject);
        assert!(
            a.arm.weight > 0.0,
            "subject {subject:?} got arm {} of weight 0",
            a.index
        );
        assert_eq!(a.index, split.assign_subject(subject).index, "sticky");
    }
}

fuzz_target!(|data: &[u8]| {
    let (path, body) = match data.iter().position(|&b| b == b'\n') {
        Some(i) => (&data[..i], &data[i + 1..]),
        None => return,
    };
    let Ok(path) = std::str::from_utf8(path) else {
        return;
    };
    let limits = limits();
    match path {
        "/embed" | "/classify" => embed(body, &limits),
        "/generate" => generate(body, &limits),
        "/outcomes" => outcome(body),
        _ => {
            if let Some(name) = path.strip_prefix("/admin/splits/") {
                put_split(name, body);
            }
        }
    }
});
