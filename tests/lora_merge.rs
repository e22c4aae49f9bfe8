//! LoRA merge against the reference: for every case in tests/fixtures/lora/manifest.json the
//! base weights are merged with the adapter and compared tensor by tensor with
//! peft 0.21.2 `PeftModel.from_pretrained(base, adapter).merge_and_unload()` (transformers
//! 5.24.0, torch, f32 on CPU), as written by tests/reference/make_lora_fixtures.py.

use candle_core::{DType, Device, Tensor};
use liftgate::model::lora::{merge, Adapter};
use serde_json::Value;
use std::collections::{BTreeSet, HashMap};
use std::path::{Path, PathBuf};

/// Tolerance on every merged element against peft (f32; a merge that reorders no sums stays within 1e-6).
const TOL: f32 = 1e-6;

fn fixtures() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/lora")
}

fn manifest() -> Value {
    let text = std::fs::read_to_string(fixtures().join("manifest.json")).expect("manifest.json");
    serde_json::from_str(&text).expect("manifest is JSON")
}

fn load_base(manifest: &Value, base: &str) -> HashMap<String, Tensor> {
    let file = manifest["bases"][base]["file"].as_str().expect("base file");
    candle_core::safetensors::load(fixtures().join(file), &Device::Cpu).expect("base loads")
}

fn max_abs_diff(a: &Tensor, b: &Tensor) -> f32 {
    assert_eq!(a.dims(), b.dims());
    let a = a.to_dtype(DType::F32).unwrap().flatten_all().unwrap();
    let b = b.to_dtype(DType::F32).unwrap().flatten_all().unwrap();
    let a: Vec<f32> = a.to_vec1().unwrap();
    let b: Vec<f32> = b.to_vec1().unwrap();
    a.iter()
        .zip(&b)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f32::max)
}

fn names(v: &Value) -> Vec<String> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|s| s.as_str().unwrap().to_string())
        .collect()
}

#[test]
fn every_case_matches_peft_merge_and_unload() {
    let manifest = manifest();
    let source = manifest["source"].as_str().unwrap();
    assert!(
        source.starts_with("peft 0.21.2 merge_and_unload"),
        "{source}"
    );
    let cases = manifest["cases"].as_array().unwrap();
    assert!(cases.len() >= 17, "expected the full case list");
    for case in cases {
        let name = case["name"].as_str().unwrap();
        let dir = fixtures().join("cases").join(name);
        let base = load_base(&manifest, case["base"].as_str().unwrap());
        let base_keys: BTreeSet<String> = base.keys().cloned().collect();
        let tied = case["tied"].as_bool().unwrap();
        let mut weights = base.clone();
        let adapter = Adapter::load(&dir).unwrap_or_else(|e| panic!("{name}: {e}"));
        let summary = merge(&mut weights, &adapter, tied).unwrap_or_else(|e| panic!("{name}: {e}"));

        let lora_modules = names(&case["lora_modules"]);
        assert_eq!(summary.modules_merged, lora_modules.len(), "{name}");
        let ours: Vec<&str> = summary.modules.iter().map(|m| m.name.as_str()).collect();
        assert_eq!(ours, lora_modules, "{name}: merged modules");

        // Reference: the tensors peft's merge changed or added, and the ones it left as is.
        let reference =
            candle_core::safetensors::load(dir.join("merged.safetensors"), &Device::Cpu).unwrap();
        let unchanged = names(&case["unchanged"]);
        let expected_keys: BTreeSet<String> = unchanged
            .iter()
            .cloned()
            .chain(reference.keys().cloned())
            .collect();
        let got_keys: BTreeSet<String> = weights.keys().cloned().collect();
        assert_eq!(got_keys, expected_keys, "{name}: tensor names after merge");
        assert_eq!(
            got_keys.contains("lm_head.weight"),
            case["merged_has_lm_head"].as_bool().unwrap(),
            "{name}"
        );

        let mut worst = 0.0f32;
        for (k, want) in &reference {
            let got = &weights[k];
            let d = max_abs_diff(got, want);
            assert!(
                d <= TOL,
                "{name}: {k} differs from peft 0.21.2 merge_and_unload by {d}"
            );
            if base_keys.contains(k) {
                assert!(
                    max_abs_diff(&base[k], want) > 0.0,
                    "{name}: {k} should change"
                );
            }
            worst = worst.max(d);
        }
        for k in &unchanged {
            assert_eq!(
                max_abs_diff(&weights[k], &base[k]),
                0.0,
                "{name}: {k} must stay as in the base"
            );
        }
        eprintln!(
            "{name}: {} modules, {} replaced, max |ours - peft| = {worst:.3e}",
            summary.modules_merged,
            summary.replaced.len()
        );
    }
}

#[test]
fn tied_cases_follow_peft_semantics() {
    let manifest = manifest();
    // lm_head LoRA on a tied model: merged into the shared embedding tensor (peft merges into the
    // one Parameter); the head is not split off.
    let dir = fixtures().join("cases/tied_embed_lm_head");
    let mut w = load_base(&manifest, "llama_tied");
    let s = merge(&mut w, &Adapter::load(&dir).unwrap(), true).unwrap();
    assert!(s.head_merged_into_embeddings && !s.untied);
    assert!(!w.contains_key("lm_head.weight"));
    assert!(s
        .modules
        .iter()
        .all(|m| m.into == "model.embed_tokens.weight"));

    // modules_to_save lm_head on a tied model: the head gets its own tensor.
    let dir = fixtures().join("cases/tied_modules_to_save");
    let mut w = load_base(&manifest, "llama_tied");
    let s = merge(&mut w, &Adapter::load(&dir).unwrap(), true).unwrap();
    assert!(s.untied && !s.head_merged_into_embeddings);
    assert_eq!(s.replaced, vec!["lm_head.weight".to_string()]);
}

#[test]
fn negative_cases_fail_with_input_errors_naming_file_and_field() {
    let manifest = manifest();
    let cases = manifest["negative"].as_array().unwrap();
    assert_eq!(cases.len(), 2);
    for case in cases {
        let name = case["name"].as_str().unwrap();
        let dir = fixtures().join("negative").join(name);
        let base = load_base(&manifest, case["base"].as_str().unwrap());
        let mut weights = base.clone();
        let adapter = Adapter::load(&dir).unwrap_or_else(|e| panic!("{name}: {e}"));
        let err = merge(&mut weights, &adapter, case["tied"].as_bool().unwrap()).expect_err(name);
        assert_eq!(err.exit_code(), 2, "{name}: {err}");
        let msg = err.to_string();
        for want in names(&case["expect"]) {
            assert!(msg.contains(&want), "{name}: `{want}` missing from: {msg}");
        }
        // Nothing was merged halfway.
        for (k, t) in &base {
            assert_eq!(
                max_abs_diff(&weights[k], t),
                0.0,
                "{name}: {k} was modified"
            );
        }
        eprintln!("{name}: {msg}");
    }
}
