//! The product of one to four rows over a GGUF matrix ([`GgmlMatrix`]) with the dequantisation
//! inside the loop of multiply-adds.
//!
//! [`crate::kernels::dense`]'s products read a block-quantised panel through the `Panels` seam:
//! inputs of the panel are dequantised into a buffer, then the buffer is multiplied and added
//! into the sums. For a few rows that costs a store and a load of every f32 value on top of
//! the arithmetic, and the arithmetic, not memory, limits a core (two cores decode a q8_0 file
//! at about half the triad bandwidth that way). Here each input's 64 values are computed into
//! registers ([`GroupRows::row`]) and multiplied into every row's sums at once (measured with
//! `bench/kernels.sh`: about 1.25-1.45x the seam's rate at two and four rows).
//!
//! The sums are those of `dense`'s products, in the same order: for each output lane, one chain
//! over the inputs in order, each step a fused multiply-add. So this product is bit for bit
//! `dense::matmul_panels` over the same matrix (tested below), whatever the thread count, and
//! a row's answers do not depend on its batch.

use super::dense::{matmul_panels, panel_rows, Columns, FEW_ROWS, PANEL};
use super::ggml::{GgmlMatrix, GroupRows, GroupVisitor, Panel, GROUP};
#[cfg(target_arch = "x86_64")]
use super::simd::features;
use super::PARALLEL_WORK;
use rayon::prelude::*;

/// Bytes of a panel ahead of the group being multiplied that are prefetched, rounded down to
/// whole groups (at least two): two groups of q8_0 (4.3 KB), five of q4_k (5.9 KB). Measured
/// on `bench/gguf.sh`'s files at batch 1, medians of alternating runs: two groups of q4_k
/// (2.4 KB) were too few, six decoded it 5-9% faster and five (this rule) 14%; six of q8_0
/// (13 KB) decoded it 6% slower than two.
const AHEAD_BYTES: usize = 6144;

impl GgmlMatrix {
    /// y[n, out] = x[n, inp] · Wᵀ, bit for bit [`matmul_panels`] over this matrix. Up to
    /// [`FEW_ROWS`] rows (decoding one to four answers at a time) run the fused loop of this
    /// module, one task per panel; more rows go through [`matmul_panels`].
    pub fn matmul(&self, x: &[f32], n: usize, y: &mut [f32]) {
        if n == 0 || n > FEW_ROWS {
            return matmul_panels(x, n, self.inp, self, self.out, y);
        }
        let (inp, out) = (self.inp, self.out);
        assert!(x.len() >= n * inp && y.len() >= n * out);
        let x = &x[..n * inp];
        let yc = Columns(y.as_mut_ptr());
        let one = |p: usize| {
            let mut acc = [[0f32; PANEL]; FEW_ROWS];
            self.panel_dot(p, x, &mut acc[..n]);
            let (j0, width) = (p * PANEL, PANEL.min(out - p * PANEL));
            for (t, a) in acc[..n].iter().enumerate() {
                // SAFETY: columns j0..j0 + width of each output row belong to this task, and
                // t < n, so t·out + j0 + width ≤ n·out ≤ y.len() (asserted).
                unsafe {
                    std::ptr::copy_nonoverlapping(a.as_ptr(), yc.get().add(t * out + j0), width)
                };
            }
        };
        let panels = out.div_ceil(PANEL);
        if n * inp * out >= PARALLEL_WORK {
            (0..panels).into_par_iter().for_each(one);
        } else {
            (0..panels).for_each(one);
        }
    }

    /// acc[t][l] = Σₖ x[t·inp + k]·W[64p + l][k] for the acc.len() ≤ [`FEW_ROWS`] rows of `x`,
    /// each summed as `dense`'s few-rows loop sums one row.
    fn panel_dot(&self, p: usize, x: &[f32], acc: &mut [[f32; PANEL]]) {
        match self.panels.get(p) {
            Some(Panel::Rows(_)) | None => panel_rows(acc, x, self.inp, self, p),
            Some(panel) => {
                #[cfg(target_arch = "x86_64")]
                if features().avx512f {
                    let next = self.panels.get(p + 1);
                    // SAFETY: the CPU has AVX-512F (checked just above).
                    unsafe { regrouped_dot_avx512(panel, next, x, acc) };
                    return;
                }
                #[cfg(target_arch = "x86_64")]
                if features().fma {
                    // SAFETY: the CPU has AVX2 and FMA (checked just above).
                    unsafe { regrouped_dot_fma(panel, x, acc) };
                    return;
                }
                regrouped_dot_rows::<false>(panel, None, x, acc);
            }
        }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn regrouped_dot_avx512(
    panel: &Panel,
    next: Option<&Panel>,
    x: &[f32],
    acc: &mut [[f32; PANEL]],
) {
    regrouped_dot_rows::<true>(panel, next, x, acc);
}

/// [`regrouped_dot`]'s portable form compiled for AVX2 with fused multiply-add.
///
/// # Safety
/// The CPU has AVX2 and FMA.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn regrouped_dot_fma(panel: &Panel, x: &[f32], acc: &mut [[f32; PANEL]]) {
    regrouped_dot_rows::<false>(panel, None, x, acc);
}

/// One copy of [`regrouped_dot`] per row count, so the sums of one to four rows stay in
/// registers.
#[inline(always)]
fn regrouped_dot_rows<const AVX512: bool>(
    panel: &Panel,
    next: Option<&Panel>,
    x: &[f32],
    acc: &mut [[f32; PANEL]],
) {
    match acc.len() {
        1 => regrouped_dot::<AVX512, 1>(panel, next, x, acc),
        2 => regrouped_dot::<AVX512, 2>(panel, next, x, acc),
        3 => regrouped_dot::<AVX512, 3>(panel, next, x, acc),
        _ => regrouped_dot::<AVX512, FEW_ROWS>(panel, next, x, acc),
    }
}

/// [`GgmlMatrix::panel_dot`] for a regrouped panel and N rows of `x`: each input's 64 values
/// are computed once and multiplied into every row's sums; `next` is the panel whose first
/// groups are prefetched near the end (the panel a task usually takes next).
#[inline(always)]
fn regrouped_dot<const AVX512: bool, const N: usize>(
    panel: &Panel,
    next: Option<&Panel>,
    x: &[f32],
    acc: &mut [[f32; PANEL]],
) {
    /// The sums of the 64 lanes of each row.
    struct Dot<'a, const N: usize> {
        panel: &'a Panel,
        next: Option<&'a Panel>,
        groups: usize,
        /// Groups ahead whose bytes are prefetched ([`AHEAD_BYTES`]).
        ahead: usize,
        inp: usize,
        x: &'a [f32],
        sums: [[f32; PANEL]; N],
    }
    impl<const N: usize> GroupVisitor for Dot<'_, N> {
        #[inline(always)]
        fn visit<R: GroupRows>(&mut self, g: usize, rows: &R) {
            let ahead = g + self.ahead;
            if ahead < self.groups {
                self.panel.prefetch_group(ahead);
            } else if let Some(next) = self.next {
                next.prefetch_group(ahead - self.groups);
            }
            let mut w = [0f32; PANEL];
            for k in 0..GROUP {
                rows.row(k, &mut w);
                for (t, sums) in self.sums.iter_mut().enumerate() {
                    let xk = self.x[t * self.inp + g * GROUP + k];
                    for (s, &wl) in sums.iter_mut().zip(&w) {
                        *s = xk.mul_add(wl, *s);
                    }
                }
            }
        }
    }
    assert!(acc.len() == N && x.len().is_multiple_of(N));
    let inp = x.len() / N;
    let groups = inp / GROUP;
    let mut dot = Dot {
        panel,
        next,
        groups,
        ahead: (AHEAD_BYTES * groups / panel.bytes().max(1)).max(2),
        inp,
        x,
        sums: [[0f32; PANEL]; N],
    };
    panel.for_groups::<AVX512, _>(0, groups, &mut dot);
    acc.copy_from_slice(&dot.sums);
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::kernels::dense::assert_panels_equal_dense;
    use crate::kernels::ggml::tests::{blocks, extreme_blocks, push_keeping_values};
    use crate::kernels::ggml::GgmlType;

    /// The fused product of one to four rows is bit for bit the product through the `Panels`
    /// seam, and so the f32 product over the values the value-by-value path gives (itself
    /// checked against the gguf package and candle): every regrouped type (q2_k and q3_k among
    /// them), random and extreme scales (the largest finite f16, subnormals, signed zeros;
    /// q6_k's scales at -128 and 127, q3_k's at -32 and 31, q2_k's scales and mins at 0 and
    /// 15), two full panels and a tail of stored rows, panels of several types, on one task
    /// and on the pool.
    #[test]
    fn fused_product_equals_the_product_over_dequantised_values() {
        let regrouped = crate::kernels::ggml::tests::REGROUPED;
        /// Inputs, the (type, rows) parts stacked, extreme scales.
        type Case = (usize, Vec<(GgmlType, usize)>, bool);
        let mut cases: Vec<Case> = Vec::new();
        for t in regrouped {
            for extreme in [false, true] {
                // 2 panels and 5 rows of tail; 512 inputs (one task), and 2048 (the pool).
                cases.push((512, vec![(t, 2 * PANEL + 5)], extreme));
                cases.push((2048, vec![(t, PANEL + 3)], extreme));
            }
        }
        // A panel mixing types (stored rows) between regrouped ones, and a regrouped q3_k panel
        // beside a panel of f16 rows.
        cases.push((
            256,
            vec![
                (GgmlType::Q4K, 100),
                (GgmlType::Q6K, 92),
                (GgmlType::Q2K, 7),
            ],
            false,
        ));
        cases.push((256, vec![(GgmlType::Q3K, 64), (GgmlType::F16, 64)], false));
        let bits = |v: &[f32]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
        for (inp, parts, extreme) in cases {
            let mut m = GgmlMatrix::new(inp);
            let mut dense = Vec::new();
            for (i, &(t, rows)) in parts.iter().enumerate() {
                let seed = 40 + i as u64;
                let b = if extreme {
                    extreme_blocks(t, rows, inp, seed)
                } else {
                    blocks(t, rows, inp, seed)
                };
                push_keeping_values(&mut m, t, rows, b, &mut dense);
            }
            let x: Vec<f32> = (0..FEW_ROWS * inp)
                .map(|i| ((i * 5) % 17) as f32 * 0.21 - 1.3)
                .collect();
            let out = m.out;
            for n in 1..=FEW_ROWS {
                let what = format!("{parts:?} inp {inp} extreme {extreme} rows {n}");
                let x = &x[..n * inp];
                let (mut fused, mut seam) = (vec![0.0; n * out], vec![0.0; n * out]);
                m.matmul(x, n, &mut fused);
                matmul_panels(x, n, inp, &m, out, &mut seam);
                assert_eq!(bits(&fused), bits(&seam), "{what}");
                // The portable form of the fused loop too (this CPU may run the AVX-512 one).
                for (p, panel) in m.panels.iter().enumerate() {
                    if matches!(panel, Panel::Rows(_)) {
                        continue;
                    }
                    let mut acc = [[0f32; PANEL]; FEW_ROWS];
                    regrouped_dot_rows::<false>(panel, None, x, &mut acc[..n]);
                    for (t, a) in acc[..n].iter().enumerate() {
                        let at = t * out + p * PANEL;
                        assert_eq!(
                            bits(a),
                            bits(&seam[at..at + PANEL]),
                            "portable {what} panel {p} row {t}"
                        );
                    }
                }
            }
            // The seam's product against the f32 product over the dequantised values (NaN-free:
            // the extreme scales are finite, but their products can overflow to infinities,
            // which compare by their bits too).
            assert_panels_equal_dense(&m, &dense, 1, inp, out);
        }
    }
}
