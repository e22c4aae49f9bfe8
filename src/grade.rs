//! The grading stage: every answer scored against its question's references (docs/scoring.md),
//! one grades row a question in the set's order (docs/interface.md, "Grades file").
//!
//! Every row gets exact match, token F1 and ROUGE-L (each the maximum over the question's
//! non-blank references, `None` when it has none), the refusal flag, and fact recall and
//! contradiction when a reference states a fact (`score::facts`), and, with an embedding model
//! (`--embedder`), the semantic similarity (`score::semantic`, computed first for all answers
//! in batches by [`semantic_scores`]). Rows are scored in parallel; the output order is the
//! set's order.

use crate::embed::Embedder;
use crate::error::Result;
use crate::formats::answers::AnswerRecord;
use crate::formats::grades::GradeRecord;
use crate::formats::questions::{Expect, QuestionSet};
use crate::formats::run_record::{self, GradeRunInfo, InputFile, QuestionsInfo};
use crate::fsutil;
use crate::score::{self, RefusalDetector};
use rayon::prelude::*;
use std::collections::HashMap;
use std::path::Path;

/// Writes the grades file and `<out>.run.json` (the set's and the answers' fingerprints), both
/// or neither: both are staged as temporary files first and renamed into place after.
pub fn write_grades(
    out: &Path,
    grades: &[GradeRecord],
    set: &QuestionSet,
    answers_path: &Path,
    embedder: Option<&Embedder>,
) -> Result<()> {
    let embedder = match embedder {
        Some(e) => {
            let weights = e.layout.weights_path();
            Some(InputFile {
                path: e.layout.dir.display().to_string(),
                sha256: fsutil::sha256_file(&weights)?,
            })
        }
        None => None,
    };
    // The answers' fingerprint is taken while the rows are serialised and written.
    let (answers_sha, staged_rows) = rayon::join(
        || fsutil::sha256_file(answers_path),
        || fsutil::stage_jsonl(out, grades),
    );
    let info = GradeRunInfo {
        tool: "liftgate".into(),
        tool_version: env!("CARGO_PKG_VERSION").into(),
        questions: QuestionsInfo {
            path: set.path.display().to_string(),
            fingerprint: set.fingerprint.clone(),
            count: set.len(),
        },
        answers: InputFile {
            path: answers_path.display().to_string(),
            sha256: answers_sha?,
        },
        compute_dtype: run_record::recorded_compute_dtype(answers_path),
        embedder,
    };
    let info_bytes = run_record::to_bytes(&info)?;
    let staged_rows = staged_rows?;
    let run = run_record::path_beside(out);
    let staged_info = fsutil::stage(&run, &info_bytes)?;
    fsutil::commit_staged(out, staged_rows)?;
    fsutil::commit_staged(&run, staged_info)
}

/// The semantic similarity of every answer to its question's non-blank references
/// (`score::semantic::max_cosine`), `None` where a question has none. Each distinct text is
/// embedded once; progress goes to stderr.
pub fn semantic_scores(
    embedder: &Embedder,
    set: &QuestionSet,
    answers: &[AnswerRecord],
) -> Result<Vec<Option<f64>>> {
    fn slot<'t>(
        index: &mut HashMap<&'t str, usize>,
        texts: &mut Vec<&'t str>,
        t: &'t str,
    ) -> usize {
        *index.entry(t).or_insert_with(|| {
            texts.push(t);
            texts.len() - 1
        })
    }
    let mut index: HashMap<&str, usize> = HashMap::new();
    let mut texts: Vec<&str> = Vec::new();
    // Per question: the answer's slot and its references' slots.
    let mut plan: Vec<(usize, Vec<usize>)> = Vec::with_capacity(set.len());
    for (q, a) in set.questions.iter().zip(answers) {
        let refs: Vec<usize> = q
            .references
            .iter()
            .filter(|r| !r.trim().is_empty())
            .map(|r| slot(&mut index, &mut texts, r))
            .collect();
        let answer = if refs.is_empty() {
            usize::MAX
        } else {
            slot(&mut index, &mut texts, &a.answer)
        };
        plan.push((answer, refs));
    }
    let total = texts.len();
    eprintln!(
        "liftgate: grade: embedding {total} distinct answers and references with {}",
        embedder.layout.dir.display()
    );
    let started = std::time::Instant::now();
    let mut next_report = total / 10;
    let vectors = embedder.embed(&texts, |done| {
        if done >= next_report && done < total {
            eprintln!(
                "liftgate: grade: embedded {done}/{total} ({:.0} texts/s)",
                done as f64 / started.elapsed().as_secs_f64().max(1e-9)
            );
            next_report = done + total / 10;
        }
    })?;
    Ok(plan
        .iter()
        .map(|(answer, refs)| {
            (*answer != usize::MAX).then(|| {
                score::semantic::max_cosine(
                    &vectors[*answer],
                    refs.iter().map(|&r| vectors[r].as_slice()),
                )
            })?
        })
        .collect())
}

/// Scores every answer against its question. `answers` must already match `set` id for id, in
/// order (as [`crate::formats::answers::load_for_set`] guarantees); `semantic`, when given,
/// holds the answers' semantic scores in the same order (from [`semantic_scores`]).
pub fn grade_set(
    set: &QuestionSet,
    answers: &[AnswerRecord],
    detector: &RefusalDetector,
    semantic: Option<&[Option<f64>]>,
) -> Vec<GradeRecord> {
    debug_assert_eq!(
        set.len(),
        answers.len(),
        "answers must match the set row for row"
    );
    set.questions
        .par_iter()
        .zip(answers.par_iter())
        .enumerate()
        .map(|(i, (q, a))| {
            let scores = score::score_references(&a.answer, &q.references);
            let facts = score::facts::score_facts(&a.answer, &q.references, &q.question);
            GradeRecord {
                id: q.id.clone(),
                category: q.category.clone(),
                expect: q.expect,
                exact_match: scores.map(|s| s.exact_match),
                token_f1: scores.map(|s| s.token_f1),
                rouge_l: scores.map(|s| s.rouge_l),
                refused: detector.is_refusal_to(&q.question, &a.answer),
                fact_recall: facts.map(|f| f.recall),
                fact_contradiction: facts.map(|f| f.contradiction),
                semantic: semantic.and_then(|s| s[i]),
                answer: a.answer.clone(),
            }
        })
        .collect()
}

/// One line for stderr: counts and means over the `expect: answer` questions.
pub fn summary_line(grades: &[GradeRecord], out: &std::path::Path) -> String {
    let answer_rows: Vec<&GradeRecord> = grades
        .iter()
        .filter(|g| g.expect == Expect::Answer)
        .collect();
    let mean = |f: &dyn Fn(&GradeRecord) -> Option<f64>| -> Option<f64> {
        let v: Vec<f64> = answer_rows.iter().filter_map(|g| f(g)).collect();
        (!v.is_empty()).then(|| v.iter().sum::<f64>() / v.len() as f64)
    };
    let fmt = |m: Option<f64>| m.map_or("n/a".to_string(), |m| format!("{m:.3}"));
    let refuse_rows = grades.len() - answer_rows.len();
    let refused_out_of_scope = grades
        .iter()
        .filter(|g| g.expect == Expect::Refuse && g.refused)
        .count();
    let refused_in_scope = answer_rows.iter().filter(|g| g.refused).count();
    format!(
        "graded {} answers -> {}: exact match {}, token F1 {}, ROUGE-L {} (mean of {} in-scope); refused {}/{} out-of-scope, {}/{} in-scope",
        grades.len(),
        out.display(),
        fmt(mean(&|g| g.exact_match.map(f64::from))),
        fmt(mean(&|g| g.token_f1)),
        fmt(mean(&|g| g.rouge_l)),
        answer_rows.len(),
        refused_out_of_scope,
        refuse_rows,
        refused_in_scope,
        answer_rows.len(),
    )
}
