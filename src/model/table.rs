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
use crate::kernels::dense::{dot, Half};
use crate::kernels::PARALLEL_WORK;
use candle_core::{CpuStorage, DType, Storage, Tensor};
use rayon::prelude::*;
use std::ops::Deref;

/// A [rows, cols] row-major table at its stored precision. It keeps the tensor the checkpoint
/// was read into (no second copy: at 8B scale each of the embedding table and the head is
/// 1 GiB in bf16) and lends its values through [`Table::read`].
pub struct Table {
    t: Tensor,
}

/// The values of a [`Table`] while they are read.
pub struct Held<G> {
    /// The storage's read lock (candle's own lock type).
    guard: G,
    start: usize,
    end: usize,
}

/// The rows of a table, borrowed: f32 as stored or 16-bit.
#[derive(Clone, Copy)]
pub enum Rows<'a> {
    F32(&'a [f32]),
    Bf16(&'a [half::bf16]),
    F16(&'a [half::f16]),
}

impl Table {
    /// Keeps `t` as it is when it is a contiguous f32, bf16 or f16 tensor in memory (as the
    /// checkpoint loader and the merge make them); any other is converted to f32 once.
    pub fn from_tensor(t: Tensor) -> Result<Table> {
        let usable = matches!(t.dtype(), DType::F32 | DType::BF16 | DType::F16)
            && t.layout().contiguous_offsets().is_some()
            && matches!(&*t.storage_and_layout().0, Storage::Cpu(_));
        let t = if usable {
            t
        } else {
            t.to_dtype(DType::F32)?.contiguous()?
        };
        Ok(Table { t })
    }

    /// Number of values.
    pub fn len(&self) -> usize {
        self.t.elem_count()
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Holds the values for reading; [`Held::rows`] lends them.
    pub fn read(&self) -> Held<impl Deref<Target = Storage> + '_> {
        let (guard, layout) = self.t.storage_and_layout();
        // `from_tensor` only keeps contiguous tensors.
        let (start, end) = layout.contiguous_offsets().unwrap_or((0, 0));
        Held { guard, start, end }
    }
}

impl<G: Deref<Target = Storage>> Held<G> {
    pub fn rows(&self) -> Rows<'_> {
        let (a, b) = (self.start, self.end);
        match &*self.guard {
            Storage::Cpu(CpuStorage::BF16(v)) => Rows::Bf16(&v[a..b]),
            Storage::Cpu(CpuStorage::F16(v)) => Rows::F16(&v[a..b]),
            Storage::Cpu(CpuStorage::F32(v)) => Rows::F32(&v[a..b]),
            // `from_tensor` only keeps f32, bf16 and f16 CPU storage.
            _ => Rows::F32(&[]),
        }
    }
}

impl<'a> Rows<'a> {
    /// Number of values.
    pub fn len(&self) -> usize {
        match self {
            Rows::F32(v) => v.len(),
            Rows::Bf16(v) => v.len(),
            Rows::F16(v) => v.len(),
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
            Rows::F32(v) => dst.copy_from_slice(&v[a..b]),
            Rows::Bf16(v) => Half::widen(&v[a..b], dst),
            Rows::F16(v) => Half::widen(&v[a..b], dst),
        }
    }

    /// Row `j` as f32 values: the row itself when the table is f32, else widened into `buf`.
    #[inline]
    pub fn row<'b>(&self, j: usize, cols: usize, buf: &'b mut Vec<f32>) -> &'b [f32]
    where
        'a: 'b,
    {
        match *self {
            Rows::F32(v) => &v[j * cols..(j + 1) * cols],
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

    /// y[n, rows] = x[n, cols] · tableᵀ: every logit of n hidden vectors (the logits a
    /// soft-capped head or a whole-row request needs). Each row of the table is read once (a
    /// 16-bit one widened once) and dotted with every vector by [`dot`], so each logit is the
    /// same at every batch size, and the one [`Rows::dot_row`] gives.
    pub fn matmul_t(&self, x: &[f32], n: usize, cols: usize, rows: usize, y: &mut [f32]) {
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
    use candle_core::Device;

    /// A bf16 table gives every logit of the f32 table of its widened values, bit for bit, and
    /// keeps the tensor it was given (no copy, no widening).
    #[test]
    fn sixteen_bit_rows_give_the_f32_logits() {
        let (rows, cols, n) = (600, 40, 3);
        let wide: Vec<f32> = (0..rows * cols)
            .map(|i| half::bf16::from_f32(((i * 7919) % 1000) as f32 / 500.0 - 1.0).to_f32())
            .collect();
        let narrow: Vec<half::bf16> = wide.iter().map(|&v| half::bf16::from_f32(v)).collect();
        let narrow =
            Table::from_tensor(Tensor::from_vec(narrow, (rows, cols), &Device::Cpu).unwrap())
                .unwrap();
        let wide = Table::from_tensor(Tensor::from_vec(wide, (rows, cols), &Device::Cpu).unwrap())
            .unwrap();
        let (hn, hw) = (narrow.read(), wide.read());
        let (nr, wr) = (hn.rows(), hw.rows());
        assert!(matches!(nr, Rows::Bf16(_)) && matches!(wr, Rows::F32(_)));
        let x: Vec<f32> = (0..n * cols).map(|i| (i as f32 * 0.37).sin()).collect();
        let (mut a, mut b) = (vec![0f32; n * rows], vec![0f32; n * rows]);
        nr.matmul_t(&x, n, cols, rows, &mut a);
        // The f32 table's logits of n rows at once are each row's alone.
        let mut all = vec![0f32; n * rows];
        wr.matmul_t(&x, n, cols, rows, &mut all);
        for t in 0..n {
            let mut one = vec![0f32; rows];
            wr.matmul_t(&x[t * cols..(t + 1) * cols], 1, cols, rows, &mut one);
            assert_eq!(one, all[t * rows..(t + 1) * rows]);
        }
        let mut buf = Vec::new();
        for t in 0..n {
            for j in 0..rows {
                let xt = &x[t * cols..(t + 1) * cols];
                b[t * rows + j] = wr.dot_row(j, xt, &mut buf);
                assert_eq!(nr.dot_row(j, xt, &mut buf), b[t * rows + j]);
            }
        }
        assert_eq!(a, b);
        let mut row = vec![0f32; cols];
        nr.row_into(5, &mut row);
        assert_eq!(row, wr.row(5, cols, &mut buf));
    }

    /// A tensor of another dtype, or a view that is not contiguous, becomes f32 values in
    /// row-major order.
    #[test]
    fn other_tensors_become_f32() {
        let t = Tensor::new(&[[1f64, 2.0], [3.0, 4.0]], &Device::Cpu).unwrap();
        let table = Table::from_tensor(t.t().unwrap()).unwrap();
        let held = table.read();
        assert!(matches!(held.rows(), Rows::F32(v) if v == [1.0, 3.0, 2.0, 4.0]));
    }
}
