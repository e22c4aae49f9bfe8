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

pub mod render;
pub mod store;
pub mod trend;

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
            eprintln!(
                "liftgate: warning: this run was NOT recorded in the history {}: {e}\n\
                 liftgate: the report in {} is complete and the verdict stands. To record it later:\n  {}",
                opts.path.display(),
                report_dir.display(),
                import_command(opts, report_dir, &set.path)
            );
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
    let questions = set
        .questions
        .iter()
        .map(|q| NewQuestion {
            key: QuestionKey {
                id: q.id.clone(),
                content_hash: Some(content_hash(
                    &q.question,
                    &q.references,
                    q.expect,
                    &q.category,
                )),
                expect: q.expect,
            },
            category: q.category.clone(),
        })
        .collect();
    let run = new_run(
        opts,
        set_name(&set.path),
        &set.path,
        &set.fingerprint,
        questions,
        variants,
        summary,
        report_dir,
        finished_at,
    )?;
    let mut store = Store::open_for_writing(&opts.path)?;
    store.insert_run(&run)
}

/// SHA-256 of a question's content: the JSON array `[question, references, expect,
/// category]`, compact. The id is the key, not content; the line number is not content.
pub fn content_hash(
    question: &str,
    references: &[String],
    expect: Expect,
    category: &str,
) -> String {
    let value = serde_json::json!([question, references, expect.as_str(), category]);
    fsutil::sha256_hex(value.to_string().as_bytes())
}

/// A set's name: its file name without extension.
pub fn set_name(path: &Path) -> String {
    path.file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "set".into())
}

#[allow(clippy::too_many_arguments)]
fn new_run(
    opts: &RecordOptions,
    set_name: String,
    set_path: &Path,
    set_fingerprint: &str,
    questions: Vec<NewQuestion>,
    variants: &[VariantGrades],
    summary: &Summary,
    report_dir: &Path,
    finished_at: String,
) -> Result<NewRun> {
    let summary_json = json(summary)?;
    let n = questions.len();
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
        let s = match m {
            Metric::ExactMatch => &summary.metrics.exact_match,
            Metric::TokenF1 => &summary.metrics.token_f1,
            Metric::RougeL => &summary.metrics.rouge_l,
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
        questions,
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
        grades_sha256: fsutil::sha256_file(v.grades_path).ok(),
        out_of_scope: rates(&summary.refusal.out_of_scope),
        false_refusal: rates(&summary.refusal.false_refusal),
        scores,
    }
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

/// What `liftgate record` needs.
#[derive(Debug, Clone)]
pub struct ImportRequest {
    pub report_dir: PathBuf,
    /// The question set the report was made with; by default the path its summary.json
    /// records. Its fingerprint must match the summary's.
    pub questions: Option<PathBuf>,
}

/// Imports one report directory (summary.json, the two grades files) into the history.
/// Returns the run id and any warnings for stderr.
pub fn import_report(opts: &RecordOptions, req: &ImportRequest) -> Result<(i64, Vec<String>)> {
    let dir = &req.report_dir;
    let summary_path = dir.join("summary.json");
    let bytes = std::fs::read(&summary_path).map_err(|e| {
        Error::file(
            &summary_path,
            format!("cannot read the report's summary.json: {e} (expected a report directory written by `liftgate weigh` or `vet`)"),
        )
    })?;
    let summary: Summary = serde_json::from_slice(&bytes).map_err(|e| {
        Error::line(
            &summary_path,
            e.line(),
            format!("not a liftgate summary.json: {e}"),
        )
    })?;
    let mut warnings = Vec::new();
    // The grades files: in the report directory (vet), else where the summary says (weigh).
    let mut grades_paths = Vec::new();
    for (role, name, input) in [
        (
            Role::Baseline,
            "baseline.grades.jsonl",
            &summary.inputs.baseline,
        ),
        (
            Role::Candidate,
            "candidate.grades.jsonl",
            &summary.inputs.candidate,
        ),
    ] {
        let local = dir.join(name);
        let path = if local.is_file() {
            local
        } else {
            PathBuf::from(&input.path)
        };
        let sha = fsutil::sha256_file(&path).map_err(|_| {
            Error::file(
                &path,
                format!(
                    "the {} grades weighed in {} were not found here or in the report directory",
                    role.as_str(),
                    summary_path.display()
                ),
            )
        })?;
        if sha != input.sha256 {
            return Err(Error::file(
                &path,
                format!(
                    "is not the {} grades file the report weighed (its SHA-256 differs from summary.json's inputs.{}.sha256)",
                    role.as_str(),
                    role.as_str()
                ),
            ));
        }
        grades_paths.push((role, path));
    }
    let want_fp = &summary.inputs.questions.sha256;
    let set_path = req
        .questions
        .clone()
        .unwrap_or_else(|| PathBuf::from(&summary.inputs.questions.path));
    let set = match QuestionSet::load(&set_path) {
        Ok(set) if &set.fingerprint == want_fp => Some(set),
        Ok(_) if req.questions.is_some() => {
            return Err(Error::file(
                &set_path,
                format!(
                    "is not the question set this report was made with (its SHA-256 differs from summary.json's inputs.questions.sha256 {})",
                    short(want_fp)
                ),
            ))
        }
        Err(e) if req.questions.is_some() => return Err(e),
        _ => None,
    };
    let finished_at = std::fs::metadata(&summary_path)
        .and_then(|m| m.modified())
        .map(rfc3339)
        .unwrap_or_else(|_| finished_now());
    match set {
        Some(set) => {
            let mut loaded = Vec::new();
            for (role, path) in &grades_paths {
                loaded.push((
                    *role,
                    crate::formats::grades::load_for_set(path, &set)?,
                    path.clone(),
                ));
            }
            let variants: Vec<VariantGrades> = loaded
                .iter()
                .map(|(role, g, p)| VariantGrades {
                    role: *role,
                    grades: g,
                    grades_path: p,
                })
                .collect();
            let id = record(opts, &set, &variants, &summary, dir, finished_at)?;
            Ok((id, warnings))
        }
        None => {
            warnings.push(format!(
                "the question set this report was made with ({}, SHA-256 {}) was not found with that content; the run is recorded without question contents, so its questions cannot count as unchanged in like-for-like comparisons. Pass --questions FILE with the set as it was to record them",
                summary.inputs.questions.path,
                short(want_fp)
            ));
            let mut loaded = Vec::new();
            for (role, path) in &grades_paths {
                loaded.push((*role, read_grades(path)?, path.clone()));
            }
            let base = &loaded[0].1;
            for (_, g, p) in &loaded[1..] {
                if g.len() != base.len() || g.iter().zip(base).any(|(a, b)| a.id != b.id) {
                    return Err(Error::file(
                        p,
                        "its ids differ from the baseline grades' (the two must be row for row)",
                    ));
                }
            }
            let questions = base
                .iter()
                .map(|g| NewQuestion {
                    key: QuestionKey {
                        id: g.id.clone(),
                        content_hash: None,
                        expect: g.expect,
                    },
                    category: g.category.clone(),
                })
                .collect();
            let variants: Vec<VariantGrades> = loaded
                .iter()
                .map(|(role, g, p)| VariantGrades {
                    role: *role,
                    grades: g,
                    grades_path: p,
                })
                .collect();
            let run = new_run(
                opts,
                set_name(Path::new(&summary.inputs.questions.path)),
                Path::new(&summary.inputs.questions.path),
                want_fp,
                questions,
                &variants,
                &summary,
                dir,
                finished_at,
            )?;
            let mut store = Store::open_for_writing(&opts.path)?;
            Ok((store.insert_run(&run)?, warnings))
        }
    }
}

/// A grades file read without its question set (rows checked as `grade` writes them).
fn read_grades(path: &Path) -> Result<Vec<GradeRecord>> {
    fsutil::read_jsonl_lines(path)?
        .into_iter()
        .map(|(line, text)| {
            serde_json::from_str::<GradeRecord>(&text)
                .map_err(|e| Error::line(path, line, format!("not a grade row: {e}")))
        })
        .collect()
}

// ---------------------------------------------------------------------------------------------
// The trend.

/// What `trend` shows.
#[derive(Debug, Clone)]
pub struct TrendOptions {
    /// Only runs of this set name.
    pub set: Option<String>,
    /// Only the last N runs of each set.
    pub last: Option<usize>,
    /// Compare these two runs (ids or labels) instead of consecutive runs.
    pub between: Option<(String, String)>,
    /// Without `between`: only the last N consecutive pairs of each set (None: all).
    pub pairs: Option<usize>,
    pub boot: trend::BootSettings,
}

/// Reads the history and builds the trend.
pub fn build_trend(store: &Store, opts: &TrendOptions) -> Result<trend::Trend> {
    let all = store.runs(opts.set.as_deref())?;
    if all.is_empty() {
        return Err(Error::usage(match &opts.set {
            Some(s) => format!(
                "{}: no recorded runs of the question set {s:?}",
                store.path().display()
            ),
            None => format!("{}: no recorded runs yet", store.path().display()),
        }));
    }
    // Series by set name; the last N of each.
    let mut by_set: BTreeMap<String, Vec<&StoredRun>> = BTreeMap::new();
    for r in &all {
        by_set.entry(r.set_name.clone()).or_default().push(r);
    }
    if let Some(n) = opts.last {
        for runs in by_set.values_mut() {
            let skip = runs.len().saturating_sub(n);
            runs.drain(..skip);
        }
    }
    let mut revisions: BTreeMap<String, Vec<QuestionKey>> = BTreeMap::new();
    for runs in by_set.values() {
        for r in runs {
            if !revisions.contains_key(&r.set_fingerprint) {
                revisions.insert(
                    r.set_fingerprint.clone(),
                    store.revision(&r.set_fingerprint)?,
                );
            }
        }
    }
    let rev = |r: &StoredRun| -> &[QuestionKey] { &revisions[&r.set_fingerprint] };
    let mut scores_cache: BTreeMap<(i64, usize), Scores> = BTreeMap::new();
    let mut series = Vec::new();
    for (name, runs) in &by_set {
        let revs: Vec<&[QuestionKey]> = runs.iter().map(|r| rev(r)).collect();
        // Work per distinct revision, not per run: a long history has few revisions.
        let distinct: std::collections::BTreeSet<&str> =
            runs.iter().map(|r| r.set_fingerprint.as_str()).collect();
        let distinct_revs: Vec<&[QuestionKey]> = distinct
            .iter()
            .map(|fp| revisions[*fp].as_slice())
            .collect();
        let common = trend::common_unchanged(&distinct_revs);
        let at_of: BTreeMap<&str, Vec<usize>> = distinct
            .iter()
            .map(|fp| (*fp, trend::positions(&revisions[*fp], &common)))
            .collect();
        let mut out_runs = Vec::with_capacity(runs.len());
        for (k, r) in runs.iter().enumerate() {
            // The same file fingerprint is the same bytes: unchanged.
            let change = (k > 0).then(|| {
                if runs[k - 1].set_fingerprint == r.set_fingerprint {
                    trend::SetChange::default()
                } else {
                    trend::set_change(revs[k - 1], revs[k])
                }
            });
            let (b, c) = (baseline_idx(r), candidate_idx(r));
            for idx in [b, c] {
                if let Entry::Vacant(e) = scores_cache.entry((r.id, idx)) {
                    e.insert(store.scores(r.id, idx)?);
                }
            }
            let lfl = trend::means_at(
                revs[k],
                &scores_cache[&(r.id, b)],
                &scores_cache[&(r.id, c)],
                &at_of[r.set_fingerprint.as_str()],
            );
            // Only the candidates' grades of the compared runs are needed again.
            scores_cache.remove(&(r.id, b));
            scores_cache.remove(&(r.id, c));
            out_runs.push(trend_run(r, revs[k].len(), change, lfl));
        }
        let set_changed = distinct.len() > 1
            || distinct_revs
                .iter()
                .any(|r| r.iter().any(|q| q.content_hash.is_none()));
        series.push(trend::Series {
            set_name: name.clone(),
            revisions: distinct.len(),
            set_changed,
            common_unchanged_questions: common.len(),
            runs: out_runs,
        });
    }
    // Comparisons.
    let mut pairs: Vec<(&str, &StoredRun, &StoredRun)> = Vec::new();
    if let Some((a, b)) = &opts.between {
        let ra = find_run(&all, a, store.path())?;
        let rb = find_run(&all, b, store.path())?;
        let (earlier, later) =
            if (ra.finished_at.as_str(), ra.id) <= (rb.finished_at.as_str(), rb.id) {
                (ra, rb)
            } else {
                (rb, ra)
            };
        if earlier.id == later.id {
            return Err(Error::usage(format!(
                "--between {a} {b}: both name run {}; give two different runs",
                earlier.id
            )));
        }
        for r in [earlier, later] {
            if !revisions.contains_key(&r.set_fingerprint) {
                revisions.insert(
                    r.set_fingerprint.clone(),
                    store.revision(&r.set_fingerprint)?,
                );
            }
        }
        pairs.push(("between", earlier, later));
    } else {
        for runs in by_set.values() {
            let windows: Vec<&[&StoredRun]> = runs.windows(2).collect();
            let skip = opts.pairs.map_or(0, |n| windows.len().saturating_sub(n));
            for w in &windows[skip..] {
                pairs.push(("consecutive", w[0], w[1]));
            }
        }
    }
    let mut comparisons = Vec::new();
    for (k, (kind, e, l)) in pairs.into_iter().enumerate() {
        let (re, rl) = (
            &revisions[&e.set_fingerprint],
            &revisions[&l.set_fingerprint],
        );
        let ids = trend::common_unchanged(&[re, rl]);
        let (ce, cl) = (candidate_idx(e), candidate_idx(l));
        for (run, idx) in [(e.id, ce), (l.id, cl)] {
            if let Entry::Vacant(e) = scores_cache.entry((run, idx)) {
                e.insert(store.scores(run, idx)?);
            }
        }
        let metrics = trend::compare_candidates(
            re,
            &scores_cache[&(e.id, ce)],
            rl,
            &scores_cache[&(l.id, cl)],
            &ids,
            opts.boot,
            trend::DOMAIN_COMPARISON + k as u32,
        );
        let gate = metric_named(&l.gate_metric).unwrap_or(Metric::TokenF1);
        let d = metrics.get(gate);
        let sentence = trend::comparison_sentence(
            &trend::run_name(e.id, e.label.as_deref()),
            &trend::run_name(l.id, l.label.as_deref()),
            ids.len(),
            gate,
            d,
            opts.boot.confidence,
        );
        comparisons.push(trend::Comparison {
            kind: kind.to_string(),
            earlier: e.id,
            later: l.id,
            earlier_label: e.label.clone(),
            later_label: l.label.clone(),
            shared_questions: ids.len(),
            gate_metric: gate.as_str().to_string(),
            regression: d.clearly_worse,
            metrics: metrics.clone(),
            sentence,
        });
    }
    Ok(trend::Trend {
        format: trend::FORMAT.to_string(),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        history: store.path().display().to_string(),
        comparison_settings: trend::ComparisonSettings {
            resamples: opts.boot.resamples,
            seed: opts.boot.seed,
            confidence: opts.boot.confidence,
            interval: "bca".into(),
            method: "paired bootstrap of the mean per-question difference between the two runs' candidates, on the questions both runs hold with unchanged content (questions resampled with replacement, the three metrics jointly); BCa interval (Efron 1987)".into(),
        },
        series,
        comparisons,
    })
}

fn metric_named(name: &str) -> Option<Metric> {
    Metric::ALL.into_iter().find(|m| m.as_str() == name)
}

fn baseline_idx(r: &StoredRun) -> usize {
    r.variants
        .iter()
        .find(|v| v.role == "baseline")
        .map_or(0, |v| v.idx)
}

/// The run's first candidate.
fn candidate_idx(r: &StoredRun) -> usize {
    r.variants
        .iter()
        .find(|v| v.role == "candidate")
        .map_or(1, |v| v.idx)
}

/// A run by id (digits) or label; a label given to several runs is ambiguous.
fn find_run<'a>(runs: &'a [StoredRun], key: &str, path: &Path) -> Result<&'a StoredRun> {
    if let Ok(id) = key.parse::<i64>() {
        if let Some(r) = runs.iter().find(|r| r.id == id) {
            return Ok(r);
        }
    }
    let labelled: Vec<&StoredRun> = runs
        .iter()
        .filter(|r| r.label.as_deref() == Some(key))
        .collect();
    match labelled.as_slice() {
        [one] => Ok(one),
        [] => Err(Error::usage(format!(
            "--between: no run with id or label {key:?} in {}",
            path.display()
        ))),
        many => Err(Error::usage(format!(
            "--between: the label {key:?} names {} runs ({}); give a run id",
            many.len(),
            many.iter()
                .map(|r| r.id.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ))),
    }
}

fn trend_run(
    r: &StoredRun,
    questions: usize,
    change: Option<trend::SetChange>,
    like_for_like: trend::MetricSet<trend::MeanPair>,
) -> trend::TrendRun {
    let c = candidate_idx(r);
    let metric = |m: Metric| {
        r.metrics
            .iter()
            .find(|(idx, name, _)| *idx == c && name == m.as_str())
            .map(|(_, _, v)| v.clone())
            .unwrap_or_default()
    };
    let variant = |role: &str| r.variants.iter().find(|v| v.role == role);
    let share = |f: fn(&store::StoredVariant) -> (u64, Option<f64>)| trend::SharePair {
        n: variant("baseline")
            .or(variant("candidate"))
            .map_or(0, |v| f(v).0),
        baseline: variant("baseline").and_then(|v| f(v).1),
        candidate: r.variants.iter().find(|v| v.idx == c).and_then(|v| f(v).1),
    };
    trend::TrendRun {
        run: r.id,
        label: r.label.clone(),
        finished_at: r.finished_at.clone(),
        source: r.source.clone(),
        report_dir: r.report_dir.clone(),
        set: trend::SetRevision {
            fingerprint: r.set_fingerprint.clone(),
            short: short(&r.set_fingerprint).to_string(),
            questions,
            change,
        },
        variants: r
            .variants
            .iter()
            .map(|v| trend::VariantInfo {
                index: v.idx,
                role: v.role.clone(),
                name: v.name.clone(),
                kind: v.kind.clone(),
            })
            .collect(),
        gate_metric: r.gate_metric.clone(),
        metrics: trend::MetricSet::from_fn(metric),
        refusal: trend::RefusalShares {
            out_of_scope: share(|v| v.out_of_scope),
            false_refusal: share(|v| v.false_refusal),
        },
        verdict: if r.verdict_go { "GO" } else { "NO-GO" }.to_string(),
        like_for_like,
    }
}

fn short(fingerprint: &str) -> &str {
    &fingerprint[..fingerprint.len().min(12)]
}

// ---------------------------------------------------------------------------------------------
// Time.

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
