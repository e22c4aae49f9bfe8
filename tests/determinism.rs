//! Determinism: the same inputs and seed give byte-identical grades, summary.json and report.md
//! across runs of the real binary. Wall-clock timings live only in the answers file's `ms`
//! field and in nothing `grade` or `weigh` writes; the answers themselves (greedy decoding)
//! are identical apart from `ms`. (`weigh` alone: tests/weigh_cli.rs,
//! `same_inputs_and_seed_give_identical_reports`.)

mod common;

use common::{Bin, Run};
use serde_json::Value;

const SET: &str = r#"{"id": "q1", "question": "When does the first boat leave Gull Point?", "references": ["At 06:50."], "category": "timetables"}
{"id": "q2", "question": "Can I bring my dog on the ferry?", "references": ["Yes, dogs travel free on a lead."], "category": "pets"}
{"id": "q3", "question": "Is there a café on board?", "references": ["Yes, on the upper deck."], "category": "on-board"}
{"id": "q4", "question": "What will the weather be on Saturday?", "references": [], "category": "out-of-scope", "expect": "refuse"}
"#;

const POLICY: &str = "min_questions = 1\n[categories]\nmin_questions = 2\n";

/// Runs the binary in `t` and asserts exit 0 or 1.
fn liftgate(t: &Bin, args: &[&str]) -> Run {
    let o = t.run(args);
    o.expect_verdict();
    o
}

/// `vet` on the llama fixture and its `qv` adapter in a fresh directory, with relative paths
/// so that the recorded input paths are the same in every run.
fn vet_run() -> (Bin, Run) {
    let tmp = Bin::new();
    tmp.write("set.jsonl", SET);
    tmp.write("policy.toml", POLICY);
    let f = common::fixture("runner/llama");
    let model = f.join("model");
    let adapter = f.join("adapters/qv");
    let out = liftgate(
        &tmp,
        &[
            "vet",
            "--model",
            model.to_str().unwrap(),
            "--adapter",
            adapter.to_str().unwrap(),
            "--questions",
            "set.jsonl",
            "--policy",
            "policy.toml",
            "--report",
            "rep",
            "--max-new-tokens",
            "8",
            "--resamples",
            "2000",
            "--seed",
            "5",
        ],
    );
    (tmp, out)
}

/// Object keys anywhere in a JSON tree.
fn keys(v: &Value, out: &mut Vec<String>) {
    match v {
        Value::Object(m) => {
            for (k, x) in m {
                out.push(k.clone());
                keys(x, out);
            }
        }
        Value::Array(a) => a.iter().for_each(|x| keys(x, out)),
        _ => {}
    }
}

#[test]
fn vet_twice_gives_identical_grades_summary_and_report() {
    let (a, out_a) = vet_run();
    let (b, out_b) = vet_run();
    assert_eq!(out_a.code, out_b.code);
    assert_eq!(
        out_a.stdout_bytes, out_b.stdout_bytes,
        "terminal summary differs"
    );
    let (ra, rb) = (a.path("rep"), b.path("rep"));
    for file in [
        "baseline.grades.jsonl",
        "candidate.grades.jsonl",
        "summary.json",
        "report.md",
    ] {
        let x = std::fs::read(ra.join(file)).unwrap();
        let y = std::fs::read(rb.join(file)).unwrap();
        assert!(!x.is_empty(), "{file} is empty");
        assert!(x == y, "{file} differs between identical runs");
    }
    for file in ["baseline.answers.jsonl", "candidate.answers.jsonl"] {
        assert_eq!(
            common::answers_without_ms(&ra.join(file)),
            common::answers_without_ms(&rb.join(file)),
            "{file}: answers differ beyond the ms timings"
        );
    }
    // Nothing in summary.json is a timing or a date.
    let summary: Value =
        serde_json::from_str(&std::fs::read_to_string(ra.join("summary.json")).unwrap()).unwrap();
    let mut all = Vec::new();
    keys(&summary, &mut all);
    for k in &all {
        let k = k.to_ascii_lowercase();
        assert!(
            !k.split('_').any(|w| matches!(
                w,
                "ms" | "time"
                    | "times"
                    | "timing"
                    | "date"
                    | "elapsed"
                    | "seconds"
                    | "secs"
                    | "timestamp"
            )),
            "summary.json key {k:?} looks like a timing"
        );
    }
}

#[test]
fn grade_twice_gives_identical_bytes() {
    let (tmp, _) = vet_run();
    for out in ["g1.jsonl", "g2.jsonl"] {
        liftgate(
            &tmp,
            &[
                "grade",
                "--questions",
                "set.jsonl",
                "--answers",
                "rep/candidate.answers.jsonl",
                "--out",
                out,
            ],
        );
    }
    let g1 = tmp.read_bytes("g1.jsonl");
    assert_eq!(g1, tmp.read_bytes("g2.jsonl"));
    assert_eq!(
        tmp.read_bytes("g1.jsonl.run.json"),
        tmp.read_bytes("g2.jsonl.run.json")
    );
    // `grade` on vet's answers gives vet's own grades.
    assert_eq!(g1, tmp.read_bytes("rep/candidate.grades.jsonl"));
}
