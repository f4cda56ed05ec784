//! What recording a split request's response costs, end to end: the same `/embed` sent to one
//! adapter directly (no record) and through a one-arm split over that adapter (its response
//! record is written, durably, before the answer leaves), in alternating rounds against one
//! server, at 1 and at 4 concurrent clients. Prints latency percentiles and the split/direct
//! ratios side by side.
//!
//! ```sh
//! cargo build -p switchyard-server
//! cargo run -p switchyard-tests --example split_recording -- [--rounds 6] [--requests 60]
//! ```
//!
//! It runs the binary next to it (target/debug/switchyard, or target/release with --release) on
//! 127.0.0.1 in a temporary folder, whose file system holds the experiment database.

use std::time::{Duration, Instant};

use serde_json::json;
use switchyard_tests::fixtures;
use switchyard_tests::server::{Auth, Server, ServerSetup};

fn flag(args: &[String], name: &str, default: usize) -> usize {
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1))
        .map(|v| {
            v.parse()
                .unwrap_or_else(|_| panic!("{name} takes a number"))
        })
        .unwrap_or(default)
}

/// Sends `requests` embeds of `target` from `clients` threads; returns each one's latency.
fn run(
    server: &Server,
    target: &serde_json::Value,
    clients: usize,
    requests: usize,
    round: usize,
) -> Vec<Duration> {
    std::thread::scope(|s| {
        let workers: Vec<_> = (0..clients)
            .map(|c| {
                s.spawn(move || {
                    (0..requests / clients)
                        .map(|i| {
                            let mut body = target.clone();
                            body["subject"] = json!(format!("rider-{round}-{c}-{i}"));
                            body["texts"] = json!(["can I book a brake bleed on Saturday?"]);
                            let start = Instant::now();
                            let reply = server.post("/embed", Auth::None, &body);
                            assert_eq!(reply.status, 200, "{}", reply.body);
                            start.elapsed()
                        })
                        .collect::<Vec<_>>()
                })
            })
            .collect();
        workers
            .into_iter()
            .flat_map(|w| w.join().unwrap())
            .collect()
    })
}

fn percentile(sorted: &[Duration], q: f64) -> f64 {
    let i = ((sorted.len() as f64 - 1.0) * q).round() as usize;
    sorted[i].as_secs_f64() * 1e3
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let rounds = flag(&args, "--rounds", 6);
    let requests = flag(&args, "--requests", 60);
    let server = ServerSetup::encoder().start();
    server.publish("tone-a", &fixtures().join("minilm-qv-a.safetensors"));
    let put = server.request(
        "PUT",
        "/admin/splits/timing",
        Auth::Admin,
        Some((
            "application/json",
            json!({"arms": [{"name": "only", "adapter": "tone-a", "weight": 1}]})
                .to_string()
                .as_bytes(),
        )),
    );
    assert_eq!(put.status, 201, "{}", put.body);
    let direct = json!({"adapter": "tone-a"});
    let split = json!({"split": "timing"});
    run(&server, &direct, 2, 20, 0);
    run(&server, &split, 2, 20, 0);

    println!(
        "split_recording: {rounds} rounds x {requests} requests per mode and concurrency; database in {}",
        server.dir().join("store").display()
    );
    println!(
        "| clients | mode | requests | p50 ms | p90 ms | p99 ms | p50 split/direct | p99 split/direct |"
    );
    println!("| ---: | --- | ---: | ---: | ---: | ---: | ---: | ---: |");
    for clients in [1, 4] {
        let (mut d, mut s) = (Vec::new(), Vec::new());
        for round in 0..rounds {
            // Alternate which mode goes first, so drift on a shared machine hits both.
            if round % 2 == 0 {
                d.extend(run(&server, &direct, clients, requests, round));
                s.extend(run(&server, &split, clients, requests, round));
            } else {
                s.extend(run(&server, &split, clients, requests, round));
                d.extend(run(&server, &direct, clients, requests, round));
            }
        }
        d.sort();
        s.sort();
        for (mode, lat) in [("direct (no record)", &d), ("split (recorded)", &s)] {
            let ratio = |q| percentile(lat, q) / percentile(&d, q);
            println!(
                "| {clients} | {mode} | {} | {:.2} | {:.2} | {:.2} | {:.3} | {:.3} |",
                lat.len(),
                percentile(lat, 0.5),
                percentile(lat, 0.9),
                percentile(lat, 0.99),
                ratio(0.5),
                ratio(0.99),
            );
        }
    }
    let readout = server
        .get("/admin/splits/timing/readout", Auth::Admin)
        .ok_json();
    println!(
        "response records written through the split: {}",
        readout["arms"][0]["requests"]
    );
}
