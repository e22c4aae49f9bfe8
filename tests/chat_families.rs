//! Prompts and decoded answers of every supported family's model directory, checked against the
//! reference runner fixtures.
//!
//! Source: tests/fixtures/runner/<family>/expected.json, recorded by
//! tests/reference/make_runner_fixtures.py with transformers 5.24.0: `rendered` is
//! `apply_chat_template(msgs, tokenize=False, add_generation_prompt=True)`, `prompt_ids` the same
//! with `tokenize=True, return_dict=False`, `answer` is
//! `decode(output_ids, skip_special_tokens=True).strip()` (Python's strip, so `decode_answer`), and `error` is the exception the
//! template raised.

use liftgate::chat::ChatTokenizer;
use serde_json::Value;
use std::path::{Path, PathBuf};

fn runner() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/runner")
}

fn ids(v: &Value) -> Vec<u32> {
    v.as_array()
        .expect("id list")
        .iter()
        .map(|x| x.as_u64().expect("id") as u32)
        .collect()
}

#[test]
fn every_family_prompt_and_answer_match_transformers() {
    let manifest: Value = serde_json::from_str(
        &std::fs::read_to_string(runner().join("manifest.json")).expect("manifest.json"),
    )
    .unwrap();
    let families = manifest["families"].as_object().unwrap();
    assert!(families.len() >= 7, "{} families", families.len());
    let mut checked = 0;
    for family in families.keys() {
        let dir = runner().join(family);
        let expected: Value =
            serde_json::from_str(&std::fs::read_to_string(dir.join("expected.json")).unwrap())
                .unwrap();
        let tok = ChatTokenizer::load(&dir.join("model"))
            .unwrap_or_else(|e| panic!("{family}: load failed: {e}"));
        assert!(
            tok.has_template(),
            "{family}: every runner fixture has a template"
        );
        let system_text = expected["system_text"].as_str().unwrap();
        let questions = expected["questions"].as_array().unwrap();
        for case in expected["cases"].as_array().unwrap() {
            let qi = case["question_index"].as_u64().unwrap() as usize;
            let question = questions[qi].as_str().unwrap();
            let system = case["system"].as_bool().unwrap().then_some(system_text);
            let label = format!(
                "{family} / {} / system={} / q{qi}",
                case["variant"], case["system"]
            );
            if let Some(err) = case["error"].as_str() {
                let got = tok.render_prompt(system, question).unwrap_err();
                assert_eq!(got.exit_code(), 2, "{label}");
                // Python wrote "TemplateError: <message>".
                let message = err.split_once(": ").map_or(err, |(_, m)| m);
                assert!(got.to_string().contains(message), "{label}: {got}");
                checked += 1;
                continue;
            }
            assert_eq!(
                tok.render_prompt(system, question).unwrap(),
                case["rendered"].as_str().unwrap(),
                "{label}: rendered prompt"
            );
            assert_eq!(
                tok.encode_prompt(system, question).unwrap(),
                ids(&case["prompt_ids"]),
                "{label}: prompt ids"
            );
            assert_eq!(
                tok.decode_answer(&ids(&case["output_ids"])).unwrap(),
                case["answer"].as_str().unwrap(),
                "{label}: decoded answer"
            );
            checked += 1;
        }
    }
    assert!(checked >= 100, "only {checked} cases");
}
