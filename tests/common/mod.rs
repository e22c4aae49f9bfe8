//! Helpers shared by the integration tests: the real `liftgate` binary run in a fresh
//! temporary directory, and the fixtures under tests/fixtures/.
//!
//! ```ignore
//! mod common;
//! use common::Bin;
//!
//! let t = Bin::new();                              // a fresh temp dir, removed on drop
//! t.write("set.jsonl", SET);                       // files relative to it
//! t.copy_dir(&common::fixture("runner/llama/model"), "model");
//! let run = t.run(["grade", "--questions", "set.jsonl", ...]);  // cwd = the temp dir
//! run.expect_code(2).expect_stderr(&["set.jsonl:2:"]);
//! assert!(!t.path("grades.jsonl").exists());
//! ```
//!
//! Each integration-test crate compiles this module on its own and uses a part of it.
#![allow(dead_code)]

use serde_json::Value;
use std::ffi::{OsStr, OsString};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// The liftgate binary built for this test run.
pub const BIN: &str = env!("CARGO_BIN_EXE_liftgate");

/// A path under tests/fixtures/ of this checkout.
pub fn fixture(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures")
        .join(rel)
}

/// A command for the binary with `args`, stdin closed, no working directory set (for runs that
/// need no temp dir, or that are spawned and stopped by the test).
pub fn command<I, S>(args: I) -> Command
where
    I: IntoIterator<Item = S>,
    S: AsRef<OsStr>,
{
    let mut c = Command::new(BIN);
    c.args(args).stdin(Stdio::null());
    c
}

/// Runs the binary with `args` in the current directory and waits for it.
pub fn run<I, S>(args: I) -> Run
where
    I: IntoIterator<Item = S>,
    S: AsRef<OsStr>,
{
    Run::of(command(args))
}

/// A fresh temporary directory (removed when dropped) to run the binary in.
pub struct Bin {
    dir: tempfile::TempDir,
}

impl Default for Bin {
    fn default() -> Self {
        Self::new()
    }
}

impl Bin {
    pub fn new() -> Bin {
        Bin {
            dir: tempfile::tempdir().expect("a temporary directory"),
        }
    }

    /// The temporary directory itself.
    pub fn dir(&self) -> &Path {
        self.dir.path()
    }

    /// `name` (a relative path) inside the temporary directory.
    pub fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    /// Writes `contents` to `name`, creating parent directories; returns the full path.
    pub fn write(&self, name: &str, contents: impl AsRef<[u8]>) -> PathBuf {
        let p = self.path(name);
        if let Some(parent) = p.parent() {
            std::fs::create_dir_all(parent).unwrap();
        }
        std::fs::write(&p, contents).unwrap_or_else(|e| panic!("write {}: {e}", p.display()));
        p
    }

    /// The text of `name`; panics naming the file if it cannot be read.
    pub fn read(&self, name: &str) -> String {
        let p = self.path(name);
        std::fs::read_to_string(&p).unwrap_or_else(|e| panic!("read {}: {e}", p.display()))
    }

    /// The bytes of `name`; panics naming the file if it cannot be read.
    pub fn read_bytes(&self, name: &str) -> Vec<u8> {
        let p = self.path(name);
        std::fs::read(&p).unwrap_or_else(|e| panic!("read {}: {e}", p.display()))
    }

    /// Copies the directory `src` (recursively) to `name`; returns the full path.
    pub fn copy_dir(&self, src: &Path, name: &str) -> PathBuf {
        let dst = self.path(name);
        copy_tree(src, &dst);
        dst
    }

    /// A command for the binary with `args`, run in the temporary directory, stdin closed.
    pub fn command<I, S>(&self, args: I) -> Command
    where
        I: IntoIterator<Item = S>,
        S: AsRef<OsStr>,
    {
        let mut c = command(args);
        c.current_dir(self.dir.path());
        c
    }

    /// Runs the binary with `args` in the temporary directory and waits for it.
    pub fn run<I, S>(&self, args: I) -> Run
    where
        I: IntoIterator<Item = S>,
        S: AsRef<OsStr>,
    {
        Run::of(self.command(args))
    }
}

/// Copies a directory tree.
pub fn copy_tree(src: &Path, dst: &Path) {
    std::fs::create_dir_all(dst).unwrap();
    for e in std::fs::read_dir(src)
        .unwrap_or_else(|e| panic!("read {}: {e}", src.display()))
        .flatten()
    {
        let to = dst.join(e.file_name());
        if e.file_type().unwrap().is_dir() {
            copy_tree(&e.path(), &to);
        } else {
            std::fs::copy(e.path(), &to).unwrap();
        }
    }
}

/// A finished run of the binary.
#[derive(Debug)]
pub struct Run {
    /// The command line (program excluded), for messages.
    pub args: Vec<OsString>,
    /// The exit code; `None` when the process was ended by a signal.
    pub code: Option<i32>,
    /// stdout and stderr, decoded lossily (see `stdout_bytes` for the raw bytes).
    pub stdout: String,
    pub stderr: String,
    pub stdout_bytes: Vec<u8>,
    /// Wall-clock time from spawn to exit.
    pub elapsed: Duration,
}

impl Run {
    /// Runs `cmd` to completion, capturing both streams.
    pub fn of(mut cmd: Command) -> Run {
        let args = cmd.get_args().map(OsStr::to_os_string).collect();
        let start = Instant::now();
        let out = cmd.output().expect("the liftgate binary runs");
        Run {
            args,
            code: out.status.code(),
            stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
            stdout_bytes: out.stdout,
            elapsed: start.elapsed(),
        }
    }

    /// The command line and both streams, for a failure message.
    pub fn describe(&self) -> String {
        let args: Vec<_> = self.args.iter().map(|a| a.to_string_lossy()).collect();
        format!(
            "liftgate {}\nexit: {:?}\n--- stdout ---\n{}\n--- stderr ---\n{}",
            args.join(" "),
            self.code,
            self.stdout.trim_end(),
            self.stderr.trim_end()
        )
    }

    /// Asserts the exit code, showing the command line and both streams otherwise.
    #[track_caller]
    pub fn expect_code(&self, code: i32) -> &Run {
        assert_eq!(
            self.code,
            Some(code),
            "expected exit {code}\n{}",
            self.describe()
        );
        self
    }

    /// Asserts exit 0.
    #[track_caller]
    pub fn expect_success(&self) -> &Run {
        self.expect_code(0)
    }

    /// Asserts a verdict exit (0 GO or 1 NO-GO) and returns it.
    #[track_caller]
    pub fn expect_verdict(&self) -> i32 {
        assert!(
            matches!(self.code, Some(0 | 1)),
            "expected exit 0 or 1\n{}",
            self.describe()
        );
        self.code.unwrap()
    }

    /// Asserts that stderr contains every needle.
    #[track_caller]
    pub fn expect_stderr(&self, needles: &[&str]) -> &Run {
        for n in needles {
            assert!(
                self.stderr.contains(n),
                "stderr lacks {n:?}\n{}",
                self.describe()
            );
        }
        self
    }

    /// Asserts that stdout is empty.
    #[track_caller]
    pub fn expect_no_stdout(&self) -> &Run {
        assert!(
            self.stdout_bytes.is_empty(),
            "stdout should be empty\n{}",
            self.describe()
        );
        self
    }
}

/// The rows of an answers file without their wall-clock `ms` field (the one field that may
/// differ between runs).
pub fn answers_without_ms(path: &Path) -> Vec<Value> {
    std::fs::read_to_string(path)
        .unwrap()
        .lines()
        .map(|l| {
            let mut v: Value = serde_json::from_str(l).unwrap();
            v.as_object_mut().unwrap().remove("ms").expect("ms field");
            v
        })
        .collect()
}

/// A question set (JSONL) asking the `question` of each recorded answer in turn, with ids q0,
/// q1, ... and a placeholder reference: for comparing answers with recorded ones.
pub fn question_set(recorded: &[Value]) -> String {
    let mut set = String::new();
    for (i, a) in recorded.iter().enumerate() {
        let row = serde_json::json!({"id": format!("q{i}"), "question": a["question"], "references": ["x"]});
        set.push_str(&row.to_string());
        set.push('\n');
    }
    set
}
