//! From questions to prompt token ids, and from generated tokens back to an answers-file row.

use super::generate::{strip_like_python, Generated};
use crate::chat::ChatTokenizer;
use crate::error::{Error, Result};
use crate::formats::answers::AnswerRecord;
use crate::formats::questions::QuestionSet;

/// The prompt of every question, in the set's order: the chat template rendered with the
/// optional system message and the question, tokenised. A template error names the question
/// and its line; an empty prompt is an error too (there would be no position to answer from).
pub fn build(
    chat: &ChatTokenizer,
    system: Option<&str>,
    set: &QuestionSet,
) -> Result<Vec<Vec<u32>>> {
    let mut prompts = Vec::with_capacity(set.len());
    for q in &set.questions {
        let ids = chat
            .encode_prompt(system, &q.question)
            .map_err(|e| match e {
                Error::Input { location, message } => Error::Input {
                    location,
                    message: format!(
                        "{message} (while building the prompt of question {:?}, {}:{})",
                        q.id,
                        set.path.display(),
                        q.line
                    ),
                },
                other => other,
            })?;
        if ids.is_empty() {
            return Err(Error::line(
                &set.path,
                q.line,
                format!("question {:?} gives an empty prompt", q.id),
            ));
        }
        prompts.push(ids);
    }
    Ok(prompts)
}

/// The answers-file row of one generated answer: decoded with special tokens skipped and
/// surrounding whitespace trimmed as Python's `str.strip()` does (the reference decodes that
/// way).
pub fn answer_record(chat: &ChatTokenizer, id: &str, g: Generated) -> Result<AnswerRecord> {
    let text = chat.decode(g.answer_tokens())?;
    Ok(AnswerRecord {
        id: id.to_string(),
        answer: strip_like_python(&text).to_string(),
        finish: Some(g.finish),
        prompt_tokens: Some(g.prompt_tokens),
        new_tokens: Some(g.tokens.len()),
        ms: Some(g.ms),
        extra: Default::default(),
    })
}
