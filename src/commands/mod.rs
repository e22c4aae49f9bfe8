//! Command glue, one module per subcommand: arguments to validated settings in one fallible
//! step, then the pipeline stages (`answer`, `grade`, `weigh`, `report`). Command modules never
//! import one another; what two of them share lives in `args`.

pub mod answer;
mod args;
pub mod gather;
pub mod grade;
pub mod leaks;
pub mod record;
pub mod trend;
pub mod vet;
pub mod weigh;

use crate::cli::Command;
use crate::error::Result;

/// What a successful command run means for the exit code.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Outcome {
    /// Exit 0: done; for `weigh` and `vet`, the verdict is GO.
    Success,
    /// Exit 1: `weigh` / `vet` only, the verdict is NO-GO.
    NoGo,
}

impl Outcome {
    /// The outcome of a run that ends in a verdict.
    pub fn from_verdict(go: bool) -> Self {
        if go {
            Outcome::Success
        } else {
            Outcome::NoGo
        }
    }
}

/// Leaves `value` to the operating system instead of dropping it: for a command's large
/// inputs and results just before the process exits, where freeing them one allocation at a
/// time is work nobody needs (tens of milliseconds for a 100,000-question set). Only for values
/// whose drop does nothing but free memory (no files to flush, no locks to release).
fn release_at_exit<T>(value: T) {
    std::mem::forget(value);
}

pub fn run(command: Command) -> Result<Outcome> {
    match command {
        Command::Answer(args) => answer::run(&args),
        Command::Gather(args) => gather::run(&args),
        Command::Grade(args) => grade::run(&args),
        Command::Weigh(args) => weigh::run(&args),
        Command::Vet(args) => vet::run(&args),
        Command::Trend(args) => trend::run(&args),
        Command::Record(args) => record::run(&args),
        Command::Leaks(args) => leaks::run(&args),
    }
}
