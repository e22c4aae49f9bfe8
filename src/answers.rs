//! The answers file (interface.md, "Answers file"), written by `answer`, read by `grade`.
//!
//! JSONL, one object a question in the set's order: `id`, `answer` (decoded text, special tokens
//! skipped, surrounding whitespace trimmed), `finish`, `prompt_tokens`, `new_tokens`, `ms`.
//! Beside it, `<out>.run.json` records what produced it (see `crate::generate::RunInfo`).

use crate::error::{Error, Result};
use crate::fsutil;
use crate::questions::QuestionSet;
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// Why generation stopped for one answer.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Finish {
    /// An end-of-sequence token was produced.
    Eos,
    /// `--max-new-tokens` was reached.
    Length,
    /// A stop string was produced.
    Stop,
}

/// One row of an answers file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AnswerRecord {
    pub id: String,
    pub answer: String,
    pub finish: Finish,
    pub prompt_tokens: usize,
    pub new_tokens: usize,
    /// Wall-clock milliseconds spent on this answer (excluded from determinism guarantees).
    pub ms: u64,
}

/// Reads an answers file and checks it matches the question set id for id, in order, and (when
/// `<path>.run.json` records one) that it was made from this set.
pub fn load_for_set(path: &Path, set: &QuestionSet) -> Result<Vec<AnswerRecord>> {
    let rows = load_rows(path, set)?;
    check_set_fingerprint(path, set)?;
    Ok(rows)
}

/// [`load_for_set`] without the set-fingerprint check: ids only.
pub fn load_rows(path: &Path, set: &QuestionSet) -> Result<Vec<AnswerRecord>> {
    let lines = fsutil::read_jsonl_lines(path)?;
    let mut rows = Vec::with_capacity(lines.len());
    for (line, text) in &lines {
        let row: AnswerRecord = serde_json::from_str(text).map_err(|e| {
            row_error(
                path,
                *line,
                text,
                "answer row",
                &e,
                &[
                    ("id", true, check::<String>),
                    ("answer", true, check::<String>),
                    ("finish", true, check::<Finish>),
                    ("prompt_tokens", true, check::<usize>),
                    ("new_tokens", true, check::<usize>),
                    ("ms", true, check::<u64>),
                ],
            )
        })?;
        rows.push((*line, row));
    }
    check_ids(path, set, rows.iter().map(|(l, r)| (*l, r.id.as_str())))?;
    Ok(rows.into_iter().map(|(_, r)| r).collect())
}

/// Whether a JSON value deserialises as `T`; the reason when it does not.
pub(crate) fn check<T: serde::de::DeserializeOwned>(v: &serde_json::Value) -> Option<String> {
    T::deserialize(v).err().map(|e| e.to_string())
}

/// A JSONL row's field rule: name, required, and the type check.
pub(crate) type FieldRule = (&'static str, bool, fn(&serde_json::Value) -> Option<String>);

/// Turns a serde error on one JSONL row into an error naming the line and, where it can be
/// found, the field: a missing required field, a value of the wrong type or an unknown field.
pub(crate) fn row_error(
    path: &Path,
    line: usize,
    text: &str,
    what: &str,
    err: &serde_json::Error,
    fields: &[FieldRule],
) -> Error {
    let generic = || Error::line(path, line, format!("not valid as {what}: {err}"));
    let Ok(serde_json::Value::Object(obj)) = serde_json::from_str::<serde_json::Value>(text) else {
        return generic();
    };
    for (name, required, check) in fields {
        match obj.get(*name) {
            None if *required => {
                return Error::field(path, Some(line), *name, "required but missing")
            }
            None => {}
            Some(v) => {
                if let Some(reason) = check(v) {
                    return Error::field(path, Some(line), *name, reason);
                }
            }
        }
    }
    if let Some(unknown) = obj.keys().find(|k| !fields.iter().any(|(n, _, _)| n == k)) {
        let known: Vec<&str> = fields.iter().map(|(n, _, _)| *n).collect();
        return Error::field(
            path,
            Some(line),
            unknown.as_str(),
            format!(
                "unknown field in a {what}; expected only {}",
                known.join(", ")
            ),
        );
    }
    generic()
}

/// `<file>.run.json`: the record beside an answers or grades file of what produced it.
pub fn run_json_path(file: &Path) -> PathBuf {
    let mut s = file.as_os_str().to_os_string();
    s.push(".run.json");
    PathBuf::from(s)
}

/// `<file>.run.json` parsed, or None when there is no such record.
fn run_record(file: &Path) -> Result<Option<serde_json::Value>> {
    let run = run_json_path(file);
    let bytes = match std::fs::read(&run) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(Error::file(&run, format!("cannot read: {e}"))),
    };
    serde_json::from_slice(&bytes)
        .map(Some)
        .map_err(|e| Error::line(&run, e.line(), format!("not valid JSON: {e}")))
}

/// The `compute_dtype` recorded in `<file>.run.json`, if the record exists and has one.
pub fn recorded_compute_dtype(file: &Path) -> Option<String> {
    let value = run_record(file).ok()??;
    value.get("compute_dtype")?.as_str().map(str::to_string)
}

/// When `<file>.run.json` exists and records the question set's fingerprint
/// (`questions.fingerprint`), it must be `set`'s: the same ids in a changed set (edited
/// references, expectations or questions) would otherwise be scored or weighed silently
/// against answers made for other questions.
pub fn check_set_fingerprint(file: &Path, set: &QuestionSet) -> Result<()> {
    let run = run_json_path(file);
    let Some(value) = run_record(file)? else {
        return Ok(());
    };
    let Some(recorded) = value.pointer("/questions/fingerprint") else {
        return Ok(());
    };
    let recorded = recorded.as_str().ok_or_else(|| {
        Error::field(
            &run,
            None,
            "questions.fingerprint",
            "expected a SHA-256 hex string",
        )
    })?;
    if recorded != set.fingerprint {
        let short = |s: &str| s.chars().take(12).collect::<String>();
        return Err(Error::field(
            &run,
            None,
            "questions.fingerprint",
            format!(
                "{} was made from a different question set (sha256 {}…) than {} (sha256 {}…); \
                 run it again with this set, or use the set it was made from",
                file.display(),
                short(recorded),
                set.path.display(),
                short(&set.fingerprint)
            ),
        ));
    }
    Ok(())
}

/// Checks that a file's rows carry exactly the set's ids in the set's order, naming the first
/// line that differs.
pub fn check_ids<'a>(
    path: &Path,
    set: &QuestionSet,
    ids: impl Iterator<Item = (usize, &'a str)>,
) -> Result<()> {
    let mut count = 0usize;
    for (i, (line, id)) in ids.enumerate() {
        count = i + 1;
        match set.questions.get(i) {
            None => {
                return Err(Error::field(
                    path,
                    Some(line),
                    "id",
                    format!(
                        "extra row {id:?}: the question set {} has only {} questions",
                        set.path.display(),
                        set.len()
                    ),
                ))
            }
            Some(q) if q.id != id => {
                return Err(Error::field(
                    path,
                    Some(line),
                    "id",
                    format!(
                        "expected {:?} (question {} of {}), found {id:?}; the file does not match the question set (missing, extra or reordered rows)",
                        q.id,
                        i + 1,
                        set.path.display()
                    ),
                ))
            }
            Some(_) => {}
        }
    }
    if count < set.len() {
        return Err(Error::file(
            path,
            format!(
                "has {count} rows but the question set {} has {} questions; first missing id {:?}",
                set.path.display(),
                set.len(),
                set.questions[count].id
            ),
        ));
    }
    Ok(())
}
