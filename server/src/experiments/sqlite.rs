//! The default [`ExperimentStore`]: one SQLite file, by default `experiments.sqlite` in the
//! adapter store's folder.
//!
//! Durability: the journal is a write-ahead log (`journal_mode = WAL`) with `synchronous = FULL`,
//! so every commit syncs the log to disk before it returns: a transaction that returned survives
//! a crash of the process and of the machine. Writes go through one connection under a lock
//! (SQLite has one writer at a time anyway) and take the write lock when they begin
//! (`BEGIN IMMEDIATE`), so a read-check-write such as an outcome never races another writer;
//! reads go through a second connection, which the log lets run beside a write.
//!
//! Schema (version 2, kept in `PRAGMA user_version`; a version-1 file is upgraded in place):
//!
//! ```text
//! splits          generation (never reused: AUTOINCREMENT), name (unique), created_ms,
//!                 updated_ms, rollout (JSON: policy and progress; NULL without one; v2)
//! arms            id (never reused), generation, position (NULL once an edit replaced the
//!                 record), name, adapter, version, weight, requests, the numeric tally (count,
//!                 shift, mean, m2), the yes/no tally (count, yes), finished, errors and the
//!                 shadow share (v2)
//! responses       id, generation, arm_id, tenant, served_ms, the outcome (number or yes/no)
//!                 and when it came (outcome_ms, NULL until then)
//! arm_latency     arm_id, bucket, n: the latency histogram of each arm record (v2)
//! rollout_events  id, generation, at_ms, body (JSON): a rollout's history (v2)
//! ```

use std::path::{Path, PathBuf};
use std::time::Duration;

use rusqlite::{Connection, OptionalExtension, Transaction, TransactionBehavior, params};

use crate::splits::rollout::{
    Actor, ArmHealth, Rollout, RolloutAction, RolloutEvent, RolloutPolicy, RolloutState,
};
use crate::splits::{ArmSpec, BinaryTally, NumericParts, NumericTally, SplitSpec};
use crate::sync::Mutex;

use super::arms::plan_arms;
use super::records::{
    ArmRecord, ArmTally, EVENTS_KEPT_IN_STATE, FinishedRequest, OutcomeRefused, OutcomeReport,
    OutcomeValue, PutSplit, RecordedOutcome, ServedResponse, SplitRecord, SplitState,
};
use super::{ExperimentError, ExperimentStore};

/// The schema version this code writes and reads.
const SCHEMA_VERSION: i64 = 2;

const SCHEMA: &str = "
CREATE TABLE splits (
    generation INTEGER PRIMARY KEY AUTOINCREMENT,
    name TEXT NOT NULL UNIQUE,
    created_ms INTEGER NOT NULL,
    updated_ms INTEGER NOT NULL,
    rollout TEXT
);
CREATE TABLE arms (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    generation INTEGER NOT NULL REFERENCES splits (generation),
    position INTEGER,
    name TEXT NOT NULL,
    adapter TEXT NOT NULL,
    version TEXT,
    weight REAL NOT NULL,
    requests INTEGER NOT NULL DEFAULT 0,
    numeric_count INTEGER NOT NULL DEFAULT 0,
    numeric_shift REAL NOT NULL DEFAULT 0,
    numeric_mean REAL NOT NULL DEFAULT 0,
    numeric_m2 REAL NOT NULL DEFAULT 0,
    yes_no_count INTEGER NOT NULL DEFAULT 0,
    yes_no_yes INTEGER NOT NULL DEFAULT 0,
    finished INTEGER NOT NULL DEFAULT 0,
    errors INTEGER NOT NULL DEFAULT 0,
    shadow REAL,
    UNIQUE (generation, position)
);
CREATE INDEX arms_by_generation ON arms (generation);
CREATE TABLE responses (
    id TEXT NOT NULL PRIMARY KEY,
    generation INTEGER NOT NULL,
    arm_id INTEGER NOT NULL,
    tenant TEXT NOT NULL,
    served_ms INTEGER NOT NULL,
    outcome_number REAL,
    outcome_yes_no INTEGER,
    outcome_ms INTEGER
);
CREATE INDEX responses_by_served ON responses (served_ms);
CREATE INDEX responses_by_generation ON responses (generation);
";

/// What version 2 added to version 1.
const V2_UPGRADE: &str = "
ALTER TABLE splits ADD COLUMN rollout TEXT;
ALTER TABLE arms ADD COLUMN finished INTEGER NOT NULL DEFAULT 0;
ALTER TABLE arms ADD COLUMN errors INTEGER NOT NULL DEFAULT 0;
ALTER TABLE arms ADD COLUMN shadow REAL;
";

/// The tables version 2 added.
const V2_TABLES: &str = "
CREATE TABLE arm_latency (
    arm_id INTEGER NOT NULL,
    bucket INTEGER NOT NULL,
    n INTEGER NOT NULL,
    PRIMARY KEY (arm_id, bucket)
);
CREATE TABLE rollout_events (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    generation INTEGER NOT NULL,
    at_ms INTEGER NOT NULL,
    body TEXT NOT NULL
);
CREATE INDEX rollout_events_by_generation ON rollout_events (generation);
";

/// How many response records one pruning transaction deletes, so that pruning never holds the
/// write lock for long.
const PRUNE_CHUNK: i64 = 5_000;

/// Experiments in one SQLite file.
pub struct SqliteStore {
    path: PathBuf,
    writer: Mutex<Connection>,
    reader: Mutex<Connection>,
}

impl std::fmt::Debug for SqliteStore {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SqliteStore")
            .field("path", &self.path)
            .finish()
    }
}

fn db(action: &'static str) -> impl FnOnce(rusqlite::Error) -> ExperimentError {
    move |e| ExperimentError::Database {
        action,
        message: e.to_string(),
    }
}

impl SqliteStore {
    /// Opens the database at `path`, creating the file and its schema when missing.
    pub fn open(path: &Path) -> Result<Self, ExperimentError> {
        let mut writer = connect(path)?;
        migrate(&mut writer, path)?;
        let reader = connect(path)?;
        Ok(Self {
            path: path.to_owned(),
            writer: Mutex::new(writer),
            reader: Mutex::new(reader),
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }
}

fn connect(path: &Path) -> Result<Connection, ExperimentError> {
    let conn = Connection::open(path).map_err(|e| ExperimentError::Database {
        action: "opening the database",
        message: format!("{}: {e}", path.display()),
    })?;
    conn.busy_timeout(Duration::from_secs(30))
        .map_err(db("setting the busy timeout"))?;
    let mode: String = conn
        .query_row("PRAGMA journal_mode = WAL", [], |r| r.get(0))
        .map_err(db("turning on the write-ahead log"))?;
    if !mode.eq_ignore_ascii_case("wal") {
        return Err(ExperimentError::Database {
            action: "turning on the write-ahead log",
            message: format!("{}: the journal mode stayed {mode:?}", path.display()),
        });
    }
    conn.execute_batch("PRAGMA synchronous = FULL; PRAGMA foreign_keys = ON;")
        .map_err(db("setting synchronous = FULL"))?;
    Ok(conn)
}

fn migrate(conn: &mut Connection, path: &Path) -> Result<(), ExperimentError> {
    // Under the write lock, so that two processes opening a new file at once create the schema
    // once: the second finds the version the first wrote.
    let tx = begin(conn)?;
    let version: i64 = tx
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .map_err(db("reading the schema version"))?;
    match version {
        0 => {
            tx.execute_batch(&format!(
                "{SCHEMA} {V2_TABLES} PRAGMA user_version = {SCHEMA_VERSION};"
            ))
            .map_err(db("creating the schema"))?;
            tx.commit().map_err(db("creating the schema"))
        }
        1 => {
            tx.execute_batch(&format!(
                "{V2_UPGRADE} {V2_TABLES} PRAGMA user_version = {SCHEMA_VERSION};"
            ))
            .map_err(db("upgrading the schema to version 2"))?;
            tx.commit()
                .map_err(db("upgrading the schema to version 2"))?;
            tracing::info!(path = %path.display(), "experiment database upgraded to schema version 2 (rollouts)");
            Ok(())
        }
        SCHEMA_VERSION => Ok(()),
        other => Err(ExperimentError::Corrupt(format!(
            "{} has schema version {other}; this switchyard reads version {SCHEMA_VERSION} (a newer switchyard wrote it)",
            path.display()
        ))),
    }
}

fn begin(conn: &mut Connection) -> Result<Transaction<'_>, ExperimentError> {
    conn.transaction_with_behavior(TransactionBehavior::Immediate)
        .map_err(db("beginning a transaction"))
}

fn count(n: i64) -> u64 {
    u64::try_from(n).unwrap_or(0)
}

fn stored_count(n: u64) -> i64 {
    i64::try_from(n).unwrap_or(i64::MAX)
}

/// The columns [`arm_tally`] reads, in its order.
const ARM_COLUMNS: &str = "id, name, adapter, version, weight, requests, numeric_count, \
     numeric_shift, numeric_mean, numeric_m2, yes_no_count, yes_no_yes, position, finished, errors, shadow";

/// One `arms` row selected with [`ARM_COLUMNS`], and whether it is current.
fn arm_tally(row: &rusqlite::Row<'_>) -> rusqlite::Result<(ArmTally, bool, i64, i64)> {
    let tally = ArmTally {
        arm: ArmRecord {
            id: row.get(0)?,
            spec: ArmSpec {
                name: row.get(1)?,
                adapter: row.get(2)?,
                version: row.get(3)?,
                weight: row.get(4)?,
                shadow: row.get(15)?,
            },
        },
        requests: count(row.get(5)?),
        numeric: NumericTally::from_parts(NumericParts {
            count: count(row.get(6)?),
            shift: row.get(7)?,
            shifted_mean: row.get(8)?,
            squared_deviations: row.get(9)?,
        }),
        yes_no: BinaryTally::new(),
        health: ArmHealth {
            finished: count(row.get(13)?),
            errors: count(row.get(14)?),
            ..ArmHealth::default()
        },
    };
    let position: Option<i64> = row.get(12)?;
    Ok((tally, position.is_some(), row.get(10)?, row.get(11)?))
}

/// The split named `name` with the tallies of all its arm records.
fn load_state(
    conn: &Connection,
    generation: i64,
    name: String,
) -> Result<SplitState, ExperimentError> {
    let mut statement = conn
        .prepare_cached(&format!(
            "SELECT {ARM_COLUMNS} FROM arms WHERE generation = ?1 \
             ORDER BY position IS NULL, position, id"
        ))
        .map_err(db("reading arms"))?;
    let rows = statement
        .query_map([generation], arm_tally)
        .map_err(db("reading arms"))?;
    let mut state = SplitState {
        generation,
        name,
        arms: Vec::new(),
        replaced: Vec::new(),
        rollout: None,
        events: Vec::new(),
    };
    let mut latency: std::collections::HashMap<i64, Vec<(u16, u64)>> = Default::default();
    {
        let mut buckets = conn
            .prepare_cached(
                "SELECT l.arm_id, l.bucket, l.n FROM arm_latency l JOIN arms a ON a.id = l.arm_id \
                 WHERE a.generation = ?1",
            )
            .map_err(db("reading latencies"))?;
        let rows = buckets
            .query_map([generation], |r| {
                Ok((
                    r.get::<_, i64>(0)?,
                    r.get::<_, i64>(1)?,
                    r.get::<_, i64>(2)?,
                ))
            })
            .map_err(db("reading latencies"))?;
        for row in rows {
            let (arm, bucket, n) = row.map_err(db("reading latencies"))?;
            latency
                .entry(arm)
                .or_default()
                .push((u16::try_from(bucket).unwrap_or(u16::MAX), count(n)));
        }
    }
    for row in rows {
        let (mut tally, current, yes_no_count, yes_no_yes) = row.map_err(db("reading arms"))?;
        tally.yes_no = BinaryTally::from_counts(count(yes_no_count), count(yes_no_yes))
            .map_err(|e| ExperimentError::Corrupt(format!("arm record {}: {e}", tally.arm.id)))?;
        for (bucket, n) in latency.remove(&tally.arm.id).unwrap_or_default() {
            tally.health.latency.add(bucket, n);
        }
        if current {
            state.arms.push(tally);
        } else {
            state.replaced.push(tally);
        }
    }
    let rollout: Option<String> = conn
        .query_row(
            "SELECT rollout FROM splits WHERE generation = ?1",
            [generation],
            |r| r.get(0),
        )
        .optional()
        .map_err(db("reading a rollout"))?
        .flatten();
    state.rollout = rollout.as_deref().map(parse_rollout).transpose()?;
    let mut events = conn
        .prepare_cached(
            "SELECT body FROM rollout_events WHERE generation = ?1 ORDER BY id DESC LIMIT ?2",
        )
        .map_err(db("reading a rollout's history"))?;
    let bodies = events
        .query_map(params![generation, EVENTS_KEPT_IN_STATE as i64], |r| {
            r.get::<_, String>(0)
        })
        .map_err(db("reading a rollout's history"))?;
    for body in bodies {
        let body = body.map_err(db("reading a rollout's history"))?;
        state.events.push(
            serde_json::from_str(&body)
                .map_err(|e| ExperimentError::Corrupt(format!("a rollout event: {e}")))?,
        );
    }
    state.events.reverse();
    Ok(state)
}

fn parse_rollout(text: &str) -> Result<Rollout, ExperimentError> {
    serde_json::from_str(text)
        .map_err(|e| ExperimentError::Corrupt(format!("a split's rollout: {e}")))
}

fn rollout_text(rollout: &Rollout) -> String {
    serde_json::to_string(rollout).expect("a rollout serialises")
}

fn event_text(event: &RolloutEvent) -> String {
    serde_json::to_string(event).expect("a rollout event serialises")
}

/// What `put_split` writes in the rollout column for `policy`, given what is there: the same
/// policy over the same arm records (`arms_kept`) keeps its progress; a new policy, or the same
/// one over an arm that now serves something else, starts afresh and is returned as started.
/// A restart still counts up the revision, so a decision taken on the old state never matches
/// the new one.
pub(super) fn next_rollout(
    stored: Option<Rollout>,
    policy: Option<&RolloutPolicy>,
    arms_kept: bool,
) -> (Option<Rollout>, bool) {
    match (stored, policy) {
        (_, None) => (None, false),
        (Some(old), Some(p)) if old.policy == *p && arms_kept => (Some(old), false),
        (old, Some(p)) => {
            let mut state = RolloutState::start();
            state.revision = old.map_or(0, |o| o.state.revision + 1);
            (
                Some(Rollout {
                    policy: p.clone(),
                    state,
                }),
                true,
            )
        }
    }
}

/// The history entry of a policy set by an operator.
pub(super) fn started_event(spec: &SplitSpec, policy: &RolloutPolicy, now_ms: i64) -> RolloutEvent {
    let total: f64 = spec.arms.iter().map(|a| a.weight).sum();
    let share = spec
        .arms
        .iter()
        .find(|a| a.name == policy.candidate)
        .map(|a| if total > 0.0 { a.weight / total } else { 0.0 })
        .unwrap_or(0.0);
    RolloutEvent {
        at_ms: now_ms,
        action: RolloutAction::Started,
        by: Actor::Operator,
        candidate_share: share,
        reason: "rollout policy set".into(),
    }
}

/// Finished requests and failures per arm record.
pub(super) type FinishedPerArm = std::collections::BTreeMap<i64, (u64, u64)>;
/// Finished requests per (arm record, latency bucket).
pub(super) type FinishedPerBucket = std::collections::BTreeMap<(i64, u16), u64>;

/// Adds up finished requests per arm record and per (arm record, latency bucket).
pub(super) fn sum_finished(finished: &[FinishedRequest]) -> (FinishedPerArm, FinishedPerBucket) {
    let mut per_arm = FinishedPerArm::new();
    let mut per_bucket = FinishedPerBucket::new();
    for f in finished {
        let slot = per_arm.entry(f.arm_id).or_default();
        slot.0 += 1;
        slot.1 += u64::from(f.failed);
        *per_bucket
            .entry((
                f.arm_id,
                crate::splits::rollout::LatencyHistogram::bucket_of(f.latency_ms),
            ))
            .or_default() += 1;
    }
    (per_arm, per_bucket)
}

/// The current arm records of a split.
fn current_arms(tx: &Transaction<'_>, generation: i64) -> Result<Vec<ArmRecord>, ExperimentError> {
    let mut statement = tx
        .prepare_cached(
            "SELECT id, name, adapter, version, weight, shadow FROM arms \
             WHERE generation = ?1 AND position IS NOT NULL ORDER BY position",
        )
        .map_err(db("reading arms"))?;
    let rows = statement
        .query_map([generation], |row| {
            Ok(ArmRecord {
                id: row.get(0)?,
                spec: ArmSpec {
                    name: row.get(1)?,
                    adapter: row.get(2)?,
                    version: row.get(3)?,
                    weight: row.get(4)?,
                    shadow: row.get(5)?,
                },
            })
        })
        .map_err(db("reading arms"))?;
    rows.collect::<Result<_, _>>().map_err(db("reading arms"))
}

/// Adds `value` to the tally of arm record `arm_id`, whose numeric tally reads `parts`, inside
/// `tx` (`action` names the write in an error).
fn add_to_arm(
    tx: &Transaction<'_>,
    arm_id: i64,
    parts: NumericParts,
    value: OutcomeValue,
    action: &'static str,
) -> Result<(), OutcomeRefused> {
    match value {
        OutcomeValue::Number(x) => {
            let mut tally = NumericTally::from_parts(parts);
            tally.record(x)?;
            let p = tally.parts();
            tx.execute(
                "UPDATE arms SET numeric_count = ?2, numeric_shift = ?3, numeric_mean = ?4, \
                 numeric_m2 = ?5 WHERE id = ?1",
                params![
                    arm_id,
                    stored_count(p.count),
                    p.shift,
                    p.shifted_mean,
                    p.squared_deviations
                ],
            )
            .map_err(db(action))?;
        }
        OutcomeValue::YesNo(yes) => {
            tx.execute(
                "UPDATE arms SET yes_no_count = yes_no_count + 1, \
                 yes_no_yes = yes_no_yes + ?2 WHERE id = ?1",
                params![arm_id, i64::from(yes)],
            )
            .map_err(db(action))?;
        }
    }
    Ok(())
}

impl ExperimentStore for SqliteStore {
    fn splits(&self) -> Result<Vec<SplitState>, ExperimentError> {
        let conn = self.reader.lock();
        let names: Vec<(i64, String)> = {
            let mut statement = conn
                .prepare_cached("SELECT generation, name FROM splits ORDER BY name")
                .map_err(db("listing splits"))?;
            let rows = statement
                .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
                .map_err(db("listing splits"))?;
            rows.collect::<Result<_, _>>()
                .map_err(db("listing splits"))?
        };
        names
            .into_iter()
            .map(|(generation, name)| load_state(&conn, generation, name))
            .collect()
    }

    fn split(&self, name: &str) -> Result<Option<SplitState>, ExperimentError> {
        let conn = self.reader.lock();
        let generation: Option<i64> = conn
            .query_row(
                "SELECT generation FROM splits WHERE name = ?1",
                [name],
                |r| r.get(0),
            )
            .optional()
            .map_err(db("reading a split"))?;
        generation
            .map(|g| load_state(&conn, g, name.to_owned()))
            .transpose()
    }

    fn put_split(
        &self,
        spec: &SplitSpec,
        rollout: Option<&RolloutPolicy>,
        now_ms: i64,
    ) -> Result<PutSplit, ExperimentError> {
        let mut conn = self.writer.lock();
        let tx = begin(&mut conn)?;
        let existing: Option<(i64, Option<String>)> = tx
            .query_row(
                "SELECT generation, rollout FROM splits WHERE name = ?1",
                [&spec.name],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .optional()
            .map_err(db("reading a split"))?;
        let stored = existing
            .as_ref()
            .and_then(|(_, r)| r.as_deref())
            .map(parse_rollout)
            .transpose()?;
        let (generation, created) = match existing.map(|(g, _)| g) {
            Some(generation) => {
                tx.execute(
                    "UPDATE splits SET updated_ms = ?2 WHERE generation = ?1",
                    params![generation, now_ms],
                )
                .map_err(db("updating a split"))?;
                (generation, false)
            }
            None => {
                tx.execute(
                    "INSERT INTO splits (name, created_ms, updated_ms) VALUES (?1, ?2, ?2)",
                    params![spec.name, now_ms],
                )
                .map_err(db("creating a split"))?;
                (tx.last_insert_rowid(), true)
            }
        };
        let plan = plan_arms(&current_arms(&tx, generation)?, &spec.arms);
        let (next, started) = next_rollout(stored, rollout, plan.iter().all(Option::is_some));
        tx.execute(
            "UPDATE arms SET position = NULL WHERE generation = ?1",
            [generation],
        )
        .map_err(db("updating arms"))?;
        let mut arms = Vec::with_capacity(spec.arms.len());
        for (position, (arm, keep)) in spec.arms.iter().zip(plan).enumerate() {
            let position = position as i64;
            let id = match keep {
                Some(id) => {
                    tx.execute(
                        "UPDATE arms SET position = ?2, weight = ?3, shadow = ?4 WHERE id = ?1",
                        params![id, position, arm.weight, arm.shadow],
                    )
                    .map_err(db("updating an arm"))?;
                    id
                }
                None => {
                    tx.execute(
                        "INSERT INTO arms (generation, position, name, adapter, version, weight, shadow) \
                         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
                        params![
                            generation,
                            position,
                            arm.name,
                            arm.adapter,
                            arm.version,
                            arm.weight,
                            arm.shadow
                        ],
                    )
                    .map_err(db("adding an arm"))?;
                    tx.last_insert_rowid()
                }
            };
            arms.push(ArmRecord {
                id,
                spec: arm.clone(),
            });
        }
        tx.execute(
            "UPDATE splits SET rollout = ?2 WHERE generation = ?1",
            params![generation, next.as_ref().map(rollout_text)],
        )
        .map_err(db("writing a rollout"))?;
        if started && let Some(policy) = rollout {
            tx.execute(
                "INSERT INTO rollout_events (generation, at_ms, body) VALUES (?1, ?2, ?3)",
                params![
                    generation,
                    now_ms,
                    event_text(&started_event(spec, policy, now_ms))
                ],
            )
            .map_err(db("writing a rollout's history"))?;
        }
        tx.commit().map_err(db("committing a split edit"))?;
        Ok(PutSplit {
            record: SplitRecord {
                generation,
                name: spec.name.clone(),
                arms,
            },
            created,
        })
    }

    fn delete_split(&self, name: &str) -> Result<bool, ExperimentError> {
        let mut conn = self.writer.lock();
        let tx = begin(&mut conn)?;
        let generation: Option<i64> = tx
            .query_row(
                "SELECT generation FROM splits WHERE name = ?1",
                [name],
                |r| r.get(0),
            )
            .optional()
            .map_err(db("reading a split"))?;
        let Some(generation) = generation else {
            return Ok(false);
        };
        for statement in [
            "DELETE FROM responses WHERE generation = ?1",
            "DELETE FROM rollout_events WHERE generation = ?1",
            "DELETE FROM arm_latency WHERE arm_id IN (SELECT id FROM arms WHERE generation = ?1)",
            "DELETE FROM arms WHERE generation = ?1",
            "DELETE FROM splits WHERE generation = ?1",
        ] {
            tx.execute(statement, [generation])
                .map_err(db("deleting a split"))?;
        }
        tx.commit().map_err(db("committing a split deletion"))?;
        Ok(true)
    }

    fn change_rollout(
        &self,
        name: &str,
        generation: i64,
        expected: &Rollout,
        new: &Rollout,
        weights: Option<&[f64]>,
        event: &RolloutEvent,
    ) -> Result<bool, ExperimentError> {
        let mut conn = self.writer.lock();
        let tx = begin(&mut conn)?;
        let stored: Option<Option<String>> = tx
            .query_row(
                "SELECT rollout FROM splits WHERE name = ?1 AND generation = ?2",
                params![name, generation],
                |r| r.get(0),
            )
            .optional()
            .map_err(db("reading a rollout"))?;
        let Some(Some(stored)) = stored else {
            return Ok(false);
        };
        if parse_rollout(&stored)? != *expected {
            return Ok(false);
        }
        if let Some(weights) = weights {
            for (position, weight) in weights.iter().enumerate() {
                tx.execute(
                    "UPDATE arms SET weight = ?3 WHERE generation = ?1 AND position = ?2",
                    params![generation, position as i64, weight],
                )
                .map_err(db("changing arm weights"))?;
            }
        }
        tx.execute(
            "UPDATE splits SET rollout = ?2, updated_ms = ?3 WHERE generation = ?1",
            params![generation, rollout_text(new), event.at_ms],
        )
        .map_err(db("writing a rollout"))?;
        tx.execute(
            "INSERT INTO rollout_events (generation, at_ms, body) VALUES (?1, ?2, ?3)",
            params![generation, event.at_ms, event_text(event)],
        )
        .map_err(db("writing a rollout's history"))?;
        tx.commit().map_err(db("committing a rollout change"))?;
        Ok(true)
    }

    fn record_responses(
        &self,
        served: &[ServedResponse],
        finished: &[FinishedRequest],
    ) -> Result<(), ExperimentError> {
        if served.is_empty() && finished.is_empty() {
            return Ok(());
        }
        let mut conn = self.writer.lock();
        let tx = begin(&mut conn)?;
        {
            // Only while the arm record exists: a split deleted since the assignment takes its
            // responses with it.
            let mut insert = tx
                .prepare_cached(
                    "INSERT OR IGNORE INTO responses (id, generation, arm_id, tenant, served_ms) \
                     SELECT ?1, ?2, ?3, ?4, ?5 \
                     WHERE EXISTS (SELECT 1 FROM arms WHERE id = ?3 AND generation = ?2)",
                )
                .map_err(db("recording responses"))?;
            let mut counted = tx
                .prepare_cached("UPDATE arms SET requests = requests + 1 WHERE id = ?1")
                .map_err(db("counting requests"))?;
            for r in served {
                let inserted = insert
                    .execute(params![
                        r.response_id,
                        r.generation,
                        r.arm_id,
                        r.tenant,
                        r.served_ms
                    ])
                    .map_err(db("recording responses"))?;
                if inserted == 1 {
                    counted
                        .execute([r.arm_id])
                        .map_err(db("counting requests"))?;
                }
            }
            let (per_arm, per_bucket) = sum_finished(finished);
            let mut ended = tx
                .prepare_cached(
                    "UPDATE arms SET finished = finished + ?2, errors = errors + ?3 WHERE id = ?1",
                )
                .map_err(db("counting finished requests"))?;
            for (arm, (n, failed)) in per_arm {
                ended
                    .execute(params![arm, stored_count(n), stored_count(failed)])
                    .map_err(db("counting finished requests"))?;
            }
            let mut timed = tx
                .prepare_cached(
                    "INSERT INTO arm_latency (arm_id, bucket, n) SELECT ?1, ?2, ?3 \
                     WHERE EXISTS (SELECT 1 FROM arms WHERE id = ?1) \
                     ON CONFLICT (arm_id, bucket) DO UPDATE SET n = n + excluded.n",
                )
                .map_err(db("recording latencies"))?;
            for ((arm, bucket), n) in per_bucket {
                timed
                    .execute(params![arm, i64::from(bucket), stored_count(n)])
                    .map_err(db("recording latencies"))?;
            }
        }
        tx.commit().map_err(db("committing response records"))
    }

    fn record_outcome(&self, report: &OutcomeReport) -> Result<RecordedOutcome, OutcomeRefused> {
        let mut conn = self.writer.lock();
        let tx = begin(&mut conn)?;
        let found = tx
            .query_row(
                "SELECT r.arm_id, r.tenant, r.outcome_ms IS NOT NULL, s.name, a.name, \
                        a.numeric_count, a.numeric_shift, a.numeric_mean, a.numeric_m2 \
                 FROM responses r \
                 JOIN arms a ON a.id = r.arm_id \
                 JOIN splits s ON s.generation = a.generation AND s.generation = r.generation \
                 WHERE r.id = ?1",
                [&report.response_id],
                |row| {
                    Ok((
                        row.get::<_, i64>(0)?,
                        row.get::<_, String>(1)?,
                        row.get::<_, bool>(2)?,
                        RecordedOutcome {
                            split: row.get(3)?,
                            arm: row.get(4)?,
                        },
                        NumericParts {
                            count: count(row.get(5)?),
                            shift: row.get(6)?,
                            shifted_mean: row.get(7)?,
                            squared_deviations: row.get(8)?,
                        },
                    ))
                },
            )
            .optional()
            .map_err(db("reading a response"))?;
        // Another tenant's response is answered exactly as an unknown one.
        let Some((arm_id, _, recorded, outcome, parts)) =
            found.filter(|(_, tenant, ..)| *tenant == report.tenant)
        else {
            return Err(OutcomeRefused::UnknownResponse);
        };
        if recorded {
            return Err(OutcomeRefused::AlreadyRecorded);
        }
        add_to_arm(&tx, arm_id, parts, report.value, "recording an outcome")?;
        match report.value {
            OutcomeValue::Number(value) => tx.execute(
                "UPDATE responses SET outcome_number = ?2, outcome_ms = ?3 WHERE id = ?1",
                params![report.response_id, value, report.now_ms],
            ),
            OutcomeValue::YesNo(yes) => tx.execute(
                "UPDATE responses SET outcome_yes_no = ?2, outcome_ms = ?3 WHERE id = ?1",
                params![report.response_id, yes, report.now_ms],
            ),
        }
        .map_err(db("recording an outcome"))?;
        tx.commit().map_err(db("committing an outcome"))?;
        Ok(outcome)
    }

    fn record_agreement(&self, arm_id: i64, value: OutcomeValue) -> Result<bool, OutcomeRefused> {
        let mut conn = self.writer.lock();
        let tx = begin(&mut conn)?;
        let parts = tx
            .query_row(
                "SELECT numeric_count, numeric_shift, numeric_mean, numeric_m2 FROM arms WHERE id = ?1",
                [arm_id],
                |row| {
                    Ok(NumericParts {
                        count: count(row.get(0)?),
                        shift: row.get(1)?,
                        shifted_mean: row.get(2)?,
                        squared_deviations: row.get(3)?,
                    })
                },
            )
            .optional()
            .map_err(db("reading an arm"))?;
        let Some(parts) = parts else {
            return Ok(false);
        };
        add_to_arm(&tx, arm_id, parts, value, "recording an agreement")?;
        tx.commit().map_err(db("committing an agreement"))?;
        Ok(true)
    }

    fn prune_responses(&self, served_before_ms: i64) -> Result<u64, ExperimentError> {
        let mut total = 0u64;
        loop {
            // One short transaction per chunk, so requests never wait long behind pruning.
            let deleted = self
                .writer
                .lock()
                .execute(
                    "DELETE FROM responses WHERE rowid IN \
                     (SELECT rowid FROM responses WHERE served_ms < ?1 LIMIT ?2)",
                    params![served_before_ms, PRUNE_CHUNK],
                )
                .map_err(db("pruning response records"))?;
            total += deleted as u64;
            if (deleted as i64) < PRUNE_CHUNK {
                return Ok(total);
            }
        }
    }
}
