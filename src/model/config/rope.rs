//! Reading the RoPE settings of a config: the base θ, the rotated share of each head, and the
//! frequency rule with its parameters, from the v5 `rope_parameters` or the older
//! `rope_scaling` and top-level keys (docs/model-formats.md §1.2, §2.3; transformers 5.24.0
//! `modeling_rope_utils.py`). The frequencies themselves are computed in `crate::model::rope`.

use super::family::Family;
use super::json::Cfg;
use crate::error::{Error, Result};
use serde_json::{Map, Value};

/// RoPE frequency rule (docs/model-formats.md §2.3).
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

/// RoPE normalisation of v5 (docs/model-formats.md §1.2, §2.3).
pub(super) fn rope_spec(c: &Cfg, family: Family, head_dim: usize) -> Result<RopeSpec> {
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::config::spec::tests::{base, spec, with};
    use serde_json::json;

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
                // √(1 + ln 32 / ln 4096) = √(17/12) ≈ 1.190238 (docs/model-formats.md §2.3).
                assert!((attention_scaling - (17.0f64 / 12.0).sqrt()).abs() < 1e-12);
            }
            other => panic!("{other:?}"),
        }
    }
}
