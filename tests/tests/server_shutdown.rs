//! SIGTERM: readiness turns 503, new work is refused, the request in flight still gets its
//! answer, and the process exits 0 within the grace period.

use std::time::{Duration, Instant};

use serde_json::json;
use switchyard_tests::server::{Auth, ServerSetup};

const GRACE: Duration = Duration::from_secs(30);

#[test]
fn sigterm_turns_readiness_503_finishes_the_request_in_flight_and_exits_0() {
    let mut server = ServerSetup::encoder()
        .set(
            "server",
            "shutdown_grace_ms",
            &GRACE.as_millis().to_string(),
        )
        .start();
    let ready = server.get("/health/ready", Auth::None);
    assert_eq!(ready.status, 200, "{}", ready.body);
    assert_eq!(server.get("/health/live", Auth::None).status, 200);

    // Long texts make one request that keeps the engine busy for seconds in a debug build.
    let long = "the rear wheel is out of true again ".repeat(30);
    let texts: Vec<&str> = vec![long.as_str(); 24];
    let (in_flight, during) = std::thread::scope(|s| {
        let in_flight = s.spawn(|| server.embed(json!({"adapter": "base"}), &texts));
        // Let it be admitted: parsing and tokenising take milliseconds, the forward pass seconds.
        std::thread::sleep(Duration::from_millis(500));
        server.terminate();
        let until = Instant::now() + Duration::from_secs(10);
        let readiness = loop {
            let r = server.get("/health/ready", Auth::None);
            if r.status != 200 || Instant::now() > until {
                break r;
            }
            std::thread::sleep(Duration::from_millis(20));
        };
        let new_work = server.embed(json!({"adapter": "base"}), &["a"]);
        assert!(
            !in_flight.is_finished(),
            "the long request finished before the shutdown could be observed; make it longer"
        );
        (in_flight.join().unwrap(), (readiness, new_work))
    });
    let (readiness, new_work) = during;
    readiness.assert_error(503, "not_ready");
    new_work.assert_error(503, "shutting_down");
    let answer = in_flight.ok_json();
    assert_eq!(answer["embeddings"].as_array().unwrap().len(), 24);

    let status = server.wait_exit(GRACE + Duration::from_secs(5));
    assert!(
        status.is_some_and(|s| s.success()),
        "exit status {status:?}; log:\n{}",
        server.log()
    );
}
