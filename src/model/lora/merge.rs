//! Merging an adapter into the base weights in place: replacements first, then W + s·B·A per
//! LoRA module (with DoRA's rescaling), everything checked against the base before the first
//! tensor changes (docs/model-formats.md §5.3–§5.4; peft 0.21.2
//! `peft/tuners/lora/{layer,variants,dora}.py`).

use super::adapter::Adapter;
use super::config::{suffix_match, Config, Targets};
use super::tensors::{LoraModule, ModuleKind, WEIGHTS_FILE};
use crate::error::{Error, Result};
use crate::model::names::{self, EMBED, EMBED_MODULE_LEAF, HEAD_MODULE, LM_HEAD};
use candle_core::{DType, Tensor};
use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::Path;

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

/// One planned change, checked against the base before anything is modified.
enum Step {
    /// Overwrite (or add) a base tensor with an adapter tensor.
    Replace { target: String, tensor: Tensor },
    /// Give `lm_head` its own handle on the current embedding tensor before the embeddings are
    /// replaced (a modules_to_save embedding copy on a tied model). No data is copied.
    KeepHeadFromEmbed,
}

/// Every change the adapter makes, checked against the base before anything is modified.
pub(super) struct Plan<'a> {
    steps: Vec<Step>,
    /// (module, its LoRA factors, the base tensor that receives ΔW).
    pub(super) modules: Vec<(&'a String, &'a LoraModule, String)>,
    still_tied: bool,
    head_into_embed: bool,
    tied: bool,
}

/// Merges the adapter into `weights` in place. ΔW is computed in f32 and added in f32; the
/// changed matrices are f32 (`merge_and_unload` on the base loaded in float32;
/// docs/model-formats.md §5.3). `tied`: lm_head shares the embedding tensor
/// (tie_word_embeddings and no `lm_head.weight` in the map).
///
/// Everything is checked before the first tensor changes, so on error `weights` is untouched.
/// Only one tensor is rebuilt at a time: the map never holds a second copy of the weights.
pub fn merge(
    weights: &mut HashMap<String, Tensor>,
    adapter: &Adapter,
    tied: bool,
) -> Result<MergeSummary> {
    let plan = plan(weights, adapter, tied)?;
    apply(weights, plan, None)
}

/// What a team gets when it loads the base in the 16-bit `dtype`, merges with peft and saves:
/// every tensor of the map in `dtype` (f32 values rounded once), and each merged matrix
/// W' = round(W₁₆ + round(s·(B·A))) with ΔW computed in f32 and the sum rounded once more
/// (docs/model-formats.md §5.6; peft 0.21.2 `LoraLayer.get_delta_weight` and
/// `Linear.merge`). The result is what the reference computes on after loading the saved
/// checkpoint with dtype float32.
pub fn merge_16(
    weights: &mut HashMap<String, Tensor>,
    adapter: &Adapter,
    tied: bool,
    dtype: DType,
) -> Result<MergeSummary> {
    if !matches!(dtype, DType::BF16 | DType::F16) {
        return Err(Error::internal("merge_16 needs bf16 or f16"));
    }
    let plan = plan(weights, adapter, tied)?;
    let names: Vec<String> = weights.keys().cloned().collect();
    for name in names {
        if let Some(t) = weights.remove(&name) {
            let t = if t.dtype() == dtype {
                t
            } else {
                t.to_dtype(dtype)?
            };
            weights.insert(name, t);
        }
    }
    apply(weights, plan, Some(dtype))
}

/// Checks the adapter against the base and lays out every change; modifies nothing.
pub(super) fn plan<'a>(
    weights: &HashMap<String, Tensor>,
    adapter: &'a Adapter,
    tied: bool,
) -> Result<Plan<'a>> {
    let wpath = &adapter.weights_path;
    let cpath = &adapter.config_path;
    let config = &adapter.config;
    if tied && weights.contains_key(LM_HEAD) {
        return Err(Error::internal(format!(
            "merge called with tied=true but {LM_HEAD} is in the weight map"
        )));
    }
    let embed_shape = weights.get(EMBED).map(|t| t.dims().to_vec());

    // Base modules: every checkpoint name without its last component; `lm_head` too when tied.
    let mut base_modules: BTreeMap<String, bool> = BTreeMap::new(); // name -> has a 2-D weight
    for (name, t) in weights.iter() {
        if let Some((module, last)) = name.rsplit_once('.') {
            let is_matrix = last == "weight" && t.rank() == 2;
            let e = base_modules.entry(module.to_string()).or_insert(false);
            *e |= is_matrix;
        }
    }
    if tied {
        base_modules.insert(HEAD_MODULE.to_string(), true);
    }
    let is_linear = |m: &str| {
        base_modules.get(m).copied().unwrap_or(false)
            && !m.ends_with(EMBED_MODULE_LEAF)
            && m != HEAD_MODULE
    };

    // Every name in the config must exist in the base.
    check_config_names(cpath, config, &base_modules)?;

    // 1. Replacements.
    let mut steps = Vec::new();
    let mut still_tied = tied;
    let mut head_into_embed = false;
    let mut added: BTreeSet<String> = BTreeSet::new();
    let shape_of = |name: &str, added: &BTreeSet<String>| -> Option<Vec<usize>> {
        weights.get(name).map(|t| t.dims().to_vec()).or_else(|| {
            if added.contains(name) {
                embed_shape.clone()
            } else {
                None
            }
        })
    };
    for rep in &adapter.replacements {
        let mut target = rep.target.clone();
        let expected = if let Some(s) = shape_of(&target, &added) {
            if still_tied && target == EMBED && !rep.base_layer {
                // modules_to_save copy of the embeddings: the head keeps the original tensor.
                steps.push(Step::KeepHeadFromEmbed);
                added.insert(LM_HEAD.to_string());
                still_tied = false;
            }
            s
        } else if still_tied && target == LM_HEAD {
            let s = tied_shape(&embed_shape)?;
            if rep.base_layer {
                // The wrapped head *is* the shared tensor.
                target = EMBED.to_string();
                head_into_embed = true;
            } else {
                added.insert(LM_HEAD.to_string());
                still_tied = false;
            }
            s
        } else {
            return Err(Error::field(
                wpath,
                None,
                &rep.key,
                format!(
                    "replaces base tensor `{}`, which the base model does not have; the adapter was made for another base model",
                    rep.target
                ),
            ));
        };
        if rep.tensor.dims() != expected.as_slice() {
            return Err(Error::field(
                wpath,
                None,
                &rep.key,
                format!(
                    "shape {:?} does not fit the base model: base tensor `{target}` has shape {expected:?}; the adapter was made for another base model (hidden size, vocabulary or projection sizes differ)",
                    rep.tensor.dims()
                ),
            ));
        }
        steps.push(Step::Replace {
            target,
            tensor: rep.tensor.clone(),
        });
    }

    // 2. LoRA modules: config agreement, then shapes.
    let mut plans: Vec<(&String, &LoraModule, String)> = Vec::new();
    for (module, lora) in &adapter.modules {
        if !config.selects(module, is_linear(module)) {
            return Err(Error::field(
                cpath,
                None,
                "target_modules",
                format!(
                    "{WEIGHTS_FILE} has LoRA tensors for `{module}` (`{}`), but the config's target_modules/exclude_modules/layers_to_transform/modules_to_save do not select that module; the files do not belong together",
                    lora.a_key
                ),
            ));
        }
        let weight_name = names::weight(module);
        let (into, base_shape) = if let Some(s) = shape_of(&weight_name, &added) {
            (weight_name.clone(), s)
        } else if module == HEAD_MODULE && still_tied {
            head_into_embed = true;
            (EMBED.to_string(), tied_shape(&embed_shape)?)
        } else {
            return Err(Error::field(
                wpath,
                None,
                &lora.a_key,
                format!("adapts module `{module}`, but the base model has no `{weight_name}`; the adapter was made for another base model"),
            ));
        };
        check_lora_shapes(wpath, module, lora, &into, &base_shape)?;
        if let Some((bkey, _)) = &lora.b_bias {
            let bias_name = names::bias(module);
            let replaced = adapter.replacements.iter().any(|r| r.target == bias_name);
            if !weights.contains_key(&bias_name) && !replaced {
                return Err(Error::field(
                    wpath,
                    None,
                    bkey,
                    format!("lora_bias needs the base bias `{bias_name}`, which the base model does not have (peft: \"Impossible to merge LoRA with `lora_bias=True` because the base layer has no bias\")"),
                ));
            }
        }
        plans.push((module, lora, into));
    }
    // Every module the config selects must have its tensors: a missing one is a truncated file.
    for (module, &matrix) in &base_modules {
        if !matrix || !config.selects(module, is_linear(module)) {
            continue;
        }
        if !adapter.modules.contains_key(module) {
            return Err(Error::field(
                cpath,
                None,
                "target_modules",
                format!("selects `{module}`, but {WEIGHTS_FILE} has no LoRA tensors for it; the adapter file is incomplete or belongs to another base"),
            ));
        }
    }

    Ok(Plan {
        steps,
        modules: plans,
        still_tied,
        head_into_embed,
        tied,
    })
}

/// Applies a checked plan. `rounding`: None merges in f32 and keeps the changed tensors f32;
/// Some(dtype) rounds ΔW and each sum to that dtype (the map is already in it).
fn apply(
    weights: &mut HashMap<String, Tensor>,
    plan: Plan,
    rounding: Option<DType>,
) -> Result<MergeSummary> {
    let kept = |t: Tensor| -> Result<Tensor> {
        Ok(match rounding {
            Some(d) => t.to_dtype(d)?,
            None => t,
        })
    };
    let mut replaced = BTreeSet::new();
    for step in plan.steps {
        match step {
            Step::KeepHeadFromEmbed => {
                let embed = weights
                    .get(EMBED)
                    .cloned()
                    .ok_or_else(|| Error::internal("embedding tensor vanished during the merge"))?;
                weights.insert(LM_HEAD.to_string(), embed);
            }
            Step::Replace { target, tensor } => {
                // Computed on in f32, as the reference does with the model loaded in float32
                // (in the 16-bit dtype for a 16-bit merge, as peft loads it onto that base).
                weights.insert(target.clone(), kept(tensor.to_dtype(DType::F32)?)?);
                replaced.insert(target);
            }
        }
    }
    let mut merged = Vec::new();
    for (module, lora, into) in plan.modules {
        let base = weights.remove(&into).ok_or_else(|| {
            Error::internal(format!("base tensor {into} vanished during the merge"))
        })?;
        // A 16-bit base matrix is widened first, exactly.
        let new = merge_one(&base.to_dtype(DType::F32)?, lora, rounding)?;
        drop(base);
        weights.insert(into.clone(), new);
        if let Some((_, b_bias)) = &lora.b_bias {
            let bias_name = names::bias(module);
            let bias = weights
                .remove(&bias_name)
                .ok_or_else(|| Error::internal(format!("base bias {bias_name} vanished")))?;
            // peft: bias' = bias + lora_B.bias * scaling, the sum rounded once in 16 bits.
            let delta = match rounding {
                Some(_) => b_bias
                    .to_dtype(DType::F32)?
                    .affine(lora.scaling as f32 as f64, 0.0)?,
                None => b_bias.affine(lora.scaling, 0.0)?,
            };
            let new = kept((bias.to_dtype(DType::F32)? + delta)?)?;
            weights.insert(bias_name, new);
        }
        merged.push(MergedModule {
            name: module.clone(),
            kind: lora.kind,
            rank: lora.rank,
            alpha: lora.alpha,
            scaling: lora.scaling,
            dora: lora.magnitude.is_some(),
            into,
        });
    }
    Ok(MergeSummary {
        modules_merged: merged.len(),
        replaced: replaced.into_iter().collect(),
        modules: merged,
        untied: plan.tied && !plan.still_tied,
        head_merged_into_embeddings: plan.head_into_embed,
    })
}

/// s·(B·A) in f32 as torch computes it on the CPU for a 16-bit merge: each element an FMA
/// chain over the rank in ascending order, then one f32 multiply by the scaling rounded to f32
/// (what the reference's MKL kernel gives, and what makes the merged 16-bit weights bit-equal
/// to peft's; tests/reference/make_merged16_fixtures.py checks the formula).
fn delta_fma(b: &Tensor, a: &Tensor, scaling: f64) -> Result<Tensor> {
    use rayon::prelude::*;
    let (out, r) = b.dims2()?;
    let (r2, inp) = a.dims2()?;
    if r != r2 {
        return Err(Error::internal("LoRA factors of different rank"));
    }
    let bv: Vec<f32> = b.to_dtype(DType::F32)?.flatten_all()?.to_vec1()?;
    let av: Vec<f32> = a.to_dtype(DType::F32)?.flatten_all()?.to_vec1()?;
    let s = scaling as f32;
    let mut d = vec![0f32; out * inp];
    d.par_chunks_mut(inp.max(1))
        .enumerate()
        .for_each(|(o, row)| {
            for k in 0..r {
                let bk = bv[o * r + k];
                for (acc, &x) in row.iter_mut().zip(&av[k * inp..(k + 1) * inp]) {
                    *acc = bk.mul_add(x, *acc);
                }
            }
            for v in row.iter_mut() {
                *v *= s;
            }
        });
    Ok(Tensor::from_vec(d, (out, inp), &candle_core::Device::Cpu)?)
}

/// The embedding's shape, which the head of a tied model shares.
fn tied_shape(embed_shape: &Option<Vec<usize>>) -> Result<Vec<usize>> {
    embed_shape
        .clone()
        .ok_or_else(|| Error::internal(format!("tied=true but the weight map has no {EMBED}")))
}

/// Every entry of target_modules (list form) must name a module of the base, a regex target
/// must match one, and every modules_to_save entry must exist: a name that matches nothing
/// means the adapter was made for another architecture.
fn check_config_names(path: &Path, config: &Config, base: &BTreeMap<String, bool>) -> Result<()> {
    let hint = "the adapter was made for another base model (or the config was edited by hand)";
    match &config.targets {
        Targets::List(list) if !config.targets_defaulted => {
            for t in list {
                if !base.keys().any(|m| suffix_match(m, t)) {
                    return Err(Error::field(
                        path,
                        None,
                        "target_modules",
                        format!(
                            "names `{t}`, but no module of the base model is called that; {hint}"
                        ),
                    ));
                }
            }
        }
        Targets::Regex(src, re) if !base.keys().any(|m| re.is_match(m)) => {
            return Err(Error::field(
                path,
                None,
                "target_modules",
                format!("the regex `{src}` matches no module of the base model; {hint}"),
            ));
        }
        _ => {}
    }
    for (m, re) in &config.modules_to_save {
        if !base.keys().any(|b| re.is_match(b)) {
            return Err(Error::field(
                path,
                None,
                "modules_to_save",
                format!("names `{m}`, but no module of the base model is called that; {hint}"),
            ));
        }
    }
    Ok(())
}

fn check_lora_shapes(
    wpath: &Path,
    module: &str,
    lora: &LoraModule,
    base_name: &str,
    base_shape: &[usize],
) -> Result<()> {
    let hint = "the adapter was made for another base model (hidden size, vocabulary or projection sizes differ)";
    if base_shape.len() != 2 {
        return Err(Error::field(
            wpath,
            None,
            &lora.a_key,
            format!("adapts `{module}`, but base tensor `{base_name}` has shape {base_shape:?}, not a matrix"),
        ));
    }
    let r = lora.rank;
    // Linear W [out, in]: A [r, in], B [out, r]. Embedding E [vocab, hidden]: A_e [r, vocab], B_e [hidden, r].
    let (exp_a, exp_b) = match lora.kind {
        ModuleKind::Linear => ([r, base_shape[1]], [base_shape[0], r]),
        ModuleKind::Embedding => ([r, base_shape[0]], [base_shape[1], r]),
    };
    for (key, t, exp) in [(&lora.a_key, &lora.a, exp_a), (&lora.b_key, &lora.b, exp_b)] {
        if t.dims() != exp {
            return Err(Error::field(
                wpath,
                None,
                key,
                format!(
                    "shape {:?} does not fit the base model: expected {exp:?} for base tensor `{base_name}` of shape {base_shape:?}; {hint}",
                    t.dims()
                ),
            ));
        }
    }
    Ok(())
}

/// W' for one module. `base` is W [out, in] or E [vocab, hidden] in f32. Without `rounding`
/// everything is f32; with it ΔW is rounded to that dtype before the add and the sum after it.
fn merge_one(base: &Tensor, lora: &LoraModule, rounding: Option<DType>) -> Result<Tensor> {
    // peft get_delta_weight: (B @ A) * scaling; embeddings transpose B_e @ A_e to [vocab, hidden].
    let delta = match rounding {
        None => {
            let ba = lora.b.matmul(&lora.a)?;
            match lora.kind {
                ModuleKind::Linear => ba,
                ModuleKind::Embedding => ba.t()?.contiguous()?,
            }
            .affine(lora.scaling, 0.0)?
        }
        Some(d) => {
            let ba = delta_fma(&lora.b, &lora.a, lora.scaling)?;
            match lora.kind {
                // Linear: ΔW stays f32 and is added to the 16-bit weight with one rounding
                // (peft `Linear.merge`: `base_layer.weight.data += delta_weight`).
                ModuleKind::Linear => ba,
                // Embedding: peft casts ΔE to the base dtype before adding
                // (`Embedding.get_delta_weight`, `.to(orig_dtype)`): two roundings.
                ModuleKind::Embedding => ba.t()?.contiguous()?.to_dtype(d)?.to_dtype(DType::F32)?,
            }
        }
    };
    let v = (base + delta)?;
    let v = match rounding {
        Some(d) => v.to_dtype(d)?.to_dtype(DType::F32)?,
        None => v,
    };
    let Some((_, m)) = &lora.magnitude else {
        return Ok(match rounding {
            Some(d) => v.to_dtype(d)?,
            None => v,
        });
    };
    // DoRA (Liu et al. 2024; peft DoraLinearVariant / DoraEmbeddingVariant merge): rescale each
    // output row (Linear) or hidden column (Embedding) of V = W + ΔW to the magnitude m.
    let out = match lora.kind {
        ModuleKind::Linear => {
            let norm = v.sqr()?.sum_keepdim(1)?.sqrt()?; // [out, 1]
            let factor = m.reshape((m.dim(0)?, 1))?.div(&norm)?;
            v.broadcast_mul(&factor)?
        }
        ModuleKind::Embedding => {
            let norm = v.sqr()?.sum_keepdim(0)?.sqrt()?; // [1, hidden]
            let factor = m.reshape((1, m.dim(0)?))?.div(&norm)?;
            v.broadcast_mul(&factor)?
        }
    };
    Ok(match rounding {
        Some(d) => out.to_dtype(d)?,
        None => out,
    })
}
