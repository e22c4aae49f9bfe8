//! `liftgate weigh`: load the set, both grades files and the policy; weigh; write summary.json
//! and report.md into the report directory (both or neither); print the terminal summary on
//! stdout. Exit 0 on GO, 1 on NO-GO, 2 on bad input (docs/interface.md, "Exit codes").

use super::{args, Outcome};
use crate::cli::WeighArgs;
use crate::error::Result;
use crate::formats::grades;
use crate::formats::questions::QuestionSet;
use crate::history::{self, RecordOptions};
use crate::report;
use crate::weigh::{self, WeighInput};

pub fn run(args: &WeighArgs) -> Result<Outcome> {
    let (settings, policy) = args::stats(&args.stats)?;
    let history =
        RecordOptions::resolve(&args.history, &history::parent_of(&args.report), "weigh")?;
    // The three files are read and parsed at once; their errors are reported in this order.
    let (set, (baseline, candidate)) = rayon::join(
        || QuestionSet::load(&args.questions),
        || {
            rayon::join(
                || grades::read_rows(&args.baseline),
                || grades::read_rows(&args.candidate),
            )
        },
    );
    let set = set?;
    let baseline = grades::match_to_set(&args.baseline, &set, baseline?)?;
    let candidate = grades::match_to_set(&args.candidate, &set, candidate?)?;
    let inputs = weigh::describe_inputs(
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
    let graded = history::two((&baseline, &args.baseline), (&candidate, &args.candidate));
    // The history's share of recording runs alongside the statistics; it commits only once
    // the report is written.
    let summary = history::record_alongside(history.as_ref(), &set, &graded, &args.report, || {
        let summary = weigh::weigh(&WeighInput {
            set: &set,
            baseline: &baseline,
            candidate: &candidate,
            policy: &policy,
            settings,
            inputs,
        })?;
        report::write_report_dir(&args.report, &summary)?;
        Ok(summary)
    })?;
    print!("{}", report::terminal::render(&summary));
    println!("report: {}", args.report.join("report.md").display());
    let go = summary.verdict.go;
    super::release_at_exit((set, baseline, candidate, summary));
    Ok(Outcome::from_verdict(go))
}
