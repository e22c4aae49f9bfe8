//! The base quantised to 4 bits as QLoRA trains against it, with the adapter unmerged on top,
//! against the reference libraries doing exactly that: transformers 5.24.0 loading the base
//! with `BitsAndBytesConfig(load_in_4bit=True, bnb_4bit_quant_type=nf4|fp4,
//! bnb_4bit_use_double_quant=true|false, bnb_4bit_compute_dtype=float32)` (bitsandbytes 0.50.2,
//! CPU, its float32 path) and peft 0.21.2 `PeftModel.from_pretrained` on top, recorded by
//! tests/reference/make_nf4_fixtures.py in tests/fixtures/runner/<family>/nf4.json.
//!
//! Checked per family and 4-bit setting: the code tables (SHA-256 of bitsandbytes' tables),
//! every quantised matrix as the 4-bit layer multiplies by it bit for bit (SHA-256 of its f32
//! values), and the greedy output of the base alone and of base + each adapter, all variants
//! sharing one 4-bit copy of the base, token for token for every case whose top-1/top-2 logit
//! margin stays at least 1e-3 (the rule of the other reference tests: f32 sums in another order
//! may swap a nearer tie).

use liftgate::answer::generate::{generate_jobs, Decoding, GenerationSettings, Job};
use liftgate::kernels::nf4::{self, Codebook};
use liftgate::model::{self, BaseQuant};
use serde_json::Value;
use std::path::{Path, PathBuf};

fn families() -> Vec<PathBuf> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/runner");
    let mut out: Vec<PathBuf> = std::fs::read_dir(root)
        .unwrap()
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.join("nf4.json").is_file())
        .collect();
    out.sort();
    assert!(out.len() >= 8, "nf4 fixtures missing: {out:?}");
    out
}

fn read(p: &Path) -> Value {
    serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap()
}

fn ids(v: &Value) -> Vec<u32> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap() as u32)
        .collect()
}

fn sha_f32(v: &[f32]) -> String {
    let bytes: Vec<u8> = v.iter().flat_map(|x| x.to_le_bytes()).collect();
    liftgate::fsutil::sha256_hex(&bytes)
}

fn quant(name: &str) -> BaseQuant {
    <BaseQuant as clap::ValueEnum>::from_str(name, false).unwrap()
}

#[test]
fn code_tables_are_bitsandbytes_tables() {
    let doc = read(&families()[0].join("nf4.json"));
    let t = &doc["tables"];
    assert_eq!(
        sha_f32(&nf4::DYNAMIC),
        t["dynamic_sha256"].as_str().unwrap()
    );
    assert_eq!(
        sha_f32(&Codebook::Nf4.values()),
        t["nf4_sha256"].as_str().unwrap()
    );
    assert_eq!(
        sha_f32(&Codebook::Fp4.values()),
        t["fp4_sha256"].as_str().unwrap()
    );
}

#[test]
fn dequantised_weights_equal_bitsandbytes_bit_for_bit() {
    let mut checked = 0;
    for family in families() {
        let doc = read(&family.join("nf4.json"));
        let mdir = family.join("model");
        let spec = model::config::ModelSpec::load(&mdir).unwrap();
        let w = model::weights::load(&mdir, &spec).unwrap();
        for setting in doc["settings"].as_array().unwrap() {
            let q = quant(setting["quant"].as_str().unwrap());
            let weights = setting["weights"].as_object().unwrap();
            // Every linear layer of every block is quantised, nothing else (transformers keeps
            // the output head and embeddings).
            let attention = if spec.fused_qkv { 2 } else { 4 };
            let mlp = if spec.fused_gate_up { 2 } else { 3 };
            let per_layer = attention + mlp;
            assert_eq!(
                weights.len(),
                spec.num_layers * per_layer,
                "{}",
                family.display()
            );
            for (name, want) in weights {
                let t = w
                    .tensors
                    .get(name)
                    .unwrap_or_else(|| panic!("{name} missing"));
                let values: Vec<f32> = t
                    .to_dtype(candle_core::DType::F32)
                    .unwrap()
                    .flatten_all()
                    .unwrap()
                    .to_vec1()
                    .unwrap();
                let qd = nf4::quantise(&values, q.codebook(), q.double_quant());
                let deq: Vec<f32> = (0..values.len())
                    .map(|i| qd.value(q.codebook(), i))
                    .collect();
                assert_eq!(
                    sha_f32(&deq),
                    want["sha256"].as_str().unwrap(),
                    "{} {}: {name} differs from bitsandbytes' dequantised weight",
                    family.display(),
                    q.name()
                );
                checked += 1;
            }
        }
    }
    eprintln!("{checked} dequantised 4-bit matrices equal bitsandbytes' bit for bit");
    assert!(checked >= 8 * 4 * 8);
}

#[test]
fn adapters_on_the_4_bit_base_answer_as_the_reference() {
    let (mut compared, mut skipped) = (0, 0);
    let mut refused: Vec<(PathBuf, String)> = Vec::new();
    for family in families() {
        let doc = read(&family.join("nf4.json"));
        let expected = read(&family.join("expected.json"));
        let mdir = family.join("model");
        for setting in doc["settings"].as_array().unwrap() {
            let q = quant(setting["quant"].as_str().unwrap());
            let cases: Vec<&Value> = setting["cases"]
                .as_array()
                .unwrap()
                .iter()
                .filter(|c| c.get("error").is_none_or(Value::is_null))
                .collect();
            let mut variants: Vec<String> = Vec::new();
            for c in &cases {
                let v = c["variant"].as_str().unwrap().to_string();
                if variants.contains(&v) || refused.contains(&(family.clone(), v.clone())) {
                    continue;
                }
                let dir = family.join("adapters").join(&v);
                let must_merge = v != "base"
                    && model::lora::Adapter::load(&dir)
                        .unwrap()
                        .needs_merge()
                        .is_some();
                if must_merge {
                    // An adapter that replaces whole tensors cannot stay unmerged, and a 4-bit
                    // base takes adapters unmerged only: refused, naming the adapter.
                    let err = model::load_group_as(
                        &mdir,
                        &[Some(dir.as_path())],
                        model::WeightFormat::F32,
                        Some(q),
                    )
                    .err()
                    .expect("refused");
                    assert!(err.to_string().contains("adapter_config.json"), "{err}");
                    refused.push((family.clone(), v));
                    continue;
                }
                variants.push(v);
            }
            let dirs: Vec<Option<PathBuf>> = variants
                .iter()
                .map(|v| (v != "base").then(|| family.join("adapters").join(v)))
                .collect();
            let refs: Vec<Option<&Path>> = dirs.iter().map(|d| d.as_deref()).collect();
            let loaded = model::load_group_as(&mdir, &refs, model::WeightFormat::F32, Some(q))
                .unwrap_or_else(|e| panic!("{} {}: {e}", family.display(), q.name()));
            assert_eq!(loaded.quant, Some(q));
            let mut prompts = Vec::new();
            let mut jobs = Vec::new();
            let mut want = Vec::new();
            for c in &cases {
                if !variants.iter().any(|v| c["variant"] == v.as_str()) {
                    continue;
                }
                if c["margin_ok"] == false {
                    skipped += 1;
                    continue;
                }
                let variant = variants
                    .iter()
                    .position(|v| c["variant"] == v.as_str())
                    .unwrap();
                let prompt = expected["cases"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .find(|e| {
                        e["variant"] == c["variant"]
                            && e["system"] == c["system"]
                            && e["question_index"] == c["question_index"]
                    })
                    .map(|e| ids(&e["prompt_ids"]))
                    .expect("the case's prompt in expected.json");
                prompts.push(prompt);
                jobs.push(Job {
                    prompt: prompts.len() - 1,
                    variant,
                });
                want.push((
                    ids(&c["output_ids"]),
                    c["max_new_tokens"].as_u64().unwrap() as usize,
                    c,
                ));
            }
            let settings = GenerationSettings {
                decoding: Decoding::Greedy,
                max_new_tokens: want.iter().map(|w| w.1).max().unwrap_or(1),
                eos: loaded.generation.eos.clone(),
                ignore_eos: false,
                repetition_penalty: None,
            };
            let mut got: Vec<Option<Vec<u32>>> = vec![None; jobs.len()];
            generate_jobs(
                &loaded.decoder,
                &prompts,
                &jobs,
                &settings,
                2 * variants.len(),
                &mut |job, g| {
                    got[job.prompt] = Some(g.tokens);
                    Ok(())
                },
                &mut |_| Ok(()),
            )
            .unwrap();
            for ((out, n, c), g) in want.iter().zip(&got) {
                let g = g.as_ref().expect("every job answered");
                let g = &g[..(*n).min(g.len())];
                assert_eq!(
                    g,
                    &out[..],
                    "{} {} {} system={} q{}",
                    family.display(),
                    q.name(),
                    c["variant"],
                    c["system"],
                    c["question_index"]
                );
                compared += 1;
            }
        }
    }
    eprintln!(
        "{compared} cases equal the reference; {skipped} below the margin rule skipped; adapters refused (they replace whole tensors): {refused:?}"
    );
    assert!(compared > 300, "only {compared} cases compared");
}

/// The mean the double quantisation subtracts is `torch.mean` of the block scales, summed in
/// PyTorch's own order: `nf4::torch_sum` against torch 2.15 on CPU (one thread) for lengths
/// 1-129 and up to 917,504 (tests/fixtures/nf4_sums.json, made by
/// tests/reference/make_nf4_fixtures.py).
#[test]
fn scale_sums_follow_torch_bit_for_bit() {
    let doc = read(&Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/nf4_sums.json"));
    let cases = doc["cases"].as_array().unwrap();
    for c in cases {
        let n = c["n"].as_u64().unwrap() as usize;
        let v: Vec<f32> = (0..n)
            .map(|i| ((i * 7919 % 1000) as f32) / 3333.0 + 0.01)
            .collect();
        let sum = nf4::torch_sum(&v);
        assert_eq!(
            sum.to_bits() as u64,
            c["sum_bits"].as_u64().unwrap(),
            "sum of {n}"
        );
        let mean = sum / n as f32;
        assert_eq!(
            mean.to_bits() as u64,
            c["mean_bits"].as_u64().unwrap(),
            "mean of {n}"
        );
    }
    assert!(cases.len() > 130);
}
