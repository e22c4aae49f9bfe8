//! `liftgate leaks`: held-out questions that repeat or closely reword a training question
//! (docs/interface.md, "leaks"). One JSON object a flagged question on stdout; counts on stderr.
//! With `--embedder`, also the questions whose nearest training question by embedding cosine
//! reaches `--cosine-threshold` (kind "semantic"), and every row's cosine.

use super::Outcome;
use crate::cli::LeaksArgs;
use crate::embed::Embedder;
use crate::error::{Error, Result};
use crate::formats::questions::QuestionSet;
use crate::formats::training;
use crate::score::leaks::{self, find_leaks, nearest_by_cosine, Leak, LeakKind};
use crate::score::semantic;
use serde::Serialize;
use std::collections::HashSet;

/// One flagged question as printed on stdout.
#[derive(Serialize)]
struct Row<'a> {
    id: &'a str,
    kind: &'static str,
    containment: f64,
    /// Embedding cosine of the question and this training question (with `--embedder` only).
    #[serde(skip_serializing_if = "Option::is_none")]
    cosine: Option<f64>,
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
    if !(args.cosine_threshold > 0.0 && args.cosine_threshold <= 1.0) {
        return Err(Error::usage(format!(
            "--cosine-threshold must be above 0 and at most 1, e.g. 0.9; got {}",
            args.cosine_threshold
        )));
    }
    let mut leaks = find_leaks(&questions, &texts, args.threshold);
    let embedded = match args.embedder.as_deref() {
        None => None,
        Some(dir) => {
            let embedder = Embedder::load(dir)?;
            eprintln!(
                "liftgate: leaks: embedding {} held-out and {} training questions with {}",
                questions.len(),
                texts.len(),
                dir.display()
            );
            Some(add_semantic(
                &embedder,
                &questions,
                &texts,
                args.cosine_threshold,
                &mut leaks,
            )?)
        }
    };
    let mut out = String::new();
    for l in &leaks {
        let row = Row {
            id: &set.questions[l.question].id,
            kind: l.kind.as_str(),
            containment: l.containment,
            cosine: embedded
                .as_ref()
                .map(|(q, t)| semantic::cosine(&q[l.question], &t[l.train])),
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
    let mut line = summary_line(&leaks, set.len(), train.len(), args.threshold);
    if embedded.is_some() {
        let n = leaks
            .iter()
            .filter(|l| l.kind == LeakKind::Semantic)
            .count();
        line.push_str(&format!(
            ", {n} more by embedding cosine >= {}",
            args.cosine_threshold
        ));
    }
    eprintln!("{line}");
    Ok(Outcome::Success)
}

/// One embedding vector per text.
type Embeddings = Vec<Vec<f32>>;

/// Embeds the held-out and training questions and adds, as kind "semantic", each held-out
/// question not flagged already whose nearest training question has at least `threshold`
/// cosine; `leaks` stays in the set's order. Returns both sides' embeddings.
pub(crate) fn add_semantic(
    embedder: &Embedder,
    questions: &[&str],
    texts: &[&str],
    threshold: f64,
    leaks: &mut Vec<Leak>,
) -> Result<(Embeddings, Embeddings)> {
    let q = embedder.embed(questions, |_| {})?;
    let t = embedder.embed(texts, |_| {})?;
    let flagged: HashSet<usize> = leaks.iter().map(|l| l.question).collect();
    for (i, nearest) in nearest_by_cosine(&q, &t).into_iter().enumerate() {
        if let Some((j, c)) = nearest {
            if c >= threshold && !flagged.contains(&i) {
                let shingles = |s: &str| leaks::shingles(&leaks::normalise(s));
                leaks.push(Leak {
                    question: i,
                    train: j,
                    kind: LeakKind::Semantic,
                    containment: leaks::containment(&shingles(questions[i]), &shingles(texts[j])),
                });
            }
        }
    }
    leaks.sort_by_key(|l| l.question);
    Ok((q, t))
}

/// "checked 141 held-out questions against 394 training rows: 2 exact, 0 normalised, 3 near".
pub fn summary_line(leaks: &[Leak], questions: usize, train: usize, threshold: f64) -> String {
    let count = |k: LeakKind| leaks.iter().filter(|l| l.kind == k).count();
    format!(
        "checked {questions} held-out questions against {train} training rows: {} exact, {} normalised, {} near duplicates (word-triple containment >= {threshold})",
        count(LeakKind::Exact),
        count(LeakKind::Normalised),
        count(LeakKind::Near)
    )
}
