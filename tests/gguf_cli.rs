//! GGUF models through the binary: `answer --gguf FILE --model DIR` gives the answers
//! transformers gives on the same file with that directory's tokenizer and chat template, `vet`
//! takes a GGUF candidate beside a directory one, and flags that cannot apply to a GGUF
//! file exit 2 (bad files: tests/bad_inputs.rs).
//!
//! Expected answers: transformers 5.24.0 loading the file with `from_pretrained(dir,
//! gguf_file=..., dtype=torch.float32)`, `apply_chat_template(add_generation_prompt=True)` with
//! the directory's tokenizer, `generate(do_sample=False, max_new_tokens=8)`, decoded with
//! `skip_special_tokens=True` and stripped (tests/reference/make_gguf_fixtures.py; every step's
//! top-1/top-2 logit margin is recorded and at least 1e-3 in the cases used).

mod common;

use common::Bin;
use serde_json::Value;
use std::path::PathBuf;

fn gguf(name: &str) -> PathBuf {
    common::fixture("gguf").join(name)
}

fn manifest() -> Value {
    serde_json::from_str(&std::fs::read_to_string(gguf("manifest.json")).unwrap()).unwrap()
}

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

#[test]
fn answers_equal_the_reference_for_every_model_file() {
    let m = manifest();
    let mut compared = 0;
    for (file, want) in m["files"].as_object().unwrap() {
        let answers = want["answers"].as_array().unwrap();
        if answers.is_empty() {
            continue;
        }
        assert!(answers
            .iter()
            .all(|a| a["min_margin"].as_f64().unwrap() >= 1e-3));
        let t = Bin::new();
        t.write("set.jsonl", common::question_set(answers));
        let dir = root().join(want["tokenizer_dir"].as_str().unwrap());
        let path = gguf(file);
        t.run([
            "answer",
            "--model",
            dir.to_str().unwrap(),
            "--gguf",
            path.to_str().unwrap(),
            "--questions",
            "set.jsonl",
            "--out",
            "answers.jsonl",
            "--max-new-tokens",
            "8",
        ])
        .expect_success();
        let rows: Vec<Value> = t
            .read("answers.jsonl")
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect();
        for (row, a) in rows.iter().zip(answers) {
            assert_eq!(row["answer"], a["answer"], "{file}: {}", a["question"]);
            compared += 1;
        }
        let run: Value = serde_json::from_str(&t.read("answers.jsonl.run.json")).unwrap();
        let model = &run["model"];
        assert!(
            model["path"].as_str().unwrap().ends_with(file.as_str()),
            "{run}"
        );
        assert!(
            model["stored_dtype"]
                .as_str()
                .unwrap()
                .starts_with("gguf: "),
            "{run}"
        );
        assert!(
            model["files"]
                .as_array()
                .unwrap()
                .iter()
                .any(|f| f["name"] == file.as_str()),
            "{run}"
        );
    }
    assert!(compared >= 10, "{compared}");
}

#[test]
fn vet_takes_a_gguf_candidate_beside_a_directory_one() {
    let t = Bin::new();
    t.write(
        "set.jsonl",
        "{\"id\": \"q1\", \"question\": \"When does the first boat leave?\", \"references\": [\"At 06:50.\"]}\n{\"id\": \"q2\", \"question\": \"Can I bring my dog?\", \"references\": [\"Yes.\"]}\n",
    );
    t.write(
        "policy.toml",
        "min_questions = 1\n[lift]\nmin_ci_low = -1.0\n[refusal]\nmin_out_of_scope = 0.0\nmax_false_refusal = 1.0\n",
    );
    let f = common::fixture("runner/llama");
    let model = f.join("model");
    let adapter = f.join("adapters/qv");
    // Named as made from the adapter candidate, so the lineup says how much of its lift the
    // export keeps and lists the questions it answers worse.
    let spec = format!(
        "name=q8,gguf={},from=candidate",
        gguf("llama-q8_0.gguf").display()
    );
    let run = t.run([
        "vet",
        "--model",
        model.to_str().unwrap(),
        "--adapter",
        adapter.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--max-new-tokens",
        "4",
        "--resamples",
        "1000",
        "--policy",
        "policy.toml",
        "--report",
        "rep",
        "--no-history",
        "--candidate",
        &spec,
    ]);
    run.expect_verdict();
    assert!(run.stdout.contains("verdict q8: "), "{}", run.stdout);
    let lineup: Value = serde_json::from_str(&t.read("rep/lineup.json")).unwrap();
    let kept = &lineup["kept"][0];
    assert_eq!(
        (&kept["name"], &kept["from"]),
        (&Value::from("q8"), &Value::from("candidate"))
    );
    let worse = kept["worse"].as_array().unwrap();
    assert!(kept["worse_total"].as_u64().unwrap() as usize >= worse.len());
    assert!(t
        .read("rep/report.md")
        .contains("How much of the lift each artifact keeps"));
    let info: Value = serde_json::from_str(&t.read("rep/q8.answers.jsonl.run.json")).unwrap();
    assert!(info["model"]["path"]
        .as_str()
        .unwrap()
        .ends_with("llama-q8_0.gguf"));
}

#[test]
fn flag_combinations_that_cannot_apply_are_refused() {
    let t = Bin::new();
    t.write(
        "set.jsonl",
        "{\"id\": \"a\", \"question\": \"q?\", \"references\": [\"x\"]}\n",
    );
    let model = common::fixture("runner/llama/model");
    let adapter = common::fixture("runner/llama/adapters/qv");
    let g = gguf("llama-q8_0.gguf");
    let out = t.run([
        "answer",
        "--model",
        model.to_str().unwrap(),
        "--gguf",
        g.to_str().unwrap(),
        "--adapter",
        adapter.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--out",
        "a.jsonl",
    ]);
    out.expect_code(2);
    assert!(!t.path("a.jsonl").exists());
    let spec = format!("name=x,gguf={},merge=f32", g.display());
    let out = t.run([
        "vet",
        "--model",
        model.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--candidate",
        &spec,
    ]);
    out.expect_code(2)
        .expect_stderr(&["gguf=FILE is a finished export"]);
}

/// A chat template stored in the file that renders a sample conversation differently from the
/// directory's is reported with both renderings; the directory's is used (the answers above).
#[test]
fn a_different_template_in_the_file_is_reported_with_both_renderings() {
    let t = Bin::new();
    t.write(
        "set.jsonl",
        "{\"id\": \"a\", \"question\": \"Can I take my bicycle on the boat?\", \"references\": [\"x\"]}\n",
    );
    let dir = common::fixture("runner/qwen2/model");
    let file = gguf("qwen2-q4_1-tied.gguf");
    let run = t.run([
        "answer",
        "--model",
        dir.to_str().unwrap(),
        "--gguf",
        file.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--out",
        "answers.jsonl",
        "--max-new-tokens",
        "2",
    ]);
    run.expect_success().expect_stderr(&[
        "renders a sample conversation differently",
        "qwen2-q4_1-tied.gguf",
        "[user] When does the first ferry leave?",
        "[assistant] ",
    ]);
    // Files without a template of their own say nothing.
    let quiet = t.run([
        "answer",
        "--model",
        dir.to_str().unwrap(),
        "--gguf",
        gguf("qwen2-q5_1.gguf").to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--out",
        "answers2.jsonl",
        "--max-new-tokens",
        "2",
    ]);
    quiet.expect_success();
    assert!(!quiet.stderr.contains("chat template"), "{}", quiet.stderr);
}
