//! PEFT LoRA adapters: reading `adapter_config.json` + `adapter_model.safetensors` and merging
//! them into the base weights at load time.
//!
//! The rules follow peft 0.21.2 (`peft/tuners/lora/{config,layer,variants,dora,model}.py`,
//! `peft/utils/{save_and_load,other}.py`, `peft/tuners/tuners_utils.py`) as summarised in
//! docs/model-formats.md §5, and the tests compare the result with peft's own
//! `PeftModel.from_pretrained(base, dir).merge_and_unload()`
//! (tests/reference/make_lora_fixtures.py).
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
//! Without a merge (the default, "the adapter as trained"), `unmerged` checks the adapter the
//! same way and hands the decoder one low-rank term per adapted linear layer, added to that
//! layer's output beside the unchanged base; adapters that change more than linear layers'
//! outputs (whole-tensor copies, embedding or head LoRA, DoRA) are merged instead, and the
//! run record says why. `merge_16` is the merge a team does on a 16-bit base before saving.
//!
//! `config` reads adapter_config.json and decides which modules it selects, `tensors` sorts the
//! adapter's tensors, `adapter` reads a directory into an [`Adapter`], `merge` applies it to
//! the base, `unmerged` lays it beside the base.

mod adapter;
mod config;
mod merge;
mod tensors;
#[cfg(test)]
mod tests;
mod unmerged;

pub use adapter::Adapter;
pub use config::{Config, CONFIG_FILE};
pub use merge::{merge, merge_16, MergeSummary, MergedModule};
pub use tensors::{ModuleKind, WEIGHTS_FILE};
pub use unmerged::{unmerged, LowRank, Unmerged};
