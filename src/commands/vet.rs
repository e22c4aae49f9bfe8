//! `liftgate vet`: the whole job in one command (issue 4). Answer the held-out set with the
//! base model and with base + adapter, grade both, weigh, write everything into one report
//! directory and print the verdict.
//!
//! With no `--model/--adapter/--questions` it runs the bundled demo: the Tidewren Ferry
//! Cooperative base model and adapter under `demo/models/` and `eval-sets/ferry-faq.jsonl`.
//!
//! The report directory (default `reports/<YYYY-MM-DD>-<set name>`, with `-2`, `-3`, ... added
//! when it exists) is claimed before any work so runs never overwrite each other. Every input
//! is checked before it is claimed; if a later stage fails the directory is removed again, so a
//! failed run leaves nothing half-written.

use super::answer::{self, AnswerSettings};
use super::grade::grade_set;
use super::weigh::describe_inputs;
use super::Outcome;
use crate::cli::VetArgs;
use crate::error::{Error, Result};
use crate::fsutil;
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
    let cand_settings = AnswerSettings {
        adapter: Some(inputs.adapter.clone()),
        ..base_settings.clone()
    };
    let stats = Settings::new(args.stats.resamples, args.stats.seed, args.stats.confidence)?;
    let policy = Policy::load_or_default(args.stats.policy.as_deref())?;
    let set = QuestionSet::load(&inputs.questions)?;

    let dir = match &args.report {
        Some(dir) => claim_given_dir(dir)?,
        None => claim_dated_dir(Path::new("reports"), &set_name(&inputs.questions))?,
    };
    eprintln!("liftgate: vet: report directory {}", dir.display());
    match vet_into(
        &dir,
        &base_settings,
        &cand_settings,
        &stats,
        &policy,
        &set,
        args,
    ) {
        Ok(outcome) => Ok(outcome),
        Err(e) => {
            let _ = std::fs::remove_dir_all(&dir);
            Err(e)
        }
    }
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
        eprintln!(
            "liftgate: vet: answering {} questions with the {label}",
            set.len()
        );
        let run = answer::answer_set(settings, set)?;
        answer::write_outputs(&dir.join(answers_name), &run)?;
        let grades = grade_set(set, &run.records, &detector);
        let grades_path = dir.join(grades_name);
        fsutil::write_jsonl_atomic(&grades_path, &grades)?;
        grade_paths.push((grades_path, grades));
    }
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
/// (runs never overwrite each other).
fn claim_given_dir(dir: &Path) -> Result<PathBuf> {
    if dir.join("summary.json").exists() || dir.join("report.md").exists() {
        return Err(Error::usage(format!(
            "--report {}: already holds a report; choose a new directory",
            dir.display()
        )));
    }
    std::fs::create_dir_all(dir)
        .map_err(|e| Error::file(dir, format!("cannot create the report directory: {e}")))?;
    Ok(dir.to_path_buf())
}

/// Creates `parent/<date>-<name>`, or `-2`, `-3`, ... when taken; `create_dir` is atomic, so two
/// runs started together still get different directories.
fn claim_dated_dir(parent: &Path, name: &str) -> Result<PathBuf> {
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
            Ok(()) => return Ok(candidate),
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
        assert_ne!(a, b);
        assert!(b.to_string_lossy().ends_with("-set-2"));
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
