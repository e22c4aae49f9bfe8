//! The checkpoint's tensor names, spelled once: the loader, the decoder and the LoRA merge all
//! name tensors through this module, so a family with other names changes one file.
//!
//! The names are those transformers saves for the supported families (docs/model-formats.md
//! §1.3): `model.embed_tokens.weight`, per layer `model.layers.{l}.<module>.weight` (and
//! `.bias`), `model.norm.weight` and, unless tied, `lm_head.weight`.

use crate::model::config::ModelSpec;

/// The token embedding matrix, [vocab, hidden].
pub const EMBED: &str = "model.embed_tokens.weight";
/// The output head, [vocab, hidden]; absent when tied to the embedding.
pub const LM_HEAD: &str = "lm_head.weight";
/// The output head as a module (the name adapters use for it).
pub const HEAD_MODULE: &str = "lm_head";
/// The last component of the embedding's module name.
pub const EMBED_MODULE_LEAF: &str = "embed_tokens";
/// The final RMSNorm weight, [hidden].
pub const FINAL_NORM: &str = "model.norm.weight";

// Modules of one layer, relative to its prefix ([`Layer`]).
pub const Q_PROJ: &str = "self_attn.q_proj";
pub const K_PROJ: &str = "self_attn.k_proj";
pub const V_PROJ: &str = "self_attn.v_proj";
/// Phi-3: rows [q | k | v] in one matrix.
pub const QKV_PROJ: &str = "self_attn.qkv_proj";
pub const O_PROJ: &str = "self_attn.o_proj";
/// Qwen3: per-head RMSNorm of q and k.
pub const Q_NORM: &str = "self_attn.q_norm";
pub const K_NORM: &str = "self_attn.k_norm";
pub const GATE_PROJ: &str = "mlp.gate_proj";
pub const UP_PROJ: &str = "mlp.up_proj";
/// Phi-3: rows [gate | up] in one matrix.
pub const GATE_UP_PROJ: &str = "mlp.gate_up_proj";
pub const DOWN_PROJ: &str = "mlp.down_proj";
pub const INPUT_NORM: &str = "input_layernorm";
pub const POST_ATTN_NORM: &str = "post_attention_layernorm";
/// Gemma2's sandwich norms around the MLP.
pub const PRE_FF_NORM: &str = "pre_feedforward_layernorm";
pub const POST_FF_NORM: &str = "post_feedforward_layernorm";

/// `<module>.weight`
pub fn weight(module: &str) -> String {
    format!("{module}.weight")
}

/// `<module>.bias`
pub fn bias(module: &str) -> String {
    format!("{module}.bias")
}

/// The names of layer `l`'s tensors.
#[derive(Debug, Clone)]
pub struct Layer {
    prefix: String,
}

impl Layer {
    pub fn new(l: usize) -> Layer {
        Layer {
            prefix: format!("model.layers.{l}."),
        }
    }

    /// The full name of `module` in this layer (what adapters name).
    pub fn module(&self, module: &str) -> String {
        format!("{}{module}", self.prefix)
    }

    /// The full name of `module`'s weight in this layer.
    pub fn weight(&self, module: &str) -> String {
        format!("{}{module}.weight", self.prefix)
    }

    /// The full name of `module`'s bias in this layer.
    pub fn bias(&self, module: &str) -> String {
        format!("{}{module}.bias", self.prefix)
    }
}

/// The tensors a checkpoint of `spec` must hold, with their shapes. `lm_head.weight` is not
/// listed: the tied-embedding rules (docs/model-formats.md §1.3) decide whether it must exist.
pub fn expected_tensors(spec: &ModelSpec) -> Vec<(String, Vec<usize>)> {
    let (h, hd, nh, nkv, i) = (
        spec.hidden_size,
        spec.head_dim,
        spec.num_heads,
        spec.num_kv_heads,
        spec.intermediate_size,
    );
    let mut out = vec![
        (EMBED.to_string(), vec![spec.vocab_size, h]),
        (FINAL_NORM.to_string(), vec![h]),
    ];
    for l in 0..spec.num_layers {
        let layer = Layer::new(l);
        let mut add = |name: String, shape: Vec<usize>| out.push((name, shape));
        add(layer.weight(INPUT_NORM), vec![h]);
        add(layer.weight(POST_ATTN_NORM), vec![h]);
        if spec.sandwich_norms {
            add(layer.weight(PRE_FF_NORM), vec![h]);
            add(layer.weight(POST_FF_NORM), vec![h]);
        }
        if spec.fused_qkv {
            add(layer.weight(QKV_PROJ), vec![(nh + 2 * nkv) * hd, h]);
        } else {
            add(layer.weight(Q_PROJ), vec![nh * hd, h]);
            add(layer.weight(K_PROJ), vec![nkv * hd, h]);
            add(layer.weight(V_PROJ), vec![nkv * hd, h]);
            if spec.qkv_bias {
                add(layer.bias(Q_PROJ), vec![nh * hd]);
                add(layer.bias(K_PROJ), vec![nkv * hd]);
                add(layer.bias(V_PROJ), vec![nkv * hd]);
            }
        }
        add(layer.weight(O_PROJ), vec![h, nh * hd]);
        if spec.o_bias {
            add(layer.bias(O_PROJ), vec![h]);
        }
        if spec.qk_norm {
            add(layer.weight(Q_NORM), vec![hd]);
            add(layer.weight(K_NORM), vec![hd]);
        }
        if spec.fused_gate_up {
            add(layer.weight(GATE_UP_PROJ), vec![2 * i, h]);
        } else {
            add(layer.weight(GATE_PROJ), vec![i, h]);
            add(layer.weight(UP_PROJ), vec![i, h]);
            if spec.mlp_bias {
                add(layer.bias(GATE_PROJ), vec![i]);
                add(layer.bias(UP_PROJ), vec![i]);
            }
        }
        add(layer.weight(DOWN_PROJ), vec![h, i]);
        if spec.mlp_bias {
            add(layer.bias(DOWN_PROJ), vec![h]);
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    /// The names transformers saves (docs/model-formats.md §1.3), spelled out here once more
    /// on purpose: a typo in the constants would otherwise go unnoticed until a real checkpoint.
    #[test]
    fn names_are_the_checkpoint_names() {
        let l = Layer::new(3);
        assert_eq!(l.weight(Q_PROJ), "model.layers.3.self_attn.q_proj.weight");
        assert_eq!(l.bias(DOWN_PROJ), "model.layers.3.mlp.down_proj.bias");
        assert_eq!(weight(HEAD_MODULE), LM_HEAD);
        assert!(EMBED.ends_with(&format!("{EMBED_MODULE_LEAF}.weight")));
        let spec = ModelSpec::from_json(
            Path::new("config.json"),
            serde_json::json!({"model_type": "qwen2", "hidden_size": 8, "num_hidden_layers": 1,
                "num_attention_heads": 2, "num_key_value_heads": 1, "vocab_size": 10,
                "intermediate_size": 16})
            .as_object()
            .unwrap(),
        )
        .unwrap();
        let names: Vec<String> = expected_tensors(&spec)
            .into_iter()
            .map(|(n, _)| n)
            .collect();
        assert_eq!(
            names,
            [
                "model.embed_tokens.weight",
                "model.norm.weight",
                "model.layers.0.input_layernorm.weight",
                "model.layers.0.post_attention_layernorm.weight",
                "model.layers.0.self_attn.q_proj.weight",
                "model.layers.0.self_attn.k_proj.weight",
                "model.layers.0.self_attn.v_proj.weight",
                "model.layers.0.self_attn.q_proj.bias",
                "model.layers.0.self_attn.k_proj.bias",
                "model.layers.0.self_attn.v_proj.bias",
                "model.layers.0.self_attn.o_proj.weight",
                "model.layers.0.mlp.gate_proj.weight",
                "model.layers.0.mlp.up_proj.weight",
                "model.layers.0.mlp.down_proj.weight",
            ]
        );
    }
}
