//! Block-quantised weights in the panel layout: 4-bit codes, each standing for a value of a
//! 16-entry table times the f32 scale of its block, read by the products of `dense` through
//! its [`Panels`] seam. The products see only f32 values: a piece of a panel is dequantised
//! into a small buffer that stays in the first-level cache, so batch-1 decoding streams the
//! 4-bit bytes (half a byte per weight plus a scale per block) and never holds an f32 copy.
//!
//! Layout, for a layer of `out` × `inp` with blocks of `block` values along the input:
//! - codes: panel p (output columns 64p..64p + 64), row k holds the 64 codes of columns
//!   64p + l as 32 bytes, column 2j in the low half of byte j and 2j + 1 in the high half;
//! - scales: panel p, block b = k / block, column l, one f32 each.
//!
//! Block formats whose blocks run along the input dimension (bitsandbytes' NF4 and FP4 with
//! blocks of 64, GGUF's 4-bit block formats with blocks of 32) fit this layout as long as a
//! block is a multiple of [`PIECE_ROWS`] or divides it; the formats themselves (code tables,
//! how scales are quantised) live beside it, `nf4` for bitsandbytes'.

use super::dense::{with_panel_buffer, Panels, PANEL, PIECE_ROWS};

/// A matrix of 4-bit codes with one table and a scale per block of `block` input values.
pub struct CodeMatrix {
    pub out: usize,
    pub inp: usize,
    block: usize,
    table: [f32; 16],
    codes: Vec<u8>,
    scales: Vec<f32>,
}

impl CodeMatrix {
    /// An all-zero-code matrix of `out` × `inp`; `inp` must be a multiple of `block`, and
    /// `block` a multiple of [`PIECE_ROWS`].
    pub fn new(out: usize, inp: usize, block: usize, table: [f32; 16]) -> CodeMatrix {
        assert!(block > 0 && inp.is_multiple_of(block) && block.is_multiple_of(PIECE_ROWS));
        let panels = out.div_ceil(PANEL);
        CodeMatrix {
            out,
            inp,
            block,
            table,
            codes: vec![0; panels * inp * PANEL / 2],
            scales: vec![0.0; panels * (inp / block) * PANEL],
        }
    }

    /// Writes output rows `at..at + rows`: `codes` two per byte over [rows, inp] row-major
    /// (value 2i in the low half of byte i, as `nf4::Quantised` holds them); `scales` one per
    /// block, [rows, inp / block].
    pub fn put_rows(&mut self, codes: &[u8], scales: &[f32], rows: usize, at: usize) {
        let blocks = self.inp / self.block;
        assert!(codes.len() * 2 >= rows * self.inp && scales.len() >= rows * blocks);
        assert!(at + rows <= self.out);
        for r in 0..rows {
            let j = at + r;
            let (p, l) = (j / PANEL, j % PANEL);
            let shift = 4 * (l % 2);
            for k in 0..self.inp {
                let i = r * self.inp + k;
                let c = (codes[i / 2] >> (4 * (i % 2))) & 0xF;
                let byte = &mut self.codes[(p * self.inp + k) * PANEL / 2 + l / 2];
                *byte = (*byte & !(0xF << shift)) | ((c & 0xF) << shift);
            }
            for (b, &s) in scales[r * blocks..(r + 1) * blocks].iter().enumerate() {
                self.scales[(p * blocks + b) * PANEL + l] = s;
            }
        }
    }

    /// Bytes held: the codes and the scales.
    pub fn bytes(&self) -> usize {
        self.codes.len() + 4 * self.scales.len()
    }

    /// Rows k0..k1 of panel p as f32 into `dst` ([k1 - k0, 64]): table[code] · scale, one f32
    /// multiply each.
    #[inline(always)]
    fn dequantise(&self, p: usize, k0: usize, k1: usize, dst: &mut [f32]) {
        let blocks = self.inp / self.block;
        for (k, row) in (k0..k1).zip(dst.chunks_exact_mut(PANEL)) {
            let s0 = (p * blocks + k / self.block) * PANEL;
            let scale = &self.scales[s0..s0 + PANEL];
            let c0 = (p * self.inp + k) * PANEL / 2;
            let codes = &self.codes[c0..c0 + PANEL / 2];
            for (j, &b) in codes.iter().enumerate() {
                row[2 * j] = self.table[(b & 0xF) as usize] * scale[2 * j];
                row[2 * j + 1] = self.table[(b >> 4) as usize] * scale[2 * j + 1];
            }
        }
    }

    /// The f32 value of output row j, input k (for tests and checks).
    pub fn value(&self, j: usize, k: usize) -> f32 {
        let mut row = [0.0f32; PANEL];
        self.dequantise(j / PANEL, k, k + 1, &mut row);
        row[j % PANEL]
    }
}

impl Panels for CodeMatrix {
    #[inline(always)]
    fn piece<'a>(&'a self, p: usize, k0: usize, k1: usize, buf: &'a mut [f32]) -> &'a [f32] {
        let piece = &mut buf[..(k1 - k0) * PANEL];
        self.dequantise(p, k0, k1, piece);
        piece
    }

    fn whole(&self, p: usize, f: &mut dyn FnMut(&[f32])) {
        with_panel_buffer(self.inp * PANEL, |buf| {
            self.dequantise(p, 0, self.inp, buf);
            f(buf);
        });
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::kernels::dense::assert_panels_equal_dense;

    /// The product over 4-bit codes is bit for bit the f32 product over the dequantised
    /// matrix (table[code] · scale written out in f32): one row (pieces), four rows (each as
    /// alone), many rows (whole panels), partial last panel, one and several
    /// blocks per row.
    #[test]
    fn code_products_equal_the_f32_product_of_the_dequantised_matrix() {
        let table: [f32; 16] = std::array::from_fn(|i| (i as f32 - 7.5) / 7.5);
        for (n, inp, out) in [(1, 64, 5), (1, 256, 150), (4, 128, 70), (9, 192, 130)] {
            let blocks = inp / 64;
            let codes: Vec<u8> = (0..out * inp)
                .map(|i| ((i * 7 + i / 3) % 16) as u8)
                .collect();
            let packed: Vec<u8> = codes.chunks(2).map(|p| p[0] | (p[1] << 4)).collect();
            let scales: Vec<f32> = (0..out * blocks)
                .map(|i| 0.01 + (i % 13) as f32 * 0.037)
                .collect();
            let mut m = CodeMatrix::new(out, inp, 64, table);
            // Two parts stacked, as q | k | v are.
            let first = out / 3;
            let half = first * inp / 2;
            m.put_rows(&packed[..half], &scales[..first * blocks], first, 0);
            m.put_rows(
                &packed[half..],
                &scales[first * blocks..],
                out - first,
                first,
            );
            let dense: Vec<f32> = (0..out * inp)
                .map(|i| table[codes[i] as usize] * scales[(i / inp) * blocks + (i % inp) / 64])
                .collect();
            for j in [0, out / 2, out - 1] {
                for k in [0, inp / 2, inp - 1] {
                    assert_eq!(m.value(j, k).to_bits(), dense[j * inp + k].to_bits());
                }
            }
            assert_panels_equal_dense(&m, &dense, n, inp, out);
        }
    }
}
