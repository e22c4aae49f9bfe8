//! The optional bf16 weight format (`--weights bf16`): an approximation of the model for speed.
//!
//! Weights and the activations entering each matrix product are rounded to bfloat16 (round to
//! nearest even, as `torch.Tensor.bfloat16()` does); each product sums pairs of bf16 products
//! into f32 accumulators. On CPUs with AVX-512 BF16 that is one `vdpbf16ps` instruction per 32
//! multiply-adds, twice the f32 rate, and the weights take half the memory. Everything outside
//! the matrix products (norms, attention, softmax, the output head) stays f32. The answers are
//! not those of the f32 model: runs say so (run.json `compute_dtype`), and the agreement with
//! f32 answers is measured by `tests/runner_reference.rs`.
//!
//! Layout: output columns in blocks of 16; within a block, for each pair of input rows
//! (k, k+1), 16 lanes each holding (w[k][j], w[k+1][j]) as two bf16 in one u32 (low half k),
//! which is the operand layout of `vdpbf16ps`.

use rayon::prelude::*;

const LANES: usize = 16;

/// f32 → bf16 bits, round to nearest even (NaN stays NaN).
pub fn to_bf16(x: f32) -> u16 {
    let b = x.to_bits();
    if x.is_nan() {
        return ((b >> 16) | 0x40) as u16;
    }
    ((b + 0x7fff + ((b >> 16) & 1)) >> 16) as u16
}

pub fn from_bf16(h: u16) -> f32 {
    f32::from_bits((h as u32) << 16)
}

/// A weight matrix y = x·Wᵀ (W [out, inp]) in the packed bf16 layout.
pub struct Bf16Matrix {
    packed: Vec<u32>,
    out: usize,
    inp: usize,
    pairs: usize,
    blocks: usize,
}

thread_local! {
    /// Packed activations and per-block outputs, reused across calls.
    static SCRATCH: std::cell::RefCell<(Vec<u32>, Vec<f32>)> =
        const { std::cell::RefCell::new((Vec::new(), Vec::new())) };
}

impl Bf16Matrix {
    /// A zero matrix of `out` × `inp`, filled by [`Bf16Matrix::put_rows`].
    pub fn new(out: usize, inp: usize) -> Self {
        let pairs = inp.div_ceil(2);
        let blocks = out.div_ceil(LANES);
        Bf16Matrix {
            packed: vec![0; blocks * pairs * LANES],
            out,
            inp,
            pairs,
            blocks,
        }
    }

    /// Writes rows of W (output columns `at..at + rows`), [rows, inp] row-major.
    pub fn put_rows(&mut self, w: &[f32], rows: usize, at: usize) {
        for r in 0..rows {
            let j = at + r;
            let (b, l) = (j / LANES, j % LANES);
            let row = &w[r * self.inp..(r + 1) * self.inp];
            for p in 0..self.pairs {
                let lo = to_bf16(row[2 * p]) as u32;
                let hi = row.get(2 * p + 1).map_or(0, |&v| to_bf16(v) as u32);
                self.packed[(b * self.pairs + p) * LANES + l] = lo | (hi << 16);
            }
        }
    }

    pub fn bytes(&self) -> usize {
        self.packed.len() * 4
    }

    /// y[n, out] = bf16(x)[n, inp] · bf16(W)ᵀ with f32 accumulation.
    pub fn matmul(&self, x: &[f32], n: usize, y: &mut [f32]) {
        let (inp, out, pairs) = (self.inp, self.out, self.pairs);
        assert!(x.len() >= n * inp && y.len() >= n * out);
        if n == 0 {
            return;
        }
        SCRATCH.with_borrow_mut(|(xp, yt)| {
            xp.clear();
            for t in 0..n {
                let row = &x[t * inp..(t + 1) * inp];
                for p in 0..pairs {
                    let lo = to_bf16(row[2 * p]) as u32;
                    let hi = row.get(2 * p + 1).map_or(0, |&v| to_bf16(v) as u32);
                    xp.push(lo | (hi << 16));
                }
            }
            let tile = n * LANES;
            if yt.len() < self.blocks * tile {
                yt.resize(self.blocks * tile, 0.0);
            }
            let xp: &[u32] = xp;
            let fast = has_avx512_bf16();
            let one = |(b, ys): (usize, &mut [f32])| {
                let wb = &self.packed[b * pairs * LANES..(b + 1) * pairs * LANES];
                if fast {
                    #[cfg(target_arch = "x86_64")]
                    // SAFETY: the CPU has AVX-512F and AVX-512 BF16 (checked by `fast`); the
                    // slices hold pairs·16 weights, n·pairs activations and n·16 outputs.
                    unsafe {
                        avx512::block(wb, xp, n, pairs, ys)
                    }
                } else {
                    block_scalar(wb, xp, n, pairs, ys);
                }
            };
            let work = &mut yt[..self.blocks * tile];
            if n * out * inp >= 1 << 18 {
                work.par_chunks_mut(tile).enumerate().for_each(one);
            } else {
                work.chunks_mut(tile).enumerate().for_each(one);
            }
            for t in 0..n {
                let yr = &mut y[t * out..(t + 1) * out];
                for (b, chunk) in yr.chunks_mut(LANES).enumerate() {
                    let src = &yt[b * tile + t * LANES..b * tile + t * LANES + chunk.len()];
                    chunk.copy_from_slice(src);
                }
            }
        });
    }
}

fn has_avx512_bf16() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        std::arch::is_x86_feature_detected!("avx512f")
            && std::arch::is_x86_feature_detected!("avx512bf16")
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}

/// The portable form of one block: per lane, the sum over pairs of lo·lo + hi·hi in f32.
fn block_scalar(wb: &[u32], xp: &[u32], n: usize, pairs: usize, ys: &mut [f32]) {
    for t in 0..n {
        let xr = &xp[t * pairs..(t + 1) * pairs];
        for l in 0..LANES {
            let mut acc = 0f32;
            for (p, &xv) in xr.iter().enumerate() {
                let wv = wb[p * LANES + l];
                acc += from_bf16(wv as u16) * from_bf16(xv as u16)
                    + from_bf16((wv >> 16) as u16) * from_bf16((xv >> 16) as u16);
            }
            ys[t * LANES + l] = acc;
        }
    }
}

#[cfg(target_arch = "x86_64")]
mod avx512 {
    use super::LANES;
    use std::arch::x86_64::*;

    /// One block of 16 output columns for every token, tokens in groups of `T`.
    #[target_feature(enable = "avx512f,avx512bf16")]
    pub unsafe fn block(wb: &[u32], xp: &[u32], n: usize, pairs: usize, ys: &mut [f32]) {
        let mut t0 = 0;
        while t0 + 8 <= n {
            group::<8>(wb, xp, t0, pairs, ys);
            t0 += 8;
        }
        while t0 + 4 <= n {
            group::<4>(wb, xp, t0, pairs, ys);
            t0 += 4;
        }
        while t0 < n {
            group::<1>(wb, xp, t0, pairs, ys);
            t0 += 1;
        }
    }

    #[target_feature(enable = "avx512f,avx512bf16")]
    unsafe fn group<const T: usize>(
        wb: &[u32],
        xp: &[u32],
        t0: usize,
        pairs: usize,
        ys: &mut [f32],
    ) {
        let mut acc = [_mm512_setzero_ps(); T];
        let x = &xp[t0 * pairs..(t0 + T) * pairs];
        let w = &wb[..pairs * LANES];
        for p in 0..pairs {
            // SAFETY: w holds pairs·16 values, so 16 start at p·16.
            let wv: __m512bh =
                std::mem::transmute(_mm512_loadu_si512(w.as_ptr().add(p * LANES) as *const _));
            for (t, a) in acc.iter_mut().enumerate() {
                let xv: __m512bh = std::mem::transmute(_mm512_set1_epi32(x[t * pairs + p] as i32));
                *a = _mm512_dpbf16_ps(*a, xv, wv);
            }
        }
        for (t, a) in acc.iter().enumerate() {
            let dst = &mut ys[(t0 + t) * LANES..(t0 + t + 1) * LANES];
            _mm512_storeu_ps(dst.as_mut_ptr(), *a);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Round to nearest even on the 16 dropped bits (the rule of `torch.Tensor.bfloat16()`;
    /// the values are exact binary fractions, worked by hand).
    #[test]
    fn rounding_is_nearest_even() {
        assert_eq!(to_bf16(1.0), 0x3f80);
        // 1 + 2^-8 lies halfway between 1 and 1 + 2^-7: ties go to the even mantissa (1.0).
        assert_eq!(to_bf16(1.0 + 1.0 / 256.0), 0x3f80);
        // 1 + 3·2^-8 lies halfway between 1 + 2^-7 and 1 + 2^-6: ties go up to the even one.
        assert_eq!(to_bf16(1.0 + 3.0 / 256.0), 0x3f82);
        assert_eq!(from_bf16(to_bf16(-2.5)), -2.5);
        assert!(from_bf16(to_bf16(f32::NAN)).is_nan());
    }

    /// Both kernels against the product of the bf16-rounded values in f64.
    #[test]
    fn matmul_is_the_product_of_rounded_values() {
        let (n, inp, out) = (11, 37, 21);
        let w: Vec<f32> = (0..out * inp)
            .map(|i| ((i * 37 % 101) as f32 - 50.0) / 17.0)
            .collect();
        let x: Vec<f32> = (0..n * inp)
            .map(|i| ((i * 13 % 29) as f32 - 14.0) / 7.0)
            .collect();
        let mut m = Bf16Matrix::new(out, inp);
        m.put_rows(&w[..5 * inp], 5, 0);
        m.put_rows(&w[5 * inp..], out - 5, 5);
        let mut y = vec![0.0; n * out];
        m.matmul(&x, n, &mut y);
        let r = |v: f32| from_bf16(to_bf16(v)) as f64;
        for t in 0..n {
            for j in 0..out {
                let want: f64 = (0..inp)
                    .map(|k| r(x[t * inp + k]) * r(w[j * inp + k]))
                    .sum();
                let got = y[t * out + j] as f64;
                assert!(
                    (got - want).abs() < 1e-3 * want.abs().max(1.0),
                    "({t},{j}) {got} {want}"
                );
            }
        }
        // The portable kernel gives the same products.
        let mut ys = vec![0.0; n * LANES];
        let mut xp = Vec::new();
        for t in 0..n {
            for p in 0..m.pairs {
                let lo = to_bf16(x[t * inp + 2 * p]) as u32;
                let hi = if 2 * p + 1 < inp {
                    to_bf16(x[t * inp + 2 * p + 1]) as u32
                } else {
                    0
                };
                xp.push(lo | (hi << 16));
            }
        }
        block_scalar(&m.packed[..m.pairs * LANES], &xp, n, m.pairs, &mut ys);
        for t in 0..n {
            for l in 0..LANES {
                assert!(
                    (ys[t * LANES + l] - y[t * out + l]).abs()
                        < 1e-3 * y[t * out + l].abs().max(1.0)
                );
            }
        }
    }
}
