//! `liftgate weigh`: load the set, both grades files and the policy; weigh; write
//! summary.json and report.md into the report directory (both or neither); print the terminal
//! summary on stdout. Exit 0 on GO, 1 on NO-GO, 2 on bad input (interface.md).

use super::Outcome;
use crate::cli::WeighArgs;
use crate::error::Result;
use crate::fsutil;
use crate::grades;
use crate::history::{self, RecordOptions};
use crate::policy::Policy;
use crate::questions::QuestionSet;
use crate::report::{self, summary};
use crate::weigh::{self, Settings, WeighInput};
use std::path::Path;

pub fn run(args: &WeighArgs) -> Result<Outcome> {
    let settings = Settings::new(args.stats.resamples, args.stats.seed, args.stats.confidence)?;
    let policy = Policy::load_or_default(args.stats.policy.as_deref())?;
    let history =
        RecordOptions::resolve(&args.history, &history::parent_of(&args.report), "weigh")?;
    let set = QuestionSet::load(&args.questions)?;
    let baseline = grades::load_for_set(&args.baseline, &set)?;
    let candidate = grades::load_for_set(&args.candidate, &set)?;
    let inputs = describe_inputs(
        &set,
        &args.baseline,
        &args.candidate,
        args.stats.policy.as_deref(),
    )?;
    eprintln!(
        "liftgate: weighing {} questions ({} resamples, seed {})",
        set.len(),
        settings.resamples,
        settings.seed
    );
    let summary = weigh::weigh(&WeighInput {
        set: &set,
        baseline: &baseline,
        candidate: &candidate,
        policy: &policy,
        settings,
        inputs,
    })?;
    report::write_report_dir(&args.report, &summary)?;
    let graded = history::two((&baseline, &args.baseline), (&candidate, &args.candidate));
    history::record_after_report(history.as_ref(), &set, &graded, &summary, &args.report);
    print!("{}", report::terminal::render(&summary));
    println!("report: {}", args.report.join("report.md").display());
    Ok(if summary.verdict.go {
        Outcome::Success
    } else {
        Outcome::NoGo
    })
}

/// The inputs a summary records: paths and SHA-256 fingerprints of the set, both grades files
/// and the policy (or "built-in").
pub fn describe_inputs(
    set: &QuestionSet,
    baseline: &Path,
    candidate: &Path,
    policy: Option<&Path>,
) -> Result<summary::Inputs> {
    let policy = match policy {
        Some(p) => summary::PolicySource {
            path: Some(p.display().to_string()),
            sha256: Some(fsutil::sha256_file(p)?),
            source: "file".into(),
        },
        None => summary::PolicySource {
            path: None,
            sha256: None,
            source: "built-in".into(),
        },
    };
    let mut approximations = Vec::new();
    for (label, grades) in [("baseline", baseline), ("candidate", candidate)] {
        if let Some(dtype) = crate::answers::recorded_compute_dtype(grades) {
            if dtype != "f32" {
                approximations.push(format!("{label}: {dtype}"));
            }
        }
    }
    Ok(summary::Inputs {
        questions: input_file(&set.path, set.fingerprint.clone()),
        baseline: input_file(baseline, fsutil::sha256_file(baseline)?),
        candidate: input_file(candidate, fsutil::sha256_file(candidate)?),
        policy,
        approximations,
    })
}

fn input_file(path: &Path, sha256: String) -> summary::InputFile {
    summary::InputFile {
        path: path.display().to_string(),
        sha256,
    }
}
