//! An adapter directory read into memory: the config, the sorted tensors and a fingerprint of
//! both files, refused early when the files disagree with each other.

use super::config::{Config, CONFIG_FILE};
use super::tensors::{parse_tensors, LoraModule, ModuleKind, Replacement, WEIGHTS_FILE};
use crate::error::{Error, Result};
use crate::model::names::HEAD_MODULE;
use candle_core::Device;
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Pickled adapter weights, which are refused (loading a pickle can run code).
pub(super) const PICKLE_FILE: &str = "adapter_model.bin";

/// A parsed, self-consistent adapter directory. Nothing about the base is known yet; `merge`
/// checks the fit.
#[derive(Debug)]
pub struct Adapter {
    pub(super) config_path: PathBuf,
    pub(super) weights_path: PathBuf,
    pub(super) config: Config,
    /// By module name (checkpoint name without `.weight`), sorted.
    pub(super) modules: BTreeMap<String, LoraModule>,
    /// Sorted by adapter key.
    pub(super) replacements: Vec<Replacement>,
    fingerprint: String,
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
    /// Why this adapter cannot run beside an unchanged base (None when it can): whole-tensor
    /// replacements, embedding or output-head LoRA, and DoRA are applied by merging.
    pub fn needs_merge(&self) -> Option<String> {
        if !self.replacements.is_empty() {
            return Some("it replaces whole base tensors (modules_to_save or trained biases), which gives the variant weights of its own".into());
        }
        for (module, lora) in &self.modules {
            if lora.magnitude.is_some() {
                return Some(format!("it uses DoRA on `{module}`, whose rescaling by the norm of W + ΔW changes the weights themselves"));
            }
            if lora.kind == ModuleKind::Embedding {
                return Some(format!("it adapts the embedding table (`{module}`)"));
            }
            if module.as_str() == HEAD_MODULE {
                return Some("it adapts the output head, whose greedy pick screens the vocabulary with an 8-bit copy of the head matrix".into());
            }
        }
        None
    }

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
