//! `liftgate vet` end to end on the user's own model: the real binary on a tiny reference
//! model (tests/fixtures/runner/llama, made with transformers 5.24.0 and peft 0.21.2 by
//! tests/reference/make_runner_fixtures.py), its `qv` adapter and a small question set.
//! Checks the report directory contents, the verdict line, exit codes 0/1 and that bad input
//! exits 2 leaving no report directory (interface.md, "Exit codes").

use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn fixture() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/runner/llama")
}

const QUESTIONS: &str = r#"{"id": "q1", "question": "When does the first boat leave?", "references": ["At 06:50."], "category": "timetables"}
{"id": "q2", "question": "Can I bring my dog?", "references": ["Yes, dogs travel free on a lead."], "category": "pets"}
{"id": "q3", "question": "What will the weather be?", "references": [], "category": "out-of-scope", "expect": "refuse"}
"#;

fn vet(dir: &Path, adapter: &str, extra: &[&str]) -> Output {
    let f = fixture();
    Command::new(env!("CARGO_BIN_EXE_liftgate"))
        .current_dir(dir)
        .arg("vet")
        .arg("--model")
        .arg(f.join("model"))
        .arg("--adapter")
        .arg(f.join("adapters").join(adapter))
        .args([
            "--questions",
            "set.jsonl",
            "--max-new-tokens",
            "6",
            "--resamples",
            "1000",
        ])
        .args(extra)
        .output()
        .unwrap()
}

#[test]
fn vet_writes_one_report_directory_per_run() {
    let tmp = tempfile::tempdir().unwrap();
    std::fs::write(tmp.path().join("set.jsonl"), QUESTIONS).unwrap();
    // A lenient policy so that the gate outcome follows from the data, not from the set size.
    std::fs::write(
        tmp.path().join("policy.toml"),
        "min_questions = 1\n[lift]\nmin_ci_low = -1.0\n[refusal]\nmin_out_of_scope = 0.0\nmax_false_refusal = 1.0\n",
    )
    .unwrap();
    let first = vet(tmp.path(), "qv", &["--policy", "policy.toml"]);
    let stdout = String::from_utf8_lossy(&first.stdout);
    let stderr = String::from_utf8_lossy(&first.stderr);
    assert!(matches!(first.status.code(), Some(0) | Some(1)), "{stderr}");
    assert!(stdout.starts_with("verdict: "), "{stdout}");
    let report_md = stdout
        .lines()
        .find_map(|l| l.strip_prefix("report: "))
        .expect("report line");
    let dir = tmp.path().join(report_md).parent().unwrap().to_path_buf();
    assert!(
        dir.starts_with(tmp.path().join("reports")),
        "{}",
        dir.display()
    );
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
    assert_eq!(first.status.code(), Some(if go { 0 } else { 1 }));
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
    let second = vet(tmp.path(), "qv", &["--policy", "policy.toml"]);
    let stdout2 = String::from_utf8_lossy(&second.stdout);
    let report2 = stdout2
        .lines()
        .find_map(|l| l.strip_prefix("report: "))
        .unwrap();
    assert_ne!(report2, report_md);
    assert_eq!(std::fs::read(dir.join("summary.json")).unwrap(), before);
}

#[test]
fn vet_with_a_missing_adapter_exits_2_and_leaves_no_report() {
    let tmp = tempfile::tempdir().unwrap();
    std::fs::write(tmp.path().join("set.jsonl"), QUESTIONS).unwrap();
    let out = vet(tmp.path(), "no-such-adapter", &[]);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{stderr}");
    assert!(stderr.contains("no-such-adapter"), "{stderr}");
    assert!(!tmp.path().join("reports").exists());
}

#[test]
fn vet_with_a_bad_policy_exits_2_and_leaves_no_report() {
    let tmp = tempfile::tempdir().unwrap();
    std::fs::write(tmp.path().join("set.jsonl"), QUESTIONS).unwrap();
    std::fs::write(tmp.path().join("policy.toml"), "min_question = 3\n").unwrap();
    let out = vet(tmp.path(), "qv", &["--policy", "policy.toml"]);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("policy.toml") && stderr.contains("min_question"),
        "{stderr}"
    );
    assert!(!tmp.path().join("reports").exists());
}

#[test]
fn vet_needs_all_three_paths_or_none() {
    let out = Command::new(env!("CARGO_BIN_EXE_liftgate"))
        .args(["vet", "--model", "somewhere"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
}

/// `--weights bf16` is an approximation of the model: run.json, summary.json and report.md
/// all say so; the default f32 run says nothing of the kind.
#[test]
fn bf16_weights_are_labelled_as_an_approximation() {
    let tmp = tempfile::tempdir().unwrap();
    std::fs::write(tmp.path().join("set.jsonl"), QUESTIONS).unwrap();
    for (weights, approx) in [("bf16", true), ("f32", false)] {
        let dir = format!("report-{weights}");
        let out = vet(tmp.path(), "qv", &["--weights", weights, "--report", &dir]);
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert!(matches!(out.status.code(), Some(0) | Some(1)), "{stderr}");
        let d = tmp.path().join(&dir);
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
