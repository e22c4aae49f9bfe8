//! The answers file (docs/interface.md, "Answers file"): written by `answer`, read by `grade`.
//!
//! JSONL, one object a question in the set's order. A reader needs only `id` and `answer`, so
//! answers made by another system (a serving stack, an API, a spreadsheet of hand-written
//! answers) grade as they are. `answer` also writes `finish`, `prompt_tokens`, `new_tokens` and
//! `ms`; these and any other fields are kept when present and written back unchanged, in their
//! order. Beside the file, `<out>.run.json` records what produced it
//! ([`crate::formats::run_record::RunInfo`]); it too is optional for a reader.

use super::questions::QuestionSet;
use super::{check, check_ids, parse_lines, row_error, run_record};
use crate::error::Result;
use crate::fsutil;
use serde::{Deserialize, Serialize};
use std::path::Path;

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
pub struct AnswerRecord {
    pub id: String,
    pub answer: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub finish: Option<Finish>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub prompt_tokens: Option<usize>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub new_tokens: Option<usize>,
    /// Wall-clock milliseconds spent on this answer (excluded from determinism guarantees).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ms: Option<u64>,
    /// Any other fields of the row, kept in their order.
    #[serde(flatten)]
    pub extra: serde_json::Map<String, serde_json::Value>,
}

/// Reads an answers file and checks it matches the question set id for id, in order, and (when
/// `<path>.run.json` records one) that it was made from this set.
pub fn load_for_set(path: &Path, set: &QuestionSet) -> Result<Vec<AnswerRecord>> {
    let rows = load_rows(path, set)?;
    run_record::check_set_fingerprint(path, set)?;
    Ok(rows)
}

/// [`load_for_set`] without the set-fingerprint check: ids only.
pub fn load_rows(path: &Path, set: &QuestionSet) -> Result<Vec<AnswerRecord>> {
    match_ids(path, set, read_rows(path)?)
}

/// An answers file's rows with their line numbers, parsed but not yet matched to a question
/// set (so the file can be read while the set is).
pub fn read_rows(path: &Path) -> Result<Vec<(usize, AnswerRecord)>> {
    let bytes = fsutil::read_file(path)?;
    parse_lines(&fsutil::jsonl_slices(path, &bytes)?, |line, text| {
        let row: AnswerRecord = serde_json::from_str(text).map_err(|e| {
            row_error(
                path,
                line,
                text,
                "answer row",
                &e,
                &[
                    ("id", true, check::<String>),
                    ("answer", true, check::<String>),
                    ("finish", false, check::<Option<Finish>>),
                    ("prompt_tokens", false, check::<Option<usize>>),
                    ("new_tokens", false, check::<Option<usize>>),
                    ("ms", false, check::<Option<u64>>),
                ],
            )
        })?;
        Ok((line, row))
    })
}

/// The rows of [`read_rows`] checked against the question set's ids, in order.
pub fn match_ids(
    path: &Path,
    set: &QuestionSet,
    rows: Vec<(usize, AnswerRecord)>,
) -> Result<Vec<AnswerRecord>> {
    check_ids(path, set, rows.iter().map(|(l, r)| (*l, r.id.as_str())))?;
    Ok(rows.into_iter().map(|(_, r)| r).collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_row_needs_only_id_and_answer_and_keeps_the_rest_in_order() {
        let text =
            r#"{"id":"q1","answer":"At 06:50.","source":"help desk","finish":"eos","score":3}"#;
        let row: AnswerRecord = serde_json::from_str(text).unwrap();
        assert_eq!(row.finish, Some(Finish::Eos));
        assert_eq!(row.ms, None);
        assert_eq!(
            row.extra.keys().collect::<Vec<_>>(),
            ["source", "score"],
            "unknown fields are kept, in their order"
        );
        // Written back: the known fields first, then the kept ones; nothing is lost.
        let back: serde_json::Value = serde_json::to_value(&row).unwrap();
        let orig: serde_json::Value = serde_json::from_str(text).unwrap();
        assert_eq!(back, orig);

        let minimal: AnswerRecord = serde_json::from_str(r#"{"id":"q1","answer":""}"#).unwrap();
        assert_eq!(
            serde_json::to_string(&minimal).unwrap(),
            r#"{"id":"q1","answer":""}"#
        );
    }

    #[test]
    fn rows_written_by_answer_keep_their_field_order() {
        let row = AnswerRecord {
            id: "q1".into(),
            answer: "Yes.".into(),
            finish: Some(Finish::Length),
            prompt_tokens: Some(30),
            new_tokens: Some(8),
            ms: Some(3),
            extra: Default::default(),
        };
        assert_eq!(
            serde_json::to_string(&row).unwrap(),
            r#"{"id":"q1","answer":"Yes.","finish":"length","prompt_tokens":30,"new_tokens":8,"ms":3}"#
        );
    }
}
