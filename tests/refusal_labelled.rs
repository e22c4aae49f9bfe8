//! Precision and recall of the default refusal detector on the labelled set
//! tests/fixtures/refusal_labelled.jsonl (invented ferry-FAQ answers, labelled by hand before
//! the detector was tuned; `kind` says what each answer is). The floors below are the figures
//! measured when the set was committed (reported in docs/scoring.md); a change to the phrase
//! list must not lower them.

use liftgate::score::RefusalDetector;
use serde::Deserialize;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct Labelled {
    answer: String,
    refusal: bool,
    kind: String,
}

const PRECISION_FLOOR: f64 = 1.0;
const RECALL_FLOOR: f64 = 1.0;

#[test]
fn precision_and_recall_on_the_labelled_set() {
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/fixtures/refusal_labelled.jsonl");
    let text = std::fs::read_to_string(path).expect("labelled set is readable");
    let rows: Vec<Labelled> = text
        .lines()
        .filter(|l| !l.trim().is_empty())
        .map(|l| serde_json::from_str(l).expect("labelled row parses"))
        .collect();
    assert!(rows.len() >= 80, "labelled set has {} rows", rows.len());
    let d = RefusalDetector::default();
    let (mut tp, mut fp, mut fn_, mut tn) = (0usize, 0usize, 0usize, 0usize);
    let mut wrong = Vec::new();
    for r in &rows {
        let got = d.is_refusal(&r.answer);
        match (got, r.refusal) {
            (true, true) => tp += 1,
            (true, false) => fp += 1,
            (false, true) => fn_ += 1,
            (false, false) => tn += 1,
        }
        if got != r.refusal {
            wrong.push(format!("[{}] expected {} got {}: {}", r.kind, r.refusal, got, r.answer));
        }
    }
    let precision = tp as f64 / (tp + fp) as f64;
    let recall = tp as f64 / (tp + fn_) as f64;
    eprintln!(
        "refusal detector on {} labelled answers: tp {tp} fp {fp} fn {fn_} tn {tn}, precision {precision:.3}, recall {recall:.3}",
        rows.len()
    );
    for w in &wrong {
        eprintln!("  {w}");
    }
    assert!(
        precision >= PRECISION_FLOOR,
        "precision {precision:.3} < {PRECISION_FLOOR}: {wrong:#?}"
    );
    assert!(recall >= RECALL_FLOOR, "recall {recall:.3} < {RECALL_FLOOR}: {wrong:#?}");
}
