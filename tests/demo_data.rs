//! The bundled demo: the held-out evaluation set, the training pairs it must not overlap, and
//! the committed demo models (HF-layout base, peft LoRA adapter).

use liftgate::formats::questions::{Expect, QuestionSet};
use std::collections::{BTreeMap, HashSet};
use std::path::{Path, PathBuf};

const MAX_MODELS_BYTES: u64 = 20 * 1024 * 1024;

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Lower-case and collapse every run of whitespace to one space.
fn normalize(s: &str) -> String {
    s.to_lowercase()
        .split_whitespace()
        .collect::<Vec<_>>()
        .join(" ")
}

fn read_json(path: &Path) -> serde_json::Value {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

fn training_pairs() -> Vec<(String, String)> {
    let path = repo().join("demo/train.jsonl");
    let text = std::fs::read_to_string(&path).expect("demo/train.jsonl is readable");
    text.lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty())
        .map(|(i, l)| {
            let v: serde_json::Value =
                serde_json::from_str(l).unwrap_or_else(|e| panic!("train.jsonl:{}: {e}", i + 1));
            let field = |name: &str| {
                v.get(name)
                    .and_then(|x| x.as_str())
                    .filter(|s| !s.trim().is_empty())
                    .unwrap_or_else(|| panic!("train.jsonl:{}: missing {name}", i + 1))
                    .to_string()
            };
            (field("question"), field("answer"))
        })
        .collect()
}

#[test]
fn evaluation_set_has_the_promised_shape() {
    // Question-set format and rules: docs/interface.md, "Question set".
    let set = QuestionSet::load(&repo().join("eval-sets/ferry-faq.jsonl"))
        .expect("the evaluation set loads");
    assert!(
        set.len() >= 120,
        "{} questions, expected at least 120",
        set.len()
    );

    let mut per_category: BTreeMap<&str, usize> = BTreeMap::new();
    for q in &set.questions {
        *per_category.entry(q.category.as_str()).or_default() += 1;
    }
    let in_scope: Vec<_> = per_category
        .keys()
        .filter(|c| **c != "out-of-scope")
        .collect();
    assert!(
        in_scope.len() >= 6,
        "in-scope categories {in_scope:?}, expected at least 6"
    );

    let refuse: Vec<_> = set
        .questions
        .iter()
        .filter(|q| q.expect == Expect::Refuse)
        .collect();
    assert!(refuse.len() >= 25, "{} refuse questions", refuse.len());
    for q in &refuse {
        assert_eq!(q.category, "out-of-scope", "{}", q.id);
        assert!(q.references.is_empty(), "{} has references", q.id);
    }
    for q in set.questions.iter().filter(|q| q.expect == Expect::Answer) {
        assert!(
            (1..=2).contains(&q.references.len()),
            "{}: {} references, expected 1 or 2",
            q.id,
            q.references.len()
        );
        assert!(
            q.category != "out-of-scope",
            "{} answers yet is out of scope",
            q.id
        );
    }
}

#[test]
fn no_evaluation_question_is_in_the_training_data() {
    let set = QuestionSet::load(&repo().join("eval-sets/ferry-faq.jsonl")).expect("loads");
    let pairs = training_pairs();
    let trained: HashSet<String> = pairs.iter().map(|(q, _)| normalize(q)).collect();
    let leaked: Vec<&str> = set
        .questions
        .iter()
        .filter(|q| trained.contains(&normalize(&q.question)))
        .map(|q| q.id.as_str())
        .collect();
    assert!(
        leaked.is_empty(),
        "evaluation questions found verbatim in training: {leaked:?}"
    );

    // The normaliser itself: case and whitespace runs do not hide a copy.
    assert_eq!(
        normalize("  Can I\tbring  my BIKE? "),
        "can i bring my bike?"
    );

    // The training set holds in-scope pairs and declines with one consistent wording.
    let refusal = pairs
        .iter()
        .filter(|(_, a)| a.starts_with("I'm sorry"))
        .map(|(_, a)| a.as_str())
        .collect::<HashSet<_>>();
    let n_refusals = pairs
        .iter()
        .filter(|(_, a)| refusal.contains(a.as_str()))
        .count();
    assert_eq!(refusal.len(), 1, "refusal wordings: {refusal:?}");
    assert!(n_refusals >= 60, "{n_refusals} refusal pairs");
    assert!(
        pairs.len() - n_refusals >= 300,
        "{} in-scope pairs",
        pairs.len() - n_refusals
    );
}

fn dir_bytes(dir: &Path) -> u64 {
    std::fs::read_dir(dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.expect("dir entry").metadata().expect("metadata").len())
        .sum()
}

fn safetensors_names(path: &Path) -> Vec<String> {
    let bytes = std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let st = safetensors::SafeTensors::deserialize(&bytes)
        .unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let mut names: Vec<String> = st.names().into_iter().map(|s| s.to_string()).collect();
    names.sort();
    names
}

#[test]
fn demo_models_are_complete_and_small() {
    let base = repo().join("demo/models/base");
    let adapter = repo().join("demo/models/adapter");
    // HF directory layout: docs/model-formats.md §1.1.
    for f in [
        "config.json",
        "model.safetensors",
        "tokenizer.json",
        "tokenizer_config.json",
        "generation_config.json",
    ] {
        assert!(base.join(f).is_file(), "base model lacks {f}");
    }
    // peft adapter files: docs/model-formats.md §5.
    for f in ["adapter_config.json", "adapter_model.safetensors"] {
        assert!(adapter.join(f).is_file(), "adapter lacks {f}");
    }
    let total = dir_bytes(&base) + dir_bytes(&adapter);
    assert!(total <= MAX_MODELS_BYTES, "demo models take {total} bytes");

    let config = read_json(&base.join("config.json"));
    assert_eq!(config["model_type"], "llama");
    assert_eq!(config["tie_word_embeddings"], true);
    let layers = config["num_hidden_layers"]
        .as_u64()
        .expect("num_hidden_layers");

    // Tied embeddings: save_pretrained omits lm_head.weight (docs/model-formats.md §1.3).
    let names = safetensors_names(&base.join("model.safetensors"));
    assert!(names.contains(&"model.embed_tokens.weight".to_string()));
    assert!(!names.contains(&"lm_head.weight".to_string()));
    assert_eq!(names.len() as u64, 2 + 9 * layers, "{names:?}");

    // The chat template lives in chat_template.jinja (transformers 5) and/or tokenizer_config.json.
    let tok_cfg = read_json(&base.join("tokenizer_config.json"));
    let template = std::fs::read_to_string(base.join("chat_template.jinja"))
        .ok()
        .or_else(|| tok_cfg["chat_template"].as_str().map(str::to_string))
        .expect("a chat template");
    assert!(template.contains("add_generation_prompt"));

    // generation_config.json stops on both the end-of-turn and the end-of-text token.
    let tokenizer = tokenizers::Tokenizer::from_file(base.join("tokenizer.json"))
        .expect("tokenizer.json loads");
    let gen = read_json(&base.join("generation_config.json"));
    let eos: Vec<u64> = gen["eos_token_id"]
        .as_array()
        .expect("eos_token_id is a list")
        .iter()
        .map(|v| v.as_u64().expect("an id"))
        .collect();
    for special in ["<|end|>", "</s>"] {
        let id = tokenizer.token_to_id(special).expect("special token") as u64;
        assert!(eos.contains(&id), "{special} ({id}) not in eos ids {eos:?}");
    }

    // LoRA r=16, alpha=32 on the seven projections of every layer, keys as peft saves them
    // (docs/model-formats.md §5.2): base_model.model.<module>.lora_{A,B}.weight.
    let acfg = read_json(&adapter.join("adapter_config.json"));
    assert_eq!(acfg["peft_type"], "LORA");
    assert_eq!(acfg["r"], 16);
    assert_eq!(acfg["lora_alpha"], 32);
    let keys = safetensors_names(&adapter.join("adapter_model.safetensors"));
    assert_eq!(keys.len() as u64, 2 * 7 * layers, "{keys:?}");
    assert!(keys
        .iter()
        .all(|k| k.starts_with("base_model.model.model.layers.")
            && (k.ends_with(".lora_A.weight") || k.ends_with(".lora_B.weight"))));
}
