//! `liftgate record`: import report directories written before they could be recorded (or
//! whose recording failed) into the history, from their summary.json and grades files.

use super::Outcome;
use crate::cli::RecordArgs;
use crate::error::Result;
use crate::history::{self, store::Store, ImportRequest, RecordOptions};

pub fn run(args: &RecordArgs) -> Result<Outcome> {
    let opts = RecordOptions {
        path: args.history.clone(),
        label: args.label.clone(),
        source: "record",
    };
    if opts.path.exists() {
        Store::check_existing(&opts.path)?;
    }
    for dir in &args.reports {
        let (id, warnings) = history::import_report(
            &opts,
            &ImportRequest {
                report_dir: dir.clone(),
                questions: args.questions.clone(),
            },
        )?;
        for w in warnings {
            eprintln!("liftgate: warning: {}: {w}", dir.display());
        }
        println!(
            "recorded {} as run {id} in {}",
            dir.display(),
            opts.path.display()
        );
    }
    Ok(Outcome::Success)
}
