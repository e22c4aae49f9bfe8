//! Answers made by another system (a serving stack, an API, a spreadsheet): rows with only
//! `id` and `answer`, no run record beside them, grade and weigh like liftgate's own
//! (docs/interface.md, "Grading answers from another system"). And answering needs no
//! references: `answer` takes a set of ids and questions only.

use serde_json::Value;
use std::path::Path;
use std::process::{Command, Output};

const SET: &str = r#"{"id": "fare-1", "question": "How much is a return ticket to Vessa?", "references": ["A return ticket to Vessa costs 9.50 euros."], "category": "fares"}
{"id": "pets-1", "question": "Can my dog come on board?", "references": ["Yes, dogs travel free on a lead."], "category": "pets"}
{"id": "oos-1", "question": "Will it rain on Saturday?", "references": [], "category": "out-of-scope", "expect": "refuse"}
"#;

fn run(dir: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_liftgate"))
        .current_dir(dir)
        .args(args)
        .output()
        .unwrap()
}

fn grades(dir: &Path, name: &str) -> Vec<Value> {
    std::fs::read_to_string(dir.join(name))
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

#[test]
fn answers_with_only_id_and_answer_grade_and_weigh() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    std::fs::write(d.join("set.jsonl"), SET).unwrap();
    // The baseline from a spreadsheet export, with a column of its own kept along.
    std::fs::write(
        d.join("base.jsonl"),
        r#"{"id": "fare-1", "answer": "Please check the price list.", "reviewer": "desk 2"}
{"id": "pets-1", "answer": "Pets are welcome."}
{"id": "oos-1", "answer": "It will be sunny."}
"#,
    )
    .unwrap();
    std::fs::write(
        d.join("tuned.jsonl"),
        r#"{"id": "fare-1", "answer": "A return ticket to Vessa costs 9.50 euros."}
{"id": "pets-1", "answer": "Yes, dogs travel free on a lead."}
{"id": "oos-1", "answer": "I'm sorry, I can only answer questions about the ferry service."}
"#,
    )
    .unwrap();
    for (answers, out) in [
        ("base.jsonl", "base.grades"),
        ("tuned.jsonl", "tuned.grades"),
    ] {
        let o = run(
            d,
            &[
                "grade",
                "--questions",
                "set.jsonl",
                "--answers",
                answers,
                "--out",
                out,
            ],
        );
        assert_eq!(
            o.status.code(),
            Some(0),
            "{}",
            String::from_utf8_lossy(&o.stderr)
        );
    }
    let tuned = grades(d, "tuned.grades");
    assert_eq!(tuned[0]["exact_match"], 1);
    assert_eq!(tuned[1]["token_f1"], 1.0);
    assert_eq!(tuned[2]["refused"], true);
    let base = grades(d, "base.grades");
    assert_eq!(base[2]["refused"], false);

    // Three questions are far below the policy's minimum, so the verdict is NO-GO (exit 1);
    // what matters is that the outside answers were weighed.
    let o = run(
        d,
        &[
            "weigh",
            "--questions",
            "set.jsonl",
            "--baseline",
            "base.grades",
            "--candidate",
            "tuned.grades",
            "--report",
            "report",
            "--resamples",
            "1000",
        ],
    );
    assert_eq!(
        o.status.code(),
        Some(1),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let summary: Value =
        serde_json::from_str(&std::fs::read_to_string(d.join("report/summary.json")).unwrap())
            .unwrap();
    assert_eq!(summary["metrics"]["exact_match"]["candidate"], 1.0);
    assert_eq!(summary["metrics"]["exact_match"]["n"], 2);
    assert_eq!(
        summary["refusal"]["out_of_scope"]["candidate"]["declined"],
        1
    );
    assert!(d.join("report/report.md").is_file());
}

#[test]
fn answering_needs_no_references_but_grading_does() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    let model = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/runner/llama/model");
    std::fs::write(
        d.join("set.jsonl"),
        "{\"id\": \"a\", \"question\": \"When does the first boat leave?\"}\n{\"id\": \"b\", \"question\": \"Is there a café on board?\"}\n",
    )
    .unwrap();
    let o = run(
        d,
        &[
            "answer",
            "--model",
            model.to_str().unwrap(),
            "--questions",
            "set.jsonl",
            "--out",
            "answers.jsonl",
            "--max-new-tokens",
            "3",
        ],
    );
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert_eq!(
        std::fs::read_to_string(d.join("answers.jsonl"))
            .unwrap()
            .lines()
            .count(),
        2
    );
    // Grading those answers needs references: exit 2 naming the set, the line and the field,
    // and no grades file.
    let o = run(
        d,
        &[
            "grade",
            "--questions",
            "set.jsonl",
            "--answers",
            "answers.jsonl",
            "--out",
            "grades.jsonl",
        ],
    );
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("set.jsonl:1: field `references`"), "{err}");
    assert!(!d.join("grades.jsonl").exists());
}
