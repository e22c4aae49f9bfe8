//! The leak check's similarity values against tests/fixtures/leaks.json, made by
//! tests/reference/make_leak_fixture.py: word-triple containment and resemblance computed with
//! Python sets from the definitions of Broder (1997), "On the resemblance and containment of
//! documents". Also: every pair the reference calls a near duplicate with a resemblance the LSH
//! bands are tuned for is found through MinHash-LSH, and `liftgate leaks` prints them.

mod common;

use common::Bin;
use liftgate::score::leaks::{
    containment, find_leaks, normalise, resemblance, shingles, DEFAULT_THRESHOLD, NGRAM,
};
use serde::Deserialize;

#[derive(Deserialize)]
struct Fixture {
    ngram: usize,
    pairs: Vec<Pair>,
}

#[derive(Deserialize)]
struct Pair {
    question: String,
    train: String,
    normalised_question: String,
    containment: f64,
    resemblance: f64,
}

fn fixture() -> Fixture {
    let text = std::fs::read_to_string(common::fixture("leaks.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

#[test]
fn similarities_match_the_python_reference() {
    let f = fixture();
    assert_eq!(f.ngram, NGRAM);
    assert!(f.pairs.len() >= 20);
    for p in &f.pairs {
        let n = normalise(&p.question);
        assert_eq!(n, p.normalised_question);
        let (a, b) = (shingles(&n), shingles(&normalise(&p.train)));
        let (c, r) = (containment(&a, &b), resemblance(&a, &b));
        assert!(
            (c - p.containment).abs() < 1e-12,
            "{:?}: containment {c} vs {}",
            p.question,
            p.containment
        );
        assert!(
            (r - p.resemblance).abs() < 1e-12,
            "{:?}: resemblance {r} vs {}",
            p.question,
            p.resemblance
        );
    }
}

#[test]
fn lsh_finds_the_reference_near_duplicates() {
    // Pairs above the threshold whose resemblance is at least 0.35 are candidates with
    // probability 1 − (1 − 0.35²)^64 > 0.9996 (module doc); with the fixed hash functions the
    // outcome is deterministic, so this is checked exactly.
    let f = fixture();
    for p in f
        .pairs
        .iter()
        .filter(|p| p.containment >= DEFAULT_THRESHOLD && p.resemblance >= 0.35)
    {
        let leaks = find_leaks(
            &[p.question.as_str()],
            &[p.train.as_str()],
            DEFAULT_THRESHOLD,
        );
        assert_eq!(leaks.len(), 1, "{:?} not found", p.question);
        assert!((leaks[0].containment - p.containment).abs() < 1e-12);
    }
    for p in f.pairs.iter().filter(|p| p.containment < DEFAULT_THRESHOLD) {
        let leaks = find_leaks(
            &[p.question.as_str()],
            &[p.train.as_str()],
            DEFAULT_THRESHOLD,
        );
        assert!(leaks.is_empty(), "{:?} flagged", p.question);
    }
}

#[test]
fn leaks_command_lists_flagged_questions_on_stdout() {
    let bin = Bin::new();
    bin.write(
        "set.jsonl",
        concat!(
            "{\"id\": \"q1\", \"question\": \"Is there a lift on MV Saltmarrow?\", \"references\": [\"Yes.\"], \"category\": \"access\"}\n",
            "{\"id\": \"q2\", \"question\": \"When does the first winter boat leave Wendle Quay for Vessa, please?\", \"references\": [\"07:20\"], \"category\": \"times\"}\n",
            "{\"id\": \"q3\", \"question\": \"What does a dog cost?\", \"references\": [\"Nothing.\"], \"category\": \"pets\"}\n",
        ),
    );
    bin.write(
        "train.jsonl",
        concat!(
            "{\"question\": \"Is there a lift on MV Saltmarrow?\", \"answer\": \"Yes.\"}\n",
            "{\"messages\": [{\"role\": \"user\", \"content\": \"When does the first winter boat leave Wendle Quay for Vessa in the morning?\"}, {\"role\": \"assistant\", \"content\": \"07:20\"}]}\n",
        ),
    );
    let out = bin.run([
        "leaks",
        "--questions",
        "set.jsonl",
        "--train",
        "train.jsonl",
    ]);
    out.expect_code(0);
    let rows: Vec<serde_json::Value> = out
        .stdout
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(rows.len(), 2, "{}", out.stdout);
    assert_eq!(rows[0]["id"], "q1");
    assert_eq!(rows[0]["kind"], "exact");
    assert_eq!(rows[1]["id"], "q2");
    assert_eq!(rows[1]["kind"], "near");
    assert_eq!(rows[1]["train_line"], 2);
    assert_eq!(rows[1]["containment"], 0.9);
    assert!(
        out.stderr.contains("1 exact, 0 normalised, 1 near"),
        "{}",
        out.stderr
    );
}
