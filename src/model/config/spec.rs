//! `config.json` → [`ModelSpec`]: sizes, per-family defaults and options, and the attention
//! window of each layer (docs/model-formats.md §1.2, §2.4–§2.6; transformers 5.24.0
//! `configuration_*.py`).

use super::family::{detect_family, parse_activation, Activation, Family, NormStyle};
use super::json::Cfg;
use super::rope::{rope_spec, RopeSpec};
use crate::error::{Error, Result};
use crate::fsutil::json_kind;
use serde_json::{Map, Value};
use std::path::Path;

/// One model's architecture, normalised across families.
#[derive(Debug, Clone, PartialEq)]
pub struct ModelSpec {
    pub family: Family,
    pub vocab_size: usize,
    pub hidden_size: usize,
    pub intermediate_size: usize,
    pub num_layers: usize,
    pub num_heads: usize,
    pub num_kv_heads: usize,
    pub head_dim: usize,
    pub rms_norm_eps: f64,
    pub norm_style: NormStyle,
    pub activation: Activation,
    /// Bias on q, k and v projections.
    pub qkv_bias: bool,
    /// Bias on o_proj.
    pub o_bias: bool,
    /// Bias on gate, up and down.
    pub mlp_bias: bool,
    /// Qwen3: per-head RMSNorm on q and k before RoPE.
    pub qk_norm: bool,
    /// Phi-3: `qkv_proj` rows [q | k | v].
    pub fused_qkv: bool,
    /// Phi-3: `gate_up_proj` rows [gate | up].
    pub fused_gate_up: bool,
    /// Gemma/Gemma2: embeddings · √hidden (rounded to the compute dtype, f32 here).
    pub embed_scale: Option<f64>,
    /// Gemma2: four norms per layer (post-attention and pre/post-feed-forward).
    pub sandwich_norms: bool,
    /// Multiplier of q·kᵀ: head_dim^-0.5, or query_pre_attn_scalar^-0.5 for Gemma2.
    pub attn_scale: f64,
    pub attn_softcap: Option<f64>,
    pub final_softcap: Option<f64>,
    /// Per layer: the sliding window W (each query sees W keys including itself), or None.
    pub layer_windows: Vec<Option<usize>>,
    pub rope: RopeSpec,
    pub tie_word_embeddings: bool,
    /// Non-null eos ids of config.json (used only without generation_config.json).
    pub config_eos: Vec<u32>,
    pub config_pad: Option<u32>,
}

impl ModelSpec {
    /// The sizes a tensor's shape follows from, for messages about a shape that does not fit:
    /// `hidden_size 64, heads 4, kv heads 2, head_dim 16, intermediate_size 128, vocab_size 99`.
    pub fn sizes(&self) -> String {
        format!(
            "hidden_size {}, heads {}, kv heads {}, head_dim {}, intermediate_size {}, vocab_size {}",
            self.hidden_size,
            self.num_heads,
            self.num_kv_heads,
            self.head_dim,
            self.intermediate_size,
            self.vocab_size
        )
    }

    /// Reads `<dir>/config.json`.
    pub fn load(dir: &Path) -> Result<Self> {
        let path = dir.join("config.json");
        let text = std::fs::read_to_string(&path).map_err(|e| {
            Error::file(
                &path,
                format!(
                    "cannot read the model config ({e}); is this a Hugging Face model directory?"
                ),
            )
        })?;
        let value: Value = serde_json::from_str(&text)
            .map_err(|e| Error::line(&path, e.line(), format!("not valid JSON: {e}")))?;
        let obj = value
            .as_object()
            .ok_or_else(|| Error::file(&path, "expected a JSON object"))?;
        Self::from_json(&path, obj)
    }

    /// Builds the spec from a parsed config object; `path` is only for messages.
    pub fn from_json(path: &Path, obj: &Map<String, Value>) -> Result<Self> {
        let c = Cfg { path, obj };
        let family = detect_family(&c)?;
        let hidden_size = c.req_usize("hidden_size")?;
        let num_layers = c.req_usize("num_hidden_layers")?;
        let num_heads = c.req_usize("num_attention_heads")?;
        let vocab_size = c.req_usize("vocab_size")?;
        let intermediate_size = c.req_usize("intermediate_size")?;
        if hidden_size == 0 || num_layers == 0 || num_heads == 0 || vocab_size == 0 {
            return Err(Error::file(
                path,
                "hidden_size, num_hidden_layers, num_attention_heads and vocab_size must be positive",
            ));
        }
        let head_dim = match c.opt_usize("head_dim")? {
            Some(h) => h,
            None => match family {
                Family::Qwen3 => 128,
                Family::Gemma | Family::Gemma2 => 256,
                _ => hidden_size / num_heads,
            },
        };
        let num_kv_heads = match c.obj.get("num_key_value_heads") {
            Some(Value::Null) => num_heads,
            Some(_) => c.req_usize("num_key_value_heads")?,
            None => match family {
                Family::Llama | Family::Phi3 => num_heads,
                Family::Mistral => 8,
                Family::Qwen2 | Family::Qwen3 => 32,
                Family::Gemma => 16,
                Family::Gemma2 => 4,
            },
        };
        if num_kv_heads == 0 || num_heads % num_kv_heads != 0 {
            return Err(Error::field(
                path,
                None,
                "num_key_value_heads",
                format!("{num_kv_heads} does not divide num_attention_heads {num_heads}"),
            ));
        }
        if head_dim == 0 {
            return Err(Error::field(path, None, "head_dim", "must be positive"));
        }
        let default_eps = match family {
            Family::Phi3 => 1e-5,
            _ => 1e-6,
        };
        let rms_norm_eps = c.opt_f64("rms_norm_eps")?.unwrap_or(default_eps);
        if !(rms_norm_eps.is_finite() && rms_norm_eps >= 0.0) {
            // A negative epsilon takes the square root of a negative number: NaN everywhere.
            return Err(Error::field(
                path,
                None,
                "rms_norm_eps",
                format!("is {rms_norm_eps}; expected a small non-negative number such as 1e-6"),
            ));
        }

        let activation = match family {
            Family::Gemma2 => {
                let name = c
                    .opt_str("hidden_activation")?
                    .unwrap_or("gelu_pytorch_tanh");
                parse_activation(&c, "hidden_activation", name, false)?
            }
            Family::Gemma => {
                let name = c.opt_str("hidden_act")?.unwrap_or("gelu_pytorch_tanh");
                parse_activation(&c, "hidden_act", name, true)?
            }
            _ => {
                let name = c.opt_str("hidden_act")?.unwrap_or("silu");
                parse_activation(&c, "hidden_act", name, false)?
            }
        };

        let attention_bias = c.opt_bool("attention_bias")?.unwrap_or(false);
        let (qkv_bias, o_bias, mlp_bias) = match family {
            Family::Llama => (
                attention_bias,
                attention_bias,
                c.opt_bool("mlp_bias")?.unwrap_or(false),
            ),
            Family::Qwen2 => (true, false, false),
            Family::Qwen3 => (attention_bias, attention_bias, false),
            Family::Gemma | Family::Gemma2 => (attention_bias, attention_bias, false),
            Family::Mistral | Family::Phi3 => (false, false, false),
        };

        let tie_word_embeddings = c
            .opt_bool("tie_word_embeddings")?
            .unwrap_or(matches!(family, Family::Gemma | Family::Gemma2));

        let layer_windows = sliding_windows(&c, family, num_layers)?;

        let attn_scale = match family {
            Family::Gemma2 => {
                let q = c.opt_f64("query_pre_attn_scalar")?.unwrap_or(256.0);
                if q <= 0.0 {
                    return Err(Error::field(
                        path,
                        None,
                        "query_pre_attn_scalar",
                        "must be positive",
                    ));
                }
                q.powf(-0.5)
            }
            _ => (head_dim as f64).powf(-0.5),
        };
        let (attn_softcap, final_softcap) = match family {
            Family::Gemma2 => (
                c.opt_f64_default("attn_logit_softcapping", 50.0)?,
                c.opt_f64_default("final_logit_softcapping", 30.0)?,
            ),
            _ => (None, None),
        };
        let embed_scale = match family {
            // Rounded to the compute dtype (f32) like the buffer transformers casts.
            Family::Gemma | Family::Gemma2 => Some((hidden_size as f64).sqrt() as f32 as f64),
            _ => None,
        };

        let rope = rope_spec(&c, family, head_dim)?;
        let config_eos = c.token_ids("eos_token_id")?;
        let config_pad = c.token_ids("pad_token_id")?.first().copied();

        Ok(ModelSpec {
            family,
            vocab_size,
            hidden_size,
            intermediate_size,
            num_layers,
            num_heads,
            num_kv_heads,
            head_dim,
            rms_norm_eps,
            norm_style: match family {
                Family::Gemma | Family::Gemma2 => NormStyle::Gemma,
                _ => NormStyle::Llama,
            },
            activation,
            qkv_bias,
            o_bias,
            mlp_bias,
            qk_norm: family == Family::Qwen3,
            fused_qkv: family == Family::Phi3,
            fused_gate_up: family == Family::Phi3,
            embed_scale,
            sandwich_norms: family == Family::Gemma2,
            attn_scale,
            attn_softcap,
            final_softcap,
            layer_windows,
            rope,
            tie_word_embeddings,
            config_eos,
            config_pad,
        })
    }
}

/// Per-layer sliding windows (docs/model-formats.md §2.4, §2.6).
fn sliding_windows(c: &Cfg, family: Family, n: usize) -> Result<Vec<Option<usize>>> {
    let layer_types = match c.obj.get("layer_types") {
        None | Some(Value::Null) => None,
        Some(Value::Array(items)) => {
            if items.len() != n {
                return Err(Error::field(
                    c.path,
                    None,
                    "layer_types",
                    format!("has {} entries but num_hidden_layers is {n}", items.len()),
                ));
            }
            let mut sliding = Vec::with_capacity(n);
            for (i, item) in items.iter().enumerate() {
                match item.as_str() {
                    Some("sliding_attention") => sliding.push(true),
                    Some("full_attention") => sliding.push(false),
                    _ => {
                        return Err(Error::field(
                            c.path,
                            None,
                            format!("layer_types[{i}]"),
                            "expected \"sliding_attention\" or \"full_attention\"",
                        ))
                    }
                }
            }
            Some(sliding)
        }
        Some(other) => {
            return Err(Error::field(
                c.path,
                None,
                "layer_types",
                format!("expected an array, found {}", json_kind(other)),
            ))
        }
    };
    // The window value itself: absent keys take the class default, explicit null disables.
    let window = |default: Option<usize>| -> Result<Option<usize>> {
        match c.obj.get("sliding_window") {
            None => Ok(default),
            Some(Value::Null) => Ok(None),
            Some(_) => c.req_usize("sliding_window").map(Some),
        }
    };
    Ok(match family {
        Family::Llama | Family::Gemma => vec![None; n],
        Family::Mistral => vec![window(Some(4096))?; n],
        Family::Phi3 => vec![window(None)?; n],
        Family::Qwen2 | Family::Qwen3 => {
            let use_sw = c.opt_bool("use_sliding_window")?.unwrap_or(false);
            let w = if use_sw { window(Some(4096))? } else { None };
            match (w, layer_types) {
                (None, _) => vec![None; n],
                (Some(w), Some(types)) => types.iter().map(|&s| s.then_some(w)).collect(),
                (Some(w), None) => {
                    let mwl = c.opt_usize("max_window_layers")?.unwrap_or(28);
                    (0..n).map(|i| (i >= mwl).then_some(w)).collect()
                }
            }
        }
        Family::Gemma2 => {
            let w = window(Some(4096))?;
            let types = layer_types.unwrap_or_else(|| (0..n).map(|i| (i + 1) % 2 == 1).collect());
            match w {
                None => vec![None; n],
                Some(w) => types.iter().map(|&s| s.then_some(w)).collect(),
            }
        }
    })
}

// Also the helpers of the other config tests: a spec from JSON and a small base config.
#[cfg(test)]
pub(super) mod tests {
    use super::*;
    use serde_json::json;

    pub(in crate::model::config) fn spec(v: Value) -> Result<ModelSpec> {
        ModelSpec::from_json(Path::new("config.json"), v.as_object().unwrap())
    }

    pub(in crate::model::config) fn base(model_type: &str) -> Value {
        json!({"model_type": model_type, "hidden_size": 64, "num_hidden_layers": 4,
               "num_attention_heads": 4, "num_key_value_heads": 2, "vocab_size": 100,
               "intermediate_size": 128})
    }

    fn without(mut v: Value, k: &str) -> Value {
        v.as_object_mut().unwrap().remove(k);
        v
    }

    pub(in crate::model::config) fn with(mut v: Value, k: &str, x: Value) -> Value {
        v.as_object_mut().unwrap().insert(k.into(), x);
        v
    }

    // Class defaults below are from transformers 5.24.0 configuration_*.py
    // (docs/model-formats.md §1.2).
    #[test]
    fn head_dim_and_kv_head_defaults_per_family() {
        assert_eq!(spec(base("llama")).unwrap().head_dim, 16);
        assert_eq!(spec(base("qwen3")).unwrap().head_dim, 128);
        assert_eq!(spec(base("gemma")).unwrap().head_dim, 256);
        assert_eq!(spec(base("gemma2")).unwrap().head_dim, 256);
        assert_eq!(spec(base("llama")).unwrap().num_kv_heads, 2);
        let v = without(base("llama"), "num_key_value_heads");
        assert_eq!(spec(v).unwrap().num_kv_heads, 4);
        let v = without(base("mistral"), "num_key_value_heads");
        let v = with(v, "num_attention_heads", json!(16));
        assert_eq!(spec(v).unwrap().num_kv_heads, 8);
        let v = with(base("llama"), "num_key_value_heads", Value::Null);
        assert_eq!(spec(v).unwrap().num_kv_heads, 4);
        assert!(spec(base("gemma")).unwrap().tie_word_embeddings);
        assert!(!spec(base("qwen2")).unwrap().tie_word_embeddings);
    }

    #[test]
    fn sliding_window_rules() {
        // Mistral: absent key → 4096 on every layer; explicit null → full attention.
        assert_eq!(
            spec(base("mistral")).unwrap().layer_windows,
            vec![Some(4096); 4]
        );
        let v = with(base("mistral"), "sliding_window", Value::Null);
        assert_eq!(spec(v).unwrap().layer_windows, vec![None; 4]);
        // Qwen2: ignored unless use_sliding_window; then layers >= max_window_layers slide.
        let v = with(base("qwen2"), "sliding_window", json!(8));
        assert_eq!(spec(v.clone()).unwrap().layer_windows, vec![None; 4]);
        let v = with(
            with(v, "use_sliding_window", json!(true)),
            "max_window_layers",
            json!(2),
        );
        assert_eq!(
            spec(v.clone()).unwrap().layer_windows,
            vec![None, None, Some(8), Some(8)]
        );
        let v = with(
            v,
            "layer_types",
            json!([
                "sliding_attention",
                "full_attention",
                "full_attention",
                "full_attention"
            ]),
        );
        assert_eq!(
            spec(v).unwrap().layer_windows,
            vec![Some(8), None, None, None]
        );
        // Gemma2: sliding on even layers by default.
        let v = with(base("gemma2"), "sliding_window", json!(5));
        assert_eq!(
            spec(v).unwrap().layer_windows,
            vec![Some(5), None, Some(5), None]
        );
    }
}
