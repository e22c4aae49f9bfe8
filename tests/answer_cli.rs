//! `liftgate answer` run as a binary on real files: one fixture family end to end (answers and
//! run.json written, answers equal to the reference), and bad model directories (exit 2, the
//! message names the file, nothing written).
//!
//! Expected answers: transformers 5.24.0 `generate(do_sample=False)` + peft 0.21.2
//! `merge_and_unload`, decoded with `skip_special_tokens=True` and stripped; fixtures made by
//! tests/reference/make_runner_fixtures.py.

mod common;

use common::Bin;
use serde_json::Value;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

fn fixture(family: &str) -> PathBuf {
    common::fixture("runner").join(family)
}

/// Writes a question set of `questions` (index, text) to `name` in `t`.
fn write_questions(t: &Bin, name: &str, questions: &[(usize, &str)]) {
    let mut text = String::new();
    for (i, q) in questions {
        text.push_str(
            &serde_json::json!({"id": format!("q{i}"), "question": q, "references": ["x"]})
                .to_string(),
        );
        text.push('\n');
    }
    t.write(name, text);
}

/// Runs `answer` for one variant (and system setting) and compares every answer row with the
/// fixture's cases. Questions are grouped by the case's max_new_tokens so each run uses the
/// reference's own limit.
fn check_end_to_end(family: &str, variant: &str, system: bool) {
    let t = Bin::new();
    let root = fixture(family);
    let expected: Value =
        serde_json::from_str(&std::fs::read_to_string(root.join("expected.json")).unwrap())
            .unwrap();
    let questions: Vec<String> = expected["questions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|q| q.as_str().unwrap().to_string())
        .collect();
    let system_text = expected["system_text"].as_str().unwrap().to_string();
    let mut groups: BTreeMap<u64, Vec<&Value>> = BTreeMap::new();
    for c in expected["cases"].as_array().unwrap() {
        if c["variant"] == variant
            && c["system"] == system
            && c.get("error").is_none_or(Value::is_null)
        {
            groups
                .entry(c["max_new_tokens"].as_u64().unwrap())
                .or_default()
                .push(c);
        }
    }
    assert!(!groups.is_empty(), "no cases for {family} {variant}");
    for (max_new, cases) in groups {
        let qname = format!("set-{max_new}.jsonl");
        let qs: Vec<(usize, &str)> = cases
            .iter()
            .map(|c| {
                let i = c["question_index"].as_u64().unwrap() as usize;
                (i, questions[i].as_str())
            })
            .collect();
        write_questions(&t, &qname, &qs);
        let out = t.path(&format!("answers-{max_new}.jsonl"));
        let model = root.join("model");
        let adapter = root.join("adapters").join(variant);
        let max_new_s = max_new.to_string();
        let mut args = vec![
            "answer",
            "--model",
            model.to_str().unwrap(),
            "--questions",
            &qname,
            "--out",
            out.to_str().unwrap(),
            "--max-new-tokens",
            &max_new_s,
            "--batch",
            "2",
            "--threads",
            "1",
        ];
        if variant != "base" {
            args.extend(["--adapter", adapter.to_str().unwrap()]);
        }
        if system {
            args.extend(["--system", system_text.as_str()]);
        }
        let o = t.run(&args);
        o.expect_success();
        assert!(o.stdout_bytes.is_empty(), "stdout stays empty");
        let rows: Vec<Value> = std::fs::read_to_string(&out)
            .unwrap()
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect();
        assert_eq!(rows.len(), cases.len());
        for (row, case) in rows.iter().zip(&cases) {
            let label = format!(
                "{family} {variant} system={system} q{}",
                case["question_index"]
            );
            assert_eq!(row["answer"], case["answer"], "{label}: answer");
            assert_eq!(row["finish"], case["finish"], "{label}: finish");
            assert_eq!(
                row["new_tokens"].as_u64().unwrap() as usize,
                case["output_ids"].as_array().unwrap().len(),
                "{label}: new_tokens"
            );
            assert_eq!(
                row["prompt_tokens"].as_u64().unwrap() as usize,
                case["prompt_ids"].as_array().unwrap().len(),
                "{label}: prompt_tokens"
            );
        }
        let run: Value = serde_json::from_str(
            &std::fs::read_to_string(format!("{}.run.json", out.display())).unwrap(),
        )
        .unwrap();
        assert_eq!(run["tool"], "liftgate");
        assert_eq!(run["compute_dtype"], "f32");
        assert_eq!(run["model"]["fingerprint"].as_str().unwrap().len(), 64);
        assert_eq!(
            run["chat_template"]["fingerprint"].as_str().unwrap().len(),
            64
        );
        assert_eq!(run["questions"]["fingerprint"].as_str().unwrap().len(), 64);
        assert_eq!(run["generation"]["max_new_tokens"], max_new);
        assert_eq!(run["generation"]["decoding"], "greedy");
        if variant == "base" {
            assert!(run["adapter"].is_null());
        } else {
            assert_eq!(run["adapter"]["fingerprint"].as_str().unwrap().len(), 64);
        }
    }
}

#[test]
fn answers_match_the_reference_end_to_end() {
    check_end_to_end("llama", "base", false);
    check_end_to_end("llama", "qv", true);
}

/// A copy of the llama fixture model directory to break in one way.
fn model_copy(t: &Bin) -> PathBuf {
    t.copy_dir(&fixture("llama").join("model"), "model")
}

/// Runs `answer` on `model` and asserts exit 2, the message contains every `needles`, and
/// neither output file exists.
fn assert_bad_model(t: &Bin, model: &Path, needles: &[&str]) {
    write_questions(t, "set.jsonl", &[(0, "When does the first ferry leave?")]);
    let o = t.run([
        "answer",
        "--model",
        model.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--out",
        "answers.jsonl",
    ]);
    o.expect_code(2).expect_stderr(needles);
    assert!(
        !t.path("answers.jsonl").exists(),
        "answers file must not be written"
    );
    assert!(!t.path("answers.jsonl.run.json").exists());
}

#[test]
fn missing_config_is_exit_2_naming_the_file() {
    let t = Bin::new();
    let m = model_copy(&t);
    std::fs::remove_file(m.join("config.json")).unwrap();
    assert_bad_model(&t, &m, &["config.json"]);
}

#[test]
fn unsupported_architecture_lists_the_supported_ones() {
    let t = Bin::new();
    let m = model_copy(&t);
    let text = std::fs::read_to_string(m.join("config.json")).unwrap();
    let mut cfg: Value = serde_json::from_str(&text).unwrap();
    cfg["model_type"] = "gpt2".into();
    cfg["architectures"] = serde_json::json!(["GPT2LMHeadModel"]);
    std::fs::write(m.join("config.json"), cfg.to_string()).unwrap();
    assert_bad_model(
        &t,
        &m,
        &[
            "config.json",
            "gpt2",
            "LlamaForCausalLM",
            "Qwen2ForCausalLM",
            "Gemma2ForCausalLM",
        ],
    );
}

#[test]
fn hidden_size_contradicting_the_weights_names_tensor_and_shapes() {
    let t = Bin::new();
    let m = model_copy(&t);
    let text = std::fs::read_to_string(m.join("config.json")).unwrap();
    let mut cfg: Value = serde_json::from_str(&text).unwrap();
    cfg["hidden_size"] = 96.into();
    std::fs::write(m.join("config.json"), cfg.to_string()).unwrap();
    assert_bad_model(
        &t,
        &m,
        &[
            "model.safetensors",
            "model.embed_tokens.weight",
            "[320, 64]",
            "[320, 96]",
        ],
    );
}

#[test]
fn pickle_only_checkpoint_is_refused() {
    let t = Bin::new();
    let m = model_copy(&t);
    std::fs::remove_file(m.join("model.safetensors")).unwrap();
    std::fs::write(m.join("pytorch_model.bin"), b"not really a pickle").unwrap();
    assert_bad_model(&t, &m, &["pytorch_model.bin", "safetensors"]);
}

#[test]
fn missing_paths_are_usage_errors() {
    let t = Bin::new();
    let missing = t.path("nope");
    let out = t.path("a.jsonl");
    let o = common::run([
        "answer",
        "--model",
        missing.to_str().unwrap(),
        "--questions",
        missing.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    o.expect_code(2).expect_stderr(&["nope"]);
    assert!(!out.exists());
}

/// The gemma fixture's template rejects a system message with `raise_exception` (as the
/// reference transformers 5.24.0 `apply_chat_template` does, recorded as error cases in
/// expected.json): exit 2 with the template's message, nothing written.
#[test]
fn system_message_rejected_by_the_template_is_exit_2() {
    let t = Bin::new();
    write_questions(
        &t,
        "set.jsonl",
        &[(0, "Can I take my bicycle on the boat?")],
    );
    let model = fixture("gemma").join("model");
    let o = t.run([
        "answer",
        "--model",
        model.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--out",
        "answers.jsonl",
        "--system",
        "Be brief.",
    ]);
    o.expect_code(2).expect_stderr(&["no system role"]);
    assert!(!t.path("answers.jsonl").exists());
}
