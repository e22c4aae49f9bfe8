//! Loading a Hugging Face-layout model directory for CPU inference: config → spec
//! (`config`), safetensors → f32 tensors by checkpoint name (`weights`, names in `names`),
//! LoRA adapters laid beside the base or merged into that map (`lora`), then the generic
//! decoder (`decoder`, with its `cache`, `rope`, `linear` layers and the greedy pick at the
//! output `head`). A GGUF file (`gguf`) gives the config and tensors instead, its linear layers
//! kept in their stored blocks.
//!
//! The arithmetic under the decoder (matrix products, the bf16 and 8-bit kernels) lives in
//! `crate::kernels`, which knows nothing of models; the modules here import it, never the
//! other way round. Within this module the imports run one way too: `names` and `rope` use
//! `config`; `weights` uses `config`, `names` and the kernels' 4-bit quantiser; `lora` uses
//! `names`; `linear` uses the kernels and `lora`'s low-rank terms; `table` and `head` use only the
//! kernels (and `head` the `table`); `decoder` uses all of `config`, `names`, `rope`, `cache`, `linear`, `lora`, `head`
//! and the 4-bit matrices `weights` hands over; nothing uses `decoder` but this file.

pub mod cache;
pub mod config;
pub mod decoder;
pub mod gguf;
pub mod head;
mod linear;
pub mod lora;
pub mod names;
pub mod rope;
pub mod table;
pub mod weights;

pub use linear::{BaseQuant, WeightFormat};

use crate::error::{Error, Result};
use candle_core::DType;
use config::{GenerationDefaults, ModelSpec};
use decoder::Decoder;
use std::path::{Path, PathBuf};

/// How an adapter is applied to its base.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, clap::ValueEnum)]
pub enum Merge {
    /// Not merged: the adapter as trained, its low-rank terms added beside the base (as peft
    /// computes an adapter model at inference).
    #[default]
    #[value(skip)]
    Unmerged,
    /// Merged into the base in f32 (peft `merge_and_unload` on the base loaded in float32).
    F32,
    /// Merged on the base loaded in bf16 and saved in bf16: every weight rounded to bf16.
    Bf16,
    /// Merged on the base loaded in f16 and saved in f16: every weight rounded to f16.
    F16,
}

impl Merge {
    /// The words run records and reports use.
    pub fn describe(self) -> &'static str {
        match self {
            Merge::Unmerged => "unmerged (the adapter as trained)",
            Merge::F32 => "merged in f32",
            Merge::Bf16 => "merged and saved in bf16",
            Merge::F16 => "merged and saved in f16",
        }
    }
}

/// One adapter of a loaded model and how it was applied.
pub struct AppliedAdapter {
    pub adapter: lora::Adapter,
    /// How it was applied (an unmerged request that had to be merged says `F32`).
    pub merge: Merge,
    /// LoRA modules applied.
    pub modules: usize,
    /// Why an unmerged request was merged instead.
    pub merged_because: Option<String>,
}

/// A model ready to generate, with what it was loaded from. Its decoder may carry several
/// variants: variant i is the base plus `adapters[i]` (the base alone where that is None).
pub struct LoadedModel {
    pub decoder: Decoder,
    pub spec: ModelSpec,
    pub generation: GenerationDefaults,
    /// The safetensors files read.
    pub weight_files: Vec<PathBuf>,
    /// Stored dtype of the checkpoint ("f32", "bf16", "f16"); computation is f32.
    pub stored_dtype: String,
    /// Per variant, its adapter and how it was applied.
    pub adapters: Vec<Option<AppliedAdapter>>,
    /// The 4-bit quantisation of the base's linear layers, if any.
    pub quant: Option<BaseQuant>,
}

/// Reads config, generation config and weights of `dir`, applies the LoRA adapter in
/// `adapter` (if any) unmerged, and builds the decoder.
pub fn load(dir: &Path, adapter: Option<&Path>) -> Result<LoadedModel> {
    load_as(dir, adapter, Merge::Unmerged, WeightFormat::F32)
}

/// As [`load`], with the adapter applied as `merge` says and the decoder's matrix-product
/// weights in `format`. An unmerged adapter that can only be merged
/// ([`lora::Adapter::needs_merge`]) is merged in f32, and the result says why.
pub fn load_as(
    dir: &Path,
    adapter: Option<&Path>,
    merge: Merge,
    format: WeightFormat,
) -> Result<LoadedModel> {
    if merge == Merge::Unmerged {
        return load_group(dir, &[adapter], format);
    }
    let spec = ModelSpec::load(dir)?;
    let generation = GenerationDefaults::load(dir, &spec)?;
    // Read the adapter first: a broken adapter fails before the weights are read.
    let adapter = adapter.map(lora::Adapter::load).transpose()?;
    let mut w = weights::load(dir, &spec)?;
    let applied = match adapter {
        Some(a) => Some(merged(&mut w, a, merge, None)?),
        None => None,
    };
    let decoder = Decoder::with_format(&spec, w.tensors, format)?;
    Ok(LoadedModel {
        decoder,
        spec,
        generation,
        weight_files: w.files,
        stored_dtype: w.stored_dtype,
        adapters: vec![applied],
        quant: None,
    })
}

/// One copy of the base in `dir` with several variants on it: variant i is the base plus the
/// unmerged adapter `adapters[i]` (the base alone where None). Every adapter is checked
/// against the base as a merge would check it. With a single variant whose adapter can only
/// be merged, it is merged in f32; with several, such an adapter is an internal error (the
/// caller gives it a model of its own).
pub fn load_group(
    dir: &Path,
    adapters: &[Option<&Path>],
    format: WeightFormat,
) -> Result<LoadedModel> {
    load_group_as(dir, adapters, format, None)
}

/// As [`load_group`], with the base's linear layers quantised to 4 bits as `quant` says (the
/// base as QLoRA trains against it) when given. Every adapter then stays unmerged: one that
/// can only be merged is refused, since a merge into a 4-bit base is another artifact.
pub fn load_group_as(
    dir: &Path,
    adapters: &[Option<&Path>],
    format: WeightFormat,
    quant: Option<BaseQuant>,
) -> Result<LoadedModel> {
    let spec = ModelSpec::load(dir)?;
    if let Some(q) = quant {
        check_quantisable(dir, &spec, q, format)?;
    }
    let generation = GenerationDefaults::load(dir, &spec)?;
    let loaded: Vec<Option<lora::Adapter>> = adapters
        .iter()
        .map(|a| a.map(lora::Adapter::load).transpose())
        .collect::<Result<_>>()?;
    let mut w = match quant {
        Some(q) => weights::load_4bit(dir, &spec, q.codebook(), q.double_quant())?,
        None => weights::load(dir, &spec)?,
    };
    let mut terms = Vec::new();
    let mut applied = Vec::with_capacity(loaded.len());
    let single = loaded.len() == 1;
    for (variant, adapter) in loaded.into_iter().enumerate() {
        let Some(adapter) = adapter else {
            applied.push(None);
            continue;
        };
        match lora::unmerged(&w.tensors, &adapter, w.tied)? {
            lora::Unmerged::Terms(list) => {
                check_terms_finite(&adapter, &list)?;
                applied.push(Some(AppliedAdapter {
                    modules: list.len(),
                    adapter,
                    merge: Merge::Unmerged,
                    merged_because: None,
                }));
                terms.push((variant, list));
            }
            lora::Unmerged::MustMerge(why) if quant.is_some() => {
                return Err(Error::file(
                    adapter.config_path(),
                    format!(
                        "this adapter cannot run unmerged ({why}), and a 4-bit base takes adapters unmerged only; evaluate it on the base as stored"
                    ),
                ))
            }
            lora::Unmerged::MustMerge(why) if single => {
                applied.push(Some(merged(&mut w, adapter, Merge::F32, Some(why))?));
            }
            lora::Unmerged::MustMerge(why) => {
                return Err(Error::internal(format!(
                    "{} cannot share its base unmerged: {why}",
                    adapter.config_path().display()
                )))
            }
        }
    }
    let codes = w.quantised.map(decoder::LayerCodes::Nf4);
    let decoder = Decoder::with_adapters(&spec, w.tensors, format, terms, codes)?;
    Ok(LoadedModel {
        decoder,
        spec,
        generation,
        weight_files: w.files,
        stored_dtype: w.stored_dtype,
        adapters: applied,
        quant,
    })
}

/// Reads a GGUF file (docs/model-formats.md §7): the config from its metadata, the linear
/// layers kept in their stored block formats and dequantised inside the products, embedding,
/// head and norms dequantised to f32 at load. Computation is f32, as transformers computes
/// after loading the file with dtype float32.
pub fn load_gguf(path: &Path) -> Result<LoadedModel> {
    let file = gguf::GgufFile::open(path)?;
    let spec = file.spec()?;
    let generation = file.generation(&spec);
    let (tensors, stored) = file.weights(&spec)?;
    let decoder = Decoder::with_adapters(
        &spec,
        tensors,
        WeightFormat::F32,
        Vec::new(),
        Some(decoder::LayerCodes::Gguf(stored)),
    )?;
    Ok(LoadedModel {
        decoder,
        spec,
        generation,
        weight_files: vec![path.to_path_buf()],
        stored_dtype: format!("gguf: {}", file.type_summary()),
        adapters: vec![None],
        quant: None,
    })
}

/// A 4-bit base needs every linear layer's input size to be a multiple of the block size (64;
/// bitsandbytes lets a block run across rows, liftgate keeps blocks within a row) and f32
/// computation (bitsandbytes' `bnb_4bit_compute_dtype=float32`, the default).
fn check_quantisable(
    dir: &Path,
    spec: &ModelSpec,
    quant: BaseQuant,
    format: WeightFormat,
) -> Result<()> {
    if format != WeightFormat::F32 {
        return Err(Error::usage(format!(
            "a 4-bit base ({}) computes in f32 (bnb_4bit_compute_dtype=float32); --weights {} is not available with it",
            quant.name(),
            clap::ValueEnum::to_possible_value(&format).map_or_else(String::new, |v| v.get_name().to_string())
        )));
    }
    let block = crate::kernels::nf4::BLOCK;
    for (field, size) in [
        ("hidden_size", spec.hidden_size),
        ("intermediate_size", spec.intermediate_size),
        (
            "num_attention_heads × head_dim",
            spec.num_heads * spec.head_dim,
        ),
    ] {
        if !size.is_multiple_of(block) {
            return Err(Error::field(
                dir.join("config.json"),
                None,
                field,
                format!(
                    "{size} is not a multiple of {block}: a 4-bit base ({}) quantises each linear layer's rows in blocks of {block} inputs, which this model's sizes do not allow",
                    quant.name()
                ),
            ));
        }
    }
    Ok(())
}

/// Merges `adapter` into the loaded weights as `merge` says and checks the result.
fn merged(
    w: &mut weights::Weights,
    adapter: lora::Adapter,
    merge: Merge,
    merged_because: Option<String>,
) -> Result<AppliedAdapter> {
    let summary = match merge {
        Merge::Bf16 => lora::merge_16(&mut w.tensors, &adapter, w.tied, DType::BF16)?,
        Merge::F16 => lora::merge_16(&mut w.tensors, &adapter, w.tied, DType::F16)?,
        Merge::F32 | Merge::Unmerged => lora::merge(&mut w.tensors, &adapter, w.tied)?,
    };
    check_merged_finite(&w.tensors, &adapter, &summary)?;
    Ok(AppliedAdapter {
        adapter,
        merge: if merge == Merge::Unmerged {
            Merge::F32
        } else {
            merge
        },
        modules: summary.modules_merged,
        merged_because,
    })
}

/// NaN or Inf in an unmerged adapter's factors is refused naming its weights file.
fn check_terms_finite(adapter: &lora::Adapter, terms: &[lora::LowRank]) -> Result<()> {
    for t in terms {
        // Bᵀ is held, so its flat index is turned back into B's ([out, rank]) for the message.
        let b_index = |i: usize| (i % t.out) * t.rank + i / t.out;
        let a_index = |i: usize| i;
        for (key, values, index) in [
            (&t.keys.0, &t.a, &a_index as &dyn Fn(usize) -> usize),
            (&t.keys.1, &t.bt, &b_index),
        ] {
            if let Some((i, v)) = weights::first_non_finite(values) {
                let i = index(i);
                return Err(Error::field(
                    adapter.weights_path(),
                    None,
                    key,
                    format!(
                        "holds {v} at flat index {i}; an adapter with NaN or Inf values cannot be evaluated"
                    ),
                ));
            }
        }
    }
    Ok(())
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
