//! Loading a Hugging Face-layout model directory for CPU inference: config → spec
//! (`config`), safetensors → f32 tensors by checkpoint name (`weights`), optional LoRA merge on
//! that map, then the generic decoder (`decoder`).

pub mod config;
pub mod decoder;
pub mod weights;

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
}

/// Reads config, generation config and weights of `dir` and builds the decoder.
pub fn load(dir: &Path) -> Result<LoadedModel> {
    let spec = ModelSpec::load(dir)?;
    let generation = GenerationDefaults::load(dir, &spec)?;
    let w = weights::load(dir, &spec)?;
    let decoder = Decoder::new(&spec, w.tensors)?;
    Ok(LoadedModel {
        decoder,
        spec,
        generation,
        weight_files: w.files,
        stored_dtype: w.stored_dtype,
    })
}
