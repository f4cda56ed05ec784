//! The experiment stores on a real SQLite file and on a real PostgreSQL server (one suite, run
//! against both, each test on a fresh cluster): split edits keep or start arm records by what the
//! arm serves, a deleted and recreated split inherits nothing, everything survives reopening the
//! store, outcomes count days later until their response record is pruned, another tenant's
//! outcome is refused as an unknown one, outcomes and response records written at once through
//! two connections (two replicas) are all counted, and an earlier version's `splits.json` moves
//! in once.

use switchyard_server::experiments::legacy;
use switchyard_server::experiments::{
    ExperimentStore, OutcomeRefused, OutcomeReport, OutcomeValue, PostgresStore, ServedResponse,
    SplitState, SqliteStore,
};
use switchyard_server::splits::{ArmSpec, SplitSpec};
use switchyard_tests::postgres::Postgres;

const DAY_MS: i64 = 24 * 3600 * 1000;
/// A fixed "now", so the tests move time by hand.
const NOW: i64 = 1_800_000_000_000;

fn arm(name: &str, adapter: &str, version: Option<&str>, weight: f64) -> ArmSpec {
    ArmSpec {
        name: name.to_owned(),
        adapter: adapter.to_owned(),
        version: version.map(str::to_owned),
        weight,
        shadow: None,
    }
}

fn spec(name: &str, arms: Vec<ArmSpec>) -> SplitSpec {
    SplitSpec {
        name: name.to_owned(),
        arms,
    }
}

fn open(dir: &tempfile::TempDir) -> SqliteStore {
    SqliteStore::open(&dir.path().join("experiments.sqlite")).unwrap()
}

/// Where a test's store lives: a SQLite file in a folder, or a fresh PostgreSQL cluster.
enum Place {
    Sqlite(tempfile::TempDir),
    Postgres(Postgres),
}

impl Place {
    fn sqlite() -> Self {
        Place::Sqlite(tempfile::tempdir().unwrap())
    }

    fn postgres() -> Self {
        Place::Postgres(Postgres::start())
    }

    /// A new connection to the store (each one is what a replica holds).
    fn open(&self) -> Box<dyn ExperimentStore> {
        match self {
            Place::Sqlite(dir) => Box::new(open(dir)),
            Place::Postgres(pg) => Box::new(PostgresStore::open(&pg.url()).unwrap()),
        }
    }
}

/// `#[test]`s running `body` on SQLite and on PostgreSQL.
macro_rules! on_both {
    ($body:ident, $sqlite:ident, $postgres:ident) => {
        #[test]
        fn $sqlite() {
            $body(&Place::sqlite());
        }

        #[test]
        fn $postgres() {
            $body(&Place::postgres());
        }
    };
}

/// Records that arm `arm` (by position) of `split` answered `id` for `tenant` at `served_ms`.
fn serve(
    store: &dyn ExperimentStore,
    split: &str,
    arm: usize,
    id: &str,
    tenant: &str,
    served_ms: i64,
) {
    let state = store.split(split).unwrap().unwrap();
    store
        .record_responses(
            &[ServedResponse {
                response_id: id.to_owned(),
                generation: state.generation,
                arm_id: state.arms[arm].arm.id,
                tenant: tenant.to_owned(),
                served_ms,
            }],
            &[],
        )
        .unwrap();
}

fn outcome(
    store: &dyn ExperimentStore,
    id: &str,
    tenant: &str,
    value: OutcomeValue,
) -> Result<(String, String), OutcomeRefused> {
    store
        .record_outcome(&OutcomeReport {
            response_id: id.to_owned(),
            tenant: tenant.to_owned(),
            value,
            now_ms: NOW,
        })
        .map(|r| (r.split, r.arm))
}

fn state(store: &dyn ExperimentStore, split: &str) -> SplitState {
    store.split(split).unwrap().unwrap()
}

on_both!(
    split_edits_start_a_new_arm_record_only_when_what_the_arm_serves_changes,
    split_edits_keep_records_on_sqlite,
    split_edits_keep_records_on_postgres
);

fn split_edits_start_a_new_arm_record_only_when_what_the_arm_serves_changes(place: &Place) {
    let store = place.open();
    let first = store
        .put_split(
            &spec(
                "fork-test",
                vec![
                    arm("incumbent", "fork-advice", None, 0.8),
                    arm("candidate", "fork-advice-v2", Some("00000000000000aa"), 0.2),
                ],
            ),
            None,
            NOW,
        )
        .unwrap();
    assert!(first.created);
    serve(&*store, "fork-test", 0, "r-1", "north", NOW);
    serve(&*store, "fork-test", 1, "r-2", "north", NOW);
    serve(&*store, "fork-test", 1, "r-3", "north", NOW);
    assert_eq!(
        outcome(&*store, "r-2", "north", OutcomeValue::Number(4.0)).unwrap(),
        ("fork-test".to_owned(), "candidate".to_owned())
    );

    // Reweighted and reordered: the same two records go on, counts and all.
    let reweighted = store
        .put_split(
            &spec(
                "fork-test",
                vec![
                    arm("candidate", "fork-advice-v2", Some("00000000000000aa"), 0.5),
                    arm("incumbent", "fork-advice", None, 0.5),
                ],
            ),
            None,
            NOW,
        )
        .unwrap();
    assert!(!reweighted.created);
    assert_eq!(reweighted.record.generation, first.record.generation);
    assert_eq!(reweighted.record.arms[0].id, first.record.arms[1].id);
    assert_eq!(reweighted.record.arms[1].id, first.record.arms[0].id);
    let s = state(&*store, "fork-test");
    assert_eq!(
        (s.arms[0].requests, s.arms[0].numeric.count()),
        (2, 1),
        "{s:?}"
    );
    assert_eq!(s.arms[0].arm.spec.weight, 0.5);

    // The candidate now holds another version: a new treatment, a new record.
    let changed = store
        .put_split(
            &spec(
                "fork-test",
                vec![
                    arm("candidate", "fork-advice-v2", Some("00000000000000bb"), 0.5),
                    arm("incumbent", "fork-advice", None, 0.5),
                ],
            ),
            None,
            NOW,
        )
        .unwrap();
    assert_ne!(changed.record.arms[0].id, first.record.arms[1].id);
    let s = state(&*store, "fork-test");
    assert_eq!(s.arms[0].requests, 0, "counts do not carry over: {s:?}");
    assert_eq!(s.arms[0].numeric.count(), 0);
    assert_eq!(s.replaced.len(), 1);
    assert_eq!(
        s.replaced[0].arm.spec.version.as_deref(),
        Some("00000000000000aa")
    );
    assert_eq!(s.replaced[0].requests, 2);

    // r-3 was answered by the old candidate record: its outcome lands there, not on the new one.
    assert_eq!(
        outcome(&*store, "r-3", "north", OutcomeValue::Number(2.0)).unwrap(),
        ("fork-test".to_owned(), "candidate".to_owned())
    );
    let s = state(&*store, "fork-test");
    assert_eq!(s.arms[0].numeric.count(), 0);
    assert_eq!(s.replaced[0].numeric.count(), 2);
    assert_eq!(s.replaced[0].numeric.mean(), Some(3.0));
    // The incumbent never changed and kept its record throughout.
    assert_eq!(s.arms[1].arm.id, first.record.arms[0].id);
    assert_eq!(s.arms[1].requests, 1);

    // Renaming an arm that serves the same thing is a new record as well.
    store
        .put_split(
            &spec(
                "fork-test",
                vec![
                    arm(
                        "challenger",
                        "fork-advice-v2",
                        Some("00000000000000bb"),
                        0.5,
                    ),
                    arm("incumbent", "fork-advice", None, 0.5),
                ],
            ),
            None,
            NOW,
        )
        .unwrap();
    let s = state(&*store, "fork-test");
    assert_ne!(s.arms[0].arm.id, changed.record.arms[0].id);
    assert_eq!(s.replaced.len(), 2);
}

on_both!(
    a_deleted_and_recreated_split_inherits_no_responses,
    a_recreated_split_inherits_nothing_on_sqlite,
    a_recreated_split_inherits_nothing_on_postgres
);

fn a_deleted_and_recreated_split_inherits_no_responses(place: &Place) {
    let store = place.open();
    let definition = spec("gears", vec![arm("only", "base", None, 1.0)]);
    let old = store.put_split(&definition, None, NOW).unwrap();
    serve(&*store, "gears", 0, "r-old", "north", NOW);
    serve(&*store, "gears", 0, "r-old-2", "north", NOW);
    outcome(&*store, "r-old", "north", OutcomeValue::YesNo(true)).unwrap();

    assert!(store.delete_split("gears").unwrap());
    assert!(!store.delete_split("gears").unwrap());
    let new = store.put_split(&definition, None, NOW).unwrap();
    assert!(new.created);
    assert!(new.record.generation > old.record.generation);
    assert_ne!(new.record.arms[0].id, old.record.arms[0].id);
    let s = state(&*store, "gears");
    assert_eq!((s.arms[0].requests, s.arms[0].yes_no.count()), (0, 0));
    assert!(s.replaced.is_empty());
    assert!(matches!(
        outcome(&*store, "r-old-2", "north", OutcomeValue::YesNo(true)),
        Err(OutcomeRefused::UnknownResponse)
    ));
    // A response assigned before the delete but written after it is dropped, not attached to the
    // new split.
    store
        .record_responses(
            &[ServedResponse {
                response_id: "r-late".to_owned(),
                generation: old.record.generation,
                arm_id: old.record.arms[0].id,
                tenant: "north".to_owned(),
                served_ms: NOW,
            }],
            &[],
        )
        .unwrap();
    assert!(matches!(
        outcome(&*store, "r-late", "north", OutcomeValue::YesNo(true)),
        Err(OutcomeRefused::UnknownResponse)
    ));
    assert_eq!(state(&*store, "gears").arms[0].requests, 0);
}

#[test]
fn splits_outcomes_and_response_records_survive_reopening_the_database() {
    let dir = tempfile::tempdir().unwrap();
    let before = {
        let store = open(&dir);
        store
            .put_split(
                &spec(
                    "tone",
                    vec![arm("a", "tone-a", None, 1.0), arm("b", "base", None, 2.0)],
                ),
                None,
                NOW,
            )
            .unwrap();
        for i in 0..6 {
            serve(&store, "tone", i % 2, &format!("r-{i}"), "north", NOW);
        }
        outcome(&store, "r-0", "north", OutcomeValue::Number(1.5)).unwrap();
        outcome(&store, "r-2", "north", OutcomeValue::Number(2.5)).unwrap();
        outcome(&store, "r-1", "north", OutcomeValue::YesNo(false)).unwrap();
        state(&store, "tone")
    };
    let store = open(&dir);
    assert_eq!(state(&store, "tone"), before);
    assert_eq!(store.splits().unwrap(), vec![before]);
    assert!(matches!(
        outcome(&store, "r-0", "north", OutcomeValue::Number(9.0)),
        Err(OutcomeRefused::AlreadyRecorded)
    ));
    outcome(&store, "r-4", "north", OutcomeValue::Number(3.5)).unwrap();
    assert_eq!(state(&store, "tone").arms[0].numeric.mean(), Some(2.5));
}

on_both!(
    outcomes_days_after_the_answer_still_count_until_the_record_is_pruned,
    late_outcomes_count_until_pruned_on_sqlite,
    late_outcomes_count_until_pruned_on_postgres
);

fn outcomes_days_after_the_answer_still_count_until_the_record_is_pruned(place: &Place) {
    let store = place.open();
    store
        .put_split(
            &spec("late", vec![arm("only", "base", None, 1.0)]),
            None,
            NOW,
        )
        .unwrap();
    serve(&*store, "late", 0, "r-10-days", "north", NOW - 10 * DAY_MS);
    serve(&*store, "late", 0, "r-40-days", "north", NOW - 40 * DAY_MS);
    serve(&*store, "late", 0, "r-2-days", "north", NOW - 2 * DAY_MS);
    // Kept for 30 days: only the 40-day-old record goes.
    assert_eq!(store.prune_responses(NOW - 30 * DAY_MS).unwrap(), 1);
    outcome(&*store, "r-10-days", "north", OutcomeValue::YesNo(true)).unwrap();
    assert!(matches!(
        outcome(&*store, "r-40-days", "north", OutcomeValue::YesNo(true)),
        Err(OutcomeRefused::UnknownResponse)
    ));
    // Pruning a record keeps the outcomes already in the tally.
    assert_eq!(store.prune_responses(NOW - DAY_MS).unwrap(), 2);
    let s = state(&*store, "late");
    assert_eq!((s.arms[0].requests, s.arms[0].yes_no.count()), (3, 1));
    assert!(matches!(
        outcome(&*store, "r-2-days", "north", OutcomeValue::YesNo(true)),
        Err(OutcomeRefused::UnknownResponse)
    ));
}

on_both!(
    another_tenants_outcome_is_refused_as_an_unknown_response,
    another_tenants_outcome_is_refused_on_sqlite,
    another_tenants_outcome_is_refused_on_postgres
);

fn another_tenants_outcome_is_refused_as_an_unknown_response(place: &Place) {
    let store = place.open();
    store
        .put_split(
            &spec("shared", vec![arm("only", "base", None, 1.0)]),
            None,
            NOW,
        )
        .unwrap();
    serve(&*store, "shared", 0, "r-north", "north", NOW);
    assert!(matches!(
        outcome(&*store, "r-north", "south", OutcomeValue::Number(1.0)),
        Err(OutcomeRefused::UnknownResponse)
    ));
    assert!(matches!(
        outcome(&*store, "r-nobody", "south", OutcomeValue::Number(1.0)),
        Err(OutcomeRefused::UnknownResponse)
    ));
    outcome(&*store, "r-north", "north", OutcomeValue::Number(1.0)).unwrap();
    // A value beyond the bound is refused and uses nothing up.
    serve(&*store, "shared", 0, "r-big", "north", NOW);
    assert!(matches!(
        outcome(&*store, "r-big", "north", OutcomeValue::Number(2e15)),
        Err(OutcomeRefused::Invalid(_))
    ));
    outcome(&*store, "r-big", "north", OutcomeValue::Number(2.0)).unwrap();
    assert_eq!(state(&*store, "shared").arms[0].numeric.count(), 2);
}

on_both!(
    concurrent_outcomes_and_response_records_are_all_counted,
    concurrent_writes_all_count_on_sqlite,
    concurrent_writes_all_count_on_postgres
);

/// Four threads over two connections (two replicas on one store).
fn concurrent_outcomes_and_response_records_are_all_counted(place: &Place) {
    let stores = [place.open(), place.open()];
    let store = stores[0].as_ref();
    store
        .put_split(
            &spec(
                "busy",
                vec![arm("a", "base", None, 1.0), arm("b", "base-b", None, 1.0)],
            ),
            None,
            NOW,
        )
        .unwrap();
    let s = state(store, "busy");
    std::thread::scope(|scope| {
        for t in 0..4 {
            let (store, s) = (stores[t % 2].as_ref(), &s);
            scope.spawn(move || {
                for i in 0..50 {
                    let arm = &s.arms[i % 2].arm;
                    let id = format!("r-{t}-{i}");
                    store
                        .record_responses(
                            &[ServedResponse {
                                response_id: id.clone(),
                                generation: s.generation,
                                arm_id: arm.id,
                                tenant: "north".to_owned(),
                                served_ms: NOW,
                            }],
                            &[],
                        )
                        .unwrap();
                    outcome(store, &id, "north", OutcomeValue::Number(i as f64)).unwrap();
                }
            });
        }
    });
    let s = state(store, "busy");
    for (index, line) in s.arms.iter().enumerate() {
        assert_eq!(line.requests, 100, "arm {index}");
        assert_eq!(line.numeric.count(), 100, "arm {index}");
        // Each thread posted i = index, index + 2, ..., 48 + index: mean 24 + index (to
        // rounding, since the order of the updates varies).
        let mean = line.numeric.mean().unwrap();
        assert!(
            (mean - (24.0 + index as f64)).abs() < 1e-12,
            "arm {index}: {mean}"
        );
    }
}

#[test]
fn an_earlier_versions_splits_json_is_moved_in_once() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join(legacy::LEGACY_FILE),
        r#"[{"name": "fork-test", "arms": [
            {"name": "incumbent", "adapter": "fork-advice", "weight": 0.8},
            {"name": "candidate", "adapter": "base", "weight": 0.2}
        ]}]"#,
    )
    .unwrap();
    let store = open(&dir);
    assert_eq!(legacy::migrate(dir.path(), &store).unwrap(), 1);
    assert!(!dir.path().join(legacy::LEGACY_FILE).exists());
    assert!(dir.path().join(legacy::MIGRATED_FILE).is_file());
    let s = state(&store, "fork-test");
    assert_eq!(s.arms.len(), 2);
    assert_eq!(s.arms[0].arm.spec.weight, 0.8);
    // Read once: a second start finds nothing to move.
    assert_eq!(legacy::migrate(dir.path(), &store).unwrap(), 0);
    // Found again after a crash between writing and renaming: the split already there is kept.
    std::fs::rename(
        dir.path().join(legacy::MIGRATED_FILE),
        dir.path().join(legacy::LEGACY_FILE),
    )
    .unwrap();
    store
        .put_split(
            &spec(
                "fork-test",
                vec![arm("incumbent", "fork-advice", None, 1.0)],
            ),
            None,
            NOW,
        )
        .unwrap();
    assert_eq!(legacy::migrate(dir.path(), &store).unwrap(), 0);
    assert_eq!(state(&store, "fork-test").arms.len(), 1);
}

#[test]
fn the_database_keeps_a_write_ahead_log_that_another_connection_reads() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("experiments.sqlite");
    let store = SqliteStore::open(&path).unwrap();
    store
        .put_split(
            &spec("wal", vec![arm("only", "base", None, 1.0)]),
            None,
            NOW,
        )
        .unwrap();
    // Read with a connection of its own, as another process would.
    let conn = rusqlite::Connection::open(&path).unwrap();
    let mode: String = conn
        .query_row("PRAGMA journal_mode", [], |r| r.get(0))
        .unwrap();
    assert_eq!(mode, "wal");
    assert!(dir.path().join("experiments.sqlite-wal").exists());
    let names: i64 = conn
        .query_row("SELECT count(*) FROM splits WHERE name = 'wal'", [], |r| {
            r.get(0)
        })
        .unwrap();
    assert_eq!(names, 1, "a commit is visible to another connection");
}

/// The fuzz-found bug `split_weight_moved_by_one_ulp_when_saved_and_read_back` (a weight that
/// changed across a restart) for the store that now keeps splits: weights read from a client's
/// JSON, written to the database and read back by a new connection after a reopen are the same
/// f64s bit for bit, so every subject keeps its arm. -0.0, which SQLite may keep as the integer
/// 0, reads back as a weight equal to it.
#[test]
fn split_weight_moved_by_one_ulp_when_saved_and_read_back_from_the_store() {
    let body = r#"[
        {"name": "incumbent", "adapter": "fork-advice", "weight": 111111110111111151115.1},
        {"name": "control", "adapter": "base", "weight": 5},
        {"name": "tiny", "adapter": "base", "weight": 4.9406564584124654e-324},
        {"name": "third", "adapter": "base", "weight": 0.30000000000000004},
        {"name": "nothing", "adapter": "base", "weight": -0.0}
    ]"#;
    let arms: Vec<ArmSpec> = serde_json::from_str(body).unwrap();
    let written = switchyard_server::splits::Split::new(spec("fork", arms)).unwrap();
    let dir = tempfile::tempdir().unwrap();
    open(&dir).put_split(written.spec(), None, NOW).unwrap();
    let read = open(&dir)
        .split("fork")
        .unwrap()
        .unwrap()
        .record()
        .split()
        .unwrap();
    for (w, r) in written.arms().iter().zip(read.arms()) {
        assert!(
            w.weight.to_bits() == r.weight.to_bits() || (w.weight == 0.0 && r.weight == 0.0),
            "{}: {} written, {} read",
            w.name,
            w.weight,
            r.weight
        );
    }
    assert_eq!(read, written);
    for i in 0..500 {
        let subject = format!("rider-{i}");
        assert_eq!(
            read.assign_subject(&subject).index,
            written.assign_subject(&subject).index
        );
    }
}

on_both!(
    rollouts_act_once_keep_their_history_and_tally_how_requests_ended,
    rollouts_on_sqlite,
    rollouts_on_postgres
);

/// A rollout policy is kept with its split; a change is written only over the state it was
/// decided on, so of two replicas acting on one reading exactly one acts; the history, the
/// weights and the finished/error/latency tallies survive reopening; a PUT with the same policy
/// keeps the progress, one without removes it.
fn rollouts_act_once_keep_their_history_and_tally_how_requests_ended(place: &Place) {
    use switchyard_server::experiments::FinishedRequest;
    use switchyard_server::splits::rollout::{
        Actor, Rollout, RolloutAction, RolloutEvent, RolloutPolicy, RolloutStatus,
    };
    let policy: RolloutPolicy = serde_json::from_value(serde_json::json!({
        "candidate": "candidate",
        "min_requests": 10,
        "guards": {"error_rate": 0.02},
        "steps": [0.5],
    }))
    .unwrap();
    let definition = spec(
        "gears",
        vec![
            arm("incumbent", "gears", Some("00000000000000aa"), 0.9),
            arm("candidate", "gears", Some("00000000000000bb"), 0.1),
        ],
    );
    let (a, b) = (place.open(), place.open());
    a.put_split(&definition, Some(&policy), NOW).unwrap();
    let read = state(&*a, "gears");
    let rollout = read.rollout.clone().expect("the policy is kept");
    assert_eq!(rollout.state.status, RolloutStatus::Watching);
    assert_eq!(read.events.len(), 1);
    assert_eq!(read.events[0].action, RolloutAction::Started);
    assert!((read.events[0].candidate_share - 0.1).abs() < 1e-12);

    // How requests ended, from two replicas.
    let ids = (read.arms[0].arm.id, read.arms[1].arm.id);
    let ended = |arm_id: i64, failed: bool, latency_ms: f64| FinishedRequest {
        arm_id,
        failed,
        latency_ms,
    };
    a.record_responses(&[], &[ended(ids.1, true, 12.0), ended(ids.1, false, 30.0)])
        .unwrap();
    b.record_responses(&[], &[ended(ids.1, false, 31.0), ended(ids.0, false, 5.0)])
        .unwrap();
    let read = state(&*b, "gears");
    let cand = &read.arms[1].health;
    assert_eq!((cand.finished, cand.errors), (3, 1));
    assert_eq!(cand.latency.count(), 3);
    assert!(cand.latency.quantile(0.99).unwrap() >= 31.0);
    assert_eq!(read.arms[0].health.finished, 1);

    // Both replicas decide on the same reading; only the first change is written.
    let mut promoted = rollout.clone();
    promoted.state.step = 1;
    promoted.state.revision += 1;
    let event = |action| RolloutEvent {
        at_ms: NOW + 1,
        action,
        by: Actor::Policy,
        candidate_share: 0.5,
        reason: "test".into(),
    };
    let wrote_a = a
        .change_rollout(
            "gears",
            read.generation,
            &rollout,
            &promoted,
            Some(&[0.5, 0.5]),
            &event(RolloutAction::Promoted),
        )
        .unwrap();
    let mut rolled: Rollout = rollout.clone();
    rolled.state.status = RolloutStatus::RolledBack;
    rolled.state.revision += 1;
    let wrote_b = b
        .change_rollout(
            "gears",
            read.generation,
            &rollout,
            &rolled,
            Some(&[1.0, 0.0]),
            &event(RolloutAction::RolledBack),
        )
        .unwrap();
    assert_eq!((wrote_a, wrote_b), (true, false));
    // A stale generation never matches either.
    assert!(
        !a.change_rollout(
            "gears",
            read.generation + 1000,
            &promoted,
            &rolled,
            None,
            &event(RolloutAction::RolledBack)
        )
        .unwrap()
    );

    drop((a, b));
    let reopened = place.open();
    let read = state(&*reopened, "gears");
    assert_eq!(read.rollout.as_ref().unwrap(), &promoted);
    assert_eq!(
        read.events.iter().map(|e| e.action).collect::<Vec<_>>(),
        vec![RolloutAction::Started, RolloutAction::Promoted]
    );
    assert_eq!(
        read.arms
            .iter()
            .map(|a| a.arm.spec.weight)
            .collect::<Vec<_>>(),
        vec![0.5, 0.5]
    );
    assert_eq!(read.arms[1].health.errors, 1, "tallies kept");

    // The same policy again keeps the progress; none removes it; a new one starts afresh.
    let edited = spec(
        "gears",
        read.arms.iter().map(|a| a.arm.spec.clone()).collect(),
    );
    reopened.put_split(&edited, Some(&policy), NOW + 2).unwrap();
    assert_eq!(state(&*reopened, "gears").rollout.unwrap(), promoted);
    // The same policy over a candidate that now serves another version starts afresh, with a
    // later revision, so a decision taken on the old state can no longer be written.
    let mut other_version = edited.clone();
    other_version.arms[1].version = Some("00000000000000cc".into());
    reopened
        .put_split(&other_version, Some(&policy), NOW + 2)
        .unwrap();
    let restarted = state(&*reopened, "gears").rollout.unwrap();
    assert_eq!(restarted.state.step, 0);
    assert!(restarted.state.revision > promoted.state.revision);
    assert!(
        !reopened
            .change_rollout(
                "gears",
                read.generation,
                &promoted,
                &rolled,
                None,
                &event(RolloutAction::RolledBack)
            )
            .unwrap()
    );
    reopened.put_split(&edited, Some(&policy), NOW + 2).unwrap();
    reopened.put_split(&edited, None, NOW + 3).unwrap();
    assert!(state(&*reopened, "gears").rollout.is_none());
    let mut other = policy.clone();
    other.min_requests = 20;
    reopened.put_split(&edited, Some(&other), NOW + 4).unwrap();
    let read = state(&*reopened, "gears");
    assert_eq!(read.rollout.unwrap().state.step, 0);
    assert_eq!(read.events.last().unwrap().action, RolloutAction::Started);

    // Deleting the split takes its history and latency rows with it.
    assert!(reopened.delete_split("gears").unwrap());
    reopened.put_split(&definition, None, NOW + 5).unwrap();
    let read = state(&*reopened, "gears");
    assert!(read.events.is_empty() && read.arms[1].health.latency.count() == 0);
}

/// A database written by the version before rollouts (schema 1) is upgraded in place: its
/// splits, arm records and outcomes are kept, and rollouts work on it.
#[test]
fn a_version_one_sqlite_file_is_upgraded_in_place() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("experiments.sqlite");
    {
        // The version-1 schema, as that version created it, with one split and one outcome.
        let conn = rusqlite::Connection::open(&path).unwrap();
        conn.execute_batch(
            "CREATE TABLE splits (generation INTEGER PRIMARY KEY AUTOINCREMENT, name TEXT NOT NULL UNIQUE, created_ms INTEGER NOT NULL, updated_ms INTEGER NOT NULL);
             CREATE TABLE arms (id INTEGER PRIMARY KEY AUTOINCREMENT, generation INTEGER NOT NULL REFERENCES splits (generation), position INTEGER, name TEXT NOT NULL, adapter TEXT NOT NULL, version TEXT, weight REAL NOT NULL, requests INTEGER NOT NULL DEFAULT 0, numeric_count INTEGER NOT NULL DEFAULT 0, numeric_shift REAL NOT NULL DEFAULT 0, numeric_mean REAL NOT NULL DEFAULT 0, numeric_m2 REAL NOT NULL DEFAULT 0, yes_no_count INTEGER NOT NULL DEFAULT 0, yes_no_yes INTEGER NOT NULL DEFAULT 0, UNIQUE (generation, position));
             CREATE INDEX arms_by_generation ON arms (generation);
             CREATE TABLE responses (id TEXT NOT NULL PRIMARY KEY, generation INTEGER NOT NULL, arm_id INTEGER NOT NULL, tenant TEXT NOT NULL, served_ms INTEGER NOT NULL, outcome_number REAL, outcome_yes_no INTEGER, outcome_ms INTEGER);
             INSERT INTO splits (name, created_ms, updated_ms) VALUES ('old', 1, 1);
             INSERT INTO arms (generation, position, name, adapter, version, weight, requests, yes_no_count, yes_no_yes) VALUES (1, 0, 'only', 'base', NULL, 1.0, 7, 5, 4);
             PRAGMA user_version = 1;",
        )
        .unwrap();
    }
    let store = SqliteStore::open(&path).unwrap();
    let read = state(&store, "old");
    assert_eq!(read.arms[0].requests, 7);
    assert_eq!(read.arms[0].yes_no.successes(), 4);
    assert!(read.rollout.is_none() && read.arms[0].health.finished == 0);
    let version: i64 = rusqlite::Connection::open(&path)
        .unwrap()
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .unwrap();
    assert_eq!(version, 2);
}
