//! Symmetric 8-bit rounding of matrix rows and of activation vectors, and their exact integer
//! products: the arithmetic under the output-head screen (`crate::model::head`).
//!
//! A row w is kept as integers q = round(w/s), s = max|w|/127, clamped to ±127; an activation
//! vector x as p = round(x/τ), τ = max|x|/127, stored as p + 128 so it is unsigned. The
//! product Σ q·(p + 128) is exact in an i32 (see [`MAX_COLS`]); taking off 128·Σq leaves q·p.
//! With AVX-512 VNNI (found at run time) one `vpdpbusd` does 64 of these multiply-adds.
//!
//! Layout of the rows: blocks of 16 rows; within a block, for each quad of columns 4k..4k + 4,
//! 16 lanes each holding the four i8 of one row, low byte first: the operand layout of
//! `vpdpbusd`. Activations are packed in token groups (see [`pack_activations`]).

#[cfg(target_arch = "x86_64")]
use super::simd::Blocks;
pub use super::simd::LANES;
use super::simd::{block_products, features, groups, BlockKernel};
use super::PARALLEL_WORK;
use rayon::prelude::*;

/// The longest row whose integer sums fit an i32: up to 255·127 per product, and 128·127 per
/// column more while the +128 is taken off.
pub const MAX_COLS: usize = (i32::MAX as usize) / (383 * 127);

/// What rounding one row to 8 bits gave, for error bounds built on the products.
#[derive(Debug, Clone, Copy, Default)]
pub struct RowStats {
    /// s = max|w|/127 (0 for a zero row).
    pub scale: f32,
    /// Σ q, to undo the +128 of the activations.
    pub qsum: i32,
    /// ‖w − s·q‖₂, summed in f64.
    pub residual: f64,
    /// ‖w‖₂, summed in f64.
    pub norm_w: f64,
    /// ‖q‖₂, summed in f64.
    pub norm_q: f64,
}

/// The rows of a [rows, cols] matrix in 8 bits, in the VNNI operand layout.
pub struct Int8Rows {
    pub rows: usize,
    pub cols: usize,
    /// ⌈cols/4⌉: four columns per 32-bit lane.
    pub quads: usize,
    /// ⌈rows/16⌉.
    pub blocks: usize,
    /// [block][quad][lane].
    pub packed: Vec<u32>,
}

impl Int8Rows {
    /// Rounds each row of `w` ([rows, cols] row-major) to 8 bits; also returns each row's
    /// [`RowStats`], blocks·16 of them (rows past the end are zero).
    ///
    /// Panics unless `cols` ≤ [`MAX_COLS`] and `w` holds rows·cols values.
    pub fn quantize(w: &[f32], rows: usize, cols: usize) -> (Int8Rows, Vec<RowStats>) {
        assert!(w.len() >= rows * cols);
        Int8Rows::quantize_rows(rows, cols, |j, dst| {
            dst.copy_from_slice(&w[j * cols..(j + 1) * cols])
        })
    }

    /// As [`Int8Rows::quantize`], with row j written as f32 into a buffer by `row_into(j, buf)`:
    /// for rows kept in another format (a 16-bit head), widened one at a time.
    ///
    /// Panics unless `cols` ≤ [`MAX_COLS`].
    pub fn quantize_rows(
        rows: usize,
        cols: usize,
        row_into: impl Fn(usize, &mut [f32]) + Sync,
    ) -> (Int8Rows, Vec<RowStats>) {
        assert!(cols <= MAX_COLS);
        let quads = cols.div_ceil(4);
        let blocks = rows.div_ceil(LANES);
        let mut packed = vec![0u32; blocks * quads * LANES];
        let mut stats = vec![RowStats::default(); blocks * LANES];
        packed
            .par_chunks_mut(quads * LANES)
            .zip(stats.par_chunks_mut(LANES))
            .enumerate()
            .for_each(|(b, (pk, st))| {
                let mut row = vec![0f32; cols];
                for (l, stat) in st.iter_mut().enumerate() {
                    let j = b * LANES + l;
                    if j >= rows {
                        break;
                    }
                    row_into(j, &mut row);
                    let max = row.iter().fold(0f32, |m, v| m.max(v.abs()));
                    let s = max / 127.0;
                    let (mut qsum, mut r2, mut w2, mut q2) = (0i32, 0f64, 0f64, 0f64);
                    for (i, &v) in row.iter().enumerate() {
                        let q = if s > 0.0 {
                            (v / s).round().clamp(-127.0, 127.0) as i32
                        } else {
                            0
                        };
                        let r = v as f64 - s as f64 * q as f64;
                        r2 += r * r;
                        w2 += v as f64 * v as f64;
                        q2 += (q * q) as f64;
                        qsum += q;
                        pk[(i / 4) * LANES + l] |= ((q as u8) as u32) << (8 * (i % 4));
                    }
                    *stat = RowStats {
                        scale: s,
                        qsum,
                        residual: r2.sqrt(),
                        norm_w: w2.sqrt(),
                        norm_q: q2.sqrt(),
                    };
                }
            });
        let m = Int8Rows {
            rows,
            cols,
            quads,
            blocks,
            packed,
        };
        (m, stats)
    }

    /// acc[(b·n + t)·16 + l] = Σ_i q[b·16 + l][i]·(p_t[i] + 128) for every block b, vector t
    /// and lane l, with `xq` from [`pack_activations`] of n vectors of `cols` values. Exact.
    pub fn products(&self, xq: &[u32], n: usize, acc: &mut Vec<i32>) {
        let parallel = n * self.rows * self.cols >= PARALLEL_WORK;
        block_products::<Kernel>(&self.packed, self.blocks, self.quads, xq, n, acc, parallel);
    }
}

/// What rounding one activation vector to 8 bits gave.
#[derive(Debug, Clone, Copy)]
pub struct Rounded {
    /// τ = max|x|/127.
    pub tau: f32,
    /// ‖x‖₂, summed in f64 and padded by 10⁻⁹ relative.
    pub norm_x: f64,
    /// ‖x − τ·p‖₂, summed in f64 and padded by 10⁻⁹ relative.
    pub norm_err: f64,
}

/// Rounds each of the `n` vectors of `x` ([n, cols]) to 8 bits (p + 128, unsigned) in the
/// kernels' group layout: the group of `size` vectors starting at t0 occupies
/// `t0·quads .. (t0 + size)·quads`, quad k of vector t at `k·size + t`. Writes each vector's
/// scale and norms to `rounded`, or None for a vector that cannot be rounded this way (zero or
/// not finite).
pub fn pack_activations(
    x: &[f32],
    n: usize,
    cols: usize,
    xq: &mut Vec<u32>,
    rounded: &mut Vec<Option<Rounded>>,
) {
    let quads = cols.div_ceil(4);
    xq.clear();
    // Padding columns hold p = 0 (byte 128) against zero weights.
    xq.resize(n * quads, 0x8080_8080);
    rounded.clear();
    for (t0, size) in groups(n) {
        let g = &mut xq[t0 * quads..(t0 + size) * quads];
        for t in 0..size {
            let row = &x[(t0 + t) * cols..(t0 + t + 1) * cols];
            let max = row.iter().fold(0f32, |m, v| m.max(v.abs()));
            if !(max.is_finite() && max > 0.0) {
                rounded.push(None);
                continue;
            }
            let tau = max / 127.0;
            let (mut x2, mut e2) = (0f64, 0f64);
            for (k, quad) in row.chunks(4).enumerate() {
                let mut word = 0x8080_8080u32;
                for (i, &v) in quad.iter().enumerate() {
                    let p = (v / tau).round().clamp(-127.0, 127.0) as i32;
                    let e = v as f64 - tau as f64 * p as f64;
                    x2 += v as f64 * v as f64;
                    e2 += e * e;
                    word = (word & !(0xff << (8 * i))) | (((p + 128) as u32) << (8 * i));
                }
                g[k * size + t] = word;
            }
            // The f64 sums of at most 2^16 terms are within 1e-11 relative.
            let slack = 1.0 + 1e-9;
            rounded.push(Some(Rounded {
                tau,
                norm_x: x2.sqrt() * slack,
                norm_err: e2.sqrt() * slack,
            }));
        }
    }
}

/// The integer products: steps are quads of columns, outputs exact i32 sums.
struct Kernel;

impl BlockKernel for Kernel {
    type Out = i32;

    fn fast() -> bool {
        features().avx512_vnni
    }

    /// Per lane, Σ over quads of the four u8·i8 products.
    fn portable(wb: &[u32], xq: &[u32], n: usize, quads: usize, ys: &mut [i32]) {
        for (t0, size) in groups(n) {
            let g = &xq[t0 * quads..(t0 + size) * quads];
            for t in 0..size {
                for l in 0..LANES {
                    let mut acc = 0i32;
                    for k in 0..quads {
                        let (wv, xv) = (wb[k * LANES + l], g[k * size + t]);
                        for i in 0..4 {
                            let a = ((xv >> (8 * i)) & 0xff) as i32;
                            let b = ((wv >> (8 * i)) & 0xff) as u8 as i8 as i32;
                            acc += a * b;
                        }
                    }
                    ys[(t0 + t) * LANES + l] = acc;
                }
            }
        }
    }

    /// One `vpdpbusd` per quad of columns, 16 rows and vector.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,avx512vnni")]
    unsafe fn group<const T: usize, const B: usize>(b: &mut Blocks<'_, i32>, t0: usize) {
        use std::arch::x86_64::*;
        let (n, quads) = (b.n, b.steps);
        let mut acc = [[_mm512_setzero_si512(); T]; B];
        // SAFETY (whole body): `run_groups` checked that b.w holds B·quads·16 values, b.x the
        // group's quads·T values from t0·quads and b.out B·n·16; the pointers stay inside.
        let x = b.x.as_ptr().add(t0 * quads);
        let w = b.w.as_ptr();
        for k in 0..quads {
            let mut wv = [_mm512_setzero_si512(); B];
            for (j, v) in wv.iter_mut().enumerate() {
                *v = _mm512_loadu_si512(w.add((j * quads + k) * LANES) as *const _);
            }
            let xr = x.add(k * T);
            #[allow(clippy::needless_range_loop)]
            // t walks the activations and accumulators together
            for t in 0..T {
                let xv = _mm512_set1_epi32(*xr.add(t) as i32);
                for (ab, &wb) in acc.iter_mut().zip(&wv) {
                    // Unsigned bytes of the activations times signed bytes of the weights.
                    ab[t] = _mm512_dpbusd_epi32(ab[t], xv, wb);
                }
            }
        }
        for (j, ab) in acc.iter().enumerate() {
            for (t, a) in ab.iter().enumerate() {
                let at = (j * n + t0 + t) * LANES;
                _mm512_storeu_si512(b.out[at..at + LANES].as_mut_ptr() as *mut _, *a);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A small deterministic generator (xorshift64*), uniform in [-1, 1).
    fn values(seed: u64, len: usize) -> Vec<f32> {
        let mut s = seed;
        (0..len)
            .map(|_| {
                s ^= s >> 12;
                s ^= s << 25;
                s ^= s >> 27;
                let v = s.wrapping_mul(0x2545_f491_4f6c_dd1d) >> 40;
                v as f32 / (1u64 << 23) as f32 - 1.0
            })
            .collect()
    }

    /// The VNNI kernel (where the CPU has it), the portable one and the pool-driven
    /// [`Int8Rows::products`] against plain integer sums of the rounded values.
    #[test]
    fn kernels_give_the_exact_integer_products() {
        let (rows, cols, n) = (37, 45, 13);
        let w = values(7, rows * cols);
        let x = values(8, n * cols);
        let (s, stats) = Int8Rows::quantize(&w, rows, cols);
        let mut xq = Vec::new();
        pack_activations(&x, n, cols, &mut xq, &mut Vec::new());
        let byte = |v: u32, i: usize| (v >> (8 * (i % 4))) & 0xff;
        let want = |j: usize, t: usize| -> i32 {
            let (b, l) = (j / LANES, j % LANES);
            // Group layout of the activations (see pack_activations).
            let (t0, size) = groups(n).find(|&(t0, size)| t < t0 + size).unwrap();
            (0..cols)
                .map(|i| {
                    let k = i / 4;
                    let wv = byte(s.packed[(b * s.quads + k) * LANES + l], i) as u8 as i8 as i32;
                    let xv = byte(xq[t0 * s.quads + k * size + (t - t0)], i) as i32;
                    wv * xv
                })
                .sum()
        };
        let tile = n * LANES;
        let mut all = Vec::new();
        s.products(&xq, n, &mut all);
        for b in 0..s.blocks {
            let wb = &s.packed[b * s.quads * LANES..(b + 1) * s.quads * LANES];
            let mut ys = vec![0i32; tile];
            Kernel::portable(wb, &xq, n, s.quads, &mut ys);
            #[cfg(target_arch = "x86_64")]
            if Kernel::fast() {
                let mut yv = vec![0i32; tile];
                let mut ops = Blocks {
                    w: wb,
                    nb: 1,
                    x: &xq,
                    n,
                    steps: s.quads,
                    out: &mut yv,
                };
                // SAFETY: the CPU has AVX-512F and VNNI (`fast`); `run_groups` checks the sizes.
                unsafe { crate::kernels::simd::run_groups::<Kernel>(&mut ops) };
                assert_eq!(ys, yv, "block {b}");
            }
            assert_eq!(ys, all[b * tile..(b + 1) * tile], "block {b}");
            for t in 0..n {
                for l in 0..LANES.min(rows - b * LANES) {
                    assert_eq!(
                        ys[t * LANES + l],
                        want(b * LANES + l, t),
                        "block {b} t {t} l {l}"
                    );
                }
            }
        }
        // Σq per row, as the +128 correction needs.
        for (j, st) in stats.iter().enumerate().take(rows) {
            let q: i32 = (0..cols)
                .map(|i| {
                    byte(
                        s.packed[((j / LANES) * s.quads + i / 4) * LANES + j % LANES],
                        i,
                    ) as u8 as i8 as i32
                })
                .sum();
            assert_eq!(st.qsum, q, "row {j}");
        }
    }

    /// Round to nearest, the largest magnitude to ±127.
    #[test]
    fn rows_round_to_127_steps() {
        let w = [0.0f32, 1.27, -0.5, 0.004, 0.0, 0.0, 0.0, 0.0];
        let (m, stats) = Int8Rows::quantize(&w, 2, 4);
        let q = |j: usize, i: usize| (m.packed[(i / 4) * LANES + j] >> (8 * (i % 4))) as u8 as i8;
        assert_eq!(stats[0].scale, 1.27f32 / 127.0);
        assert_eq!(stats[0].qsum, 127 - 50);
        assert_eq!([q(0, 0), q(0, 1), q(0, 2), q(0, 3)], [0, 127, -50, 0]);
        // A zero row: scale 0 and every q 0.
        assert_eq!(stats[1].scale, 0.0);
        assert_eq!([q(1, 0), q(1, 1), q(1, 2), q(1, 3)], [0, 0, 0, 0]);
    }
}
