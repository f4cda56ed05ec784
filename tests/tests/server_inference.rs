//! The inference endpoints of the real `switchyard serve`, checked against the reference
//! fixtures: sentence-transformers embeddings of the base model and two adapters, and
//! transformers' greedy tokens of the tiny Llama decoder (tests/reference/generate.py).

use serde_json::json;
use switchyard_tests::embeddings::{EmbeddingReference, assert_embeddings_close, cosine, rows};
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

/// A merged variant is built off the engine thread: the request that finds its adapter
/// promoted (a full window of 8 rows, all its own) is answered unmerged at once, a thread builds
/// the variant, and later answers run merged. Merged or not, the embeddings equal
/// sentence-transformers' for that adapter (minilm-embeddings.json).
#[test]
fn a_promoted_adapter_is_merged_off_the_engine_thread_and_answers_the_same() {
    let reference = EmbeddingReference::load();
    let server = ServerSetup::encoder()
        .set("residency", "promote_window_rows", "8")
        .start();
    let texts = reference.texts();
    let rows = texts.len();
    assert!(rows >= 4, "two requests fill the 8-row window");
    let fixture = "minilm-qv-a";
    server.publish(fixture, &fixtures().join(format!("{fixture}.safetensors")));
    let mut merged_at = None;
    for i in 0..40 {
        let answer = server.embed(json!({"adapter": fixture}), &texts).ok_json();
        assert_embeddings_close(&answer["embeddings"], reference.adapter(fixture), fixture);
        let merged = answer["merged"].as_bool().unwrap();
        if i * rows < 8 || i == 8usize.div_ceil(rows) {
            // Before the window is full, and the request that first finds it promoted.
            assert!(!merged, "request {i} waited for a merge: {answer}");
        }
        if merged {
            merged_at = Some(i);
            break;
        }
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
    assert!(merged_at.is_some(), "never merged:\n{}", server.log());
    assert!(
        server.log().contains("merged variant built"),
        "{}",
        server.log()
    );
}

/// `model.weights = "int8"` in the config: the server holds the base model in int8 (converted
/// at load from the checkpoint's f32), its embeddings stay within the int8 bar (cosine >= 0.995)
/// of the sentence-transformers f32 reference (minilm-embeddings.json), and the start-up log,
/// `/admin/adapters` and `/metrics` name the format and the kernel path this CPU runs.
#[test]
fn a_server_with_int8_weights_embeds_close_to_the_reference_and_names_its_format() {
    let reference = EmbeddingReference::load();
    let server = ServerSetup::encoder()
        .set("model", "weights", "\"int8\"")
        .start();
    let texts = reference.texts();
    let base = server.embed(json!({"adapter": "base"}), &texts).ok_json();
    let got = rows(&base["embeddings"]);
    assert_eq!(got.len(), reference.base().len());
    for (i, (g, w)) in got.iter().zip(reference.base()).enumerate() {
        let c = cosine(g, w);
        assert!(c >= 0.995, "int8 server, sentence {i}: cosine {c} < 0.995");
    }

    let kernels = switchyard_kernels::Path::best().name();
    let listing = server.get("/admin/adapters", Auth::Admin).ok_json();
    assert_eq!(listing["base"]["weights"], "int8", "{listing}");
    assert_eq!(listing["base"]["kernels"], kernels, "{listing}");
    assert!(listing["base"]["library"].is_null(), "{listing}");
    // MiniLM holds 90.3 MB of f32 weights; in int8 about a quarter of that.
    let bytes = listing["base"]["weight_bytes"].as_u64().unwrap();
    assert!((15_000_000..40_000_000).contains(&bytes), "{listing}");

    let page = server.get("/metrics", Auth::Admin);
    assert_eq!(page.status, 200);
    // int8 products never go to oneDNN, so the library is `none` whatever this machine has.
    let info = format!(
        "switchyard_base_weights_info{{weights=\"int8\",kernels=\"{kernels}\",library=\"none\"}} 1"
    );
    assert!(page.body.contains(&info), "no {info} in\n{}", page.body);
    assert!(
        page.body
            .contains(&format!("switchyard_base_weight_bytes {bytes}")),
        "{}",
        page.body
    );

    let log = server.log();
    assert!(
        log.contains("base model loaded")
            && log.contains("weights=int8")
            && log.contains(&format!("kernels={kernels}")),
        "{log}"
    );
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
        json!({"prompt_tokens": reference.prompt_tokens, "reused_prompt_tokens": 0, "output_tokens": 16})
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
        json!({"prompt_tokens": reference.prompt_tokens, "reused_prompt_tokens": 0, "output_tokens": 16})
    );
}

/// `end_at.texts`: the generation ends where an end text first appears in transformers' greedy
/// output (tests/reference/generate.py), the end text and everything after it are never sent,
/// and an end text that never completes holds nothing back for good.
#[test]
fn generate_ends_at_an_end_text_without_sending_it() {
    let reference = greedy_reference();
    let server = ServerSetup::tiny_decoder().start();
    let ask = |end_at: serde_json::Value, stream: bool| {
        json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 16,
               "end_at": end_at, "stream": stream})
    };
    // "mechanic" is a word of the reference output; "ust mech" spans more than one token.
    for end in ["mechanic", "ust mech"] {
        let at = reference.text.find(end).expect("in the reference text");
        let before = &reference.text[..at];

        let answer = server
            .post(
                "/generate",
                Auth::None,
                &ask(json!({"texts": ["zzz", end]}), false),
            )
            .ok_json();
        assert_eq!(answer["text"], before, "{answer}");
        assert_eq!(answer["finish"], "end_text");
        assert_eq!(answer["ended_by"], end);
        let ids = answer["token_ids"].as_array().unwrap();
        assert!(ids.len() < 16, "{answer}");
        assert_eq!(
            ids[..],
            json!(reference.greedy[..ids.len()]).as_array().unwrap()[..]
        );
        assert_eq!(answer["counts"]["output_tokens"], ids.len());

        let events = server.post_sse("/generate", Auth::None, &ask(json!({"texts": [end]}), true));
        let (done, tokens) = events.split_last().unwrap();
        let sent: String = tokens
            .iter()
            .map(|e| e.data["text"].as_str().unwrap())
            .collect();
        assert_eq!(sent, before, "what was streamed: {events:?}");
        assert_eq!(done.event, "done");
        assert_eq!(
            (done.data["finish"].as_str(), done.data["tail"].as_str()),
            (Some("end_text"), Some(""))
        );
        assert_eq!(done.data["ended_by"], end);
    }

    // "mechanics" begins where "mechanic" is but never completes: the held-back text goes out
    // and the whole reference text arrives (streamed pieces plus the closing tail).
    let events = server.post_sse(
        "/generate",
        Auth::None,
        &ask(json!({"texts": ["mechanics"]}), true),
    );
    let (done, tokens) = events.split_last().unwrap();
    let mut sent: String = tokens
        .iter()
        .map(|e| e.data["text"].as_str().unwrap())
        .collect();
    sent.push_str(done.data["tail"].as_str().unwrap());
    assert_eq!(sent, reference.text);
    assert_eq!(done.data["finish"], "limit");
    assert!(done.data["ended_by"].is_null(), "{done:?}");
}

/// `end_at.token_ids`: sampling a listed token ends the generation; the token is not part of
/// the output, which equals the same request cut by `max_tokens` just before it.
#[test]
fn generate_ends_at_an_end_token_and_refuses_bad_end_at_values() {
    let reference = greedy_reference();
    let server = ServerSetup::tiny_decoder().start();
    let end_token = reference.greedy[7];
    let first = reference
        .greedy
        .iter()
        .position(|&t| t == end_token)
        .unwrap();
    let answer = server
        .post(
            "/generate",
            Auth::None,
            &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 16,
                    "end_at": {"token_ids": [end_token]}}),
        )
        .ok_json();
    let cut = server
        .post(
            "/generate",
            Auth::None,
            &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": first}),
        )
        .ok_json();
    assert_eq!(answer["token_ids"], json!(reference.greedy[..first]));
    assert_eq!(answer["text"], cut["text"]);
    assert_eq!(answer["finish"], "end_token");
    assert_eq!(answer["ended_by"], end_token);
    assert_eq!(answer["counts"]["output_tokens"], first);

    let bad = |end_at: serde_json::Value| {
        server.post(
            "/generate",
            Auth::None,
            &json!({"adapter": "base", "prompt": reference.prompt, "end_at": end_at}),
        )
    };
    let reply = bad(json!({"texts": ["ok", ""]}));
    reply.assert_error(400, "invalid_end_at");
    assert!(
        reply.body.contains("end_at.texts[1] is 0 bytes"),
        "{}",
        reply.body
    );
    let reply = bad(json!({"token_ids": [3, 4_000_000]}));
    reply.assert_error(400, "invalid_end_at");
    assert!(
        reply.body.contains("end_at.token_ids[1] is 4000000"),
        "{}",
        reply.body
    );
    let reply = bad(json!({"texts": vec!["a"; 9]}));
    reply.assert_error(400, "invalid_end_at");
    let reply = bad(json!({"words": ["a"]}));
    assert_eq!(reply.status, 400, "{}", reply.body);
    assert!(reply.body.contains("words"), "{}", reply.body);
    // The server still answers.
    assert_eq!(
        server
            .post(
                "/generate",
                Auth::None,
                &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 2})
            )
            .ok_json()["finish"],
        "limit"
    );
}

/// A prompt over `bounds.prompt_tokens`, or a prompt plus `max_tokens` over the model's
/// positions (the tiny decoder has 128), is refused with a message that names the limit and
/// by how much it was exceeded; the server then answers normally.
#[test]
fn generate_over_a_token_limit_says_which_limit_and_by_how_much() {
    let reference = greedy_reference();
    let n = reference.prompt_tokens;
    let server = ServerSetup::tiny_decoder()
        .set("bounds", "prompt_tokens", &(n - 3).to_string())
        .start();
    let reply = server.post(
        "/generate",
        Auth::None,
        &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 4}),
    );
    reply.assert_error(413, "too_many_tokens");
    let want = format!(
        "the prompt is {n} tokens, 3 over this server's limit of {} (bounds.prompt_tokens)",
        n - 3
    );
    assert!(reply.body.contains(&want), "{}", reply.body);

    let server = ServerSetup::tiny_decoder().start();
    let max_tokens = 128 - n + 5;
    let reply = server.post(
        "/generate",
        Auth::None,
        &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": max_tokens}),
    );
    reply.assert_error(413, "too_many_tokens");
    let want = format!(
        "plus max_tokens ({max_tokens}) is 133 tokens, 5 over the model's context of 128 positions; lower max_tokens to {} or less",
        128 - n
    );
    assert!(reply.body.contains(&want), "{}", reply.body);
    let ok = server
        .post(
            "/generate",
            Auth::None,
            &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 128 - n}),
        )
        .ok_json();
    assert_eq!(ok["counts"]["output_tokens"], 128 - n);
}

/// The tiny decoder with a chat template in its tokenizer_config.json (the file and the
/// expected renderings from tests/reference/chat.py, run through transformers'
/// `apply_chat_template` and LlamaForCausalLM): `messages` in a generate request are rendered
/// with the generation prompt added, tokenised as transformers does (the same prompt token
/// count) and continued with transformers' greedy tokens; a role the template refuses is a 400
/// with the template's own message; a model without a template refuses messages.
#[test]
fn generate_with_messages_renders_the_checkpoints_chat_template_like_transformers() {
    let fx = read_json(&fixtures().join("tiny-llama-chat.json"));
    let dir = tempfile::tempdir().unwrap();
    let model = dir.path().join("tiny-llama-chat");
    std::fs::create_dir(&model).unwrap();
    for entry in std::fs::read_dir(fixtures().join("tiny-llama")).unwrap() {
        let entry = entry.unwrap();
        std::fs::copy(entry.path(), model.join(entry.file_name())).unwrap();
    }
    std::fs::write(
        model.join("tokenizer_config.json"),
        serde_json::to_string_pretty(&fx["tokenizer_config"]).unwrap(),
    )
    .unwrap();
    let server = ServerSetup::with_model(model).start();
    for case in fx["cases"].as_array().unwrap() {
        let greedy = case["greedy"].as_array().unwrap();
        let answer = server
            .post(
                "/generate",
                Auth::None,
                &json!({"adapter": "base", "messages": case["messages"], "max_tokens": greedy.len()}),
            )
            .ok_json();
        assert_eq!(
            answer["counts"]["prompt_tokens"],
            case["prompt_ids"].as_array().unwrap().len(),
            "rendered by transformers as {}",
            case["rendered"]
        );
        assert_eq!(answer["token_ids"], case["greedy"], "{}", case["rendered"]);
    }

    let reply = server.post(
        "/generate",
        Auth::None,
        &json!({"adapter": "base", "messages": [{"role": "tool", "content": "x"}]}),
    );
    reply.assert_error(400, "invalid_messages");
    assert!(
        reply
            .body
            .contains("roles are system, user and assistant; got tool"),
        "{}",
        reply.body
    );
    assert!(
        fx["refusal_of_role_tool"]
            .as_str()
            .unwrap()
            .contains("roles are system, user and assistant; got tool"),
        "transformers refused with the same words"
    );
    for (body, code) in [
        (
            json!({"adapter": "base", "messages": []}),
            "invalid_messages",
        ),
        (
            json!({"adapter": "base", "prompt": "a", "messages": [{"role": "user", "content": "b"}]}),
            "invalid_messages",
        ),
        (json!({"adapter": "base"}), "invalid_messages"),
        (
            json!({"adapter": "base", "messages": [{"role": "user", "text": "b"}]}),
            "invalid_field",
        ),
    ] {
        server
            .post("/generate", Auth::None, &body)
            .assert_error(400, code);
    }

    let plain = ServerSetup::tiny_decoder().start();
    let reply = plain.post(
        "/generate",
        Auth::None,
        &json!({"adapter": "base", "messages": [{"role": "user", "content": "hello"}]}),
    );
    reply.assert_error(400, "no_chat_template");
    // Both servers still answer.
    for s in [&server, &plain] {
        let ok = s
            .post(
                "/generate",
                Auth::None,
                &json!({"adapter": "base", "prompt": "a wheel", "max_tokens": 2}),
            )
            .ok_json();
        assert_eq!(ok["counts"]["output_tokens"], 2);
    }
}

/// With `engine.step_tokens = 3` a 14-token prompt is prefilled in five chunks, sharing each
/// step with the other generations: four concurrent requests (two streamed) each still get
/// transformers' 16 greedy tokens (tests/reference/generate.py), which holds only if every
/// chunk lands at its positions in its own sequence's cache.
#[test]
fn chunked_and_batched_prefill_keep_the_reference_greedy_tokens() {
    let reference = greedy_reference();
    let server = ServerSetup::tiny_decoder()
        .set("engine", "step_tokens", "3")
        .start();
    let body = |stream: bool| json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 16, "stream": stream});
    std::thread::scope(|scope| {
        let runs: Vec<_> = (0..4)
            .map(|i| {
                let server = &server;
                let body = body(i % 2 == 1);
                scope.spawn(move || {
                    if i % 2 == 1 {
                        server
                            .post_sse("/generate", Auth::None, &body)
                            .iter()
                            .filter(|e| e.event == "token")
                            .map(|e| e.data["token_id"].as_u64().unwrap())
                            .collect::<Vec<u64>>()
                    } else {
                        let answer = server.post("/generate", Auth::None, &body).ok_json();
                        answer["token_ids"]
                            .as_array()
                            .unwrap()
                            .iter()
                            .map(|t| t.as_u64().unwrap())
                            .collect()
                    }
                })
            })
            .collect();
        for (i, run) in runs.into_iter().enumerate() {
            assert_eq!(run.join().unwrap(), reference.greedy, "request {i}");
        }
    });
}

/// `engine.kv_budget_bytes`: the tiny decoder holds 512 bytes of KV cache per position (2
/// layers x keys and values x 2 heads x 16 dims x 4 bytes), so its 14-token prompt plus 16
/// new tokens plans 15,360 bytes. With a budget of 20,000 only one such generation runs at a
/// time: four concurrent requests wait their turn and each still gets transformers' greedy
/// tokens; a request that could never fit is refused with 413 and the numbers.
#[test]
fn a_kv_budget_makes_generations_wait_and_refuses_one_that_never_fits() {
    let reference = greedy_reference();
    let server = ServerSetup::tiny_decoder()
        .set("engine", "kv_budget_bytes", "20000")
        .start();
    let body = json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 16});
    std::thread::scope(|scope| {
        let runs: Vec<_> = (0..4)
            .map(|_| {
                let (server, body) = (&server, &body);
                scope.spawn(move || server.post("/generate", Auth::None, body).ok_json())
            })
            .collect();
        for run in runs {
            assert_eq!(run.join().unwrap()["token_ids"], json!(reference.greedy));
        }
    });
    // One generation at a time: every forward pass carried one sequence.
    let page = server.get("/metrics", Auth::Admin).body;
    let value = |prefix: &str| -> f64 {
        page.lines()
            .find_map(|l| l.strip_prefix(prefix))
            .unwrap_or_else(|| panic!("no {prefix} in\n{page}"))
            .trim()
            .parse()
            .unwrap()
    };
    let (one, all) = (
        value("switchyard_batch_rows_bucket{le=\"1.0\"}"),
        value("switchyard_batch_rows_count"),
    );
    assert!(
        all >= 4.0 * 16.0 && one == all,
        "passes with one row {one} of {all}"
    );
    let n = reference.prompt_tokens;
    let too_many = 20_000 / 512 - n + 1;
    let reply = server.post(
        "/generate",
        Auth::None,
        &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": too_many}),
    );
    reply.assert_error(413, "kv_budget_exceeded");
    let want = format!(
        "needs {} bytes of KV cache ({} positions of prompt and max_tokens, 512 bytes each); the engine's kv_budget_bytes is 20000, so prompt plus max_tokens may be at most 39 positions",
        (n + too_many) * 512,
        n + too_many
    );
    assert!(reply.body.contains(&want), "{}", reply.body);
}

/// The prefix cache: a prompt prefilled once on an adapter version is reused by the next prompt
/// that begins with its tokens on the same version (all but the last token, whose logits pick
/// the first new token), and the answer is still transformers' greedy tokens for that adapter
/// (tests/reference/generate.py). A cache made on the base, on another adapter, or on another
/// version of the same adapter is never used: each of those first requests prefills everything
/// and gets its own reference tokens, which a borrowed cache would change.
#[test]
fn the_prefix_cache_is_reused_on_the_same_adapter_version_and_never_across() {
    let reference = greedy_reference();
    let fx = read_json(&fixtures().join("tiny-llama-reference.json"));
    let greedy_of = |adapter: &str| fx["adapters"][adapter]["greedy"].clone();
    let server = ServerSetup::tiny_decoder().start();
    let v1 = server.publish("helper", &fixtures().join("tiny-llama-qv.safetensors"));
    server.publish("other", &fixtures().join("tiny-llama-all.safetensors"));
    let n = reference.prompt_tokens;
    let run = |adapter: &str| {
        let answer = server
            .post(
                "/generate",
                Auth::None,
                &json!({"adapter": adapter, "prompt": reference.prompt, "max_tokens": 16}),
            )
            .ok_json();
        (
            answer["token_ids"].clone(),
            answer["counts"]["reused_prompt_tokens"].as_u64().unwrap(),
        )
    };
    let base = json!(reference.greedy);
    assert_eq!(run("base"), (base.clone(), 0), "first on the base");
    assert_eq!(
        run("base"),
        (base.clone(), n as u64 - 1),
        "again on the base"
    );
    let qv = greedy_of("tiny-llama-qv");
    assert_eq!(run("helper"), (qv.clone(), 0), "first on helper@{v1}");
    assert_eq!(
        run("helper"),
        (qv.clone(), n as u64 - 1),
        "again on helper@{v1}"
    );
    let all = greedy_of("tiny-llama-all");
    assert_eq!(run("other"), (all.clone(), 0), "first on another adapter");
    // A new version of `helper` (the other factors) goes live: its first request prefills.
    let v2 = server.publish("helper", &fixtures().join("tiny-llama-all.safetensors"));
    assert_ne!(v1, v2);
    assert_eq!(run("helper"), (all.clone(), 0), "first on helper@{v2}");
    assert_eq!(run("helper"), (all, n as u64 - 1), "again on helper@{v2}");
    // Rolled back, the old version finds its own cache again.
    server
        .post("/admin/adapters/helper/rollback", Auth::Admin, &json!({}))
        .ok_json();
    assert_eq!(run("helper"), (qv, n as u64 - 1), "back on helper@{v1}");
    let page = server.get("/metrics", Auth::Admin).body;
    let reused = (n as u64 - 1) * 4;
    assert!(
        page.contains(&format!(
            "switchyard_prompt_tokens_total{{source=\"reused\"}} {reused}"
        )),
        "{page}"
    );
    assert!(
        page.lines()
            .any(|l| l.starts_with("switchyard_prefix_cache_bytes ") && !l.ends_with(" 0")),
        "{page}"
    );
    // Off: nothing is reused.
    let off = ServerSetup::tiny_decoder()
        .set("engine", "prefix_cache_bytes", "0")
        .start();
    for _ in 0..2 {
        let answer = off
            .post(
                "/generate",
                Auth::None,
                &json!({"adapter": "base", "prompt": reference.prompt, "max_tokens": 4}),
            )
            .ok_json();
        assert_eq!(answer["counts"]["reused_prompt_tokens"], 0);
    }
}

/// A panic in the engine (set off on purpose by the debug build's test triggers, on a prompt
/// token) fails only the work it hit. Inside a forward pass it is caught there; outside one, in
/// the decoder loop, the engine restarts (counted in `switchyard_engine_restarts_total`), and
/// either way the next request is answered and readiness stays 200. After three restarts within
/// a minute a fourth panic stops the engine: readiness turns 503 naming it, and requests are
/// refused with 503 `engine_stopped` instead of hanging.
#[test]
fn an_engine_panic_fails_only_its_work_and_the_engine_restarts_or_stops_visibly() {
    let reference = greedy_reference();
    let fx = read_json(&fixtures().join("tiny-llama-reference.json"));
    // The first token of the greedy prompt sets off a panic in a step; the first token of the
    // logits text one in the decoder loop.
    let in_step = fx["prompt_ids"][0].as_u64().unwrap();
    let in_loop = fx["input_ids"][0].as_u64().unwrap();
    let server = ServerSetup::tiny_decoder()
        .env("SWITCHYARD_TEST_PANIC_IN_STEP", &in_step.to_string())
        .env("SWITCHYARD_TEST_PANIC_IN_LOOP", &in_loop.to_string())
        .start();
    let generate = |prompt: &str| {
        server.post(
            "/generate",
            Auth::None,
            &json!({"adapter": "base", "prompt": prompt, "max_tokens": 4}),
        )
    };
    let healthy = || {
        assert_eq!(
            server.get("/health/ready", Auth::None).status,
            200,
            "{}",
            server.log()
        );
        let ok = generate("wheel spokes").ok_json();
        assert_eq!(ok["counts"]["output_tokens"], 4);
    };
    let restarts = || {
        let page = server.get("/metrics", Auth::Admin).body;
        page.lines()
            .find_map(|l| l.strip_prefix("switchyard_engine_restarts_total "))
            .unwrap_or_else(|| panic!("no restarts counter in\n{page}"))
            .trim()
            .parse::<u64>()
            .unwrap()
    };
    healthy();
    assert_eq!(generate(&reference.prompt).status, 500);
    healthy();
    assert_eq!(restarts(), 0, "a panic in a step is caught there");
    let loop_prompt = fx["input_text"].as_str().unwrap();
    for n in 1..=3 {
        assert_eq!(generate(loop_prompt).status, 500);
        healthy();
        assert_eq!(restarts(), n);
    }
    assert!(server.log().contains("it restarts"), "{}", server.log());
    // A fourth within the minute: the engine stops, and says so (the thread ends just after
    // the failed request is answered).
    assert_eq!(generate(loop_prompt).status, 500);
    let start = std::time::Instant::now();
    let ready = loop {
        let ready = server.get("/health/ready", Auth::None);
        if ready.status != 200 || start.elapsed() > std::time::Duration::from_secs(10) {
            break ready;
        }
        std::thread::sleep(std::time::Duration::from_millis(20));
    };
    assert_eq!(ready.status, 503, "{}", ready.body);
    assert!(
        ready.body.contains("the engine thread stopped"),
        "{}",
        ready.body
    );
    generate("wheel spokes").assert_error(503, "engine_stopped");
    // Only a new process can compute again: liveness fails too, so a supervisor restarts it.
    server
        .get("/health/live", Auth::None)
        .assert_error(503, "engine_stopped");
}

/// Six concurrent generations over the base and two adapters, interleaved (the engine groups
/// each step's sequences by adapter, so rows and caches are reordered within the step): each
/// still gets transformers' greedy tokens for its own adapter (tests/reference/generate.py).
#[test]
fn interleaved_generations_over_several_adapters_each_get_their_own_reference_tokens() {
    let reference = greedy_reference();
    let fx = read_json(&fixtures().join("tiny-llama-reference.json"));
    let server = ServerSetup::tiny_decoder()
        .set("engine", "prefix_cache_bytes", "0")
        .start();
    server.publish("qv", &fixtures().join("tiny-llama-qv.safetensors"));
    server.publish("all", &fixtures().join("tiny-llama-all.safetensors"));
    let want = |adapter: &str| match adapter {
        "qv" => fx["adapters"]["tiny-llama-qv"]["greedy"].clone(),
        "all" => fx["adapters"]["tiny-llama-all"]["greedy"].clone(),
        _ => json!(reference.greedy),
    };
    let order = ["qv", "base", "all", "qv", "all", "base"];
    std::thread::scope(|scope| {
        let runs: Vec<_> = order
            .iter()
            .map(|adapter| {
                let server = &server;
                let body =
                    json!({"adapter": adapter, "prompt": reference.prompt, "max_tokens": 16});
                scope.spawn(move || server.post("/generate", Auth::None, &body).ok_json())
            })
            .collect();
        for (adapter, run) in order.iter().zip(runs) {
            assert_eq!(run.join().unwrap()["token_ids"], want(adapter), "{adapter}");
        }
    });
    // They shared forward passes: some pass carried more than one row.
    let page = server.get("/metrics", Auth::Admin).body;
    let one: f64 = page
        .lines()
        .find_map(|l| l.strip_prefix("switchyard_batch_rows_bucket{le=\"1.0\"} "))
        .unwrap()
        .parse()
        .unwrap();
    let all: f64 = page
        .lines()
        .find_map(|l| l.strip_prefix("switchyard_batch_rows_count "))
        .unwrap()
        .parse()
        .unwrap();
    assert!(one < all, "every pass carried one row ({one} of {all})");
}
