//! `adapter_model.safetensors`: the adapter's tensors sorted into LoRA modules (A, B, the
//! optional lora_B bias and DoRA magnitude) and full tensors that replace base tensors
//! (docs/model-formats.md §5.2; peft 0.21.2 `peft/utils/save_and_load.py`).

use super::config::Config;
use crate::error::{Error, Result};
use candle_core::{DType, Tensor};
use std::collections::{BTreeMap, HashMap};
use std::path::Path;

/// The weights file peft writes.
pub const WEIGHTS_FILE: &str = "adapter_model.safetensors";

/// Prefix peft puts before every checkpoint name in an adapter file.
pub(super) const KEY_PREFIX: &str = "base_model.model.";

/// One adapted module: its f32 LoRA factors and resolved scaling.
/// Whether a LoRA module wraps an nn.Linear or an nn.Embedding.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ModuleKind {
    Linear,
    Embedding,
}

impl serde::Serialize for ModuleKind {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        s.serialize_str(match self {
            ModuleKind::Linear => "linear",
            ModuleKind::Embedding => "embedding",
        })
    }
}

#[derive(Debug, Clone)]
pub(super) struct LoraModule {
    pub(super) kind: ModuleKind,
    /// Linear: A [r, in], B [out, r]. Embedding: A_e [r, vocab], B_e [hidden, r].
    pub(super) a: Tensor,
    pub(super) b: Tensor,
    pub(super) a_key: String,
    pub(super) b_key: String,
    /// `lora_B.bias` [out] with lora_bias.
    pub(super) b_bias: Option<(String, Tensor)>,
    /// DoRA `lora_magnitude_vector`: [out] for Linear, [hidden] for Embedding.
    pub(super) magnitude: Option<(String, Tensor)>,
    pub(super) rank: usize,
    pub(super) alpha: f64,
    pub(super) scaling: f64,
}

/// A full tensor of the adapter that overwrites a base tensor.
#[derive(Debug, Clone)]
pub(super) struct Replacement {
    /// The key in adapter_model.safetensors.
    pub(super) key: String,
    /// The base checkpoint name it maps to.
    pub(super) target: String,
    /// The key had `.base_layer.`: a copy of the wrapped layer itself, not a separate module.
    pub(super) base_layer: bool,
    pub(super) tensor: Tensor,
}

/// Which part of a LoRA module an adapter key holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Part {
    A,
    B,
    BBias,
    EmbA,
    EmbB,
    Magnitude,
}

const PARTS: [(&str, Part); 7] = [
    (".lora_A.weight", Part::A),
    (".lora_B.weight", Part::B),
    (".lora_B.bias", Part::BBias),
    (".lora_embedding_A", Part::EmbA),
    (".lora_embedding_B", Part::EmbB),
    (".lora_magnitude_vector", Part::Magnitude),
    // older peft releases saved the magnitude as a sub-module parameter
    (".lora_magnitude_vector.weight", Part::Magnitude),
];

pub(super) type Parsed = (BTreeMap<String, LoraModule>, Vec<Replacement>);

/// Sorts the adapter's tensors into LoRA modules (checked against each other and against the
/// config's rank, DoRA and lora_bias settings) and full replacement tensors.
pub(super) fn parse_tensors(
    config_path: &Path,
    weights_path: &Path,
    config: &Config,
    tensors: HashMap<String, Tensor>,
) -> Result<Parsed> {
    let tensor_err = |key: &str, msg: String| Error::field(weights_path, None, key, msg);
    let mut parts: BTreeMap<String, BTreeMap<&'static str, (Part, String, Tensor)>> =
        BTreeMap::new();
    let mut replacements = Vec::new();
    let mut keys: Vec<String> = tensors.keys().cloned().collect();
    keys.sort();
    let mut tensors = tensors;
    for key in keys {
        let Some(tensor) = tensors.remove(&key) else {
            continue;
        };
        let Some(name) = key.strip_prefix(KEY_PREFIX) else {
            return Err(tensor_err(
                &key,
                format!("unexpected tensor name: peft adapter keys start with `{KEY_PREFIX}`"),
            ));
        };
        let tensor = match tensor.dtype() {
            DType::F32 => tensor,
            DType::F16 | DType::BF16 | DType::F64 => tensor.to_dtype(DType::F32)?,
            other => {
                return Err(tensor_err(
                    &key,
                    format!("dtype {other:?} is not supported; expected F32, BF16 or F16 (quantised adapters are not read)"),
                ))
            }
        };
        if let Some((suffix, part)) = PARTS.iter().find(|(s, _)| name.ends_with(s)) {
            let module = &name[..name.len() - suffix.len()];
            let slot = match part {
                Part::A | Part::EmbA => "A",
                Part::B | Part::EmbB => "B",
                Part::BBias => "bias",
                Part::Magnitude => "magnitude",
            };
            let entry = parts.entry(module.to_string()).or_default();
            if entry.insert(slot, (*part, key.clone(), tensor)).is_some() {
                return Err(tensor_err(
                    &key,
                    format!("module `{module}` has this LoRA tensor twice"),
                ));
            }
        } else if name.contains(".lora_") || name.starts_with("lora_") {
            return Err(tensor_err(
                &key,
                "unrecognised LoRA tensor (expected …lora_A.weight, …lora_B.weight, …lora_B.bias, …lora_embedding_A/B or …lora_magnitude_vector; a key that still carries the adapter name was not saved by peft's save_pretrained)".into(),
            ));
        } else {
            let base_layer = name.contains(".base_layer.");
            let target = name.replace(".base_layer.", ".");
            replacements.push(Replacement {
                key,
                target,
                base_layer,
                tensor,
            });
        }
    }

    let mut modules = BTreeMap::new();
    for (module, mut slots) in parts {
        let (a_part, a_key, a) = slots.remove("A").ok_or_else(|| {
            Error::file(
                weights_path,
                format!("module `{module}` has a LoRA B tensor but no lora_A"),
            )
        })?;
        let (b_part, b_key, b) = slots.remove("B").ok_or_else(|| {
            Error::field(
                weights_path,
                None,
                &a_key,
                format!("module `{module}` has lora_A but no lora_B"),
            )
        })?;
        let kind = match (a_part, b_part) {
            (Part::A, Part::B) => ModuleKind::Linear,
            (Part::EmbA, Part::EmbB) => ModuleKind::Embedding,
            _ => {
                return Err(tensor_err(
                    &b_key,
                    format!("module `{module}` mixes Linear (lora_A/lora_B) and Embedding (lora_embedding_A/B) tensors"),
                ))
            }
        };
        let b_bias = slots.remove("bias").map(|(_, k, t)| (k, t));
        let magnitude = slots.remove("magnitude").map(|(_, k, t)| (k, t));

        let (a_dims, b_dims) = (a.dims().to_vec(), b.dims().to_vec());
        if a_dims.len() != 2 || b_dims.len() != 2 || a_dims[0] != b_dims[1] {
            return Err(tensor_err(
                &b_key,
                format!("shape {b_dims:?} does not pair with `{a_key}` of shape {a_dims:?}: expected A [r, in] and B [out, r] with the same r"),
            ));
        }
        let rank = config.rank_for(&module);
        if a_dims[0] != rank {
            return Err(Error::field(
                config_path,
                None,
                if config.rank_pattern.iter().any(|(_, re, _)| re.is_match(&module)) {
                    "rank_pattern"
                } else {
                    "r"
                },
                format!(
                    "gives rank {rank} for `{module}`, but {} holds `{a_key}` with rank {} (shape {a_dims:?})",
                    WEIGHTS_FILE, a_dims[0]
                ),
            ));
        }
        let out = b_dims[0];
        match (&b_bias, config.lora_bias, kind) {
            (Some((k, t)), true, ModuleKind::Linear) => {
                if t.dims() != [out] {
                    return Err(tensor_err(k, format!("shape {:?}, expected [{out}] (the rows of `{b_key}`)", t.dims())));
                }
            }
            (Some((k, _)), _, _) => {
                return Err(tensor_err(
                    k,
                    "a lora_B bias is present but adapter_config.json has lora_bias false (or the module is an embedding)".into(),
                ))
            }
            (None, true, ModuleKind::Linear) => {
                return Err(Error::field(
                    config_path,
                    None,
                    "lora_bias",
                    format!("is true, but {WEIGHTS_FILE} has no `{KEY_PREFIX}{module}.lora_B.bias`"),
                ))
            }
            (None, _, _) => {}
        }
        let mag_len = match kind {
            ModuleKind::Linear => out,
            ModuleKind::Embedding => b_dims[0],
        };
        match (&magnitude, config.use_dora) {
            (Some((k, t)), true) => {
                if t.dims() != [mag_len] {
                    return Err(tensor_err(
                        k,
                        format!("shape {:?}, expected [{mag_len}] (one magnitude per {})", t.dims(), match kind {
                            ModuleKind::Linear => "output row",
                            ModuleKind::Embedding => "hidden column",
                        }),
                    ));
                }
            }
            (Some((k, _)), false) => {
                return Err(tensor_err(
                    k,
                    "a DoRA magnitude vector is present but adapter_config.json has use_dora false".into(),
                ))
            }
            (None, true) => {
                return Err(Error::field(
                    config_path,
                    None,
                    "use_dora",
                    format!("is true, but {WEIGHTS_FILE} has no `{KEY_PREFIX}{module}.lora_magnitude_vector`"),
                ))
            }
            (None, false) => {}
        }
        let alpha = config.alpha_for(&module);
        modules.insert(
            module.clone(),
            LoraModule {
                kind,
                a,
                b,
                a_key,
                b_key,
                b_bias,
                magnitude,
                rank,
                alpha,
                scaling: config.scaling(rank, alpha),
            },
        );
    }
    Ok((modules, replacements))
}
