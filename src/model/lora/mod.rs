//! PEFT LoRA adapters: reading `adapter_config.json` + `adapter_model.safetensors` and merging
//! them into the base weights at load time.
//!
//! The rules follow peft 0.21.2 (`peft/tuners/lora/{config,layer,variants,dora,model}.py`,
//! `peft/utils/{save_and_load,other}.py`, `peft/tuners/tuners_utils.py`) as summarised in
//! docs/model-formats.md §5, and the tests compare the result with peft's own
//! `PeftModel.from_pretrained(base, dir).merge_and_unload()` (tests/reference/make_lora_fixtures.py).
//!
//! What the merge does, in order:
//! 1. **Replacements.** Every non-LoRA tensor of the adapter (a `modules_to_save` copy, a bias
//!    trained with `bias="all"`/`"lora_only"`, a `.base_layer.` full copy of a targeted
//!    embedding or head) overwrites the base tensor it names, after `base_model.model.` and
//!    `.base_layer` are stripped from its key.
//! 2. **LoRA modules.** With s = α/r (or α/√r with `use_rslora`), r and α resolved through
//!    `rank_pattern`/`alpha_pattern`:
//!    Linear W' = W + s·(B·A), b' = b + s·b_B with `lora_bias`;
//!    Embedding E' = E + s·(B_e·A_e)ᵀ;
//!    DoRA (`use_dora`): V = W + ΔW, then every output row (Linear) or every hidden column
//!    (Embedding) of V is rescaled to the trained magnitude m: W' = (m / ‖V‖₂) · V.
//!    ΔW is computed in f32 whatever dtype the adapter was stored in (peft's
//!    `autocast_adapter_dtype=True` upcasts on load) and added to the base with one rounding.
//!
//! Which modules carry adapters is decided by the tensors in the file. The config is still
//! checked against the base so that an adapter made for another model fails loudly instead of
//! merging partially: every adapter tensor must map to a base tensor of the right shape, every
//! module with LoRA tensors must be one the config selects, every module the config selects
//! must have its tensors, and every name in `target_modules` must exist in the base.
//!
//! Tied embeddings (`tie_word_embeddings` and no `lm_head.weight`): peft merges an `lm_head`
//! LoRA into the one shared tensor, so after the merge the *input embeddings* change too (this
//! differs from peft's unmerged forward pass, where only the head's output changes). liftgate
//! mirrors the merged model, since that is what gets shipped. A `modules_to_save` copy of the
//! head or of the embeddings gives that module its own tensor and unties the pair.
//!
//! `config` reads adapter_config.json and decides which modules it selects, `tensors` sorts the
//! adapter's tensors, `merge` applies them to the base.

mod config;
mod merge;
mod tensors;
#[cfg(test)]
mod tests;

pub use config::Config;
pub use merge::merge;

use crate::error::{Error, Result};
use candle_core::Device;
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use tensors::{parse_tensors, LoraModule, Replacement};

/// File names peft writes.
pub const CONFIG_FILE: &str = "adapter_config.json";
pub const WEIGHTS_FILE: &str = "adapter_model.safetensors";
const PICKLE_FILE: &str = "adapter_model.bin";

/// Whether a LoRA module wraps an nn.Linear or an nn.Embedding.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ModuleKind {
    Linear,
    Embedding,
}

/// A parsed, self-consistent adapter directory. Nothing about the base is known yet; `merge`
/// checks the fit.
#[derive(Debug)]
pub struct Adapter {
    config_path: PathBuf,
    weights_path: PathBuf,
    config: Config,
    /// By module name (checkpoint name without `.weight`), sorted.
    modules: BTreeMap<String, LoraModule>,
    /// Sorted by adapter key.
    replacements: Vec<Replacement>,
    fingerprint: String,
}

/// One merged module, for run.json.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct MergedModule {
    pub name: String,
    pub kind: ModuleKind,
    pub rank: usize,
    pub alpha: f64,
    pub scaling: f64,
    pub dora: bool,
    /// The base tensor that received ΔW (the embeddings for an `lm_head` LoRA on a tied model).
    pub into: String,
}

impl serde::Serialize for ModuleKind {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        s.serialize_str(match self {
            ModuleKind::Linear => "linear",
            ModuleKind::Embedding => "embedding",
        })
    }
}

/// What the merge did (for run.json and messages).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct MergeSummary {
    pub modules_merged: usize,
    /// Base tensors overwritten (or added) by full copies from the adapter, sorted.
    pub replaced: Vec<String>,
    pub modules: Vec<MergedModule>,
    /// `lm_head.weight` was added to the map (a modules_to_save copy untied the embeddings).
    pub untied: bool,
    /// An `lm_head` LoRA or copy went into the shared embedding tensor of a tied model.
    pub head_merged_into_embeddings: bool,
}

impl Adapter {
    /// Reads adapter_config.json and adapter_model.safetensors from `dir`.
    ///
    /// Refuses a pickled adapter_model.bin, unsupported variants and options, and files whose
    /// tensors disagree with each other or with the config (rank, DoRA, lora_bias).
    pub fn load(dir: &Path) -> Result<Self> {
        let config_path = dir.join(CONFIG_FILE);
        let weights_path = dir.join(WEIGHTS_FILE);
        if !dir.is_dir() {
            return Err(Error::file(dir, "adapter directory not found"));
        }
        let config_bytes = std::fs::read(&config_path).map_err(|e| {
            Error::file(
                &config_path,
                format!("cannot read the adapter config ({e}); a peft adapter directory holds {CONFIG_FILE} and {WEIGHTS_FILE}"),
            )
        })?;
        if !weights_path.exists() && dir.join(PICKLE_FILE).exists() {
            return Err(Error::file(
                dir.join(PICKLE_FILE),
                format!(
                    "pickled adapter weights are not read (loading a pickle can run code); \
                     save the adapter as {WEIGHTS_FILE} (peft `save_pretrained` with \
                     safe_serialization=True, the default)"
                ),
            ));
        }
        let weights_bytes = std::fs::read(&weights_path).map_err(|e| {
            Error::file(
                &weights_path,
                format!("cannot read the adapter weights: {e}"),
            )
        })?;
        let fingerprint = fingerprint(&config_bytes, &weights_bytes);

        let config = Config::parse(&config_path, &config_bytes)?;

        let tensors =
            candle_core::safetensors::load_buffer(&weights_bytes, &Device::Cpu).map_err(|e| {
                Error::file(
                    &weights_path,
                    format!("not a readable safetensors file: {e}"),
                )
            })?;
        drop(weights_bytes);
        let (modules, replacements) = parse_tensors(&config_path, &weights_path, &config, tensors)?;
        if modules.is_empty() && replacements.is_empty() {
            return Err(Error::file(&weights_path, "the adapter holds no tensors"));
        }
        Ok(Adapter {
            config_path,
            weights_path,
            config,
            modules,
            replacements,
            fingerprint,
        })
    }

    /// SHA-256 (hex) over the config and weights files: the hash of
    /// `"adapter_config.json\0" ‖ len ‖ bytes ‖ "adapter_model.safetensors\0" ‖ len ‖ bytes`,
    /// lengths as 8-byte little-endian.
    pub fn fingerprint(&self) -> &str {
        &self.fingerprint
    }

    pub fn config_path(&self) -> &Path {
        &self.config_path
    }

    pub fn weights_path(&self) -> &Path {
        &self.weights_path
    }

    /// Names of the modules that carry LoRA tensors, sorted.
    pub fn lora_modules(&self) -> impl Iterator<Item = &str> {
        self.modules.keys().map(String::as_str)
    }

    /// Whether the adapter is DoRA.
    pub fn is_dora(&self) -> bool {
        self.config.use_dora
    }
}

/// See [`Adapter::fingerprint`].
fn fingerprint(config: &[u8], weights: &[u8]) -> String {
    let mut h = Sha256::new();
    for (name, bytes) in [(CONFIG_FILE, config), (WEIGHTS_FILE, weights)] {
        h.update(name.as_bytes());
        h.update([0u8]);
        h.update((bytes.len() as u64).to_le_bytes());
        h.update(bytes);
    }
    h.finalize().iter().map(|b| format!("{b:02x}")).collect()
}
