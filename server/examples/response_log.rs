//! Why response records are group-committed: the cost of one durable transaction per record
//! against the response log's batches, on the same SQLite file, side by side in one run.
//!
//! ```sh
//! cargo run -p switchyard-server --example response_log -- [--records 400] [--dir /some/disk]
//! ```
//!
//! Prints, for one record per transaction and for the response log at 1, 4 and 16 concurrent
//! writers: records per second and the median and 99th-percentile wait for a record to be
//! durable. The folder (a temporary one by default) decides the disk measured.

use std::sync::Arc;
use std::time::{Duration, Instant};

use switchyard_server::experiments::responses::ResponseLog;
use switchyard_server::experiments::{ExperimentStore, ServedResponse, SqliteStore};
use switchyard_server::splits::{ArmSpec, SplitSpec};

fn flag<'a>(args: &'a [String], name: &str) -> Option<&'a str> {
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1))
        .map(String::as_str)
}

/// A record with an id shaped like the server's (`r-` and 24 hex digits); `tag` and `i` only make
/// it unique.
fn served(generation: i64, arm_id: i64, tag: &str, i: usize) -> ServedResponse {
    use std::hash::{DefaultHasher, Hash, Hasher};
    let mut hasher = DefaultHasher::new();
    (tag, i).hash(&mut hasher);
    ServedResponse {
        response_id: format!("r-{:016x}{:08x}", hasher.finish(), i),
        generation,
        arm_id,
        tenant: "default".to_owned(),
        served_ms: 1_800_000_000_000 + i as i64,
    }
}

fn report(what: &str, mut waits: Vec<Duration>, total: Duration, base_rate: Option<f64>) -> f64 {
    waits.sort();
    let at = |q: f64| waits[((waits.len() - 1) as f64 * q).round() as usize].as_secs_f64() * 1e3;
    let rate = waits.len() as f64 / total.as_secs_f64();
    println!(
        "| {what} | {} | {rate:.0} | {} | {:.2} | {:.2} |",
        waits.len(),
        base_rate.map_or("1.00".to_owned(), |b| format!("{:.2}", rate / b)),
        at(0.5),
        at(0.99)
    );
    rate
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let records: usize = flag(&args, "--records").map_or(400, |v| v.parse().unwrap());
    let temp = tempfile::tempdir().unwrap();
    let dir = flag(&args, "--dir").map_or(temp.path().to_owned(), Into::into);
    let store = Arc::new(SqliteStore::open(&dir.join("bench-experiments.sqlite")).unwrap());
    let put = store
        .put_split(
            &SplitSpec {
                name: "bench".to_owned(),
                arms: vec![ArmSpec {
                    name: "only".to_owned(),
                    adapter: "base".to_owned(),
                    version: None,
                    weight: 1.0,
                    shadow: None,
                }],
            },
            None,
            0,
        )
        .unwrap();
    let (generation, arm_id) = (put.record.generation, put.record.arms[0].id);
    let log = ResponseLog::start(store.clone()).unwrap();
    let rounds = 4;
    let per_round = records / rounds;
    // Warm-up: the write-ahead log grows to its working size first (growing it costs a sync of
    // the file's size as well), then every mode runs in each round, so drift hits all alike.
    for i in 0..200 {
        let row = served(generation, arm_id, "warm", i);
        store.record_responses(&[row], &[]).unwrap();
    }
    let modes = [0usize, 1, 4, 16];
    let mut waits: Vec<Vec<Duration>> = vec![Vec::new(); modes.len()];
    let mut spent = vec![Duration::ZERO; modes.len()];
    for round in 0..rounds {
        for (m, &writers) in modes.iter().enumerate() {
            let start = Instant::now();
            let got: Vec<Duration> = if writers == 0 {
                (0..per_round)
                    .map(|i| {
                        let t = Instant::now();
                        let row = served(generation, arm_id, &format!("single-{round}"), i);
                        store.record_responses(&[row], &[]).unwrap();
                        t.elapsed()
                    })
                    .collect()
            } else {
                std::thread::scope(|s| {
                    let handles: Vec<_> = (0..writers)
                        .map(|w| {
                            let log = &log;
                            s.spawn(move || {
                                (0..per_round / writers)
                                    .map(|i| {
                                        let t = Instant::now();
                                        let tag = format!("log{writers}-{round}-{w}");
                                        let row = served(generation, arm_id, &tag, i);
                                        log.record(row).wait().unwrap();
                                        t.elapsed()
                                    })
                                    .collect::<Vec<_>>()
                            })
                        })
                        .collect();
                    handles
                        .into_iter()
                        .flat_map(|h| h.join().unwrap())
                        .collect()
                })
            };
            spent[m] += start.elapsed();
            waits[m].extend(got);
        }
    }
    println!(
        "response_log: {records} records per mode in {rounds} rounds, database {}",
        store.path().display()
    );
    println!(
        "| how | records | records/s | rate vs one per transaction | p50 wait ms | p99 wait ms |"
    );
    println!("| --- | ---: | ---: | ---: | ---: | ---: |");
    let base = report(
        "one record per transaction",
        waits[0].clone(),
        spent[0],
        None,
    );
    for (m, &writers) in modes.iter().enumerate().skip(1) {
        report(
            &format!("response log, {writers} concurrent writers"),
            waits[m].clone(),
            spent[m],
            Some(base),
        );
    }
    // What the records take on disk, to size the retention: the database file after a checkpoint
    // folds the write-ahead log into it, over the records written.
    drop(log);
    let written = 200 + records * modes.len();
    let store = Arc::into_inner(store).expect("the log has let go of the store");
    let path = store.path().to_owned();
    drop(store);
    let conn = rusqlite::Connection::open(&path).unwrap();
    conn.query_row("PRAGMA wal_checkpoint(TRUNCATE)", [], |_| Ok(()))
        .unwrap();
    let bytes = std::fs::metadata(&path).unwrap().len();
    println!(
        "database: {bytes} bytes for about {written} response records, {:.0} bytes per record",
        bytes as f64 / written as f64
    );
}
