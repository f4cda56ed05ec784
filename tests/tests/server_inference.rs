//! The inference endpoints of the real `switchyard serve`, checked against the reference
//! fixtures: sentence-transformers embeddings of the base model and two adapters, and
//! transformers' greedy tokens of the tiny Llama decoder (tests/reference/generate.py).

use serde_json::json;
use switchyard_tests::embeddings::{EmbeddingReference, assert_embeddings_close};
use switchyard_tests::fixtures;
use switchyard_tests::read_json;
use switchyard_tests::server::{Auth, ServerSetup};

#[test]
fn embed_with_base_and_two_uploaded_adapters_equals_the_reference_embeddings() {
    let reference = EmbeddingReference::load();
    let server = ServerSetup::encoder().start();
    let texts = reference.texts();

    let base = server.embed(json!({"adapter": "base"}), &texts).ok_json();
    assert_eq!(base["served_by"], "base");
    assert_eq!(base["split"], serde_json::Value::Null);
    assert!(base["id"].as_str().is_some_and(|id| !id.is_empty()));
    assert_embeddings_close(&base["embeddings"], reference.base(), "base");

    for fixture in ["minilm-qv-a", "minilm-qv-b"] {
        let version = server.publish(fixture, &fixtures().join(format!("{fixture}.safetensors")));
        let answer = server.embed(json!({"adapter": fixture}), &texts).ok_json();
        assert_eq!(answer["served_by"], format!("{fixture}@{version}"));
        for key in ["queue", "swap", "total"] {
            assert!(
                answer["elapsed_ms"][key].is_number(),
                "elapsed_ms.{key}: {answer}"
            );
        }
        assert_embeddings_close(&answer["embeddings"], reference.adapter(fixture), fixture);
    }
}

/// The tiny decoder's reference: its prompt, and the 16 tokens transformers picks greedily (the
/// model's eos id is 1, and that path never reaches it).
struct GreedyReference {
    prompt: String,
    prompt_tokens: usize,
    greedy: Vec<u64>,
    text: String,
}

fn greedy_reference() -> GreedyReference {
    let fx = read_json(&fixtures().join("tiny-llama-reference.json"));
    let ids = |v: &serde_json::Value| -> Vec<u64> {
        v.as_array()
            .unwrap()
            .iter()
            .map(|t| t.as_u64().unwrap())
            .collect()
    };
    let greedy = ids(&fx["greedy"]);
    assert_eq!(greedy.len(), 16);
    assert!(!greedy.contains(&1), "the reference path reaches eos");
    GreedyReference {
        prompt: fx["prompt"].as_str().unwrap().to_owned(),
        prompt_tokens: ids(&fx["prompt_ids"]).len(),
        greedy,
        text: fx["greedy_text"].as_str().unwrap().to_owned(),
    }
}

#[test]
fn generate_stream_from_the_tiny_decoder_sends_the_reference_greedy_tokens() {
    let reference = greedy_reference();
    let server = ServerSetup::tiny_decoder().start();
    let events = server.post_sse(
        "/generate",
        Auth::None,
        &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 16, "stream": true}),
    );
    let (done, tokens) = events.split_last().expect("at least the done event");
    assert!(
        tokens.iter().all(|e| e.event == "token"),
        "only token events before the last: {events:?}"
    );
    let ids: Vec<u64> = tokens
        .iter()
        .map(|e| e.data["token_id"].as_u64().unwrap())
        .collect();
    assert_eq!(ids, reference.greedy);
    let text: String = tokens
        .iter()
        .map(|e| e.data["text"].as_str().unwrap())
        .collect();
    assert_eq!(text, reference.text, "the token texts join to the decoding");

    assert_eq!(done.event, "done", "{done:?}");
    assert_eq!(
        done.data["counts"],
        json!({"prompt_tokens": reference.prompt_tokens, "output_tokens": 16})
    );
    assert_eq!(done.data["finish"], "limit");
    assert_eq!(done.data["served_by"], "base");
    assert!(
        done.data["elapsed_ms"]["first_token"].is_number(),
        "{done:?}"
    );
}

#[test]
fn generate_json_answer_from_the_tiny_decoder_carries_the_reference_greedy_tokens() {
    let reference = greedy_reference();
    let server = ServerSetup::tiny_decoder().start();
    let answer = server
        .post(
            "/generate",
            Auth::None,
            &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 16}),
        )
        .ok_json();
    assert_eq!(answer["token_ids"], json!(reference.greedy));
    assert_eq!(answer["text"], reference.text);
    assert_eq!(answer["finish"], "limit");
    assert_eq!(
        answer["counts"],
        json!({"prompt_tokens": reference.prompt_tokens, "output_tokens": 16})
    );
}
