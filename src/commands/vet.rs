//! `liftgate vet`: the whole job in one command (issue 4). Answer the held-out set with the
//! base model and with base + adapter, grade both, weigh, write everything into one report
//! directory and print the verdict.
//!
//! With no `--model/--adapter/--questions` it runs the bundled demo: the Tidewren Ferry
//! Cooperative base model and adapter under `demo/models/` and `eval-sets/ferry-faq.jsonl`.
//!
//! The report directory (default `reports/<YYYY-MM-DD>-<set name>`, with `-2`, `-3`, ... added
//! when it exists) is claimed before any work so runs never overwrite each other. Every input
//! is checked before it is claimed; if a later stage of a new run fails the directory is removed
//! again, so a failed run leaves nothing half-written.
//!
//! A run stopped by Ctrl-C/SIGTERM or killed keeps its directory: the answers are saved one by
//! one in journals beside the answers files (see `answer::answer_to`), and the same command
//! continues it: in `--report DIR` when given, else in the newest unfinished directory under
//! `reports/` made for the same question set and generation settings. A directory in use is
//! locked, so a second `vet` started meanwhile never continues it.

use super::answer::{self, AnswerSettings};
use super::grade::{grade_set, write_grades};
use super::weigh::describe_inputs;
use super::Outcome;
use crate::cli::VetArgs;
use crate::error::{Error, Result};
use crate::fsutil;
use crate::generate::RunInfo;
use crate::history::{self, RecordOptions};
use crate::interrupt::StopFlag;
use crate::journal::{self, RunIdentity};
use crate::policy::Policy;
use crate::questions::QuestionSet;
use crate::report;
use crate::score::RefusalDetector;
use crate::weigh::{self, Settings, WeighInput};
use std::path::{Path, PathBuf};

/// The bundled demo, relative to the project root.
const DEMO_MODEL: &str = "demo/models/base";
const DEMO_ADAPTER: &str = "demo/models/adapter";
const DEMO_QUESTIONS: &str = "eval-sets/ferry-faq.jsonl";
/// Demo answers are one or two sentences; the cap keeps the demo quick.
const DEMO_MAX_NEW_TOKENS: usize = 48;

/// File names inside a report directory.
pub const BASELINE_ANSWERS: &str = "baseline.answers.jsonl";
pub const CANDIDATE_ANSWERS: &str = "candidate.answers.jsonl";
pub const BASELINE_GRADES: &str = "baseline.grades.jsonl";
pub const CANDIDATE_GRADES: &str = "candidate.grades.jsonl";

struct Inputs {
    model: PathBuf,
    adapter: PathBuf,
    questions: PathBuf,
    max_new_tokens: usize,
}

pub fn run(args: &VetArgs) -> Result<Outcome> {
    let inputs = resolve_inputs(args)?;
    let g = &args.generation;
    let base_settings = AnswerSettings::new(
        &inputs.model,
        None,
        g.system.as_deref(),
        inputs.max_new_tokens,
        g.batch,
        g.threads,
        g.ignore_eos,
    )?;
    if !inputs.adapter.is_dir() {
        return Err(Error::usage(format!(
            "--adapter {}: not a directory (expected a peft adapter directory with adapter_config.json and adapter_model.safetensors)",
            inputs.adapter.display()
        )));
    }
    let base_settings = AnswerSettings {
        restart: args.restart,
        weights: g.weights,
        ..base_settings
    };
    let cand_settings = AnswerSettings {
        adapter: Some(inputs.adapter.clone()),
        ..base_settings.clone()
    };
    let stats = Settings::new(args.stats.resamples, args.stats.seed, args.stats.confidence)?;
    let policy = Policy::load_or_default(args.stats.policy.as_deref())?;
    let set = QuestionSet::load(&inputs.questions)?;
    let reports_parent = args
        .report
        .as_deref()
        .map_or("reports".into(), history::parent_of);
    let history = RecordOptions::resolve(&args.history, &reports_parent, "vet")?;

    let stop = StopFlag::install()?;

    let unfinished = match (&args.report, args.restart) {
        (None, false) => find_unfinished(
            Path::new("reports"),
            &set_name(&inputs.questions),
            &set,
            &base_settings,
        ),
        _ => None,
    };
    let claim = match (&args.report, unfinished) {
        (Some(dir), _) => claim_given_dir(dir)?,
        (None, Some(claim)) => claim,
        (None, None) => claim_dated_dir(Path::new("reports"), &set_name(&inputs.questions))?,
    };
    let dir = claim.dir.clone();
    if claim.fresh {
        eprintln!("liftgate: vet: report directory {}", dir.display());
    } else {
        eprintln!(
            "liftgate: vet: continuing the unfinished run in {} (pass --restart to start over)",
            dir.display()
        );
    }
    match vet_into(
        &dir,
        &base_settings,
        &cand_settings,
        &stats,
        &policy,
        &set,
        args,
        &stop,
        history.as_ref(),
    ) {
        Ok(outcome) => Ok(outcome),
        Err(e @ Error::Interrupted { .. }) => Err(e),
        Err(e) => {
            claim.discard_if_fresh();
            Err(e)
        }
    }
}

/// A report directory this run writes into, locked for as long as the value lives.
struct Claim {
    dir: PathBuf,
    /// This run created the directory.
    created: bool,
    /// The directory held no saved work of an earlier run.
    fresh: bool,
    _lock: Option<std::fs::File>,
}

impl Claim {
    /// Locks `dir`; None when another run holds it.
    fn lock(dir: &Path, created: bool) -> Result<Option<Claim>> {
        // A directory opens as a file (and takes an flock) on unix only.
        #[cfg(unix)]
        let lock = {
            let file = std::fs::File::open(dir)
                .map_err(|e| Error::file(dir, format!("cannot open the report directory: {e}")))?;
            if !fsutil::try_lock(&file)
                .map_err(|e| Error::file(dir, format!("cannot lock the report directory: {e}")))?
            {
                return Ok(None);
            }
            Some(file)
        };
        #[cfg(not(unix))]
        let lock = None;
        Ok(Some(Claim {
            dir: dir.to_path_buf(),
            created,
            fresh: created || !has_saved_work(dir),
            _lock: lock,
        }))
    }

    /// After a failure of a new run: nothing half-written is left (the directory if this run
    /// made it, else the files it wrote). Earlier runs' saved work is never removed.
    fn discard_if_fresh(&self) {
        if !self.fresh {
            return;
        }
        if self.created {
            let _ = std::fs::remove_dir_all(&self.dir);
            return;
        }
        for name in stage_files() {
            let _ = std::fs::remove_file(self.dir.join(name));
        }
    }
}

/// Every file a run writes into its report directory before the report itself.
fn stage_files() -> Vec<String> {
    let mut names = Vec::new();
    for answers in [BASELINE_ANSWERS, CANDIDATE_ANSWERS] {
        names.push(answers.to_string());
        names.push(format!("{answers}.run.json"));
        names.push(format!("{answers}.partial"));
    }
    for grades in [BASELINE_GRADES, CANDIDATE_GRADES] {
        names.push(grades.to_string());
        names.push(format!("{grades}.run.json"));
    }
    names
}

/// Whether `dir` holds answers (finished or journaled) of an earlier run.
fn has_saved_work(dir: &Path) -> bool {
    [BASELINE_ANSWERS, CANDIDATE_ANSWERS].iter().any(|a| {
        let out = dir.join(a);
        journal::journal_path(&out).exists() || answer::run_json_path(&out).exists()
    })
}

/// The identities of the answers saved in a report directory (journals and finished files).
fn saved_identities(dir: &Path) -> Vec<RunIdentity> {
    let mut ids = Vec::new();
    for a in [BASELINE_ANSWERS, CANDIDATE_ANSWERS] {
        let out = dir.join(a);
        if let Some(id) = journal::read_identity(&journal::journal_path(&out)) {
            ids.push(id);
        } else if let Some(info) = std::fs::read_to_string(answer::run_json_path(&out))
            .ok()
            .and_then(|t| serde_json::from_str::<RunInfo>(&t).ok())
        {
            ids.push(RunIdentity::of(&info));
        }
    }
    ids
}

/// The newest unlocked, unfinished `<date>-<name>[-N]` directory under `parent` whose saved
/// answers were made for this question set and these generation settings. Model and adapter
/// are checked later, against the full identity, when the answers are continued.
fn find_unfinished(
    parent: &Path,
    name: &str,
    set: &QuestionSet,
    settings: &AnswerSettings,
) -> Option<Claim> {
    let mut found: Vec<(std::time::SystemTime, PathBuf)> = Vec::new();
    for entry in std::fs::read_dir(parent).ok()?.flatten() {
        let path = entry.path();
        let file_name = entry.file_name().to_string_lossy().into_owned();
        if !is_dated_dir_name(&file_name, name)
            || !path.is_dir()
            || path.join("summary.json").exists()
            || path.join("report.md").exists()
        {
            continue;
        }
        let ids = saved_identities(&path);
        let same = |id: &RunIdentity| {
            id.questions_fingerprint == set.fingerprint
                && id.max_new_tokens == settings.max_new_tokens
                && id.ignore_eos == settings.ignore_eos
                && id.system == settings.system
        };
        if ids.is_empty() || !ids.iter().all(same) {
            continue;
        }
        let modified = entry
            .metadata()
            .and_then(|m| m.modified())
            .unwrap_or(std::time::UNIX_EPOCH);
        found.push((modified, path));
    }
    found.sort();
    found
        .into_iter()
        .rev()
        .find_map(|(_, dir)| Claim::lock(&dir, false).ok().flatten())
}

/// `YYYY-MM-DD-<name>` or `YYYY-MM-DD-<name>-<N>`, as [`claim_dated_dir`] makes them.
fn is_dated_dir_name(dir_name: &str, name: &str) -> bool {
    let bytes = dir_name.as_bytes();
    let dated = bytes.len() > 11
        && bytes[..10].iter().enumerate().all(|(i, b)| {
            if i == 4 || i == 7 {
                *b == b'-'
            } else {
                b.is_ascii_digit()
            }
        })
        && bytes[10] == b'-';
    if !dated {
        return false;
    }
    let rest = &dir_name[11..];
    rest == name
        || rest
            .strip_prefix(name)
            .and_then(|r| r.strip_prefix('-'))
            .is_some_and(|n| !n.is_empty() && n.bytes().all(|b| b.is_ascii_digit()))
}

#[allow(clippy::too_many_arguments)]
fn vet_into(
    dir: &Path,
    base_settings: &AnswerSettings,
    cand_settings: &AnswerSettings,
    stats: &Settings,
    policy: &Policy,
    set: &QuestionSet,
    args: &VetArgs,
    stop: &StopFlag,
    history: Option<&RecordOptions>,
) -> Result<Outcome> {
    let detector = RefusalDetector::with_extra_phrases(&policy.refusal.extra_phrases);
    let mut grade_paths = Vec::new();
    for (label, settings, answers_name, grades_name) in [
        (
            "baseline (base model)",
            base_settings,
            BASELINE_ANSWERS,
            BASELINE_GRADES,
        ),
        (
            "candidate (base + adapter)",
            cand_settings,
            CANDIDATE_ANSWERS,
            CANDIDATE_GRADES,
        ),
    ] {
        stop.check(|| format!("the answers saved so far are kept in {}", dir.display()))?;
        eprintln!(
            "liftgate: vet: answering {} questions with the {label}",
            set.len()
        );
        let run = answer::answer_to(&dir.join(answers_name), settings, set, stop)?;
        let grades = grade_set(set, &run.records, &detector);
        let grades_path = dir.join(grades_name);
        write_grades(&grades_path, &grades, set, &dir.join(answers_name))?;
        grade_paths.push((grades_path, grades));
    }
    stop.check(|| format!("all answers are saved in {}", dir.display()))?;
    let (baseline_path, baseline) = &grade_paths[0];
    let (candidate_path, candidate) = &grade_paths[1];
    let summary_inputs = describe_inputs(
        set,
        baseline_path,
        candidate_path,
        args.stats.policy.as_deref(),
    )?;
    eprintln!(
        "liftgate: vet: weighing ({} resamples, seed {})",
        stats.resamples, stats.seed
    );
    let summary = weigh::weigh(&WeighInput {
        set,
        baseline,
        candidate,
        policy,
        settings: *stats,
        inputs: summary_inputs,
    })?;
    report::write_report_dir(dir, &summary)?;
    let graded = history::two((baseline, baseline_path), (candidate, candidate_path));
    history::record_after_report(history, set, &graded, &summary, dir);
    print!("{}", report::terminal::render(&summary));
    println!("report: {}", dir.join("report.md").display());
    Ok(if summary.verdict.go {
        Outcome::Success
    } else {
        Outcome::NoGo
    })
}

/// The demo when no model is given, else the user's three paths (clap makes them all-or-none).
fn resolve_inputs(args: &VetArgs) -> Result<Inputs> {
    match (&args.model, &args.adapter, &args.questions) {
        (Some(model), Some(adapter), Some(questions)) => {
            if !questions.is_file() {
                return Err(Error::usage(format!("--questions {}: no such file", questions.display())));
            }
            Ok(Inputs {
                model: model.clone(),
                adapter: adapter.clone(),
                questions: questions.clone(),
                max_new_tokens: args.generation.max_new_tokens,
            })
        }
        (None, None, None) => {
            let root = demo_root().ok_or_else(|| {
                Error::usage(format!(
                    "the bundled demo was not found: run `liftgate vet` from the liftgate project directory (it needs {DEMO_MODEL}, {DEMO_ADAPTER} and {DEMO_QUESTIONS}), or give --model, --adapter and --questions"
                ))
            })?;
            // The demo answers are short; an explicit --max-new-tokens still wins.
            let max_new_tokens = if args.generation.max_new_tokens == 128 {
                DEMO_MAX_NEW_TOKENS
            } else {
                args.generation.max_new_tokens
            };
            Ok(Inputs {
                model: root.join(DEMO_MODEL),
                adapter: root.join(DEMO_ADAPTER),
                questions: root.join(DEMO_QUESTIONS),
                max_new_tokens,
            })
        }
        _ => Err(Error::usage(
            "give all three of --model, --adapter and --questions, or none of them to run the bundled demo",
        )),
    }
}

/// The project directory holding the demo: the current directory when it has one, else the
/// directory this binary was built from.
fn demo_root() -> Option<PathBuf> {
    let has_demo = |root: &Path| root.join(DEMO_MODEL).join("config.json").is_file();
    let cwd = PathBuf::from(".");
    if has_demo(&cwd) {
        return Some(cwd);
    }
    let built = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    has_demo(&built).then_some(built)
}

/// The question set's file name without extension, for the report directory name.
fn set_name(questions: &Path) -> String {
    let stem = questions
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let clean: String = stem
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '-'
            }
        })
        .collect();
    if clean.is_empty() {
        "set".into()
    } else {
        clean
    }
}

/// A `--report DIR` given by the user: created if absent; refused when it already holds a report
/// (runs never overwrite each other) or another run is writing into it.
fn claim_given_dir(dir: &Path) -> Result<Claim> {
    if dir.join("summary.json").exists() || dir.join("report.md").exists() {
        return Err(Error::usage(format!(
            "--report {}: already holds a report; choose a new directory",
            dir.display()
        )));
    }
    let created = !dir.exists();
    std::fs::create_dir_all(dir)
        .map_err(|e| Error::file(dir, format!("cannot create the report directory: {e}")))?;
    Claim::lock(dir, created)?.ok_or_else(|| {
        Error::usage(format!(
            "--report {}: another liftgate vet is writing into it",
            dir.display()
        ))
    })
}

/// Creates `parent/<date>-<name>`, or `-2`, `-3`, ... when taken; `create_dir` is atomic, so two
/// runs started together still get different directories.
fn claim_dated_dir(parent: &Path, name: &str) -> Result<Claim> {
    std::fs::create_dir_all(parent)
        .map_err(|e| Error::file(parent, format!("cannot create the reports directory: {e}")))?;
    let base = format!("{}-{name}", utc_date_today());
    for n in 1..10_000 {
        let candidate = if n == 1 {
            parent.join(&base)
        } else {
            parent.join(format!("{base}-{n}"))
        };
        match std::fs::create_dir(&candidate) {
            Ok(()) => {
                return Claim::lock(&candidate, true)?.ok_or_else(|| {
                    Error::internal(format!("{} was locked as it was made", candidate.display()))
                })
            }
            Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => continue,
            Err(e) => {
                return Err(Error::file(
                    &candidate,
                    format!("cannot create the report directory: {e}"),
                ))
            }
        }
    }
    Err(Error::file(
        parent,
        "too many report directories for today; clean up old ones",
    ))
}

/// Today's date in UTC as YYYY-MM-DD.
fn utc_date_today() -> String {
    let secs = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs())
        .unwrap_or(0);
    let (y, m, d) = civil_from_days((secs / 86_400) as i64);
    format!("{y:04}-{m:02}-{d:02}")
}

/// Days since 1970-01-01 to a proleptic Gregorian (year, month, day): H. Hinnant's
/// `civil_from_days` algorithm ("chrono-Compatible Low-Level Date Algorithms").
fn civil_from_days(z: i64) -> (i64, u32, u32) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let y = yoe + era * 400;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    (if m <= 2 { y + 1 } else { y }, m, d)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn civil_dates_match_known_days() {
        // Unix epoch, a leap day and a far date (values checked with GNU `date -u -d @N`).
        assert_eq!(civil_from_days(0), (1970, 1, 1));
        assert_eq!(civil_from_days(11_016), (2000, 2, 29));
        assert_eq!(civil_from_days(20_789), (2026, 12, 2));
    }

    #[test]
    fn dated_dirs_never_collide() {
        let tmp = tempfile::tempdir().unwrap();
        let a = claim_dated_dir(tmp.path(), "set").unwrap();
        let b = claim_dated_dir(tmp.path(), "set").unwrap();
        assert_ne!(a.dir, b.dir);
        assert!(b.dir.to_string_lossy().ends_with("-set-2"));
        // A claimed directory is locked: nobody else can claim it to continue it.
        assert!(Claim::lock(&a.dir, false).unwrap().is_none());
        let a_dir = a.dir.clone();
        drop(a);
        assert!(Claim::lock(&a_dir, false).unwrap().is_some());
    }

    #[test]
    fn dated_dir_names_are_recognised_for_their_set_only() {
        assert!(is_dated_dir_name("2026-12-02-ferry-faq", "ferry-faq"));
        assert!(is_dated_dir_name("2026-12-02-ferry-faq-12", "ferry-faq"));
        assert!(!is_dated_dir_name("2026-12-02-ferry-faq-x", "ferry-faq"));
        assert!(!is_dated_dir_name("2026-12-02-ferry", "ferry-faq"));
        assert!(!is_dated_dir_name("2026-12-02-ferry-faq-", "ferry-faq"));
        assert!(!is_dated_dir_name("latest", "ferry-faq"));
        assert!(!is_dated_dir_name("2026-1x-02-ferry-faq", "ferry-faq"));
    }

    #[test]
    fn set_names_are_path_safe() {
        assert_eq!(
            set_name(Path::new("eval-sets/ferry-faq.jsonl")),
            "ferry-faq"
        );
        assert_eq!(set_name(Path::new("a b.jsonl")), "a-b");
    }
}
