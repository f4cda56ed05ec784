//! Each class of bad input gets its own status and error code, and leaves the server answering
//! the next normal request correctly (its embedding is still the sentence-transformers
//! reference).

use serde_json::json;
use switchyard_tests::embeddings::{EmbeddingReference, assert_embeddings_close};
use switchyard_tests::fixtures;
use switchyard_tests::server::{Auth, Reply, Server, ServerSetup};

/// Small enough that a test can exceed it cheaply, large enough for the tiny packages below.
const MAX_BODY_BYTES: usize = 16 * 1024;
/// Above every reference sentence (at most 26 tokens), below the long text below.
const MAX_INPUT_TOKENS: usize = 40;

fn small_limits() -> Server {
    ServerSetup::encoder()
        .set(
            "bounds",
            "inference_body_bytes",
            &MAX_BODY_BYTES.to_string(),
        )
        .set("bounds", "upload_body_bytes", &MAX_BODY_BYTES.to_string())
        .set("bounds", "prompt_tokens", &MAX_INPUT_TOKENS.to_string())
        .start()
}

/// Sends `bad`, checks its refusal, then checks a normal request still gets the reference.
fn refused_then_served(
    server: &Server,
    reference: &EmbeddingReference,
    what: &str,
    bad: Reply,
    status: u16,
    code: &str,
) {
    assert_eq!(
        (bad.status, bad.error_code().as_str()),
        (status, code),
        "{what}: {}",
        bad.body
    );
    let message = &bad.json()["error"]["message"];
    assert!(
        message.as_str().is_some_and(|m| !m.is_empty()),
        "{what}: a message says why: {}",
        bad.body
    );
    let texts = &reference.texts()[..2];
    let good = server.embed(json!({"adapter": "base"}), texts).ok_json();
    assert_embeddings_close(
        &good["embeddings"],
        &reference.base()[..2],
        &format!("the request after {what}"),
    );
}

fn post_raw(server: &Server, path: &str, content_type: &str, body: &[u8]) -> Reply {
    server.request("POST", path, Auth::None, Some((content_type, body)))
}

#[test]
fn malformed_json_is_400_malformed_json_and_the_server_then_answers_normally() {
    let reference = EmbeddingReference::load();
    let server = small_limits();
    for (what, content_type, body) in [
        (
            "a body cut short",
            "application/json",
            &b"{\"adapter\": \"base\", \"texts\": [\"a"[..],
        ),
        ("a body that is not JSON", "application/json", b"texts=a"),
        ("an empty body", "application/json", b""),
        (
            "JSON without its content type",
            "text/plain",
            br#"{"adapter": "base", "texts": ["a"]}"#,
        ),
    ] {
        let bad = post_raw(&server, "/embed", content_type, body);
        refused_then_served(&server, &reference, what, bad, 400, "malformed_json");
    }
}

#[test]
fn a_field_of_the_wrong_type_is_400_invalid_field_named_in_plain_words() {
    let reference = EmbeddingReference::load();
    let server = small_limits();
    for (what, body, says) in [
        (
            "texts as text",
            &br#"{"adapter": "base", "texts": "a"}"#[..],
            "field `texts`: expected a list, found the text \"a\"",
        ),
        (
            "an unknown field",
            br#"{"adapter": "base", "texts": ["a"], "txets": 1}"#,
            "`txets` is not a field of this request",
        ),
        (
            "a missing field",
            br#"{"adapter": "base"}"#,
            "field `texts` is missing",
        ),
    ] {
        let bad = post_raw(&server, "/embed", "application/json", body);
        let message = bad.json()["error"]["message"]
            .as_str()
            .unwrap_or_default()
            .to_owned();
        assert!(message.contains(says), "{what}: {message}");
        assert!(
            !message.contains("usize") && !message.contains("alloc::"),
            "{what}: no Rust type names: {message}"
        );
        refused_then_served(&server, &reference, what, bad, 400, "invalid_field");
    }
}

#[test]
fn unknown_adapter_is_404_unknown_target_and_unknown_split_404_unknown_split() {
    let reference = EmbeddingReference::load();
    let server = small_limits();
    let bad = server.embed(json!({"adapter": "north-nowhere"}), &["a"]);
    refused_then_served(
        &server,
        &reference,
        "an unknown adapter",
        bad,
        404,
        "unknown_target",
    );
    let bad = server.embed(json!({"split": "nowhere-rollout"}), &["a"]);
    refused_then_served(
        &server,
        &reference,
        "an unknown split",
        bad,
        404,
        "unknown_split",
    );
}

#[test]
fn oversized_body_is_413_body_too_large_and_the_server_then_answers_normally() {
    let reference = EmbeddingReference::load();
    let server = small_limits();
    let long = "spoke ".repeat(MAX_BODY_BYTES / 6 + 100);
    let bad = server.embed(json!({"adapter": "base"}), &[long.as_str()]);
    refused_then_served(
        &server,
        &reference,
        "an oversized embed body",
        bad,
        413,
        "body_too_large",
    );
    let package = vec![0u8; MAX_BODY_BYTES + 1024];
    let bad = server.upload("north-routing", &package);
    refused_then_served(
        &server,
        &reference,
        "an oversized upload",
        bad,
        413,
        "body_too_large",
    );
}

#[test]
fn text_over_the_token_limit_is_413_too_many_tokens_and_the_server_then_answers_normally() {
    let reference = EmbeddingReference::load();
    let server = small_limits();
    let long = "the rear wheel is out of true ".repeat(10);
    let texts = [reference.sentences[0].as_str(), long.as_str()];
    let bad = server.embed(json!({"adapter": "base"}), &texts);
    refused_then_served(
        &server,
        &reference,
        "a text over the token limit",
        bad,
        413,
        "too_many_tokens",
    );
}

#[test]
fn invalid_package_upload_is_422_invalid_package_and_the_server_then_answers_normally() {
    let reference = EmbeddingReference::load();
    let server = small_limits();
    let good = std::fs::read(fixtures().join("minilm-qv-b.safetensors")).unwrap();
    let bad = server.upload("north-routing", &good[..4096]);
    refused_then_served(
        &server,
        &reference,
        "a truncated package",
        bad,
        422,
        "invalid_package",
    );
    let foreign = std::fs::read(fixtures().join("tiny-llama-qv.safetensors")).unwrap();
    assert!(foreign.len() < MAX_BODY_BYTES);
    let bad = server.upload("north-routing", &foreign);
    refused_then_served(
        &server,
        &reference,
        "a package for another base",
        bad,
        422,
        "invalid_package",
    );
    let bad = server.upload("north-routing", b"not a safetensors file at all");
    refused_then_served(
        &server,
        &reference,
        "a file that is not a package",
        bad,
        422,
        "invalid_package",
    );
    // Nothing of those uploads reached the store.
    let bad = server.embed(json!({"adapter": "north-routing"}), &["a"]);
    refused_then_served(
        &server,
        &reference,
        "using the refused adapter",
        bad,
        404,
        "unknown_target",
    );
}
