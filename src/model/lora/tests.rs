//! Loading and merging adapters written to a temporary directory: what is refused (naming the
//! file and field), what the merge computes (checked against the published formulas), and that
//! a failed merge leaves the weights untouched.

use super::adapter::PICKLE_FILE;
use super::tensors::KEY_PREFIX;
use super::*;
use crate::error::Result;
use crate::model::names::{EMBED, LM_HEAD};
use candle_core::{Device, Tensor};
use serde_json::{json, Value};
use std::collections::HashMap;
use std::path::Path;

const Q: &str = "model.layers.0.self_attn.q_proj";
const V: &str = "model.layers.0.self_attn.v_proj";

fn t(data: &[f32], shape: &[usize]) -> Tensor {
    Tensor::from_slice(data, shape, &Device::Cpu).unwrap()
}

fn filled(shape: &[usize], start: f32) -> Tensor {
    let n: usize = shape.iter().product();
    let data: Vec<f32> = (0..n).map(|i| start + 0.01 * i as f32).collect();
    t(&data, shape)
}

/// A one-layer base: hidden 4, q_proj [4, 4], v_proj [2, 4], embeddings [6, 4], tied.
fn base() -> HashMap<String, Tensor> {
    let mut w = HashMap::new();
    w.insert(format!("{Q}.weight"), filled(&[4, 4], 0.1));
    w.insert(format!("{V}.weight"), filled(&[2, 4], -0.2));
    w.insert(EMBED.to_string(), filled(&[6, 4], 0.3));
    w.insert(
        "model.layers.0.input_layernorm.weight".to_string(),
        filled(&[4], 1.0),
    );
    w
}

pub(super) fn base_config() -> Value {
    json!({"peft_type": "LORA", "r": 2, "lora_alpha": 4, "target_modules": ["q_proj", "v_proj"]})
}

/// q/v LoRA tensors of rank 2 for `base()`.
fn qv_tensors() -> Vec<(String, Tensor)> {
    vec![
        (
            format!("{KEY_PREFIX}{Q}.lora_A.weight"),
            filled(&[2, 4], 0.5),
        ),
        (
            format!("{KEY_PREFIX}{Q}.lora_B.weight"),
            filled(&[4, 2], -0.1),
        ),
        (
            format!("{KEY_PREFIX}{V}.lora_A.weight"),
            filled(&[2, 4], 0.2),
        ),
        (
            format!("{KEY_PREFIX}{V}.lora_B.weight"),
            filled(&[2, 2], 0.3),
        ),
    ]
}

fn write(dir: &Path, config: &Value, tensors: &[(String, Tensor)]) {
    std::fs::write(
        dir.join(CONFIG_FILE),
        serde_json::to_vec_pretty(config).unwrap(),
    )
    .unwrap();
    let map: HashMap<String, Tensor> = tensors.iter().cloned().collect();
    candle_core::safetensors::save(&map, dir.join(WEIGHTS_FILE)).unwrap();
}

fn adapter(config: &Value, tensors: &[(String, Tensor)]) -> (tempfile::TempDir, Result<Adapter>) {
    let dir = tempfile::tempdir().unwrap();
    write(dir.path(), config, tensors);
    let a = Adapter::load(dir.path());
    (dir, a)
}

fn err_of(config: &Value, tensors: &[(String, Tensor)]) -> String {
    let (_d, a) = adapter(config, tensors);
    let e = a.expect_err("load should fail");
    assert_eq!(e.exit_code(), 2, "{e}");
    e.to_string()
}

fn merge_err(
    config: &Value,
    tensors: &[(String, Tensor)],
    weights: &mut HashMap<String, Tensor>,
) -> String {
    let (_d, a) = adapter(config, tensors);
    let before: Vec<(String, Vec<f32>)> = weights
        .iter()
        .map(|(k, v)| (k.clone(), v.flatten_all().unwrap().to_vec1().unwrap()))
        .collect();
    let e = merge(weights, &a.unwrap(), true).expect_err("merge should fail");
    assert_eq!(e.exit_code(), 2, "{e}");
    for (k, v) in before {
        let now: Vec<f32> = weights[&k].flatten_all().unwrap().to_vec1().unwrap();
        assert_eq!(now, v, "{k} changed although the merge failed");
    }
    e.to_string()
}

#[test]
fn linear_merge_is_w_plus_scaled_ba() {
    // LoRA paper (Hu et al. 2021, eq. 3) and peft get_delta_weight: W' = W + (alpha/r)·B·A.
    let mut w = HashMap::new();
    w.insert(format!("{Q}.weight"), t(&[1., 0., 0., 1.], &[2, 2]));
    let tensors = vec![
        (
            format!("{KEY_PREFIX}{Q}.lora_A.weight"),
            t(&[1., 2.], &[1, 2]),
        ),
        (
            format!("{KEY_PREFIX}{Q}.lora_B.weight"),
            t(&[1., 3.], &[2, 1]),
        ),
    ];
    let config = json!({"peft_type": "LORA", "r": 1, "lora_alpha": 2, "target_modules": [Q]});
    let (_d, a) = adapter(&config, &tensors);
    let s = merge(&mut w, &a.unwrap(), false).unwrap();
    assert_eq!(s.modules_merged, 1);
    assert_eq!(s.modules[0].scaling, 2.0);
    let got: Vec<f32> = w[&format!("{Q}.weight")]
        .flatten_all()
        .unwrap()
        .to_vec1()
        .unwrap();
    assert_eq!(got, vec![3., 4., 6., 13.]);
}

#[test]
fn dora_rows_take_the_trained_magnitude() {
    // DoRA (Liu et al. 2024, eq. 5): W' = m · V / ‖V‖_c with V = W + ΔW; peft takes the norm
    // over each output row of a Linear weight, so the merged rows have norm m.
    let mut w = base();
    let m = [0.5f32, 1.0, 1.5, 2.0];
    let mut tensors = qv_tensors()[..2].to_vec();
    tensors.push((
        format!("{KEY_PREFIX}{Q}.lora_magnitude_vector"),
        t(&m, &[4]),
    ));
    let config = json!({"peft_type": "LORA", "r": 2, "lora_alpha": 4, "target_modules": ["q_proj"], "use_dora": true});
    let (_d, a) = adapter(&config, &tensors);
    let s = merge(&mut w, &a.unwrap(), true).unwrap();
    assert!(s.modules[0].dora);
    let norms: Vec<f32> = w[&format!("{Q}.weight")]
        .sqr()
        .unwrap()
        .sum(1)
        .unwrap()
        .sqrt()
        .unwrap()
        .to_vec1()
        .unwrap();
    for (n, m) in norms.iter().zip(m) {
        assert!((n - m).abs() < 1e-6, "{norms:?}");
    }
}

#[test]
fn unsupported_configs_are_refused_naming_the_field() {
    let with = |k: &str, v: Value| {
        let mut c = base_config();
        c[k] = v;
        c
    };
    let cases = [
        (with("peft_type", json!("IA3")), "peft_type"),
        (
            with("alora_invocation_tokens", json!([5, 6])),
            "alora_invocation_tokens",
        ),
        (
            with("trainable_token_indices", json!([1])),
            "trainable_token_indices",
        ),
        (
            with("target_parameters", json!(["mlp.experts"])),
            "target_parameters",
        ),
        (
            with("layer_replication", json!([[0, 1]])),
            "layer_replication",
        ),
        (with("fan_in_fan_out", json!(true)), "fan_in_fan_out"),
        (
            with("init_lora_weights", json!("pissa_niter_4")),
            "init_lora_weights",
        ),
        (
            with("init_lora_weights", json!("olora")),
            "init_lora_weights",
        ),
        (with("r", json!(0)), "field `r`"),
        (with("target_modules", json!("(unclosed")), "target_modules"),
    ];
    for (config, field) in cases {
        let msg = err_of(&config, &qv_tensors());
        assert!(msg.contains(CONFIG_FILE) && msg.contains(field), "{msg}");
    }
    // Variants peft merges like plain LoRA are accepted.
    for init in [
        json!("gaussian"),
        json!("eva"),
        json!(false),
        json!("orthogonal"),
    ] {
        let (_d, a) = adapter(&with("init_lora_weights", init), &qv_tensors());
        a.unwrap();
    }
}

#[test]
fn pickle_and_missing_files_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join(CONFIG_FILE), base_config().to_string()).unwrap();
    std::fs::write(dir.path().join(PICKLE_FILE), b"\x80\x02").unwrap();
    let e = Adapter::load(dir.path()).unwrap_err().to_string();
    assert!(e.contains(PICKLE_FILE) && e.contains(WEIGHTS_FILE), "{e}");
    std::fs::remove_file(dir.path().join(PICKLE_FILE)).unwrap();
    let e = Adapter::load(dir.path()).unwrap_err().to_string();
    assert!(e.contains(WEIGHTS_FILE), "{e}");
    std::fs::write(dir.path().join(CONFIG_FILE), "{\n\"r\": }").unwrap();
    std::fs::write(dir.path().join(WEIGHTS_FILE), b"").unwrap();
    let e = Adapter::load(dir.path()).unwrap_err().to_string();
    assert!(e.contains(&format!("{CONFIG_FILE}:2")), "{e}");
}

#[test]
fn tensor_inconsistencies_are_refused_naming_the_tensor() {
    // Rank in the config differs from the tensors (peft would fail with a size mismatch).
    let mut c = base_config();
    c["rank_pattern"] = json!({"v_proj": 3});
    let msg = err_of(&c, &qv_tensors());
    assert!(msg.contains("rank_pattern") && msg.contains(V), "{msg}");
    // DoRA config without magnitudes, and magnitudes without DoRA.
    let mut c = base_config();
    c["use_dora"] = json!(true);
    assert!(err_of(&c, &qv_tensors()).contains("lora_magnitude_vector"));
    let mut tensors = qv_tensors();
    let mkey = format!("{KEY_PREFIX}{Q}.lora_magnitude_vector");
    tensors.push((mkey.clone(), filled(&[4], 1.0)));
    assert!(err_of(&base_config(), &tensors).contains(&mkey));
    // A key without peft's prefix, a key still carrying the adapter name, an integer dtype.
    let mut tensors = qv_tensors();
    tensors.push(("q_proj.lora_A.weight".into(), filled(&[2, 4], 0.0)));
    assert!(err_of(&base_config(), &tensors).contains("base_model.model."));
    let mut tensors = qv_tensors();
    let named = format!("{KEY_PREFIX}{Q}.lora_A.default.weight");
    tensors.push((named.clone(), filled(&[2, 4], 0.0)));
    assert!(err_of(&base_config(), &tensors).contains(&named));
    let mut tensors = qv_tensors();
    let ikey = format!("{KEY_PREFIX}model.norm.weight");
    tensors.push((ikey.clone(), Tensor::new(&[1i64, 2], &Device::Cpu).unwrap()));
    assert!(err_of(&base_config(), &tensors).contains(&ikey));
    // lora_A without lora_B.
    let msg = err_of(&base_config(), &qv_tensors()[..3]);
    assert!(msg.contains(V) && msg.contains("lora_B"), "{msg}");
}

#[test]
fn mismatched_bases_fail_before_anything_changes() {
    // Wrong in-features for q_proj: names the adapter file, tensor, shapes and base tensor.
    let mut tensors = qv_tensors();
    tensors[0].1 = filled(&[2, 6], 0.5);
    let msg = merge_err(&base_config(), &tensors, &mut base());
    for want in [
        WEIGHTS_FILE,
        "q_proj.lora_A.weight",
        "[2, 6]",
        "[2, 4]",
        "[4, 4]",
    ] {
        assert!(msg.contains(want), "`{want}` not in {msg}");
    }
    // A module the base does not have.
    let mut c = base_config();
    c["target_modules"] = json!(["q_proj", "v_proj", "k_proj"]);
    let mut tensors = qv_tensors();
    tensors.push((
        format!("{KEY_PREFIX}model.layers.0.self_attn.k_proj.lora_A.weight"),
        filled(&[2, 4], 0.0),
    ));
    tensors.push((
        format!("{KEY_PREFIX}model.layers.0.self_attn.k_proj.lora_B.weight"),
        filled(&[2, 2], 0.0),
    ));
    let mut w = base();
    let msg = merge_err(&c, &tensors, &mut w);
    assert!(msg.contains("k_proj"), "{msg}");
    // LoRA tensors for a module the config does not select.
    let mut c = base_config();
    c["target_modules"] = json!(["q_proj"]);
    let msg = merge_err(&c, &qv_tensors(), &mut base());
    assert!(msg.contains("target_modules") && msg.contains(V), "{msg}");
    // The config selects v_proj but the file has no tensors for it.
    let msg = merge_err(&base_config(), &qv_tensors()[..2], &mut base());
    assert!(msg.contains("incomplete") && msg.contains(V), "{msg}");
    // lora_bias needs a base bias.
    let mut c = base_config();
    c["lora_bias"] = json!(true);
    let mut tensors = qv_tensors();
    tensors.push((format!("{KEY_PREFIX}{Q}.lora_B.bias"), filled(&[4], 0.1)));
    tensors.push((format!("{KEY_PREFIX}{V}.lora_B.bias"), filled(&[2], 0.1)));
    let msg = merge_err(&c, &tensors, &mut base());
    assert!(
        msg.contains("q_proj.lora_B.bias") && msg.contains("q_proj.bias"),
        "{msg}"
    );
    // A replacement of the wrong shape (a head for another vocabulary).
    let mut c = base_config();
    c["modules_to_save"] = json!(["lm_head"]);
    let mut tensors = qv_tensors();
    tensors.push((format!("{KEY_PREFIX}lm_head.weight"), filled(&[7, 4], 0.0)));
    let msg = merge_err(&c, &tensors, &mut base());
    assert!(
        msg.contains("lm_head.weight") && msg.contains("[7, 4]") && msg.contains("[6, 4]"),
        "{msg}"
    );
    // modules_to_save naming a module the base lacks.
    let mut c = base_config();
    c["modules_to_save"] = json!(["score"]);
    let msg = merge_err(&c, &qv_tensors(), &mut base());
    assert!(
        msg.contains("modules_to_save") && msg.contains("score"),
        "{msg}"
    );
}

#[test]
fn modules_to_save_embeddings_on_a_tied_model_keep_the_old_head() {
    // peft's ModulesToSaveWrapper copies embed_tokens; lm_head keeps the original Parameter.
    let mut c = base_config();
    c["modules_to_save"] = json!(["embed_tokens"]);
    let mut tensors = qv_tensors();
    let new_embed = filled(&[6, 4], 9.0);
    tensors.push((format!("{KEY_PREFIX}{EMBED}"), new_embed.clone()));
    let (_d, a) = adapter(&c, &tensors);
    let mut w = base();
    let old: Vec<f32> = w[EMBED].flatten_all().unwrap().to_vec1().unwrap();
    let s = merge(&mut w, &a.unwrap(), true).unwrap();
    assert!(s.untied);
    let head: Vec<f32> = w[LM_HEAD].flatten_all().unwrap().to_vec1().unwrap();
    let embed: Vec<f32> = w[EMBED].flatten_all().unwrap().to_vec1().unwrap();
    assert_eq!(head, old);
    assert_eq!(
        embed,
        new_embed.flatten_all().unwrap().to_vec1::<f32>().unwrap()
    );
}

#[test]
fn fingerprint_covers_both_files() {
    let (_d1, a) = adapter(&base_config(), &qv_tensors());
    let (_d2, b) = adapter(&base_config(), &qv_tensors());
    let mut c = base_config();
    c["lora_alpha"] = json!(5);
    let (_d3, d) = adapter(&c, &qv_tensors());
    let mut tensors = qv_tensors();
    tensors[0].1 = filled(&[2, 4], 0.25);
    let (_d4, e) = adapter(&base_config(), &tensors);
    let (a, b, d, e) = (a.unwrap(), b.unwrap(), d.unwrap(), e.unwrap());
    assert_eq!(a.fingerprint(), b.fingerprint());
    assert_eq!(a.fingerprint().len(), 64);
    assert_ne!(a.fingerprint(), d.fingerprint());
    assert_ne!(a.fingerprint(), e.fingerprint());
}
