//! Loading a Hugging Face-layout model directory for CPU inference: config → spec
//! (`config`), safetensors → f32 tensors by checkpoint name (`weights`, names in `names`),
//! optional LoRA merge on that map (`lora`), then the generic decoder (`decoder`, with its
//! `cache`, `rope`, `linear` layers and the greedy pick at the output `head`).
//!
//! The arithmetic under the decoder (matrix products, the bf16 and 8-bit kernels) lives in
//! `crate::kernels`, which knows nothing of models; the modules here import it, never the
//! other way round. Within this module the imports run one way too: `names` and `rope` use
//! `config`; `weights` uses `config` and `names`; `lora` uses `names`; `linear` and `head`
//! use only the kernels; `decoder` uses all of `config`, `names`, `rope`, `cache`, `linear`
//! and `head`; nothing uses `decoder` but this file.

pub mod cache;
pub mod config;
pub mod decoder;
pub mod head;
mod linear;
pub mod lora;
pub mod names;
pub mod rope;
pub mod weights;

pub use linear::WeightFormat;

use crate::error::Result;
use config::{GenerationDefaults, ModelSpec};
use decoder::Decoder;
use std::path::{Path, PathBuf};

/// A model ready to generate, with what it was loaded from.
pub struct LoadedModel {
    pub decoder: Decoder,
    pub spec: ModelSpec,
    pub generation: GenerationDefaults,
    /// The safetensors files read.
    pub weight_files: Vec<PathBuf>,
    /// Stored dtype of the checkpoint ("f32", "bf16", "f16"); computation is f32.
    pub stored_dtype: String,
    /// The merged adapter and what the merge did, when one was given.
    pub adapter: Option<(lora::Adapter, lora::MergeSummary)>,
}

/// Reads config, generation config and weights of `dir`, merges the LoRA adapter in
/// `adapter` (if any) into the loaded f32 tensors in place, and builds the decoder.
pub fn load(dir: &Path, adapter: Option<&Path>) -> Result<LoadedModel> {
    load_as(dir, adapter, WeightFormat::F32)
}

/// As [`load`], with the decoder's matrix-product weights in `format` (the LoRA merge is done
/// in f32 first).
pub fn load_as(dir: &Path, adapter: Option<&Path>, format: WeightFormat) -> Result<LoadedModel> {
    let spec = ModelSpec::load(dir)?;
    let generation = GenerationDefaults::load(dir, &spec)?;
    // Read the adapter first: a broken adapter fails before the weights are read.
    let adapter = adapter.map(lora::Adapter::load).transpose()?;
    let mut w = weights::load(dir, &spec)?;
    let adapter = match adapter {
        Some(a) => {
            let summary = lora::merge(&mut w.tensors, &a, w.tied)?;
            check_merged_finite(&w.tensors, &a, &summary)?;
            Some((a, summary))
        }
        None => None,
    };
    let decoder = Decoder::with_format(&spec, w.tensors, format)?;
    Ok(LoadedModel {
        decoder,
        spec,
        generation,
        weight_files: w.files,
        stored_dtype: w.stored_dtype,
        adapter,
    })
}

/// The tensors the merge changed must still be finite: NaN or Inf in the adapter's tensors (or
/// a ΔW too large for f32) is refused naming the adapter's weights file and the base tensor.
fn check_merged_finite(
    tensors: &std::collections::HashMap<String, candle_core::Tensor>,
    adapter: &lora::Adapter,
    summary: &lora::MergeSummary,
) -> Result<()> {
    let changed = summary
        .modules
        .iter()
        .map(|m| m.into.as_str())
        .chain(summary.replaced.iter().map(String::as_str));
    for name in changed {
        if let Some(t) = tensors.get(name) {
            weights::check_finite(
                name,
                adapter.weights_path(),
                t,
                " after merging the adapter",
            )?;
        }
    }
    Ok(())
}
