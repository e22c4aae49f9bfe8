//! `liftgate vet` end to end on the user's own model: the real binary on a tiny reference
//! model (tests/fixtures/runner/llama, made with transformers 5.24.0 and peft 0.21.2 by
//! tests/reference/make_runner_fixtures.py), its `qv` adapter and a small question set.
//! Checks the report directory contents, the verdict line, exit codes 0/1 and that bad input
//! exits 2 leaving no report directory (docs/interface.md, "Exit codes").

mod common;

use common::{Bin, Run};
use serde_json::Value;
use std::path::PathBuf;

fn fixture() -> PathBuf {
    common::fixture("runner/llama")
}

const QUESTIONS: &str = r#"{"id": "q1", "question": "When does the first boat leave?", "references": ["At 06:50."], "category": "timetables"}
{"id": "q2", "question": "Can I bring my dog?", "references": ["Yes, dogs travel free on a lead."], "category": "pets"}
{"id": "q3", "question": "What will the weather be?", "references": [], "category": "out-of-scope", "expect": "refuse"}
"#;

/// `vet` in `t` on the llama fixture model and one of its adapters, with set.jsonl.
fn vet(t: &Bin, adapter: &str, extra: &[&str]) -> Run {
    let f = fixture();
    let (model, adapter) = (f.join("model"), f.join("adapters").join(adapter));
    let mut args = vec![
        "vet",
        "--model",
        model.to_str().unwrap(),
        "--adapter",
        adapter.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--max-new-tokens",
        "6",
        "--resamples",
        "1000",
    ];
    args.extend_from_slice(extra);
    t.run(args)
}

/// A temp dir holding the question set.
fn with_set() -> Bin {
    let t = Bin::new();
    t.write("set.jsonl", QUESTIONS);
    t
}

#[test]
fn vet_writes_one_report_directory_per_run() {
    let tmp = with_set();
    // A lenient policy so that the gate outcome follows from the data, not from the set size.
    tmp.write(
        "policy.toml",
        "min_questions = 1\n[lift]\nmin_ci_low = -1.0\n[refusal]\nmin_out_of_scope = 0.0\nmax_false_refusal = 1.0\n",
    );
    let first = vet(&tmp, "qv", &["--policy", "policy.toml"]);
    let stdout = &first.stdout;
    first.expect_verdict();
    assert!(stdout.starts_with("verdict: "), "{stdout}");
    let report_md = stdout
        .lines()
        .find_map(|l| l.strip_prefix("report: "))
        .expect("report line");
    let dir = tmp.path(report_md).parent().unwrap().to_path_buf();
    assert!(dir.starts_with(tmp.path("reports")), "{}", dir.display());
    for f in [
        "report.md",
        "summary.json",
        "baseline.answers.jsonl",
        "baseline.answers.jsonl.run.json",
        "candidate.answers.jsonl",
        "candidate.answers.jsonl.run.json",
        "baseline.grades.jsonl",
        "candidate.grades.jsonl",
    ] {
        assert!(dir.join(f).is_file(), "missing {f}");
    }
    let summary: Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["metrics"]["token_f1"]["n"], 2);
    let go = summary["verdict"]["go"].as_bool().unwrap();
    assert_eq!(first.code, Some(if go { 0 } else { 1 }));
    // The candidate's answers come from the merged adapter, the baseline's from the base:
    // the run records say so.
    let run: Value = serde_json::from_str(
        &std::fs::read_to_string(dir.join("candidate.answers.jsonl.run.json")).unwrap(),
    )
    .unwrap();
    assert!(run["adapter"].is_object(), "{run}");
    let base_run: Value = serde_json::from_str(
        &std::fs::read_to_string(dir.join("baseline.answers.jsonl.run.json")).unwrap(),
    )
    .unwrap();
    assert!(base_run["adapter"].is_null(), "{base_run}");

    // A second run gets a new directory; the first is untouched.
    let before = std::fs::read(dir.join("summary.json")).unwrap();
    let second = vet(&tmp, "qv", &["--policy", "policy.toml"]);
    let report2 = second
        .stdout
        .lines()
        .find_map(|l| l.strip_prefix("report: "))
        .unwrap();
    assert_ne!(report2, report_md);
    assert_eq!(std::fs::read(dir.join("summary.json")).unwrap(), before);
}

#[test]
fn vet_with_a_missing_adapter_exits_2_and_leaves_no_report() {
    let tmp = with_set();
    let out = vet(&tmp, "no-such-adapter", &[]);
    out.expect_code(2).expect_stderr(&["no-such-adapter"]);
    assert!(!tmp.path("reports").exists());
}

#[test]
fn vet_with_a_bad_policy_exits_2_and_leaves_no_report() {
    let tmp = with_set();
    tmp.write("policy.toml", "min_question = 3\n");
    let out = vet(&tmp, "qv", &["--policy", "policy.toml"]);
    out.expect_code(2)
        .expect_stderr(&["policy.toml", "min_question"]);
    assert!(!tmp.path("reports").exists());
}

#[test]
fn vet_needs_all_three_paths_or_none() {
    let t = Bin::new();
    let out = t.run(["vet", "--model", "somewhere"]);
    out.expect_code(2);
    assert!(!t.path("reports").exists());
}

/// `--weights bf16` is an approximation of the model: run.json, summary.json and report.md
/// all say so; the default f32 run says nothing of the kind.
#[test]
fn bf16_weights_are_labelled_as_an_approximation() {
    let tmp = with_set();
    for (weights, approx) in [("bf16", true), ("f32", false)] {
        let dir = format!("report-{weights}");
        let out = vet(&tmp, "qv", &["--weights", weights, "--report", &dir]);
        out.expect_verdict();
        let d = tmp.path(&dir);
        let run: serde_json::Value = serde_json::from_str(
            &std::fs::read_to_string(d.join("candidate.answers.jsonl.run.json")).unwrap(),
        )
        .unwrap();
        let dtype = run["compute_dtype"].as_str().unwrap();
        assert_eq!(dtype.contains("approximation"), approx, "{dtype}");
        let summary = std::fs::read_to_string(d.join("summary.json")).unwrap();
        let report = std::fs::read_to_string(d.join("report.md")).unwrap();
        assert_eq!(summary.contains("\"approximations\""), approx);
        assert_eq!(
            report.contains("Answers computed with an approximation of the model"),
            approx
        );
    }
}
