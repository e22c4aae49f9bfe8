//! liftgate's scorers against reference values committed in tests/fixtures/rouge_l.json,
//! made by tests/reference/make_rouge_fixture.py:
//! - ROUGE-L from the `rouge-score` package (PyPI, 0.1.2), `RougeScorer(['rougeL'],
//!   use_stemmer=False)`, F-measure, maximum over references taken by the script;
//! - exact match and token F1 from a Python port of the SQuAD v1.1 official evaluation script
//!   (evaluate-v1.1.py) definitions, written from those definitions.

use liftgate::score::{rouge, score_references, squad};
use serde::Deserialize;

#[derive(Deserialize)]
struct Fixture {
    cases: Vec<Case>,
}

#[derive(Deserialize)]
struct Case {
    answer: String,
    references: Vec<String>,
    rouge_l_per_reference: Vec<f64>,
    rouge_l: f64,
    exact_match: u8,
    token_f1: f64,
    squad_normalized_answer: String,
}

fn fixture() -> Fixture {
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/fixtures/rouge_l.json");
    let text = std::fs::read_to_string(path).expect("fixture is readable");
    serde_json::from_str(&text).expect("fixture parses")
}

const TOL: f64 = 1e-9;

#[test]
fn rouge_l_matches_rouge_score() {
    let f = fixture();
    assert!(f.cases.len() >= 40);
    for c in &f.cases {
        // rouge-score 0.1.2, RougeScorer(['rougeL'], use_stemmer=False): per reference.
        for (r, want) in c.references.iter().zip(&c.rouge_l_per_reference) {
            let got = rouge::rouge_l(&c.answer, r);
            assert!(
                (got - want).abs() < TOL,
                "ROUGE-L {got} != rouge-score {want} for {:?} vs {r:?}",
                c.answer
            );
        }
        // Maximum over references.
        let got = rouge::max_rouge_l(&c.answer, &c.references).unwrap();
        assert!((got - c.rouge_l).abs() < TOL, "{:?}", c.answer);
    }
}

#[test]
fn exact_match_and_f1_match_the_squad_v1_1_definitions() {
    for c in &fixture().cases {
        // SQuAD v1.1 evaluate-v1.1.py normalize_answer.
        assert_eq!(
            squad::normalize(&c.answer),
            c.squad_normalized_answer,
            "normalize_answer({:?})",
            c.answer
        );
        // metric_max_over_ground_truths(exact_match_score / f1_score, ...).
        assert_eq!(
            squad::max_exact_match(&c.answer, &c.references),
            Some(c.exact_match),
            "EM {:?} vs {:?}",
            c.answer,
            c.references
        );
        let f1 = squad::max_token_f1(&c.answer, &c.references).unwrap();
        assert!(
            (f1 - c.token_f1).abs() < TOL,
            "F1 {f1} != {} for {:?} vs {:?}",
            c.token_f1,
            c.answer,
            c.references
        );
    }
}

#[test]
fn combined_scores_agree_where_no_reference_is_blank() {
    // score_references drops blank references; with none blank it equals the references' max.
    for c in fixture()
        .cases
        .iter()
        .filter(|c| c.references.iter().all(|r| !r.trim().is_empty()))
    {
        let s = score_references(&c.answer, &c.references).unwrap();
        assert_eq!(s.exact_match, c.exact_match, "{:?}", c.answer);
        assert!((s.token_f1 - c.token_f1).abs() < TOL, "{:?}", c.answer);
        assert!((s.rouge_l - c.rouge_l).abs() < TOL, "{:?}", c.answer);
    }
}
