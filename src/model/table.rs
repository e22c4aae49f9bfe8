//! The embedding table and the output head, [vocab, hidden], kept at the precision the
//! checkpoint stores them in.
//!
//! A bf16 or f16 table stays 16-bit and each row is widened to f32 where it is used: looked up
//! as an embedding, dotted with a hidden vector as a head row. Widening is exact, so every
//! value the products see is the f32 value the reference stack computes on when it loads the
//! checkpoint in float32, and the logits are the ones an f32 table gives, bit for bit (the
//! same [`dot`] runs on the same f32 values). The output head is the largest matrix of a small
//! model with a large vocabulary (about 1 GiB in bf16 for a 128,256-token vocabulary at
//! hidden size 4,096), so keeping it 16-bit halves what it takes in memory.

use crate::error::Result;
use crate::kernels::dense::{self, dot, Half};
use crate::kernels::PARALLEL_WORK;
use crate::model::linear::with_values;
use candle_core::{DType, Tensor};
use rayon::prelude::*;

/// A [rows, cols] row-major table at its stored precision.
pub enum Table {
    F32(Vec<f32>),
    Bf16(Vec<half::bf16>),
    F16(Vec<half::f16>),
}

impl Table {
    /// The values of `t` as stored: a bf16 or f16 tensor stays 16-bit, any other becomes f32.
    pub fn from_tensor(t: &Tensor) -> Result<Table> {
        Ok(match t.dtype() {
            DType::BF16 => Table::Bf16(with_values(t, <[half::bf16]>::to_vec)?),
            DType::F16 => Table::F16(with_values(t, <[half::f16]>::to_vec)?),
            _ => Table::F32(crate::model::linear::flat(t)?),
        })
    }

    /// Number of values.
    pub fn len(&self) -> usize {
        match self {
            Table::F32(v) => v.len(),
            Table::Bf16(v) => v.len(),
            Table::F16(v) => v.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Writes row `j` (of `dst.len()` values) into `dst` as f32 (exact).
    #[inline]
    pub fn row_into(&self, j: usize, dst: &mut [f32]) {
        let (a, b) = (j * dst.len(), (j + 1) * dst.len());
        match self {
            Table::F32(v) => dst.copy_from_slice(&v[a..b]),
            Table::Bf16(v) => Half::widen(&v[a..b], dst),
            Table::F16(v) => Half::widen(&v[a..b], dst),
        }
    }

    /// Row `j` as f32 values: the row itself when the table is f32, else widened into `buf`.
    #[inline]
    pub fn row<'a>(&'a self, j: usize, cols: usize, buf: &'a mut Vec<f32>) -> &'a [f32] {
        match self {
            Table::F32(v) => &v[j * cols..(j + 1) * cols],
            _ => {
                buf.resize(cols, 0.0);
                self.row_into(j, buf);
                buf
            }
        }
    }

    /// The dot product of row `j` with `x` (`x.len()` columns), in f32 by [`dot`].
    #[inline]
    pub fn dot_row(&self, j: usize, x: &[f32], buf: &mut Vec<f32>) -> f32 {
        dot(self.row(j, x.len(), buf), x)
    }

    /// y[n, rows] = x[n, cols] · tableᵀ: every logit of n hidden vectors. An f32 table runs the
    /// dense kernel; a 16-bit one widens each row once and dots it with every vector (the
    /// logits a softcapped head or a whole-row request needs, memory-bound either way).
    pub fn matmul_t(&self, x: &[f32], n: usize, cols: usize, rows: usize, y: &mut [f32]) {
        if let Table::F32(w) = self {
            return dense::matmul_t(x, n, cols, w, rows, y);
        }
        assert!(x.len() >= n * cols && self.len() >= rows * cols && y.len() >= n * rows);
        // Row-major [rows, n] first, so blocks of rows are contiguous for the tasks.
        let mut by_row = vec![0f32; rows * n];
        let block = 256;
        let one = |(b, out): (usize, &mut [f32])| {
            let mut buf = Vec::with_capacity(cols);
            for (i, logits) in out.chunks_mut(n).enumerate() {
                let row = self.row(b * block + i, cols, &mut buf);
                for (t, v) in logits.iter_mut().enumerate() {
                    *v = dot(row, &x[t * cols..(t + 1) * cols]);
                }
            }
        };
        if n * rows * cols >= PARALLEL_WORK {
            by_row.par_chunks_mut(block * n).enumerate().for_each(one);
        } else {
            by_row.chunks_mut(block * n).enumerate().for_each(one);
        }
        for (j, logits) in by_row.chunks(n).enumerate() {
            for (t, &v) in logits.iter().enumerate() {
                y[t * rows + j] = v;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A bf16 table gives every logit of the f32 table of its widened values, bit for bit.
    #[test]
    fn sixteen_bit_rows_give_the_f32_logits() {
        let (rows, cols, n) = (600, 40, 3);
        let wide: Vec<f32> = (0..rows * cols)
            .map(|i| half::bf16::from_f32(((i * 7919) % 1000) as f32 / 500.0 - 1.0).to_f32())
            .collect();
        let narrow = Table::Bf16(wide.iter().map(|&v| half::bf16::from_f32(v)).collect());
        let wide = Table::F32(wide);
        let x: Vec<f32> = (0..n * cols).map(|i| (i as f32 * 0.37).sin()).collect();
        let (mut a, mut b) = (vec![0f32; n * rows], vec![0f32; n * rows]);
        narrow.matmul_t(&x, n, cols, rows, &mut a);
        let mut buf = Vec::new();
        for t in 0..n {
            for j in 0..rows {
                let xt = &x[t * cols..(t + 1) * cols];
                b[t * rows + j] = wide.dot_row(j, xt, &mut buf);
                assert_eq!(narrow.dot_row(j, xt, &mut buf), b[t * rows + j]);
            }
        }
        assert_eq!(a, b);
        let mut row = vec![0f32; cols];
        narrow.row_into(5, &mut row);
        assert_eq!(row, wide.row(5, cols, &mut buf));
    }
}
