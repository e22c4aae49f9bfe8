//! The history of runs: every `weigh` and `vet` that finishes is recorded in an SQLite file,
//! and `trend` reads it back (docs/history.md).
//!
//! - [`store`]: the file, its schema, versions and migrations, concurrent writers;
//! - [`trend`]: pure computation of the trend and of like-for-like comparisons;
//! - [`render`]: the terminal table and trend.md (trend.json is [`trend::Trend`] serialised).
//!
//! Recording happens after the report is written. If it fails then, the run still stands: its
//! report is complete and its exit code is its verdict's. A warning on stderr names what was
//! not recorded and the `liftgate record` command that records it later. A history file that
//! is damaged, foreign, or of a newer schema is found before the run starts
//! ([`RecordOptions::resolve`]) and stops it with exit 2 before any work is done.

mod build;
pub mod html;
mod import;
pub mod render;
pub mod store;
pub mod trend;

pub use build::{build_trend, TrendOptions};
pub use import::{import_report, ImportRequest};

use crate::error::{Error, Result};
use crate::formats::grades::GradeRecord;
use crate::formats::questions::{Expect, QuestionSet};
use crate::fsutil;
use crate::policy::Metric;
use crate::report::summary::Summary;
use std::collections::btree_map::Entry;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use store::{NewQuestion, NewRun, NewVariant, Store, StoredRun};
use trend::{MetricValues, QuestionKey, Scores};

/// The history file's name beside the report directories.
pub const DEFAULT_FILE_NAME: &str = "history.sqlite";

/// Where and how a finished run is recorded.
#[derive(Debug, Clone, PartialEq)]
pub struct RecordOptions {
    pub path: PathBuf,
    pub label: Option<String>,
    /// `vet`, `weigh` or `record`.
    pub source: &'static str,
}

impl RecordOptions {
    /// The options for one candidate of a lineup: its name joins the label, so each
    /// candidate's comparison is a run of its own in the history.
    pub fn for_candidate(&self, name: &str) -> RecordOptions {
        RecordOptions {
            path: self.path.clone(),
            label: Some(match &self.label {
                Some(l) => format!("{l} [{name}]"),
                None => name.to_string(),
            }),
            source: self.source,
        }
    }

    /// The options of `--history`, `--no-history` and `--label`: `None` with `--no-history`,
    /// else the given file or `<reports_parent>/history.sqlite`. An existing file is checked
    /// here, before the run does any work: damaged, foreign or newer-schema files exit 2.
    pub fn resolve(
        args: &crate::cli::HistoryArgs,
        reports_parent: &Path,
        source: &'static str,
    ) -> Result<Option<RecordOptions>> {
        if args.no_history {
            return Ok(None);
        }
        let path = args
            .history
            .clone()
            .unwrap_or_else(|| reports_parent.join(DEFAULT_FILE_NAME));
        if path.exists() {
            Store::check_existing(&path)?;
        }
        Ok(Some(RecordOptions {
            path,
            label: args.label.clone(),
            source,
        }))
    }
}

/// The directory that holds `report_dir` (`.` for a bare name): where the default history
/// file of a report lives.
pub fn parent_of(report_dir: &Path) -> PathBuf {
    match report_dir.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// The role of a variant in a run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Role {
    Baseline,
    Candidate,
}

impl Role {
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Baseline => "baseline",
            Role::Candidate => "candidate",
        }
    }
}

/// One variant's grades as weighed, with the grades file they came from (its run.json, and
/// the answers' run.json it points to, give the variant's name, kind and fingerprints).
#[derive(Debug, Clone, Copy)]
pub struct VariantGrades<'a> {
    pub role: Role,
    pub grades: &'a [GradeRecord],
    pub grades_path: &'a Path,
}

/// The baseline's and the candidate's grades with their files, as [`record_after_report`]
/// takes them.
pub fn two<'a>(
    baseline: (&'a [GradeRecord], &'a Path),
    candidate: (&'a [GradeRecord], &'a Path),
) -> [VariantGrades<'a>; 2] {
    [
        VariantGrades {
            role: Role::Baseline,
            grades: baseline.0,
            grades_path: baseline.1,
        },
        VariantGrades {
            role: Role::Candidate,
            grades: candidate.0,
            grades_path: candidate.1,
        },
    ]
}

/// Records a finished run (call after `report::write_report_dir`). Never fails the run: on
/// success it says on stderr where the run was recorded; on failure it warns on stderr, with
/// the command that records the report later. Returns the run's id when recorded.
pub fn record_after_report(
    opts: Option<&RecordOptions>,
    set: &QuestionSet,
    variants: &[VariantGrades],
    summary: &Summary,
    report_dir: &Path,
) -> Option<i64> {
    let opts = opts?;
    match record(opts, set, variants, summary, report_dir, finished_now()) {
        Ok(id) => {
            eprintln!("liftgate: recorded as run {id} in {}", opts.path.display());
            Some(id)
        }
        Err(e) => {
            not_recorded(opts, report_dir, &set.path, &e);
            None
        }
    }
}

/// The `liftgate record` command line that imports `report_dir` into the same history.
pub fn import_command(opts: &RecordOptions, report_dir: &Path, set_path: &Path) -> String {
    let mut words = vec![
        "liftgate".to_string(),
        "record".into(),
        crate::fsutil::shell_quote(&report_dir.display().to_string()),
        "--questions".into(),
        crate::fsutil::shell_quote(&set_path.display().to_string()),
        "--history".into(),
        crate::fsutil::shell_quote(&opts.path.display().to_string()),
    ];
    if let Some(label) = &opts.label {
        words.push("--label".into());
        words.push(crate::fsutil::shell_quote(label));
    }
    words.join(" ")
}

/// Records one run; the error says why not.
pub fn record(
    opts: &RecordOptions,
    set: &QuestionSet,
    variants: &[VariantGrades],
    summary: &Summary,
    report_dir: &Path,
    finished_at: String,
) -> Result<i64> {
    let mut run = run_of(opts, set, variants, summary, report_dir, finished_at)?;
    run.questions = new_questions(set);
    store_run(opts, &run)
}

/// Opens the history (creating it when absent) and records `run`, its questions filled, in
/// one transaction.
fn store_run(opts: &RecordOptions, run: &NewRun) -> Result<i64> {
    Store::open_for_writing(&opts.path)?.insert_run(run)
}

/// Runs `work` (the statistics and the report of a run on `set`) and records its summary as
/// [`record_after_report`] does, but with the history's share of the work done alongside
/// `work` on a thread of its own: the questions' contents hashed, the history opened, its
/// write transaction begun and a new set revision's questions written. For a new revision of
/// a large set that is most of the recording (a quarter of a second for 100,000 questions);
/// it then overlaps the statistics instead of following them. The transaction commits only
/// with the run: when `work` fails, it rolls back and the file is as it was. A history that
/// does not exist yet is created only once `work` has succeeded (only the hashing overlaps
/// then). Errors of the history are warnings, as there.
pub fn record_alongside(
    opts: Option<&RecordOptions>,
    set: &QuestionSet,
    variants: &[VariantGrades],
    report_dir: &Path,
    work: impl FnOnce() -> Result<Summary>,
) -> Result<Summary> {
    let Some(opts) = opts else {
        return work();
    };
    std::thread::scope(|scope| {
        let (send, receive) = std::sync::mpsc::channel::<NewRun>();
        let recorder = scope.spawn(move || -> Result<Option<i64>> {
            let questions = new_questions(set);
            if !opts.path.exists() {
                // A new history is created only with the run: a failed `work` must leave no
                // file, and removing one afterwards could remove another run's new history.
                // It is built under a temporary name beside it meanwhile, and linked into
                // place once the run is in.
                return record_new_history(opts, &set.fingerprint, questions, receive);
            }
            let mut store = Store::open_for_writing(&opts.path)?;
            let pending = store.begin_run(&set.fingerprint, &questions)?;
            match receive.recv() {
                Ok(mut run) => {
                    run.questions = questions;
                    pending.finish(&run).map(Some)
                }
                // `work` failed: dropping `pending` rolls the transaction back.
                Err(_) => Ok(None),
            }
        });
        let summary = work();
        let sent = match &summary {
            Ok(summary) => run_of(opts, set, variants, summary, report_dir, finished_now())
                .map(|run| send.send(run).is_ok()),
            Err(_) => Ok(false),
        };
        drop(send);
        let recorded = recorder
            .join()
            .unwrap_or_else(|_| Err(Error::internal("the history thread panicked")));
        if summary.is_ok() {
            match (sent, recorded) {
                (Ok(true), Ok(Some(id))) => {
                    eprintln!("liftgate: recorded as run {id} in {}", opts.path.display())
                }
                (Err(e), _) | (_, Err(e)) => not_recorded(opts, report_dir, &set.path, &e),
                (Ok(_), Ok(_)) => not_recorded(
                    opts,
                    report_dir,
                    &set.path,
                    &Error::internal("the run did not reach the history"),
                ),
            }
        }
        summary
    })
}

/// Records the run `receive` brings into a history that did not exist when `weigh` began.
/// The file is built under a temporary name in the history's directory while the statistics
/// run (the set's questions written in an open transaction, its journal in memory). With the
/// run, the transaction commits, the file is switched to WAL as every history is, closed and
/// hard-linked to the history's path; the link fails rather than replace a history another
/// run created meanwhile. Then, or when the temporary file cannot be made, the run is
/// recorded into the history at its path as usual. Without a run (`work` failed) the
/// temporary file is removed and nothing is created.
fn record_new_history(
    opts: &RecordOptions,
    set_fingerprint: &str,
    questions: Vec<NewQuestion>,
    receive: std::sync::mpsc::Receiver<NewRun>,
) -> Result<Option<i64>> {
    let staged = StagedHistory::new(&opts.path);
    let mut store = staged
        .as_ref()
        .ok()
        .and_then(|s| Store::open_staged(&s.path).ok());
    let pending = store
        .as_mut()
        .and_then(|store| store.begin_run(set_fingerprint, &questions).ok());
    let Ok(mut run) = receive.recv() else {
        return Ok(None);
    };
    run.questions = questions;
    let finished = pending.map(|pending| pending.finish(&run));
    // In WAL mode and closed before it is linked; closed before it is removed.
    let ready = match (finished, store) {
        (Some(Ok(id)), Some(store)) => store.finish_staged().ok().map(|()| id),
        _ => None,
    };
    if let (Some(id), Ok(staged)) = (ready, &staged) {
        if std::fs::hard_link(&staged.path, &opts.path).is_ok() {
            return Ok(Some(id));
        }
    }
    drop(staged);
    store_run(opts, &run).map(Some)
}

/// A history file under a temporary name beside its final path; removed, with SQLite's
/// companion files, when dropped (after a hard link the history keeps the file).
struct StagedHistory {
    path: PathBuf,
}

impl StagedHistory {
    fn new(final_path: &Path) -> Result<StagedHistory> {
        let dir = match final_path.parent() {
            Some(p) if !p.as_os_str().is_empty() => p,
            _ => Path::new("."),
        };
        // A directory is not created here: a failed run must leave nothing behind, and the
        // usual recording creates it with the history.
        if !dir.is_dir() {
            return Err(Error::file(
                dir,
                "the history's directory does not exist yet",
            ));
        }
        let name = final_path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map(|d| d.as_nanos())
            .unwrap_or(0);
        // SQLite creates the file itself, with the permissions it gives a new history.
        let path = dir.join(format!(".{name}.{}-{nanos}.tmp", std::process::id()));
        if path.exists() {
            return Err(Error::file(
                &path,
                "a temporary history file of this name exists",
            ));
        }
        Ok(StagedHistory { path })
    }
}

impl Drop for StagedHistory {
    fn drop(&mut self) {
        for suffix in ["", "-wal", "-shm", "-journal"] {
            let mut p = self.path.clone().into_os_string();
            p.push(suffix);
            let _ = std::fs::remove_file(p);
        }
    }
}

/// The warning of a run that the history did not take, with the command that records it later.
fn not_recorded(opts: &RecordOptions, report_dir: &Path, set_path: &Path, e: &Error) {
    eprintln!(
        "liftgate: warning: this run was NOT recorded in the history {}: {e}\n\
         liftgate: the report in {} is complete and the verdict stands. To record it later:\n  {}",
        opts.path.display(),
        report_dir.display(),
        import_command(opts, report_dir, set_path)
    );
}

/// The questions of `set` as the history keeps them. One SHA-256 a question: in parallel for
/// large sets (the order is kept), each worker serialising into one buffer it reuses.
fn new_questions(set: &QuestionSet) -> Vec<NewQuestion> {
    use rayon::prelude::*;
    set.questions
        .par_iter()
        .map_init(Vec::new, |buf, q| NewQuestion {
            key: QuestionKey {
                id: q.id.clone(),
                content_hash: Some(content_hash_with(
                    buf,
                    &q.question,
                    &q.references,
                    q.expect,
                    &q.category,
                )),
                expect: q.expect,
            },
            category: q.category.clone(),
        })
        .collect()
}

/// The run of `summary` on `set`, its questions left empty for the caller to fill.
fn run_of(
    opts: &RecordOptions,
    set: &QuestionSet,
    variants: &[VariantGrades],
    summary: &Summary,
    report_dir: &Path,
    finished_at: String,
) -> Result<NewRun> {
    new_run(
        opts,
        set_name(&set.path),
        &set.path,
        &set.fingerprint,
        set.len(),
        variants,
        summary,
        report_dir,
        finished_at,
    )
}

/// SHA-256 of a question's content: the JSON array `[question, references, expect,
/// category]`, compact. The id is the key, not content; the line number is not content.
pub fn content_hash(
    question: &str,
    references: &[String],
    expect: Expect,
    category: &str,
) -> String {
    content_hash_with(&mut Vec::new(), question, references, expect, category)
}

/// [`content_hash`], serialising into `buf` (cleared first): a caller hashing many questions
/// reuses one buffer. The tuple serialises to the same compact JSON array as a
/// `serde_json::Value` array of the four would.
fn content_hash_with(
    buf: &mut Vec<u8>,
    question: &str,
    references: &[String],
    expect: Expect,
    category: &str,
) -> String {
    use sha2::{Digest, Sha256};
    buf.clear();
    // Writing strings and string lists into a Vec cannot fail.
    serde_json::to_writer(
        &mut *buf,
        &(question, references, expect.as_str(), category),
    )
    .expect("serialising strings into memory cannot fail");
    hex_lower(&Sha256::digest(buf.as_slice()))
}

/// Lower-case hex of `bytes`, in one allocation.
fn hex_lower(bytes: &[u8]) -> String {
    const DIGITS: &[u8; 16] = b"0123456789abcdef";
    let mut out = String::with_capacity(2 * bytes.len());
    for &b in bytes {
        out.push(DIGITS[(b >> 4) as usize] as char);
        out.push(DIGITS[(b & 15) as usize] as char);
    }
    out
}

/// A set's name: its file name without extension.
pub fn set_name(path: &Path) -> String {
    path.file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "set".into())
}

/// A run for the history, its `questions` left empty for the caller to fill (the
/// variants' grades must have `question_count` rows).
#[allow(clippy::too_many_arguments)]
fn new_run(
    opts: &RecordOptions,
    set_name: String,
    set_path: &Path,
    set_fingerprint: &str,
    question_count: usize,
    variants: &[VariantGrades],
    summary: &Summary,
    report_dir: &Path,
    finished_at: String,
) -> Result<NewRun> {
    let summary_json = json(summary)?;
    let n = question_count;
    let mut new_variants = Vec::with_capacity(variants.len());
    for v in variants {
        if v.grades.len() != n {
            return Err(Error::internal(
                "grades do not match the question set row for row",
            ));
        }
        new_variants.push(new_variant(v, summary));
    }
    let mut metrics = Vec::new();
    for m in Metric::ALL {
        let Some(s) = summary.metrics.get(m) else {
            continue;
        };
        metrics.push((
            1,
            m.as_str().to_string(),
            MetricValues {
                baseline: s.baseline,
                candidate: s.candidate,
                lift: s.lift,
                ci_low: s.ci_low,
                ci_high: s.ci_high,
                p_value: s.p_value,
                n: s.n,
            },
        ));
    }
    let report_dir = std::fs::canonicalize(report_dir).unwrap_or_else(|_| report_dir.to_path_buf());
    Ok(NewRun {
        finished_at,
        source: opts.source,
        label: opts.label.clone(),
        set_name,
        set_path: set_path.display().to_string(),
        set_fingerprint: set_fingerprint.to_string(),
        questions: Vec::new(),
        report_dir: report_dir.display().to_string(),
        tool_version: summary.tool_version.clone(),
        gate_metric: summary.policy.lift.metric.as_str().to_string(),
        verdict_go: summary.verdict.go,
        summary_sha256: fsutil::sha256_hex(summary_json.as_bytes()),
        policy_json: json(&summary.policy)?,
        settings_json: json(&summary.settings)?,
        summary_json,
        variants: new_variants,
        metrics,
    })
}

fn json<T: serde::Serialize>(v: &T) -> Result<String> {
    serde_json::to_string(v)
        .map_err(|e| Error::internal(format!("cannot serialise for the history: {e}")))
}

fn new_variant(v: &VariantGrades, summary: &Summary) -> NewVariant {
    let scores = Scores {
        exact_match: v
            .grades
            .iter()
            .map(|g| g.exact_match.map(f64::from))
            .collect(),
        token_f1: v.grades.iter().map(|g| g.token_f1).collect(),
        rouge_l: v.grades.iter().map(|g| g.rouge_l).collect(),
        refused: v.grades.iter().map(|g| g.refused).collect(),
    };
    let rates = |r: &crate::report::summary::RefusalRates| {
        let rate = match v.role {
            Role::Baseline => &r.baseline,
            Role::Candidate => &r.candidate,
        };
        (r.n, rate.share)
    };
    let provenance = Provenance::of(v.grades_path);
    let stem = v
        .grades_path
        .file_name()
        .map(|s| s.to_string_lossy().trim_end_matches(".jsonl").to_string())
        .unwrap_or_else(|| v.role.as_str().to_string());
    let name = provenance
        .adapter_path
        .as_deref()
        .or(provenance.model_path.as_deref())
        .map(|p| {
            Path::new(p)
                .file_name()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_else(|| p.to_string())
        })
        .unwrap_or(stem);
    let kind = match (&provenance.model_path, &provenance.adapter_path) {
        (_, Some(_)) => "base+adapter",
        (Some(_), None) => "base",
        (None, None) => "unknown",
    };
    NewVariant {
        role: v.role.as_str(),
        name,
        kind: kind.to_string(),
        model_path: provenance.model_path,
        model_fingerprint: provenance.model_fingerprint,
        adapter_path: provenance.adapter_path,
        adapter_fingerprint: provenance.adapter_fingerprint,
        template_fingerprint: provenance.template_fingerprint,
        compute_dtype: provenance.compute_dtype,
        answers_sha256: provenance.answers_sha256,
        grades_sha256: grades_sha256(v, summary),
        out_of_scope: rates(&summary.refusal.out_of_scope),
        false_refusal: rates(&summary.refusal.false_refusal),
        scores,
    }
}

/// The grades file's SHA-256: the one `weigh` computed as it read the file (summary.json's
/// `inputs.<role>.sha256`) when summary.json names this very path, else read from the file.
/// Reading a large grades file a second time only to hash it again would double that cost.
fn grades_sha256(v: &VariantGrades, summary: &Summary) -> Option<String> {
    let input = match v.role {
        Role::Baseline => &summary.inputs.baseline,
        Role::Candidate => &summary.inputs.candidate,
    };
    if Path::new(&input.path) == v.grades_path && !input.sha256.is_empty() {
        return Some(input.sha256.clone());
    }
    fsutil::sha256_file(v.grades_path).ok()
}

/// What the run records beside a grades file say about the answers graded.
#[derive(Debug, Default)]
struct Provenance {
    model_path: Option<String>,
    model_fingerprint: Option<String>,
    adapter_path: Option<String>,
    adapter_fingerprint: Option<String>,
    template_fingerprint: Option<String>,
    compute_dtype: Option<String>,
    answers_sha256: Option<String>,
}

impl Provenance {
    /// From `<grades>.run.json` (answers path and hash) and the answers' own run.json (model,
    /// adapter, template); whatever is missing stays unknown.
    fn of(grades_path: &Path) -> Provenance {
        // A record that is missing or unreadable leaves the provenance unknown.
        let read = |file: &Path| crate::formats::run_record::read(file).ok().flatten();
        let text = |v: &serde_json::Value, ptr: &str| {
            v.pointer(ptr).and_then(|x| x.as_str()).map(str::to_string)
        };
        let mut p = Provenance::default();
        let Some(grades_run) = read(grades_path) else {
            return p;
        };
        p.answers_sha256 = text(&grades_run, "/answers/sha256");
        p.compute_dtype = text(&grades_run, "/compute_dtype");
        let Some(answers) = text(&grades_run, "/answers/path") else {
            return p;
        };
        // The answers path as recorded; for a report directory moved since, try beside the
        // grades file.
        let mut candidates = vec![PathBuf::from(&answers)];
        if let (Some(dir), Some(name)) = (grades_path.parent(), Path::new(&answers).file_name()) {
            candidates.push(dir.join(name));
        }
        let Some(run) = candidates.iter().find_map(|a| read(a)) else {
            return p;
        };
        p.model_path = text(&run, "/model/path");
        p.model_fingerprint = text(&run, "/model/fingerprint");
        p.adapter_path = text(&run, "/adapter/path");
        p.adapter_fingerprint = text(&run, "/adapter/fingerprint");
        p.template_fingerprint = text(&run, "/chat_template/fingerprint");
        p.compute_dtype = p.compute_dtype.or_else(|| text(&run, "/compute_dtype"));
        p
    }
}

// ---------------------------------------------------------------------------------------------
// Importing a report directory written before it could be recorded.

/// Now, UTC, RFC 3339 with milliseconds.
pub fn finished_now() -> String {
    rfc3339(std::time::SystemTime::now())
}

/// A time as `YYYY-MM-DDTHH:MM:SS.mmmZ` (UTC): sorts as text in time order.
pub fn rfc3339(t: std::time::SystemTime) -> String {
    let d = t.duration_since(std::time::UNIX_EPOCH).unwrap_or_default();
    let secs = d.as_secs() as i64;
    let (y, m, day) = crate::report::dir::civil_from_days(secs.div_euclid(86_400));
    let s = secs.rem_euclid(86_400);
    format!(
        "{y:04}-{m:02}-{day:02}T{:02}:{:02}:{:02}.{:03}Z",
        s / 3600,
        s / 60 % 60,
        s % 60,
        d.subsec_millis()
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn timestamps_are_utc_rfc3339() {
        // 2000-02-29T12:34:56.789Z = 951827696.789 s after the epoch (`date -u -d @951827696`).
        let t = std::time::UNIX_EPOCH + std::time::Duration::from_millis(951_827_696_789);
        assert_eq!(rfc3339(t), "2000-02-29T12:34:56.789Z");
        assert_eq!(rfc3339(std::time::UNIX_EPOCH), "1970-01-01T00:00:00.000Z");
    }

    #[test]
    fn content_hash_sees_every_field() {
        let refs = vec!["R".to_string()];
        let h = content_hash("Q?", &refs, Expect::Answer, "general");
        assert_eq!(h.len(), 64);
        assert_ne!(h, content_hash("Q!", &refs, Expect::Answer, "general"));
        assert_ne!(h, content_hash("Q?", &[], Expect::Answer, "general"));
        assert_ne!(h, content_hash("Q?", &refs, Expect::Refuse, "general"));
        assert_ne!(h, content_hash("Q?", &refs, Expect::Answer, "other"));
        assert_eq!(h, content_hash("Q?", &refs, Expect::Answer, "general"));
    }

    #[test]
    fn content_hash_is_the_sha256_of_the_compact_json_array() {
        // Expected values from Python 3's json and hashlib (outside the project):
        //   hashlib.sha256(json.dumps(["Ferry at 7?", ["The 7:05 \"Gull\"", "ø\n"], "answer",
        //       "timetable"], separators=(",", ":"), ensure_ascii=False).encode()).hexdigest()
        let refs = vec!["The 7:05 \"Gull\"".to_string(), "ø\n".to_string()];
        assert_eq!(
            content_hash("Ferry at 7?", &refs, Expect::Answer, "timetable"),
            "d1f03c62eb9f4ee2a4672b37e6047ab3644f8baa529a315043d59c108fbad376"
        );
        // The same bytes as the `serde_json::Value` array the history has always hashed.
        for (q, refs, cat) in [
            ("Q?", vec![], "general"),
            ("tab\there \u{1}", vec!["\\".to_string(), "€".into()], "x/y"),
        ] {
            let value = serde_json::json!([q, refs, "refuse", cat]);
            assert_eq!(
                content_hash(q, &refs, Expect::Refuse, cat),
                fsutil::sha256_hex(value.to_string().as_bytes())
            );
        }
    }

    #[test]
    fn import_commands_quote_their_words() {
        let opts = RecordOptions {
            path: PathBuf::from("reports/history.sqlite"),
            label: Some("training data v3".into()),
            source: "vet",
        };
        assert_eq!(
            import_command(&opts, Path::new("reports/2026-01-02-faq"), Path::new("sets/faq.jsonl")),
            "liftgate record reports/2026-01-02-faq --questions sets/faq.jsonl --history reports/history.sqlite --label 'training data v3'"
        );
        assert_eq!(parent_of(Path::new("out")), PathBuf::from("."));
        assert_eq!(
            parent_of(Path::new("reports/latest")),
            PathBuf::from("reports")
        );
    }
}
