//! The greedy pick at the output head: the token with the largest f32 logit (the first one on
//! ties, as `torch.argmax`), found without computing every f32 logit.
//!
//! The output head is the largest matrix of a small model (a 150k-token vocabulary is about a
//! quarter of a 0.5B model's multiply-adds), yet greedy decoding only needs the position of its
//! largest output. So the head is screened in 8 bits, and only the tokens the screen cannot
//! rule out get their f32 logit:
//!
//! 1. Each head row w_j is kept once more as 8-bit integers q_j with a scale s_j
//!    (s_j = max|w_j|/127, q_j = round(w_j/s_j)); each hidden vector x is rounded the same
//!    way to p with scale τ. The integer products q_j·p are exact (one AVX-512 VNNI
//!    `vpdpbusd` per 64 multiply-adds where the CPU has it), and b_j = s_j·τ·(q_j·p)
//!    estimates w_j·x.
//! 2. A bound on how far the f32 logit f_j can be from b_j:
//!    w_j·x − b_j = (w_j − s_j q_j)·x + s_j q_j·(x − τ p), so by the Cauchy–Schwarz
//!    inequality |w_j·x − b_j| ≤ ‖w_j − s_j q_j‖‖x‖ + s_j‖q_j‖‖x − τ p‖; and an f32 dot
//!    product of length n, summed in any order, is within γ_n Σ_i |w_ji x_i| ≤ γ_n‖w_j‖‖x‖
//!    of w_j·x, with γ_n = n·u/(1 − n·u) and u = 2⁻²⁴ (Higham, *Accuracy and Stability of
//!    Numerical Algorithms*, 2nd ed., §3.1; from memory). Their sum, δ_j, is rounded up.
//! 3. With lo_j = b_j − δ_j and hi_j = b_j + δ_j, let L = max_k lo_k (reached at k*). Any
//!    token with hi_j < L has f_j ≤ hi_j < L ≤ f_{k*}: it is neither the largest logit nor
//!    tied with it. Every other token is a candidate; candidates get their f32 logit, in
//!    index order, and the first largest wins, which is the f32 argmax of the whole row.
//!
//! The repetition penalty (s·p below zero, s/p above) is increasing in s, so it maps each
//! [lo_j, hi_j] to an interval that holds the penalised logit (widened by the f32 rounding of
//! the penalty itself), and the same argument holds after it. When the screen leaves more
//! than a quarter of the vocabulary (or the hidden vector is zero or not finite), every f32
//! logit is computed instead; either way the token is the one the full f32 row would give.
//!
//! The rounding and the integer products are `crate::kernels::int8`; this module holds the
//! bounds and the decision, which are what make the pick equal to the f32 argmax.

use crate::kernels::int8::{pack_activations, Int8Rows, Rounded, LANES, MAX_COLS};
use crate::model::table::Rows;
use rayon::prelude::*;

/// Unit roundoff of f32.
const F32_UNIT_ROUNDOFF: f64 = 1.0 / 16_777_216.0;

/// The output head's rows in 8 bits with their error terms, next to the f32 rows.
pub struct Screen {
    rows: usize,
    cols: usize,
    blocks: usize,
    /// The rows in 8 bits (`crate::kernels::int8`).
    int8: Int8Rows,
    scale: Vec<f32>,
    /// Σ_i q_ji, to undo the +128 that makes the activations unsigned.
    qsum: Vec<i32>,
    /// ‖w_j − s_j q_j‖ + γ_n‖w_j‖, rounded up: multiplies ‖x‖.
    err_x: Vec<f32>,
    /// s_j‖q_j‖, rounded up: multiplies ‖x − τ p‖.
    err_q: Vec<f32>,
}

/// Buffers of [`Screen::pick`], reused across calls.
#[derive(Debug, Default)]
pub struct Scratch {
    xq: Vec<u32>,
    rounded: Vec<Option<Rounded>>,
    acc: Vec<i32>,
    per_token: Vec<TokenScratch>,
}

#[derive(Debug, Default)]
struct TokenScratch {
    candidates: Vec<u32>,
    logits: Vec<f32>,
    /// One head row widened to f32.
    row: Vec<f32>,
}

/// The smallest f32 not below `v`.
fn up(v: f64) -> f32 {
    let f = v as f32;
    if (f as f64) < v {
        f.next_up()
    } else {
        f
    }
}

/// The largest f32 not above `v`.
fn down(v: f64) -> f32 {
    let f = v as f32;
    if (f as f64) > v {
        f.next_down()
    } else {
        f
    }
}

impl Screen {
    /// Screens the rows of `w` ([rows, cols] row-major, at its stored precision), or None when
    /// `cols` is too long for exact 32-bit integer sums.
    pub fn new(w: Rows<'_>, rows: usize, cols: usize) -> Option<Screen> {
        if cols == 0 || cols > MAX_COLS || w.len() < rows * cols {
            return None;
        }
        let n = cols as f64 * F32_UNIT_ROUNDOFF;
        let gamma = n / (1.0 - n);
        let (int8, stats) = Int8Rows::quantize_rows(rows, cols, |j, dst| w.row_into(j, dst));
        // The f64 sums of at most 2^16 terms are within 1e-11 relative.
        let slack = 1.0 + 1e-9;
        Some(Screen {
            rows,
            cols,
            blocks: int8.blocks,
            int8,
            scale: stats.iter().map(|s| s.scale).collect(),
            qsum: stats.iter().map(|s| s.qsum).collect(),
            err_x: stats
                .iter()
                .map(|s| up((s.residual + gamma * s.norm_w) * slack))
                .collect(),
            err_q: stats
                .iter()
                .map(|s| up(s.scale as f64 * s.norm_q * slack))
                .collect(),
        })
    }

    /// The greedy token of each of the `n` hidden vectors `x` ([n, cols]) under the head `w`
    /// (the rows this screen was made from), into `out`. `penalty`: the repetition penalty
    /// and, per vector, the ids it applies to (an empty slice: none).
    pub fn pick(
        &self,
        w: Rows<'_>,
        x: &[f32],
        n: usize,
        penalty: Option<(f32, &[&[bool]])>,
        scratch: &mut Scratch,
        out: &mut Vec<u32>,
    ) {
        let (rows, cols) = (self.rows, self.cols);
        assert!(w.len() >= rows * cols && x.len() >= n * cols);
        out.clear();
        if n == 0 {
            return;
        }
        pack_activations(x, n, cols, &mut scratch.xq, &mut scratch.rounded);
        let rounded: &[Option<Rounded>] = &scratch.rounded;
        self.int8.products(&scratch.xq, n, &mut scratch.acc);
        scratch.per_token.resize_with(n, TokenScratch::default);
        let acc: &[i32] = &scratch.acc;
        out.resize(n, 0);
        let decide = |(t, (tok, ts)): (usize, (&mut u32, &mut TokenScratch))| {
            let seen =
                penalty.and_then(|(p, s)| s.get(t).filter(|s| !s.is_empty()).map(|s| (p, *s)));
            let xt = &x[t * cols..(t + 1) * cols];
            *tok = match rounded[t] {
                Some(r) => self.decide(w, xt, acc, n, t, r, seen, ts),
                None => full(w, xt, rows, seen, ts),
            };
        };
        if n > 1 && n * rows >= 1 << 16 {
            out.par_iter_mut()
                .zip(scratch.per_token.par_iter_mut())
                .enumerate()
                .for_each(decide);
        } else {
            out.iter_mut()
                .zip(scratch.per_token.iter_mut())
                .enumerate()
                .for_each(decide);
        }
    }

    /// The intervals [lo, hi] that hold the f32 logits of the 16 rows of block `b` for vector
    /// `t` (after the penalty where it applies); rows past the end get an empty (−∞) one.
    ///
    /// Computed in f32: the integer sum is exact, and the few f32 roundings of the estimate and
    /// of δ (each within 2⁻²⁴ relative) are covered by a margin of 10⁻⁵·(|estimate| + δ).
    #[allow(clippy::too_many_arguments)]
    #[inline]
    fn block_bounds(
        &self,
        acc: &[i32],
        n: usize,
        t: usize,
        b: usize,
        r: Rounded,
        seen: Option<(f32, &[bool])>,
        lo: &mut [f32; LANES],
        hi: &mut [f32; LANES],
    ) {
        let a = &acc[(b * n + t) * LANES..(b * n + t + 1) * LANES];
        let j0 = b * LANES;
        let (scale, qsum) = (&self.scale[j0..j0 + LANES], &self.qsum[j0..j0 + LANES]);
        let (ex, eq) = (&self.err_x[j0..j0 + LANES], &self.err_q[j0..j0 + LANES]);
        let (nx, ne) = (up(r.norm_x), up(r.norm_err));
        for l in 0..LANES {
            let i = a[l].wrapping_sub(qsum[l].wrapping_mul(128));
            let est = scale[l] * r.tau * i as f32;
            let d = ex[l] * nx + eq[l] * ne;
            let d = d + 1e-5 * (est.abs() + d) + 1e-30;
            lo[l] = est - d;
            hi[l] = est + d;
        }
        for l in self.rows.saturating_sub(j0).min(LANES)..LANES {
            lo[l] = f32::NEG_INFINITY;
            hi[l] = f32::NEG_INFINITY;
        }
        if let Some((p, s)) = seen {
            for l in 0..LANES {
                if s.get(j0 + l).copied().unwrap_or(false) && hi[l].is_finite() {
                    let (pl, ph) = (penalize64(lo[l] as f64, p), penalize64(hi[l] as f64, p));
                    // The decision applies the penalty in f32: allow for its rounding.
                    lo[l] = down(pl - pl.abs() * 2.4e-7 - 1e-40);
                    hi[l] = up(ph + ph.abs() * 2.4e-7 + 1e-40);
                }
            }
        }
    }

    /// Steps 2 and 3 of the module comment for vector t.
    #[allow(clippy::too_many_arguments)]
    fn decide(
        &self,
        w: Rows<'_>,
        x: &[f32],
        acc: &[i32],
        n: usize,
        t: usize,
        r: Rounded,
        seen: Option<(f32, &[bool])>,
        ts: &mut TokenScratch,
    ) -> u32 {
        let rows = self.rows;
        let (mut lo, mut hi) = ([0f32; LANES], [0f32; LANES]);
        let mut floor = f32::NEG_INFINITY;
        for b in 0..self.blocks {
            self.block_bounds(acc, n, t, b, r, seen, &mut lo, &mut hi);
            floor = lo.iter().fold(floor, |m, &v| m.max(v));
        }
        ts.candidates.clear();
        for b in 0..self.blocks {
            self.block_bounds(acc, n, t, b, r, seen, &mut lo, &mut hi);
            for (l, &h) in hi.iter().enumerate() {
                if h >= floor {
                    ts.candidates.push((b * LANES + l) as u32);
                }
            }
        }
        if ts.candidates.len() > rows / 4 {
            return full(w, x, rows, seen, ts);
        }
        let mut best: Option<(u32, f32)> = None;
        for &j in &ts.candidates {
            let ju = j as usize;
            let mut v = w.dot_row(ju, x, &mut ts.row);
            if let Some((p, s)) = seen {
                if s.get(ju).copied().unwrap_or(false) {
                    v = penalize(v, p);
                }
            }
            if !v.is_finite() {
                return full(w, x, rows, seen, ts);
            }
            if best.is_none_or(|(_, bv)| v > bv) {
                best = Some((j, v));
            }
        }
        best.map_or(0, |(j, _)| j)
    }
}

/// Every f32 logit of `x`, the penalty, then [`argmax`].
fn full(
    w: Rows<'_>,
    x: &[f32],
    rows: usize,
    seen: Option<(f32, &[bool])>,
    ts: &mut TokenScratch,
) -> u32 {
    let TokenScratch { logits, row, .. } = ts;
    logits.clear();
    logits.extend((0..rows).map(|j| w.dot_row(j, x, row)));
    if let Some((p, s)) = seen {
        apply_repetition_penalty(logits, s, p);
    }
    argmax(logits) as u32
}

/// Index of the largest value; the first one on ties (as `torch.argmax`).
pub fn argmax(xs: &[f32]) -> usize {
    let mut best = 0;
    for (i, &x) in xs.iter().enumerate() {
        if x > xs[best] {
            best = i;
        }
    }
    best
}

/// transformers' RepetitionPenaltyLogitsProcessor on one score: s·p below zero, s/p otherwise.
#[inline]
pub fn penalize(s: f32, p: f32) -> f32 {
    if s < 0.0 {
        s * p
    } else {
        s / p
    }
}

fn penalize64(s: f64, p: f32) -> f64 {
    if s < 0.0 {
        s * p as f64
    } else {
        s / p as f64
    }
}

/// [`penalize`] on every id marked in `seen`.
pub fn apply_repetition_penalty(scores: &mut [f32], seen: &[bool], p: f32) {
    for (s, &hit) in scores.iter_mut().zip(seen) {
        if hit {
            *s = penalize(*s, p);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::kernels::dense::dot;

    /// A small deterministic generator (xorshift64*), uniform in [-1, 1).
    struct Gen(u64);
    impl Gen {
        fn next(&mut self) -> f32 {
            self.0 ^= self.0 >> 12;
            self.0 ^= self.0 << 25;
            self.0 ^= self.0 >> 27;
            let v = self.0.wrapping_mul(0x2545_f491_4f6c_dd1d) >> 40;
            v as f32 / (1u64 << 23) as f32 - 1.0
        }
    }

    /// A head with the cases that stress the screen: tied (duplicate) rows, a zero row, a row
    /// with one large weight, rows that differ in their last bits.
    fn head(rows: usize, cols: usize, g: &mut Gen) -> Vec<f32> {
        let mut w: Vec<f32> = (0..rows * cols).map(|_| 0.05 * g.next()).collect();
        let (a, b) = w.split_at_mut(7 * cols);
        b[..cols].copy_from_slice(&a[3 * cols..4 * cols]); // row 7 = row 3
        w[11 * cols..12 * cols].fill(0.0);
        w[13 * cols + 5] = 3.0;
        for i in 0..cols {
            w[20 * cols + i] = f32::from_bits(w[19 * cols + i].to_bits() ^ 1);
        }
        w
    }

    /// Hidden vectors: ordinary, one with an outlier channel, one pointing at row 3 (so rows 3
    /// and 7 tie for the largest logit), all zero, and one that makes row 13 dominant.
    fn hidden(w: &[f32], n: usize, cols: usize, g: &mut Gen) -> Vec<f32> {
        let mut x: Vec<f32> = (0..n * cols).map(|_| 2.0 * g.next()).collect();
        x[cols + 1] = 80.0;
        for i in 0..cols {
            x[2 * cols + i] = 40.0 * w[3 * cols + i];
        }
        x[2 * cols + 5] = 0.0; // keep row 13's large weight out of it
        x[3 * cols..4 * cols].fill(0.0);
        x[4 * cols + 5] = 50.0;
        x
    }

    /// A head, its hidden vectors and its screen, after one unpenalised pick into `out`.
    struct Case {
        w: Vec<f32>,
        x: Vec<f32>,
        screen: Screen,
        scratch: Scratch,
        out: Vec<u32>,
    }

    impl Case {
        fn picked(rows: usize, cols: usize, n: usize, g: &mut Gen) -> Case {
            let w = head(rows, cols, g);
            let x = hidden(&w, n, cols, g);
            let screen = Screen::new(Rows::F32(&w), rows, cols).expect("screen");
            let mut scratch = Scratch::default();
            let mut out = Vec::new();
            screen.pick(Rows::F32(&w), &x, n, None, &mut scratch, &mut out);
            Case {
                w,
                x,
                screen,
                scratch,
                out,
            }
        }
    }

    /// The reference: every f32 logit, the penalty, then the first maximum (torch.argmax's tie
    /// rule, PyTorch documentation; the penalty as transformers' RepetitionPenaltyLogitsProcessor).
    fn reference(
        w: &[f32],
        x: &[f32],
        rows: usize,
        cols: usize,
        pen: Option<(f32, &[bool])>,
    ) -> u32 {
        let mut logits: Vec<f32> = (0..rows)
            .map(|j| dot(&w[j * cols..(j + 1) * cols], x))
            .collect();
        if let Some((p, s)) = pen {
            apply_repetition_penalty(&mut logits, s, p);
        }
        argmax(&logits) as u32
    }

    #[test]
    fn argmax_ties_go_to_the_lowest_index() {
        // torch.argmax returns the first maximal index (PyTorch documentation).
        assert_eq!(argmax(&[1.0, 3.0, 3.0, 2.0]), 1);
        assert_eq!(argmax(&[-1.0]), 0);
    }

    #[test]
    fn pick_is_the_argmax_of_every_f32_logit() {
        let mut g = Gen(0x9e37_79b9_7f4a_7c15);
        for &(rows, cols, n) in &[(1000, 67, 11), (333, 64, 5), (40, 6, 6), (4099, 130, 9)] {
            let Case {
                w,
                x,
                screen,
                mut scratch,
                mut out,
            } = Case::picked(rows, cols, n, &mut g);
            for t in 0..n {
                let want = reference(&w, &x[t * cols..(t + 1) * cols], rows, cols, None);
                assert_eq!(out[t], want, "rows {rows} cols {cols} vector {t}");
            }
            // Rows 3 and 7 tie on vector 2: the first wins.
            assert_eq!(out[2], 3);
            // With a penalty on each vector's own winner and a few others.
            let p = 1.7;
            let seen: Vec<Vec<bool>> = (0..n)
                .map(|t| {
                    let mut s = vec![false; rows];
                    s[out[t] as usize] = true;
                    s[(t * 31) % rows] = true;
                    s
                })
                .collect();
            let refs: Vec<&[bool]> = seen.iter().map(|s| s.as_slice()).collect();
            screen.pick(
                Rows::F32(&w),
                &x,
                n,
                Some((p, &refs)),
                &mut scratch,
                &mut out,
            );
            for t in 0..n {
                let xt = &x[t * cols..(t + 1) * cols];
                let want = reference(&w, xt, rows, cols, Some((p, &seen[t])));
                assert_eq!(
                    out[t], want,
                    "penalised: rows {rows} cols {cols} vector {t}"
                );
            }
        }
    }

    /// Every f32 logit lies in its interval, and the screen rules most rows out (so the picks
    /// above went through the screen, not the every-logit fallback).
    #[test]
    fn bounds_hold_and_screen_out_most_rows() {
        let mut g = Gen(42);
        let (rows, cols, n) = (4099, 130, 9);
        let Case {
            w,
            x,
            screen,
            scratch,
            ..
        } = Case::picked(rows, cols, n, &mut g);
        let mut rounded = Vec::new();
        pack_activations(&x, n, cols, &mut Vec::new(), &mut rounded);
        for (t, r) in rounded.iter().enumerate() {
            let Some(r) = *r else {
                assert_eq!(t, 3, "only the zero vector is left to the fallback");
                continue;
            };
            let xt = &x[t * cols..(t + 1) * cols];
            let mut kept = 0;
            let mut floor = f32::NEG_INFINITY;
            let (mut lo, mut hi) = ([0f32; LANES], [0f32; LANES]);
            for b in 0..screen.blocks {
                screen.block_bounds(&scratch.acc, n, t, b, r, None, &mut lo, &mut hi);
                for l in 0..LANES.min(rows - b * LANES) {
                    let j = b * LANES + l;
                    let f = dot(&w[j * cols..(j + 1) * cols], xt);
                    assert!(
                        lo[l] <= f && f <= hi[l],
                        "vector {t} row {j}: {} <= {f} <= {}",
                        lo[l],
                        hi[l]
                    );
                    floor = floor.max(lo[l]);
                }
            }
            for b in 0..screen.blocks {
                screen.block_bounds(&scratch.acc, n, t, b, r, None, &mut lo, &mut hi);
                kept += hi.iter().filter(|&&h| h >= floor).count();
            }
            assert!(kept <= rows / 4, "vector {t} kept {kept} of {rows}");
        }
    }

    /// A head stored in bf16 picks what the f32 head of its widened values picks, penalty and
    /// all: the screen and the candidates' logits see the same f32 values.
    #[test]
    fn a_16_bit_head_picks_as_its_widened_f32_values() {
        let mut g = Gen(7);
        let (rows, cols, n) = (2053, 96, 6);
        let w: Vec<f32> = head(rows, cols, &mut g)
            .into_iter()
            .map(|v| half::bf16::from_f32(v).to_f32())
            .collect();
        let x = hidden(&w, n, cols, &mut g);
        let narrow: Vec<half::bf16> = w.iter().map(|&v| half::bf16::from_f32(v)).collect();
        let narrow = Rows::Bf16(&narrow);
        let screen = Screen::new(narrow, rows, cols).expect("screen");
        let seen: Vec<Vec<bool>> = (0..n)
            .map(|t| (0..rows).map(|j| j % 97 == t).collect())
            .collect();
        let refs: Vec<&[bool]> = seen.iter().map(|s| s.as_slice()).collect();
        let mut out = Vec::new();
        for pen in [None, Some((1.3, refs.as_slice()))] {
            screen.pick(narrow, &x, n, pen, &mut Scratch::default(), &mut out);
            for t in 0..n {
                let p = pen.map(|(p, _)| (p, seen[t].as_slice()));
                let want = reference(&w, &x[t * cols..(t + 1) * cols], rows, cols, p);
                assert_eq!(out[t], want, "vector {t}, penalty {:?}", pen.map(|p| p.0));
            }
        }
    }
}
