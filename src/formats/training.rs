//! Training pairs of a fine-tune (docs/interface.md, "Training file"), read by `leaks` and by
//! `vet --train`: JSONL, one object a line, holding the question either in a `question` field
//! (a string) or as the first `"role": "user"` message of a chat `messages` list. Other fields
//! are ignored, so the file a fine-tune was trained on is read as it is.

use crate::error::{Error, Result};
use crate::fsutil;
use serde::Deserialize;
use std::path::Path;

/// One training row, typed so that reading a million rows builds no generic JSON values.
#[derive(Deserialize)]
struct Row {
    #[serde(default)]
    question: Option<String>,
    #[serde(default)]
    messages: Option<Vec<Message>>,
}

#[derive(Deserialize)]
struct Message {
    role: String,
    content: String,
}

/// The training questions with their 1-based line numbers.
pub fn load_questions(path: &Path) -> Result<Vec<(usize, String)>> {
    let lines = fsutil::read_jsonl_lines(path)?;
    let mut out = Vec::with_capacity(lines.len());
    for (line, text) in lines {
        let row: Row = serde_json::from_str(&text).map_err(|e| {
            Error::line(
                path,
                line,
                format!("not a training row: {e}; expected an object with a `question` string or a `messages` list of {{role, content}} strings"),
            )
        })?;
        let question = match (row.question, row.messages) {
            (Some(q), _) => q,
            (None, Some(messages)) => messages
                .into_iter()
                .find(|m| m.role == "user")
                .map(|m| m.content)
                .ok_or_else(|| {
                    Error::field(
                        path,
                        Some(line),
                        "messages",
                        "has no message with \"role\": \"user\"",
                    )
                })?,
            (None, None) => {
                return Err(Error::field(
                    path,
                    Some(line),
                    "question",
                    "missing: a training row needs a `question` string or a `messages` list",
                ))
            }
        };
        out.push((line, question));
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn load(text: &str) -> Result<Vec<(usize, String)>> {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("train.jsonl");
        std::fs::write(&p, text).unwrap();
        load_questions(&p)
    }

    #[test]
    fn reads_questions_and_chat_messages() {
        let rows = load(
            "{\"question\": \"Dogs?\", \"answer\": \"Free.\"}\n\n{\"messages\": [{\"role\": \"system\", \"content\": \"Be brief.\"}, {\"role\": \"user\", \"content\": \"Bikes?\"}, {\"role\": \"assistant\", \"content\": \"3 euros.\"}]}\n",
        )
        .unwrap();
        assert_eq!(
            rows,
            vec![(1, "Dogs?".to_string()), (3, "Bikes?".to_string())]
        );
    }

    #[test]
    fn errors_name_line_and_field() {
        let e = load("{\"question\": \"a\"}\n{\"answer\": \"b\"}\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("train.jsonl:2") && e.contains("question"), "{e}");
        let e = load("{\"messages\": [{\"role\": \"assistant\", \"content\": \"x\"}]}\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains(":1") && e.contains("messages"), "{e}");
        let e = load("[1, 2]\n").unwrap_err().to_string();
        assert!(e.contains(":1") && e.contains("not a training row"), "{e}");
    }
}
