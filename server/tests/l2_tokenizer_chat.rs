//! The chat module and tokenizer against transformers on a real vocabulary: the 32,000-token
//! Llama-2 tokenizer that scripts/fetch-tokenizer.sh fetches (byte fallback, a prepended "▁",
//! special tokens inside the text), with an [INST]-style template of our own in
//! tokenizer_config.json. tests/reference/l2_chat.py wrote fixtures/l2-tokenizer-chat.json with
//! transformers' `apply_chat_template(add_generation_prompt=True)`: the rendered text, its token
//! ids, and the template's own words for conversations it refuses. switchyard must render the
//! same text and tokenise it to the same ids (without added special tokens, as a chat prompt
//! is), and refuse the same conversations with the same words.

use serde_json::Value;
use switchyard_server::model::chat::{ChatMessage, ChatTemplate};
use switchyard_server::model::checkpoint::load_tokenizer;
use switchyard_tests::{fixtures, l2_tokenizer, read_json};

/// The fixture, and the template loaded the way a checkpoint's is: from a folder holding the
/// fixture's tokenizer_config.json.
fn fixture_and_template() -> (Value, ChatTemplate) {
    let fx = read_json(&fixtures().join("l2-tokenizer-chat.json"));
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("tokenizer_config.json"),
        serde_json::to_string(&fx["tokenizer_config"]).unwrap(),
    )
    .unwrap();
    let template = ChatTemplate::load(dir.path())
        .unwrap()
        .expect("the fixture's tokenizer_config.json has a chat template");
    (fx, template)
}

fn messages(v: &Value) -> Vec<ChatMessage> {
    serde_json::from_value(v.clone()).unwrap()
}

#[test]
fn conversations_render_and_tokenise_as_transformers_does_with_the_l2_tokenizer() {
    let tokenizer = load_tokenizer(&l2_tokenizer()).unwrap();
    assert_eq!(tokenizer.get_vocab_size(true), 32000);
    let (fx, template) = fixture_and_template();
    let cases = fx["cases"].as_array().unwrap();
    assert_eq!(cases.len(), 4);
    for (i, case) in cases.iter().enumerate() {
        let rendered = template.render(&messages(&case["messages"])).unwrap();
        assert_eq!(
            rendered,
            case["rendered"].as_str().unwrap(),
            "case {i}: text"
        );
        let ids = tokenizer.encode(rendered.as_str(), false).unwrap();
        let want: Vec<u32> = serde_json::from_value(case["prompt_ids"].clone()).unwrap();
        assert_eq!(ids.get_ids(), want.as_slice(), "case {i}: token ids");
    }
}

#[test]
fn conversations_the_template_refuses_are_refused_in_its_own_words() {
    let (fx, template) = fixture_and_template();
    let refusals = fx["refusals"].as_array().unwrap();
    assert_eq!(refusals.len(), 4);
    for r in refusals {
        let err = template.render(&messages(&r["messages"])).unwrap_err();
        assert_eq!(
            err,
            format!(
                "the chat template refused the messages: {}",
                r["message"].as_str().unwrap()
            )
        );
    }
}
