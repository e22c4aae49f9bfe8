//! GGUF files against the reference: transformers 5.24.0 loading the same file with
//! `from_pretrained(dir, gguf_file=..., dtype=torch.float32)`, which dequantises every tensor
//! with the `gguf` package (0.19, `gguf/quants.py`) and undoes the llama q/k row permutation.
//!
//! Fixtures: tests/fixtures/gguf/, made by tests/reference/make_gguf_fixtures.py (tiny llama,
//! llama-layout mistral and qwen2 models from the runner fixtures in the block types of 32
//! values, a one-layer model in every k-quant, and one tensor of each supported type).
//! Checked: every tensor bit for bit (SHA-256 of its f32 bytes as transformers holds it),
//! every tensor of `tensors.gguf` bit for bit against `gguf.quants.dequantize`, and the greedy
//! continuation of three prompts token for token (`generate(do_sample=False)`, eager
//! attention), up to (not including) the first step whose reference top-1/top-2 logit margin
//! is below 1e-3 (a closer pair could flip on summation order alone).

use liftgate::answer::generate::{generate_batch, Decoding, GenerationSettings};
use liftgate::fsutil::sha256_hex;
use liftgate::model::gguf::GgufFile;
use liftgate::model::{self, names};
use serde_json::Value;
use std::path::{Path, PathBuf};

const MARGIN: f64 = 1e-3;

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/gguf")
}

fn manifest() -> Value {
    let text = std::fs::read_to_string(root().join("manifest.json")).expect("manifest.json");
    serde_json::from_str(&text).expect("manifest JSON")
}

fn sha_f32(v: &[f32]) -> String {
    let bytes: Vec<u8> = v.iter().flat_map(|x| x.to_le_bytes()).collect();
    sha256_hex(&bytes)
}

fn shape(v: &Value) -> Vec<usize> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|d| d.as_u64().unwrap() as usize)
        .collect()
}

/// Every tensor of every model file equals transformers' tensor bit for bit.
#[test]
fn tensors_equal_the_reference_bit_for_bit() {
    let m = manifest();
    let mut checked = 0;
    for (file, want) in m["files"].as_object().unwrap() {
        let g = GgufFile::open(&root().join(file)).unwrap();
        let spec = g.spec().unwrap();
        assert_eq!(spec.family.model_type(), want["model_type"], "{file}");
        assert_eq!(
            spec.tie_word_embeddings,
            want["tie_word_embeddings"].as_bool().unwrap(),
            "{file}"
        );
        for (name, t) in want["tensors"].as_object().unwrap() {
            let dims = shape(&t["shape"]);
            let v = g.values(name, &dims, &spec).unwrap();
            assert_eq!(sha_f32(&v), t["sha256"], "{file}: {name}");
            checked += 1;
        }
        // The decoder's names are those transformers uses.
        assert!(want["tensors"].get(names::EMBED).is_some(), "{file}");
    }
    assert!(checked > 100, "only {checked} tensors checked");
}

/// One [4, 512] tensor of each supported type equals `gguf.quants.dequantize` bit for bit.
#[test]
fn every_type_dequantises_as_the_gguf_package() {
    let m = manifest();
    let g = GgufFile::open(&root().join("tensors.gguf")).unwrap();
    let want = m["tensors.gguf"].as_object().unwrap();
    assert_eq!(want.len(), 13);
    for (name, t) in want {
        let (dims, v) = g.raw_values(name).unwrap();
        assert_eq!(dims, shape(&t["shape"]), "{name}");
        assert_eq!(sha_f32(&v), t["sha256"], "{name} ({})", t["type"]);
    }
}

/// Greedy continuations equal transformers' token for token (up to a near tie).
#[test]
fn greedy_tokens_equal_the_reference() {
    let m = manifest();
    let mut compared = 0;
    for (file, want) in m["files"].as_object().unwrap() {
        let loaded = model::load_gguf(&root().join(file)).unwrap();
        assert_eq!(
            loaded.generation.eos,
            vec![want["eos"].as_u64().unwrap() as u32],
            "{file}"
        );
        for run in want["greedy"].as_array().unwrap() {
            let prompt: Vec<u32> = shape(&run["prompt"]).iter().map(|&x| x as u32).collect();
            let tokens: Vec<u32> = shape(&run["tokens"]).iter().map(|&x| x as u32).collect();
            let margins: Vec<f64> = run["margins"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap())
                .collect();
            let settings = GenerationSettings {
                decoding: Decoding::Greedy,
                max_new_tokens: tokens.len().max(1),
                eos: loaded.generation.eos.clone(),
                ignore_eos: false,
                repetition_penalty: None,
            };
            let got = generate_batch(
                &loaded.decoder,
                std::slice::from_ref(&prompt),
                &settings,
                &mut |_| Ok(()),
            )
            .unwrap();
            let safe = margins
                .iter()
                .position(|&m| m < MARGIN)
                .map_or(tokens.len(), |i| i);
            assert_eq!(
                &got[0].tokens[..safe.min(got[0].tokens.len())],
                &tokens[..safe],
                "{file}: prompt {prompt:?}"
            );
            compared += safe;
        }
    }
    assert!(compared >= 100, "only {compared} tokens compared");
}
