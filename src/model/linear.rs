//! Linear layers: y = x·Wᵀ + b with W kept in the layout of the chosen weight format.
//!
//! W is the checkpoint's [out, in] matrix. Stacking several projections (q, k, v; gate, up)
//! into one layer only places their rows one after another, which changes no dot product, and
//! lets all of them run as one matrix product.

use crate::error::{Error, Result};
use crate::kernels::bf16::Bf16Matrix;
use crate::kernels::blocks::CodeMatrix;
use crate::kernels::dense::{
    dot, low_rank_outputs, matmul, matmul_half, matmul_panels, pack_panels_into, panel_len, Half,
};
use crate::kernels::ggml::{GgmlMatrix, GgmlType};
use crate::kernels::nf4::{self, Codebook, Quantised};
use crate::kernels::PARALLEL_WORK;
use crate::model::lora::LowRank;
use candle_core::{DType, Tensor, WithDType};
use rayon::prelude::*;

/// How the runner holds the weights of the matrix products.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, clap::ValueEnum)]
pub enum WeightFormat {
    /// f32, as the reference computes: answers equal the reference library's.
    #[default]
    F32,
    /// bf16 weights and activations in the matrix products, f32 accumulation and everything
    /// else f32: about 1.5x as fast on CPUs with AVX-512 BF16, an approximation of the model.
    Bf16,
}

impl WeightFormat {
    /// The run.json `compute_dtype`.
    pub fn compute_dtype(self) -> &'static str {
        match self {
            WeightFormat::F32 => "f32",
            WeightFormat::Bf16 => "bf16 matrix products (approximation), f32 elsewhere",
        }
    }
}

/// The base model's linear layers quantised to 4 bits as bitsandbytes does for QLoRA
/// (transformers' `BitsAndBytesConfig(load_in_4bit=True, bnb_4bit_quant_type=...,
/// bnb_4bit_use_double_quant=...)`): blocks of 64 weights, each with an absmax scale.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "kebab-case")]
pub enum BaseQuant {
    /// NF4 with double quantisation of the scales: how QLoRA trains (`nf4`, double quant on).
    Nf4,
    /// NF4, scales kept in f32 (`bnb_4bit_use_double_quant=False`).
    Nf4Single,
    /// bitsandbytes' FP4 with double quantisation.
    Fp4,
    /// FP4, scales kept in f32.
    Fp4Single,
}

impl BaseQuant {
    /// The 4-bit code.
    pub fn codebook(self) -> Codebook {
        match self {
            BaseQuant::Nf4 | BaseQuant::Nf4Single => Codebook::Nf4,
            BaseQuant::Fp4 | BaseQuant::Fp4Single => Codebook::Fp4,
        }
    }

    /// Whether the scales are quantised again (8-bit, blocks of 256).
    pub fn double_quant(self) -> bool {
        matches!(self, BaseQuant::Nf4 | BaseQuant::Fp4)
    }

    /// The name on the command line and in run records.
    pub fn name(self) -> &'static str {
        match self {
            BaseQuant::Nf4 => "nf4",
            BaseQuant::Nf4Single => "nf4-single",
            BaseQuant::Fp4 => "fp4",
            BaseQuant::Fp4Single => "fp4-single",
        }
    }

    /// The quantisation in words, for reports.
    pub fn describe(self) -> &'static str {
        match self {
            BaseQuant::Nf4 => {
                "NF4 (4-bit, blocks of 64, scales double-quantised: the base QLoRA trains on)"
            }
            BaseQuant::Nf4Single => "NF4 (4-bit, blocks of 64, f32 scales)",
            BaseQuant::Fp4 => "FP4 (4-bit, blocks of 64, scales double-quantised)",
            BaseQuant::Fp4Single => "FP4 (4-bit, blocks of 64, f32 scales)",
        }
    }

    /// bitsandbytes' `bnb_4bit_quant_type`.
    pub fn quant_type(self) -> &'static str {
        match self.codebook() {
            Codebook::Nf4 => "nf4",
            Codebook::Fp4 => "fp4",
        }
    }
}

/// A linear layer. `w` holds the checkpoint's [out, inp] matrix in the layout its kernel reads
/// front to back without repacking on every call (repacking would read and write every weight
/// once more per step): f32 in panels of 64 output columns (`crate::kernels::dense`), bf16 in
/// blocks of 16 (`crate::kernels::bf16`).
///
/// With the f32 format, a matrix stored bf16 or f16 in the checkpoint stays 16-bit in the same
/// panels and is widened inside the product: exact (the same f32 values the reference computes
/// on after loading with dtype float32) at half the memory. A matrix changed by an adapter
/// merge is f32 and stays f32.
pub struct Linear {
    w: LinearWeights,
    pub out: usize,
    pub inp: usize,
    b: Option<Vec<f32>>,
    /// Unmerged adapters: low-rank terms added to the output rows of the tokens of one variant.
    terms: Vec<Term>,
}

/// A low-rank term of one variant over the output rows `at..at + lr.out` (its module's place in
/// the stacked matrix).
struct Term {
    variant: usize,
    at: usize,
    lr: LowRank,
}

enum LinearWeights {
    F32(Vec<f32>),
    /// Stored bf16, widened exactly inside the product.
    StoredBf16(Vec<half::bf16>),
    /// Stored f16, widened exactly inside the product.
    StoredF16(Vec<half::f16>),
    /// The bf16 approximation (`--weights bf16`).
    Bf16(Bf16Matrix),
    /// 4-bit codes with a scale per block (a base quantised as bitsandbytes does for QLoRA),
    /// dequantised to f32 inside the product.
    Codes(CodeMatrix),
    /// GGUF block-quantised rows as the file stores them, dequantised inside the product.
    Ggml(GgmlMatrix),
}

impl Linear {
    /// Stacks the rows of one or more checkpoint matrices (with their biases, if any),
    /// transposing (f32) or packing (bf16) each straight into place.
    ///
    /// With `codes`, the checkpoint matrices come quantised to 4 bits (one [`Quantised`] per
    /// part, each quantised on its own as bitsandbytes quantises each `nn.Linear` weight; the
    /// parts' tensors then only give the shapes) and the layer keeps the codes. The input size
    /// must be a multiple of the block size (64), which the loader checks first.
    pub fn stack(
        parts: Vec<(Tensor, Option<Tensor>)>,
        format: WeightFormat,
        codes: Option<(Codebook, Vec<Quantised>)>,
    ) -> Result<Linear> {
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
        let stored = parts.first().map_or(DType::F32, |(w, _)| w.dtype());
        let stored = if parts.iter().all(|(w, _)| w.dtype() == stored) {
            stored
        } else {
            DType::F32
        };
        let len = panel_len(out, inp);
        let mut w = match (format, stored) {
            _ if codes.is_some() => {
                if !inp.is_multiple_of(nf4::BLOCK) {
                    return Err(Error::internal(
                        "a 4-bit layer's input size must be a multiple of 64",
                    ));
                }
                let book = codes.as_ref().map_or(Codebook::Nf4, |c| c.0);
                LinearWeights::Codes(CodeMatrix::new(out, inp, nf4::BLOCK, book.values()))
            }
            (WeightFormat::F32, DType::BF16) => {
                LinearWeights::StoredBf16(vec![half::bf16::ZERO; len])
            }
            (WeightFormat::F32, DType::F16) => LinearWeights::StoredF16(vec![half::f16::ZERO; len]),
            (WeightFormat::F32, _) => LinearWeights::F32(vec![0.0; len]),
            (WeightFormat::Bf16, _) => LinearWeights::Bf16(Bf16Matrix::new(out, inp)),
        };
        let mut quantised = codes.map(|c| c.1).unwrap_or_default().into_iter();
        let mut b = Vec::new();
        let mut at = 0;
        for ((wt, bt), (o, _)) in parts.into_iter().zip(dims) {
            match &mut w {
                LinearWeights::F32(w) => with_f32(&wt, |a| pack_panels_into(a, o, inp, w, at))?,
                LinearWeights::StoredBf16(w) => {
                    with_values(&wt, |a| pack_panels_into(a, o, inp, w, at))?
                }
                LinearWeights::StoredF16(w) => {
                    with_values(&wt, |a| pack_panels_into(a, o, inp, w, at))?
                }
                LinearWeights::Bf16(m) => with_f32(&wt, |a| m.put_rows(a, o, at))?,
                LinearWeights::Codes(m) => {
                    let q = quantised
                        .next()
                        .ok_or_else(|| Error::internal("a 4-bit layer part without its codes"))?;
                    if q.codes.len() * 2 != o * inp {
                        return Err(Error::internal("4-bit codes of the wrong size"));
                    }
                    m.put_rows(&q.codes, &q.scales, o, at);
                }
                LinearWeights::Ggml(_) => {
                    return Err(Error::internal("GGUF rows are stacked by stack_stored"))
                }
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
            terms: Vec::new(),
        })
    }

    /// Stacks the rows of one or more matrices kept in a GGUF file's block formats (each part
    /// its type, row count and bytes in row order), with their biases if every part has one.
    pub fn stack_stored(
        parts: Vec<(GgmlType, usize, Vec<u8>, Option<Tensor>)>,
        inp: usize,
    ) -> Result<Linear> {
        let with_bias = parts.iter().all(|p| p.3.is_some());
        let mut m = GgmlMatrix::new(inp);
        let mut b = Vec::new();
        for (t, rows, bytes, bias) in parts {
            if !inp.is_multiple_of(t.block().0) || bytes.len() != rows * t.row_bytes(inp) {
                return Err(Error::internal("stored rows of the wrong size"));
            }
            m.push(t, rows, bytes);
            if let (true, Some(bt)) = (with_bias, bias) {
                with_f32(&bt, |v| b.extend_from_slice(v))?;
            }
        }
        Ok(Linear {
            out: m.out,
            inp,
            w: LinearWeights::Ggml(m),
            b: with_bias.then_some(b),
            terms: Vec::new(),
        })
    }

    /// Adds `variant`'s low-rank term over the output rows starting at `at`.
    pub fn attach(&mut self, variant: usize, at: usize, lr: LowRank) -> Result<()> {
        if lr.inp != self.inp || at + lr.out > self.out {
            return Err(Error::internal(format!(
                "the low-rank term of {} ([{}, {}] at row {at}) does not fit its layer [{}, {}]",
                lr.module, lr.out, lr.inp, self.out, self.inp
            )));
        }
        self.terms.push(Term { variant, at, lr });
        Ok(())
    }

    /// x: [n, inp] → y: [n, out]. `rows[t]` is the variant of row t: rows of a variant with an
    /// unmerged adapter get its low-rank terms on top of the shared base product.
    pub fn forward(&self, x: &[f32], n: usize, y: &mut [f32], rows: &[usize]) {
        match &self.w {
            LinearWeights::F32(w) => matmul(x, n, self.inp, w, self.out, y),
            LinearWeights::StoredBf16(w) => matmul_half(x, n, self.inp, w, self.out, y),
            LinearWeights::StoredF16(w) => matmul_half(x, n, self.inp, w, self.out, y),
            LinearWeights::Bf16(m) => m.matmul(x, n, y),
            LinearWeights::Codes(m) => matmul_panels(x, n, self.inp, m, self.out, y),
            LinearWeights::Ggml(m) => m.matmul(x, n, y),
        }
        if let Some(b) = &self.b {
            for row in y.chunks_exact_mut(self.out) {
                for (v, &bb) in row.iter_mut().zip(b) {
                    *v += bb;
                }
            }
        }
        for term in &self.terms {
            self.add_low_rank(term, x, n, y, rows);
        }
    }

    /// Adds one variant's low-rank term, s·((x·Aᵀ)·Bᵀ + b_B), to the outputs of its rows (peft's
    /// order of operations), all of the variant's rows together: each row of A and of Bᵀ is
    /// read once for all of them.
    fn add_low_rank(&self, term: &Term, x: &[f32], n: usize, y: &mut [f32], rows: &[usize]) {
        let lr = &term.lr;
        let sel: Vec<usize> = (0..n)
            .filter(|&t| rows.get(t) == Some(&term.variant))
            .collect();
        let (m, rank, inp) = (sel.len(), lr.rank, self.inp);
        if m == 0 || rank == 0 {
            return;
        }
        let big = m * rank * inp.max(lr.out) >= PARALLEL_WORK;
        // z = x·Aᵀ, [m, rank]: one task per row of A.
        let za = |ar: &[f32]| -> Vec<f32> {
            sel.iter()
                .map(|&t| dot(ar, &x[t * inp..(t + 1) * inp]))
                .collect()
        };
        let zt: Vec<Vec<f32>> = if big {
            lr.a.par_chunks_exact(inp).map(za).collect()
        } else {
            lr.a.chunks_exact(inp).map(za).collect()
        };
        let z: Vec<f32> = (0..m)
            .flat_map(|i| zt.iter().map(move |zr| zr[i]))
            .collect();
        // u = z·Bᵀ, [m, out], in blocks of outputs ([m, width] each, one task per block).
        const BLOCK: usize = 256;
        let mut u = vec![0f32; m * lr.out];
        let fill = |(b, ub): (usize, &mut [f32])| {
            low_rank_outputs(&z, rank, &lr.bt[b * BLOCK..], lr.out, ub);
        };
        if big {
            u.par_chunks_mut(m * BLOCK).enumerate().for_each(fill);
        } else {
            u.chunks_mut(m * BLOCK).enumerate().for_each(fill);
        }
        for (b, ub) in u.chunks(m * BLOCK).enumerate() {
            let width = ub.len() / m;
            let o0 = b * BLOCK;
            for (&t, ui) in sel.iter().zip(ub.chunks_exact(width)) {
                let dst = &mut y[t * self.out + term.at + o0..][..width];
                for (o, (v, &uo)) in dst.iter_mut().zip(ui).enumerate() {
                    let mut uo = uo;
                    if let Some(bb) = &lr.b_bias {
                        uo += bb[o0 + o];
                    }
                    *v += uo * lr.scaling;
                }
            }
        }
    }
}

/// Calls `f` on the f32 values of `t` in row-major order (widened when stored 16-bit).
fn with_f32<R>(t: &Tensor, f: impl FnOnce(&[f32]) -> R) -> Result<R> {
    with_values(t, f)
}

/// Calls `f` on the values of `t` as `T` in row-major order, borrowing its storage when it is
/// contiguous and already of type `T` (no copy), converting otherwise.
pub(crate) fn with_values<T: WithDType, R>(t: &Tensor, f: impl FnOnce(&[T]) -> R) -> Result<R> {
    if t.dtype() == T::DTYPE {
        let (storage, layout) = t.storage_and_layout();
        if let (candle_core::Storage::Cpu(cpu), Some((a, b))) =
            (&*storage, layout.contiguous_offsets())
        {
            return Ok(f(&cpu.as_slice::<T>()?[a..b]));
        }
    }
    Ok(f(&t.to_dtype(T::DTYPE)?.flatten_all()?.to_vec1::<T>()?))
}

/// The f32 values of `t` in row-major order. A 16-bit tensor is widened straight into the
/// result, so only the result is allocated (an output head of an 8B-class model is 2 GB in
/// f32).
pub fn flat(t: &Tensor) -> Result<Vec<f32>> {
    fn widened<H: Half + WithDType>(t: &Tensor) -> Result<Vec<f32>> {
        with_values(t, |s: &[H]| {
            let mut v = vec![0.0; s.len()];
            H::widen(s, &mut v);
            v
        })
    }
    match t.dtype() {
        DType::BF16 => widened::<half::bf16>(t),
        DType::F16 => widened::<half::f16>(t),
        _ => with_f32(t, <[f32]>::to_vec),
    }
}
