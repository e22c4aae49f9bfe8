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
        .map(|a| shell_quote(&a.to_string_lossy()))
        .collect::<Vec<_>>()
        .join(" ")
}

/// `s` as one POSIX shell word: unchanged when it holds only safe characters, else in single
/// quotes (a single quote inside becomes `'\''`).
fn shell_quote(s: &str) -> String {
    let safe = !s.is_empty()
        && s.chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./=:,+@%".contains(c));
    if safe {
        s.to_string()
    } else {
        format!("'{}'", s.replace('\'', "'\\''"))
    }
}

#[cfg(test)]
mod tests {
    use super::shell_quote;

    #[test]
    fn shell_words_survive_quoting() {
        assert_eq!(shell_quote("--max-new-tokens"), "--max-new-tokens");
        assert_eq!(shell_quote("models/base"), "models/base");
        assert_eq!(shell_quote("Be brief."), "'Be brief.'");
        assert_eq!(shell_quote("it's"), "'it'\\''s'");
        assert_eq!(shell_quote(""), "''");
    }
}
