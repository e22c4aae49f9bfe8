//! The history file: an SQLite database (rusqlite with its bundled SQLite), its schema, its
//! versioning and every read and write. docs/history.md describes the tables for people who
//! query the file themselves.
//!
//! - **Versioning**: `PRAGMA user_version` holds the schema version, `PRAGMA application_id`
//!   marks the file as a liftgate history. [`MIGRATIONS`]`[i]` takes a store from version `i`
//!   to `i + 1`; they run forward only, in one transaction. A file with a newer version than
//!   [`SCHEMA_VERSION`] is refused and never written to.
//! - **Damaged or foreign files**: a file that does not start with SQLite's header, that
//!   SQLite reports as not a database or corrupt, or that is some other program's database,
//!   is refused (exit 2, the file named) before anything is written to it.
//! - **Concurrency**: WAL journal mode (readers never block the writer), a busy timeout, and
//!   every write transaction taken with `BEGIN IMMEDIATE` (the write lock up front, so two
//!   writers never deadlock upgrading a read lock) and retried with exponential backoff and
//!   jitter while SQLite answers "busy". WAL needs shared memory between the processes, so
//!   the file belongs on a local disk or a volume with working POSIX locks (SQLite's own
//!   advice; network file systems often lack them).

use super::trend::{MetricValues, QuestionKey, Scores};
use crate::error::{Error, Result};
use crate::formats::questions::Expect;
use rusqlite::{params, Connection, ErrorCode, OpenFlags, OptionalExtension, TransactionBehavior};
use std::path::{Path, PathBuf};
use std::time::Duration;

/// The schema version this liftgate writes and reads.
pub const SCHEMA_VERSION: i64 = 1;
/// `PRAGMA application_id` of a liftgate history ("LGHS").
pub const APPLICATION_ID: i32 = 0x4c47_4853;
/// The first 16 bytes of every SQLite database file (sqlite.org/fileformat.html §1.3.1).
const SQLITE_HEADER: &[u8; 16] = b"SQLite format 3\0";
/// How long one statement waits for a lock before SQLite answers "busy".
const BUSY_TIMEOUT: Duration = Duration::from_secs(5);
/// Retries of a transaction still busy after the timeout.
const BUSY_RETRIES: u32 = 12;

/// Schema version 1.
const SCHEMA_V1: &str = r#"
CREATE TABLE question_sets (
    fingerprint    TEXT PRIMARY KEY,
    question_count INTEGER NOT NULL
);
CREATE TABLE set_questions (
    set_fingerprint TEXT NOT NULL REFERENCES question_sets(fingerprint),
    position        INTEGER NOT NULL,
    question_id     TEXT NOT NULL,
    content_hash    TEXT,
    category        TEXT NOT NULL,
    expect          TEXT NOT NULL CHECK (expect IN ('answer', 'refuse')),
    PRIMARY KEY (set_fingerprint, position)
) WITHOUT ROWID;
CREATE TABLE runs (
    id              INTEGER PRIMARY KEY,
    finished_at     TEXT NOT NULL,
    source          TEXT NOT NULL CHECK (source IN ('vet', 'weigh', 'record')),
    label           TEXT,
    set_name        TEXT NOT NULL,
    set_path        TEXT NOT NULL,
    set_fingerprint TEXT NOT NULL REFERENCES question_sets(fingerprint),
    question_count  INTEGER NOT NULL,
    report_dir      TEXT NOT NULL,
    tool_version    TEXT NOT NULL,
    gate_metric     TEXT NOT NULL,
    verdict_go      INTEGER NOT NULL CHECK (verdict_go IN (0, 1)),
    summary_sha256  TEXT NOT NULL,
    policy_json     TEXT NOT NULL,
    settings_json   TEXT NOT NULL,
    summary_json    TEXT NOT NULL
);
CREATE INDEX runs_by_set ON runs (set_name, finished_at);
CREATE UNIQUE INDEX runs_once ON runs (report_dir, summary_sha256);
CREATE TABLE variants (
    run_id                 INTEGER NOT NULL REFERENCES runs(id),
    idx                    INTEGER NOT NULL,
    role                   TEXT NOT NULL CHECK (role IN ('baseline', 'candidate')),
    name                   TEXT NOT NULL,
    kind                   TEXT NOT NULL,
    model_path             TEXT,
    model_fingerprint      TEXT,
    adapter_path           TEXT,
    adapter_fingerprint    TEXT,
    template_fingerprint   TEXT,
    compute_dtype          TEXT,
    answers_sha256         TEXT,
    grades_sha256          TEXT,
    out_of_scope_n         INTEGER NOT NULL,
    out_of_scope_share     REAL,
    false_refusal_n        INTEGER NOT NULL,
    false_refusal_share    REAL,
    exact_match            BLOB NOT NULL,
    token_f1               BLOB NOT NULL,
    rouge_l                BLOB NOT NULL,
    refused                BLOB NOT NULL,
    PRIMARY KEY (run_id, idx)
) WITHOUT ROWID;
CREATE TABLE run_metrics (
    run_id        INTEGER NOT NULL REFERENCES runs(id),
    candidate_idx INTEGER NOT NULL,
    metric        TEXT NOT NULL,
    baseline      REAL,
    candidate     REAL,
    lift          REAL,
    ci_low        REAL,
    ci_high       REAL,
    p_value       REAL,
    n             INTEGER NOT NULL,
    PRIMARY KEY (run_id, candidate_idx, metric)
) WITHOUT ROWID;
"#;

/// Forward migrations: `MIGRATIONS[i]` takes a store from schema version `i` to `i + 1`.
pub const MIGRATIONS: &[&str] = &[SCHEMA_V1];

/// An open history file.
pub struct Store {
    conn: Connection,
    path: PathBuf,
}

/// One question of a run's set, as recorded.
#[derive(Debug, Clone, PartialEq)]
pub struct NewQuestion {
    pub key: QuestionKey,
    pub category: String,
}

/// One variant of a run, as recorded.
#[derive(Debug, Clone, PartialEq)]
pub struct NewVariant {
    pub role: &'static str,
    pub name: String,
    pub kind: String,
    pub model_path: Option<String>,
    pub model_fingerprint: Option<String>,
    pub adapter_path: Option<String>,
    pub adapter_fingerprint: Option<String>,
    pub template_fingerprint: Option<String>,
    pub compute_dtype: Option<String>,
    pub answers_sha256: Option<String>,
    pub grades_sha256: Option<String>,
    pub out_of_scope: (u64, Option<f64>),
    pub false_refusal: (u64, Option<f64>),
    pub scores: Scores,
}

/// One run, as recorded: everything written in one transaction.
#[derive(Debug, Clone, PartialEq)]
pub struct NewRun {
    pub finished_at: String,
    pub source: &'static str,
    pub label: Option<String>,
    pub set_name: String,
    pub set_path: String,
    pub set_fingerprint: String,
    pub questions: Vec<NewQuestion>,
    pub report_dir: String,
    pub tool_version: String,
    pub gate_metric: String,
    pub verdict_go: bool,
    pub summary_sha256: String,
    pub policy_json: String,
    pub settings_json: String,
    pub summary_json: String,
    pub variants: Vec<NewVariant>,
    /// `(candidate index, metric name, values)`.
    pub metrics: Vec<(usize, String, MetricValues)>,
}

/// A recorded run as the trend reads it (without per-question grades).
#[derive(Debug, Clone, PartialEq)]
pub struct StoredRun {
    pub id: i64,
    pub finished_at: String,
    pub source: String,
    pub label: Option<String>,
    pub set_name: String,
    pub set_fingerprint: String,
    pub question_count: usize,
    pub report_dir: String,
    pub gate_metric: String,
    pub verdict_go: bool,
    pub variants: Vec<StoredVariant>,
    /// `(candidate index, metric name, values)`.
    pub metrics: Vec<(usize, String, MetricValues)>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct StoredVariant {
    pub idx: usize,
    pub role: String,
    pub name: String,
    pub kind: String,
    pub out_of_scope: (u64, Option<f64>),
    pub false_refusal: (u64, Option<f64>),
}

/// Why a store could not be used, in words naming the file.
fn sql_error(path: &Path, e: rusqlite::Error) -> Error {
    let code = e.sqlite_error_code();
    let message = match code {
        Some(ErrorCode::NotADatabase) | Some(ErrorCode::DatabaseCorrupt) => format!(
            "the history file is damaged or not an SQLite database ({e}); it was left untouched. Move it aside to start a new history, or restore it from a backup"
        ),
        Some(ErrorCode::DatabaseBusy) | Some(ErrorCode::DatabaseLocked) => format!(
            "the history file stayed locked by other liftgate runs ({e}); nothing was written"
        ),
        Some(ErrorCode::ReadOnly) | Some(ErrorCode::CannotOpen) | Some(ErrorCode::PermissionDenied) => {
            format!("cannot open the history file for writing ({e})")
        }
        _ => format!("history file error: {e}"),
    };
    Error::file(path, message)
}

fn is_busy(e: &rusqlite::Error) -> bool {
    matches!(
        e.sqlite_error_code(),
        Some(ErrorCode::DatabaseBusy) | Some(ErrorCode::DatabaseLocked)
    )
}

/// Runs `f`, again after a growing pause (10 ms doubling to 1 s, with jitter so writers
/// started together spread out) while SQLite answers busy.
fn retry_busy<T>(path: &Path, mut f: impl FnMut() -> rusqlite::Result<T>) -> Result<T> {
    let mut pause = Duration::from_millis(10);
    let mut attempt = 0;
    loop {
        match f() {
            Err(e) if is_busy(&e) && attempt < BUSY_RETRIES => {
                attempt += 1;
                std::thread::sleep(pause + jitter(pause));
                pause = (pause * 2).min(Duration::from_secs(1));
            }
            other => return other.map_err(|e| sql_error(path, e)),
        }
    }
}

/// Up to `max`, from the clock's nanoseconds and the process id (no shared random state).
fn jitter(max: Duration) -> Duration {
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.subsec_nanos())
        .unwrap_or(0);
    let mix =
        (nanos as u64 ^ ((std::process::id() as u64) << 17)).wrapping_mul(0x9e37_79b9_7f4a_7c15);
    Duration::from_nanos((mix >> 11) % (max.as_nanos() as u64).max(1))
}

/// Checks that an existing file starts with SQLite's header: anything else is refused
/// before SQLite opens it, so it cannot be touched. An empty file is a new database.
pub fn check_header(path: &Path) -> Result<()> {
    use std::io::Read;
    let mut head = Vec::with_capacity(16);
    let file = std::fs::File::open(path)
        .map_err(|e| Error::file(path, format!("cannot read the history file: {e}")))?;
    if file.metadata().map(|m| m.is_dir()).unwrap_or(false) {
        return Err(Error::file(path, "is a directory, not a history file"));
    }
    file.take(16)
        .read_to_end(&mut head)
        .map_err(|e| Error::file(path, format!("cannot read the history file: {e}")))?;
    if head.is_empty() || head.as_slice() == SQLITE_HEADER {
        return Ok(());
    }
    Err(Error::file(
        path,
        "is not a liftgate history: it does not start with the SQLite database header (damaged, or another kind of file); it was left untouched",
    ))
}

impl Store {
    /// Opens a history file for recording, creating it (and its directory) when absent, and
    /// brings an older schema up to [`SCHEMA_VERSION`].
    pub fn open_for_writing(path: &Path) -> Result<Store> {
        if path.exists() {
            check_header(path)?;
        } else if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir).map_err(|e| {
                Error::file(dir, format!("cannot create the history's directory: {e}"))
            })?;
        }
        let mut store = Store::create_or_open(path)?;
        store.prepare()?;
        Ok(store)
    }

    /// A read-write connection to `path`, creating the file when absent.
    fn create_or_open(path: &Path) -> Result<Store> {
        let conn = Connection::open_with_flags(
            path,
            OpenFlags::SQLITE_OPEN_READ_WRITE
                | OpenFlags::SQLITE_OPEN_CREATE
                | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(|e| sql_error(path, e))?;
        Ok(Store {
            conn,
            path: path.to_path_buf(),
        })
    }

    /// Opens a new history file being built under a temporary name, to be linked into place
    /// once [`Store::finish_staged`] has run: as [`Store::open_for_writing`], but with the
    /// rollback journal in memory instead of the write-ahead log, so a large first run is
    /// written into the file once rather than into the log and then copied over at close.
    pub fn open_staged(path: &Path) -> Result<Store> {
        let mut store = Store::create_or_open(path)?;
        store.prepare_with("memory")?;
        Ok(store)
    }

    /// Switches a file opened by [`Store::open_staged`] to WAL, as every history is, once its
    /// transaction has committed.
    pub fn finish_staged(self) -> Result<()> {
        let path = self.path.clone();
        let mode: String = self
            .conn
            .query_row("PRAGMA journal_mode = WAL", [], |r| r.get(0))
            .map_err(|e| sql_error(&path, e))?;
        if !mode.eq_ignore_ascii_case("wal") {
            return Err(Error::file(
                &path,
                format!(
                    "cannot switch the history file to WAL journal mode (SQLite kept {mode:?})"
                ),
            ));
        }
        Ok(())
    }

    /// Opens an existing history file to read it (a missing file is a usage error). An older
    /// schema is migrated forward first.
    pub fn open_existing(path: &Path) -> Result<Store> {
        if !path.is_file() {
            return Err(Error::usage(format!(
                "--history {}: no such history file (vet and weigh record their runs there; `liftgate record` imports earlier report directories)",
                path.display()
            )));
        }
        check_header(path)?;
        let conn = Connection::open_with_flags(
            path,
            OpenFlags::SQLITE_OPEN_READ_WRITE | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(|e| sql_error(path, e))?;
        let mut store = Store {
            conn,
            path: path.to_path_buf(),
        };
        store.prepare()?;
        Ok(store)
    }

    /// Checks an existing file without changing it: readable by SQLite, a liftgate history
    /// (or empty), and not of a newer schema. Used before a run starts, so a bad history
    /// file is reported before any work is done.
    pub fn check_existing(path: &Path) -> Result<()> {
        check_header(path)?;
        let conn = Connection::open_with_flags(
            path,
            OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(|e| sql_error(path, e))?;
        conn.busy_timeout(BUSY_TIMEOUT)
            .map_err(|e| sql_error(path, e))?;
        let (version, app, tables) = retry_busy(path, || identity(&conn))?;
        check_identity(path, version, app, tables)
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Busy timeout, identity checks, WAL, migrations.
    fn prepare(&mut self) -> Result<()> {
        self.prepare_with("wal")
    }

    /// [`Store::prepare`] with the journal mode `journal` ("wal", or "memory" for a file being
    /// built under a temporary name).
    fn prepare_with(&mut self, journal: &str) -> Result<()> {
        let path = self.path.clone();
        self.conn
            .busy_timeout(BUSY_TIMEOUT)
            .map_err(|e| sql_error(&path, e))?;
        let (version, app, tables) = retry_busy(&path, || identity(&self.conn))?;
        check_identity(&path, version, app, tables)?;
        // WAL is a property of the file: set once, by whichever writer comes first.
        let mode: String = retry_busy(&path, || {
            self.conn
                .query_row(&format!("PRAGMA journal_mode = {journal}"), [], |r| {
                    r.get(0)
                })
        })?;
        if !mode.eq_ignore_ascii_case(journal) {
            return Err(Error::file(
                &path,
                format!("cannot switch the history file to WAL journal mode (SQLite kept {mode:?}); concurrent runs could not record safely"),
            ));
        }
        // Reads of the grade blobs go through the OS page cache directly (no copy into
        // SQLite's own cache): `trend` over a long history reads every run's grades.
        // synchronous = NORMAL: under WAL a commit is durable once the WAL is synced at the
        // next checkpoint, not at every commit. The file can never be corrupted by it, and
        // nothing is lost when liftgate crashes or is killed; only a power loss or an
        // operating-system crash may undo the last runs recorded before it (docs/history.md,
        // "Durability"; sqlite.org/pragma.html#pragma_synchronous). A cache of 64 MiB lets a
        // large run's transaction stay in memory until its commit instead of spilling pages.
        retry_busy(&path, || {
            self.conn.execute_batch(
                "PRAGMA foreign_keys = ON; PRAGMA mmap_size = 1073741824; \
                 PRAGMA synchronous = NORMAL; PRAGMA cache_size = -65536;",
            )
        })?;
        if version < SCHEMA_VERSION {
            migrate(&mut self.conn, &path, MIGRATIONS)?;
            // Another process may have migrated further meanwhile.
            let (version, app, tables) = retry_busy(&path, || identity(&self.conn))?;
            check_identity(&path, version, app, tables)?;
        }
        Ok(())
    }

    /// Records one run in one transaction; returns its id. A run already recorded (same
    /// report directory and summary.json) is refused, naming the earlier id.
    pub fn insert_run(&mut self, run: &NewRun) -> Result<i64> {
        let path = self.path.clone();
        let existing = retry_busy(&path, || already_recorded(&self.conn, run))?;
        if let Some(id) = existing {
            return Err(recorded_twice(&path, run, id));
        }
        retry_busy(&path, || insert_run_tx(&mut self.conn, run))
    }

    /// Begins recording a run before its statistics are known: takes the write lock (`BEGIN
    /// IMMEDIATE`, retried while another writer holds it) and writes the set revision's
    /// questions. [`PendingRun::finish`] adds the run and commits; dropped unfinished, the
    /// transaction rolls back and the file holds what it held before.
    pub fn begin_run(
        &mut self,
        set_fingerprint: &str,
        questions: &[NewQuestion],
    ) -> Result<PendingRun<'_>> {
        let path = self.path.clone();
        retry_busy(&path, || self.conn.execute_batch("BEGIN IMMEDIATE"))?;
        let pending = PendingRun {
            store: self,
            open: true,
        };
        insert_set(&pending.store.conn, set_fingerprint, questions)
            .map_err(|e| sql_error(&path, e))?;
        Ok(pending)
    }

    /// Every run, or those of one set name, in time order (then id order).
    pub fn runs(&self, set_name: Option<&str>) -> Result<Vec<StoredRun>> {
        let path = &self.path;
        retry_busy(path, || load_runs(&self.conn, set_name))
    }

    /// The questions of a recorded set revision, in order.
    pub fn revision(&self, fingerprint: &str) -> Result<Vec<QuestionKey>> {
        retry_busy(&self.path, || {
            let mut st = self.conn.prepare_cached(
                "SELECT question_id, content_hash, expect FROM set_questions WHERE set_fingerprint = ?1 ORDER BY position",
            )?;
            let rows = st.query_map([fingerprint], |r| {
                let expect: String = r.get(2)?;
                Ok(QuestionKey {
                    id: r.get(0)?,
                    content_hash: r.get(1)?,
                    expect: if expect == "refuse" {
                        Expect::Refuse
                    } else {
                        Expect::Answer
                    },
                })
            })?;
            rows.collect()
        })
    }

    /// The per-question grades of variant `idx` of run `run`.
    pub fn scores(&self, run: i64, idx: usize) -> Result<Scores> {
        let blobs: (Vec<u8>, Vec<u8>, Vec<u8>, Vec<u8>) = retry_busy(&self.path, || {
            self.conn
                .prepare_cached(
                    "SELECT exact_match, token_f1, rouge_l, refused FROM variants WHERE run_id = ?1 AND idx = ?2",

                )?
                .query_row(params![run, idx as i64], |r| {
                    Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
                })
        })?;
        decode_scores(&blobs.0, &blobs.1, &blobs.2, &blobs.3).ok_or_else(|| {
            Error::file(
                &self.path,
                format!("run {run}, variant {idx}: the recorded grades are damaged (blob lengths disagree)"),
            )
        })
    }

    /// The connection, for tests and the benchmark filler.
    pub fn connection(&self) -> &Connection {
        &self.conn
    }
}

/// `(user_version, application_id, number of tables)`, read in one statement so the three
/// come from one snapshot: read one at a time, a first writer's schema could commit between
/// them, and a fresh history would look like a database of another program (version 0 and no
/// application id, but tables).
fn identity(conn: &Connection) -> rusqlite::Result<(i64, i32, i64)> {
    conn.query_row(
        "SELECT (SELECT user_version FROM pragma_user_version), \
                (SELECT application_id FROM pragma_application_id), \
                (SELECT count(*) FROM sqlite_master WHERE type = 'table')",
        [],
        |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
    )
}

fn check_identity(path: &Path, version: i64, app: i32, tables: i64) -> Result<()> {
    if app != APPLICATION_ID && (app != 0 || tables > 0 || version != 0) {
        return Err(Error::file(
            path,
            "is an SQLite database of another program, not a liftgate history; it was left untouched (choose another file with --history)",
        ));
    }
    if version > SCHEMA_VERSION {
        return Err(Error::file(
            path,
            format!(
                "the history has schema version {version}, newer than this liftgate {} understands (version {SCHEMA_VERSION}); use a newer liftgate. The file was not changed",
                env!("CARGO_PKG_VERSION")
            ),
        ));
    }
    Ok(())
}

/// Applies `migrations[v..]` to a store at version `v`, in one immediate transaction that
/// re-reads the version (another process may have migrated meanwhile), then sets
/// `user_version` and `application_id`.
pub fn migrate(conn: &mut Connection, path: &Path, migrations: &[&str]) -> Result<()> {
    let target = migrations.len() as i64;
    retry_busy(path, || {
        let tx = conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        let version: i64 = tx.query_row("PRAGMA user_version", [], |r| r.get(0))?;
        if version < target {
            for sql in &migrations[version.max(0) as usize..] {
                tx.execute_batch(sql)?;
            }
            tx.execute_batch(&format!(
                "PRAGMA user_version = {target}; PRAGMA application_id = {APPLICATION_ID};"
            ))?;
        }
        tx.commit()
    })
}

/// A run's recording begun by [`Store::begin_run`]: its transaction is open and holds the
/// write lock.
pub struct PendingRun<'a> {
    store: &'a mut Store,
    open: bool,
}

impl PendingRun<'_> {
    /// Adds the run (its `questions` must be those given to [`Store::begin_run`]) and commits;
    /// returns its id. A run already recorded is refused, as by [`Store::insert_run`].
    pub fn finish(mut self, run: &NewRun) -> Result<i64> {
        let path = self.store.path.clone();
        let conn = &self.store.conn;
        if let Some(id) = already_recorded(conn, run).map_err(|e| sql_error(&path, e))? {
            return Err(recorded_twice(&path, run, id));
        }
        let id = insert_run_rows(conn, run).map_err(|e| sql_error(&path, e))?;
        conn.execute_batch("COMMIT")
            .map_err(|e| sql_error(&path, e))?;
        self.open = false;
        Ok(id)
    }
}

impl Drop for PendingRun<'_> {
    fn drop(&mut self) {
        if self.open {
            // Nothing of the run was committed; a failed rollback leaves SQLite to roll the
            // transaction back when the connection closes.
            let _ = self.store.conn.execute_batch("ROLLBACK");
        }
    }
}

/// The id of a run with the same report directory and summary, if one is recorded.
fn already_recorded(conn: &Connection, run: &NewRun) -> rusqlite::Result<Option<i64>> {
    conn.query_row(
        "SELECT id FROM runs WHERE report_dir = ?1 AND summary_sha256 = ?2",
        params![run.report_dir, run.summary_sha256],
        |r| r.get(0),
    )
    .optional()
}

fn recorded_twice(path: &Path, run: &NewRun, id: i64) -> Error {
    Error::usage(format!(
        "{}: this report is already recorded in {} as run {id}",
        run.report_dir,
        path.display()
    ))
}

fn insert_run_tx(conn: &mut Connection, run: &NewRun) -> rusqlite::Result<i64> {
    let tx = conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
    insert_set(&tx, &run.set_fingerprint, &run.questions)?;
    let id = insert_run_rows(&tx, run)?;
    tx.commit()?;
    Ok(id)
}

/// A set revision's questions, written when the revision is new; a revision recorded without
/// question contents gains them.
fn insert_set(
    tx: &Connection,
    fingerprint: &str,
    questions: &[NewQuestion],
) -> rusqlite::Result<()> {
    let new_set = tx.execute(
        "INSERT OR IGNORE INTO question_sets (fingerprint, question_count) VALUES (?1, ?2)",
        params![fingerprint, questions.len() as i64],
    )? == 1;
    if new_set {
        insert_set_questions(tx, fingerprint, questions)?;
    } else if questions.iter().any(|q| q.key.content_hash.is_some()) {
        // A revision first recorded without question contents (an import without its set)
        // gains them when a later run knows them. One scan finds whether any are missing;
        // usually none are, and the per-question updates are skipped.
        let missing: bool = tx
            .prepare_cached(
                "SELECT EXISTS (SELECT 1 FROM set_questions WHERE set_fingerprint = ?1 AND content_hash IS NULL)",
            )?
            .query_row([fingerprint], |r| r.get(0))?;
        if missing {
            let mut st = tx.prepare_cached(
                "UPDATE set_questions SET content_hash = ?3 WHERE set_fingerprint = ?1 AND position = ?2 AND content_hash IS NULL",
            )?;
            for (i, q) in questions.iter().enumerate() {
                if q.key.content_hash.is_some() {
                    st.execute(params![fingerprint, i as i64, q.key.content_hash])?;
                }
            }
        }
    }
    Ok(())
}

/// A run's own rows (the run, its variants, its metrics), its set already written; the run's id.
fn insert_run_rows(tx: &Connection, run: &NewRun) -> rusqlite::Result<i64> {
    tx.execute(
        "INSERT INTO runs (finished_at, source, label, set_name, set_path, set_fingerprint, question_count, report_dir, tool_version, gate_metric, verdict_go, summary_sha256, policy_json, settings_json, summary_json) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15)",
        params![
            run.finished_at,
            run.source,
            run.label,
            run.set_name,
            run.set_path,
            run.set_fingerprint,
            run.questions.len() as i64,
            run.report_dir,
            run.tool_version,
            run.gate_metric,
            run.verdict_go as i64,
            run.summary_sha256,
            run.policy_json,
            run.settings_json,
            run.summary_json
        ],
    )?;
    let id = tx.last_insert_rowid();
    {
        let mut st = tx.prepare_cached(
            "INSERT INTO variants (run_id, idx, role, name, kind, model_path, model_fingerprint, adapter_path, adapter_fingerprint, template_fingerprint, compute_dtype, answers_sha256, grades_sha256, out_of_scope_n, out_of_scope_share, false_refusal_n, false_refusal_share, exact_match, token_f1, rouge_l, refused) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19, ?20, ?21)",
        )?;
        for (i, v) in run.variants.iter().enumerate() {
            let (em, f1, rl, refused) = encode_scores(&v.scores);
            st.execute(params![
                id,
                i as i64,
                v.role,
                v.name,
                v.kind,
                v.model_path,
                v.model_fingerprint,
                v.adapter_path,
                v.adapter_fingerprint,
                v.template_fingerprint,
                v.compute_dtype,
                v.answers_sha256,
                v.grades_sha256,
                v.out_of_scope.0 as i64,
                v.out_of_scope.1,
                v.false_refusal.0 as i64,
                v.false_refusal.1,
                em,
                f1,
                rl,
                refused
            ])?;
        }
        let mut st = tx.prepare_cached(
            "INSERT INTO run_metrics (run_id, candidate_idx, metric, baseline, candidate, lift, ci_low, ci_high, p_value, n) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
        )?;
        for (idx, name, m) in &run.metrics {
            st.execute(params![
                id,
                *idx as i64,
                name,
                m.baseline,
                m.candidate,
                m.lift,
                m.ci_low,
                m.ci_high,
                m.p_value,
                m.n as i64
            ])?;
        }
    }
    Ok(id)
}

/// Questions written by one `INSERT` statement into `set_questions`: one statement of many
/// rows costs far less than as many single-row statements (each one's parse of parameters,
/// step and reset). 6 parameters a row keeps a chunk far below SQLite's limit of 32,766
/// parameters a statement (sqlite.org/limits.html, §9).
const SET_ROWS_PER_INSERT: usize = 256;

/// The rows of a new set revision, [`SET_ROWS_PER_INSERT`] to a statement.
fn insert_set_questions(
    tx: &Connection,
    fingerprint: &str,
    questions: &[NewQuestion],
) -> rusqlite::Result<()> {
    let sql = |rows: usize| {
        let mut sql = String::from("INSERT INTO set_questions (set_fingerprint, position, question_id, content_hash, category, expect) VALUES ");
        for r in 0..rows {
            if r > 0 {
                sql.push(',');
            }
            sql.push_str("(?,?,?,?,?,?)");
        }
        sql
    };
    let full = sql(SET_ROWS_PER_INSERT);
    for (c, chunk) in questions.chunks(SET_ROWS_PER_INSERT).enumerate() {
        let mut st = if chunk.len() == SET_ROWS_PER_INSERT {
            tx.prepare_cached(&full)?
        } else {
            tx.prepare_cached(&sql(chunk.len()))?
        };
        for (r, q) in chunk.iter().enumerate() {
            let at = 6 * r;
            st.raw_bind_parameter(at + 1, fingerprint)?;
            st.raw_bind_parameter(at + 2, (c * SET_ROWS_PER_INSERT + r) as i64)?;
            st.raw_bind_parameter(at + 3, &q.key.id)?;
            st.raw_bind_parameter(at + 4, &q.key.content_hash)?;
            st.raw_bind_parameter(at + 5, &q.category)?;
            st.raw_bind_parameter(at + 6, q.key.expect.as_str())?;
        }
        st.raw_execute()?;
    }
    Ok(())
}

fn load_runs(conn: &Connection, set_name: Option<&str>) -> rusqlite::Result<Vec<StoredRun>> {
    let filter = if set_name.is_some() {
        "WHERE r.set_name = ?1"
    } else {
        "WHERE ?1 IS NULL"
    };
    let mut st = conn.prepare(&format!(
        "SELECT id, finished_at, source, label, set_name, set_fingerprint, question_count, report_dir, gate_metric, verdict_go FROM runs r {filter} ORDER BY finished_at, id"
    ))?;
    let mut runs: Vec<StoredRun> = st
        .query_map([set_name], |r| {
            Ok(StoredRun {
                id: r.get(0)?,
                finished_at: r.get(1)?,
                source: r.get(2)?,
                label: r.get(3)?,
                set_name: r.get(4)?,
                set_fingerprint: r.get(5)?,
                question_count: r.get::<_, i64>(6)? as usize,
                report_dir: r.get(7)?,
                gate_metric: r.get(8)?,
                verdict_go: r.get::<_, i64>(9)? != 0,
                variants: Vec::new(),
                metrics: Vec::new(),
            })
        })?
        .collect::<rusqlite::Result<_>>()?;
    let index: std::collections::HashMap<i64, usize> =
        runs.iter().enumerate().map(|(i, r)| (r.id, i)).collect();
    let mut st = conn.prepare(&format!(
        "SELECT v.run_id, v.idx, v.role, v.name, v.kind, v.out_of_scope_n, v.out_of_scope_share, v.false_refusal_n, v.false_refusal_share FROM variants v JOIN runs r ON r.id = v.run_id {filter} ORDER BY v.run_id, v.idx"
    ))?;
    let mut rows = st.query([set_name])?;
    while let Some(r) = rows.next()? {
        let run: i64 = r.get(0)?;
        if let Some(&i) = index.get(&run) {
            runs[i].variants.push(StoredVariant {
                idx: r.get::<_, i64>(1)? as usize,
                role: r.get(2)?,
                name: r.get(3)?,
                kind: r.get(4)?,
                out_of_scope: (r.get::<_, i64>(5)? as u64, r.get(6)?),
                false_refusal: (r.get::<_, i64>(7)? as u64, r.get(8)?),
            });
        }
    }
    let mut st = conn.prepare(&format!(
        "SELECT m.run_id, m.candidate_idx, m.metric, m.baseline, m.candidate, m.lift, m.ci_low, m.ci_high, m.p_value, m.n FROM run_metrics m JOIN runs r ON r.id = m.run_id {filter} ORDER BY m.run_id, m.candidate_idx, m.metric"
    ))?;
    let mut rows = st.query([set_name])?;
    while let Some(r) = rows.next()? {
        let run: i64 = r.get(0)?;
        if let Some(&i) = index.get(&run) {
            runs[i].metrics.push((
                r.get::<_, i64>(1)? as usize,
                r.get(2)?,
                MetricValues {
                    baseline: r.get(3)?,
                    candidate: r.get(4)?,
                    lift: r.get(5)?,
                    ci_low: r.get(6)?,
                    ci_high: r.get(7)?,
                    p_value: r.get(8)?,
                    n: r.get::<_, i64>(9)? as usize,
                },
            ));
        }
    }
    Ok(runs)
}

/// Exact match: one byte a question (0, 1, or 255 for no score). Token F1 and ROUGE-L: eight
/// bytes a question, the f64 little-endian, NaN for no score. Refused: one byte, 0 or 1.
pub fn encode_scores(s: &Scores) -> (Vec<u8>, Vec<u8>, Vec<u8>, Vec<u8>) {
    let em = s
        .exact_match
        .iter()
        .map(|v| match v {
            Some(x) if *x >= 0.5 => 1u8,
            Some(_) => 0,
            None => 255,
        })
        .collect();
    let f64s = |xs: &[Option<f64>]| -> Vec<u8> {
        xs.iter()
            .flat_map(|v| v.unwrap_or(f64::NAN).to_le_bytes())
            .collect()
    };
    let refused = s.refused.iter().map(|&r| r as u8).collect();
    (em, f64s(&s.token_f1), f64s(&s.rouge_l), refused)
}

/// The inverse of [`encode_scores`]; None when the lengths disagree.
pub fn decode_scores(em: &[u8], f1: &[u8], rl: &[u8], refused: &[u8]) -> Option<Scores> {
    let n = refused.len();
    if em.len() != n || f1.len() != 8 * n || rl.len() != 8 * n {
        return None;
    }
    let f64s = |b: &[u8]| -> Vec<Option<f64>> {
        b.chunks_exact(8)
            .map(|c| {
                let x = f64::from_le_bytes(c.try_into().expect("8 bytes"));
                (!x.is_nan()).then_some(x)
            })
            .collect()
    };
    Some(Scores {
        exact_match: em.iter().map(|&b| (b != 255).then_some(b as f64)).collect(),
        token_f1: f64s(f1),
        rouge_l: f64s(rl),
        refused: refused.iter().map(|&b| b != 0).collect(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scores_round_trip_through_their_blobs() {
        let s = Scores {
            exact_match: vec![Some(1.0), Some(0.0), None],
            token_f1: vec![Some(0.1 + 0.2), Some(0.0), None],
            rouge_l: vec![Some(1.0 / 3.0), Some(1.0), None],
            refused: vec![false, true, true],
        };
        let (a, b, c, d) = encode_scores(&s);
        assert_eq!((a.len(), b.len(), c.len(), d.len()), (3, 24, 24, 3));
        assert_eq!(decode_scores(&a, &b, &c, &d), Some(s));
        assert_eq!(decode_scores(&a, &b[..16], &c, &d), None);
    }

    fn run(dir: &str, questions: Vec<NewQuestion>) -> NewRun {
        let n = questions.len();
        let scores = Scores {
            exact_match: vec![Some(1.0); n],
            token_f1: vec![Some(0.5); n],
            rouge_l: vec![None; n],
            refused: vec![false; n],
        };
        let variant = |role| NewVariant {
            role,
            name: role.into(),
            kind: "unknown".into(),
            model_path: None,
            model_fingerprint: None,
            adapter_path: None,
            adapter_fingerprint: None,
            template_fingerprint: None,
            compute_dtype: None,
            answers_sha256: None,
            grades_sha256: None,
            out_of_scope: (0, None),
            false_refusal: (0, None),
            scores: scores.clone(),
        };
        NewRun {
            finished_at: "2026-03-02T10:11:12.345Z".into(),
            source: "weigh",
            label: None,
            set_name: "faq".into(),
            set_path: "faq.jsonl".into(),
            set_fingerprint: "f".repeat(64),
            questions,
            report_dir: dir.into(),
            tool_version: "0".into(),
            gate_metric: "token_f1".into(),
            verdict_go: true,
            summary_sha256: "s".into(),
            policy_json: "{}".into(),
            settings_json: "{}".into(),
            summary_json: "{}".into(),
            variants: vec![variant("baseline"), variant("candidate")],
            metrics: Vec::new(),
        }
    }

    fn questions(n: usize, hashed: bool) -> Vec<NewQuestion> {
        (0..n)
            .map(|i| NewQuestion {
                key: QuestionKey {
                    id: format!("q{i}"),
                    content_hash: hashed.then(|| format!("h{i}")),
                    expect: if i % 7 == 0 {
                        Expect::Refuse
                    } else {
                        Expect::Answer
                    },
                },
                category: format!("c{}", i % 3),
            })
            .collect()
    }

    #[test]
    fn a_set_written_in_chunks_reads_back_in_order_and_gains_its_hashes_later() {
        // Two full chunks and a partial one.
        let n = 2 * SET_ROWS_PER_INSERT + 37;
        let dir = tempfile::tempdir().unwrap();
        let mut store = Store::open_for_writing(&dir.path().join("h.sqlite")).unwrap();
        // First recorded without contents (an import without its set) ...
        store.insert_run(&run("/r/1", questions(n, false))).unwrap();
        let fp = "f".repeat(64);
        let keys: Vec<QuestionKey> = questions(n, false).into_iter().map(|q| q.key).collect();
        assert_eq!(store.revision(&fp).unwrap(), keys);
        let categories: Vec<String> = store
            .connection()
            .prepare("SELECT category FROM set_questions ORDER BY position")
            .unwrap()
            .query_map([], |r| r.get(0))
            .unwrap()
            .collect::<rusqlite::Result<_>>()
            .unwrap();
        assert_eq!(categories[n - 1], format!("c{}", (n - 1) % 3));
        // ... then a run that knows them fills them in; the rows are not written again.
        store.insert_run(&run("/r/2", questions(n, true))).unwrap();
        let keys: Vec<QuestionKey> = questions(n, true).into_iter().map(|q| q.key).collect();
        assert_eq!(store.revision(&fp).unwrap(), keys);
        let rows: i64 = store
            .connection()
            .query_row("SELECT count(*) FROM set_questions", [], |r| r.get(0))
            .unwrap();
        assert_eq!(rows as usize, n);
        assert_eq!(store.scores(2, 1).unwrap().token_f1, vec![Some(0.5); n]);
    }

    #[test]
    fn migrations_run_forward_once_and_newer_versions_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("h.sqlite");
        let mut conn = Connection::open(&path).unwrap();
        let steps = [
            "CREATE TABLE a (x INTEGER);",
            "ALTER TABLE a ADD COLUMN y TEXT; INSERT INTO a VALUES (1, 'one');",
        ];
        migrate(&mut conn, &path, &steps[..1]).unwrap();
        let v: i64 = conn
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .unwrap();
        assert_eq!(v, 1);
        // From version 1 only the second step runs; running again changes nothing.
        migrate(&mut conn, &path, &steps).unwrap();
        migrate(&mut conn, &path, &steps).unwrap();
        let rows: i64 = conn
            .query_row("SELECT count(*) FROM a", [], |r| r.get(0))
            .unwrap();
        assert_eq!(rows, 1);
        let app: i32 = conn
            .query_row("PRAGMA application_id", [], |r| r.get(0))
            .unwrap();
        assert_eq!(app, APPLICATION_ID);
        // A file at version 99 is refused, naming both versions.
        conn.execute_batch("PRAGMA user_version = 99").unwrap();
        drop(conn);
        let err = Store::check_existing(&path).unwrap_err().to_string();
        assert!(
            err.contains("schema version 99") && err.contains("version 1"),
            "{err}"
        );
    }

    #[test]
    fn other_programs_databases_and_non_databases_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let other = dir.path().join("other.sqlite");
        Connection::open(&other)
            .unwrap()
            .execute_batch("CREATE TABLE t (x); INSERT INTO t VALUES (1);")
            .unwrap();
        let before = std::fs::read(&other).unwrap();
        let err = Store::open_for_writing(&other).err().unwrap();
        assert_eq!(err.exit_code(), 2);
        assert!(err.to_string().contains("another program"), "{err}");
        assert_eq!(std::fs::read(&other).unwrap(), before);

        let text = dir.path().join("notes.sqlite");
        std::fs::write(&text, "just some notes\n").unwrap();
        let err = Store::open_for_writing(&text).err().unwrap();
        assert_eq!(err.exit_code(), 2);
        assert!(err.to_string().contains("notes.sqlite"), "{err}");
        assert_eq!(std::fs::read(&text).unwrap(), b"just some notes\n");
    }
}
