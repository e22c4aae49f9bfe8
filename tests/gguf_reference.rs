//! GGUF files against the reference: transformers 5.24.0 loading the same file with
//! `from_pretrained(dir, gguf_file=..., dtype=torch.float32)`, which dequantises every tensor
//! with the `gguf` package (0.19, `gguf/quants.py`), undoes the llama q/k row permutation and
//! subtracts the 1 llama.cpp's converter adds to Gemma norm weights. transformers cannot load
//! gemma (Gemma 1) files: for those the reference is the `gguf` package's dequantised tensors,
//! norms minus 1 in f32, run by transformers' GemmaForCausalLM (the manifest's `reference`
//! field says which, per file).
//!
//! Fixtures: tests/fixtures/gguf/, made by tests/reference/make_gguf_fixtures.py (tiny llama,
//! llama-layout mistral, qwen2, gemma, gemma2 and phi3 models from the runner fixtures in the
//! block types of 32 values, written with llama.cpp's converter conventions, a one-layer model
//! in every k-quant, and one tensor of each supported type).
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

/// The logits after the first prompt equal the reference's within 1e-4 (the files that record
/// them: gemma, gemma2, phi3, whose tiny models' greedy continuations are less varied). The
/// reference computes in f32 as liftgate does; only the order of the sums differs.
#[test]
fn first_step_logits_equal_the_reference() {
    let m = manifest();
    let mut checked = 0;
    for (file, want) in m["files"].as_object().unwrap() {
        let Some(logits) = want.get("first_step_logits").and_then(Value::as_array) else {
            continue;
        };
        let loaded = model::load_gguf(&root().join(file)).unwrap();
        let prompt: Vec<u32> = shape(&want["greedy"][0]["prompt"])
            .iter()
            .map(|&x| x as u32)
            .collect();
        let got = loaded.decoder.prompt_logits(&prompt).unwrap();
        assert_eq!(got.len(), logits.len(), "{file}");
        let diff = got
            .iter()
            .zip(logits)
            .map(|(g, w)| (f64::from(*g) - w.as_f64().unwrap()).abs())
            .fold(0.0, f64::max);
        assert!(diff <= 1e-4, "{file}: first-step logits differ by {diff}");
        checked += 1;
    }
    assert!(checked >= 6, "only {checked} files checked");
}

/// Every family the decoder reads as a directory is also read as a GGUF file, and each
/// family's file is among the fixtures (so the two checks above cover it).
#[test]
fn every_gguf_architecture_has_a_fixture() {
    let m = manifest();
    let files = m["files"].as_object().unwrap();
    for family in ["llama", "qwen2", "qwen3", "gemma", "gemma2", "phi3"] {
        let n = files.values().filter(|f| f["model_type"] == family).count();
        assert!(n >= 1, "no {family} fixture");
    }
    // Gemma files: the norms as transformers holds them are the stored values minus 1, so
    // the stored output norm differs from the loaded one by exactly that.
    let g = GgufFile::open(&root().join("gemma2-q8_0.gguf")).unwrap();
    let spec = g.spec().unwrap();
    let (_, stored) = g.raw_values("output_norm.weight").unwrap();
    let loaded = g
        .values(names::FINAL_NORM, &[spec.hidden_size], &spec)
        .unwrap();
    for (s, l) in stored.iter().zip(&loaded) {
        assert_eq!(*l, s - 1.0);
    }
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
