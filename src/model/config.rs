//! Reading `config.json` and `generation_config.json` the way transformers 5.24 does, into one
//! [`ModelSpec`] of per-family options for the generic decoder.
//!
//! Every rule here comes from model-formats.md §1.2–§1.4 and §2.4–§2.6 (transformers 5.24.0,
//! `configuration_*.py` and `modeling_rope_utils.py`). The decoder never looks at the raw JSON:
//! family differences are spelled out as fields (norm style, activation, biases, soft-caps, ...)
//! so adding a family means filling in a spec, not writing another model.

use crate::error::{Error, Result};
use crate::fsutil::json_kind;
use serde_json::{Map, Value};
use std::path::Path;

/// A supported architecture family (`model_type`), with its transformers class name.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Family {
    Llama,
    Mistral,
    Qwen2,
    Qwen3,
    Phi3,
    Gemma,
    Gemma2,
}

impl Family {
    pub const ALL: [Family; 7] = [
        Family::Llama,
        Family::Mistral,
        Family::Qwen2,
        Family::Qwen3,
        Family::Phi3,
        Family::Gemma,
        Family::Gemma2,
    ];

    pub fn model_type(self) -> &'static str {
        match self {
            Family::Llama => "llama",
            Family::Mistral => "mistral",
            Family::Qwen2 => "qwen2",
            Family::Qwen3 => "qwen3",
            Family::Phi3 => "phi3",
            Family::Gemma => "gemma",
            Family::Gemma2 => "gemma2",
        }
    }

    pub fn architecture(self) -> &'static str {
        match self {
            Family::Llama => "LlamaForCausalLM",
            Family::Mistral => "MistralForCausalLM",
            Family::Qwen2 => "Qwen2ForCausalLM",
            Family::Qwen3 => "Qwen3ForCausalLM",
            Family::Phi3 => "Phi3ForCausalLM",
            Family::Gemma => "GemmaForCausalLM",
            Family::Gemma2 => "Gemma2ForCausalLM",
        }
    }

    fn from_model_type(s: &str) -> Option<Family> {
        Family::ALL.into_iter().find(|f| f.model_type() == s)
    }

    fn from_architecture(s: &str) -> Option<Family> {
        Family::ALL.into_iter().find(|f| f.architecture() == s)
    }

    /// "llama (LlamaForCausalLM), mistral (...), ..." for error messages.
    pub fn supported_list() -> String {
        Family::ALL
            .iter()
            .map(|f| format!("{} ({})", f.model_type(), f.architecture()))
            .collect::<Vec<_>>()
            .join(", ")
    }
}

/// How RMSNorm applies its weight (model-formats.md §2.1, §2.5).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum NormStyle {
    /// y = x·rsqrt(mean(x²)+eps), cast to the input dtype, then · w.
    Llama,
    /// y = x·rsqrt(mean(x²)+eps) · (1 + w), all in f32, then cast.
    Gemma,
}

/// The MLP activation, chosen explicitly (candle's `gelu` is the tanh form, `gelu_erf` exact).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Activation {
    /// x·σ(x) (`silu`, `swish`).
    Silu,
    /// 0.5x(1 + tanh(√(2/π)(x + 0.044715x³))) (`gelu_pytorch_tanh`, `gelu_new`, `gelu_fast`).
    GeluTanh,
    /// 0.5x(1 + erf(x/√2)) (`gelu` outside Gemma).
    GeluErf,
}

/// RoPE frequency rule (model-formats.md §2.3).
#[derive(Debug, Clone, PartialEq)]
pub enum RopeScaling {
    Default,
    Linear {
        factor: f64,
    },
    /// NTK-aware: θ is recomputed when a forward call reaches past `max_position_embeddings`.
    Dynamic {
        factor: f64,
    },
    Llama3 {
        factor: f64,
        low_freq_factor: f64,
        high_freq_factor: f64,
        original_max: f64,
    },
    Yarn {
        factor: f64,
        original_max: f64,
        beta_fast: f64,
        beta_slow: f64,
        truncate: bool,
        attention_scaling: f64,
    },
    /// Phi-3 "longrope" (also "su"): per-channel extension factors.
    LongRope {
        short_factor: Vec<f64>,
        long_factor: Vec<f64>,
        original_max: f64,
        attention_scaling: f64,
    },
}

/// Everything RoPE needs.
#[derive(Debug, Clone, PartialEq)]
pub struct RopeSpec {
    pub theta: f64,
    /// Rotated channels per head: int(head_dim · partial_rotary_factor), even.
    pub rotary_dim: usize,
    pub max_position_embeddings: usize,
    pub scaling: RopeScaling,
}

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

    /// Expected checkpoint tensors and their shapes (model-formats.md §1.3). `lm_head.weight` is
    /// not listed: the tied-embedding rules decide whether it must exist.
    pub fn expected_tensors(&self) -> Vec<(String, Vec<usize>)> {
        let (h, hd, nh, nkv, i) = (
            self.hidden_size,
            self.head_dim,
            self.num_heads,
            self.num_kv_heads,
            self.intermediate_size,
        );
        let mut out = vec![
            (
                "model.embed_tokens.weight".to_string(),
                vec![self.vocab_size, h],
            ),
            ("model.norm.weight".to_string(), vec![h]),
        ];
        for l in 0..self.num_layers {
            let p = format!("model.layers.{l}.");
            let mut add = |name: &str, shape: Vec<usize>| out.push((format!("{p}{name}"), shape));
            add("input_layernorm.weight", vec![h]);
            add("post_attention_layernorm.weight", vec![h]);
            if self.sandwich_norms {
                add("pre_feedforward_layernorm.weight", vec![h]);
                add("post_feedforward_layernorm.weight", vec![h]);
            }
            if self.fused_qkv {
                add("self_attn.qkv_proj.weight", vec![(nh + 2 * nkv) * hd, h]);
            } else {
                add("self_attn.q_proj.weight", vec![nh * hd, h]);
                add("self_attn.k_proj.weight", vec![nkv * hd, h]);
                add("self_attn.v_proj.weight", vec![nkv * hd, h]);
                if self.qkv_bias {
                    add("self_attn.q_proj.bias", vec![nh * hd]);
                    add("self_attn.k_proj.bias", vec![nkv * hd]);
                    add("self_attn.v_proj.bias", vec![nkv * hd]);
                }
            }
            add("self_attn.o_proj.weight", vec![h, nh * hd]);
            if self.o_bias {
                add("self_attn.o_proj.bias", vec![h]);
            }
            if self.qk_norm {
                add("self_attn.q_norm.weight", vec![hd]);
                add("self_attn.k_norm.weight", vec![hd]);
            }
            if self.fused_gate_up {
                add("mlp.gate_up_proj.weight", vec![2 * i, h]);
            } else {
                add("mlp.gate_proj.weight", vec![i, h]);
                add("mlp.up_proj.weight", vec![i, h]);
                if self.mlp_bias {
                    add("mlp.gate_proj.bias", vec![i]);
                    add("mlp.up_proj.bias", vec![i]);
                }
            }
            add("mlp.down_proj.weight", vec![h, i]);
            if self.mlp_bias {
                add("mlp.down_proj.bias", vec![h]);
            }
        }
        out
    }
}

/// Generation defaults (model-formats.md §1.4).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct GenerationDefaults {
    /// Stop ids; empty means no EOS stop.
    pub eos: Vec<u32>,
    /// generation_config pad id, else eos[0] (§3.2 step 4).
    pub pad: Option<u32>,
    /// Whether generation_config.json existed.
    pub from_generation_config: bool,
    /// generation_config.json `repetition_penalty`; it applies under greedy decoding too
    /// (model-formats.md §3.2). None or 1.0: no penalty.
    pub repetition_penalty: Option<f64>,
    /// generation_config.json keys that transformers would still apply under greedy decoding
    /// but liftgate does not implement (reported, not silently dropped).
    pub unsupported_keys: Vec<String>,
}

/// Logits processors transformers applies even with do_sample=False (model-formats.md §3.2).
const UNSUPPORTED_PROCESSOR_KEYS: [&str; 9] = [
    "no_repeat_ngram_size",
    "min_length",
    "min_new_tokens",
    "suppress_tokens",
    "begin_suppress_tokens",
    "bad_words_ids",
    "forced_bos_token_id",
    "forced_eos_token_id",
    "sequence_bias",
];

impl GenerationDefaults {
    /// If `<dir>/generation_config.json` exists only it is used; otherwise config.json's ids.
    pub fn load(dir: &Path, spec: &ModelSpec) -> Result<Self> {
        let path = dir.join("generation_config.json");
        if !path.exists() {
            let pad = spec.config_pad.or_else(|| spec.config_eos.first().copied());
            return Ok(GenerationDefaults {
                eos: spec.config_eos.clone(),
                pad,
                from_generation_config: false,
                repetition_penalty: None,
                unsupported_keys: Vec::new(),
            });
        }
        let text = std::fs::read_to_string(&path)
            .map_err(|e| Error::file(&path, format!("cannot read: {e}")))?;
        let value: Value = serde_json::from_str(&text)
            .map_err(|e| Error::line(&path, e.line(), format!("not valid JSON: {e}")))?;
        let obj = value
            .as_object()
            .ok_or_else(|| Error::file(&path, "expected a JSON object"))?;
        let c = Cfg { path: &path, obj };
        let eos = c.token_ids("eos_token_id")?;
        let pad = c
            .token_ids("pad_token_id")?
            .first()
            .copied()
            .or_else(|| eos.first().copied());
        let repetition_penalty = c.opt_f64("repetition_penalty")?;
        if repetition_penalty.is_some_and(|p| p <= 0.0 || !p.is_finite()) {
            return Err(Error::field(
                &path,
                None,
                "repetition_penalty",
                "must be a positive number",
            ));
        }
        Ok(GenerationDefaults {
            eos,
            pad,
            from_generation_config: true,
            repetition_penalty: repetition_penalty.filter(|&p| p != 1.0),
            unsupported_keys: UNSUPPORTED_PROCESSOR_KEYS
                .iter()
                .filter(|k| match obj.get(**k) {
                    None | Some(Value::Null) => false,
                    Some(Value::Number(n)) => n.as_f64() != Some(0.0),
                    Some(Value::Array(a)) => !a.is_empty(),
                    Some(Value::Object(o)) => !o.is_empty(),
                    Some(_) => true,
                })
                .map(|k| k.to_string())
                .collect(),
        })
    }
}

fn detect_family(c: &Cfg) -> Result<Family> {
    let archs: Vec<String> = match c.obj.get("architectures") {
        None | Some(Value::Null) => Vec::new(),
        Some(Value::Array(items)) => items
            .iter()
            .map(|v| v.as_str().map(str::to_string))
            .collect::<Option<Vec<_>>>()
            .ok_or_else(|| {
                Error::field(
                    c.path,
                    None,
                    "architectures",
                    "expected an array of strings",
                )
            })?,
        Some(other) => {
            return Err(Error::field(
                c.path,
                None,
                "architectures",
                format!("expected an array of strings, found {}", json_kind(other)),
            ))
        }
    };
    let family = match c.opt_str("model_type")? {
        Some(mt) => Family::from_model_type(mt).ok_or_else(|| {
            Error::field(
                c.path,
                None,
                "model_type",
                format!(
                    "unsupported architecture {mt:?}; supported: {}",
                    Family::supported_list()
                ),
            )
        })?,
        None => archs
            .iter()
            .find_map(|a| Family::from_architecture(a))
            .ok_or_else(|| {
                Error::field(
                    c.path,
                    None,
                    "model_type",
                    format!(
                        "missing, and `architectures` {archs:?} names no supported class; supported: {}",
                        Family::supported_list()
                    ),
                )
            })?,
    };
    if let Some(bad) = archs.iter().find(|a| a.as_str() != family.architecture()) {
        return Err(Error::field(
            c.path,
            None,
            "architectures",
            format!(
                "unsupported architecture {bad:?} for model_type {:?} (expected {}); supported: {}",
                family.model_type(),
                family.architecture(),
                Family::supported_list()
            ),
        ));
    }
    Ok(family)
}

fn parse_activation(c: &Cfg, key: &str, name: &str, gemma: bool) -> Result<Activation> {
    Ok(match name {
        "silu" | "swish" => Activation::Silu,
        "gelu_pytorch_tanh" | "gelu_new" | "gelu_fast" => Activation::GeluTanh,
        // v5 rewrites Gemma-1's legacy "gelu" to the tanh form (model-formats.md §2.5).
        "gelu" if gemma => Activation::GeluTanh,
        "gelu" => Activation::GeluErf,
        other => {
            return Err(Error::field(
                c.path,
                None,
                key,
                format!("unsupported activation {other:?}; supported: silu, swish, gelu, gelu_pytorch_tanh, gelu_new, gelu_fast"),
            ))
        }
    })
}

/// Per-layer sliding windows (model-formats.md §2.4, §2.6).
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

/// RoPE normalisation of v5 (model-formats.md §1.2, §2.3).
fn rope_spec(c: &Cfg, family: Family, head_dim: usize) -> Result<RopeSpec> {
    let empty = Map::new();
    let (dict, dict_key) = match (c.obj.get("rope_scaling"), c.obj.get("rope_parameters")) {
        (Some(Value::Object(m)), _) => (m, "rope_scaling"),
        (_, Some(Value::Object(m))) => (m, "rope_parameters"),
        _ => (&empty, "rope_parameters"),
    };
    let d = Cfg {
        path: c.path,
        obj: dict,
    };
    let field = |k: &str| format!("{dict_key}.{k}");
    let theta = match d
        .opt_f64("rope_theta")
        .map_err(|_| rope_err(c, &field("rope_theta")))?
    {
        Some(t) => t,
        None => c.opt_f64("rope_theta")?.unwrap_or(10000.0),
    };
    if !(theta.is_finite() && theta > 0.0) {
        return Err(Error::field(
            c.path,
            None,
            "rope_theta",
            format!("is {theta}; expected a positive base such as 10000"),
        ));
    }
    let partial = match d.opt_f64("partial_rotary_factor")? {
        Some(p) => p,
        None => c.opt_f64("partial_rotary_factor")?.unwrap_or(1.0),
    };
    if !(partial > 0.0 && partial <= 1.0) {
        return Err(Error::field(
            c.path,
            None,
            "partial_rotary_factor",
            "must be in (0, 1]",
        ));
    }
    let rotary_dim = (head_dim as f64 * partial) as usize;
    if rotary_dim == 0 || !rotary_dim.is_multiple_of(2) {
        return Err(Error::field(
            c.path,
            None,
            "partial_rotary_factor",
            format!("gives an odd or zero rotary dimension {rotary_dim} for head_dim {head_dim}"),
        ));
    }
    let max_pos = c
        .opt_usize("max_position_embeddings")?
        .unwrap_or(match family {
            Family::Phi3 => 4096,
            Family::Gemma | Family::Gemma2 => 8192,
            Family::Mistral => 4096 * 32,
            Family::Qwen2 | Family::Qwen3 => 32768,
            Family::Llama => 2048,
        });
    let mut rope_type = d
        .opt_str("rope_type")?
        .or(d.opt_str("type")?)
        .unwrap_or("default")
        .to_string();
    if rope_type == "su" || (family == Family::Phi3 && rope_type == "yarn") {
        rope_type = "longrope".to_string();
    }
    let original_max = || -> Result<f64> {
        if family == Family::Phi3 {
            if let Some(o) = c.opt_f64("original_max_position_embeddings")? {
                return Ok(o);
            }
        }
        Ok(d.opt_f64("original_max_position_embeddings")?
            .unwrap_or(max_pos as f64))
    };
    let factor = |required: bool| -> Result<f64> {
        match d.opt_f64("factor")? {
            Some(f) => Ok(f),
            None if required => Err(Error::field(
                c.path,
                None,
                field("factor"),
                format!("required for rope_type {rope_type:?}"),
            )),
            None => Ok(f64::NAN),
        }
    };
    let scaling = match rope_type.as_str() {
        "default" => RopeScaling::Default,
        "linear" => RopeScaling::Linear {
            factor: factor(true)?,
        },
        "dynamic" => RopeScaling::Dynamic {
            factor: factor(true)?,
        },
        "llama3" => RopeScaling::Llama3 {
            factor: factor(true)?,
            low_freq_factor: d.opt_f64("low_freq_factor")?.unwrap_or(1.0),
            high_freq_factor: d.opt_f64("high_freq_factor")?.unwrap_or(4.0),
            original_max: original_max()?,
        },
        "yarn" => {
            let o = original_max()?;
            let f = match d.opt_f64("factor")? {
                Some(f) => f,
                None => max_pos as f64 / o,
            };
            let mscale = |scale: f64, m: f64| {
                if scale <= 1.0 {
                    1.0
                } else {
                    0.1 * m * scale.ln() + 1.0
                }
            };
            let attention_scaling = match d.opt_f64("attention_factor")? {
                Some(a) => a,
                None => match (d.opt_f64("mscale")?, d.opt_f64("mscale_all_dim")?) {
                    (Some(m), Some(ma)) => mscale(f, m) / mscale(f, ma),
                    _ => mscale(f, 1.0),
                },
            };
            RopeScaling::Yarn {
                factor: f,
                original_max: o,
                beta_fast: d.opt_f64("beta_fast")?.unwrap_or(32.0),
                beta_slow: d.opt_f64("beta_slow")?.unwrap_or(1.0),
                truncate: d.opt_bool("truncate")?.unwrap_or(true),
                attention_scaling,
            }
        }
        "longrope" => {
            let o = original_max()?;
            let f = match d.opt_f64("factor")? {
                Some(f) => f,
                None => max_pos as f64 / o,
            };
            let attention_scaling = match d.opt_f64("attention_factor")? {
                Some(a) => a,
                None if f <= 1.0 => 1.0,
                None => (1.0 + f.ln() / o.ln()).sqrt(),
            };
            let list = |k: &str| -> Result<Vec<f64>> {
                let v = d.obj.get(k).and_then(Value::as_array).ok_or_else(|| {
                    Error::field(c.path, None, field(k), "required list of numbers for longrope")
                })?;
                let xs: Option<Vec<f64>> = v.iter().map(Value::as_f64).collect();
                let xs = xs.ok_or_else(|| {
                    Error::field(c.path, None, field(k), "expected a list of numbers")
                })?;
                if xs.len() != rotary_dim / 2 {
                    return Err(Error::field(
                        c.path,
                        None,
                        field(k),
                        format!("has {} entries, expected rotary_dim/2 = {}", xs.len(), rotary_dim / 2),
                    ));
                }
                Ok(xs)
            };
            RopeScaling::LongRope {
                short_factor: list("short_factor")?,
                long_factor: list("long_factor")?,
                original_max: o,
                attention_scaling,
            }
        }
        other => {
            return Err(Error::field(
                c.path,
                None,
                field("rope_type"),
                format!("unsupported RoPE type {other:?}; supported: default, linear, dynamic, llama3, yarn, longrope (su)"),
            ))
        }
    };
    Ok(RopeSpec {
        theta,
        rotary_dim,
        max_position_embeddings: max_pos,
        scaling,
    })
}

fn rope_err(c: &Cfg, field: &str) -> Error {
    Error::field(c.path, None, field, "expected a number")
}

/// Typed access to a JSON object with messages naming the file and key.
struct Cfg<'a> {
    path: &'a Path,
    obj: &'a Map<String, Value>,
}

impl Cfg<'_> {
    fn err(&self, key: &str, expected: &str, v: &Value) -> Error {
        Error::field(
            self.path,
            None,
            key,
            format!("expected {expected}, found {}", json_kind(v)),
        )
    }

    fn req_usize(&self, key: &str) -> Result<usize> {
        self.opt_usize(key)?
            .ok_or_else(|| Error::field(self.path, None, key, "required field is missing"))
    }

    fn opt_usize(&self, key: &str) -> Result<Option<usize>> {
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(None),
            Some(v) => v
                .as_u64()
                .map(|n| Some(n as usize))
                .ok_or_else(|| self.err(key, "a non-negative integer", v)),
        }
    }

    fn opt_f64(&self, key: &str) -> Result<Option<f64>> {
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(None),
            Some(v) => v
                .as_f64()
                .map(Some)
                .ok_or_else(|| self.err(key, "a number", v)),
        }
    }

    /// Absent → default; explicit null → None.
    fn opt_f64_default(&self, key: &str, default: f64) -> Result<Option<f64>> {
        match self.obj.get(key) {
            None => Ok(Some(default)),
            Some(Value::Null) => Ok(None),
            Some(_) => self.opt_f64(key),
        }
    }

    fn opt_bool(&self, key: &str) -> Result<Option<bool>> {
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(None),
            Some(Value::Bool(b)) => Ok(Some(*b)),
            Some(v) => Err(self.err(key, "true or false", v)),
        }
    }

    fn opt_str(&self, key: &str) -> Result<Option<&str>> {
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(None),
            Some(Value::String(s)) => Ok(Some(s.as_str())),
            Some(v) => Err(self.err(key, "a string", v)),
        }
    }

    /// An int or a list of ints (eos/pad ids); null or absent → empty.
    fn token_ids(&self, key: &str) -> Result<Vec<u32>> {
        let as_id = |v: &Value| {
            v.as_u64()
                .filter(|&n| n <= u32::MAX as u64)
                .map(|n| n as u32)
        };
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(Vec::new()),
            Some(Value::Array(items)) => items
                .iter()
                .map(|v| as_id(v).ok_or_else(|| self.err(key, "a token id", v)))
                .collect(),
            Some(v) => as_id(v)
                .map(|id| vec![id])
                .ok_or_else(|| self.err(key, "a token id or a list of token ids", v)),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    fn spec(v: Value) -> Result<ModelSpec> {
        ModelSpec::from_json(Path::new("config.json"), v.as_object().unwrap())
    }

    fn base(model_type: &str) -> Value {
        json!({"model_type": model_type, "hidden_size": 64, "num_hidden_layers": 4,
               "num_attention_heads": 4, "num_key_value_heads": 2, "vocab_size": 100,
               "intermediate_size": 128})
    }

    fn without(mut v: Value, k: &str) -> Value {
        v.as_object_mut().unwrap().remove(k);
        v
    }

    fn with(mut v: Value, k: &str, x: Value) -> Value {
        v.as_object_mut().unwrap().insert(k.into(), x);
        v
    }

    // Class defaults below are from transformers 5.24.0 configuration_*.py (model-formats.md §1.2).
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

    #[test]
    fn rope_normalisation() {
        // Legacy top-level theta + rope_scaling with the "type" key.
        let v = with(base("llama"), "rope_theta", json!(500000.0));
        let v = with(v, "rope_scaling", json!({"type": "linear", "factor": 2.0}));
        let s = spec(v).unwrap().rope;
        assert_eq!(s.theta, 500000.0);
        assert_eq!(s.scaling, RopeScaling::Linear { factor: 2.0 });
        // v5 rope_parameters; llama3 takes original_max from the dict when present.
        let v = with(
            base("llama"),
            "rope_parameters",
            json!({"rope_type": "llama3", "rope_theta": 5e5, "factor": 8.0, "low_freq_factor": 1.0,
                   "high_freq_factor": 4.0, "original_max_position_embeddings": 8192}),
        );
        match spec(v).unwrap().rope.scaling {
            RopeScaling::Llama3 { original_max, .. } => assert_eq!(original_max, 8192.0),
            other => panic!("{other:?}"),
        }
        // Phi-3 "su" is longrope; the top-level original_max wins; partial rotary.
        let v = with(base("phi3"), "partial_rotary_factor", json!(0.5));
        let v = with(v, "original_max_position_embeddings", json!(4096));
        let v = with(v, "max_position_embeddings", json!(131072));
        let v = with(
            v,
            "rope_scaling",
            json!({"type": "su", "short_factor": [1.0, 1.0, 1.0, 1.0], "long_factor": [2.0, 2.0, 2.0, 2.0],
                   "original_max_position_embeddings": 1}),
        );
        let s = spec(v).unwrap().rope;
        assert_eq!(s.rotary_dim, 8);
        match s.scaling {
            RopeScaling::LongRope {
                original_max,
                attention_scaling,
                ..
            } => {
                assert_eq!(original_max, 4096.0);
                // √(1 + ln 32 / ln 4096) = √(17/12) ≈ 1.190238 (model-formats.md §2.3).
                assert!((attention_scaling - (17.0f64 / 12.0).sqrt()).abs() < 1e-12);
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn unsupported_architecture_lists_supported() {
        let err = spec(base("gpt2")).unwrap_err().to_string();
        assert!(err.contains("model_type") && err.contains("qwen3"), "{err}");
        let v = with(
            base("llama"),
            "architectures",
            json!(["LlamaForSequenceClassification"]),
        );
        let err = spec(v).unwrap_err().to_string();
        assert!(err.contains("LlamaForCausalLM"), "{err}");
        let mut v = base("llama");
        v.as_object_mut().unwrap().remove("model_type");
        let v = with(v, "architectures", json!(["Qwen2ForCausalLM"]));
        assert_eq!(spec(v).unwrap().family, Family::Qwen2);
    }

    #[test]
    fn gemma_options() {
        let s = spec(base("gemma2")).unwrap();
        assert_eq!(s.attn_softcap, Some(50.0));
        assert_eq!(s.final_softcap, Some(30.0));
        assert_eq!(s.attn_scale, 1.0 / 16.0);
        assert_eq!(s.embed_scale, Some(8.0));
        assert_eq!(s.activation, Activation::GeluTanh);
        let v = with(base("gemma"), "hidden_act", json!("gelu"));
        assert_eq!(spec(v).unwrap().activation, Activation::GeluTanh);
        let v = with(base("llama"), "hidden_act", json!("gelu"));
        assert_eq!(spec(v).unwrap().activation, Activation::GeluErf);
    }

    #[test]
    fn generation_config_wins_when_present() {
        let dir = tempfile::tempdir().unwrap();
        let s = spec(with(base("llama"), "eos_token_id", json!([2, 3]))).unwrap();
        let g = GenerationDefaults::load(dir.path(), &s).unwrap();
        assert_eq!(g.eos, vec![2, 3]);
        std::fs::write(
            dir.path().join("generation_config.json"),
            "{\"bos_token_id\": 1}",
        )
        .unwrap();
        let g = GenerationDefaults::load(dir.path(), &s).unwrap();
        assert!(g.eos.is_empty());
        std::fs::write(
            dir.path().join("generation_config.json"),
            "{\"eos_token_id\": 7}",
        )
        .unwrap();
        assert_eq!(
            GenerationDefaults::load(dir.path(), &s).unwrap().eos,
            vec![7]
        );
        std::fs::write(
            dir.path().join("generation_config.json"),
            r#"{"repetition_penalty": 1.05, "no_repeat_ngram_size": 3, "suppress_tokens": []}"#,
        )
        .unwrap();
        let g = GenerationDefaults::load(dir.path(), &s).unwrap();
        assert_eq!(g.repetition_penalty, Some(1.05));
        assert_eq!(g.unsupported_keys, vec!["no_repeat_ngram_size".to_string()]);
    }
}
