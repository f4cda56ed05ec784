//! A/B splits through the real server: weights hold over many subjects, a subject keeps its arm
//! (also across a restart, since the split is saved in the store folder), and posted outcomes
//! show up in the readout.

use std::collections::BTreeMap;

use serde_json::{Value, json};
use switchyard_tests::fixtures;
use switchyard_tests::server::{Auth, Server, ServerSetup};

const SUBJECTS: usize = 2000;
/// Client threads: enough for the engine to batch several rows per forward pass.
const CLIENTS: usize = 8;
/// Subjects asked again, within one run and after the restart.
const RECHECKED: usize = 300;
/// Outcomes posted per arm, numbers and yes/no each.
const OUTCOMES_PER_ARM: usize = 30;

/// One short text keeps each request cheap; the assignment does not depend on it.
const TEXT: &str = "brake bleed";

struct Served {
    id: String,
    arm: String,
    served_by: String,
}

fn subject(i: usize) -> String {
    format!("customer-{i:05}")
}

/// Sends one embed per subject in `subjects` through the split, from [`CLIENTS`] threads, and
/// returns the answers in subject order.
fn serve_subjects(server: &Server, subjects: &[usize]) -> Vec<Served> {
    let chunks: Vec<&[usize]> = subjects.chunks(subjects.len().div_ceil(CLIENTS)).collect();
    std::thread::scope(|s| {
        let workers: Vec<_> = chunks
            .iter()
            .map(|chunk| {
                s.spawn(move || {
                    chunk
                        .iter()
                        .map(|&i| {
                            let body = server
                                .embed(
                                    json!({"split": "intent-rollout", "subject": subject(i)}),
                                    &[TEXT],
                                )
                                .ok_json();
                            assert_eq!(body["split"]["split"], "intent-rollout", "{body}");
                            Served {
                                id: body["id"].as_str().unwrap().to_owned(),
                                arm: body["split"]["arm"].as_str().unwrap().to_owned(),
                                served_by: body["served_by"].as_str().unwrap().to_owned(),
                            }
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

fn arm_counts<'a>(served: impl IntoIterator<Item = &'a Served>) -> BTreeMap<&'a str, usize> {
    let mut counts = BTreeMap::new();
    for s in served {
        *counts.entry(s.arm.as_str()).or_default() += 1;
    }
    counts
}

fn post_outcome(server: &Server, response_id: &str, value: Value) -> u16 {
    server
        .post(
            "/outcomes",
            Auth::None,
            &json!({"response_id": response_id, "value": value}),
        )
        .status
}

#[test]
fn split_weighted_80_20_over_2000_subjects_holds_its_weights_and_keeps_each_subjects_arm_across_a_restart()
 {
    let mut server = ServerSetup::encoder().start();
    let v_a = server.publish("intent-a", &fixtures().join("minilm-qv-a.safetensors"));
    let v_b = server.publish("intent-b", &fixtures().join("minilm-qv-b.safetensors"));
    let put = server.request(
        "PUT",
        "/admin/splits/intent-rollout",
        Auth::Admin,
        Some((
            "application/json",
            json!({"arms": [
                {"name": "incumbent", "adapter": "intent-a", "weight": 0.8},
                {"name": "candidate", "adapter": "intent-b", "weight": 0.2},
            ]})
            .to_string()
            .as_bytes(),
        )),
    );
    assert_eq!(put.status, 201, "{}", put.body);

    let all: Vec<usize> = (0..SUBJECTS).collect();
    let first = serve_subjects(&server, &all);
    let counts = arm_counts(&first);
    let incumbent_share = counts["incumbent"] as f64 / SUBJECTS as f64;
    assert!(
        (0.77..=0.83).contains(&incumbent_share),
        "incumbent got {incumbent_share} of {SUBJECTS} subjects, expected 0.80 ± 0.03 ({counts:?})"
    );
    assert_eq!(counts.len(), 2, "{counts:?}");
    for s in &first {
        let expected = match s.arm.as_str() {
            "incumbent" => format!("intent-a@{v_a}"),
            _ => format!("intent-b@{v_b}"),
        };
        assert_eq!(s.served_by, expected, "arm {}", s.arm);
    }

    let sample: Vec<usize> = (0..SUBJECTS).step_by(SUBJECTS / RECHECKED).collect();
    let again = serve_subjects(&server, &sample);
    for (&i, s) in sample.iter().zip(&again) {
        assert_eq!(s.arm, first[i].arm, "{} changed arm", subject(i));
    }

    // Outcomes: a number for some responses of each arm, yes/no for others.
    let mut posted: BTreeMap<&str, (Vec<f64>, usize)> = BTreeMap::new();
    for (n, s) in first.iter().enumerate() {
        let (numbers, yes_no) = posted.entry(s.arm.as_str()).or_default();
        if numbers.len() < OUTCOMES_PER_ARM {
            let value = (n % 7) as f64 + if s.arm == "candidate" { 0.5 } else { 0.0 };
            assert_eq!(post_outcome(&server, &s.id, json!(value)), 200);
            numbers.push(value);
        } else if *yes_no < OUTCOMES_PER_ARM {
            assert_eq!(post_outcome(&server, &s.id, json!(n % 3 == 0)), 200);
            *yes_no += 1;
        }
    }
    assert_eq!(
        post_outcome(&server, &first[0].id, json!(1.0)),
        409,
        "a second outcome for one response"
    );
    let readout = server
        .get("/admin/splits/intent-rollout/readout", Auth::Admin)
        .ok_json();
    let requests_now = arm_counts(first.iter().chain(&again));
    let arms = readout["arms"].as_array().unwrap();
    assert_eq!(arms.len(), 2, "{readout}");
    for (i, arm) in arms.iter().enumerate() {
        let name = arm["arm"].as_str().unwrap();
        assert_eq!(arm["requests"], json!(requests_now[name]), "{name}: {arm}");
        let numbers = &posted[name].0;
        let numeric = &arm["numeric"];
        assert_eq!(
            numeric["summary"]["count"],
            json!(OUTCOMES_PER_ARM),
            "{arm}"
        );
        let mean = numbers.iter().sum::<f64>() / numbers.len() as f64;
        let served_mean = numeric["summary"]["mean"].as_f64().unwrap();
        assert!(
            (served_mean - mean).abs() < 1e-9,
            "{name}: mean {served_mean}, posted {mean}"
        );
        assert_eq!(
            arm["yes_no"]["summary"]["count"],
            json!(OUTCOMES_PER_ARM),
            "{arm}"
        );
        if i == 0 {
            assert!(numeric["versus_first"].is_null(), "{arm}");
            assert!(numeric["versus_first_always_valid"].is_null(), "{arm}");
        } else {
            for kind in ["numeric", "yes_no"] {
                // Both kinds of figure, each saying which it is.
                for (field, validity) in [
                    ("versus_first", "fixed_sample"),
                    ("versus_first_always_valid", "always_valid"),
                ] {
                    let comparison = &arm[kind][field];
                    assert_eq!(comparison["validity"], validity, "{name}: {comparison}");
                    let p = comparison["p_value"].as_f64().unwrap_or(f64::NAN);
                    assert!((0.0..=1.0).contains(&p), "{name}: p-value {comparison}");
                }
                // The always-valid interval is the wider one: it pays for being read at will.
                let width = |field: &str| {
                    let i = &arm[kind][field]["interval"];
                    i["high"].as_f64().unwrap() - i["low"].as_f64().unwrap()
                };
                assert!(
                    width("versus_first_always_valid") > width("versus_first"),
                    "{name} {kind}: {arm}"
                );
            }
        }
    }
    assert_eq!(readout["always_valid"]["mixing_variance"], json!(0.1));
    // Sticky 80/20 by subject hash: the requests follow the weights, so no alarm.
    let check = &readout["assignment_check"];
    assert_eq!(check["expected_shares"], json!([0.8, 0.2]), "{check}");
    assert_eq!(
        check["requests"],
        json!([requests_now["incumbent"], requests_now["candidate"]]),
        "{check}"
    );
    assert_eq!(check["alarm_below"], json!(0.001), "{check}");
    assert_eq!(check["degrees_of_freedom"], json!(1), "{check}");
    assert_eq!(check["mismatch"], json!(false), "{check}");

    server.restart();
    let after = serve_subjects(&server, &sample);
    for (&i, s) in sample.iter().zip(&after) {
        assert_eq!(
            s.arm,
            first[i].arm,
            "{} changed arm after the restart",
            subject(i)
        );
    }
}

/// `PUT /admin/splits/{name}` with `arms`, as the admin.
fn put_split(server: &Server, name: &str, arms: Value) -> switchyard_tests::server::Reply {
    server.request(
        "PUT",
        &format!("/admin/splits/{name}"),
        Auth::Admin,
        Some((
            "application/json",
            json!({ "arms": arms }).to_string().as_bytes(),
        )),
    )
}

/// Sends requests through split `split` with subjects `prefix-0`, `prefix-1`, ... until every
/// arm in `arms` has answered `per_arm` of them, and returns their response ids by arm.
fn responses_by_arm(
    server: &Server,
    split: &str,
    prefix: &str,
    arms: &[&str],
    per_arm: usize,
) -> BTreeMap<String, Vec<String>> {
    let mut by_arm: BTreeMap<String, Vec<String>> = BTreeMap::new();
    for i in 0..400 {
        if arms
            .iter()
            .all(|a| by_arm.get(*a).is_some_and(|ids| ids.len() >= per_arm))
        {
            return by_arm;
        }
        let body = server
            .embed(
                json!({"split": split, "subject": format!("{prefix}-{i}")}),
                &[TEXT],
            )
            .ok_json();
        by_arm
            .entry(body["split"]["arm"].as_str().unwrap().to_owned())
            .or_default()
            .push(body["id"].as_str().unwrap().to_owned());
    }
    panic!("400 subjects did not give {per_arm} responses to each of {arms:?}: {by_arm:?}");
}

/// The issue's report: outcomes 1 and 2 on one arm, 1e200 and 3 on the other, then a readout.
/// The readout panicked in the Welch computation while holding the split lock; the connection
/// dropped, the lock was poisoned, and every split call and every outcome failed from then on.
/// Now 1e200 is refused (it is beyond the documented bound 1e15), values at the bound give a
/// finite readout, and every split endpoint still works afterwards.
#[test]
fn readout_with_extreme_outcomes_does_not_take_splits_down() {
    let server = ServerSetup::encoder().start();
    server.publish("tone-a", &fixtures().join("minilm-qv-a.safetensors"));
    server.publish("tone-b", &fixtures().join("minilm-qv-b.safetensors"));
    let arms = json!([
        {"name": "incumbent", "adapter": "tone-a", "weight": 1},
        {"name": "candidate", "adapter": "tone-b", "weight": 1},
    ]);
    assert_eq!(put_split(&server, "tone-trial", arms).status, 201);
    let ids = responses_by_arm(
        &server,
        "tone-trial",
        "rider",
        &["incumbent", "candidate"],
        3,
    );
    let (incumbent, candidate) = (&ids["incumbent"], &ids["candidate"]);

    assert_eq!(post_outcome(&server, &incumbent[0], json!(1)), 200);
    assert_eq!(post_outcome(&server, &incumbent[1], json!(2)), 200);
    let refused = server.post(
        "/outcomes",
        Auth::None,
        &json!({"response_id": candidate[0], "value": 1e200}),
    );
    refused.assert_error(400, "invalid_outcome");
    assert!(
        refused.json()["error"]["message"]
            .as_str()
            .unwrap()
            .contains("1e15"),
        "the refusal names the bound: {}",
        refused.body
    );
    // The refused value did not use up the response's one outcome.
    assert_eq!(post_outcome(&server, &candidate[0], json!(3)), 200);
    assert_eq!(post_outcome(&server, &candidate[1], json!(1e15)), 200);

    let readout = server
        .get("/admin/splits/tone-trial/readout", Auth::Admin)
        .ok_json();
    let lines = readout["arms"].as_array().unwrap();
    assert_eq!(
        lines[0]["numeric"]["summary"]["count"],
        json!(2),
        "{readout}"
    );
    assert_eq!(
        lines[1]["numeric"]["summary"]["count"],
        json!(2),
        "{readout}"
    );
    let versus = &lines[1]["numeric"]["versus_first"];
    let p = versus["p_value"].as_f64().expect("a p-value");
    assert!((0.0..=1.0).contains(&p), "{versus}");
    assert_eq!(versus["degrees_of_freedom"].as_f64(), Some(1.0), "{versus}");

    // Every split endpoint and /outcomes still answer.
    assert_eq!(server.get("/admin/splits", Auth::Admin).status, 200);
    server
        .embed(
            json!({"split": "tone-trial", "subject": "rider-new"}),
            &[TEXT],
        )
        .ok_json();
    assert_eq!(post_outcome(&server, &incumbent[2], json!(true)), 200);
    assert_eq!(post_outcome(&server, &candidate[2], json!(false)), 200);
    let arms = json!([
        {"name": "incumbent", "adapter": "tone-a", "weight": 3},
        {"name": "candidate", "adapter": "tone-b", "weight": 1},
    ]);
    assert_eq!(put_split(&server, "tone-trial", arms).status, 200);
    let again = server
        .get("/admin/splits/tone-trial/readout", Auth::Admin)
        .ok_json();
    assert_eq!(
        again["arms"][0]["yes_no"]["summary"]["count"],
        json!(1),
        "{again}"
    );
    assert_eq!(
        server
            .request("DELETE", "/admin/splits/tone-trial", Auth::Admin, None)
            .status,
        204
    );
    assert_eq!(server.get("/health/ready", Auth::None).status, 200);
}

/// The issue's report: a response served to one tenant through its split accepted an outcome
/// posted with another tenant's key (200, and the answer named the split and the arm). Now the
/// other tenant gets exactly the answer an unknown response id gets, and the response's one
/// outcome is still there for the tenant it was served to.
#[test]
fn outcome_posted_by_another_tenant_is_answered_as_an_unknown_response() {
    const NORTH: &str = "north-key-0123456789abcdef";
    const SOUTH: &str = "south-key-0123456789abcdef";
    let server = ServerSetup::encoder()
        .tenant("ridgeline-north", NORTH, &["north-*", "shared-*"])
        .tenant("ridgeline-south", SOUTH, &["south-*", "shared-*"])
        .start();
    server.publish("shared-faq", &fixtures().join("minilm-qv-a.safetensors"));
    server.publish("north-routing", &fixtures().join("minilm-qv-b.safetensors"));
    let shared = json!([
        {"name": "faq", "adapter": "shared-faq", "weight": 1},
        {"name": "plain", "adapter": "base", "weight": 1},
    ]);
    assert_eq!(put_split(&server, "shared-trial", shared).status, 201);
    let north_only = json!([{"name": "routing", "adapter": "north-routing", "weight": 1}]);
    assert_eq!(put_split(&server, "north-trial", north_only).status, 201);

    let served = |split: &str| {
        server
            .post(
                "/embed",
                Auth::Bearer(NORTH),
                &json!({"split": split, "subject": "rider-7", "texts": [TEXT]}),
            )
            .ok_json()["id"]
            .as_str()
            .unwrap()
            .to_owned()
    };
    let outcome = |key: &str, id: &str| {
        server.post(
            "/outcomes",
            Auth::Bearer(key),
            &json!({"response_id": id, "value": true}),
        )
    };
    // The answer for an id no one was ever served, with the id taken out.
    let never_served = "r-000000000000000000000000";
    let unknown = outcome(SOUTH, never_served);
    unknown.assert_error(404, "unknown_response");
    let unknown_body = unknown.body.replace(never_served, "ID");

    for split in ["shared-trial", "north-trial"] {
        let id = served(split);
        let crossed = outcome(SOUTH, &id);
        assert_eq!(crossed.status, unknown.status, "{split}: {}", crossed.body);
        assert_eq!(
            crossed.body.replace(&id, "ID"),
            unknown_body,
            "{split}: the other tenant's answer differs from the unknown-id answer"
        );
        assert!(!crossed.body.contains(split), "{}", crossed.body);
        let own = outcome(NORTH, &id);
        assert_eq!(own.status, 200, "{split}: {}", own.body);
        assert_eq!(own.json()["split"], json!(split));
        outcome(NORTH, &id).assert_error(409, "outcome_recorded");
        // Even once recorded, the other tenant learns nothing.
        assert_eq!(outcome(SOUTH, &id).body.replace(&id, "ID"), unknown_body);
    }
    let readout = server
        .get("/admin/splits/north-trial/readout", Auth::Admin)
        .ok_json();
    assert_eq!(
        readout["arms"][0]["yes_no"]["summary"]["count"],
        json!(1),
        "only the serving tenant's outcome counts: {readout}"
    );
}

/// The assignment check flags a split whose requests do not follow its weights. Here the cause
/// is an edit: 50/50 traffic, then a reweighting to 90/10 that keeps the arm records (same
/// treatments), so the counts no longer match the weights; the README names this case. An arm
/// rolled back to weight 0 leaves the check, with the requests it served.
#[test]
fn assignment_check_flags_requests_that_do_not_follow_the_weights() {
    let server = ServerSetup::encoder().start();
    server.publish("intent-a", &fixtures().join("minilm-qv-a.safetensors"));
    server.publish("intent-b", &fixtures().join("minilm-qv-b.safetensors"));
    let even = json!([
        {"name": "incumbent", "adapter": "intent-a", "weight": 1},
        {"name": "candidate", "adapter": "intent-b", "weight": 1},
    ]);
    assert_eq!(put_split(&server, "intent-check", even).status, 201);
    let served = responses_by_arm(
        &server,
        "intent-check",
        "c",
        &["incumbent", "candidate"],
        60,
    );
    let check = readout(&server, "intent-check")["assignment_check"].clone();
    assert_eq!(check["mismatch"], json!(false), "{check}");
    assert_eq!(check["expected_shares"], json!([0.5, 0.5]), "{check}");
    let requests: Vec<u64> = ["incumbent", "candidate"]
        .iter()
        .map(|a| served[*a].len() as u64)
        .collect();
    assert_eq!(check["requests"], json!(requests), "{check}");

    let skewed = json!([
        {"name": "incumbent", "adapter": "intent-a", "weight": 9},
        {"name": "candidate", "adapter": "intent-b", "weight": 1},
    ]);
    assert_eq!(put_split(&server, "intent-check", skewed).status, 200);
    let check = readout(&server, "intent-check")["assignment_check"].clone();
    assert_eq!(check["mismatch"], json!(true), "{check}");
    assert!(check["p_value"].as_f64().unwrap() < 0.001, "{check}");

    let rolled_back = json!([
        {"name": "incumbent", "adapter": "intent-a", "weight": 1},
        {"name": "candidate", "adapter": "intent-b", "weight": 0},
    ]);
    assert_eq!(put_split(&server, "intent-check", rolled_back).status, 200);
    let check = readout(&server, "intent-check")["assignment_check"].clone();
    assert_eq!(check["mismatch"], json!(false), "{check}");
    assert!(
        check["p_value"].is_null(),
        "one arm left: nothing to test: {check}"
    );
}

fn readout(server: &Server, split: &str) -> Value {
    server
        .get(&format!("/admin/splits/{split}/readout"), Auth::Admin)
        .ok_json()
}

/// The issue's report: a split arm could name a version that does not exist (accepted with 200;
/// requests then failed with 422), and a version a split arm held could be retired. Both are now
/// refused, naming the arm or the split.
#[test]
fn split_arm_naming_a_missing_version_is_refused_and_a_held_version_cannot_be_retired() {
    let server = ServerSetup::encoder().start();
    let v_a = server.publish("fork-advice", &fixtures().join("minilm-qv-a.safetensors"));
    let v_b = server.publish("fork-advice", &fixtures().join("minilm-qv-b.safetensors"));
    let held = |version: &str| {
        json!([
            {"name": "incumbent", "adapter": "fork-advice", "version": version, "weight": 1},
            {"name": "plain", "adapter": "base", "weight": 1},
        ])
    };
    let missing = put_split(&server, "fork-test", held("0123456789abcdef"));
    missing.assert_error(404, "unknown_version");
    assert!(missing.body.contains("arms[0].version"), "{}", missing.body);
    let no_adapter = put_split(
        &server,
        "fork-test",
        json!([{"name": "x", "adapter": "never-published", "weight": 1}]),
    );
    no_adapter.assert_error(404, "unknown_target");
    assert!(
        no_adapter.body.contains("arms[0].adapter"),
        "{}",
        no_adapter.body
    );
    assert_eq!(
        server.get("/admin/splits", Auth::Admin).ok_json()["splits"],
        json!([]),
        "nothing was written"
    );

    // Held to the version that is no longer live: accepted, and it serves that version.
    assert_eq!(put_split(&server, "fork-test", held(&v_a)).status, 201);
    let body = server
        .embed(json!({"split": "fork-test", "subject": "rider-1"}), &[TEXT])
        .ok_json();
    assert!(
        body["served_by"] == json!(format!("fork-advice@{v_a}")) || body["served_by"] == "base",
        "{body}"
    );
    let retire = |version: &str| {
        server.request(
            "DELETE",
            &format!("/admin/adapters/fork-advice/versions/{version}"),
            Auth::Admin,
            None,
        )
    };
    let refused = retire(&v_a);
    refused.assert_error(409, "version_held_by_split");
    assert!(
        refused.body.contains("fork-test") && refused.body.contains("incumbent"),
        "{}",
        refused.body
    );
    // Once the split lets go, the version can be retired.
    let follows_live = json!([{"name": "incumbent", "adapter": "fork-advice", "weight": 1}]);
    assert_eq!(put_split(&server, "fork-test", follows_live).status, 200);
    assert_eq!(retire(&v_a).status, 204);
    retire(&v_b).assert_error(409, "version_is_live");
}

/// The issue's report: outcomes were remembered by arm position and counts carried over by arm
/// name, so after an edit an outcome could land on another treatment, and a deleted and
/// recreated split inherited the old responses. Outcomes now follow the arm record that served
/// the response.
#[test]
fn outcomes_follow_the_arm_record_that_served_them_across_edits_and_recreation() {
    let server = ServerSetup::encoder().start();
    server.publish("tone-a", &fixtures().join("minilm-qv-a.safetensors"));
    server.publish("tone-b", &fixtures().join("minilm-qv-b.safetensors"));
    let arms = json!([
        {"name": "incumbent", "adapter": "tone-a", "weight": 1},
        {"name": "candidate", "adapter": "tone-b", "weight": 1},
    ]);
    let created = put_split(&server, "tone-trial", arms).json();
    let ids = responses_by_arm(&server, "tone-trial", "old", &["incumbent", "candidate"], 2);

    // The candidate now serves the base model: a new treatment, so a new arm record. The old
    // candidate's responses keep their record; its outcome lands there.
    let swapped = json!([
        {"name": "candidate", "adapter": "base", "weight": 1},
        {"name": "incumbent", "adapter": "tone-a", "weight": 1},
    ]);
    let edited = put_split(&server, "tone-trial", swapped).ok_json();
    assert_eq!(edited["generation"], created["generation"]);
    assert_eq!(post_outcome(&server, &ids["candidate"][0], json!(5)), 200);
    assert_eq!(post_outcome(&server, &ids["incumbent"][0], json!(2)), 200);
    let r = readout(&server, "tone-trial");
    assert_eq!(r["arms"][0]["arm"], "candidate");
    assert_eq!(r["arms"][0]["adapter"], "base");
    assert_eq!(r["arms"][0]["requests"], json!(0), "{r}");
    assert_eq!(r["arms"][0]["numeric"]["summary"]["count"], json!(0), "{r}");
    assert_eq!(
        r["arms"][1]["numeric"]["summary"]["mean"],
        json!(2.0),
        "{r}"
    );
    let replaced = &r["replaced_arms"][0];
    assert_eq!(replaced["adapter"], "tone-b", "{r}");
    assert_eq!(replaced["requests"], json!(2), "{r}");
    assert_eq!(replaced["numeric"]["summary"]["mean"], json!(5.0), "{r}");

    // Deleted and created again: a new generation that knows none of the old responses.
    assert_eq!(
        server
            .request("DELETE", "/admin/splits/tone-trial", Auth::Admin, None)
            .status,
        204
    );
    let arms = json!([
        {"name": "incumbent", "adapter": "tone-a", "weight": 1},
        {"name": "candidate", "adapter": "tone-b", "weight": 1},
    ]);
    let recreated = put_split(&server, "tone-trial", arms);
    assert_eq!(recreated.status, 201);
    assert_ne!(recreated.json()["generation"], created["generation"]);
    server
        .post(
            "/outcomes",
            Auth::None,
            &json!({"response_id": ids["incumbent"][1], "value": 1}),
        )
        .assert_error(404, "unknown_response");
    let r = readout(&server, "tone-trial");
    for arm in r["arms"].as_array().unwrap() {
        assert_eq!(arm["requests"], json!(0), "{r}");
        assert_eq!(arm["numeric"]["summary"]["count"], json!(0), "{r}");
    }
    assert_eq!(r["replaced_arms"], json!([]));
}

/// Split definitions, tallies and response records survive a crash: after `kill -9` the readout
/// is the same, an outcome already acknowledged is still there (a second one is refused), and a
/// response served before the crash can still get its outcome.
#[test]
fn experiments_survive_a_crash_of_the_server() {
    let mut server = ServerSetup::encoder().start();
    server.publish("tone-a", &fixtures().join("minilm-qv-a.safetensors"));
    let arms = json!([
        {"name": "incumbent", "adapter": "tone-a", "weight": 1},
        {"name": "plain", "adapter": "base", "weight": 1},
    ]);
    assert_eq!(put_split(&server, "tone-trial", arms).status, 201);
    let ids = responses_by_arm(&server, "tone-trial", "before", &["incumbent", "plain"], 3);
    assert_eq!(post_outcome(&server, &ids["incumbent"][0], json!(4)), 200);
    assert_eq!(post_outcome(&server, &ids["plain"][0], json!(true)), 200);
    let before = readout(&server, "tone-trial");

    server.crash_and_restart();
    assert_eq!(readout(&server, "tone-trial"), before);
    assert_eq!(post_outcome(&server, &ids["incumbent"][0], json!(4)), 409);
    assert_eq!(post_outcome(&server, &ids["incumbent"][1], json!(6)), 200);
    let after = readout(&server, "tone-trial");
    assert_eq!(after["arms"][0]["numeric"]["summary"]["mean"], json!(5.0));
    assert!(
        server.dir().join("store/experiments.sqlite").is_file(),
        "the database lives in the store folder"
    );
}

/// The issue's report: deleting a split left its arms' request series in `/metrics` for ever
/// (`Metrics::forget_split` existed but the delete handler never called it), so label
/// cardinality grew with every split ever made. The series go with the split, also those of an
/// arm an edit renamed, and other splits' series stay.
#[test]
fn deleted_split_left_its_series_in_metrics() {
    let server = ServerSetup::encoder().start();
    let arms = json!([{"name": "first-name", "adapter": "base", "weight": 1}]);
    assert_eq!(put_split(&server, "gone-trial", arms).status, 201);
    responses_by_arm(&server, "gone-trial", "before", &["first-name"], 1);
    let renamed = json!([{"name": "second-name", "adapter": "base", "weight": 1}]);
    assert_eq!(put_split(&server, "gone-trial", renamed).status, 200);
    responses_by_arm(&server, "gone-trial", "after", &["second-name"], 1);
    let kept = json!([{"name": "control", "adapter": "base", "weight": 1}]);
    assert_eq!(put_split(&server, "kept-trial", kept).status, 201);
    responses_by_arm(&server, "kept-trial", "kept", &["control"], 1);

    let series = |page: &str, split: &str| -> Vec<String> {
        page.lines()
            .filter(|l| !l.starts_with('#') && l.contains(&format!("split=\"{split}\"")))
            .map(str::to_owned)
            .collect()
    };
    let page = server.get("/metrics", Auth::Admin);
    assert_eq!(page.status, 200, "{}", page.body);
    let gone = series(&page.body, "gone-trial");
    assert!(
        gone.iter().any(|l| l.contains("arm=\"first-name\""))
            && gone.iter().any(|l| l.contains("arm=\"second-name\"")),
        "both arms' series before the delete: {gone:?}"
    );

    let deleted = server.request("DELETE", "/admin/splits/gone-trial", Auth::Admin, None);
    assert_eq!(deleted.status, 204, "{}", deleted.body);
    let page = server.get("/metrics", Auth::Admin);
    assert_eq!(page.status, 200, "{}", page.body);
    assert_eq!(
        series(&page.body, "gone-trial"),
        Vec::<String>::new(),
        "the deleted split's series are gone"
    );
    assert!(
        !series(&page.body, "kept-trial").is_empty(),
        "another split's series stay:\n{}",
        page.body
    );
}

/// The issue's report: admin bodies took unknown fields silently (`{"arms": [...], "arm": ...}`
/// or an arm's misspelt `wieght` were not refused as inference bodies are). Every admin JSON
/// body now refuses them with 400 `invalid_field` naming the field, and nothing is written.
#[test]
fn admin_body_with_an_unknown_field_was_accepted() {
    let server = ServerSetup::encoder().start();
    let put = |body: Value| {
        server.request(
            "PUT",
            "/admin/splits/typo-trial",
            Auth::Admin,
            Some(("application/json", body.to_string().as_bytes())),
        )
    };
    let arms = json!([{"name": "control", "adapter": "base", "weight": 1}]);
    for (body, field) in [
        (json!({"arms": arms, "rollout": "slow"}), "`rollout`"),
        (
            json!({"arms": [{"name": "control", "adapter": "base", "wieght": 1}]}),
            "`wieght`",
        ),
        (
            json!({"arms": [{"name": "control", "adapter": "base", "weight": 1, "notes": "x"}]}),
            "`notes`",
        ),
    ] {
        let reply = put(body.clone());
        reply.assert_error(400, "invalid_field");
        let message = reply.json()["error"]["message"]
            .as_str()
            .unwrap()
            .to_owned();
        assert!(message.contains(field), "{body}: {message}");
    }
    let missing = put(json!({}));
    missing.assert_error(400, "invalid_field");
    assert!(missing.body.contains("arms"), "{}", missing.body);
    let listed = server.get("/admin/splits", Auth::Admin).ok_json();
    assert_eq!(listed["splits"], json!([]), "nothing was written");
    assert_eq!(put(json!({ "arms": arms })).status, 201);

    server.publish("typo-adapter", &fixtures().join("minilm-qv-a.safetensors"));
    let live = server.request(
        "POST",
        "/admin/adapters/typo-adapter/live",
        Auth::Admin,
        Some((
            "application/json",
            json!({"version": "0000000000000000", "force": true})
                .to_string()
                .as_bytes(),
        )),
    );
    live.assert_error(400, "invalid_field");
    assert!(live.body.contains("`force`"), "{}", live.body);
}

/// The issue's report: split weights that overflow were not refused. Each weight must be finite
/// and at least 0 and their sum finite; a weight JSON cannot hold as a finite number is refused
/// while the body is read. Each refusal is a 400 that says which weight or that the sum is too
/// large, and the server keeps serving.
#[test]
fn split_weights_that_overflow_were_accepted() {
    let server = ServerSetup::encoder().start();
    let put_raw = |body: &str| {
        server.request(
            "PUT",
            "/admin/splits/heavy-trial",
            Auth::Admin,
            Some(("application/json", body.as_bytes())),
        )
    };
    let sum = put_raw(
        r#"{"arms": [{"name": "a", "adapter": "base", "weight": 1e308},
                     {"name": "b", "adapter": "base", "weight": 1e308}]}"#,
    );
    sum.assert_error(400, "invalid_split");
    assert!(sum.body.contains("add up"), "{}", sum.body);
    let negative = put_raw(
        r#"{"arms": [{"name": "a", "adapter": "base", "weight": 1},
                     {"name": "b", "adapter": "base", "weight": -0.5}]}"#,
    );
    negative.assert_error(400, "invalid_split");
    assert!(
        negative.body.contains("arms[1].weight"),
        "{}",
        negative.body
    );
    let infinite = put_raw(r#"{"arms": [{"name": "a", "adapter": "base", "weight": 1e400}]}"#);
    assert_eq!(infinite.status, 400, "{}", infinite.body);
    assert!(infinite.body.contains("out of range"), "{}", infinite.body);
    let listed = server.get("/admin/splits", Auth::Admin).ok_json();
    assert_eq!(listed["splits"], json!([]), "nothing was written");
    // The largest weights whose sum is finite are a valid split, and it serves.
    let huge = put_raw(
        r#"{"arms": [{"name": "a", "adapter": "base", "weight": 8.9e307},
                     {"name": "b", "adapter": "base", "weight": 8.9e307}]}"#,
    );
    assert_eq!(huge.status, 201, "{}", huge.body);
    responses_by_arm(&server, "heavy-trial", "heavy", &["a", "b"], 1);
}
