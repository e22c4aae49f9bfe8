//! Answers made by another system (a serving stack, an API, a spreadsheet): rows with only
//! `id` and `answer`, no run record beside them, grade and weigh like liftgate's own
//! (docs/interface.md, "Grading answers from another system"). And answering needs no
//! references: `answer` takes a set of ids and questions only.

mod common;

use common::Bin;
use serde_json::Value;

const SET: &str = r#"{"id": "fare-1", "question": "How much is a return ticket to Vessa?", "references": ["A return ticket to Vessa costs 9.50 euros."], "category": "fares"}
{"id": "pets-1", "question": "Can my dog come on board?", "references": ["Yes, dogs travel free on a lead."], "category": "pets"}
{"id": "oos-1", "question": "Will it rain on Saturday?", "references": [], "category": "out-of-scope", "expect": "refuse"}
"#;

fn grades(t: &Bin, name: &str) -> Vec<Value> {
    t.read(name)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

#[test]
fn answers_with_only_id_and_answer_grade_and_weigh() {
    let t = Bin::new();
    t.write("set.jsonl", SET);
    // The baseline from a spreadsheet export, with a column of its own kept along.
    t.write(
        "base.jsonl",
        r#"{"id": "fare-1", "answer": "Please check the price list.", "reviewer": "desk 2"}
{"id": "pets-1", "answer": "Pets are welcome."}
{"id": "oos-1", "answer": "It will be sunny."}
"#,
    );
    t.write(
        "tuned.jsonl",
        r#"{"id": "fare-1", "answer": "A return ticket to Vessa costs 9.50 euros."}
{"id": "pets-1", "answer": "Yes, dogs travel free on a lead."}
{"id": "oos-1", "answer": "I'm sorry, I can only answer questions about the ferry service."}
"#,
    );
    for (answers, out) in [
        ("base.jsonl", "base.grades"),
        ("tuned.jsonl", "tuned.grades"),
    ] {
        t.run([
            "grade",
            "--questions",
            "set.jsonl",
            "--answers",
            answers,
            "--out",
            out,
        ])
        .expect_success();
    }
    let tuned = grades(&t, "tuned.grades");
    assert_eq!(tuned[0]["exact_match"], 1);
    assert_eq!(tuned[1]["token_f1"], 1.0);
    assert_eq!(tuned[2]["refused"], true);
    let base = grades(&t, "base.grades");
    assert_eq!(base[2]["refused"], false);

    // Three questions are far below the policy's minimum, so the verdict is NO-GO (exit 1);
    // what matters is that the outside answers were weighed.
    t.run([
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
    ])
    .expect_code(1);
    let summary: Value = serde_json::from_str(&t.read("report/summary.json")).unwrap();
    assert_eq!(summary["metrics"]["exact_match"]["candidate"], 1.0);
    assert_eq!(summary["metrics"]["exact_match"]["n"], 2);
    assert_eq!(
        summary["refusal"]["out_of_scope"]["candidate"]["declined"],
        1
    );
    assert!(t.path("report/report.md").is_file());
}

#[test]
fn answering_needs_no_references_but_grading_does() {
    let t = Bin::new();
    let model = common::fixture("runner/llama/model");
    t.write(
        "set.jsonl",
        "{\"id\": \"a\", \"question\": \"When does the first boat leave?\"}\n{\"id\": \"b\", \"question\": \"Is there a café on board?\"}\n",
    );
    t.run([
        "answer",
        "--model",
        model.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--out",
        "answers.jsonl",
        "--max-new-tokens",
        "3",
    ])
    .expect_success();
    assert_eq!(t.read("answers.jsonl").lines().count(), 2);
    // Grading those answers needs references: exit 2 naming the set, the line and the field,
    // and no grades file.
    t.run([
        "grade",
        "--questions",
        "set.jsonl",
        "--answers",
        "answers.jsonl",
        "--out",
        "grades.jsonl",
    ])
    .expect_code(2)
    .expect_stderr(&["set.jsonl:1: field `references`"]);
    assert!(!t.path("grades.jsonl").exists());
}
