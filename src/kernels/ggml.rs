//! GGUF's block formats (ggml tensor types), dequantised exactly as the reference does, and a
//! matrix of such rows read by the products of `dense` through its [`Panels`] seam.
//!
//! The reference is transformers loading a GGUF file: it dequantises every tensor to f32 with
//! the `gguf` package's numpy code (gguf 0.19, `gguf/quants.py`, each type's
//! `dequantize_blocks`). Each function below follows that code operation for operation: the
//! f16 scales widened to f32 (exact), then the same products and sums in the same order, each
//! rounded to f32 on its own (numpy rounds every array operation; Rust never contracts `a * b +
//! c` into a fused multiply-add), so the values are bit for bit those the reference computes
//! on. A matrix keeps its rows in the stored bytes: a product dequantises the 64 rows of one
//! panel, a piece of [`PIECE_ROWS`] inputs at a time, into a buffer that stays in the
//! first-level cache, so batch-1 decoding reads the file's bits per weight, not 32.
//!
//! Block layouts (bytes of one block, in order; from the same file):
//! - `q4_0` (32 values, 18 bytes): f16 d, 16 bytes of nibbles (value i < 16 the low nibble of
//!   byte i, value 16 + i its high nibble); w = d · (q − 8).
//! - `q4_1` (32, 20): f16 d, f16 m, nibbles as q4_0; w = d · q + m.
//! - `q5_0` (32, 22): f16 d, u32 high bits (bit i for value i), nibbles; w = d · (q − 16).
//! - `q5_1` (32, 24): f16 d, f16 m, u32 high bits, nibbles; w = d · q + m.
//! - `q8_0` (32, 34): f16 d, 32 i8; w = q · d.
//! - `q2_k` (256, 84): 16 scale bytes (low nibble scale, high nibble min, one per 16 values),
//!   64 bytes of 2-bit codes, f16 d, f16 dmin; w = (d · sc) · q − (dmin · m).
//! - `q3_k` (256, 110): 32 bytes high-bit mask, 64 bytes of 2-bit codes, 12 bytes of 6-bit
//!   scales, f16 d; w = (d · (sc − 32)) · (q − 4·(1 − hbit)).
//! - `q4_k` (256, 144): f16 d, f16 dmin, 12 bytes of 6-bit scales and mins (one per 32
//!   values), 128 bytes of nibbles; w = (d · sc) · q − (dmin · m).
//! - `q5_k` (256, 176): as q4_k with 32 bytes of fifth bits before the nibbles.
//! - `q6_k` (256, 210): 128 bytes low nibbles, 64 bytes high 2 bits, 16 i8 scales, f16 d;
//!   w = (d · sc) · (q − 32).
//! - `f32`, `f16`, `bf16`: one value each, widened exactly.

use super::dense::{with_panel_buffer, Panels, PANEL};
use half::f16;

/// The ggml tensor types liftgate reads (the others are refused by name when a file is read).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum GgmlType {
    F32,
    F16,
    Bf16,
    Q4_0,
    Q4_1,
    Q5_0,
    Q5_1,
    Q8_0,
    Q2K,
    Q3K,
    Q4K,
    Q5K,
    Q6K,
}

/// Values per super-block of the k-quants (`QK_K`).
const QK_K: usize = 256;

impl GgmlType {
    /// The type of ggml's numeric id (`GGMLQuantizationType` in gguf/constants.py); `Err` holds
    /// the type's name when it is one liftgate does not read, or "unknown id N".
    pub fn from_id(id: u32) -> Result<GgmlType, String> {
        Ok(match id {
            0 => GgmlType::F32,
            1 => GgmlType::F16,
            2 => GgmlType::Q4_0,
            3 => GgmlType::Q4_1,
            6 => GgmlType::Q5_0,
            7 => GgmlType::Q5_1,
            8 => GgmlType::Q8_0,
            10 => GgmlType::Q2K,
            11 => GgmlType::Q3K,
            12 => GgmlType::Q4K,
            13 => GgmlType::Q5K,
            14 => GgmlType::Q6K,
            30 => GgmlType::Bf16,
            other => return Err(unsupported_name(other)),
        })
    }

    /// The name GGUF tools print (lower case).
    pub fn name(self) -> &'static str {
        match self {
            GgmlType::F32 => "f32",
            GgmlType::F16 => "f16",
            GgmlType::Bf16 => "bf16",
            GgmlType::Q4_0 => "q4_0",
            GgmlType::Q4_1 => "q4_1",
            GgmlType::Q5_0 => "q5_0",
            GgmlType::Q5_1 => "q5_1",
            GgmlType::Q8_0 => "q8_0",
            GgmlType::Q2K => "q2_k",
            GgmlType::Q3K => "q3_k",
            GgmlType::Q4K => "q4_k",
            GgmlType::Q5K => "q5_k",
            GgmlType::Q6K => "q6_k",
        }
    }

    /// (values per block, bytes per block), as `GGML_QUANT_SIZES`.
    pub fn block(self) -> (usize, usize) {
        match self {
            GgmlType::F32 => (1, 4),
            GgmlType::F16 | GgmlType::Bf16 => (1, 2),
            GgmlType::Q4_0 => (32, 18),
            GgmlType::Q4_1 => (32, 20),
            GgmlType::Q5_0 => (32, 22),
            GgmlType::Q5_1 => (32, 24),
            GgmlType::Q8_0 => (32, 34),
            GgmlType::Q2K => (QK_K, 84),
            GgmlType::Q3K => (QK_K, 110),
            GgmlType::Q4K => (QK_K, 144),
            GgmlType::Q5K => (QK_K, 176),
            GgmlType::Q6K => (QK_K, 210),
        }
    }

    /// Bytes of a row of `values` values (`values` a multiple of the block size).
    pub fn row_bytes(self, values: usize) -> usize {
        let (n, b) = self.block();
        values / n * b
    }
}

/// The name of a ggml type id liftgate does not read (gguf/constants.py
/// `GGMLQuantizationType`).
fn unsupported_name(id: u32) -> String {
    let name = match id {
        9 => "q8_1",
        15 => "q8_k",
        16 => "iq2_xxs",
        17 => "iq2_xs",
        18 => "iq3_xxs",
        19 => "iq1_s",
        20 => "iq4_nl",
        21 => "iq3_s",
        22 => "iq2_s",
        23 => "iq4_xs",
        24 => "i8",
        25 => "i16",
        26 => "i32",
        27 => "i64",
        28 => "f64",
        29 => "iq1_m",
        34 => "tq1_0",
        35 => "tq2_0",
        39 => "mxfp4",
        _ => return format!("unknown type id {id}"),
    };
    format!("{name} (type id {id})")
}

#[inline(always)]
fn half_at(b: &[u8], at: usize) -> f32 {
    f16::from_bits(u16::from_le_bytes([b[at], b[at + 1]])).to_f32()
}

/// The 6-bit scale and min of sub-block `j` (0..8) of a q4_k/q5_k block's 12 scale bytes
/// (`Q4_K.get_scale_min`).
#[inline(always)]
fn scale_min_k4(s: &[u8], j: usize) -> (u8, u8) {
    if j < 4 {
        (s[j] & 0x3F, s[4 + j] & 0x3F)
    } else {
        let md = s[8 + j - 4];
        (
            (md & 0x0F) | ((s[j - 4] >> 2) & 0x30),
            (md >> 4) | ((s[4 + j - 4] >> 2) & 0x30),
        )
    }
}

/// Values `from..to` of one block of type `t` (`blk` holds its bytes; for f32/f16/bf16 a block
/// is one value) into `out[..to - from]`, as the reference computes them.
#[inline]
pub fn dequantise_block(t: GgmlType, blk: &[u8], from: usize, to: usize, out: &mut [f32]) {
    let out = &mut out[..to - from];
    match t {
        GgmlType::F32 => out[0] = f32::from_le_bytes([blk[0], blk[1], blk[2], blk[3]]),
        GgmlType::F16 => out[0] = half_at(blk, 0),
        GgmlType::Bf16 => {
            out[0] = f32::from_bits((u16::from_le_bytes([blk[0], blk[1]]) as u32) << 16)
        }
        GgmlType::Q4_0 => {
            let d = half_at(blk, 0);
            let qs = &blk[2..18];
            for (o, i) in out.iter_mut().zip(from..to) {
                let q = (qs[i % 16] >> (4 * (i / 16))) & 0x0F;
                *o = d * (q as i8 - 8) as f32;
            }
        }
        GgmlType::Q4_1 => {
            let (d, m) = (half_at(blk, 0), half_at(blk, 2));
            let qs = &blk[4..20];
            for (o, i) in out.iter_mut().zip(from..to) {
                let q = (qs[i % 16] >> (4 * (i / 16))) & 0x0F;
                *o = d * q as f32 + m;
            }
        }
        GgmlType::Q5_0 => {
            let d = half_at(blk, 0);
            let qh = u32::from_le_bytes([blk[2], blk[3], blk[4], blk[5]]);
            let qs = &blk[6..22];
            for (o, i) in out.iter_mut().zip(from..to) {
                let lo = (qs[i % 16] >> (4 * (i / 16))) & 0x0F;
                let hi = ((qh >> i) & 1) as u8;
                *o = d * ((lo | (hi << 4)) as i8 - 16) as f32;
            }
        }
        GgmlType::Q5_1 => {
            let (d, m) = (half_at(blk, 0), half_at(blk, 2));
            let qh = u32::from_le_bytes([blk[4], blk[5], blk[6], blk[7]]);
            let qs = &blk[8..24];
            for (o, i) in out.iter_mut().zip(from..to) {
                let lo = (qs[i % 16] >> (4 * (i / 16))) & 0x0F;
                let hi = ((qh >> i) & 1) as u8;
                *o = d * (lo | (hi << 4)) as f32 + m;
            }
        }
        GgmlType::Q8_0 => {
            let d = half_at(blk, 0);
            for (o, i) in out.iter_mut().zip(from..to) {
                *o = (blk[2 + i] as i8) as f32 * d;
            }
        }
        GgmlType::Q2K => {
            let (scales, qs) = (&blk[0..16], &blk[16..80]);
            let (d, dmin) = (half_at(blk, 80), half_at(blk, 82));
            for (o, i) in out.iter_mut().zip(from..to) {
                let sc = scales[i / 16];
                let dl = d * (sc & 0x0F) as f32;
                let ml = dmin * (sc >> 4) as f32;
                let (h, s, l) = (i / 128, (i % 128) / 32, i % 32);
                let q = (qs[h * 32 + l] >> (2 * s)) & 3;
                *o = dl * q as f32 - ml;
            }
        }
        GgmlType::Q3K => {
            let (hmask, qs, sc) = (&blk[0..32], &blk[32..96], &blk[96..108]);
            let d = half_at(blk, 108);
            for (o, i) in out.iter_mut().zip(from..to) {
                let s = i / 16;
                let low = (sc[s % 8] >> (4 * (s / 8))) & 0x0F;
                let high = (sc[8 + s % 4] >> (2 * (s / 4))) & 0x03;
                let scale = ((low | (high << 4)) as i8 - 32) as f32;
                let dl = d * scale;
                let (h, sh, l) = (i / 128, (i % 128) / 32, i % 32);
                let ql = ((qs[h * 32 + l] >> (2 * sh)) & 3) as i8;
                let qh = ((hmask[l] >> (i / 32)) & 1) ^ 1;
                *o = dl * (ql - (qh << 2) as i8) as f32;
            }
        }
        GgmlType::Q4K | GgmlType::Q5K => {
            let (d, dmin) = (half_at(blk, 0), half_at(blk, 2));
            let scales = &blk[4..16];
            let (qh, qs) = if t == GgmlType::Q5K {
                (Some(&blk[16..48]), &blk[48..176])
            } else {
                (None, &blk[16..144])
            };
            for (o, i) in out.iter_mut().zip(from..to) {
                let j = i / 32;
                let (sc, m) = scale_min_k4(scales, j);
                let dj = d * sc as f32;
                let dm = dmin * m as f32;
                let l = i % 32;
                let mut q = (qs[(j / 2) * 32 + l] >> (4 * (j % 2))) & 0x0F;
                if let Some(qh) = qh {
                    q |= ((qh[l] >> j) & 1) << 4;
                }
                *o = dj * q as f32 - dm;
            }
        }
        GgmlType::Q6K => {
            let (ql, qh, sc) = (&blk[0..128], &blk[128..192], &blk[192..208]);
            let d = half_at(blk, 208);
            for (o, i) in out.iter_mut().zip(from..to) {
                let ds = d * (sc[i / 16] as i8) as f32;
                let (h, r) = (i / 128, i % 128);
                let lo = (ql[h * 64 + r % 64] >> (4 * (r / 64))) & 0x0F;
                let hi = (qh[h * 32 + r % 32] >> (2 * (r / 32))) & 0x03;
                let q = (lo | (hi << 4)) as i8 - 32;
                *o = ds * q as f32;
            }
        }
    }
}

/// Values `from..to` of a row of type `t` (its bytes in `row`) into `out[..to - from]`.
pub fn dequantise_row(t: GgmlType, row: &[u8], from: usize, to: usize, out: &mut [f32]) {
    let (n, b) = t.block();
    let mut k = from;
    let mut at = 0;
    while k < to {
        let blk = k / n;
        let end = ((blk + 1) * n).min(to);
        dequantise_block(
            t,
            &row[blk * b..(blk + 1) * b],
            k - blk * n,
            end - blk * n,
            &mut out[at..at + end - k],
        );
        at += end - k;
        k = end;
    }
}

/// Consecutive output rows stored in one type: `rows` rows of `row_bytes` bytes each.
struct Part {
    t: GgmlType,
    rows: usize,
    row_bytes: usize,
    bytes: Vec<u8>,
}

/// A linear layer's [out, inp] matrix as GGUF stores it: each output row the blocks of its
/// inputs, possibly several tensors of different types stacked (q | k | v of a q4_k_m export
/// mixes q4_k and q6_k).
pub struct GgmlMatrix {
    pub out: usize,
    pub inp: usize,
    parts: Vec<Part>,
}

impl GgmlMatrix {
    /// An empty matrix of `inp` inputs; rows are appended with [`GgmlMatrix::push`].
    pub fn new(inp: usize) -> GgmlMatrix {
        GgmlMatrix {
            out: 0,
            inp,
            parts: Vec::new(),
        }
    }

    /// Appends `rows` rows of type `t` (`bytes` is rows × `t.row_bytes(inp)`, row-major as the
    /// file stores it). `inp` must be a multiple of the type's block size.
    pub fn push(&mut self, t: GgmlType, rows: usize, bytes: Vec<u8>) {
        let row_bytes = t.row_bytes(self.inp);
        assert!(self.inp.is_multiple_of(t.block().0) && bytes.len() == rows * row_bytes);
        self.out += rows;
        self.parts.push(Part {
            t,
            rows,
            row_bytes,
            bytes,
        });
    }

    /// Bytes held.
    pub fn bytes(&self) -> usize {
        self.parts.iter().map(|p| p.bytes.len()).sum()
    }

    /// The type and bytes of output row `j`.
    #[inline(always)]
    fn row(&self, mut j: usize) -> (GgmlType, &[u8]) {
        for p in &self.parts {
            if j < p.rows {
                return (p.t, &p.bytes[j * p.row_bytes..(j + 1) * p.row_bytes]);
            }
            j -= p.rows;
        }
        unreachable!("row index checked by the caller")
    }

    /// Values `from..to` of output row `j` into `out`.
    pub fn row_values(&self, j: usize, from: usize, to: usize, out: &mut [f32]) {
        let (t, bytes) = self.row(j);
        dequantise_row(t, bytes, from, to, out);
    }

    /// Rows k0..k1 of panel p as f32 into `dst` ([k1 - k0, 64]); columns past `out` are zero.
    fn dequantise(&self, p: usize, k0: usize, k1: usize, dst: &mut [f32], tmp: &mut [f32]) {
        let width = k1 - k0;
        for l in 0..PANEL {
            let j = p * PANEL + l;
            if j >= self.out {
                for k in 0..width {
                    dst[k * PANEL + l] = 0.0;
                }
                continue;
            }
            self.row_values(j, k0, k1, tmp);
            for (k, &v) in tmp[..width].iter().enumerate() {
                dst[k * PANEL + l] = v;
            }
        }
    }
}

thread_local! {
    /// One row's values of the piece being dequantised.
    static ROW: std::cell::RefCell<Vec<f32>> = const { std::cell::RefCell::new(Vec::new()) };
}

impl Panels for GgmlMatrix {
    fn piece<'a>(&'a self, p: usize, k0: usize, k1: usize, buf: &'a mut [f32]) -> &'a [f32] {
        let piece = &mut buf[..(k1 - k0) * PANEL];
        ROW.with(|row| {
            let mut row = row.borrow_mut();
            if row.len() < k1 - k0 {
                row.resize(k1 - k0, 0.0);
            }
            self.dequantise(p, k0, k1, piece, &mut row);
        });
        piece
    }

    fn whole(&self, p: usize, f: &mut dyn FnMut(&[f32])) {
        let mut row = vec![0.0; self.inp];
        with_panel_buffer(self.inp * PANEL, |buf| {
            self.dequantise(p, 0, self.inp, buf, &mut row);
            f(buf);
        });
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::kernels::dense::assert_panels_equal_dense;
    use candle_core::quantized::GgmlDType;
    use candle_core::Device;

    /// Deterministic block bytes with every f16 scale finite and small (random bytes elsewhere).
    fn blocks(t: GgmlType, rows: usize, inp: usize, seed: u64) -> Vec<u8> {
        let mut s = seed;
        let mut next = || {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (s >> 33) as u8
        };
        let mut b: Vec<u8> = (0..rows * t.row_bytes(inp)).map(|_| next()).collect();
        let size = t.block().1;
        let halves: &[usize] = match t {
            GgmlType::Q4_0 | GgmlType::Q5_0 | GgmlType::Q8_0 => &[0],
            GgmlType::Q4_1 | GgmlType::Q5_1 | GgmlType::Q4K | GgmlType::Q5K => &[0, 2],
            GgmlType::Q2K => &[80, 82],
            GgmlType::Q3K => &[108],
            GgmlType::Q6K => &[208],
            GgmlType::F16 => &[0],
            _ => &[],
        };
        for blk in b.chunks_exact_mut(size) {
            for &h in halves {
                let v = f16::from_f32((blk[h] as f32 - 128.0) / 4096.0);
                blk[h..h + 2].copy_from_slice(&v.to_bits().to_le_bytes());
            }
        }
        if t == GgmlType::F32 {
            for c in b.chunks_exact_mut(4) {
                let v = (c[0] as f32 - 128.0) / 64.0;
                c.copy_from_slice(&v.to_le_bytes());
            }
        }
        b
    }

    const ALL: [GgmlType; 13] = [
        GgmlType::F32,
        GgmlType::F16,
        GgmlType::Bf16,
        GgmlType::Q4_0,
        GgmlType::Q4_1,
        GgmlType::Q5_0,
        GgmlType::Q5_1,
        GgmlType::Q8_0,
        GgmlType::Q2K,
        GgmlType::Q3K,
        GgmlType::Q4K,
        GgmlType::Q5K,
        GgmlType::Q6K,
    ];

    /// Any sub-range of a row dequantises to the same values as the whole row, so pieces of a
    /// panel read the same numbers as whole panels.
    #[test]
    fn ranges_of_a_row_equal_the_whole_row() {
        for t in ALL {
            let inp = 512;
            let b = blocks(t, 1, inp, 7);
            let mut whole = vec![0.0; inp];
            dequantise_row(t, &b, 0, inp, &mut whole);
            for (from, to) in [(0, 32), (32, 64), (224, 288), (480, 512), (5, 300)] {
                let mut part = vec![0.0; to - from];
                dequantise_row(t, &b, from, to, &mut part);
                let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                assert_eq!(
                    bits(&part),
                    bits(&whole[from..to]),
                    "{} {from}..{to}",
                    t.name()
                );
            }
        }
    }

    /// candle's own dequantisation (candle-core 0.11.1 `QTensor::dequantize`) against these
    /// functions, which follow the gguf package's numpy code: they agree bit for bit on every
    /// type here (a second, independent implementation of the same block formats; the
    /// reference values themselves are checked in tests/gguf_reference.rs). A bf16 NaN is the
    /// one exception: numpy shifts the bits (payload kept, as here), candle's conversion may
    /// change the payload; a NaN weight is refused at load anyway.
    #[test]
    fn candle_dequantises_to_the_same_values() {
        for t in ALL {
            let dt = match t {
                GgmlType::F32 => GgmlDType::F32,
                GgmlType::F16 => GgmlDType::F16,
                GgmlType::Bf16 => GgmlDType::BF16,
                GgmlType::Q4_0 => GgmlDType::Q4_0,
                GgmlType::Q4_1 => GgmlDType::Q4_1,
                GgmlType::Q5_0 => GgmlDType::Q5_0,
                GgmlType::Q5_1 => GgmlDType::Q5_1,
                GgmlType::Q8_0 => GgmlDType::Q8_0,
                GgmlType::Q2K => GgmlDType::Q2K,
                GgmlType::Q3K => GgmlDType::Q3K,
                GgmlType::Q4K => GgmlDType::Q4K,
                GgmlType::Q5K => GgmlDType::Q5K,
                GgmlType::Q6K => GgmlDType::Q6K,
            };
            let (rows, inp) = (3, 512);
            let b = blocks(t, rows, inp, 11);
            let q = candle_core::quantized::ggml_file::qtensor_from_ggml(
                dt,
                &b,
                vec![rows, inp],
                &Device::Cpu,
            )
            .unwrap();
            let theirs: Vec<f32> = q
                .dequantize(&Device::Cpu)
                .unwrap()
                .flatten_all()
                .unwrap()
                .to_vec1()
                .unwrap();
            let mut ours = vec![0.0; rows * inp];
            for r in 0..rows {
                let rb = t.row_bytes(inp);
                dequantise_row(t, &b[r * rb..(r + 1) * rb], 0, inp, &mut ours[r * inp..]);
            }
            let differ = ours
                .iter()
                .zip(&theirs)
                .filter(|(a, b)| a.to_bits() != b.to_bits() && !(a.is_nan() && b.is_nan()))
                .count();
            assert_eq!(
                differ,
                0,
                "{}: {differ} values differ from candle",
                t.name()
            );
        }
    }

    /// The product over stored blocks is bit for bit the f32 product over the dequantised
    /// matrix: one row (pieces), four rows, many rows (whole panels through gemm), a partial
    /// last panel, and parts of different types stacked.
    #[test]
    fn block_products_equal_the_f32_product_of_the_dequantised_matrix() {
        for (n, inp, types) in [
            (1, 256, vec![(GgmlType::Q4K, 40), (GgmlType::Q6K, 30)]),
            (4, 512, vec![(GgmlType::Q8_0, 70)]),
            (
                9,
                256,
                vec![
                    (GgmlType::Q4_0, 64),
                    (GgmlType::Q5_1, 3),
                    (GgmlType::F16, 64),
                ],
            ),
            (
                1,
                256,
                vec![(GgmlType::Q2K, 5), (GgmlType::Q3K, 5), (GgmlType::Q5K, 5)],
            ),
        ] {
            let mut m = GgmlMatrix::new(inp);
            let mut dense = Vec::new();
            for (i, &(t, rows)) in types.iter().enumerate() {
                let b = blocks(t, rows, inp, 100 + i as u64);
                let rb = t.row_bytes(inp);
                for r in 0..rows {
                    let mut v = vec![0.0; inp];
                    dequantise_row(t, &b[r * rb..(r + 1) * rb], 0, inp, &mut v);
                    dense.extend(v);
                }
                m.push(t, rows, b);
            }
            let out = m.out;
            assert_panels_equal_dense(&m, &dense, n, inp, out);
        }
    }

    #[test]
    fn unsupported_types_are_named() {
        assert_eq!(GgmlType::from_id(12), Ok(GgmlType::Q4K));
        assert_eq!(GgmlType::from_id(23).unwrap_err(), "iq4_xs (type id 23)");
        assert_eq!(GgmlType::from_id(99).unwrap_err(), "unknown type id 99");
    }
}
