//! `liftgate leaks`: held-out questions that repeat or closely reword a training question
//! (docs/interface.md, "leaks"). One JSON object a flagged question on stdout; counts on stderr.

use super::Outcome;
use crate::cli::LeaksArgs;
use crate::error::{Error, Result};
use crate::formats::questions::QuestionSet;
use crate::formats::training;
use crate::score::leaks::{find_leaks, Leak};
use serde::Serialize;

/// One flagged question as printed on stdout.
#[derive(Serialize)]
struct Row<'a> {
    id: &'a str,
    kind: &'static str,
    containment: f64,
    question: &'a str,
    train_line: usize,
    train_question: &'a str,
}

pub fn run(args: &LeaksArgs) -> Result<Outcome> {
    if !(args.threshold > 0.0 && args.threshold <= 1.0) {
        return Err(Error::usage(format!(
            "--threshold must be above 0 and at most 1, e.g. 0.5; got {}",
            args.threshold
        )));
    }
    let set = QuestionSet::load(&args.questions)?;
    let train = training::load_questions(&args.train)?;
    let questions: Vec<&str> = set.questions.iter().map(|q| q.question.as_str()).collect();
    let texts: Vec<&str> = train.iter().map(|(_, t)| t.as_str()).collect();
    let leaks = find_leaks(&questions, &texts, args.threshold);
    let mut out = String::new();
    for l in &leaks {
        let row = Row {
            id: &set.questions[l.question].id,
            kind: l.kind.as_str(),
            containment: l.containment,
            question: questions[l.question],
            train_line: train[l.train].0,
            train_question: texts[l.train],
        };
        out.push_str(
            &serde_json::to_string(&row)
                .map_err(|e| Error::internal(format!("cannot serialise a leak row: {e}")))?,
        );
        out.push('\n');
    }
    print!("{out}");
    eprintln!(
        "{}",
        summary_line(&leaks, set.len(), train.len(), args.threshold)
    );
    Ok(Outcome::Success)
}

/// "checked 141 held-out questions against 394 training rows: 2 exact, 0 normalised, 3 near".
pub fn summary_line(leaks: &[Leak], questions: usize, train: usize, threshold: f64) -> String {
    use crate::score::leaks::LeakKind;
    let count = |k: LeakKind| leaks.iter().filter(|l| l.kind == k).count();
    format!(
        "checked {questions} held-out questions against {train} training rows: {} exact, {} normalised, {} near duplicates (word-triple containment >= {threshold})",
        count(LeakKind::Exact),
        count(LeakKind::Normalised),
        count(LeakKind::Near)
    )
}
