//! The batch-1 product over a GGUF matrix ([`GgmlMatrix`]) with the dequantisation inside the
//! loop of multiply-adds.
//!
//! [`crate::kernels::dense`]'s products read a block-quantised panel through the `Panels` seam:
//! 32 inputs of the panel are dequantised into a buffer, then the buffer is multiplied and
//! added into the sums. At batch 1 that costs a store and a load of every f32 value on top of
//! the arithmetic, and the arithmetic, not memory, limits a core (two cores decode a q8_0 file
//! at about half the triad bandwidth that way). Here each input's 64 values are computed into
//! registers ([`GroupRows::row`]) and multiplied into the sums at once.
//!
//! The sums are those of `dense`'s products, in the same order: for each output lane, one chain
//! over the inputs in order, each step a fused multiply-add. So this product is bit for bit
//! `dense::matmul_panels` over the same matrix (tested below), whatever the thread count, and
//! a row's answers do not depend on its batch.

use super::dense::{matmul_panels, panel_rows, PANEL};
use super::ggml::{GgmlMatrix, GroupRows, GroupVisitor, Panel, GROUP};
#[cfg(target_arch = "x86_64")]
use super::simd::features;
use super::PARALLEL_WORK;
use rayon::prelude::*;

/// Groups ahead of the one being multiplied whose bytes are prefetched: about 4 KB of q8_0
/// codes, a few hundred nanoseconds of work, more than a memory access takes.
const AHEAD: usize = 2;

impl GgmlMatrix {
    /// y[n, out] = x[n, inp] · Wᵀ, bit for bit [`matmul_panels`] over this matrix. One row
    /// (batch-1 decoding) runs the fused loop of this module, one task per panel; more rows
    /// go through [`matmul_panels`].
    pub fn matmul(&self, x: &[f32], n: usize, y: &mut [f32]) {
        if n != 1 {
            return matmul_panels(x, n, self.inp, self, self.out, y);
        }
        let (inp, out) = (self.inp, self.out);
        assert!(x.len() >= inp && y.len() >= out);
        let x = &x[..inp];
        let one = |(p, yp): (usize, &mut [f32])| {
            let mut acc = [0f32; PANEL];
            self.panel_dot(p, x, &mut acc);
            yp.copy_from_slice(&acc[..yp.len()]);
        };
        if inp * out >= PARALLEL_WORK {
            y[..out].par_chunks_mut(PANEL).enumerate().for_each(one);
        } else {
            y[..out].chunks_mut(PANEL).enumerate().for_each(one);
        }
    }

    /// acc[l] = Σₖ x[k]·W[64p + l][k], summed as `dense`'s few-rows loop sums one row.
    fn panel_dot(&self, p: usize, x: &[f32], acc: &mut [f32; PANEL]) {
        match self.panels.get(p) {
            Some(Panel::Rows(_)) | None => self.stored_dot(p, x, acc),
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
                regrouped_dot::<false>(panel, None, x, acc);
            }
        }
    }

    /// [`GgmlMatrix::panel_dot`] for a panel of stored rows: `dense`'s few-rows loop over the
    /// values dequantised value by value, 32 inputs at a time.
    fn stored_dot(&self, p: usize, x: &[f32], acc: &mut [f32; PANEL]) {
        panel_rows(std::slice::from_mut(acc), x, self.inp, self, p);
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn regrouped_dot_avx512(
    panel: &Panel,
    next: Option<&Panel>,
    x: &[f32],
    acc: &mut [f32; PANEL],
) {
    regrouped_dot::<true>(panel, next, x, acc);
}

/// [`regrouped_dot`]'s portable form compiled for AVX2 with fused multiply-add.
///
/// # Safety
/// The CPU has AVX2 and FMA.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn regrouped_dot_fma(panel: &Panel, x: &[f32], acc: &mut [f32; PANEL]) {
    regrouped_dot::<false>(panel, None, x, acc);
}

/// [`GgmlMatrix::panel_dot`] for a regrouped panel; `next` is the panel whose first groups are
/// prefetched near the end (the panel a task usually takes next).
#[inline(always)]
fn regrouped_dot<const AVX512: bool>(
    panel: &Panel,
    next: Option<&Panel>,
    x: &[f32],
    acc: &mut [f32; PANEL],
) {
    /// The sums of the 64 lanes.
    struct Dot<'a> {
        panel: &'a Panel,
        next: Option<&'a Panel>,
        groups: usize,
        x: &'a [f32],
        sums: [f32; PANEL],
    }
    impl GroupVisitor for Dot<'_> {
        #[inline(always)]
        fn visit<R: GroupRows>(&mut self, g: usize, rows: &R) {
            let ahead = g + AHEAD;
            if ahead < self.groups {
                self.panel.prefetch_group(ahead);
            } else if let Some(next) = self.next {
                next.prefetch_group(ahead - self.groups);
            }
            let xs = &self.x[g * GROUP..(g + 1) * GROUP];
            let mut w = [0f32; PANEL];
            for (k, &xk) in xs.iter().enumerate() {
                rows.row(k, &mut w);
                for (s, &wl) in self.sums.iter_mut().zip(&w) {
                    *s = xk.mul_add(wl, *s);
                }
            }
        }
    }
    let groups = x.len() / GROUP;
    let mut dot = Dot {
        panel,
        next,
        groups,
        x,
        sums: [0f32; PANEL],
    };
    panel.for_groups::<AVX512, _>(0, groups, &mut dot);
    *acc = dot.sums;
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::kernels::dense::assert_panels_equal_dense;
    use crate::kernels::ggml::tests::{blocks, extreme_blocks, push_keeping_values};
    use crate::kernels::ggml::GgmlType;

    /// The fused batch-1 product is bit for bit the product through the `Panels` seam, and so
    /// the f32 product over the values the value-by-value path gives (itself checked against
    /// the gguf package and candle): every regrouped type (q2_k and q3_k among them), random and
    /// extreme scales (the largest finite f16, subnormals, signed zeros; q6_k's scales at -128
    /// and 127, q3_k's at -32 and 31, q2_k's scales and mins at 0 and 15), two full panels and
    /// a tail of stored rows, panels of several types, on one task and on the pool.
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
            let what = format!("{parts:?} inp {inp} extreme {extreme}");
            let x: Vec<f32> = (0..inp)
                .map(|i| ((i * 5) % 17) as f32 * 0.21 - 1.3)
                .collect();
            let (mut fused, mut seam) = (vec![0.0; m.out], vec![0.0; m.out]);
            m.matmul(&x, 1, &mut fused);
            matmul_panels(&x, 1, inp, &m, m.out, &mut seam);
            assert_eq!(bits(&fused), bits(&seam), "{what}");
            // The seam's product against the f32 product over the dequantised values (NaN-free:
            // the extreme scales are finite, but their products can overflow to infinities,
            // which compare by their bits too).
            let out = m.out;
            assert_panels_equal_dense(&m, &dense, 1, inp, out);
            // The portable form of the fused loop too (this CPU may run the AVX-512 one).
            for (p, panel) in m.panels.iter().enumerate() {
                let mut acc = [0f32; PANEL];
                if !matches!(panel, Panel::Rows(_)) {
                    regrouped_dot::<false>(panel, None, &x, &mut acc);
                    assert_eq!(
                        bits(&acc),
                        bits(&seam[p * PANEL..(p + 1) * PANEL]),
                        "portable {what} panel {p}"
                    );
                }
            }
        }
    }
}
