//! One generic decoder-only transformer with per-family options, computing in f32 on the CPU.
//!
//! Every formula follows docs/model-formats.md §2 (transformers 5.24.0 `modeling_{llama,mistral,
//! qwen2,qwen3,phi3,gemma,gemma2}.py`): rotate_half RoPE with partial rotary, grouped-query
//! attention (query head j reads kv head j / n_rep), softmax in f32, Gemma (1+w) norms and
//! embedding scaling, Gemma2 soft-caps and sandwich norms, Qwen3 q/k norms before RoPE, Phi-3
//! fused projections.
//!
//! The batch is ragged: one forward call takes any number of [`Segment`]s, each a run of new
//! tokens of one sequence, and every sequence lives in its own slot of a preallocated
//! [`KvCache`]. A token's position id is its cache index, so there is no padding and no mask
//! tensor: a token at position p attends to the keys 0..=p of its own slot (the last W of them
//! under a sliding window W). Prefill of a new question and decode steps of others share one
//! call, which is what lets a finished slot take the next question at once. All the tokens of a
//! call go through each weight matrix in one matrix product (`kernels::dense`), so each weight
//! read serves every sequence. Each token's arithmetic is the same whatever else is in the call,
//! so batched output equals batch-1 output bit for bit.
//!
//! Linear weights are [out, in] (y = x·Wᵀ + b); q, k, v (and gate, up) are stacked into one
//! matrix at load time, which changes no dot product (`linear`). The KV cache is `cache`, RoPE
//! `rope`, the greedy pick at the output `head`; the products themselves are `crate::kernels`.

use crate::error::{Error, Result};
use crate::kernels::dense::dot;
use crate::kernels::PARALLEL_WORK;
use crate::model::config::{Activation, ModelSpec, NormStyle};
use crate::model::gguf::StoredRows;
use crate::model::head::{apply_repetition_penalty, argmax, Scratch as HeadScratch, Screen};
use crate::model::linear::{flat, Linear, WeightFormat};
use crate::model::lora::LowRank;
use crate::model::names::{self, EMBED, FINAL_NORM, LM_HEAD};
use crate::model::rope::{rope_frequencies, rope_in_place};
use crate::model::table::Table;
use crate::model::weights::QuantisedBase;
use candle_core::Tensor;
use rayon::prelude::*;
use std::collections::HashMap;

pub use crate::model::cache::KvCache;

/// Linear layers that come already quantised, by checkpoint weight name: a base quantised to
/// 4 bits as bitsandbytes does, or the stored blocks of a GGUF file.
pub enum LayerCodes {
    Nf4(QuantisedBase),
    Gguf(HashMap<String, StoredRows>),
}

/// A run of new tokens of the sequence in `slot`, placed right after what the slot holds,
/// computed by model variant `variant` (0 with no unmerged adapters; see
/// [`Decoder::with_adapters`]).
#[derive(Debug, Clone, Copy)]
pub struct Segment<'a> {
    pub slot: usize,
    pub tokens: &'a [u32],
    pub variant: usize,
}

/// Scratch buffers of the forward pass, grown to the largest call seen and then reused, so
/// steady decoding allocates nothing.
#[derive(Debug, Default)]
pub struct Workspace {
    h: Vec<f32>,
    x: Vec<f32>,
    qkv: Vec<f32>,
    attn: Vec<f32>,
    out: Vec<f32>,
    gate_up: Vec<f32>,
    act: Vec<f32>,
    scores: Vec<f32>,
    cos: Vec<f32>,
    sin: Vec<f32>,
    tok_slot: Vec<usize>,
    tok_pos: Vec<usize>,
    tok_variant: Vec<usize>,
    /// Which slots this call names (each at most once).
    slot_used: Vec<bool>,
    last: Vec<f32>,
    last_normed: Vec<f32>,
    logits: Vec<f32>,
    tokens: Vec<u32>,
    screen: HeadScratch,
}

/// Resizes `v` to `n` values, reusing its allocation.
fn sized(v: &mut Vec<f32>, n: usize) -> &mut [f32] {
    if v.len() < n {
        v.resize(n, 0.0);
    }
    &mut v[..n]
}

/// x·rsqrt(mean(x²) + eps)·w over each row of `d` values, into `out`.
fn rms_norm_rows(x: &[f32], w: &[f32], eps: f32, d: usize, out: &mut [f32]) {
    for (xr, or) in x.chunks_exact(d).zip(out.chunks_exact_mut(d)) {
        let inv = 1.0 / (dot(xr, xr) / d as f32 + eps).sqrt();
        for ((o, &v), &g) in or.iter_mut().zip(xr).zip(w) {
            *o = v * inv * g;
        }
    }
}

/// In-place RMSNorm of one row.
fn rms_norm_in_place(x: &mut [f32], w: &[f32], eps: f32) {
    let inv = 1.0 / (dot(x, x) / x.len() as f32 + eps).sqrt();
    for (v, &g) in x.iter_mut().zip(w) {
        *v = *v * inv * g;
    }
}

struct Layer {
    input_norm: Vec<f32>,
    post_attn_norm: Vec<f32>,
    /// Gemma2 only: (pre_feedforward_layernorm, post_feedforward_layernorm).
    ff_norms: Option<(Vec<f32>, Vec<f32>)>,
    /// Rows [q | k | v].
    qkv: Linear,
    o: Linear,
    qk_norm: Option<(Vec<f32>, Vec<f32>)>,
    /// Rows [gate | up].
    gate_up: Linear,
    down: Linear,
    window: Option<usize>,
}

/// The model, ready to run.
pub struct Decoder {
    spec: ModelSpec,
    /// [vocab, hidden], at its stored precision (rows widened where looked up).
    embed: Table,
    /// [vocab, hidden]; None when tied to the embedding. At its stored precision in every
    /// weight format: rows widened to f32 where they are used, so the logits are the f32 ones.
    lm_head: Option<Table>,
    /// The 8-bit screen of the output head for greedy picks (None under a final soft-cap).
    screen: Option<Screen>,
    final_norm: Vec<f32>,
    layers: Vec<Layer>,
    eps: f32,
}

impl Decoder {
    /// Takes the tensors out of a checkpoint-named f32 map (after any LoRA merge), one at a
    /// time, so memory holds each weight once.
    pub fn new(spec: &ModelSpec, w: HashMap<String, Tensor>) -> Result<Self> {
        Decoder::with_format(spec, w, WeightFormat::F32)
    }

    /// As [`Decoder::new`], with the matrix products' weights in `format`.
    pub fn with_format(
        spec: &ModelSpec,
        w: HashMap<String, Tensor>,
        format: WeightFormat,
    ) -> Result<Self> {
        Decoder::with_adapters(spec, w, format, Vec::new(), None)
    }

    /// As [`Decoder::with_format`], with unmerged adapters laid beside the one copy of the base:
    /// `adapters` pairs a variant number with its low-rank terms. A segment of that variant
    /// gets the terms added to the outputs of the layers they adapt; a segment of any other
    /// number runs the base alone. Several variants thus share every base weight, and their
    /// rows go through the same products in one call.
    ///
    /// With `quantised`, the linear layers of the blocks (attention and MLP projections) come
    /// quantised to 4 bits as bitsandbytes does (their entries in `w` give only the shapes);
    /// embeddings, norms and the output head stay as they are, as transformers leaves them
    /// (`get_keys_to_not_convert` keeps the output head, and only `nn.Linear` modules are
    /// replaced). With the stored blocks of a GGUF file, the same layers keep those blocks.
    pub fn with_adapters(
        spec: &ModelSpec,
        mut w: HashMap<String, Tensor>,
        format: WeightFormat,
        adapters: Vec<(usize, Vec<LowRank>)>,
        mut quantised: Option<LayerCodes>,
    ) -> Result<Self> {
        let mut terms: HashMap<String, Vec<(usize, LowRank)>> = HashMap::new();
        for (variant, list) in adapters {
            for lr in list {
                terms
                    .entry(lr.module.clone())
                    .or_default()
                    .push((variant, lr));
            }
        }
        let mut take = |name: &str| -> Result<Tensor> {
            w.remove(name)
                .ok_or_else(|| Error::internal(format!("tensor {name} was not loaded")))
        };
        let norm = |t: Tensor| -> Result<Vec<f32>> {
            let v = flat(&t)?;
            Ok(match spec.norm_style {
                NormStyle::Llama => v,
                NormStyle::Gemma => v.into_iter().map(|x| 1.0 + x).collect(),
            })
        };
        let embed = Table::from_tensor(take(EMBED)?)?;
        let mut layers = Vec::with_capacity(spec.num_layers);
        for l in 0..spec.num_layers {
            let tensor = names::Layer::new(l);
            let mut t = |name: String| take(&name);
            let mut part = |module: &str, bias: bool| -> Result<Part> {
                let w = t(tensor.weight(module))?;
                let b = if bias {
                    Some(t(tensor.bias(module))?)
                } else {
                    None
                };
                Ok((tensor.module(module), w, b))
            };
            let mut stack =
                |parts: Vec<Part>| stack_with_terms(parts, format, quantised.as_mut(), &mut terms);
            let qkv = if spec.fused_qkv {
                stack(vec![part(names::QKV_PROJ, false)?])?
            } else {
                let b = spec.qkv_bias;
                let parts = vec![
                    part(names::Q_PROJ, b)?,
                    part(names::K_PROJ, b)?,
                    part(names::V_PROJ, b)?,
                ];
                stack(parts)?
            };
            let o = stack(vec![part(names::O_PROJ, spec.o_bias)?])?;
            let gate_up = if spec.fused_gate_up {
                stack(vec![part(names::GATE_UP_PROJ, false)?])?
            } else {
                let b = spec.mlp_bias;
                let parts = vec![part(names::GATE_PROJ, b)?, part(names::UP_PROJ, b)?];
                stack(parts)?
            };
            let down = stack(vec![part(names::DOWN_PROJ, spec.mlp_bias)?])?;
            let qk_norm = if spec.qk_norm {
                // Always Llama style (Qwen3RMSNorm), per head over head_dim.
                Some((
                    flat(&t(tensor.weight(names::Q_NORM))?)?,
                    flat(&t(tensor.weight(names::K_NORM))?)?,
                ))
            } else {
                None
            };
            let ff_norms = if spec.sandwich_norms {
                Some((
                    norm(t(tensor.weight(names::PRE_FF_NORM))?)?,
                    norm(t(tensor.weight(names::POST_FF_NORM))?)?,
                ))
            } else {
                None
            };
            layers.push(Layer {
                input_norm: norm(t(tensor.weight(names::INPUT_NORM))?)?,
                post_attn_norm: norm(t(tensor.weight(names::POST_ATTN_NORM))?)?,
                ff_norms,
                qkv,
                o,
                qk_norm,
                gate_up,
                down,
                window: spec.layer_windows.get(l).copied().flatten(),
            });
        }
        if let Some(module) = terms.keys().next() {
            return Err(Error::internal(format!(
                "the unmerged adapter term of `{module}` has no linear layer to go to"
            )));
        }
        let final_norm = norm(take(FINAL_NORM)?)?;
        let lm_head = w.remove(LM_HEAD).map(Table::from_tensor).transpose()?;
        let head = lm_head.as_ref().unwrap_or(&embed).read();
        // The soft-cap's tanh can round distinct logits to one f32 value, so a capped head
        // computes every logit.
        let screen = match spec.final_softcap {
            None => Screen::new(head.rows(), spec.vocab_size, spec.hidden_size),
            Some(_) => None,
        };
        drop(head);
        let d = Decoder {
            spec: spec.clone(),
            embed,
            lm_head,
            screen,
            final_norm,
            layers,
            eps: spec.rms_norm_eps as f32,
        };
        d.check_shapes()?;
        Ok(d)
    }

    /// The stacked matrices must have the sizes the spec implies (the loader checked each
    /// checkpoint tensor; this guards the stacking).
    fn check_shapes(&self) -> Result<()> {
        let s = &self.spec;
        let (h, hd) = (s.hidden_size, s.head_dim);
        let qkv = (s.num_heads + 2 * s.num_kv_heads) * hd;
        let bad = |what: &str| Err(Error::internal(format!("{what} has an unexpected size")));
        if self.embed.len() != s.vocab_size * h {
            return bad("the embedding");
        }
        if self
            .lm_head
            .as_ref()
            .is_some_and(|w| w.len() != s.vocab_size * h)
        {
            return bad("lm_head");
        }
        for l in &self.layers {
            if l.qkv.out != qkv || l.qkv.inp != h {
                return bad("the q/k/v projection");
            }
            if l.o.out != h || l.o.inp != s.num_heads * hd {
                return bad("o_proj");
            }
            if l.gate_up.out != 2 * s.intermediate_size || l.gate_up.inp != h {
                return bad("the gate/up projection");
            }
            if l.down.out != h || l.down.inp != s.intermediate_size {
                return bad("down_proj");
            }
        }
        Ok(())
    }

    pub fn spec(&self) -> &ModelSpec {
        &self.spec
    }

    /// A cache of `slots` sequences of up to `capacity` positions each.
    pub fn new_cache(&self, slots: usize, capacity: usize) -> KvCache {
        let kv_dim = self.spec.num_kv_heads * self.spec.head_dim;
        KvCache::new(self.spec.num_layers, slots, capacity, kv_dim)
    }

    /// Logits of the last position of `prompt` alone (a fresh one-slot cache).
    pub fn prompt_logits(&self, prompt: &[u32]) -> Result<Vec<f32>> {
        let mut cache = self.new_cache(1, prompt.len().max(1));
        let mut ws = Workspace::default();
        let seg = [Segment {
            slot: 0,
            tokens: prompt,
            variant: 0,
        }];
        Ok(self.forward(&seg, &mut cache, &mut ws)?.to_vec())
    }

    /// Runs every segment's tokens through the model, appends their keys and values to their
    /// slots, and returns the f32 logits of each segment's last token, [segments, vocab].
    pub fn forward<'w>(
        &self,
        segs: &[Segment],
        cache: &mut KvCache,
        ws: &'w mut Workspace,
    ) -> Result<&'w [f32]> {
        self.last_hidden(segs, cache, ws)?;
        let (ns, hidden, vocab) = (segs.len(), self.spec.hidden_size, self.spec.vocab_size);
        let normed = &ws.last_normed[..ns * hidden];
        let logits = sized(&mut ws.logits, ns * vocab);
        self.head()
            .read()
            .rows()
            .matmul_t(normed, ns, hidden, vocab, logits);
        if let Some(c) = self.spec.final_softcap {
            let c = c as f32;
            for v in logits.iter_mut() {
                *v = (*v * (1.0 / c)).tanh() * c;
            }
        }
        Ok(&ws.logits[..ns * vocab])
    }

    /// As [`Decoder::forward`], but returns each segment's greedy next token: the argmax of its
    /// last-position logits after the repetition penalty (`penalty`: the factor and, per segment,
    /// the ids already in its row; an empty slice where none apply), ties to the lowest id.
    /// The logits are screened (`head`) rather than all computed; the token is the same.
    pub fn next_tokens<'w>(
        &self,
        segs: &[Segment],
        cache: &mut KvCache,
        ws: &'w mut Workspace,
        penalty: Option<(f32, &[&[bool]])>,
    ) -> Result<&'w [u32]> {
        let ns = segs.len();
        let Some(screen) = &self.screen else {
            let vocab = self.spec.vocab_size;
            self.forward(segs, cache, ws)?;
            ws.tokens.clear();
            for k in 0..ns {
                let row = &mut ws.logits[k * vocab..(k + 1) * vocab];
                if let Some((p, seen)) = penalty {
                    if let Some(s) = seen.get(k) {
                        apply_repetition_penalty(row, s, p);
                    }
                }
                ws.tokens.push(argmax(row) as u32);
            }
            return Ok(&ws.tokens);
        };
        self.last_hidden(segs, cache, ws)?;
        let normed = &ws.last_normed[..ns * self.spec.hidden_size];
        screen.pick(
            self.head().read().rows(),
            normed,
            ns,
            penalty,
            &mut ws.screen,
            &mut ws.tokens,
        );
        Ok(&ws.tokens)
    }

    /// The output head, [vocab, hidden]: its own rows or the embedding table's.
    fn head(&self) -> &Table {
        self.lm_head.as_ref().unwrap_or(&self.embed)
    }

    /// The model up to the final norm: each segment's last hidden state, normed, into
    /// `ws.last_normed` ([segments, hidden]).
    fn last_hidden(&self, segs: &[Segment], cache: &mut KvCache, ws: &mut Workspace) -> Result<()> {
        let s = &self.spec;
        let (hidden, hd, nh, nkv) = (s.hidden_size, s.head_dim, s.num_heads, s.num_kv_heads);
        let (qdim, kv_dim) = (nh * hd, nkv * hd);
        let qkv_w = qdim + 2 * kv_dim;
        let inter = s.intermediate_size;
        let vocab = s.vocab_size;
        let half = s.rope.rotary_dim / 2;
        let cap = cache.capacity;
        // Validate and lay out the tokens.
        ws.tok_slot.clear();
        ws.tok_pos.clear();
        ws.tok_variant.clear();
        let seen = &mut ws.slot_used;
        seen.clear();
        seen.resize(cache.slots, false);
        for seg in segs {
            if seg.slot >= cache.slots || std::mem::replace(&mut seen[seg.slot], true) {
                return Err(Error::internal(format!(
                    "segment slot {} is out of range or repeated",
                    seg.slot
                )));
            }
            if seg.tokens.is_empty() {
                return Err(Error::internal("a segment has no tokens"));
            }
            let start = cache.lens[seg.slot];
            if start + seg.tokens.len() > cap {
                return Err(Error::internal(format!(
                    "slot {} would hold {} positions; the cache holds {cap}",
                    seg.slot,
                    start + seg.tokens.len()
                )));
            }
            if let Some(&t) = seg.tokens.iter().find(|&&t| t as usize >= vocab) {
                return Err(Error::internal(format!(
                    "token id {t} is outside the vocabulary of {vocab}"
                )));
            }
            for i in 0..seg.tokens.len() {
                ws.tok_slot.push(seg.slot);
                ws.tok_pos.push(start + i);
                ws.tok_variant.push(seg.variant);
            }
        }
        let n = ws.tok_slot.len();
        if n == 0 {
            return Ok(());
        }
        // Embeddings.
        let h = sized(&mut ws.h, n * hidden);
        let mut t = 0;
        let embed = self.embed.read();
        let embed = embed.rows();
        for seg in segs {
            for &tok in seg.tokens {
                let dst = &mut h[t * hidden..(t + 1) * hidden];
                embed.row_into(tok as usize, dst);
                if let Some(sc) = s.embed_scale {
                    let sc = sc as f32;
                    for d in dst.iter_mut() {
                        *d *= sc;
                    }
                }
                t += 1;
            }
        }
        // RoPE tables per token; the frequencies of each segment use its own longest position
        // (what a batch-1 call over the same tokens would use).
        let cos = sized(&mut ws.cos, n * half);
        let sin = sized(&mut ws.sin, n * half);
        let mut t = 0;
        for seg in segs {
            let start = cache.lens[seg.slot];
            let seq_len = (start + seg.tokens.len()) as f64;
            let (inv, scale) = rope_frequencies(&s.rope, seq_len);
            for i in 0..seg.tokens.len() {
                let p = (start + i) as f32;
                for (j, &f) in inv.iter().enumerate() {
                    let a = p * f;
                    cos[t * half + j] = a.cos() * scale;
                    sin[t * half + j] = a.sin() * scale;
                }
                t += 1;
            }
        }
        let (cos, sin) = (&ws.cos[..n * half], &ws.sin[..n * half]);
        let tok_slot = &ws.tok_slot[..];
        let tok_pos = &ws.tok_pos[..];
        let rows = &ws.tok_variant[..];
        let h = &mut ws.h[..n * hidden];
        let x = sized(&mut ws.x, n * hidden);
        let qkv = sized(&mut ws.qkv, n * qkv_w);
        let attn = sized(&mut ws.attn, n * qdim);
        let out = sized(&mut ws.out, n * hidden);
        let gate_up = sized(&mut ws.gate_up, n * 2 * inter);
        let act = sized(&mut ws.act, n * inter);
        let scores = sized(&mut ws.scores, n * nh * cap);
        let eps = self.eps;
        for (li, layer) in self.layers.iter().enumerate() {
            rms_norm_rows(h, &layer.input_norm, eps, hidden, x);
            layer.qkv.forward(x, n, qkv, rows);
            // q/k norms, RoPE, and the new keys and values into the cache.
            let (ck, cv) = (&mut cache.k[li], &mut cache.v[li]);
            for t in 0..n {
                let row = &mut qkv[t * qkv_w..(t + 1) * qkv_w];
                let (q, rest) = row.split_at_mut(qdim);
                let (k, v) = rest.split_at_mut(kv_dim);
                let (c, sn) = (
                    &cos[t * half..(t + 1) * half],
                    &sin[t * half..(t + 1) * half],
                );
                for head in q.chunks_exact_mut(hd) {
                    if let Some((qn, _)) = &layer.qk_norm {
                        rms_norm_in_place(head, qn, eps);
                    }
                    rope_in_place(head, c, sn);
                }
                for head in k.chunks_exact_mut(hd) {
                    if let Some((_, kn)) = &layer.qk_norm {
                        rms_norm_in_place(head, kn, eps);
                    }
                    rope_in_place(head, c, sn);
                }
                let at = (tok_slot[t] * cap + tok_pos[t]) * kv_dim;
                ck[at..at + kv_dim].copy_from_slice(k);
                cv[at..at + kv_dim].copy_from_slice(v);
            }
            let (ck, cv) = (&cache.k[li][..], &cache.v[li][..]);
            let qkv_r: &[f32] = qkv;
            let rep = nh / nkv;
            let scale = s.attn_scale as f32;
            let softcap = s.attn_softcap.map(|c| c as f32);
            let window = layer.window;
            let one = |(idx, (o, sc)): (usize, (&mut [f32], &mut [f32]))| {
                let (t, head) = (idx / nh, idx % nh);
                let (slot, pos) = (tok_slot[t], tok_pos[t]);
                let lo = window.map_or(0, |w| (pos + 1).saturating_sub(w));
                let q = &qkv_r[t * qkv_w + head * hd..t * qkv_w + (head + 1) * hd];
                let base = slot * cap * kv_dim + (head / rep) * hd;
                let sc = &mut sc[..pos + 1 - lo];
                let mut max = f32::NEG_INFINITY;
                for (j, v) in sc.iter_mut().enumerate() {
                    let kk = &ck[base + (lo + j) * kv_dim..][..hd];
                    let mut x = dot(q, kk) * scale;
                    if let Some(c) = softcap {
                        x = (x * (1.0 / c)).tanh() * c;
                    }
                    max = max.max(x);
                    *v = x;
                }
                let mut sum = 0f32;
                for v in sc.iter_mut() {
                    *v = (*v - max).exp();
                    sum += *v;
                }
                let inv = 1.0 / sum;
                o.fill(0.0);
                for (j, &p) in sc.iter().enumerate() {
                    let p = p * inv;
                    let vv = &cv[base + (lo + j) * kv_dim..][..hd];
                    for (a, &b) in o.iter_mut().zip(vv) {
                        *a += p * b;
                    }
                }
            };
            // Threads only pay off for enough work (a thread hand-off costs microseconds).
            let work: usize = tok_pos.iter().map(|&p| (p + 1) * nh * hd).sum();
            if work >= PARALLEL_WORK {
                attn.par_chunks_mut(hd)
                    .zip(scores.par_chunks_mut(cap))
                    .enumerate()
                    .with_min_len(4)
                    .for_each(one);
            } else {
                attn.chunks_mut(hd)
                    .zip(scores.chunks_mut(cap))
                    .enumerate()
                    .for_each(one);
            }
            layer.o.forward(attn, n, out, rows);
            if layer.ff_norms.is_some() {
                // Gemma2: post_attention_layernorm normalises the attention output.
                rms_norm_rows(out, &layer.post_attn_norm, eps, hidden, x);
                add(h, x);
            } else {
                add(h, out);
            }
            let pre = match &layer.ff_norms {
                Some((pre, _)) => pre,
                None => &layer.post_attn_norm,
            };
            rms_norm_rows(h, pre, eps, hidden, x);
            layer.gate_up.forward(x, n, gate_up, rows);
            for (gu, a) in gate_up
                .chunks_exact(2 * inter)
                .zip(act.chunks_exact_mut(inter))
            {
                let (g, u) = gu.split_at(inter);
                for ((a, &g), &u) in a.iter_mut().zip(g).zip(u) {
                    *a = activation(s.activation, g) * u;
                }
            }
            layer.down.forward(act, n, out, rows);
            match &layer.ff_norms {
                Some((_, post)) => {
                    rms_norm_rows(out, post, eps, hidden, x);
                    add(h, x);
                }
                None => add(h, out),
            }
        }
        for seg in segs {
            cache.lens[seg.slot] += seg.tokens.len();
        }
        // Last token of each segment → final norm → lm_head.
        let ns = segs.len();
        let last = sized(&mut ws.last, ns * hidden);
        let mut end = 0;
        for (i, seg) in segs.iter().enumerate() {
            end += seg.tokens.len();
            last[i * hidden..(i + 1) * hidden]
                .copy_from_slice(&ws.h[(end - 1) * hidden..end * hidden]);
        }
        let normed = sized(&mut ws.last_normed, ns * hidden);
        rms_norm_rows(last, &self.final_norm, eps, hidden, normed);
        Ok(())
    }
}

/// One checkpoint matrix of a stacked layer: its module name, weight and bias.
type Part = (String, Tensor, Option<Tensor>);

/// Stacks the parts into one layer and attaches the unmerged adapter terms of each part's
/// module at that part's rows, taking them out of `terms`.
fn stack_with_terms(
    parts: Vec<Part>,
    format: WeightFormat,
    quantised: Option<&mut LayerCodes>,
    terms: &mut HashMap<String, Vec<(usize, LowRank)>>,
) -> Result<Linear> {
    let mut places = Vec::with_capacity(parts.len());
    let mut at = 0;
    let mut tensors = Vec::with_capacity(parts.len());
    let quantised = match quantised {
        Some(LayerCodes::Gguf(stored)) => {
            return stack_stored(parts, stored, terms);
        }
        Some(LayerCodes::Nf4(q)) => Some(q),
        None => None,
    };
    let mut codes = quantised.map(|q| (q, Vec::new()));
    for (module, w, b) in parts {
        if let Some((q, list)) = &mut codes {
            let name = names::weight(&module);
            let m = q
                .matrices
                .remove(&name)
                .ok_or_else(|| Error::internal(format!("{name} was not quantised")))?;
            list.push(m);
        }
        let rows = w.dims2()?.0;
        places.push((module, at));
        at += rows;
        tensors.push((w, b));
    }
    let codes = codes.map(|(q, list)| (q.book, list));
    let mut linear = Linear::stack(tensors, format, codes)?;
    for (module, at) in places {
        for (variant, lr) in terms.remove(&module).unwrap_or_default() {
            linear.attach(variant, at, lr)?;
        }
    }
    Ok(linear)
}

/// As [`stack_with_terms`], for matrices kept in a GGUF file's block formats.
fn stack_stored(
    parts: Vec<Part>,
    stored: &mut HashMap<String, StoredRows>,
    terms: &mut HashMap<String, Vec<(usize, LowRank)>>,
) -> Result<Linear> {
    let mut places = Vec::with_capacity(parts.len());
    let mut list = Vec::with_capacity(parts.len());
    let mut at = 0;
    let mut inp = 0;
    for (module, w, b) in parts {
        let name = names::weight(&module);
        let s = stored
            .remove(&name)
            .ok_or_else(|| Error::internal(format!("{name} has no stored rows")))?;
        let (rows, cols) = w.dims2()?;
        inp = cols;
        places.push((module, at));
        at += rows;
        list.push((s.t, s.rows, s.bytes, b));
    }
    let mut linear = Linear::stack_stored(list, inp)?;
    for (module, at) in places {
        for (variant, lr) in terms.remove(&module).unwrap_or_default() {
            linear.attach(variant, at, lr)?;
        }
    }
    Ok(linear)
}

fn add(h: &mut [f32], d: &[f32]) {
    for (a, &b) in h.iter_mut().zip(d) {
        *a += b;
    }
}

/// The MLP activation, as transformers' ACT2FN (candle's f32 formulas).
#[inline]
fn activation(a: Activation, x: f32) -> f32 {
    match a {
        Activation::Silu => x / (1.0 + (-x).exp()),
        Activation::GeluTanh => {
            const SQRT_TWO_OVER_PI: f32 = 0.797_884_6;
            0.5 * x * (1.0 + (SQRT_TWO_OVER_PI * x * (1.0 + 0.044715 * x * x)).tanh())
        }
        Activation::GeluErf => {
            (0.5 * x as f64 * (1.0 + libm::erf(x as f64 / std::f64::consts::SQRT_2))) as f32
        }
    }
}
