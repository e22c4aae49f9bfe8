//! `liftgate vet`: the whole job in one command. Answer the held-out set with the base model and
//! with base + adapter, grade both, weigh, write everything into one report directory and print
//! the verdict. The stages are the same functions `answer`, `grade` and `weigh` call.
//!
//! With no `--model/--adapter/--questions` it runs the bundled demo: the Tidewren Ferry
//! Cooperative base model and adapter under `demo/models/` and `eval-sets/ferry-faq.jsonl`.
//!
//! Every input is checked before a report directory is claimed (`report::dir`); if a later
//! stage of a new run fails the directory is removed again, so a failed run leaves nothing
//! half-written. A run stopped by Ctrl-C/SIGTERM or killed keeps its directory: the answers are
//! saved one by one in journals, and the same command continues it, in `--report DIR` when
//! given, else in the newest unfinished directory under `reports/` made for the same question
//! set and generation settings.

use super::{args, Outcome};
use crate::answer;
use crate::cli::VetArgs;
use crate::error::{Error, Result};
use crate::formats::questions::QuestionSet;
use crate::grade;
use crate::history::{self, RecordOptions};
use crate::interrupt::StopFlag;
use crate::policy::Policy;
use crate::report::summary::Leakage;
use crate::report::{self, dir};
use crate::score::RefusalDetector;
use crate::weigh::{self, WeighInput};
use std::path::{Path, PathBuf};

/// The bundled demo, relative to the project root.
const DEMO_MODEL: &str = "demo/models/base";
const DEMO_ADAPTER: &str = "demo/models/adapter";
const DEMO_QUESTIONS: &str = "eval-sets/ferry-faq.jsonl";
/// Demo answers are one or two sentences; the cap keeps the demo quick.
const DEMO_MAX_NEW_TOKENS: usize = 48;

/// Everything a vet run needs, checked against each other before any work.
struct Settings {
    /// Where the finished run is recorded; None with --no-history.
    history: Option<RecordOptions>,
    baseline: answer::Settings,
    candidate: answer::Settings,
    questions: PathBuf,
    stats: weigh::Settings,
    policy: Policy,
}

/// The demo when no model is given, else the user's three paths (clap makes them all-or-none).
fn settings(args: &VetArgs) -> Result<Settings> {
    let (model, adapter, questions, generation) =
        match (&args.model, &args.adapter, &args.questions) {
            (Some(model), Some(adapter), Some(questions)) => (
                model.clone(),
                adapter.clone(),
                questions.clone(),
                args::default_generation(&args.generation)?,
            ),
            (None, None, None) => {
                let root = demo_root().ok_or_else(|| {
                    Error::usage(format!(
                        "the bundled demo was not found: run `liftgate vet` from the liftgate project directory (it needs {DEMO_MODEL}, {DEMO_ADAPTER} and {DEMO_QUESTIONS}), or give --model, --adapter and --questions"
                    ))
                })?;
                (
                    root.join(DEMO_MODEL),
                    root.join(DEMO_ADAPTER),
                    root.join(DEMO_QUESTIONS),
                    args::generation(&args.generation, DEMO_MAX_NEW_TOKENS)?,
                )
            }
            _ => {
                return Err(Error::usage(
                    "give all three of --model, --adapter and --questions, or none of them to run the bundled demo",
                ))
            }
        };
    let variant = |adapter: Option<&Path>| {
        answer::Settings::new(&model, adapter, generation.clone(), args.restart)
    };
    let baseline = variant(None)?;
    let candidate = variant(Some(&adapter))?;
    if !questions.is_file() {
        return Err(Error::usage(format!(
            "--questions {}: no such file",
            questions.display()
        )));
    }
    let (stats, policy) = args::stats(&args.stats)?;
    let reports_parent = args
        .report
        .as_deref()
        .map_or("reports".into(), history::parent_of);
    let history = RecordOptions::resolve(&args.history, &reports_parent, "vet")?;
    Ok(Settings {
        history,
        baseline,
        candidate,
        questions,
        stats,
        policy,
    })
}

pub fn run(args: &VetArgs) -> Result<Outcome> {
    let settings = settings(args)?;
    let set = QuestionSet::load(&settings.questions)?;
    // Grading needs references: refuse before hours of answering, not after.
    set.check_references()?;
    // Likewise a bad training file.
    let leakage = args
        .train
        .as_deref()
        .map(|t| leakage(&set, t))
        .transpose()?;
    let stop = StopFlag::install()?;

    let reports = Path::new("reports");
    let name = dir::set_name(&settings.questions);
    let unfinished = match (&args.report, args.restart) {
        (None, false) => dir::find_unfinished(reports, &name, &set, &settings.baseline.generation),
        _ => None,
    };
    let claim = match (&args.report, unfinished) {
        (Some(given), _) => dir::claim_given_dir(given)?,
        (None, Some(claim)) => claim,
        (None, None) => dir::claim_dated_dir(reports, &name)?,
    };
    if claim.fresh {
        eprintln!("liftgate: vet: report directory {}", claim.dir.display());
    } else {
        eprintln!(
            "liftgate: vet: continuing the unfinished run in {} (pass --restart to start over)",
            claim.dir.display()
        );
    }
    match vet_into(&claim.dir, &settings, &set, args, leakage, &stop) {
        Ok(outcome) => Ok(outcome),
        Err(e @ Error::Interrupted { .. }) => Err(e),
        Err(e) => {
            claim.discard_if_fresh();
            Err(e)
        }
    }
}

fn vet_into(
    dir: &Path,
    settings: &Settings,
    set: &QuestionSet,
    args: &VetArgs,
    leakage: Option<Leakage>,
    stop: &StopFlag,
) -> Result<Outcome> {
    let detector = RefusalDetector::with_extra_phrases(&settings.policy.refusal.extra_phrases);
    let mut graded = Vec::new();
    for (label, variant, answers_name, grades_name) in [
        (
            "baseline (base model)",
            &settings.baseline,
            dir::BASELINE_ANSWERS,
            dir::BASELINE_GRADES,
        ),
        (
            "candidate (base + adapter)",
            &settings.candidate,
            dir::CANDIDATE_ANSWERS,
            dir::CANDIDATE_GRADES,
        ),
    ] {
        stop.check(|| format!("the answers saved so far are kept in {}", dir.display()))?;
        eprintln!(
            "liftgate: vet: answering {} questions with the {label}",
            set.len()
        );
        let answers_path = dir.join(answers_name);
        let run = answer::answer_to(&answers_path, variant, set, stop)?;
        let grades = grade::grade_set(set, &run.records, &detector);
        let grades_path = dir.join(grades_name);
        grade::write_grades(&grades_path, &grades, set, &answers_path)?;
        graded.push((grades_path, grades));
    }
    stop.check(|| format!("all answers are saved in {}", dir.display()))?;
    let (baseline_path, baseline) = &graded[0];
    let (candidate_path, candidate) = &graded[1];
    let inputs = weigh::describe_inputs(
        set,
        baseline_path,
        candidate_path,
        args.stats.policy.as_deref(),
    )?;
    eprintln!(
        "liftgate: vet: weighing ({} resamples, seed {})",
        settings.stats.resamples, settings.stats.seed
    );
    let mut summary = weigh::weigh(&WeighInput {
        set,
        baseline,
        candidate,
        policy: &settings.policy,
        settings: settings.stats,
        inputs,
    })?;
    if let Some(l) = leakage {
        let flagged = l.exact + l.normalised + l.near;
        if flagged > 0 {
            summary.warnings.push(format!(
                "{flagged} held-out question(s) repeat or closely reword a question of the training file {} ({} exact, {} after normalising, {} near duplicates): the fine-tune may have seen their answers, which inflates the lift. List them with `liftgate leaks`.",
                l.train.path, l.exact, l.normalised, l.near
            ));
        }
        summary.leakage = Some(l);
    }
    report::write_report_dir(dir, &summary)?;
    let graded = history::two((baseline, baseline_path), (candidate, candidate_path));
    history::record_after_report(settings.history.as_ref(), set, &graded, &summary, dir);
    print!("{}", report::terminal::render(&summary));
    println!("report: {}", dir.join("report.md").display());
    Ok(Outcome::from_verdict(summary.verdict.go))
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

/// The leak check of `--train`: counts by kind and the flagged ids.
fn leakage(set: &QuestionSet, train: &Path) -> Result<Leakage> {
    use crate::score::leaks::{find_leaks, LeakKind, DEFAULT_THRESHOLD};
    let rows = crate::formats::training::load_questions(train)?;
    let questions: Vec<&str> = set.questions.iter().map(|q| q.question.as_str()).collect();
    let texts: Vec<&str> = rows.iter().map(|(_, t)| t.as_str()).collect();
    let leaks = find_leaks(&questions, &texts, DEFAULT_THRESHOLD);
    let count = |k: LeakKind| leaks.iter().filter(|l| l.kind == k).count();
    Ok(Leakage {
        train: crate::formats::run_record::InputFile {
            path: train.display().to_string(),
            sha256: crate::fsutil::sha256_file(train)?,
        },
        exact: count(LeakKind::Exact),
        normalised: count(LeakKind::Normalised),
        near: count(LeakKind::Near),
        threshold: DEFAULT_THRESHOLD,
        ids: leaks
            .iter()
            .map(|l| set.questions[l.question].id.clone())
            .collect(),
    })
}
