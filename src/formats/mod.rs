//! The file formats of the pipeline (docs/interface.md, "Files"), each with its one reader and
//! writer: the question set, the answers file and its resume journal, the grades file, and the
//! run records beside answers and grades. Later stages read these types; nothing here reads a
//! later stage's types.
//!
//! Shared here: the JSONL row checks that turn a serde error into a message naming the line and
//! the field, and the check that a file's rows follow the question set id for id.

pub mod answers;
pub mod grades;
pub mod journal;
pub mod questions;
pub mod run_record;
pub mod training;

use crate::error::{Error, Result};
use questions::QuestionSet;
use std::path::Path;

/// Each `(line, text)` of a JSONL file through `parse`, in parallel; the rows in line order,
/// or the first error in line order (the one a reader going line by line would meet).
pub fn parse_lines<T: Send>(
    lines: &[(usize, &str)],
    parse: impl Fn(usize, &str) -> Result<T> + Sync,
) -> Result<Vec<T>> {
    use rayon::prelude::*;
    let parsed: Vec<Result<T>> = lines
        .par_iter()
        .map(|(line, text)| parse(*line, text))
        .collect();
    parsed.into_iter().collect()
}

/// Whether a JSON value deserialises as `T`; the reason when it does not.
pub fn check<T: serde::de::DeserializeOwned>(v: &serde_json::Value) -> Option<String> {
    T::deserialize(v).err().map(|e| e.to_string())
}

/// A JSONL row's field rule: name, required, and the type check.
pub type FieldRule = (&'static str, bool, fn(&serde_json::Value) -> Option<String>);

/// Turns a serde error on one JSONL row into an error naming the line and, where it can be
/// found, the field: a missing required field, a value of the wrong type or an unknown field.
pub fn row_error(
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
