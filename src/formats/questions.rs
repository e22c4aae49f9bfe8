//! The question set (docs/interface.md, "Question set"): JSONL, one object a line.
//!
//! Fields: `id` (string, unique), `question` (non-empty string), `references` (array of strings;
//! grading needs a non-empty one for every `expect: answer` question, see
//! [`QuestionSet::check_references`]), `expect` (`answer` | `refuse`, default `answer`),
//! `category` (string, default `general`). Unknown fields are kept in `extra` and ignored.
//! Blank lines are skipped. Every problem names the file, the line and the field.

use crate::error::{Error, Result};
use crate::fsutil::{self, json_kind};
use serde::{Deserialize, Serialize};
use std::collections::HashSet;
use std::path::{Path, PathBuf};

/// What the responder should do with a question.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Expect {
    /// An in-scope question with reference answers.
    #[default]
    Answer,
    /// An out-of-scope question the responder should decline.
    Refuse,
}

impl Expect {
    pub fn as_str(self) -> &'static str {
        match self {
            Expect::Answer => "answer",
            Expect::Refuse => "refuse",
        }
    }
}

/// One question of a set.
#[derive(Debug, Clone, PartialEq)]
pub struct Question {
    pub id: String,
    pub question: String,
    pub references: Vec<String>,
    pub category: String,
    pub expect: Expect,
    /// 1-based line in the source file, for messages.
    pub line: usize,
}

/// A validated question set with its content fingerprint.
#[derive(Debug, Clone)]
pub struct QuestionSet {
    pub path: PathBuf,
    pub questions: Vec<Question>,
    /// SHA-256 of the file's bytes: answers and grades record it so a mismatch is caught.
    pub fingerprint: String,
}

pub const DEFAULT_CATEGORY: &str = "general";

impl QuestionSet {
    /// Reads and validates a question set.
    pub fn load(path: &Path) -> Result<Self> {
        Self::parse(path, &fsutil::read_file(path)?)
    }

    /// Validates a question set held in memory, as [`QuestionSet::load`] does for a file;
    /// `path` names the source in messages.
    pub fn parse(path: &Path, bytes: &[u8]) -> Result<Self> {
        // The fingerprint of the bytes read, hashed while the lines are parsed: the file is
        // read once, and what is fingerprinted is exactly what was parsed.
        let (questions, fingerprint) = rayon::join(
            || fsutil::jsonl_slices(path, bytes).and_then(|lines| Self::validate(path, &lines)),
            || fsutil::sha256_hex(bytes),
        );
        Ok(QuestionSet {
            path: path.to_path_buf(),
            questions: questions?,
            fingerprint,
        })
    }

    /// The questions of `(line, text)` JSONL lines, checked one by one and for duplicate ids.
    fn validate(path: &Path, lines: &[(usize, &str)]) -> Result<Vec<Question>> {
        if lines.is_empty() {
            return Err(Error::file(
                path,
                "the question set is empty: expected one JSON object a line",
            ));
        }
        // Lines are parsed in parallel; errors are reported in line order, the first one (a
        // duplicate id before a later line's parse error, as a reader line by line would).
        use rayon::prelude::*;
        let parsed: Vec<Result<Question>> = lines
            .par_iter()
            .map(|(line, text)| parse_question(path, *line, text))
            .collect();
        let mut questions = Vec::with_capacity(lines.len());
        let mut seen = HashSet::new();
        for q in parsed {
            let q = q?;
            if !seen.insert(q.id.clone()) {
                return Err(Error::field(
                    path,
                    Some(q.line),
                    "id",
                    format!("duplicate id {:?}", q.id),
                ));
            }
            questions.push(q);
        }
        Ok(questions)
    }

    /// Every `expect: answer` question must have a non-empty reference answer to be scored
    /// against. Checked by the stages that score (`grade`, and `vet` before it answers), not on
    /// load: answering needs only ids and questions.
    pub fn check_references(&self) -> Result<()> {
        match self
            .questions
            .iter()
            .find(|q| q.expect == Expect::Answer && q.references.iter().all(|r| r.trim().is_empty()))
        {
            Some(q) => Err(Error::field(
                &self.path,
                Some(q.line),
                "references",
                format!(
                    "question {:?} needs at least one non-empty reference answer to be graded (`expect` is \"answer\")",
                    q.id
                ),
            )),
            None => Ok(()),
        }
    }

    pub fn len(&self) -> usize {
        self.questions.len()
    }

    pub fn is_empty(&self) -> bool {
        self.questions.is_empty()
    }
}

/// A question line's fields as given, before their values are checked. Unknown fields are
/// skipped; null is the same as absent.
#[derive(Deserialize)]
struct RawQuestion {
    id: Option<String>,
    question: Option<String>,
    references: Option<Vec<String>>,
    category: Option<String>,
    expect: Option<String>,
}

impl RawQuestion {
    /// The fields of a line that is not a well-typed question object, through a generic JSON
    /// value, so the message can name what is wrong (not JSON, not an object, which field has
    /// which wrong type). Lines that parse as [`RawQuestion`] never come here: the typed parse
    /// builds no generic value, which makes loading a large set about twice as fast.
    fn from_value(path: &Path, line: usize, text: &str) -> Result<Self> {
        let value: serde_json::Value = serde_json::from_str(text)
            .map_err(|e| Error::line(path, line, format!("not valid JSON: {e}")))?;
        let obj = value
            .as_object()
            .ok_or_else(|| Error::line(path, line, "expected a JSON object"))?;
        let string_field = |name: &str| -> Result<Option<String>> {
            match obj.get(name) {
                None | Some(serde_json::Value::Null) => Ok(None),
                Some(serde_json::Value::String(s)) => Ok(Some(s.clone())),
                Some(other) => Err(Error::field(
                    path,
                    Some(line),
                    name,
                    format!("expected a string, found {}", json_kind(other)),
                )),
            }
        };
        let references = match obj.get("references") {
            None | Some(serde_json::Value::Null) => None,
            Some(serde_json::Value::Array(items)) => {
                let mut refs = Vec::with_capacity(items.len());
                for (i, item) in items.iter().enumerate() {
                    match item {
                        serde_json::Value::String(s) => refs.push(s.clone()),
                        other => {
                            return Err(Error::field(
                                path,
                                Some(line),
                                format!("references[{i}]"),
                                format!("expected a string, found {}", json_kind(other)),
                            ))
                        }
                    }
                }
                Some(refs)
            }
            Some(other) => {
                return Err(Error::field(
                    path,
                    Some(line),
                    "references",
                    format!("expected an array of strings, found {}", json_kind(other)),
                ))
            }
        };
        Ok(RawQuestion {
            id: string_field("id")?,
            question: string_field("question")?,
            references,
            category: string_field("category")?,
            expect: string_field("expect")?,
        })
    }
}

fn parse_question(path: &Path, line: usize, text: &str) -> Result<Question> {
    let raw = match serde_json::from_str::<RawQuestion>(text) {
        Ok(raw) => raw,
        Err(_) => RawQuestion::from_value(path, line, text)?,
    };
    let required = |value: Option<String>, name: &str| {
        value.ok_or_else(|| Error::field(path, Some(line), name, "required field is missing"))
    };
    let id = required(raw.id, "id")?;
    if id.trim().is_empty() {
        return Err(Error::field(path, Some(line), "id", "must not be empty"));
    }
    let question = required(raw.question, "question")?;
    if question.trim().is_empty() {
        return Err(Error::field(
            path,
            Some(line),
            "question",
            "must not be empty",
        ));
    }
    let category = raw.category.unwrap_or_else(|| DEFAULT_CATEGORY.to_string());
    if category.trim().is_empty() {
        return Err(Error::field(
            path,
            Some(line),
            "category",
            "must not be empty when given",
        ));
    }
    let expect = match raw.expect.as_deref() {
        None => Expect::Answer,
        Some("answer") => Expect::Answer,
        Some("refuse") => Expect::Refuse,
        Some(other) => {
            return Err(Error::field(
                path,
                Some(line),
                "expect",
                format!("expected \"answer\" or \"refuse\", found {other:?}"),
            ))
        }
    };
    Ok(Question {
        id,
        question,
        references: raw.references.unwrap_or_default(),
        category,
        expect,
        line,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn load_str(text: &str) -> Result<QuestionSet> {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("set.jsonl");
        std::fs::write(&p, text).unwrap();
        QuestionSet::load(&p)
    }

    #[test]
    fn defaults_apply_and_unknown_fields_are_ignored() {
        let set = load_str(
            "{\"id\":\"a\",\"question\":\"Q?\",\"references\":[\"R\"],\"note\":1}\n\
             {\"id\":\"b\",\"question\":\"Out?\",\"references\":[],\"expect\":\"refuse\",\"category\":\"oos\"}\n",
        )
        .unwrap();
        assert_eq!(set.questions[0].category, "general");
        assert_eq!(set.questions[0].expect, Expect::Answer);
        assert_eq!(set.questions[1].expect, Expect::Refuse);
        assert_eq!(set.questions[1].line, 2);
        assert_eq!(set.fingerprint.len(), 64);
    }

    #[test]
    fn parse_from_bytes_matches_load() {
        let text = "{\"id\":\"a\",\"question\":\"Q?\",\"references\":[\"R\"]}\n\n\
                    {\"id\":\"b\",\"question\":\"Out?\",\"expect\":\"refuse\"}\n";
        let loaded = load_str(text).unwrap();
        let parsed = QuestionSet::parse(Path::new("set.jsonl"), text.as_bytes()).unwrap();
        assert_eq!(parsed.questions, loaded.questions);
        assert_eq!(parsed.fingerprint, loaded.fingerprint);
        assert_eq!(parsed.questions[1].line, 3);
        let err = QuestionSet::parse(
            Path::new("set.jsonl"),
            b"{\"id\":\"a\",\"question\":\"Q\",\"references\":[\"R\"]}\n\xff\n",
        )
        .unwrap_err();
        assert!(
            err.to_string().starts_with("set.jsonl:2: not valid UTF-8"),
            "{err}"
        );
    }

    #[test]
    fn references_are_needed_only_for_grading() {
        // Answering needs ids and questions only: a set without references loads.
        let set = load_str(
            "{\"id\":\"a\",\"question\":\"Q?\",\"references\":[\"R\"]}\n{\"id\":\"b\",\"question\":\"Q2?\"}\n",
        )
        .unwrap();
        let err = set.check_references().unwrap_err();
        assert_eq!(err.exit_code(), 2);
        let msg = err.to_string();
        assert!(msg.contains(":2: field `references`"), "{msg}");
        assert!(msg.contains("\"b\""), "{msg}");
        let refuse_only =
            load_str("{\"id\":\"x\",\"question\":\"Out?\",\"expect\":\"refuse\"}\n").unwrap();
        refuse_only.check_references().unwrap();
        let blank = load_str("{\"id\":\"a\",\"question\":\"Q\",\"references\":[\" \"]}").unwrap();
        assert!(blank.check_references().is_err());
    }

    #[test]
    fn typed_and_generic_parses_agree() {
        // A well-typed line takes the typed parse; the same fields with a duplicated key (which
        // the typed parse rejects) take the generic one, where the last value wins as in any
        // JSON object read into a map. Unknown fields of any type and nulls are ignored.
        let typed = load_str("{\"id\":\"a\",\"question\":\"Q\",\"references\":[\"R\"],\"category\":null,\"expect\":\"refuse\",\"note\":{\"x\":[1]}}").unwrap();
        let generic = load_str("{\"id\":\"z\",\"id\":\"a\",\"question\":\"Q\",\"references\":[\"R\"],\"category\":null,\"expect\":\"refuse\",\"note\":{\"x\":[1]}}").unwrap();
        assert_eq!(typed.questions, generic.questions);
        let q = &typed.questions[0];
        assert_eq!(
            (q.id.as_str(), q.category.as_str(), q.expect),
            ("a", DEFAULT_CATEGORY, Expect::Refuse)
        );
        assert_eq!(q.references, vec!["R".to_string()]);
        // An unknown field is skipped without being built, however deeply it nests.
        let deep = format!("{}{}", "[".repeat(100_000), "]".repeat(100_000));
        let set = load_str(&format!(
            "{{\"id\":\"a\",\"question\":\"Q\",\"note\":{deep}}}"
        ))
        .unwrap();
        assert_eq!(set.questions[0].id, "a");
    }

    #[test]
    fn errors_name_line_and_field() {
        let cases = [
            ("{\"id\":\"a\",\"question\":\"Q\",\"references\":[\"R\"]}\n{\"id\":\"a\",\"question\":\"Q\",\"references\":[\"R\"]}", ":2: field `id`"),
            ("{\"question\":\"Q\",\"references\":[\"R\"]}", ":1: field `id`"),
            ("{\"id\":5,\"question\":\"Q\",\"references\":[\"R\"]}", "field `id`: expected a string, found a number"),
            ("{\"id\":\"a\",\"question\":\"\",\"references\":[\"R\"]}", "field `question`"),
            ("{\"id\":\"a\",\"question\":\"Q\",\"references\":[\"R\", 3]}", "field `references[1]`"),
            ("{\"id\":\"a\",\"question\":\"Q\",\"references\":[\"R\"],\"expect\":\"maybe\"}", "field `expect`"),
            ("{\"id\":\"a\",", ":1: not valid JSON"),
            ("[1,2]", ":1: expected a JSON object"),
            ("{\"id\":\"a\",\"question\":\"Q\",\"category\":[\"x\"]}", "field `category`: expected a string, found an array"),
            ("{\"id\":\"a\",\"question\":\"Q\",\"references\":\"R\"}", "field `references`: expected an array of strings"),
            ("{\"id\":\"a\",\"question\":null}", ":1: field `question`: required field is missing"),
            ("\n\n", "empty"),
        ];
        for (text, want) in cases {
            let err = load_str(text).unwrap_err();
            assert_eq!(err.exit_code(), 2);
            let msg = err.to_string();
            assert!(
                msg.contains(want),
                "input {text:?}: message {msg:?} lacks {want:?}"
            );
            assert!(msg.contains("set.jsonl"), "{msg}");
        }
    }
}
