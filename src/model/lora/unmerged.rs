//! The adapter as trained: the base left as it is and, per adapted linear layer, the low-rank
//! term added to its output, y = x·Wᵀ + b + s·((x·Aᵀ)·Bᵀ + b_B), as peft computes an adapter
//! model at inference without merging (peft 0.21.2 `lora/layer.py`, `Linear.forward`:
//! `result = self.base_layer(x)`, then `result + lora_B(lora_A(dropout(x))) * scaling`;
//! dropout is the identity in eval mode). docs/model-formats.md §5.7.

use super::adapter::Adapter;
use super::merge::plan;
use crate::error::Result;
use candle_core::{DType, Tensor};
use std::collections::HashMap;

/// One adapted linear module's low-rank term, in f32 (peft casts the adapter to f32 on load,
/// `autocast_adapter_dtype=True`).
#[derive(Debug, Clone)]
pub struct LowRank {
    /// The base module (checkpoint name without `.weight`).
    pub module: String,
    /// The adapter file's keys of A and B (for messages).
    pub keys: (String, String),
    pub rank: usize,
    /// Input and output size of the base matrix.
    pub inp: usize,
    pub out: usize,
    /// A [rank, inp], row-major.
    pub a: Vec<f32>,
    /// B transposed, Bᵀ [rank, out], row-major: the term's products run along the outputs.
    pub bt: Vec<f32>,
    /// lora_B's bias [out] (`lora_bias`), added before the scaling.
    pub b_bias: Option<Vec<f32>>,
    /// s = α/r (α/√r with rsLoRA), as f32: torch multiplies the f32 output by the Python float
    /// as an f32 scalar.
    pub scaling: f32,
}

/// How an adapter can be applied to an unchanged base.
pub enum Unmerged {
    /// Beside the base, one term per adapted module.
    Terms(Vec<LowRank>),
    /// Only by merging, and why.
    MustMerge(String),
}

/// Checks the adapter against the base exactly as the merge does (same errors for an adapter
/// made for another base) and returns its low-rank terms, or why it must be merged.
pub fn unmerged(
    weights: &HashMap<String, Tensor>,
    adapter: &Adapter,
    tied: bool,
) -> Result<Unmerged> {
    let plan = plan(weights, adapter, tied)?;
    if let Some(why) = adapter.needs_merge() {
        return Ok(Unmerged::MustMerge(why));
    }
    let mut terms = Vec::with_capacity(plan.modules.len());
    for (module, lora, _) in plan.modules {
        let (rank, inp) = lora.a.dims2()?;
        let (out, _) = lora.b.dims2()?;
        terms.push(LowRank {
            module: module.clone(),
            keys: (lora.a_key.clone(), lora.b_key.clone()),
            rank,
            inp,
            out,
            a: flat(&lora.a)?,
            bt: flat(&lora.b.t()?)?,
            b_bias: lora.b_bias.as_ref().map(|(_, t)| flat(t)).transpose()?,
            scaling: lora.scaling as f32,
        });
    }
    Ok(Unmerged::Terms(terms))
}

/// The f32 values of a small adapter tensor, row-major.
fn flat(t: &Tensor) -> Result<Vec<f32>> {
    Ok(t.to_dtype(DType::F32)?.flatten_all()?.to_vec1()?)
}
