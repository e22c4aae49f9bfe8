//! Scorers used by `grade`: each a pure function over text, with its definition in its own
//! module's doc comment.
//!
//! - [`squad`]: exact match and token F1 (SQuAD v1.1 evaluation definitions);
//! - [`rouge`]: ROUGE-L F-measure (Lin, 2004) over rouge-score tokens;
//! - [`refusal`]: whether an answer declines to answer (phrase matching).
//!
//! [`score_references`] combines the first two for one answer and a question's references.

pub mod refusal;
pub mod rouge;
pub mod squad;

pub use refusal::RefusalDetector;

/// The reference-based scores of one answer, each maximised over the references separately.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ReferenceScores {
    /// 0 or 1.
    pub exact_match: u8,
    pub token_f1: f64,
    pub rouge_l: f64,
}

/// Scores `answer` against the usable references: those that are not blank (empty or only
/// whitespace). `None` when no reference is usable (typically an `expect: refuse` question).
pub fn score_references<S: AsRef<str>>(answer: &str, references: &[S]) -> Option<ReferenceScores> {
    let refs: Vec<&str> = references
        .iter()
        .map(AsRef::as_ref)
        .filter(|r| !r.trim().is_empty())
        .collect();
    if refs.is_empty() {
        return None;
    }
    let squad_answer = squad::normalize_tokens(answer);
    let rouge_answer = rouge::tokens(answer);
    let mut best = ReferenceScores {
        exact_match: 0,
        token_f1: 0.0,
        rouge_l: 0.0,
    };
    for r in refs {
        let squad_ref = squad::normalize_tokens(r);
        if squad::exact_match_tokens(&squad_answer, &squad_ref) {
            best.exact_match = 1;
        }
        best.token_f1 = best.token_f1.max(squad::f1_tokens(&squad_answer, &squad_ref));
        best.rouge_l = best
            .rouge_l
            .max(rouge::f_measure_tokens(&rouge_answer, &rouge::tokens(r)));
    }
    Some(best)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn blank_references_are_ignored() {
        assert_eq!(score_references("yes", &["", "  "]), None);
        let none: [&str; 0] = [];
        assert_eq!(score_references("yes", &none), None);
        let s = score_references("", &["", "Yes."]).unwrap();
        // Only "Yes." is used: an empty answer does not match it.
        assert_eq!(s.exact_match, 0);
        assert_eq!(s.token_f1, 0.0);
        assert_eq!(s.rouge_l, 0.0);
    }

    #[test]
    fn each_metric_is_maximised_separately() {
        // Reference 1 gives the best exact match, reference 2 the best ROUGE-L.
        let refs = ["Yes", "Bikes ride free"];
        let s = score_references("yes", &refs).unwrap();
        assert_eq!(s.exact_match, 1);
        assert_eq!(s.token_f1, 1.0);
        assert_eq!(s.rouge_l, 1.0);
        let s = score_references("bikes ride free, yes", &refs).unwrap();
        assert_eq!(s.exact_match, 0);
        // vs "bikes ride free": 3 common of 4 and 3: P 3/4 R 1 -> 6/7.
        assert!((s.token_f1 - 6.0 / 7.0).abs() < 1e-12);
        assert!((s.rouge_l - 6.0 / 7.0).abs() < 1e-12);
    }
}
