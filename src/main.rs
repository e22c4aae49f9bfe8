//! The `liftgate` binary: parse arguments, run one command, map the outcome to an exit code
//! (docs/interface.md, "Exit codes": 0 success or GO, 1 NO-GO, 2 bad input, 3 internal failure).

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
            if let liftgate::Error::Interrupted { .. } = e {
                eprintln!(
                    "liftgate: to continue, run the same command again:\n  {}",
                    this_command()
                );
            }
            e.exit_code()
        }
    };
    std::process::exit(code);
}

/// The command line of this process, quoted for a POSIX shell, to repeat it.
fn this_command() -> String {
    std::env::args_os()
        .map(|a| liftgate::fsutil::shell_quote(&a.to_string_lossy()))
        .collect::<Vec<_>>()
        .join(" ")
}
