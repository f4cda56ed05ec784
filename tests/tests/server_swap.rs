//! Hot swap under load: a new version of an adapter is uploaded while requests for that adapter
//! are in flight. No request fails, each answer names the version that served it, and its
//! embedding is that version's reference (sentence-transformers, tests/reference/generate.py).

use std::sync::Barrier;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::Duration;

use serde_json::json;
use switchyard_tests::embeddings::{EmbeddingReference, assert_embedding_close, rows};
use switchyard_tests::fixtures;
use switchyard_tests::server::{Server, ServerSetup};

const REQUESTS: usize = 200;
/// Requests sent before the swap; the rest wait for the upload to return.
const BEFORE_SWAP: usize = 100;
/// How many of the early requests finish before the upload starts, so that the first version
/// has surely served some and the rest are still in flight.
const DONE_BEFORE_SWAP: usize = 20;

struct Answer {
    request: usize,
    sent_after_swap: bool,
    served_by: String,
    embedding: Vec<f64>,
}

fn embed_one(
    server: &Server,
    reference: &EmbeddingReference,
    request: usize,
) -> (String, Vec<f64>) {
    let sentence = &reference.sentences[request % reference.sentences.len()];
    let reply = server.embed(json!({"adapter": "north-routing"}), &[sentence.as_str()]);
    assert_eq!(reply.status, 200, "request {request}: {}", reply.body);
    let body = reply.json();
    let mut embeddings = rows(&body["embeddings"]);
    assert_eq!(embeddings.len(), 1);
    (
        body["served_by"].as_str().unwrap().to_owned(),
        embeddings.remove(0),
    )
}

#[test]
fn uploading_v2_amid_200_concurrent_requests_fails_none_and_each_answer_matches_its_version() {
    let reference = EmbeddingReference::load();
    let server = ServerSetup::encoder().start();
    let v1 = server.publish("north-routing", &fixtures().join("minilm-qv-a.safetensors"));
    let done = AtomicUsize::new(0);
    let swapped = Barrier::new(REQUESTS - BEFORE_SWAP + 1);

    let (answers, in_flight_at_swap, v2) = std::thread::scope(|s| {
        let workers: Vec<_> = (0..REQUESTS)
            .map(|request| {
                let (server, reference, done, swapped) = (&server, &reference, &done, &swapped);
                s.spawn(move || {
                    let sent_after_swap = request >= BEFORE_SWAP;
                    if sent_after_swap {
                        swapped.wait();
                    }
                    let (served_by, embedding) = embed_one(server, reference, request);
                    done.fetch_add(1, Ordering::SeqCst);
                    Answer {
                        request,
                        sent_after_swap,
                        served_by,
                        embedding,
                    }
                })
            })
            .collect();
        while done.load(Ordering::SeqCst) < DONE_BEFORE_SWAP {
            std::thread::sleep(Duration::from_millis(1));
        }
        let in_flight_at_swap = BEFORE_SWAP - done.load(Ordering::SeqCst);
        let v2 = server.publish("north-routing", &fixtures().join("minilm-qv-b.safetensors"));
        swapped.wait();
        let answers: Vec<Answer> = workers.into_iter().map(|w| w.join().unwrap()).collect();
        (answers, in_flight_at_swap, v2)
    });

    assert_ne!(v1, v2);
    assert!(
        in_flight_at_swap > 0,
        "the upload must start while requests are in flight"
    );
    let by_version = |v: &str| format!("north-routing@{v}");
    let mut served_by_v1 = 0;
    for a in &answers {
        let sentence = a.request % reference.sentences.len();
        let fixture = if a.served_by == by_version(&v1) {
            served_by_v1 += 1;
            "minilm-qv-a"
        } else if a.served_by == by_version(&v2) {
            "minilm-qv-b"
        } else {
            panic!(
                "request {} was served by {:?}, neither {} nor {}",
                a.request,
                a.served_by,
                by_version(&v1),
                by_version(&v2)
            );
        };
        if a.sent_after_swap {
            assert_eq!(
                a.served_by,
                by_version(&v2),
                "request {} was sent after the upload returned",
                a.request
            );
        }
        assert_embedding_close(
            &a.embedding,
            &reference.adapter(fixture)[sentence],
            &format!("request {} ({})", a.request, a.served_by),
        );
    }
    assert!(served_by_v1 >= DONE_BEFORE_SWAP, "v1 served {served_by_v1}");
    assert!(served_by_v1 <= BEFORE_SWAP, "v1 served {served_by_v1}");
}
