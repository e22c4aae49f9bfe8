//! The supported architecture families and the per-family choices that are not plain numbers:
//! which family a config names, how its RMSNorm applies the weight, and its MLP activation
//! (docs/model-formats.md §1.2, §2.4–§2.6; transformers 5.24.0 `configuration_*.py`).

use super::json::Cfg;
use crate::error::{Error, Result};
use crate::fsutil::json_kind;
use serde_json::Value;

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

/// How RMSNorm applies its weight (docs/model-formats.md §2.1, §2.5).
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

/// The family a config names: `model_type`, else the first supported `architectures` entry;
/// every `architectures` entry must be that family's causal-LM class.
pub(super) fn detect_family(c: &Cfg) -> Result<Family> {
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

/// The activation `name` of the config field `key` (`gemma`: Gemma-1's legacy reading of
/// "gelu").
pub(super) fn parse_activation(c: &Cfg, key: &str, name: &str, gemma: bool) -> Result<Activation> {
    Ok(match name {
        "silu" | "swish" => Activation::Silu,
        "gelu_pytorch_tanh" | "gelu_new" | "gelu_fast" => Activation::GeluTanh,
        // v5 rewrites Gemma-1's legacy "gelu" to the tanh form (docs/model-formats.md §2.5).
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::config::spec::tests::{base, spec, with};
    use serde_json::json;

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
}
