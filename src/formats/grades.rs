//! The grades file (docs/interface.md, "Grades file"), written by `grade`, read by `weigh`.
//!
//! JSONL, one object a question: `id`, `category`, `expect`, `exact_match` (0 or 1), `token_f1`,
//! `rouge_l`, `refused`. The three reference scores are null where the question has no
//! references (typically `expect: refuse` questions). `fact_recall` and `fact_contradiction`
//! are optional (absent when no reference states a fact, and in older files); so is `semantic`
//! (absent unless graded with `--embedder`, null without references). liftgate adds
//! `answer` (the graded text)
//! so `weigh` can show both variants' answers side by side without the answers files.

use super::questions::{Expect, QuestionSet};
use super::run_record::check_set_fingerprint;
use super::{check, check_ids, parse_lines, row_error};
use crate::error::{Error, Result};
use crate::fsutil;
use serde::{Deserialize, Serialize};
use std::path::Path;

/// One row of a grades file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GradeRecord {
    pub id: String,
    pub category: String,
    pub expect: Expect,
    /// 1 when the normalised answer equals a normalised reference, else 0.
    pub exact_match: Option<u8>,
    pub token_f1: Option<f64>,
    pub rouge_l: Option<f64>,
    /// Whether the answer declines to answer (refusal detector).
    pub refused: bool,
    /// Share of the references' facts (times, prices, dates, ...) the answer states; absent or
    /// null when no reference states a fact, or in files graded before fact scoring.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fact_recall: Option<f64>,
    /// Whether the answer states a fact conflicting with the references; null like `fact_recall`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fact_contradiction: Option<bool>,
    /// Cosine of the answer's and the closest reference's sentence embeddings, in [-1, 1]
    /// (`score::semantic`); absent unless graded with `--embedder`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub semantic: Option<f64>,
    /// The answer text that was graded.
    #[serde(default)]
    pub answer: String,
}

/// Reads a grades file and checks it matches the question set id for id, in order.
pub fn load_for_set(path: &Path, set: &QuestionSet) -> Result<Vec<GradeRecord>> {
    match_to_set(path, set, read_rows(path)?)
}

/// A grades file's rows with their line numbers, parsed and range-checked but not yet matched
/// to a question set (so several files can be read at once, before the set is loaded).
pub fn read_rows(path: &Path) -> Result<Vec<(usize, GradeRecord)>> {
    let bytes = fsutil::read_file(path)?;
    parse_lines(&fsutil::jsonl_slices(path, &bytes)?, |line, text| {
        parse_row(path, line, text)
    })
}

/// The rows of [`read_rows`] checked against the question set, id for id and in order.
pub fn match_to_set(
    path: &Path,
    set: &QuestionSet,
    rows: Vec<(usize, GradeRecord)>,
) -> Result<Vec<GradeRecord>> {
    check_ids(path, set, rows.iter().map(|(l, r)| (*l, r.id.as_str())))?;
    check_set_fingerprint(path, set)?;
    finish(path, set, rows)
}

/// One grades row, parsed and range-checked.
fn parse_row(path: &Path, line: usize, text: &str) -> Result<(usize, GradeRecord)> {
    let row: GradeRecord = serde_json::from_str(text).map_err(|e| {
        row_error(
            path,
            line,
            text,
            "grade row",
            &e,
            &[
                ("id", true, check::<String>),
                ("category", true, check::<String>),
                ("expect", true, check::<Expect>),
                ("exact_match", false, check::<Option<u8>>),
                ("token_f1", false, check::<Option<f64>>),
                ("rouge_l", false, check::<Option<f64>>),
                ("refused", true, check::<bool>),
                ("fact_recall", false, check::<Option<f64>>),
                ("fact_contradiction", false, check::<Option<bool>>),
                ("semantic", false, check::<Option<f64>>),
                ("answer", false, check::<String>),
            ],
        )
    })?;
    if let Some(em) = row.exact_match {
        if em > 1 {
            return Err(Error::field(
                path,
                Some(line),
                "exact_match",
                "must be 0 or 1",
            ));
        }
    }
    for (name, v) in [
        ("token_f1", row.token_f1),
        ("rouge_l", row.rouge_l),
        ("fact_recall", row.fact_recall),
    ] {
        if let Some(v) = v {
            if !(0.0..=1.0).contains(&v) {
                return Err(Error::field(
                    path,
                    Some(line),
                    name,
                    format!("must be in [0, 1], found {v}"),
                ));
            }
        }
    }
    if let Some(v) = row.semantic {
        if !(-1.0..=1.0).contains(&v) {
            return Err(Error::field(
                path,
                Some(line),
                "semantic",
                format!("must be in [-1, 1], found {v}"),
            ));
        }
    }
    Ok((line, row))
}

/// The rows after the id checks: each row's `expect` must be the set's.
fn finish(
    path: &Path,
    set: &QuestionSet,
    rows: Vec<(usize, GradeRecord)>,
) -> Result<Vec<GradeRecord>> {
    for ((line, row), q) in rows.iter().zip(&set.questions) {
        if row.expect != q.expect {
            return Err(Error::field(
                path,
                Some(*line),
                "expect",
                format!(
                    "is {:?} but the question set says {:?}; regrade with this set",
                    row.expect.as_str(),
                    q.expect.as_str()
                ),
            ));
        }
    }
    Ok(rows.into_iter().map(|(_, r)| r).collect())
}
