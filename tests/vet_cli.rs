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

/// Several candidates in one run: the adapter as trained, the same adapter merged in f32 and in
/// bf16, and a second adapter. One report directory holds every variant's answers and grades,
/// a full report per candidate in `<name>/`, and the lineup (lineup.json, report.md). Each
/// variant's answers equal a run of that variant alone with `liftgate answer` (the baseline
/// and the unmerged adapters share one copy of the base and decode in the same steps), and the
/// merged-in-f32 artifact answers as the adapter does (peft 0.21.2: the fixture's unmerged and
/// merged outputs are identical, tests/reference/make_runner_fixtures.py).
#[test]
fn vet_compares_several_candidates_in_one_report() {
    let tmp = with_set();
    tmp.write(
        "policy.toml",
        "min_questions = 1\n[lift]\nmin_ci_low = -1.0\n[refusal]\nmin_out_of_scope = 0.0\nmax_false_refusal = 1.0\n",
    );
    let f = fixture();
    let qv = f.join("adapters/qv");
    let all = f.join("adapters/all");
    let spec = |extra: &str, a: &PathBuf| format!("{extra},adapter={}", a.display());
    let (c1, c2, c3) = (
        spec("name=qv-f32,merge=f32", &qv),
        spec("name=qv-bf16,merge=bf16", &qv),
        spec("name=all", &all),
    );
    let run = vet(
        &tmp,
        "qv",
        &[
            "--policy",
            "policy.toml",
            "--report",
            "rep",
            "--no-history",
            "--candidate",
            &c1,
            "--candidate",
            &c2,
            "--candidate",
            &c3,
        ],
    );
    run.expect_verdict();
    let out = &run.stdout;
    for name in ["candidate", "qv-f32", "qv-bf16", "all"] {
        assert!(out.contains(&format!("verdict {name}: ")), "{out}");
        for f in [
            format!("{name}.answers.jsonl"),
            format!("{name}.grades.jsonl"),
            format!("{name}/report.md"),
            format!("{name}/report.html"),
            format!("{name}/summary.json"),
        ] {
            assert!(tmp.path("rep").join(&f).is_file(), "missing {f}");
        }
    }
    let lineup: Value = serde_json::from_str(&tmp.read("rep/lineup.json")).unwrap();
    assert_eq!(lineup["format"], "liftgate-lineup/1");
    assert_eq!(lineup["candidates"].as_array().unwrap().len(), 4);
    // Holm over four p-values: each adjusted value is at least its raw value.
    for row in lineup["candidates"].as_array().unwrap() {
        assert!(row["p_holm"].as_f64().unwrap() >= row["p_value"].as_f64().unwrap());
    }
    // The merged artifacts of qv come from `candidate` (same adapter, unmerged).
    let kept = lineup["kept"].as_array().unwrap();
    assert_eq!(kept.len(), 2, "{lineup}");
    assert!(kept.iter().all(|k| k["from"] == "candidate"));
    let summary: Value = serde_json::from_str(&tmp.read("rep/all/summary.json")).unwrap();
    let checks = summary["verdict"]["checks"].as_array().unwrap();
    assert!(checks.iter().any(|c| c["name"] == "lift.token_f1.holm"));
    let md = tmp.read("rep/report.md");
    assert!(
        md.contains("How much of the lift each artifact keeps"),
        "{md}"
    );

    let answers = |p: &str| -> Vec<String> {
        tmp.read(p)
            .lines()
            .map(|l| serde_json::from_str::<Value>(l).unwrap()["answer"].to_string())
            .collect()
    };
    assert_eq!(
        answers("rep/candidate.answers.jsonl"),
        answers("rep/qv-f32.answers.jsonl")
    );
    let model = f.join("model");
    for (name, adapter) in [
        ("baseline", None),
        ("candidate", Some(&qv)),
        ("all", Some(&all)),
    ] {
        let mut args = vec![
            "answer".to_string(),
            "--model".into(),
            model.display().to_string(),
            "--questions".into(),
            "set.jsonl".into(),
            "--out".into(),
            format!("alone-{name}.jsonl"),
            "--max-new-tokens".into(),
            "6".into(),
        ];
        if let Some(a) = adapter {
            args.extend(["--adapter".into(), a.display().to_string()]);
        }
        tmp.run(&args).expect_success();
        assert_eq!(
            answers(&format!("alone-{name}.jsonl")),
            answers(&format!("rep/{name}.answers.jsonl")),
            "{name}: in the lineup vs alone"
        );
    }
    let run: Value = serde_json::from_str(&tmp.read("rep/qv-bf16.answers.jsonl.run.json")).unwrap();
    assert_eq!(run["adapter"]["applied"], "merged and saved in bf16");
    assert_eq!(run["variant"], "qv-bf16");
}

/// A merged-checkpoint candidate whose chat template differs from the baseline's (here the
/// default system line reworded, as happens when a model directory is saved with another
/// template): the comparison then also measures the template, and `vet` says so on stderr and
/// in that candidate's report, and still finishes.
#[test]
fn a_candidate_with_another_chat_template_is_warned_about() {
    let tmp = with_set();
    let f = fixture();
    let other = tmp.copy_dir(&f.join("model"), "other-template");
    let cfg_path = other.join("tokenizer_config.json");
    let mut cfg: Value =
        serde_json::from_str(&std::fs::read_to_string(&cfg_path).unwrap()).unwrap();
    let t = cfg["chat_template"].as_str().unwrap().replace(
        "You answer questions from ferry passengers.",
        "You help ferry passengers.",
    );
    cfg["chat_template"] = Value::String(t);
    std::fs::write(&cfg_path, serde_json::to_string(&cfg).unwrap()).unwrap();
    let spec = format!("name=reworded,model={}", other.display());
    let run = vet(
        &tmp,
        "qv",
        &["--report", "rep", "--no-history", "--candidate", &spec],
    );
    run.expect_verdict();
    assert!(
        run.stderr
            .contains("reworded renders prompts with another chat template than baseline"),
        "{}",
        run.stderr
    );
    let summary: Value = serde_json::from_str(&tmp.read("rep/reworded/summary.json")).unwrap();
    let warned = summary["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .any(|w| w.as_str().unwrap().contains("another chat template"));
    assert!(warned, "{summary}");
    let plain: Value = serde_json::from_str(&tmp.read("rep/candidate/summary.json")).unwrap();
    assert!(!plain["warnings"]
        .to_string()
        .contains("another chat template"));
}

/// Adapters on the base quantised to 4 bits as QLoRA trains against it (`base=nf4`): two
/// candidates share one NF4 copy of the base in the lineup (a third has an FP4 base of its
/// own), each answers as `answer --base nf4`
/// alone, the run records say how the base was quantised (transformers' BitsAndBytesConfig
/// settings) and the lineup names the quantisation. Their tokens are checked against
/// bitsandbytes + peft in tests/nf4_reference.rs.
#[test]
fn adapters_on_a_4_bit_base_take_part_in_the_lineup() {
    let tmp = with_set();
    tmp.write(
        "policy.toml",
        "min_questions = 1\n[lift]\nmin_ci_low = -1.0\n[refusal]\nmin_out_of_scope = 0.0\nmax_false_refusal = 1.0\n",
    );
    let f = fixture();
    let (qv, all) = (f.join("adapters/qv"), f.join("adapters/all"));
    let c1 = format!(
        "name=qv-nf4,base=nf4,adapter={},from=candidate",
        qv.display()
    );
    let c2 = format!("base=nf4,adapter={}", all.display());
    let c3 = format!("base=fp4-single,adapter={}", all.display());
    let run = vet(
        &tmp,
        "qv",
        &[
            "--policy",
            "policy.toml",
            "--report",
            "rep",
            "--no-history",
            "--candidate",
            &c1,
            "--candidate",
            &c2,
            "--candidate",
            &c3,
        ],
    );
    run.expect_verdict();
    for name in ["candidate", "qv-nf4", "all-nf4", "all-fp4-single"] {
        assert!(
            run.stdout.contains(&format!("verdict {name}: ")),
            "{}",
            run.stdout
        );
    }
    let record: Value =
        serde_json::from_str(&tmp.read("rep/qv-nf4.answers.jsonl.run.json")).unwrap();
    let q = &record["base_quant"];
    assert_eq!(q["name"], "nf4");
    assert_eq!(q["quant_type"], "nf4");
    assert_eq!(q["block_size"], 64);
    assert_eq!(q["double_quant"], true);
    assert_eq!(q["double_quant_block_size"], 256);
    assert_eq!(q["compute_dtype"], "float32");
    assert_eq!(
        record["adapter"]["applied"],
        "unmerged (the adapter as trained)"
    );
    let record: Value =
        serde_json::from_str(&tmp.read("rep/all-fp4-single.answers.jsonl.run.json")).unwrap();
    assert_eq!(record["base_quant"]["double_quant"], false);
    assert!(record["base_quant"]
        .get("double_quant_block_size")
        .is_none());
    let record: Value =
        serde_json::from_str(&tmp.read("rep/candidate.answers.jsonl.run.json")).unwrap();
    assert!(record.get("base_quant").is_none());
    let md = tmp.read("rep/report.md");
    assert!(
        md.contains("NF4 (4-bit, blocks of 64, scales double-quantised"),
        "{md}"
    );

    let answers = |p: &str| -> Vec<String> {
        tmp.read(p)
            .lines()
            .map(|l| serde_json::from_str::<Value>(l).unwrap()["answer"].to_string())
            .collect()
    };
    for (name, adapter, base) in [
        ("qv-nf4", &qv, "nf4"),
        ("all-nf4", &all, "nf4"),
        ("all-fp4-single", &all, "fp4-single"),
    ] {
        let model = f.join("model");
        let out = format!("alone-{name}.jsonl");
        tmp.run([
            "answer",
            "--model",
            model.to_str().unwrap(),
            "--adapter",
            adapter.to_str().unwrap(),
            "--base",
            base,
            "--questions",
            "set.jsonl",
            "--out",
            &out,
            "--max-new-tokens",
            "6",
        ])
        .expect_success();
        assert_eq!(
            answers(&out),
            answers(&format!("rep/{name}.answers.jsonl")),
            "{name}: in the lineup vs alone"
        );
    }
}

/// `vet --train --embedder`: the report's leak count includes the questions flagged by
/// embedding cosine alone (at the `leaks` command's default threshold), counted here
/// independently through the library: the lexical check, then the nearest training question
/// by cosine of the same embedding model.
#[test]
fn vet_with_train_and_embedder_counts_leaks_by_meaning() {
    use liftgate::embed::Embedder;
    use liftgate::score::leaks::{
        find_leaks, nearest_by_cosine, DEFAULT_COSINE_THRESHOLD, DEFAULT_THRESHOLD,
    };
    let tmp = with_set();
    let emb = common::fixture("embedder/mean");
    // q1 verbatim; a rewording of q2; an unrelated question.
    let train = [
        "When does the first boat leave?",
        "Is it allowed to bring a dog along?",
        "How many lighthouses stand on the outer reef?",
    ];
    let mut text = String::new();
    for t in train {
        text.push_str(&format!("{}\n", serde_json::json!({"question": t})));
    }
    tmp.write("train.jsonl", text);
    tmp.write(
        "policy.toml",
        "min_questions = 1\n[lift]\nmin_ci_low = -1.0\n[refusal]\nmin_out_of_scope = 0.0\nmax_false_refusal = 1.0\n",
    );
    let run = vet(
        &tmp,
        "qv",
        &[
            "--policy",
            "policy.toml",
            "--train",
            "train.jsonl",
            "--embedder",
            emb.to_str().unwrap(),
            "--report",
            "r",
        ],
    );
    run.expect_verdict();
    let summary: Value = serde_json::from_str(&tmp.read("r/summary.json")).unwrap();
    let l = &summary["leakage"];

    let questions: Vec<&str> = QUESTIONS
        .lines()
        .map(|r| serde_json::from_str::<Value>(r).unwrap())
        .map(|v| v["question"].as_str().unwrap().to_string())
        .collect::<Vec<_>>()
        .leak()
        .iter()
        .map(|s| s.as_str())
        .collect();
    let lexical = find_leaks(&questions, &train, DEFAULT_THRESHOLD);
    let e = Embedder::load(&emb).unwrap();
    let q = e.embed(&questions, |_| {}).unwrap();
    let t = e.embed(&train, |_| {}).unwrap();
    let semantic = nearest_by_cosine(&q, &t)
        .into_iter()
        .enumerate()
        .filter(|(i, n)| {
            !lexical.iter().any(|l| l.question == *i)
                && n.is_some_and(|(_, c)| c >= DEFAULT_COSINE_THRESHOLD)
        })
        .count();
    assert_eq!(l["exact"], 1, "{l}");
    // The tiny random embedding model puts short questions close together: at least one is
    // flagged by meaning alone, so the count below is not trivially zero.
    assert!(semantic >= 1, "{l}");
    assert_eq!(l["semantic"], semantic, "{l}");
    assert_eq!(l["cosine_threshold"], DEFAULT_COSINE_THRESHOLD, "{l}");
    assert_eq!(
        l["ids"].as_array().unwrap().len(),
        lexical.len() + semantic,
        "{l}"
    );
    let warning = format!("by embedding cosine >= {DEFAULT_COSINE_THRESHOLD}");
    assert!(
        summary["warnings"]
            .as_array()
            .unwrap()
            .iter()
            .any(|w| w.as_str().unwrap().contains(&warning)),
        "{summary}"
    );
}
