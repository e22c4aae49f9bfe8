//! The decoder, LoRA merge and greedy loop against the reference implementation, for every
//! family under tests/fixtures/runner/.
//!
//! Source of every expected value: transformers 5.24.0 `generate(do_sample=False)` (torch
//! 2.15.0, f32, eager attention) on the base model, and peft 0.21.2
//! `PeftModel.from_pretrained(...).merge_and_unload()` for each adapter; fixtures made by
//! tests/reference/make_runner_fixtures.py (tiny seeded random models; every recorded step has a
//! top-1/top-2 logit margin of at least 1e-3, so token identity is a fair test in f32).
//!
//! Checked per case: token-identical greedy output ids (prompt ids taken from the fixture,
//! i.e. `apply_chat_template(tokenize=True)`), the finish reason, and the first-step logits
//! within 1e-4; then the same cases decoded together (one cache slot each, their shared prompt
//! prefix computed once) and decoded through two refilled slots must give the same ids as
//! batch 1. A second test checks the prompt side the answer command uses: the
//! rendered template text and its ids, the decoded answer text, and the template errors
//! (a system role the template rejects with `raise_exception`).

use liftgate::answer::generate::{generate_batch, Decoding, GenerationSettings};
use liftgate::chat::ChatTokenizer;
use liftgate::formats::answers::Finish;
use liftgate::model::{self, Merge};
use serde_json::Value;
use std::path::{Path, PathBuf};

const LOGIT_TOL: f32 = 1e-4;

fn fixtures_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/runner")
}

fn families() -> Vec<PathBuf> {
    let mut out: Vec<PathBuf> = std::fs::read_dir(fixtures_root())
        .expect("tests/fixtures/runner exists")
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.join("expected.json").is_file())
        .collect();
    out.sort();
    assert!(!out.is_empty(), "no fixture families found");
    out
}

fn ids(v: &Value) -> Vec<u32> {
    v.as_array()
        .expect("an id list")
        .iter()
        .map(|x| x.as_u64().expect("an id") as u32)
        .collect()
}

fn floats(v: &Value) -> Vec<f32> {
    v.as_array()
        .expect("a float list")
        .iter()
        .map(|x| x.as_f64().expect("a number") as f32)
        .collect()
}

struct Case {
    label: String,
    prompt: Vec<u32>,
    output: Vec<u32>,
    finish: Finish,
    max_new_tokens: usize,
    logits: Vec<f32>,
}

/// Runs every non-error case of one variant with its adapter applied as `merge` says; returns
/// the worst first-step logit difference. Unmerged, the expected ids are peft's unmerged
/// forward (`unmerged.output_ids`); merged, `merge_and_unload()`'s.
fn check_variant(family: &Path, expected: &Value, variant: &str, merge: Merge) -> f32 {
    let model_dir = family.join("model");
    let adapter_dir = family.join("adapters").join(variant);
    let adapter = (variant != "base").then_some(adapter_dir.as_path());
    let loaded = model::load_as(&model_dir, adapter, merge, model::WeightFormat::F32)
        .unwrap_or_else(|e| panic!("{}: loading {variant}: {e}", family.display()));
    let mut eos = loaded.generation.eos.clone();
    eos.sort();
    let cases: Vec<Case> = expected["cases"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|c| c["variant"] == variant && c.get("error").is_none_or(Value::is_null))
        .map(|c| Case {
            label: format!(
                "{} {variant} {merge:?} system={} q{}",
                family.file_name().unwrap().to_string_lossy(),
                c["system"],
                c["question_index"]
            ),
            prompt: ids(&c["prompt_ids"]),
            output: match (merge, c.get("unmerged")) {
                (Merge::Unmerged, Some(u)) if !u.is_null() => ids(&u["output_ids"]),
                _ => ids(&c["output_ids"]),
            },
            finish: match c["finish"].as_str() {
                Some("eos") => Finish::Eos,
                _ => Finish::Length,
            },
            max_new_tokens: c["max_new_tokens"].as_u64().unwrap() as usize,
            logits: floats(&c["first_step_logits"]),
        })
        .collect();
    assert!(
        !cases.is_empty(),
        "{}: no cases for {variant}",
        family.display()
    );
    let mut worst = 0f32;
    for case in &cases {
        let logits = loaded.decoder.prompt_logits(&case.prompt).unwrap();
        assert_eq!(logits.len(), case.logits.len(), "{}", case.label);
        let diff = logits
            .iter()
            .zip(&case.logits)
            .map(|(a, b)| (a - b).abs())
            .fold(0f32, f32::max);
        assert!(
            diff <= LOGIT_TOL,
            "{}: first-step logits differ by {diff} > {LOGIT_TOL}",
            case.label
        );
        worst = worst.max(diff);
        let settings = GenerationSettings {
            decoding: Decoding::Greedy,
            max_new_tokens: case.max_new_tokens,
            eos: loaded.generation.eos.clone(),
            ignore_eos: false,
            repetition_penalty: None,
        };
        let got = generate_batch(
            &loaded.decoder,
            std::slice::from_ref(&case.prompt),
            &settings,
            &mut |_| Ok(()),
        )
        .unwrap();
        assert_eq!(got[0].tokens, case.output, "{}: output ids", case.label);
        assert_eq!(got[0].finish, case.finish, "{}: finish", case.label);
    }
    // All cases of the variant with one shared max_new_tokens: batched and refilled vs alone.
    let max_new = cases.iter().map(|c| c.max_new_tokens).max().unwrap();
    let settings = GenerationSettings {
        decoding: Decoding::Greedy,
        max_new_tokens: max_new,
        eos: loaded.generation.eos.clone(),
        ignore_eos: false,
        repetition_penalty: None,
    };
    let prompts: Vec<Vec<u32>> = cases.iter().map(|c| c.prompt.clone()).collect();
    let batched = generate_batch(&loaded.decoder, &prompts, &settings, &mut |_| Ok(())).unwrap();
    // Two slots for all the cases: finished slots are refilled while the other decodes.
    let mut refilled: Vec<Option<Vec<u32>>> = vec![None; prompts.len()];
    let todo: Vec<usize> = (0..prompts.len()).rev().collect();
    liftgate::answer::generate::generate_stream(
        &loaded.decoder,
        &prompts,
        &todo,
        &settings,
        2,
        &mut |i, g| {
            assert!(refilled[i].is_none(), "answer {i} handed out twice");
            refilled[i] = Some(g.tokens);
            Ok(())
        },
        &mut |_| Ok(()),
    )
    .unwrap();
    for ((case, b), r) in cases.iter().zip(&batched).zip(&refilled) {
        assert_eq!(
            r.as_ref(),
            Some(&b.tokens),
            "{}: refilled vs batched",
            case.label
        );
        let alone = generate_batch(
            &loaded.decoder,
            std::slice::from_ref(&case.prompt),
            &settings,
            &mut |_| Ok(()),
        )
        .unwrap();
        assert_eq!(
            b.tokens, alone[0].tokens,
            "{}: batched vs batch 1",
            case.label
        );
        // The reference prefix (its own max_new_tokens) must match too.
        let n = case.output.len().min(b.tokens.len());
        assert_eq!(
            &b.tokens[..n],
            &case.output[..n],
            "{}: batched vs reference",
            case.label
        );
    }
    worst
}

#[test]
fn greedy_outputs_match_the_reference_for_every_family_and_variant() {
    let mut report = Vec::new();
    for family in families() {
        let expected: Value =
            serde_json::from_str(&std::fs::read_to_string(family.join("expected.json")).unwrap())
                .unwrap();
        let variants: Vec<String> = expected["variants"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_str().unwrap().to_string())
            .collect();
        for variant in variants {
            let modes: &[Merge] = if variant == "base" {
                &[Merge::Unmerged]
            } else {
                &[Merge::Unmerged, Merge::F32]
            };
            for &merge in modes {
                let worst = check_variant(&family, &expected, &variant, merge);
                report.push(format!(
                    "{} {variant} {merge:?}: max |Δ first-step logit| = {worst:.2e}",
                    family.file_name().unwrap().to_string_lossy()
                ));
            }
        }
    }
    eprintln!("{}", report.join("\n"));
}

#[test]
fn prompts_answers_and_template_errors_match_the_reference() {
    for family in families() {
        let name = family.file_name().unwrap().to_string_lossy().to_string();
        let expected: Value =
            serde_json::from_str(&std::fs::read_to_string(family.join("expected.json")).unwrap())
                .unwrap();
        let chat = ChatTokenizer::load(&family.join("model")).unwrap();
        let loaded_eos = liftgate::model::config::GenerationDefaults::load(
            &family.join("model"),
            &liftgate::model::config::ModelSpec::load(&family.join("model")).unwrap(),
        )
        .unwrap()
        .eos;
        let system_text = expected["system_text"].as_str().unwrap();
        let questions = expected["questions"].as_array().unwrap();
        for c in expected["cases"].as_array().unwrap() {
            let label = format!(
                "{name} {} system={} q{}",
                c["variant"], c["system"], c["question_index"]
            );
            let q = questions[c["question_index"].as_u64().unwrap() as usize]
                .as_str()
                .unwrap();
            let system = c["system"].as_bool().unwrap().then_some(system_text);
            if c.get("error").is_some_and(|e| !e.is_null()) {
                let err = chat
                    .encode_prompt(system, q)
                    .expect_err(&format!("{label}: the template should refuse"));
                assert_eq!(err.exit_code(), 2, "{label}: {err}");
                continue;
            }
            let rendered = chat.render_prompt(system, q).unwrap();
            assert_eq!(
                rendered,
                c["rendered"].as_str().unwrap(),
                "{label}: rendered"
            );
            assert_eq!(
                chat.encode_prompt(system, q).unwrap(),
                ids(&c["prompt_ids"]),
                "{label}: prompt ids"
            );
            let mut out = ids(&c["output_ids"]);
            if c["finish"] == "eos" {
                let last = out.pop().unwrap();
                assert!(loaded_eos.contains(&last), "{label}: eos id {last}");
            }
            let text = chat.decode(&out).unwrap();
            assert_eq!(
                liftgate::answer::generate::strip_like_python(&text),
                c["answer"].as_str().unwrap(),
                "{label}: answer"
            );
        }
    }
}

/// Logits at every position of `ids`, one token per forward call through the KV cache.
fn logits_at_every_position(decoder: &liftgate::model::decoder::Decoder, ids: &[u32]) -> Vec<f32> {
    let mut cache = decoder.new_cache(1, ids.len());
    let mut ws = liftgate::model::decoder::Workspace::default();
    let mut out = Vec::new();
    for t in ids.chunks(1) {
        let seg = [liftgate::model::decoder::Segment {
            slot: 0,
            tokens: t,
            variant: 0,
        }];
        out.extend_from_slice(decoder.forward(&seg, &mut cache, &mut ws).unwrap());
    }
    out
}

/// The fixtures' `feature_checks`: transformers 5.24.0 logits over the first base case's
/// prompt + output with a config override that switches a feature off (sliding window, RoPE
/// scaling, soft-caps, query_pre_attn_scalar, partial rotary), against the unchanged config;
/// `max_abs_logit_diff` is how far the reference moved. The same override written into
/// config.json must move liftgate's logits by the same amount (within 1e-3), so each config
/// key is read with transformers' semantics rather than merely parsed.
#[test]
fn config_feature_overrides_move_the_logits_like_the_reference() {
    let mut checked = 0;
    for family in families() {
        let expected: Value =
            serde_json::from_str(&std::fs::read_to_string(family.join("expected.json")).unwrap())
                .unwrap();
        let Some(checks) = expected.get("feature_checks").and_then(Value::as_array) else {
            continue;
        };
        let case = expected["cases"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["variant"] == "base" && c.get("prompt_ids").is_some())
            .unwrap();
        let mut seq = ids(&case["prompt_ids"]);
        seq.extend(ids(&case["output_ids"]));
        let model_dir = family.join("model");
        let reference =
            logits_at_every_position(&model::load(&model_dir, None).unwrap().decoder, &seq);
        for check in checks {
            let dir = tempfile::tempdir().unwrap();
            for e in std::fs::read_dir(&model_dir).unwrap().flatten() {
                std::fs::copy(e.path(), dir.path().join(e.file_name())).unwrap();
            }
            let cfg_path = dir.path().join("config.json");
            let mut cfg: Value =
                serde_json::from_str(&std::fs::read_to_string(&cfg_path).unwrap()).unwrap();
            for (k, v) in check["override"].as_object().unwrap() {
                cfg[k] = v.clone();
            }
            std::fs::write(&cfg_path, cfg.to_string()).unwrap();
            let changed =
                logits_at_every_position(&model::load(dir.path(), None).unwrap().decoder, &seq);
            let diff = changed
                .iter()
                .zip(&reference)
                .map(|(a, b)| (a - b).abs())
                .fold(0f32, f32::max);
            let want = check["max_abs_logit_diff"].as_f64().unwrap() as f32;
            assert!(
                (diff - want).abs() <= 1e-3,
                "{} override {}: logits moved by {diff}, transformers by {want}",
                family.display(),
                check["override"]
            );
            checked += 1;
        }
    }
    assert!(checked > 0, "no feature checks in the fixtures");
}

/// transformers 5.24.0 `generate(do_sample=False, repetition_penalty=1.3)` on the llama fixture
/// (tests/fixtures/generation/repetition_penalty.json, made by
/// tests/reference/make_generation_fixtures.py; every step's processed top-1/top-2 gap ≥ 1e-3).
#[test]
fn repetition_penalty_matches_the_reference() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/generation/repetition_penalty.json");
    let doc: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    let loaded = model::load(&fixtures_root().join("llama/model"), None).unwrap();
    let settings = GenerationSettings {
        decoding: Decoding::Greedy,
        max_new_tokens: doc["max_new_tokens"].as_u64().unwrap() as usize,
        eos: loaded.generation.eos.clone(),
        ignore_eos: false,
        repetition_penalty: Some(doc["repetition_penalty"].as_f64().unwrap() as f32),
    };
    let cases = doc["cases"].as_array().unwrap();
    let prompts: Vec<Vec<u32>> = cases.iter().map(|c| ids(&c["prompt_ids"])).collect();
    for (c, p) in cases.iter().zip(&prompts) {
        let got = generate_batch(
            &loaded.decoder,
            std::slice::from_ref(p),
            &settings,
            &mut |_| Ok(()),
        )
        .unwrap();
        assert_eq!(got[0].tokens, ids(&c["output_ids"]));
    }
    let batched = generate_batch(&loaded.decoder, &prompts, &settings, &mut |_| Ok(())).unwrap();
    for (c, g) in cases.iter().zip(&batched) {
        assert_eq!(g.tokens, ids(&c["output_ids"]), "batched");
    }
}

/// The bf16 weight format (`--weights bf16`) is an approximation: its agreement with the
/// reference is measured here, on every family's base-model cases, as the share of answers
/// whose greedy token ids equal transformers' f32 output (the reference of the fixtures), and
/// the first-step logits must stay within bf16 rounding of the reference. Printed with
/// `--nocapture`; the README quotes the figure.
#[test]
fn bf16_weights_agree_with_the_reference_within_rounding() {
    let (mut same, mut total) = (0usize, 0usize);
    let mut lines = Vec::new();
    for family in families() {
        let expected: Value =
            serde_json::from_str(&std::fs::read_to_string(family.join("expected.json")).unwrap())
                .unwrap();
        let loaded = model::load_as(
            &family.join("model"),
            None,
            Merge::Unmerged,
            model::WeightFormat::Bf16,
        )
        .unwrap();
        let (mut fam_same, mut fam_total, mut worst_rel) = (0, 0, 0f32);
        for c in expected["cases"].as_array().unwrap() {
            if c["variant"] != "base" || !c.get("error").is_none_or(Value::is_null) {
                continue;
            }
            let prompt = ids(&c["prompt_ids"]);
            let want = floats(&c["first_step_logits"]);
            let got = loaded.decoder.prompt_logits(&prompt).unwrap();
            let scale = want.iter().fold(0f32, |m, v| m.max(v.abs())).max(1e-6);
            let diff = got
                .iter()
                .zip(&want)
                .fold(0f32, |m, (a, b)| m.max((a - b).abs()));
            worst_rel = worst_rel.max(diff / scale);
            let settings = GenerationSettings {
                decoding: Decoding::Greedy,
                max_new_tokens: c["max_new_tokens"].as_u64().unwrap() as usize,
                eos: loaded.generation.eos.clone(),
                ignore_eos: false,
                repetition_penalty: None,
            };
            let out = generate_batch(
                &loaded.decoder,
                std::slice::from_ref(&prompt),
                &settings,
                &mut |_| Ok(()),
            )
            .unwrap();
            fam_total += 1;
            if out[0].tokens == ids(&c["output_ids"]) {
                fam_same += 1;
            }
        }
        // bf16 keeps 8 significant bits (relative rounding 2^-9 ≈ 0.2%) on weights and on
        // activations at every product; through a few layers that compounds to a few percent
        // of the logit range, not more.
        assert!(
            worst_rel < 0.1,
            "{}: bf16 first-step logits off by {worst_rel:.3} of their range",
            family.display()
        );
        lines.push(format!(
            "{}: {fam_same}/{fam_total} answers identical, first-step logits within {:.1}% of their range",
            family.file_name().unwrap().to_string_lossy(),
            worst_rel * 100.0
        ));
        same += fam_same;
        total += fam_total;
    }
    assert!(total > 0);
    eprintln!(
        "bf16 weights vs f32 reference: {same}/{total} answers identical ({:.0}%)\n{}",
        100.0 * same as f64 / total as f64,
        lines.join("\n")
    );
}

/// One copy of the base with the base and every adapter that can run unmerged as variants of
/// one decoder, all their rows decoded in the same steps (two slots per variant, refilled):
/// each variant's answers must equal the reference, as each does alone. Source: the same
/// fixtures (peft 0.21.2 unmerged forward; transformers 5.24.0 for the base).
#[test]
fn variants_sharing_one_base_answer_as_each_does_alone() {
    use liftgate::answer::generate::{generate_jobs, Job};
    for family in families() {
        let expected: Value =
            serde_json::from_str(&std::fs::read_to_string(family.join("expected.json")).unwrap())
                .unwrap();
        let mut variants = vec!["base".to_string()];
        for v in expected["variants"].as_array().unwrap() {
            let v = v.as_str().unwrap();
            let dir = family.join("adapters").join(v);
            if v != "base"
                && model::lora::Adapter::load(&dir)
                    .unwrap()
                    .needs_merge()
                    .is_none()
            {
                variants.push(v.to_string());
            }
        }
        if variants.len() < 2 {
            continue;
        }
        let dirs: Vec<Option<PathBuf>> = variants
            .iter()
            .map(|v| (v != "base").then(|| family.join("adapters").join(v)))
            .collect();
        let refs: Vec<Option<&Path>> = dirs.iter().map(|d| d.as_deref()).collect();
        let loaded =
            model::load_group(&family.join("model"), &refs, model::WeightFormat::F32).unwrap();
        let cases: Vec<&Value> = expected["cases"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|c| c.get("error").is_none_or(Value::is_null))
            .collect();
        let mut prompts: Vec<Vec<u32>> = Vec::new();
        let mut jobs = Vec::new();
        let mut want = Vec::new();
        for c in &cases {
            let Some(variant) = variants.iter().position(|v| c["variant"] == v.as_str()) else {
                continue;
            };
            let out = match c.get("unmerged") {
                Some(u) if !u.is_null() => ids(&u["output_ids"]),
                _ => ids(&c["output_ids"]),
            };
            prompts.push(ids(&c["prompt_ids"]));
            jobs.push(Job {
                prompt: prompts.len() - 1,
                variant,
            });
            want.push((out, c["max_new_tokens"].as_u64().unwrap() as usize));
        }
        let max_new = want.iter().map(|w| w.1).max().unwrap();
        let settings = GenerationSettings {
            decoding: Decoding::Greedy,
            max_new_tokens: max_new,
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
        for (k, ((out, n), g)) in want.iter().zip(&got).enumerate() {
            let g = g.as_ref().expect("every job answered");
            let m = (*n).min(g.len()).min(out.len());
            assert_eq!(
                &g[..m],
                &out[..m],
                "{} {} (job {k}): shared-base output vs reference",
                family.display(),
                variants[jobs[k].variant]
            );
        }
    }
}
