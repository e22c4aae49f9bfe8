//! One generic decoder-only transformer with per-family options, computing in f32 on the CPU.
//!
//! Every formula follows model-formats.md §2 (transformers 5.24.0 `modeling_{llama,mistral,
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
//! call go through each weight matrix in one matrix product (`gemm`), so each weight read serves
//! every sequence. Each token's arithmetic is the same whatever else is in the call, so batched
//! output equals batch-1 output.
//!
//! Linear weights are [out, in] row-major (y = x·Wᵀ + b); q, k, v (and gate, up) are stacked into
//! one matrix at load time, which changes no dot product.

use crate::error::{Error, Result};
use crate::model::bf16::Bf16Matrix;
use crate::model::config::{Activation, ModelSpec, NormStyle, RopeScaling, RopeSpec};
use crate::model::head::{apply_repetition_penalty, argmax, Scratch as HeadScratch, Screen};
use crate::model::weights::{EMBED, LM_HEAD};
use crate::model::WeightFormat;
use candle_core::Tensor;
use rayon::prelude::*;
use std::collections::HashMap;

/// A run of new tokens of the sequence in `slot`, placed right after what the slot holds.
#[derive(Debug, Clone, Copy)]
pub struct Segment<'a> {
    pub slot: usize,
    pub tokens: &'a [u32],
}

/// Keys and values of every layer for a fixed number of sequence slots, allocated once.
///
/// Layer l keeps k and v as [slots, capacity, n_kv_heads · head_dim]. A slot is emptied by
/// [`KvCache::reset`] and refilled by the next forward call that names it. A prefix shared by
/// every prompt can be stored once ([`KvCache::save_prefix`]) and copied into a fresh slot
/// ([`KvCache::load_prefix`]) instead of being computed again.
#[derive(Debug)]
pub struct KvCache {
    slots: usize,
    capacity: usize,
    kv_dim: usize,
    k: Vec<Vec<f32>>,
    v: Vec<Vec<f32>>,
    lens: Vec<usize>,
    prefix: Option<SavedPrefix>,
}

/// A saved shared prefix: its length and, per layer, k and v as [len, kv_dim].
#[derive(Debug)]
struct SavedPrefix {
    len: usize,
    k: Vec<Vec<f32>>,
    v: Vec<Vec<f32>>,
}

impl KvCache {
    /// Empties `slot` (its old keys are overwritten by the next sequence).
    pub fn reset(&mut self, slot: usize) {
        self.lens[slot] = 0;
    }

    /// Keeps a copy of what `slot` holds as the shared prefix.
    pub fn save_prefix(&mut self, slot: usize) {
        let n = self.lens[slot] * self.kv_dim;
        let at = slot * self.capacity * self.kv_dim;
        let k = self.k.iter().map(|l| l[at..at + n].to_vec()).collect();
        let v = self.v.iter().map(|l| l[at..at + n].to_vec()).collect();
        self.prefix = Some(SavedPrefix {
            len: self.lens[slot],
            k,
            v,
        });
    }

    /// Makes `slot` hold exactly the saved prefix; returns its length (0 when none is saved).
    pub fn load_prefix(&mut self, slot: usize) -> usize {
        let Some(SavedPrefix { len, k, v }) = &self.prefix else {
            self.lens[slot] = 0;
            return 0;
        };
        let n = len * self.kv_dim;
        let at = slot * self.capacity * self.kv_dim;
        for (dst, src) in self.k.iter_mut().zip(k) {
            dst[at..at + n].copy_from_slice(src);
        }
        for (dst, src) in self.v.iter_mut().zip(v) {
            dst[at..at + n].copy_from_slice(src);
        }
        self.lens[slot] = *len;
        *len
    }
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

/// A linear layer. `w` holds the checkpoint's [out, inp] matrix in panels of 64 output columns
/// ([`pack_panels_into`]): the layout the products read front to back without repacking the
/// weights on every call (repacking would read and write every weight once more per step).
struct Linear {
    w: LinearWeights,
    out: usize,
    inp: usize,
    b: Option<Vec<f32>>,
}

enum LinearWeights {
    F32(Vec<f32>),
    Bf16(Bf16Matrix),
}

impl Linear {
    /// Stacks the rows of one or more checkpoint matrices (with their biases, if any),
    /// transposing (f32) or packing (bf16) each straight into place.
    fn stack(parts: Vec<(Tensor, Option<Tensor>)>, format: WeightFormat) -> Result<Linear> {
        let mut dims = Vec::with_capacity(parts.len());
        for (wt, _) in &parts {
            dims.push(wt.dims2()?);
        }
        let inp = dims.first().map_or(0, |d| d.1);
        if dims.iter().any(|d| d.1 != inp) {
            return Err(Error::internal(
                "stacked projections disagree on input size",
            ));
        }
        let out: usize = dims.iter().map(|d| d.0).sum();
        let with_bias = parts.iter().all(|(_, b)| b.is_some());
        let mut w = match format {
            WeightFormat::F32 => LinearWeights::F32(vec![0.0; panel_len(out, inp)]),
            WeightFormat::Bf16 => LinearWeights::Bf16(Bf16Matrix::new(out, inp)),
        };
        let mut b = Vec::new();
        let mut at = 0;
        for ((wt, bt), (o, _)) in parts.into_iter().zip(dims) {
            match &mut w {
                LinearWeights::F32(w) => with_f32(&wt, |a| pack_panels_into(a, o, inp, w, at))?,
                LinearWeights::Bf16(m) => with_f32(&wt, |a| m.put_rows(a, o, at))?,
            }
            drop(wt);
            if let (true, Some(bt)) = (with_bias, bt) {
                with_f32(&bt, |v| b.extend_from_slice(v))?;
            }
            at += o;
        }
        Ok(Linear {
            w,
            out,
            inp,
            b: with_bias.then_some(b),
        })
    }

    /// x: [n, inp] → y: [n, out]
    fn forward(&self, x: &[f32], n: usize, y: &mut [f32]) {
        match &self.w {
            LinearWeights::F32(w) => matmul(x, n, self.inp, w, self.out, y),
            LinearWeights::Bf16(m) => m.matmul(x, n, y),
        }
        if let Some(b) = &self.b {
            for row in y.chunks_exact_mut(self.out) {
                for (v, &bb) in row.iter_mut().zip(b) {
                    *v += bb;
                }
            }
        }
    }
}

/// Calls `f` on the f32 values of `t` in row-major order, borrowing its storage when it is
/// contiguous (no copy).
fn with_f32<R>(t: &Tensor, f: impl FnOnce(&[f32]) -> R) -> Result<R> {
    {
        let (storage, layout) = t.storage_and_layout();
        if let (candle_core::Storage::Cpu(cpu), Some((a, b))) =
            (&*storage, layout.contiguous_offsets())
        {
            return Ok(f(&cpu.as_slice::<f32>()?[a..b]));
        }
    }
    Ok(f(&t.flatten_all()?.to_vec1::<f32>()?))
}

fn flat(t: &Tensor) -> Result<Vec<f32>> {
    with_f32(t, <[f32]>::to_vec)
}

/// Output columns per panel of a linear layer's weights (four 16-lane vectors).
const PANEL: usize = 64;

/// Values a linear layer of `out` × `inp` takes in the panel layout (the last panel padded).
fn panel_len(out: usize, inp: usize) -> usize {
    out.div_ceil(PANEL) * inp * PANEL
}

/// Writes `a` ([rows, cols] row-major, output rows `at..at + rows` of a layer) into the panel
/// layout `t`: panel p holds output columns 64p..64p + 64 as [cols, 64] row-major, so one
/// panel is one contiguous run that the products read front to back.
fn pack_panels_into(a: &[f32], rows: usize, cols: usize, t: &mut [f32], at: usize) {
    for r in 0..rows {
        let j = at + r;
        let base = (j / PANEL) * cols * PANEL + j % PANEL;
        for (c, &v) in a[r * cols..(r + 1) * cols].iter().enumerate() {
            t[base + c * PANEL] = v;
        }
    }
}

#[cfg(test)]
fn pack_panels(a: &[f32], rows: usize, cols: usize) -> Vec<f32> {
    let mut t = vec![0.0; panel_len(rows, cols)];
    pack_panels_into(a, rows, cols, &mut t, 0);
    t
}

/// Multiply-adds below which a loop stays on the calling thread.
const PARALLEL_WORK: usize = 1 << 18;

/// A pointer to the output of [`matmul`], shared by tasks that write disjoint columns.
#[derive(Clone, Copy)]
struct Columns(*mut f32);

impl Columns {
    fn get(self) -> *mut f32 {
        self.0
    }
}

// SAFETY: `matmul`'s tasks write disjoint sets of columns through it, and the buffer outlives
// them (they end before `matmul` returns).
unsafe impl Send for Columns {}
unsafe impl Sync for Columns {}

/// y[n, out] = x[n, inp] · W, with W in the panel layout ([`pack_panels_into`]), one task per
/// panel on the rayon pool.
///
/// Each panel is read once per call, front to back. One row (batch-1 decoding) runs its own
/// loop with the panel's 64 sums in registers; more rows go through `gemm` per panel, the panel
/// being a column-major left operand it reads without repacking, with the output columns in
/// vector lanes. Each output is computed by one task in a fixed order, so the result does not
/// depend on the thread count.
fn matmul(x: &[f32], n: usize, inp: usize, w: &[f32], out: usize, y: &mut [f32]) {
    assert!(x.len() >= n * inp && w.len() >= panel_len(out, inp) && y.len() >= n * out);
    if n == 0 || out == 0 {
        return;
    }
    let yc = Columns(y.as_mut_ptr());
    let one = |p: usize| {
        let j0 = p * PANEL;
        let width = PANEL.min(out - j0);
        let panel = &w[p * inp * PANEL..(p + 1) * inp * PANEL];
        if n == 1 {
            let mut acc = [0f32; PANEL];
            panel_row(&mut acc, &x[..inp], panel);
            // SAFETY: columns j0..j0 + width of the one output row belong to this task.
            unsafe {
                std::ptr::copy_nonoverlapping(acc.as_ptr(), yc.get().add(j0), width);
            }
            return;
        }
        // SAFETY: lhs (i, k) = panel[k·64 + i] for i < width ≤ 64, k < inp; rhs (k, t) =
        // x[t·inp + k]; dst (i, t) = y[t·out + j0 + i]: all inside the asserted lengths, and
        // these columns of y belong to this task.
        unsafe {
            gemm::gemm(
                width,
                n,
                inp,
                yc.get().add(j0),
                out as isize,
                1,
                false,
                panel.as_ptr(),
                PANEL as isize,
                1,
                x.as_ptr(),
                inp as isize,
                1,
                0.0,
                1.0,
                false,
                false,
                false,
                gemm::Parallelism::None,
            );
        }
    };
    let panels = out.div_ceil(PANEL);
    if n * inp * out >= PARALLEL_WORK {
        (0..panels).into_par_iter().for_each(one);
    } else {
        (0..panels).for_each(one);
    }
}

/// acc[l] = Σₖ x[k]·panel[k·64 + l]. With AVX-512 (found at run time) the loop is compiled for
/// 16-wide vectors: the 64 sums stay in registers while the panel streams past.
fn panel_row(acc: &mut [f32; PANEL], x: &[f32], panel: &[f32]) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx512f") {
        // SAFETY: the CPU has AVX-512F (checked just above).
        unsafe { panel_row_avx512(acc, x, panel) };
        return;
    }
    panel_row_body(acc, x, panel);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn panel_row_avx512(acc: &mut [f32; PANEL], x: &[f32], panel: &[f32]) {
    panel_row_body(acc, x, panel);
}

/// Two sets of sums, for even and odd k, so consecutive multiply-adds do not wait on each
/// other; added at the end.
#[inline(always)]
fn panel_row_body(acc: &mut [f32; PANEL], x: &[f32], panel: &[f32]) {
    let (mut even, mut odd) = ([0f32; PANEL], [0f32; PANEL]);
    let mut pairs = panel.chunks_exact(2 * PANEL);
    let mut xs = x.chunks_exact(2);
    for (rows, xk) in (&mut pairs).zip(&mut xs) {
        let (r0, r1) = rows.split_at(PANEL);
        for l in 0..PANEL {
            even[l] += xk[0] * r0[l];
            odd[l] += xk[1] * r1[l];
        }
    }
    if let (Some(&xk), Some(r0)) = (xs.remainder().first(), pairs.remainder().get(..PANEL)) {
        for l in 0..PANEL {
            even[l] += xk * r0[l];
        }
    }
    for l in 0..PANEL {
        acc[l] = even[l] + odd[l];
    }
}

/// y[n, out] = x[n, inp] · wᵀ, with w [out, inp] row-major (the lm_head, which is also the
/// embedding table when tied and so keeps the checkpoint layout).
fn matmul_t(x: &[f32], n: usize, inp: usize, w: &[f32], out: usize, y: &mut [f32]) {
    if n == 1 {
        // One dot product per contiguous row of w, rows split across tasks.
        assert!(x.len() >= inp && w.len() >= out * inp && y.len() >= out);
        let one = |(blk, yb): (usize, &mut [f32])| {
            for (i, v) in yb.iter_mut().enumerate() {
                let j = blk * 256 + i;
                *v = dot(&w[j * inp..(j + 1) * inp], &x[..inp]);
            }
        };
        if out * inp >= PARALLEL_WORK {
            y[..out].par_chunks_mut(256).enumerate().for_each(one);
        } else {
            y[..out].chunks_mut(256).enumerate().for_each(one);
        }
        return;
    }
    gemm_rows(x, n, inp, w, 1, inp as isize, out, y);
}

/// y[n, out] = x[n, inp] · B where B(k, j) = w[k·w_rs + j·w_cs].
#[allow(clippy::too_many_arguments)]
fn gemm_rows(
    x: &[f32],
    n: usize,
    inp: usize,
    w: &[f32],
    w_rs: isize,
    w_cs: isize,
    out: usize,
    y: &mut [f32],
) {
    assert!(x.len() >= n * inp && w.len() >= out * inp && y.len() >= n * out);
    if n == 0 || out == 0 {
        return;
    }
    if inp == 0 {
        y[..n * out].fill(0.0);
        return;
    }
    let threads = rayon::current_num_threads();
    let par = if threads > 1 {
        gemm::Parallelism::Rayon(threads)
    } else {
        gemm::Parallelism::None
    };
    // SAFETY: the three buffers hold at least n·inp, out·inp and n·out values (asserted
    // above); the strides address exactly those elements: lhs (i, k) = x[i·inp + k],
    // rhs (k, j) = w[k·w_rs + j·w_cs] (either stride order covers out·inp values),
    // dst (i, j) = y[i·out + j]. dst does not alias the inputs.
    unsafe {
        gemm::gemm(
            n,
            out,
            inp,
            y.as_mut_ptr(),
            1,
            out as isize,
            false,
            x.as_ptr(),
            1,
            inp as isize,
            w.as_ptr(),
            w_cs,
            w_rs,
            0.0,
            1.0,
            false,
            false,
            false,
            par,
        );
    }
}

/// Sum of products with sixteen independent partial sums, so the compiler can use vector
/// registers (a single running sum would force one addition at a time).
#[inline]
pub(crate) fn dot(a: &[f32], b: &[f32]) -> f32 {
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    let mut acc = [0f32; 16];
    let mut ca = a.chunks_exact(16);
    let mut cb = b.chunks_exact(16);
    for (x, y) in (&mut ca).zip(&mut cb) {
        for l in 0..16 {
            acc[l] += x[l] * y[l];
        }
    }
    let mut s = 0f32;
    for (x, y) in ca.remainder().iter().zip(cb.remainder()) {
        s += x * y;
    }
    acc.iter().sum::<f32>() + s
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

/// rotate_half RoPE on the first 2·cos.len() channels of one head.
#[inline]
fn rope_in_place(x: &mut [f32], cos: &[f32], sin: &[f32]) {
    let half = cos.len();
    let (a, rest) = x.split_at_mut(half);
    let b = &mut rest[..half];
    for i in 0..half {
        let (x1, x2) = (a[i], b[i]);
        a[i] = x1 * cos[i] - x2 * sin[i];
        b[i] = x2 * cos[i] + x1 * sin[i];
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
    /// [vocab, hidden]
    embed: Vec<f32>,
    /// [vocab, hidden]; None when tied to the embedding. The head stays f32 in every weight
    /// format: its greedy pick goes through `screen`, which is cheaper than a bf16 head.
    lm_head: Option<Vec<f32>>,
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
        mut w: HashMap<String, Tensor>,
        format: WeightFormat,
    ) -> Result<Self> {
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
        let embed = flat(&take(EMBED)?)?;
        let mut layers = Vec::with_capacity(spec.num_layers);
        for l in 0..spec.num_layers {
            let p = format!("model.layers.{l}.");
            let mut t = |n: &str| take(&format!("{p}{n}"));
            let mut part = |n: &str, bias: bool| -> Result<(Tensor, Option<Tensor>)> {
                let w = t(&format!("{n}.weight"))?;
                let b = if bias {
                    Some(t(&format!("{n}.bias"))?)
                } else {
                    None
                };
                Ok((w, b))
            };
            let qkv = if spec.fused_qkv {
                Linear::stack(vec![part("self_attn.qkv_proj", false)?], format)?
            } else {
                Linear::stack(
                    vec![
                        part("self_attn.q_proj", spec.qkv_bias)?,
                        part("self_attn.k_proj", spec.qkv_bias)?,
                        part("self_attn.v_proj", spec.qkv_bias)?,
                    ],
                    format,
                )?
            };
            let o = Linear::stack(vec![part("self_attn.o_proj", spec.o_bias)?], format)?;
            let gate_up = if spec.fused_gate_up {
                Linear::stack(vec![part("mlp.gate_up_proj", false)?], format)?
            } else {
                Linear::stack(
                    vec![
                        part("mlp.gate_proj", spec.mlp_bias)?,
                        part("mlp.up_proj", spec.mlp_bias)?,
                    ],
                    format,
                )?
            };
            let down = Linear::stack(vec![part("mlp.down_proj", spec.mlp_bias)?], format)?;
            let qk_norm = if spec.qk_norm {
                // Always Llama style (Qwen3RMSNorm), per head over head_dim.
                Some((
                    flat(&t("self_attn.q_norm.weight")?)?,
                    flat(&t("self_attn.k_norm.weight")?)?,
                ))
            } else {
                None
            };
            let ff_norms = if spec.sandwich_norms {
                Some((
                    norm(t("pre_feedforward_layernorm.weight")?)?,
                    norm(t("post_feedforward_layernorm.weight")?)?,
                ))
            } else {
                None
            };
            layers.push(Layer {
                input_norm: norm(t("input_layernorm.weight")?)?,
                post_attn_norm: norm(t("post_attention_layernorm.weight")?)?,
                ff_norms,
                qkv,
                o,
                qk_norm,
                gate_up,
                down,
                window: spec.layer_windows.get(l).copied().flatten(),
            });
        }
        let final_norm = norm(take("model.norm.weight")?)?;
        let lm_head = w.remove(LM_HEAD).map(|h| flat(&h)).transpose()?;
        // The soft-cap's tanh can round distinct logits to one f32 value, so a capped head
        // computes every logit.
        let screen = match spec.final_softcap {
            None => Screen::new(
                lm_head.as_deref().unwrap_or(&embed),
                spec.vocab_size,
                spec.hidden_size,
            ),
            Some(_) => None,
        };
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
        let per_layer = slots * capacity * kv_dim;
        let n = self.spec.num_layers;
        KvCache {
            slots,
            capacity,
            kv_dim,
            k: (0..n).map(|_| vec![0.0; per_layer]).collect(),
            v: (0..n).map(|_| vec![0.0; per_layer]).collect(),
            lens: vec![0; slots],
            prefix: None,
        }
    }

    /// Logits of the last position of `prompt` alone (a fresh one-slot cache).
    pub fn prompt_logits(&self, prompt: &[u32]) -> Result<Vec<f32>> {
        let mut cache = self.new_cache(1, prompt.len().max(1));
        let mut ws = Workspace::default();
        let seg = [Segment {
            slot: 0,
            tokens: prompt,
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
        matmul_t(normed, ns, hidden, self.head(), vocab, logits);
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
            self.head(),
            normed,
            ns,
            penalty,
            &mut ws.screen,
            &mut ws.tokens,
        );
        Ok(&ws.tokens)
    }

    /// The f32 output head, [vocab, hidden].
    fn head(&self) -> &[f32] {
        self.lm_head.as_deref().unwrap_or(&self.embed)
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
            }
        }
        let n = ws.tok_slot.len();
        if n == 0 {
            return Ok(());
        }
        // Embeddings.
        let h = sized(&mut ws.h, n * hidden);
        let mut t = 0;
        for seg in segs {
            for &tok in seg.tokens {
                let row = &self.embed[tok as usize * hidden..(tok as usize + 1) * hidden];
                let dst = &mut h[t * hidden..(t + 1) * hidden];
                match s.embed_scale {
                    Some(sc) => {
                        let sc = sc as f32;
                        for (d, &v) in dst.iter_mut().zip(row) {
                            *d = v * sc;
                        }
                    }
                    None => dst.copy_from_slice(row),
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
            layer.qkv.forward(x, n, qkv);
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
            layer.o.forward(attn, n, out);
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
            layer.gate_up.forward(x, n, gate_up);
            for (gu, a) in gate_up
                .chunks_exact(2 * inter)
                .zip(act.chunks_exact_mut(inter))
            {
                let (g, u) = gu.split_at(inter);
                for ((a, &g), &u) in a.iter_mut().zip(g).zip(u) {
                    *a = activation(s.activation, g) * u;
                }
            }
            layer.down.forward(act, n, out);
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

/// Default-rule inverse frequencies `1.0 / (θ ** (arange(0, d, 2).float() / d))` in f32.
fn default_inv_freq(r: &RopeSpec) -> Vec<f32> {
    let d = r.rotary_dim;
    let theta = r.theta as f32;
    (0..d / 2)
        .map(|i| 1.0f32 / theta.powf((2 * i) as f32 / d as f32))
        .collect()
}

/// Inverse frequencies and attention scaling (the cos/sin multiplier) for a forward call whose
/// longest position is `seq_len − 1` (model-formats.md §2.3; transformers 5.24
/// `modeling_rope_utils.py` `ROPE_INIT_FUNCTIONS`).
pub fn rope_frequencies(r: &RopeSpec, seq_len: f64) -> (Vec<f32>, f32) {
    let d = r.rotary_dim as f64;
    let base = &default_inv_freq(r);
    let max_pos = r.max_position_embeddings as f64;
    match &r.scaling {
        RopeScaling::Default => (base.clone(), 1.0),
        RopeScaling::Linear { factor } => (base.iter().map(|&b| b / *factor as f32).collect(), 1.0),
        RopeScaling::Dynamic { factor } => {
            if seq_len <= max_pos {
                return (base.clone(), 1.0);
            }
            let theta =
                r.theta * ((factor * seq_len / max_pos) - (factor - 1.0)).powf(d / (d - 2.0));
            let theta = theta as f32;
            (
                (0..r.rotary_dim / 2)
                    .map(|i| 1.0f32 / theta.powf((2 * i) as f32 / d as f32))
                    .collect(),
                1.0,
            )
        }
        RopeScaling::Llama3 {
            factor,
            low_freq_factor,
            high_freq_factor,
            original_max,
        } => {
            // f32 throughout, as `_compute_llama3_parameters` runs on f32 tensors.
            let (f, lo, hi, o) = (
                *factor as f32,
                *low_freq_factor as f32,
                *high_freq_factor as f32,
                *original_max as f32,
            );
            let (low_wl, high_wl) = (o / lo, o / hi);
            let inv = base
                .iter()
                .map(|&b| {
                    let wl = 2.0 * std::f32::consts::PI / b;
                    if wl < high_wl {
                        b
                    } else if wl > low_wl {
                        b / f
                    } else {
                        let s = (o / wl - lo) / (hi - lo);
                        (1.0 - s) * b / f + s * b
                    }
                })
                .collect();
            (inv, 1.0)
        }
        RopeScaling::Yarn {
            factor,
            original_max,
            beta_fast,
            beta_slow,
            truncate,
            attention_scaling,
        } => {
            // The correction range in f64 (Python floats), the frequencies in f32 tensors.
            let corr = |n: f64| {
                d * (original_max / (n * 2.0 * std::f64::consts::PI)).ln() / (2.0 * r.theta.ln())
            };
            let (mut low, mut high) = (corr(*beta_fast), corr(*beta_slow));
            if *truncate {
                low = low.floor();
                high = high.ceil();
            }
            let low = low.max(0.0);
            let high = high.min(d - 1.0);
            let high = if low == high { high + 0.001 } else { high };
            let theta = r.theta as f32;
            let f = *factor as f32;
            let inv = (0..r.rotary_dim / 2)
                .map(|i| {
                    let pos = theta.powf((2 * i) as f32 / d as f32);
                    let extra = 1.0 / pos;
                    let inter = 1.0 / (f * pos);
                    let ramp =
                        ((i as f32 - low as f32) / (high as f32 - low as f32)).clamp(0.0, 1.0);
                    let e = 1.0 - ramp;
                    inter * (1.0 - e) + extra * e
                })
                .collect();
            (inv, *attention_scaling as f32)
        }
        RopeScaling::LongRope {
            short_factor,
            long_factor,
            original_max,
            attention_scaling,
        } => {
            let ext = if seq_len > *original_max {
                long_factor
            } else {
                short_factor
            };
            let theta = r.theta as f32;
            let inv = ext
                .iter()
                .enumerate()
                .map(|(i, &e)| 1.0f32 / (e as f32 * theta.powf((2 * i) as f32 / d as f32)))
                .collect();
            (inv, *attention_scaling as f32)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    /// inv_freq and attention scaling for every rope_type against transformers 5.24.0
    /// `ROPE_INIT_FUNCTIONS` (tests/fixtures/rope/cases.json, made by
    /// tests/reference/make_rope_fixtures.py). Relative tolerance 1e-6: both sides are f32.
    #[test]
    fn rope_frequencies_match_transformers() {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/rope/cases.json");
        let doc: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
        let cases = doc["cases"].as_array().unwrap();
        assert!(cases.len() >= 10);
        for c in cases {
            let label = format!("{} seq_len {}", c["name"], c["seq_len"]);
            let spec =
                ModelSpec::from_json(Path::new("config.json"), c["config"].as_object().unwrap())
                    .unwrap();
            let (inv, scale) = rope_frequencies(&spec.rope, c["seq_len"].as_f64().unwrap());
            let want: Vec<f32> = c["inv_freq"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap() as f32)
                .collect();
            assert_eq!(inv.len(), want.len(), "{label}");
            for (i, (a, b)) in inv.iter().zip(&want).enumerate() {
                assert!(
                    (a - b).abs() <= 1e-6 * b.abs().max(1e-30),
                    "{label}: inv_freq[{i}] {a} vs {b}"
                );
            }
            let ws = c["attention_scaling"].as_f64().unwrap() as f32;
            assert!(
                (scale - ws).abs() <= 1e-6,
                "{label}: scaling {scale} vs {ws}"
            );
        }
    }

    /// The gemm calls' strides and the panel layout: y = x·wᵀ against the textbook triple
    /// loop, for the head layout and the panel layout, one row and several, a partial last
    /// panel, on one task and on the pool.
    #[test]
    fn matmul_t_is_x_times_w_transposed() {
        for (n, inp, out) in [(3, 37, 5), (7, 301, 150)] {
            let x: Vec<f32> = (0..n * inp).map(|i| ((i * 7) % 11) as f32 - 5.0).collect();
            let w: Vec<f32> = (0..out * inp)
                .map(|i| ((i * 5) % 13) as f32 * 0.25)
                .collect();
            let mut y = vec![0.0; n * out];
            matmul_t(&x, n, inp, &w, out, &mut y);
            for i in 0..n {
                for j in 0..out {
                    let want: f32 = (0..inp).map(|k| x[i * inp + k] * w[j * inp + k]).sum();
                    assert!((y[i * out + j] - want).abs() < 1e-3, "({i},{j})");
                }
            }
            let wp = pack_panels(&w, out, inp);
            let mut y2 = vec![0.0; n * out];
            matmul(&x, n, inp, &wp, out, &mut y2);
            for (a, b) in y.iter().zip(&y2) {
                assert!((a - b).abs() < 1e-3);
            }
            // The single-row paths (batch-1 decoding).
            let mut y1 = vec![0.0; out];
            matmul_t(&x[inp..2 * inp], 1, inp, &w, out, &mut y1);
            for (a, b) in y1.iter().zip(&y[out..2 * out]) {
                assert!((a - b).abs() < 1e-3);
            }
            matmul(&x[inp..2 * inp], 1, inp, &wp, out, &mut y1);
            for (a, b) in y1.iter().zip(&y[out..2 * out]) {
                assert!((a - b).abs() < 1e-3);
            }
        }
    }

    #[test]
    fn dot_handles_every_length() {
        for n in [0, 1, 15, 16, 17, 64, 100] {
            let a: Vec<f32> = (0..n).map(|i| i as f32).collect();
            let want: f32 = a.iter().map(|v| v * v).sum();
            assert_eq!(dot(&a, &a), want, "length {n}");
        }
    }

    /// rotate_half (transformers `apply_rotary_pos_emb`): out = x·cos + rotate_half(x)·sin with
    /// rotate_half(x) = [−x₂, x₁].
    #[test]
    fn rope_rotates_halves() {
        let mut x = [1.0, 2.0, 3.0, 4.0];
        let (c, s) = ([0.5, 0.25], [2.0, 3.0]);
        rope_in_place(&mut x, &c, &s);
        assert_eq!(
            x,
            [
                1.0 * 0.5 - 3.0 * 2.0,
                2.0 * 0.25 - 4.0 * 3.0,
                3.0 * 0.5 + 2.0,
                4.0 * 0.25 + 6.0
            ]
        );
    }
}
