//! `liftgate gather`: the shard answers files of one run → [`answer::gather`] → the answers
//! file and run record of a whole run.

use super::{args, Outcome};
use crate::answer;
use crate::cli::GatherArgs;
use crate::error::Result;
use crate::formats::questions::QuestionSet;

pub fn run(args: &GatherArgs) -> Result<Outcome> {
    args::check_questions_and_out(&args.questions, &args.out)?;
    let set = QuestionSet::load(&args.questions)?;
    let run = answer::gather(&set, &args.shards, &args.out)?;
    eprintln!(
        "liftgate: gathered {} shards, {} answers, into {}",
        args.shards.len(),
        run.records.len(),
        args.out.display()
    );
    Ok(Outcome::Success)
}
