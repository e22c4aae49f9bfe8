//! Errors and how they map to exit codes.
//!
//! docs/interface.md fixes the exit codes: 2 for bad input or usage (with a message naming the file,
//! line and field), 3 for an internal failure. A NO-GO verdict (exit 1) is not an error; the
//! commands return it as a value.

use std::fmt;
use std::path::{Path, PathBuf};

/// Where in a user's file a problem was found.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Location {
    pub file: PathBuf,
    /// 1-based line number, when the file is line-oriented (JSONL, TOML).
    pub line: Option<usize>,
    /// The field (JSON key, TOML key, tensor name, config key) at fault.
    pub field: Option<String>,
}

impl fmt::Display for Location {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.file.display())?;
        if let Some(line) = self.line {
            write!(f, ":{line}")?;
        }
        if let Some(field) = &self.field {
            write!(f, ": field `{field}`")?;
        }
        Ok(())
    }
}

/// Every failure liftgate reports. `Input` and `Usage` exit 2, `Internal` exits 3.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// Something wrong in a file the user gave us.
    #[error("{location}: {message}")]
    Input { location: Location, message: String },
    /// A wrong combination of flags or a missing path.
    #[error("{0}")]
    Usage(String),
    /// A bug in liftgate.
    #[error("internal error: {0}")]
    Internal(String),
    /// SIGINT (Ctrl-C) or SIGTERM stopped the run; `saved` says what was kept and where.
    #[error("stopped by {}: {saved}", signal_name(*.signal))]
    Interrupted { signal: i32, saved: String },
}

pub type Result<T, E = Error> = std::result::Result<T, E>;

impl Error {
    /// A problem with a whole file.
    pub fn file(file: impl AsRef<Path>, message: impl Into<String>) -> Self {
        Error::Input {
            location: Location {
                file: file.as_ref().to_path_buf(),
                line: None,
                field: None,
            },
            message: message.into(),
        }
    }

    /// A problem on one line of a file.
    pub fn line(file: impl AsRef<Path>, line: usize, message: impl Into<String>) -> Self {
        Error::Input {
            location: Location {
                file: file.as_ref().to_path_buf(),
                line: Some(line),
                field: None,
            },
            message: message.into(),
        }
    }

    /// A problem with one field, on one line when the file is line-oriented.
    pub fn field(
        file: impl AsRef<Path>,
        line: Option<usize>,
        field: impl Into<String>,
        message: impl Into<String>,
    ) -> Self {
        Error::Input {
            location: Location {
                file: file.as_ref().to_path_buf(),
                line,
                field: Some(field.into()),
            },
            message: message.into(),
        }
    }

    pub fn usage(message: impl Into<String>) -> Self {
        Error::Usage(message.into())
    }

    pub fn internal(message: impl Into<String>) -> Self {
        Error::Internal(message.into())
    }

    /// The process exit code for this error (docs/interface.md, "Exit codes"). A stop by a signal
    /// exits 128 + the signal number, as shells report it (130 for Ctrl-C, 143 for SIGTERM).
    pub fn exit_code(&self) -> i32 {
        match self {
            Error::Input { .. } | Error::Usage(_) => 2,
            Error::Internal(_) => 3,
            Error::Interrupted { signal, .. } => 128 + signal,
        }
    }
}

/// "SIGINT" / "SIGTERM" for the signals liftgate stops on, else "signal N".
pub fn signal_name(signal: i32) -> String {
    match signal {
        2 => "SIGINT (Ctrl-C)".to_string(),
        15 => "SIGTERM".to_string(),
        n => format!("signal {n}"),
    }
}

/// Candle errors surface while computing on weights that already loaded and validated, so they
/// are bugs unless a loader turned them into an `Input` error with the file named.
impl From<candle_core::Error> for Error {
    fn from(e: candle_core::Error) -> Self {
        Error::Internal(format!("tensor computation failed: {e}"))
    }
}
