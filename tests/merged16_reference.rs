//! Adapters merged into a 16-bit base and saved, against the reference library doing exactly
//! that: peft 0.21.2 `PeftModel.from_pretrained(base loaded with dtype=bfloat16 or float16,
//! adapter).merge_and_unload()` then `save_pretrained` (torch 2.15.0, transformers 5.24.0, CPU),
//! recorded by tests/reference/make_merged16_fixtures.py in
//! tests/fixtures/runner/<family>/merged16.json.
//!
//! Checked per family, adapter and dtype: every merged tensor bit for bit (SHA-256 of its
//! little-endian 16-bit values, as saved), and the greedy output of the saved checkpoint
//! loaded in float32 (`liftgate answer --merge bf16|f16` computes on the same values) token
//! for token, for every case whose top-1/top-2 logit margin stays at least 1e-3.

use liftgate::answer::generate::{generate_batch, Decoding, GenerationSettings};
use liftgate::model::{self, lora, Merge};
use serde_json::Value;
use std::path::{Path, PathBuf};

fn families() -> Vec<PathBuf> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/runner");
    let mut out: Vec<PathBuf> = std::fs::read_dir(root)
        .unwrap()
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.join("merged16.json").is_file())
        .collect();
    out.sort();
    assert!(out.len() >= 7, "merged16 fixtures missing: {out:?}");
    out
}

fn ids(v: &Value) -> Vec<u32> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap() as u32)
        .collect()
}

fn read(p: &Path) -> Value {
    serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap()
}

/// The raw little-endian bytes of a 16-bit tensor, as safetensors stores them.
fn bytes16(t: &candle_core::Tensor) -> Vec<u8> {
    let flat = t.flatten_all().unwrap();
    match t.dtype() {
        candle_core::DType::BF16 => flat
            .to_vec1::<half::bf16>()
            .unwrap()
            .iter()
            .flat_map(|v| v.to_bits().to_le_bytes())
            .collect(),
        candle_core::DType::F16 => flat
            .to_vec1::<half::f16>()
            .unwrap()
            .iter()
            .flat_map(|v| v.to_bits().to_le_bytes())
            .collect(),
        other => panic!("merged tensor is {other:?}, not 16-bit"),
    }
}

#[test]
fn merged_16_bit_weights_equal_peft_bit_for_bit() {
    let mut checked = 0;
    for family in families() {
        let doc = read(&family.join("merged16.json"));
        let mdir = family.join("model");
        let spec = model::config::ModelSpec::load(&mdir).unwrap();
        for entry in doc["entries"].as_array().unwrap() {
            let adapter = entry["adapter"].as_str().unwrap();
            let dtype = match entry["dtype"].as_str().unwrap() {
                "bf16" => candle_core::DType::BF16,
                _ => candle_core::DType::F16,
            };
            let mut w = model::weights::load(&mdir, &spec).unwrap();
            let a = lora::Adapter::load(&family.join("adapters").join(adapter)).unwrap();
            lora::merge_16(&mut w.tensors, &a, w.tied, dtype).unwrap();
            for t in entry["tensors"].as_array().unwrap() {
                let name = t["name"].as_str().unwrap();
                let got = w
                    .tensors
                    .get(name)
                    .unwrap_or_else(|| panic!("{name} missing"));
                assert_eq!(
                    got.dims(),
                    ids(&t["shape"])
                        .iter()
                        .map(|&d| d as usize)
                        .collect::<Vec<_>>()
                );
                assert_eq!(
                    liftgate::fsutil::sha256_hex(&bytes16(got)),
                    t["sha256"].as_str().unwrap(),
                    "{} {adapter} {:?}: {name} differs from peft's 16-bit merge",
                    family.display(),
                    dtype
                );
                checked += 1;
            }
        }
    }
    eprintln!("{checked} merged 16-bit tensors equal peft's bit for bit");
}

#[test]
fn merged_16_bit_checkpoints_answer_as_the_reference() {
    let (mut compared, mut skipped) = (0, 0);
    for family in families() {
        let doc = read(&family.join("merged16.json"));
        let expected = read(&family.join("expected.json"));
        let mdir = family.join("model");
        for entry in doc["entries"].as_array().unwrap() {
            let adapter = entry["adapter"].as_str().unwrap();
            let merge = match entry["dtype"].as_str().unwrap() {
                "bf16" => Merge::Bf16,
                _ => Merge::F16,
            };
            let adir = family.join("adapters").join(adapter);
            let loaded =
                model::load_as(&mdir, Some(&adir), merge, model::WeightFormat::F32).unwrap();
            for c in entry["cases"].as_array().unwrap() {
                if c.get("error").is_some_and(|e| !e.is_null()) {
                    continue;
                }
                if c["margin_ok"] == false {
                    skipped += 1;
                    continue;
                }
                let prompt = expected["cases"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .find(|e| {
                        e["variant"] == adapter
                            && e["system"] == c["system"]
                            && e["question_index"] == c["question_index"]
                    })
                    .map(|e| ids(&e["prompt_ids"]))
                    .expect("the case's prompt in expected.json");
                let settings = GenerationSettings {
                    decoding: Decoding::Greedy,
                    max_new_tokens: c["max_new_tokens"].as_u64().unwrap() as usize,
                    eos: loaded.generation.eos.clone(),
                    ignore_eos: false,
                    repetition_penalty: None,
                };
                let got =
                    generate_batch(&loaded.decoder, &[prompt], &settings, &mut |_| Ok(())).unwrap();
                assert_eq!(
                    got[0].tokens,
                    ids(&c["output_ids"]),
                    "{} {adapter} {merge:?} system={} q{}",
                    family.display(),
                    c["system"],
                    c["question_index"]
                );
                compared += 1;
            }
        }
    }
    eprintln!("{compared} cases equal the reference; {skipped} below the margin rule skipped");
    assert!(compared > 50, "only {compared} cases compared");
}
