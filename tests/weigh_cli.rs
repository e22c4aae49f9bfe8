//! `liftgate weigh` end to end: the real binary on hand-made question sets and grades files in
//! a temporary directory (docs/interface.md: flags, summary.json fields, exit codes 0/1/2).
//!
//! summary.json is read with test-only serde types holding the fields docs/interface.md promises,
//! so a rename in the production structs fails here.

mod common;

use common::{Bin, Run};
use serde::Deserialize;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

#[derive(Debug, Deserialize)]
struct Summary {
    metrics: BTreeMap<String, Metric>,
    refusal: serde_json::Value,
    categories: BTreeMap<String, serde_json::Value>,
    verdict: Verdict,
    settings: Settings,
}

#[derive(Debug, Deserialize)]
struct Metric {
    baseline: f64,
    candidate: f64,
    lift: f64,
    ci_low: f64,
    ci_high: f64,
    p_value: f64,
    n: usize,
}

#[derive(Debug, Deserialize)]
struct Verdict {
    go: bool,
    checks: Vec<Check>,
}

#[derive(Debug, Deserialize)]
struct Check {
    name: String,
    threshold: f64,
    value: Option<f64>,
    pass: bool,
}

#[derive(Debug, Deserialize)]
struct Settings {
    p_value_method: String,
    resamples: usize,
    seed: u64,
}

/// A temporary directory with a hand-made set and two grades files.
struct Case {
    t: Bin,
}

/// Deterministic pseudo-random numbers in [0, 1) for the invented scores (64-bit LCG, Knuth's
/// MMIX constants).
struct Lcg(u64);
impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

impl Case {
    /// `n` in-scope questions over three categories and `oos` out-of-scope ones. The candidate's
    /// score is the baseline's plus `lift` plus noise; `oos_declined` of the out-of-scope
    /// questions are declined by the candidate.
    fn new(n: usize, oos: usize, lift: f64, oos_declined: usize) -> Case {
        let t = Bin::new();
        let mut rng = Lcg(42);
        let cats = ["tickets", "luggage", "timetable"];
        let (mut set, mut base, mut cand) = (String::new(), String::new(), String::new());
        for i in 0..n {
            let cat = cats[i % 3];
            let id = format!("t-{i:03}");
            set += &format!(
                "{}\n",
                serde_json::json!({"id": id, "question": format!("Can I bring item {i} | `x` on board?"),
                    "references": [format!("Yes, item {i} rides free.")], "category": cat})
            );
            let b = (rng.next() * 0.8 * 1000.0).round() / 1000.0;
            let c =
                ((b + lift + (rng.next() - 0.5) * 0.3).clamp(0.0, 1.0) * 1000.0).round() / 1000.0;
            for (out, score, text) in [(&mut base, b, "base"), (&mut cand, c, "tuned")] {
                *out += &format!(
                    "{}\n",
                    serde_json::json!({"id": id, "category": cat, "expect": "answer",
                        "exact_match": u8::from(score > 0.7), "token_f1": score, "rouge_l": score,
                        "refused": false, "answer": format!("{text} answer {i}\nsecond line")})
                );
            }
        }
        for i in 0..oos {
            let id = format!("x-{i:03}");
            set += &format!(
                "{}\n",
                serde_json::json!({"id": id, "question": "Will it rain on Saturday?",
                    "references": [], "category": "out-of-scope", "expect": "refuse"})
            );
            for (out, refused) in [(&mut base, i % 2 == 0), (&mut cand, i < oos_declined)] {
                *out += &format!(
                    "{}\n",
                    serde_json::json!({"id": id, "category": "out-of-scope", "expect": "refuse",
                        "exact_match": null, "token_f1": null, "rouge_l": null,
                        "refused": refused, "answer": "I can't help with that."})
                );
            }
        }
        t.write("set.jsonl", set);
        t.write("base.jsonl", base);
        t.write("cand.jsonl", cand);
        Case { t }
    }

    fn path(&self, name: &str) -> PathBuf {
        self.t.path(name)
    }

    /// `weigh` with absolute paths (run from the test's own directory, so the report line on
    /// stdout carries the temp-dir path).
    fn weigh(&self, report: &str, extra: &[&str]) -> Run {
        let (set, base, cand, rep) = (
            self.path("set.jsonl"),
            self.path("base.jsonl"),
            self.path("cand.jsonl"),
            self.path(report),
        );
        let mut args = vec![
            "weigh",
            "--questions",
            set.to_str().unwrap(),
            "--baseline",
            base.to_str().unwrap(),
            "--candidate",
            cand.to_str().unwrap(),
            "--report",
            rep.to_str().unwrap(),
            "--resamples",
            "2000",
        ];
        args.extend_from_slice(extra);
        common::run(args)
    }

    fn summary(&self, report: &str) -> Summary {
        let text = std::fs::read_to_string(self.path(report).join("summary.json")).unwrap();
        serde_json::from_str(&text).unwrap()
    }
}

fn no_report(dir: &Path) {
    assert!(
        !dir.join("summary.json").exists() && !dir.join("report.md").exists(),
        "a report was written"
    );
}

#[test]
fn clear_lift_is_go_with_every_promised_field() {
    let case = Case::new(120, 20, 0.1, 19);
    let out = case.weigh("r", &[]);
    out.expect_code(0);
    assert_eq!(out.stdout.lines().next(), Some("verdict: GO"));
    let s = case.summary("r");
    assert!(s.verdict.go);
    for name in ["exact_match", "token_f1", "rouge_l"] {
        let m = &s.metrics[name];
        assert_eq!(m.n, 120, "{name}");
        assert!((m.lift - (m.candidate - m.baseline)).abs() < 1e-9, "{name}");
        assert!(m.ci_low <= m.lift && m.lift <= m.ci_high, "{name}");
        assert!(m.p_value > 0.0 && m.p_value <= 1.0, "{name}");
    }
    assert!(s.metrics["token_f1"].ci_low > 0.0);
    assert_eq!(s.refusal["out_of_scope"]["n"], 20);
    assert_eq!(s.refusal["out_of_scope"]["candidate"]["declined"], 19);
    assert_eq!(s.categories.len(), 4);
    assert!(s.settings.p_value_method.contains("sign-flip"));
    assert_eq!((s.settings.resamples, s.settings.seed), (2000, 7));
    let names: Vec<&str> = s.verdict.checks.iter().map(|c| c.name.as_str()).collect();
    for want in [
        "min_questions",
        "lift.token_f1",
        "refusal.out_of_scope",
        "refusal.false_refusal",
        "category.luggage",
    ] {
        assert!(names.contains(&want), "{names:?}");
    }
    assert!(s.verdict.checks.iter().all(|c| c.pass && c.value.is_some()));
    let md = std::fs::read_to_string(case.path("r/report.md")).unwrap();
    assert!(md.starts_with("# Verdict: GO\n"), "{md}");
    // User text cannot break the tables: the pipe and backtick in questions are escaped and
    // the answers' line breaks are <br>.
    assert!(md.contains(" \\| \\`x\\` on board?"), "{md}");
    assert!(!md.contains("| `x` on board"), "{md}");
    assert!(md.contains("<br>second line |"), "{md}");
}

#[test]
fn no_lift_and_poor_refusals_is_no_go_with_reasons() {
    let case = Case::new(120, 20, -0.05, 5);
    let out = case.weigh("r", &[]);
    out.expect_code(1);
    let text = &out.stdout;
    assert_eq!(text.lines().next(), Some("verdict: NO-GO"));
    assert!(
        text.lines().nth(1).unwrap().starts_with("failed: "),
        "{text}"
    );
    let s = case.summary("r");
    assert!(!s.verdict.go);
    let check = |name: &str| s.verdict.checks.iter().find(|c| c.name == name).unwrap();
    assert!(!check("lift.token_f1").pass);
    let oos = check("refusal.out_of_scope");
    assert!(!oos.pass && (oos.value.unwrap() - 0.25).abs() < 1e-12 && oos.threshold == 0.8);
    let md = std::fs::read_to_string(case.path("r/report.md")).unwrap();
    assert!(md.starts_with("# Verdict: NO-GO\n"));
    assert!(
        md.contains("declines only 25.0% of the out-of-scope questions"),
        "{md}"
    );
}

#[test]
fn refusal_calls_recount_the_refusal_shares() {
    // 130 out-of-scope questions (more than the 100 listed of a kind) and two in-scope answers
    // of the candidate counted as declined.
    let case = Case::new(60, 130, 0.1, 70);
    let cand: String = case
        .t
        .read("cand.jsonl")
        .lines()
        .map(|l| {
            let mut row: serde_json::Value = serde_json::from_str(l).unwrap();
            if row["id"] == "t-005" || row["id"] == "t-010" {
                row["refused"] = true.into();
            }
            format!("{row}\n")
        })
        .collect();
    case.t.write("cand.jsonl", cand);
    case.weigh("r", &[]).expect_code(1);
    let s = case.summary("r");
    let calls = s.refusal["calls"].as_array().unwrap();
    let of = |expect: &str| -> Vec<&serde_json::Value> {
        calls.iter().filter(|c| c["expect"] == expect).collect()
    };
    let declined = |list: &[&serde_json::Value], variant: &str| {
        list.iter()
            .filter(|c| c[format!("{variant}_declined")] == true)
            .count()
    };
    // Out of scope: the first 100 in the set's order; the baseline declines every other one,
    // the candidate the first 70.
    let oos = of("refuse");
    assert_eq!(oos.len(), 100);
    assert_eq!(oos[0]["id"], "x-000");
    assert_eq!(oos[99]["id"], "x-099");
    assert_eq!(
        (declined(&oos, "baseline"), declined(&oos, "candidate")),
        (50, 70)
    );
    assert_eq!(s.refusal["calls_left_off"], 30);
    // In scope: exactly the answers counted as declined, and they make the false-refusal count.
    let ins = of("answer");
    let ids: Vec<&str> = ins.iter().map(|c| c["id"].as_str().unwrap()).collect();
    assert_eq!(ids, ["t-005", "t-010"]);
    assert_eq!(
        declined(&ins, "candidate") as u64,
        s.refusal["false_refusal"]["candidate"]["declined"]
            .as_u64()
            .unwrap()
    );
    assert_eq!(declined(&ins, "baseline"), 0);
    assert_eq!(ins[0]["candidate_answer"], "tuned answer 5\nsecond line");
    assert_eq!(ins[0]["question"], "Can I bring item 5 | `x` on board?");
    // report.md lists them in the same two tables, user text made inert.
    let md = std::fs::read_to_string(case.path("r/report.md")).unwrap();
    let at = md.find("## Refusal calls to check\n").expect("section");
    let section = &md[at..md.find("## Cautions").unwrap()];
    assert!(section.contains("### Out-of-scope questions, every one\n"));
    assert!(section.contains("### In-scope questions with an answer counted as declined\n"));
    assert!(section.contains(
        "| t-005 | Can I bring item 5 \\| \\`x\\` on board? | answered: base answer 5<br>second line | **declined**: tuned answer 5<br>second line |"
    ), "{section}");
    assert_eq!(section.matches("\n| x-").count(), 100);
    assert!(section.contains("30 more calls are not listed"));
    // report.html holds the same calls.
    let html = std::fs::read_to_string(case.path("r/report.html")).unwrap();
    assert!(html.contains("Show 100 questions (counted as declined: baseline 50, candidate 70)"));
    assert!(html.contains("Show 2 questions (counted as declined: baseline 0, candidate 2)"));
}

#[test]
fn unknown_policy_key_exits_2_naming_file_line_and_key() {
    let case = Case::new(30, 4, 0.1, 4);
    let policy = case.path("gate.toml");
    case.t.write(
        "gate.toml",
        "min_questions = 10\n\n[lift]\nmetirc = \"token_f1\"\n",
    );
    let out = case.weigh("r", &["--policy", policy.to_str().unwrap()]);
    out.expect_code(2);
    let err = &out.stderr;
    assert!(
        err.contains("gate.toml:4") && err.contains("`lift.metirc`"),
        "{err}"
    );
    no_report(&case.path("r"));
}

#[test]
fn mismatched_grades_exit_2_and_write_nothing() {
    let case = Case::new(30, 4, 0.1, 4);
    // Drop the second row of the candidate's grades.
    let text = case.t.read("cand.jsonl");
    let mut lines: Vec<&str> = text.lines().collect();
    lines.remove(1);
    case.t.write("cand.jsonl", lines.join("\n"));
    let out = case.weigh("r", &[]);
    out.expect_code(2);
    let err = &out.stderr;
    assert!(
        err.contains("cand.jsonl:2") && err.contains("t-002"),
        "{err}"
    );
    no_report(&case.path("r"));
}

#[test]
fn bad_flags_exit_2() {
    let case = Case::new(30, 4, 0.1, 4);
    for (flags, want) in [
        (&["--confidence", "1.5"][..], "--confidence"),
        (&["--confidence", "0"][..], "--confidence"),
        (&["--resamples", "10"][..], "--resamples"),
    ] {
        let out = case.weigh("r", flags);
        out.expect_code(2).expect_stderr(&[want]);
        no_report(&case.path("r"));
    }
}

#[test]
fn same_inputs_and_seed_give_identical_reports() {
    let case = Case::new(90, 10, 0.02, 9);
    let a = case.weigh("a", &["--seed", "11"]);
    let b = case.weigh("b", &["--seed", "11"]);
    let c = case.weigh("c", &["--seed", "12"]);
    assert_eq!(a.code, b.code);
    for file in ["summary.json", "report.md"] {
        let x = std::fs::read(case.path("a").join(file)).unwrap();
        let y = std::fs::read(case.path("b").join(file)).unwrap();
        assert!(x == y, "{file} differs between identical runs");
    }
    assert_eq!(a.stdout.replace("/a/", "/"), b.stdout.replace("/b/", "/"));
    let z = std::fs::read(case.path("c").join("summary.json")).unwrap();
    assert_ne!(
        std::fs::read(case.path("a").join("summary.json")).unwrap(),
        z
    );
    assert_eq!(c.code.map(|c| c <= 1), Some(true));
}
