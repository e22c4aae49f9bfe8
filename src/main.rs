//! The `liftgate` binary: parse arguments, run one command, map the outcome to an exit code
//! (interface.md, "Exit codes": 0 success or GO, 1 NO-GO, 2 bad input, 3 internal failure).

use clap::Parser;
use liftgate::cli::Cli;
use liftgate::commands::{self, Outcome};

fn main() {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            // --help and --version are successes; every other parse failure is a usage error.
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            std::process::exit(code);
        }
    };
    let code = match commands::run(cli.command) {
        Ok(Outcome::Success) => 0,
        Ok(Outcome::NoGo) => 1,
        Err(e) => {
            eprintln!("liftgate: {e}");
            e.exit_code()
        }
    };
    std::process::exit(code);
}
