//! `liftgate grade` end to end: the real binary on small hand-made files in a temp dir
//! (docs/interface.md: grades file fields, exit code 2 for bad input with file and line named,
//! nothing half-written, stdout left empty).

mod common;

use common::{Bin, Run};
use serde_json::Value;
use std::path::{Path, PathBuf};

const QUESTIONS: &str = r#"{"id": "t-001", "question": "Can I bring my bike on the 7:40 crossing?", "references": ["Yes, bikes ride free on every crossing."], "category": "luggage"}
{"id": "t-002", "question": "When does vehicle check-in close?", "references": ["Twenty minutes before departure.", "20 minutes before departure."], "category": "boarding"}

{"id": "x-001", "question": "What will the weather be on Saturday?", "references": [], "category": "out-of-scope", "expect": "refuse"}
"#;

fn answer_row(id: &str, answer: &str) -> String {
    serde_json::json!({
        "id": id, "answer": answer, "finish": "eos",
        "prompt_tokens": 40, "new_tokens": 12, "ms": 5
    })
    .to_string()
}

fn good_answers() -> Vec<String> {
    vec![
        answer_row("t-001", "Bikes ride free."),
        answer_row("t-002", "20 minutes before departure"),
        answer_row("x-001", "I'm sorry, I can't predict the weather."),
    ]
}

struct Case {
    t: Bin,
}

impl Case {
    fn new(answers: &[String]) -> Case {
        let t = Bin::new();
        t.write("questions.jsonl", QUESTIONS);
        t.write("answers.jsonl", answers.join("\n") + "\n");
        Case { t }
    }

    fn path(&self, name: &str) -> PathBuf {
        self.t.path(name)
    }

    fn grade(&self, extra: &[&str]) -> Run {
        let mut args = vec![
            "grade",
            "--questions",
            "questions.jsonl",
            "--answers",
            "answers.jsonl",
            "--out",
            "out/grades.jsonl",
        ];
        args.extend_from_slice(extra);
        self.t.run(args)
    }

    /// Asserts a bad-input failure: exit 2, message naming `needles`, no grades file.
    fn assert_rejected(&self, run: &Run, needles: &[&str]) {
        run.expect_code(2).expect_stderr(needles).expect_no_stdout();
        assert!(!self.path("out/grades.jsonl").exists());
        assert_no_temp_files(&self.path("out"));
    }
}

fn assert_no_temp_files(dir: &Path) {
    if let Ok(entries) = std::fs::read_dir(dir) {
        let names: Vec<_> = entries.map(|e| e.unwrap().file_name()).collect();
        assert!(names.is_empty(), "left in {}: {names:?}", dir.display());
    }
}

fn close(v: &Value, want: f64) -> bool {
    v.as_f64().is_some_and(|x| (x - want).abs() < 1e-12)
}

#[test]
fn grades_every_question_in_order() {
    let case = Case::new(&good_answers());
    let run = case.grade(&[]);
    run.expect_success().expect_no_stdout();
    assert!(run.stderr.contains("graded 3 answers"), "{}", run.stderr);
    assert_eq!(run.stderr.trim().lines().count(), 1, "{}", run.stderr);

    let text = std::fs::read_to_string(case.path("out/grades.jsonl")).unwrap();
    let rows: Vec<Value> = text
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(rows.len(), 3);
    let ids: Vec<&str> = rows.iter().map(|r| r["id"].as_str().unwrap()).collect();
    assert_eq!(ids, ["t-001", "t-002", "x-001"]);

    // t-001: "Bikes ride free." vs "Yes, bikes ride free on every crossing.".
    // SQuAD v1.1: 3 common tokens of 3 and 7 -> P 1, R 3/7, F1 0.6; EM 0.
    // ROUGE-L (Lin 2004): LCS 3, P 1, R 3/7 -> 0.6.
    let r = &rows[0];
    assert_eq!(r["category"], "luggage");
    assert_eq!(r["expect"], "answer");
    assert_eq!(r["exact_match"], 0);
    assert!(close(&r["token_f1"], 0.6), "{r}");
    assert!(close(&r["rouge_l"], 0.6), "{r}");
    assert_eq!(r["refused"], false);
    assert_eq!(r["answer"], "Bikes ride free.");

    // t-002 matches the second reference exactly after normalisation.
    let r = &rows[1];
    assert_eq!(r["exact_match"], 1);
    assert!(close(&r["token_f1"], 1.0), "{r}");
    assert!(close(&r["rouge_l"], 1.0), "{r}");

    // x-001 has no references: the three scores are null; the answer declines.
    let r = &rows[2];
    assert_eq!(r["expect"], "refuse");
    assert!(r["exact_match"].is_null() && r["token_f1"].is_null() && r["rouge_l"].is_null());
    assert_eq!(r["refused"], true);
}

#[test]
fn missing_row_in_the_middle_names_the_line() {
    let a = good_answers();
    let case = Case::new(&[a[0].clone(), a[2].clone()]);
    let run = case.grade(&[]);
    case.assert_rejected(&run, &["answers.jsonl:2", "t-002", "x-001"]);
}

#[test]
fn missing_row_at_the_end_names_the_file_and_the_id() {
    let a = good_answers();
    let case = Case::new(&a[..2]);
    let run = case.grade(&[]);
    case.assert_rejected(&run, &["answers.jsonl", "x-001"]);
}

#[test]
fn extra_row_names_the_line() {
    let mut a = good_answers();
    a.push(answer_row("x-002", "Extra."));
    let case = Case::new(&a);
    let run = case.grade(&[]);
    case.assert_rejected(&run, &["answers.jsonl:4", "x-002"]);
}

#[test]
fn reordered_rows_name_the_first_line_that_differs() {
    let a = good_answers();
    let case = Case::new(&[a[1].clone(), a[0].clone(), a[2].clone()]);
    let run = case.grade(&[]);
    case.assert_rejected(&run, &["answers.jsonl:1", "t-001"]);
}

#[test]
fn malformed_json_names_the_line() {
    let a = good_answers();
    let case = Case::new(&[
        a[0].clone(),
        "{\"id\": \"t-002\", \"answer\": ".to_string(),
        a[2].clone(),
    ]);
    let run = case.grade(&[]);
    case.assert_rejected(&run, &["answers.jsonl:2"]);
}

#[test]
fn wrong_field_type_names_the_line() {
    let a = good_answers();
    let bad = r#"{"id": "t-002", "answer": 7, "finish": "eos", "prompt_tokens": 1, "new_tokens": 1, "ms": 1}"#;
    let case = Case::new(&[a[0].clone(), bad.to_string(), a[2].clone()]);
    let run = case.grade(&[]);
    case.assert_rejected(&run, &["answers.jsonl:2", "answer"]);
}

#[test]
fn policy_extra_phrases_extend_the_refusal_detector() {
    // "ask at the harbour office" is no default refusal phrase; the policy adds it.
    let mut a = good_answers();
    a[2] = answer_row("x-001", "Please ask at the harbour office about that.");
    let case = Case::new(&a);
    let plain = case.grade(&[]);
    plain.expect_success();
    let rows = |case: &Case| -> Vec<Value> {
        std::fs::read_to_string(case.path("out/grades.jsonl"))
            .unwrap()
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect()
    };
    assert_eq!(rows(&case)[2]["refused"], Value::Bool(false));
    case.t.write(
        "policy.toml",
        "[refusal]\nextra_phrases = [\"ask at the harbour office\"]\n",
    );
    let with_policy = case.grade(&["--policy", "policy.toml"]);
    with_policy.expect_success();
    assert_eq!(rows(&case)[2]["refused"], Value::Bool(true));
}

#[test]
fn policy_with_an_unknown_key_is_rejected() {
    let case = Case::new(&good_answers());
    case.t
        .write("policy.toml", "[refusal]\nextra_phrase = []\n");
    let run = case.grade(&["--policy", "policy.toml"]);
    case.assert_rejected(&run, &["policy.toml", "extra_phrase"]);
}

#[test]
fn existing_output_is_replaced_whole() {
    let case = Case::new(&good_answers());
    case.t
        .write("out/grades.jsonl", "old\nold\nold\nold\nold\n");
    let run = case.grade(&[]);
    run.expect_success();
    let text = std::fs::read_to_string(case.path("out/grades.jsonl")).unwrap();
    assert_eq!(text.lines().count(), 3);
    assert!(!text.contains("old"));
}
