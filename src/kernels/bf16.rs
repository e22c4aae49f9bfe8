//! The optional bf16 weight format (`--weights bf16`): an approximation of the model for speed.
//!
//! Weights and the activations entering each matrix product are rounded to bfloat16 (round to
//! nearest even, as `torch.Tensor.bfloat16()` does); each product sums pairs of bf16 products
//! into f32 accumulators. On CPUs with AVX-512 BF16 that is one `vdpbf16ps` instruction per 32
//! multiply-adds, twice the f32 rate, and the weights take half the memory. Everything outside
//! the matrix products (embedding lookup, norms, attention, softmax) stays f32. The answers are
//! not those of the f32 model: runs say so (run.json `compute_dtype`), and the agreement with
//! f32 answers is measured by `tests/runner_reference.rs`.
//!
//! Layout: output columns in blocks of 16; within a block, for each pair of input rows
//! (k, k+1), 16 lanes each holding (w[k][j], w[k+1][j]) as two bf16 in one u32 (low half k),
//! which is the operand layout of `vdpbf16ps`.

#[cfg(target_arch = "x86_64")]
use super::simd::Blocks;
use super::simd::{block_products, features, groups, BlockKernel, LANES};
use super::PARALLEL_WORK;

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

    /// y[n, out] = bf16(x)[n, inp] · bf16(W)ᵀ with f32 accumulation.
    pub fn matmul(&self, x: &[f32], n: usize, y: &mut [f32]) {
        let (inp, out, pairs) = (self.inp, self.out, self.pairs);
        assert!(x.len() >= n * inp && y.len() >= n * out);
        if n == 0 {
            return;
        }
        SCRATCH.with_borrow_mut(|(xp, yt)| {
            pack_activations(x, n, inp, xp);
            let parallel = n * out * inp >= PARALLEL_WORK;
            block_products::<Kernel>(&self.packed, self.blocks, pairs, xp, n, yt, parallel);
            let tile = n * LANES;
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

/// Activations as bf16 pairs, group by group: the group of `size` tokens starting at token
/// `t0` occupies `t0·pairs .. (t0 + size)·pairs`, pair p of its token t at `p·size + t`, so
/// one step of the kernel reads its tokens' values from one place.
fn pack_activations(x: &[f32], n: usize, inp: usize, xp: &mut Vec<u32>) {
    let pairs = inp.div_ceil(2);
    xp.clear();
    xp.resize(n * pairs, 0);
    for (t0, size) in groups(n) {
        let g = &mut xp[t0 * pairs..(t0 + size) * pairs];
        for t in 0..size {
            let row = &x[(t0 + t) * inp..(t0 + t + 1) * inp];
            for p in 0..pairs {
                let lo = to_bf16(row[2 * p]) as u32;
                let hi = row.get(2 * p + 1).map_or(0, |&v| to_bf16(v) as u32);
                g[p * size + t] = lo | (hi << 16);
            }
        }
    }
}

/// The bf16 products: steps are pairs of input rows, outputs f32 sums.
struct Kernel;

impl BlockKernel for Kernel {
    type Out = f32;

    fn fast() -> bool {
        features().avx512_bf16
    }

    /// Per lane, the sum over pairs of lo·lo + hi·hi in f32.
    fn portable(wb: &[u32], xp: &[u32], n: usize, pairs: usize, ys: &mut [f32]) {
        for (t0, size) in groups(n) {
            let g = &xp[t0 * pairs..(t0 + size) * pairs];
            for t in 0..size {
                for l in 0..LANES {
                    let mut acc = 0f32;
                    for p in 0..pairs {
                        let (wv, xv) = (wb[p * LANES + l], g[p * size + t]);
                        acc += from_bf16(wv as u16) * from_bf16(xv as u16)
                            + from_bf16((wv >> 16) as u16) * from_bf16((xv >> 16) as u16);
                    }
                    ys[(t0 + t) * LANES + l] = acc;
                }
            }
        }
    }

    /// One `vdpbf16ps` per pair of input rows, 16 output columns and token.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,avx512bf16")]
    unsafe fn group<const T: usize, const B: usize>(b: &mut Blocks<'_, f32>, t0: usize) {
        use std::arch::x86_64::*;
        let (n, pairs) = (b.n, b.steps);
        let mut acc = [[_mm512_setzero_ps(); T]; B];
        // SAFETY (whole body): `run_groups` checked that b.w holds B·pairs·16 values, b.x the
        // group's pairs·T values from t0·pairs and b.out B·n·16; the pointers stay inside.
        let x = b.x.as_ptr().add(t0 * pairs);
        let w = b.w.as_ptr();
        for p in 0..pairs {
            let mut wv: [__m512bh; B] = [std::mem::zeroed(); B];
            for (k, v) in wv.iter_mut().enumerate() {
                *v = std::mem::transmute::<__m512i, __m512bh>(_mm512_loadu_si512(
                    w.add((k * pairs + p) * LANES) as *const _,
                ));
            }
            let xr = x.add(p * T);
            #[allow(clippy::needless_range_loop)]
            // t walks the activations and accumulators together
            for t in 0..T {
                let xv =
                    std::mem::transmute::<__m512i, __m512bh>(_mm512_set1_epi32(*xr.add(t) as i32));
                for (ak, &wk) in acc.iter_mut().zip(&wv) {
                    ak[t] = _mm512_dpbf16_ps(ak[t], xv, wk);
                }
            }
        }
        for (k, ak) in acc.iter().enumerate() {
            for (t, a) in ak.iter().enumerate() {
                let at = (k * n + t0 + t) * LANES;
                _mm512_storeu_ps(b.out[at..at + LANES].as_mut_ptr(), *a);
            }
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
        let (n, inp, out) = (13, 37, 37);
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
        pack_activations(&x, n, inp, &mut xp);
        Kernel::portable(&m.packed[..m.pairs * LANES], &xp, n, m.pairs, &mut ys);
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
