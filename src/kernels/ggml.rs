//! GGUF's block formats (ggml tensor types), dequantised exactly as the reference does, and a
//! matrix of such rows read by the products of `dense` through its [`Panels`] seam.
//!
//! The reference is transformers loading a GGUF file: it dequantises every tensor to f32 with
//! the `gguf` package's numpy code (gguf 0.19, `gguf/quants.py`, each type's
//! `dequantize_blocks`). Each function below follows that code operation for operation: the
//! f16 scales widened to f32 (exact), then the same products and sums in the same order, each
//! rounded to f32 on its own (numpy rounds every array operation; Rust never contracts `a * b +
//! c` into a fused multiply-add), so the values are bit for bit those the reference computes
//! on. A matrix keeps the stored codes and scales: a product dequantises the 64 rows of one
//! panel, a piece of [`PIECE_ROWS`] inputs at a time, into a buffer that stays in the
//! first-level cache, so batch-1 decoding reads the file's bits per weight, not 32 (batch 1
//! itself goes through `ggml_dot`, which computes the same values into registers). Panels of
//! q8_0, q4_0, q4_1, q5_0, q5_1, q2_k, q3_k, q4_k, q5_k or q6_k rows are regrouped at load (the
//! codes of a piece side by side, input by input; see [`Panel`]) so that a piece dequantises
//! with vector instructions, the same operations per value as [`dequantise_block`] (a multiply
//! whose product is exact and the add after it may run as one fused multiply-add, which rounds
//! the same once: [`exact_mul_add`]); panels of f16, bf16, f32 or of several types dequantise
//! value by value from the stored rows. Tests: every regrouped piece equals the
//! value-by-value path bit for bit, including extreme scales; tests/gguf_reference.rs checks
//! the values and greedy tokens against transformers and the gguf package.
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

#[cfg(target_arch = "x86_64")]
use super::dense::panel_many_spans_avx512;
use super::dense::{with_panel_buffer, Panels, PANEL, PIECE_ROWS, SPAN_ROWS};
#[cfg(target_arch = "x86_64")]
use super::simd::features;
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

/// The first block of a row (index into its blocks) holding a value that is NaN or ±Inf once
/// dequantised, found from the blocks' f16 scales and mins alone, without dequantising.
///
/// Exact for every type: each value is a product of the block's f16 scale (d, and for the
/// "_1" and k-quant types also its min, dmin) with small integers (codes up to 31, 6-bit or
/// 8-bit sub-block scales), and a min added or subtracted, as [`dequantise_block`] computes
/// it in f32. With finite scales every such value is finite (at most 65,504 · 63 · 63, far
/// below f32's range); with a scale NaN or ±Inf, every value of the block is NaN or ±Inf
/// (Inf · 0 is NaN, and adding a finite or non-finite term keeps it so). So the first
/// non-finite value of the row is the first value of that block. f32, f16 and bf16 rows are
/// blocks of one value, tested by their exponent bits.
pub fn first_non_finite_block(t: GgmlType, row: &[u8]) -> Option<usize> {
    // An IEEE binary16 is NaN or ±Inf when its five exponent bits are all set.
    let bad = |blk: &[u8], at: usize| u16::from_le_bytes([blk[at], blk[at + 1]]) & 0x7C00 == 0x7C00;
    row.chunks_exact(t.block().1).position(|blk| match t {
        GgmlType::F32 => {
            u32::from_le_bytes([blk[0], blk[1], blk[2], blk[3]]) & 0x7F80_0000 == 0x7F80_0000
        }
        GgmlType::Bf16 => u16::from_le_bytes([blk[0], blk[1]]) & 0x7F80 == 0x7F80,
        GgmlType::F16 | GgmlType::Q4_0 | GgmlType::Q5_0 | GgmlType::Q8_0 => bad(blk, 0),
        GgmlType::Q4_1 | GgmlType::Q5_1 | GgmlType::Q4K | GgmlType::Q5K => {
            bad(blk, 0) || bad(blk, 2)
        }
        GgmlType::Q2K => bad(blk, 80) || bad(blk, 82),
        GgmlType::Q3K => bad(blk, 108),
        GgmlType::Q6K => bad(blk, 208),
    })
}

/// One output row as the file stores it: its type and bytes.
type Row = (GgmlType, Vec<u8>);

/// The 64 output rows of one panel, held as the products read them.
///
/// A panel whose rows are all of one type among q8_0, q4_0, q4_1, q5_0, q5_1, q2_k, q3_k, q4_k,
/// q5_k and q6_k is regrouped at load so that a piece of the panel (32 inputs: one block, or one
/// k-quant sub-block or two, of each row) lies in one place, its codes ordered input by input
/// with the 64 rows side by side: dequantising it is then the same few operations on every
/// lane, which the compiler turns into vector code. The values are unchanged (the same codes,
/// the same f16 scales and 4-bit, 6-bit or 8-bit scales, the same operations per value as
/// [`dequantise_block`]),
/// and so are the bytes per weight, give or take the q3_k/q4_k/q5_k sub-block scales (a byte
/// each instead of 6 bits: 4.625 bits per weight instead of 4.5 for q4_k, 3.5625 instead of
/// 3.4375 for q3_k). Other panels (f16, bf16, f32 rows, or rows of several types) keep their
/// rows as stored and dequantise them value by value.
///
/// The codes are packed so that one input's codes of the 64 rows take whole bytes or words:
/// 4-bit codes as 32 bytes (row i in the low nibble and row 32 + i in the high nibble of byte
/// i), a fifth bit (and q3_k's high-mask bit) as one u64 (bit r for row r), q6_k's top two bits
/// as four u32 (row 16j + i at bits 2i..2i + 2 of word j), q2_k's and q3_k's 2-bit codes as 16
/// bytes (row 16j + i at bits 2j..2j + 2 of byte i).
pub(super) enum Panel {
    /// All rows q8_0. `d`: [group][64] the f16 scale of each row's block of group g (inputs
    /// 32g..32g + 32); `q`: [group][k][64] the codes.
    Q8 { d: Vec<f16>, q: Vec<i8> },
    /// All rows q4_k (`five` empty) or q5_k. `dm`: [super-block][2][64] each row's f16 d, then
    /// dmin; `sm`: [group][2][64] each row's 6-bit scale, then min, of group g's sub-block; `q`:
    /// [group][k][32] the low four bits of the codes; `five`: [group][k] their fifth bits.
    Q4K {
        dm: Vec<f16>,
        sm: Vec<u8>,
        q: Vec<u8>,
        five: Vec<u64>,
    },
    /// All rows q4_0 (`min` false) or q4_1 (`min` true), or with `five` q5_0 or q5_1.
    /// `dm`: [group][64] each row's f16 d, then with `min` [group][64] its f16 m (as
    /// [group][2][64]); `q`: [group][k][32] the low four bits of the codes as in `Q4K`; `five`:
    /// [group][k] their fifth bits (empty for q4_0 and q4_1).
    Q4 {
        dm: Vec<f16>,
        q: Vec<u8>,
        min: bool,
        five: Vec<u64>,
    },
    /// All rows q6_k. `d`: [super-block][64] each row's f16 d; `sc`: [group][2][64] each row's
    /// 8-bit scales of the group's inputs 0..16 and 16..32; `q`: [group][k][32] the low four
    /// bits of the codes as in `Q4K`; `hi`: [group][k][4] their top two bits.
    Q6K {
        d: Vec<f16>,
        sc: Vec<i8>,
        q: Vec<u8>,
        hi: Vec<u32>,
    },
    /// All rows q2_k. `dm`: [super-block][2][64] each row's f16 d, then dmin; `sc`: [group][2][64]
    /// each row's scale byte (scale in the low nibble, min in the high one, as stored) of the
    /// group's inputs 0..16 and 16..32; `q`: [group][k][16] the 2-bit codes (see
    /// [`codes2`]).
    Q2K {
        dm: Vec<f16>,
        sc: Vec<u8>,
        q: Vec<u8>,
    },
    /// All rows q3_k. `d`: [super-block][64] each row's f16 d; `sc`: [group][2][64] each row's
    /// 6-bit scale less 32 (−32..31) of the group's inputs 0..16 and 16..32; `q`: [group][k][16]
    /// the low two bits of the codes as in `Q2K`; `hbit`: [group][k] their high-mask bits.
    Q3K {
        d: Vec<f16>,
        sc: Vec<i8>,
        q: Vec<u8>,
        hbit: Vec<u64>,
    },
    /// Rows as stored (several types, the types without a regrouped form).
    Rows(Vec<Row>),
}

/// Inputs per group of a regrouped panel: one q8_0/q4_0/q4_1/q5_0/q5_1 block, one k-quant
/// sub-block of 32 (two q2_k, q3_k or q6_k sub-blocks of 16), one piece.
pub(super) const GROUP: usize = 32;

/// The 4-bit and 5-bit block types with one f16 scale (and an f16 min) per 32 values:
/// (type, min, fifth bit, byte of the nibbles, byte of the fifth bits).
const SMALL_BLOCKS: [(GgmlType, bool, bool, usize, usize); 4] = [
    (GgmlType::Q4_0, false, false, 2, 0),
    (GgmlType::Q4_1, true, false, 4, 0),
    (GgmlType::Q5_0, false, true, 6, 2),
    (GgmlType::Q5_1, true, true, 8, 4),
];

impl Panel {
    /// The panel of 64 rows, regrouped when they are all of one type that has a regrouped form.
    fn new(rows: Vec<Row>, inp: usize) -> Panel {
        debug_assert_eq!(rows.len(), PANEL);
        let groups = inp / GROUP;
        let all = |t| rows.iter().all(|r| r.0 == t);
        // Sets row l's 4-bit code c of input k (of all groups) in a [k][32] nibble array.
        let put_nibble = |q: &mut [u8], k: usize, l: usize, c: u8| {
            q[k * 32 + l % 32] |= (c & 0x0F) << (4 * (l / 32));
        };
        // Sets row l's 2-bit code c of input k (of all groups) in a [k][16] array (see
        // [`codes2`]).
        let put_pair = |q: &mut [u8], k: usize, l: usize, c: u8| {
            q[k * 16 + l % 16] |= (c & 0x03) << (2 * (l / 16));
        };
        if all(GgmlType::Q8_0) {
            let mut d = vec![f16::ZERO; groups * PANEL];
            let mut q = vec![0i8; groups * GROUP * PANEL];
            for (l, (_, b)) in rows.iter().enumerate() {
                for (g, blk) in b.chunks_exact(34).enumerate() {
                    d[g * PANEL + l] = f16::from_bits(u16::from_le_bytes([blk[0], blk[1]]));
                    for k in 0..GROUP {
                        q[(g * GROUP + k) * PANEL + l] = blk[2 + k] as i8;
                    }
                }
            }
            return Panel::Q8 { d, q };
        }
        for (t, size) in [(GgmlType::Q4K, 144), (GgmlType::Q5K, 176)] {
            if !all(t) {
                continue;
            }
            let five_bits = t == GgmlType::Q5K;
            let nibbles = if five_bits { 48 } else { 16 };
            let supers = inp / QK_K;
            let mut dm = vec![f16::ZERO; supers * 2 * PANEL];
            let mut sm = vec![0u8; groups * 2 * PANEL];
            let mut q = vec![0u8; groups * GROUP * PANEL / 2];
            let mut five = vec![0u64; if five_bits { groups * GROUP } else { 0 }];
            for (l, (_, b)) in rows.iter().enumerate() {
                for (s, blk) in b.chunks_exact(size).enumerate() {
                    dm[2 * s * PANEL + l] = f16::from_bits(u16::from_le_bytes([blk[0], blk[1]]));
                    dm[(2 * s + 1) * PANEL + l] =
                        f16::from_bits(u16::from_le_bytes([blk[2], blk[3]]));
                    for j in 0..8 {
                        let g = s * 8 + j;
                        let (sc, m) = scale_min_k4(&blk[4..16], j);
                        sm[2 * g * PANEL + l] = sc;
                        sm[(2 * g + 1) * PANEL + l] = m;
                        for k in 0..GROUP {
                            let c = blk[nibbles + (j / 2) * 32 + k] >> (4 * (j % 2));
                            put_nibble(&mut q, g * GROUP + k, l, c);
                            if five_bits {
                                let h = (blk[16 + k] >> j) & 1;
                                five[g * GROUP + k] |= (h as u64) << l;
                            }
                        }
                    }
                }
            }
            return Panel::Q4K { dm, sm, q, five };
        }
        for (t, min, five_bits, at, high_at) in SMALL_BLOCKS {
            if !all(t) {
                continue;
            }
            let (size, per) = (t.block().1, 1 + min as usize);
            let mut dm = vec![f16::ZERO; groups * per * PANEL];
            let mut q = vec![0u8; groups * GROUP * PANEL / 2];
            let mut five = vec![0u64; if five_bits { groups * GROUP } else { 0 }];
            for (l, (_, b)) in rows.iter().enumerate() {
                for (g, blk) in b.chunks_exact(size).enumerate() {
                    for h in 0..per {
                        dm[(per * g + h) * PANEL + l] =
                            f16::from_bits(u16::from_le_bytes([blk[2 * h], blk[2 * h + 1]]));
                    }
                    let qh = if five_bits {
                        u32::from_le_bytes([
                            blk[high_at],
                            blk[high_at + 1],
                            blk[high_at + 2],
                            blk[high_at + 3],
                        ])
                    } else {
                        0
                    };
                    for k in 0..GROUP {
                        let c = blk[at + k % 16] >> (4 * (k / 16));
                        put_nibble(&mut q, g * GROUP + k, l, c);
                        if five_bits {
                            five[g * GROUP + k] |= (((qh >> k) & 1) as u64) << l;
                        }
                    }
                }
            }
            return Panel::Q4 { dm, q, min, five };
        }
        if all(GgmlType::Q6K) {
            let supers = inp / QK_K;
            let mut d = vec![f16::ZERO; supers * PANEL];
            let mut sc = vec![0i8; groups * 2 * PANEL];
            let mut q = vec![0u8; groups * GROUP * PANEL / 2];
            let mut hi = vec![0u32; groups * GROUP * 4];
            for (l, (_, b)) in rows.iter().enumerate() {
                for (s, blk) in b.chunks_exact(210).enumerate() {
                    let (ql, qh, scales) = (&blk[0..128], &blk[128..192], &blk[192..208]);
                    d[s * PANEL + l] = f16::from_bits(u16::from_le_bytes([blk[208], blk[209]]));
                    for (h, &v) in scales.iter().enumerate() {
                        // Sub-block h of 16 values: group s·8 + h/2, its half h % 2.
                        sc[(2 * (s * 8 + h / 2) + h % 2) * PANEL + l] = v as i8;
                    }
                    for i in 0..QK_K {
                        // The indices of `dequantise_block`'s q6_k arm.
                        let (h, r) = (i / 128, i % 128);
                        let lo = ql[h * 64 + r % 64] >> (4 * (r / 64));
                        let top = (qh[h * 32 + r % 32] >> (2 * (r / 32))) & 0x03;
                        let k = s * QK_K + i;
                        put_nibble(&mut q, k, l, lo);
                        hi[k * 4 + l / 16] |= (top as u32) << (2 * (l % 16));
                    }
                }
            }
            return Panel::Q6K { d, sc, q, hi };
        }
        let half =
            |blk: &[u8], at: usize| f16::from_bits(u16::from_le_bytes([blk[at], blk[at + 1]]));
        if all(GgmlType::Q2K) {
            let supers = inp / QK_K;
            let mut dm = vec![f16::ZERO; supers * 2 * PANEL];
            let mut sc = vec![0u8; groups * 2 * PANEL];
            let mut q = vec![0u8; groups * GROUP * PANEL / 4];
            for (l, (_, b)) in rows.iter().enumerate() {
                for (s, blk) in b.chunks_exact(84).enumerate() {
                    let (scales, qs) = (&blk[0..16], &blk[16..80]);
                    dm[2 * s * PANEL + l] = half(blk, 80);
                    dm[(2 * s + 1) * PANEL + l] = half(blk, 82);
                    for (h, &v) in scales.iter().enumerate() {
                        // Sub-block h of 16 values: group s·8 + h/2, its half h % 2.
                        sc[(2 * (s * 8 + h / 2) + h % 2) * PANEL + l] = v;
                    }
                    for i in 0..QK_K {
                        // The indices of `dequantise_block`'s q2_k arm.
                        let (h, sh, k) = (i / 128, (i % 128) / 32, i % 32);
                        put_pair(&mut q, s * QK_K + i, l, qs[h * 32 + k] >> (2 * sh));
                    }
                }
            }
            return Panel::Q2K { dm, sc, q };
        }
        if all(GgmlType::Q3K) {
            let supers = inp / QK_K;
            let mut d = vec![f16::ZERO; supers * PANEL];
            let mut sc = vec![0i8; groups * 2 * PANEL];
            let mut q = vec![0u8; groups * GROUP * PANEL / 4];
            let mut hbit = vec![0u64; groups * GROUP];
            for (l, (_, b)) in rows.iter().enumerate() {
                for (s, blk) in b.chunks_exact(110).enumerate() {
                    let (hmask, qs, scales) = (&blk[0..32], &blk[32..96], &blk[96..108]);
                    d[s * PANEL + l] = half(blk, 108);
                    for h in 0..16 {
                        // The 6-bit scale of sub-block h as `dequantise_block`'s q3_k arm
                        // assembles it, less 32 (an integer step there too).
                        let low = (scales[h % 8] >> (4 * (h / 8))) & 0x0F;
                        let high = (scales[8 + h % 4] >> (2 * (h / 4))) & 0x03;
                        sc[(2 * (s * 8 + h / 2) + h % 2) * PANEL + l] =
                            (low | (high << 4)) as i8 - 32;
                    }
                    for i in 0..QK_K {
                        let (h, sh, k) = (i / 128, (i % 128) / 32, i % 32);
                        put_pair(&mut q, s * QK_K + i, l, qs[h * 32 + k] >> (2 * sh));
                        let bit = (hmask[k] >> (i / 32)) & 1;
                        hbit[s * QK_K + i] |= (bit as u64) << l;
                    }
                }
            }
            return Panel::Q3K { d, sc, q, hbit };
        }
        Panel::Rows(rows)
    }

    /// Asks the CPU to bring the stored bytes of group `g` (inputs 32g..32g + 32) towards the
    /// first-level cache, so they are on their way while the product works on earlier groups:
    /// one thread's reads of memory then overlap its arithmetic. A hint only (nothing is read
    /// or written; a group past the end is skipped).
    #[inline(always)]
    pub(super) fn prefetch_group(&self, g: usize) {
        #[inline(always)]
        fn lines<T>(v: &[T], at: usize, len: usize) {
            let Some(part) = v.get(at..(at + len).min(v.len())) else {
                return;
            };
            let bytes = std::mem::size_of_val(part);
            let base = part.as_ptr() as *const i8;
            for off in (0..bytes).step_by(64) {
                // SAFETY: `base + off` lies inside `part`; a prefetch reads nothing anyway.
                #[cfg(target_arch = "x86_64")]
                unsafe {
                    use std::arch::x86_64::{_mm_prefetch, _MM_HINT_T0};
                    _mm_prefetch::<_MM_HINT_T0>(base.add(off));
                }
                #[cfg(not(target_arch = "x86_64"))]
                let _ = base.wrapping_add(off);
            }
        }
        let s = g * GROUP / QK_K;
        match self {
            Panel::Q8 { d, q } => {
                lines(d, g * PANEL, PANEL);
                lines(q, g * GROUP * PANEL, GROUP * PANEL);
            }
            Panel::Q4K { dm, sm, q, five } => {
                lines(dm, 2 * s * PANEL, 2 * PANEL);
                lines(sm, 2 * g * PANEL, 2 * PANEL);
                lines(q, g * GROUP * 32, GROUP * 32);
                lines(five, g * GROUP, GROUP);
            }
            Panel::Q4 { dm, q, min, five } => {
                let per = 1 + *min as usize;
                lines(dm, per * g * PANEL, per * PANEL);
                lines(q, g * GROUP * 32, GROUP * 32);
                lines(five, g * GROUP, GROUP);
            }
            Panel::Q6K { d, sc, q, hi } => {
                lines(d, s * PANEL, PANEL);
                lines(sc, 2 * g * PANEL, 2 * PANEL);
                lines(q, g * GROUP * 32, GROUP * 32);
                lines(hi, g * GROUP * 4, GROUP * 4);
            }
            Panel::Q2K { dm, sc, q } => {
                lines(dm, 2 * s * PANEL, 2 * PANEL);
                lines(sc, 2 * g * PANEL, 2 * PANEL);
                lines(q, g * GROUP * 16, GROUP * 16);
            }
            Panel::Q3K { d, sc, q, hbit } => {
                lines(d, s * PANEL, PANEL);
                lines(sc, 2 * g * PANEL, 2 * PANEL);
                lines(q, g * GROUP * 16, GROUP * 16);
                lines(hbit, g * GROUP, GROUP);
            }
            Panel::Rows(_) => {}
        }
    }

    /// The bytes of the panel's codes and scales.
    pub(super) fn bytes(&self) -> usize {
        match self {
            Panel::Q8 { d, q } => 2 * d.len() + q.len(),
            Panel::Q4K { dm, sm, q, five } => 2 * dm.len() + sm.len() + q.len() + 8 * five.len(),
            Panel::Q4 { dm, q, five, .. } => 2 * dm.len() + q.len() + 8 * five.len(),
            Panel::Q6K { d, sc, q, hi } => 2 * d.len() + sc.len() + q.len() + 4 * hi.len(),
            Panel::Q2K { dm, sc, q } => 2 * dm.len() + sc.len() + q.len(),
            Panel::Q3K { d, sc, q, hbit } => 2 * d.len() + sc.len() + q.len() + 8 * hbit.len(),
            Panel::Rows(rows) => rows.iter().map(|r| r.1.len()).sum(),
        }
    }
}

/// The values of one group (32 inputs) of a regrouped panel, input by input: each type's
/// scales are widened and combined once per group, then [`GroupRows::row`] gives the 64 values
/// of one input, each computed with the operations [`dequantise_block`] applies to it.
pub(super) trait GroupRows {
    /// w[l] = the value of row l at input k of the group (k < 32).
    fn row(&self, k: usize, w: &mut [f32; PANEL]);
}

/// What runs over the groups of a regrouped panel ([`Panel::for_groups`]): filling a piece of
/// f32 values, or a product.
pub(super) trait GroupVisitor {
    /// Called for group g with its values.
    fn visit<R: GroupRows>(&mut self, g: usize, rows: &R);
}

/// A q8_0 group: code · d.
struct Q8Rows<'a> {
    d: [f32; PANEL],
    q: &'a [i8],
}

impl GroupRows for Q8Rows<'_> {
    #[inline(always)]
    fn row(&self, k: usize, w: &mut [f32; PANEL]) {
        let codes = &self.q[k * PANEL..(k + 1) * PANEL];
        for l in 0..PANEL {
            w[l] = codes[l] as f32 * self.d[l];
        }
    }
}

/// The 64 codes of one input from its 32 bytes of nibbles and (with `FIVE`) its fifth bits, as
/// u32 lanes: row i's code in lane i.
#[inline(always)]
fn codes5<const FIVE: bool>(nibbles: &[u8], five: u64, out: &mut [u32; PANEL]) {
    let nibbles = &nibbles[..32];
    let (b0, b1) = (five as u32, (five >> 32) as u32);
    let (lo, hi) = out.split_at_mut(32);
    for i in 0..32 {
        lo[i] = (nibbles[i] & 0x0F) as u32;
        hi[i] = (nibbles[i] >> 4) as u32;
        if FIVE {
            lo[i] |= ((b0 >> i) & 1) << 4;
            hi[i] |= ((b1 >> i) & 1) << 4;
        }
    }
}

/// a · b + c with one rounding where `FMA` (the caller is compiled for AVX-512F, which has
/// fused multiply-add), else a · b, rounded, + c, rounded. The two are the same number whenever
/// a · b is exact in f32, which is the only way this is called: the product's rounding is then
/// no rounding at all, and both round the exact a · b + c once. (A d · sc of q4_k/q5_k has at
/// most 11 + 6 significant bits and a code at most 5, so their product has at most 22 of f32's
/// 24; a q2_k d · sc at most 11 + 4 and a code 2, so 17; a q4_1/q5_1 d · code at most 16; the
/// f16 scales, subnormal ones too, times these small integers stay far inside f32's normal
/// range, so no product loses bits at the bottom or overflows. Infinities and NaN scales give
/// the same class of value either way, and a NaN weight is refused at load.)
#[inline(always)]
fn exact_mul_add<const FMA: bool>(a: f32, b: f32, c: f32) -> f32 {
    if FMA {
        a.mul_add(b, c)
    } else {
        a * b + c
    }
}

/// A q4_k group, or with `FIVE` a q5_k group: (d · sc) · code − (dmin · m), the products
/// d · sc and dmin · m computed once per group. `FMA`: see [`exact_mul_add`].
struct Q4KRows<'a, const FIVE: bool, const FMA: bool> {
    dj: [f32; PANEL],
    mj: [f32; PANEL],
    q: &'a [u8],
    five: &'a [u64],
}

impl<const FIVE: bool, const FMA: bool> GroupRows for Q4KRows<'_, FIVE, FMA> {
    #[inline(always)]
    fn row(&self, k: usize, w: &mut [f32; PANEL]) {
        #[cfg(target_arch = "x86_64")]
        if FMA {
            use std::arch::x86_64::*;
            // SAFETY: `FMA` is true only in code compiled for and run on AVX-512F; the loads
            // and stores stay inside the 64 values of `dj`, `mj` and `w`.
            unsafe {
                let mut codes = nibble_codes_avx512(&self.q[k * 32..], code_table_avx512(0.0));
                if FIVE {
                    fifth_bits_avx512(&mut codes, self.five[k]);
                }
                for (v, code) in codes.into_iter().enumerate() {
                    // (d · sc) · code − dmin · m, one rounding (see `exact_mul_add`).
                    let value = _mm512_fmsub_ps(
                        _mm512_loadu_ps(self.dj.as_ptr().add(16 * v)),
                        code,
                        _mm512_loadu_ps(self.mj.as_ptr().add(16 * v)),
                    );
                    _mm512_storeu_ps(w.as_mut_ptr().add(16 * v), value);
                }
            }
            return;
        }
        let mut c = [0u32; PANEL];
        codes5::<FIVE>(
            &self.q[k * 32..],
            if FIVE { self.five[k] } else { 0 },
            &mut c,
        );
        for l in 0..PANEL {
            // (d · sc) · code is exact: one rounding, that of the subtraction.
            w[l] = exact_mul_add::<FMA>(self.dj[l], c[l] as f32, -self.mj[l]);
        }
    }
}

/// The 64 4-bit codes of one input (its 32 bytes of nibbles, see [`Panel`]) as f32 values
/// looked up in `table` (16 values: code c gives table[c]), in four vectors of rows 0..16,
/// 16..32, 32..48 and 48..64. The lookup is a lane permute, which reads only an index's low
/// four bits, so the bytes need no masking (the high nibble is shifted down first): one
/// widening, one shift and two permutes per 32 values, where a mask, a widening and a
/// conversion per 16 were.
///
/// # Safety
/// The CPU has AVX-512F and the caller is compiled for it.
#[cfg(target_arch = "x86_64")]
#[inline(always)]
unsafe fn nibble_codes_avx512(
    nibbles: &[u8],
    table: std::arch::x86_64::__m512,
) -> [std::arch::x86_64::__m512; 4] {
    use std::arch::x86_64::*;
    let nibbles = &nibbles[..32];
    // SAFETY: AVX-512F (this function's promise); the loads stay inside `nibbles`.
    unsafe {
        let b0 = _mm512_cvtepu8_epi32(_mm_loadu_si128(nibbles.as_ptr().cast()));
        let b1 = _mm512_cvtepu8_epi32(_mm_loadu_si128(nibbles.as_ptr().add(16).cast()));
        [
            _mm512_permutexvar_ps(b0, table),
            _mm512_permutexvar_ps(b1, table),
            _mm512_permutexvar_ps(_mm512_srli_epi32::<4>(b0), table),
            _mm512_permutexvar_ps(_mm512_srli_epi32::<4>(b1), table),
        ]
    }
}

/// The table of [`nibble_codes_avx512`] that gives each code less `offset` as an f32.
///
/// # Safety
/// The CPU has AVX-512F and the caller is compiled for it.
#[cfg(target_arch = "x86_64")]
#[inline(always)]
unsafe fn code_table_avx512(offset: f32) -> std::arch::x86_64::__m512 {
    use std::arch::x86_64::*;
    // SAFETY: AVX-512F (this function's promise).
    unsafe {
        _mm512_sub_ps(
            _mm512_setr_ps(
                0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0, 10.0, 11.0, 12.0, 13.0, 14.0,
                15.0,
            ),
            _mm512_set1_ps(offset),
        )
    }
}

/// Adds each row's fifth bit (`five`: bit r for row r) to its code from
/// [`nibble_codes_avx512`]: 16 more in the lanes whose bit is set, one add under a mask of 16
/// bits per vector. Codes and sums are small integers, so the f32 adds are exact.
///
/// # Safety
/// The CPU has AVX-512F and the caller is compiled for it.
#[cfg(target_arch = "x86_64")]
#[inline(always)]
unsafe fn fifth_bits_avx512(codes: &mut [std::arch::x86_64::__m512; 4], five: u64) {
    use std::arch::x86_64::*;
    // SAFETY: AVX-512F (this function's promise).
    unsafe {
        let sixteen = _mm512_set1_ps(16.0);
        for (v, code) in codes.iter_mut().enumerate() {
            *code = _mm512_mask_add_ps(*code, (five >> (16 * v)) as u16, *code, sixteen);
        }
    }
}

/// A q4_0 group, d · (code − 8), or with `MIN` a q4_1 group, d · code + m; with `FIVE` a q5_0
/// group, d · (code − 16), or a q5_1 group, d · code + m. `FMA`: see [`exact_mul_add`].
struct Q4Rows<'a, const MIN: bool, const FIVE: bool, const FMA: bool> {
    d: [f32; PANEL],
    m: [f32; PANEL],
    q: &'a [u8],
    five: &'a [u64],
}

impl<const MIN: bool, const FIVE: bool, const FMA: bool> GroupRows for Q4Rows<'_, MIN, FIVE, FMA> {
    #[inline(always)]
    fn row(&self, k: usize, w: &mut [f32; PANEL]) {
        #[cfg(target_arch = "x86_64")]
        if FMA {
            use std::arch::x86_64::*;
            // SAFETY: `FMA` is true only in code compiled for and run on AVX-512F; the loads
            // and stores stay inside the 64 values of `d`, `m` and `w`.
            unsafe {
                let offset = match (MIN, FIVE) {
                    (true, _) => 0.0,
                    (false, false) => 8.0,
                    (false, true) => 16.0,
                };
                let mut codes = nibble_codes_avx512(&self.q[k * 32..], code_table_avx512(offset));
                if FIVE {
                    fifth_bits_avx512(&mut codes, self.five[k]);
                }
                for (v, code) in codes.into_iter().enumerate() {
                    let d = _mm512_loadu_ps(self.d.as_ptr().add(16 * v));
                    let value = if MIN {
                        // d · code + m, one rounding (see `exact_mul_add`).
                        _mm512_fmadd_ps(d, code, _mm512_loadu_ps(self.m.as_ptr().add(16 * v)))
                    } else {
                        // d · (code − 8), or d · (code − 16) with `FIVE`, the code less its
                        // offset exact in the table.
                        _mm512_mul_ps(d, code)
                    };
                    _mm512_storeu_ps(w.as_mut_ptr().add(16 * v), value);
                }
            }
            return;
        }
        let mut c = [0u32; PANEL];
        codes5::<FIVE>(
            &self.q[k * 32..],
            if FIVE { self.five[k] } else { 0 },
            &mut c,
        );
        let offset = if FIVE { 16 } else { 8 };
        for l in 0..PANEL {
            w[l] = if MIN {
                // d · code is exact: one rounding, that of the addition.
                exact_mul_add::<FMA>(self.d[l], c[l] as f32, self.m[l])
            } else {
                self.d[l] * (c[l] as i32 - offset) as f32
            };
        }
    }
}

/// A q6_k group: (d · sc) · (code − 32), with the scale of inputs 0..16 or 16..32 of the group
/// (d · sc computed once per group). `AVX512`: the caller is compiled for and runs on
/// AVX-512F, and the codes are looked up in lane permutes.
struct Q6KRows<'a, const AVX512: bool> {
    ds: [[f32; PANEL]; 2],
    q: &'a [u8],
    hi: &'a [u32],
}

impl<const AVX512: bool> GroupRows for Q6KRows<'_, AVX512> {
    #[inline(always)]
    fn row(&self, k: usize, w: &mut [f32; PANEL]) {
        #[cfg(target_arch = "x86_64")]
        if AVX512 {
            use std::arch::x86_64::*;
            // SAFETY: `AVX512` is true only in code compiled for and run on AVX-512F; the
            // loads and stores stay inside the 64 values of `ds[k / 16]` and `w`, and the four
            // words of `hi` are indexed within its bounds.
            unsafe {
                // The low four bits less 32, looked up; then the top two bits of row 16j + i,
                // at bits 2i..2i + 2 of word j, shifted down to lane i's low bits and looked up
                // in a table of 16 · (their value), which ignores the bits above the pair.
                let codes = nibble_codes_avx512(&self.q[k * 32..], code_table_avx512(32.0));
                let shifts =
                    _mm512_setr_epi32(0, 2, 4, 6, 8, 10, 12, 14, 16, 18, 20, 22, 24, 26, 28, 30);
                let top = pair_table_avx512(16.0, 0.0);
                let words = &self.hi[k * 4..k * 4 + 4];
                let ds = &self.ds[k / 16];
                for (v, code) in codes.into_iter().enumerate() {
                    let pairs = _mm512_srlv_epi32(_mm512_set1_epi32(words[v] as i32), shifts);
                    // code − 32, exact (small integers).
                    let code = _mm512_add_ps(code, _mm512_permutexvar_ps(pairs, top));
                    let value = _mm512_mul_ps(_mm512_loadu_ps(ds.as_ptr().add(16 * v)), code);
                    _mm512_storeu_ps(w.as_mut_ptr().add(16 * v), value);
                }
            }
            return;
        }
        let mut c = [0u32; PANEL];
        codes5::<false>(&self.q[k * 32..], 0, &mut c);
        let words = &self.hi[k * 4..k * 4 + 4];
        for (j, cj) in c.chunks_exact_mut(16).enumerate() {
            for (i, v) in cj.iter_mut().enumerate() {
                *v |= ((words[j] >> (2 * i)) & 3) << 4;
            }
        }
        let ds = &self.ds[k / 16];
        for l in 0..PANEL {
            w[l] = ds[l] * (c[l] as i32 - 32) as f32;
        }
    }
}

/// The 64 2-bit codes of one input from its 16 bytes, as u32 lanes: row 16j + i's code, at
/// bits 2j..2j + 2 of byte i, in lane 16j + i. With `HIGH` (q3_k), `high` holds the input's
/// high-mask bits (bit r for row r) and lane r gets q3_k's signed code, the 2-bit code ql less
/// 4 where the row's bit is clear (ql − 4·(1 − hbit) of the reference, the same integer), as
/// an i32's bits: ql itself where the bit is set, else ql | !3, which is ql − 4 in two's
/// complement since ql < 4.
#[inline(always)]
fn codes2<const HIGH: bool>(pairs: &[u8], high: u64, out: &mut [u32; PANEL]) {
    let pairs = &pairs[..16];
    for (j, cj) in out.chunks_exact_mut(16).enumerate() {
        for i in 0..16 {
            cj[i] = ((pairs[i] >> (2 * j)) & 0x03) as u32;
        }
    }
    if HIGH {
        // The clear bits, set: with AVX-512 the compiler moves them into a mask register and
        // ORs under it (rather than shifting each bit into place).
        let (n0, n1) = (!high as u32, (!high >> 32) as u32);
        let (lo, hi) = out.split_at_mut(32);
        for i in 0..32 {
            lo[i] |= if n0 & (1 << i) != 0 { !3 } else { 0 };
            hi[i] |= if n1 & (1 << i) != 0 { !3 } else { 0 };
        }
    }
}

/// A table of 16 f32 entries, entry t = (t & 3) · scale − offset, for a lane permute whose
/// indices hold a 2-bit value in their low bits and other bits above it (ignored this way):
/// q2_k's and q3_k's codes, q6_k's top two bits. Small integers, so exact.
///
/// # Safety
/// The CPU has AVX-512F and the caller is compiled for it.
#[cfg(target_arch = "x86_64")]
#[inline(always)]
unsafe fn pair_table_avx512(scale: f32, offset: f32) -> std::arch::x86_64::__m512 {
    use std::arch::x86_64::*;
    // SAFETY: AVX-512F (this function's promise).
    unsafe {
        _mm512_fmsub_ps(
            _mm512_setr_ps(
                0.0, 1.0, 2.0, 3.0, 0.0, 1.0, 2.0, 3.0, 0.0, 1.0, 2.0, 3.0, 0.0, 1.0, 2.0, 3.0,
            ),
            _mm512_set1_ps(scale),
            _mm512_set1_ps(offset),
        )
    }
}

/// The 64 2-bit codes of one input (its 16 bytes, see [`codes2`]) less `offset`, as f32
/// values in four vectors of rows 0..16, 16..32, 32..48 and 48..64: the bytes widened once,
/// shifted down to each row's pair and looked up in [`pair_table_avx512`].
///
/// # Safety
/// The CPU has AVX-512F and the caller is compiled for it.
#[cfg(target_arch = "x86_64")]
#[inline(always)]
unsafe fn pair_codes_avx512(pairs: &[u8], offset: f32) -> [std::arch::x86_64::__m512; 4] {
    use std::arch::x86_64::*;
    let pairs = &pairs[..16];
    // SAFETY: AVX-512F (this function's promise); the load stays inside `pairs`.
    unsafe {
        let b = _mm512_cvtepu8_epi32(_mm_loadu_si128(pairs.as_ptr().cast()));
        let table = pair_table_avx512(1.0, offset);
        [
            _mm512_permutexvar_ps(b, table),
            _mm512_permutexvar_ps(_mm512_srli_epi32::<2>(b), table),
            _mm512_permutexvar_ps(_mm512_srli_epi32::<4>(b), table),
            _mm512_permutexvar_ps(_mm512_srli_epi32::<6>(b), table),
        ]
    }
}

/// A q2_k group: (d · sc) · code − (dmin · m), with the scale and min of inputs 0..16 or
/// 16..32 of the group (the products d · sc and dmin · m computed once per group). `FMA`: see
/// [`exact_mul_add`].
struct Q2KRows<'a, const FMA: bool> {
    dl: [[f32; PANEL]; 2],
    ml: [[f32; PANEL]; 2],
    q: &'a [u8],
}

impl<const FMA: bool> GroupRows for Q2KRows<'_, FMA> {
    #[inline(always)]
    fn row(&self, k: usize, w: &mut [f32; PANEL]) {
        #[cfg(target_arch = "x86_64")]
        if FMA {
            use std::arch::x86_64::*;
            // SAFETY: `FMA` is true only in code compiled for and run on AVX-512F; the loads
            // and stores stay inside the 64 values of `dl[k / 16]`, `ml[k / 16]` and `w`.
            unsafe {
                let codes = pair_codes_avx512(&self.q[k * 16..], 0.0);
                let (dl, ml) = (&self.dl[k / 16], &self.ml[k / 16]);
                for (v, code) in codes.into_iter().enumerate() {
                    // (d · sc) · code − dmin · m, one rounding: the product is exact (see
                    // the portable loop below).
                    let value = _mm512_fmsub_ps(
                        _mm512_loadu_ps(dl.as_ptr().add(16 * v)),
                        code,
                        _mm512_loadu_ps(ml.as_ptr().add(16 * v)),
                    );
                    _mm512_storeu_ps(w.as_mut_ptr().add(16 * v), value);
                }
            }
            return;
        }
        let mut c = [0u32; PANEL];
        codes2::<false>(&self.q[k * 16..], 0, &mut c);
        let (dl, ml) = (&self.dl[k / 16], &self.ml[k / 16]);
        for l in 0..PANEL {
            // (d · sc) · code is exact (d · sc has at most 11 + 4 significant bits, the code
            // at most 2): one rounding, that of the subtraction.
            w[l] = exact_mul_add::<FMA>(dl[l], c[l] as f32, -ml[l]);
        }
    }
}

/// A q3_k group: (d · (sc − 32)) · (ql − 4·(1 − hbit)), the code an integer as in the
/// reference (see [`codes2`]), with the scale of inputs 0..16 or 16..32 of the group
/// (d · (sc − 32) computed once per group). `AVX512`: as in [`Q6KRows`].
struct Q3KRows<'a, const AVX512: bool> {
    dl: [[f32; PANEL]; 2],
    q: &'a [u8],
    hbit: &'a [u64],
}

impl<const AVX512: bool> GroupRows for Q3KRows<'_, AVX512> {
    #[inline(always)]
    fn row(&self, k: usize, w: &mut [f32; PANEL]) {
        #[cfg(target_arch = "x86_64")]
        if AVX512 {
            use std::arch::x86_64::*;
            // SAFETY: `AVX512` is true only in code compiled for and run on AVX-512F; the
            // loads and stores stay inside the 64 values of `dl[k / 16]` and `w`.
            unsafe {
                // ql − 4 looked up, then 4 more where the row's high-mask bit is set: the
                // reference's ql − 4·(1 − hbit), small integers, exact.
                let mut codes = pair_codes_avx512(&self.q[k * 16..], 4.0);
                let (four, hbit) = (_mm512_set1_ps(4.0), self.hbit[k]);
                let dl = &self.dl[k / 16];
                for (v, code) in codes.iter_mut().enumerate() {
                    *code = _mm512_mask_add_ps(*code, (hbit >> (16 * v)) as u16, *code, four);
                    let value = _mm512_mul_ps(_mm512_loadu_ps(dl.as_ptr().add(16 * v)), *code);
                    _mm512_storeu_ps(w.as_mut_ptr().add(16 * v), value);
                }
            }
            return;
        }
        let mut c = [0u32; PANEL];
        codes2::<true>(&self.q[k * 16..], self.hbit[k], &mut c);
        let dl = &self.dl[k / 16];
        for l in 0..PANEL {
            w[l] = dl[l] * (c[l] as i32) as f32;
        }
    }
}

/// 64 f16 values widened to f32 (see [`widen_halves`]).
#[inline(always)]
fn widened<const AVX512: bool>(h: &[f16]) -> [f32; PANEL] {
    let mut f = [0f32; PANEL];
    widen_halves::<AVX512>(h, &mut f);
    f
}

/// The d · sc and dmin · m of each row of q4_k/q5_k group g (`dm`, `sm` as in [`Panel::Q4K`]).
#[inline(always)]
fn k_scales<const AVX512: bool>(dm: &[f16], sm: &[u8], g: usize) -> ([f32; PANEL], [f32; PANEL]) {
    let s = g * GROUP / QK_K;
    let d = widened::<AVX512>(&dm[2 * s * PANEL..]);
    let dmin = widened::<AVX512>(&dm[(2 * s + 1) * PANEL..]);
    // Arrays of 64, not open slices: the loop below then has no bounds to check and is
    // compiled to vector instructions whole.
    let lanes = |at: usize| -> &[u8; PANEL] { sm[at..at + PANEL].try_into().expect("64 lanes") };
    let (sc, m) = (lanes(2 * g * PANEL), lanes((2 * g + 1) * PANEL));
    let (mut dj, mut mj) = ([0f32; PANEL], [0f32; PANEL]);
    for l in 0..PANEL {
        dj[l] = d[l] * sc[l] as f32;
        mj[l] = dmin[l] * m[l] as f32;
    }
    (dj, mj)
}

/// d · sc of each row for inputs 0..16 and 16..32 of group g of a q6_k or q3_k panel (`d`:
/// [super-block][64] each row's f16 d; `sc`: [group][2][64] its signed 8-bit scales).
#[inline(always)]
fn signed_scales<const AVX512: bool>(d: &[f16], sc: &[i8], g: usize) -> [[f32; PANEL]; 2] {
    let df = widened::<AVX512>(&d[g * GROUP / QK_K * PANEL..]);
    let mut ds = [[0f32; PANEL]; 2];
    for (h, dsh) in ds.iter_mut().enumerate() {
        let sch = &sc[(2 * g + h) * PANEL..(2 * g + h + 1) * PANEL];
        for l in 0..PANEL {
            dsh[l] = df[l] * sch[l] as f32;
        }
    }
    ds
}

/// Group g of a q4_0/q4_1/q5_0/q5_1 panel (`dm`, `q`, `five` as in [`Panel::Q4`]).
#[inline(always)]
fn q4_rows<'a, const AVX512: bool, const MIN: bool, const FIVE: bool>(
    dm: &[f16],
    q: &'a [u8],
    five: &'a [u64],
    g: usize,
) -> Q4Rows<'a, MIN, FIVE, AVX512> {
    let per = 1 + MIN as usize;
    Q4Rows {
        d: widened::<AVX512>(&dm[per * g * PANEL..]),
        m: if MIN {
            widened::<AVX512>(&dm[(2 * g + 1) * PANEL..])
        } else {
            [0f32; PANEL]
        },
        q: &q[g * GROUP * 32..(g + 1) * GROUP * 32],
        five: if FIVE {
            &five[g * GROUP..(g + 1) * GROUP]
        } else {
            &[]
        },
    }
}

impl Panel {
    /// Runs `v` over groups g0..g1 of this regrouped panel, in order; `AVX512` says the caller is
    /// compiled for (and runs on) AVX-512F, whose conversion instruction then widens the f16
    /// scales. The type is matched once, outside the loop over groups.
    #[inline(always)]
    pub(super) fn for_groups<const AVX512: bool, V: GroupVisitor>(
        &self,
        g0: usize,
        g1: usize,
        v: &mut V,
    ) {
        // Helpers are functions, not closures: a closure is compiled without the caller's
        // AVX-512 and would call the conversion intrinsic out of line.
        match self {
            Panel::Q8 { d, q } => {
                for g in g0..g1 {
                    let rows = Q8Rows {
                        d: widened::<AVX512>(&d[g * PANEL..]),
                        q: &q[g * GROUP * PANEL..(g + 1) * GROUP * PANEL],
                    };
                    v.visit(g, &rows);
                }
            }
            Panel::Q4K { dm, sm, q, five } => {
                if five.is_empty() {
                    for g in g0..g1 {
                        let (dj, mj) = k_scales::<AVX512>(dm, sm, g);
                        let q = &q[g * GROUP * 32..(g + 1) * GROUP * 32];
                        v.visit(
                            g,
                            &Q4KRows::<false, AVX512> {
                                dj,
                                mj,
                                q,
                                five: &[],
                            },
                        );
                    }
                } else {
                    for g in g0..g1 {
                        let (dj, mj) = k_scales::<AVX512>(dm, sm, g);
                        let q = &q[g * GROUP * 32..(g + 1) * GROUP * 32];
                        let five = &five[g * GROUP..(g + 1) * GROUP];
                        v.visit(g, &Q4KRows::<true, AVX512> { dj, mj, q, five });
                    }
                }
            }
            Panel::Q4 { dm, q, min, five } => match (*min, five.is_empty()) {
                (false, true) => {
                    for g in g0..g1 {
                        v.visit(g, &q4_rows::<AVX512, false, false>(dm, q, five, g));
                    }
                }
                (true, true) => {
                    for g in g0..g1 {
                        v.visit(g, &q4_rows::<AVX512, true, false>(dm, q, five, g));
                    }
                }
                (false, false) => {
                    for g in g0..g1 {
                        v.visit(g, &q4_rows::<AVX512, false, true>(dm, q, five, g));
                    }
                }
                (true, false) => {
                    for g in g0..g1 {
                        v.visit(g, &q4_rows::<AVX512, true, true>(dm, q, five, g));
                    }
                }
            },
            Panel::Q6K { d, sc, q, hi } => {
                for g in g0..g1 {
                    let rows = Q6KRows::<AVX512> {
                        ds: signed_scales::<AVX512>(d, sc, g),
                        q: &q[g * GROUP * 32..(g + 1) * GROUP * 32],
                        hi: &hi[g * GROUP * 4..(g + 1) * GROUP * 4],
                    };
                    v.visit(g, &rows);
                }
            }
            Panel::Q2K { dm, sc, q } => {
                for g in g0..g1 {
                    let s = g * GROUP / QK_K;
                    let d = widened::<AVX512>(&dm[2 * s * PANEL..]);
                    let dmin = widened::<AVX512>(&dm[(2 * s + 1) * PANEL..]);
                    let (mut dl, mut ml) = ([[0f32; PANEL]; 2], [[0f32; PANEL]; 2]);
                    for h in 0..2 {
                        let sch = &sc[(2 * g + h) * PANEL..(2 * g + h + 1) * PANEL];
                        for l in 0..PANEL {
                            dl[h][l] = d[l] * (sch[l] & 0x0F) as f32;
                            ml[h][l] = dmin[l] * (sch[l] >> 4) as f32;
                        }
                    }
                    let q = &q[g * GROUP * 16..(g + 1) * GROUP * 16];
                    v.visit(g, &Q2KRows::<AVX512> { dl, ml, q });
                }
            }
            Panel::Q3K { d, sc, q, hbit } => {
                for g in g0..g1 {
                    let rows = Q3KRows::<AVX512> {
                        dl: signed_scales::<AVX512>(d, sc, g),
                        q: &q[g * GROUP * 16..(g + 1) * GROUP * 16],
                        hbit: &hbit[g * GROUP..(g + 1) * GROUP],
                    };
                    v.visit(g, &rows);
                }
            }
            Panel::Rows(_) => unreachable!("stored rows are read value by value"),
        }
    }
}

/// 64 f16 values to f32, exact: AVX-512's `vcvtph2ps` when `AVX512` (the caller runs on
/// AVX-512F), the `half` crate's conversion otherwise.
#[inline(always)]
fn widen_halves<const AVX512: bool>(src: &[f16], dst: &mut [f32; PANEL]) {
    let src = &src[..PANEL];
    #[cfg(target_arch = "x86_64")]
    if AVX512 {
        use std::arch::x86_64::{__m256i, _mm256_loadu_si256, _mm512_cvtph_ps, _mm512_storeu_ps};
        for v in 0..PANEL / 16 {
            // SAFETY: `AVX512` is true only in code compiled for and run on AVX-512F; the
            // loads and stores stay inside `src` (64 f16) and `dst` (64 f32).
            unsafe {
                let h = _mm256_loadu_si256(src.as_ptr().add(16 * v) as *const __m256i);
                _mm512_storeu_ps(dst.as_mut_ptr().add(16 * v), _mm512_cvtph_ps(h));
            }
        }
        return;
    }
    use half::slice::HalfFloatSliceExt;
    src.convert_to_f32_slice(dst);
}

/// A linear layer's [out, inp] matrix read from GGUF blocks: its panels of 64 output rows (see
/// [`Panel`]), possibly several tensors of different types stacked (q | k | v of a q4_k_m
/// export mixes q4_k and q6_k), and the rows of a last, partial panel as stored.
pub struct GgmlMatrix {
    pub out: usize,
    pub inp: usize,
    pub(super) panels: Vec<Panel>,
    pub(super) tail: Vec<Row>,
}

impl GgmlMatrix {
    /// An empty matrix of `inp` inputs; rows are appended with [`GgmlMatrix::push`].
    pub fn new(inp: usize) -> GgmlMatrix {
        GgmlMatrix {
            out: 0,
            inp,
            panels: Vec::new(),
            tail: Vec::new(),
        }
    }

    /// Appends `rows` rows of type `t` (`bytes` is rows × `t.row_bytes(inp)`, row-major as the
    /// file stores it). `inp` must be a multiple of the type's block size.
    pub fn push(&mut self, t: GgmlType, rows: usize, bytes: Vec<u8>) {
        let row_bytes = t.row_bytes(self.inp);
        assert!(self.inp.is_multiple_of(t.block().0) && bytes.len() == rows * row_bytes);
        self.out += rows;
        let mut split = bytes.chunks_exact(row_bytes.max(1)).take(rows);
        // Rows first fill the panel begun by an earlier part...
        if !self.tail.is_empty() {
            for r in split.by_ref().take(PANEL - self.tail.len()) {
                self.tail.push((t, r.to_vec()));
            }
            if self.tail.len() == PANEL {
                let rows = std::mem::take(&mut self.tail);
                self.panels.push(Panel::new(rows, self.inp));
            }
        }
        // ...then whole panels are regrouped in parallel (a large part of a model's load
        // time), in order; the rows left over begin the next panel.
        use rayon::prelude::*;
        let rest: Vec<&[u8]> = split.collect();
        let whole = rest.len() / PANEL * PANEL;
        let inp = self.inp;
        let panels: Vec<Panel> = rest[..whole]
            .par_chunks(PANEL)
            .map(|chunk| Panel::new(chunk.iter().map(|r| (t, r.to_vec())).collect(), inp))
            .collect();
        self.panels.extend(panels);
        self.tail
            .extend(rest[whole..].iter().map(|r| (t, r.to_vec())));
    }

    /// Bytes held.
    pub fn bytes(&self) -> usize {
        let tail: usize = self.tail.iter().map(|r| r.1.len()).sum();
        self.panels.iter().map(Panel::bytes).sum::<usize>() + tail
    }

    /// Rows k0..k1 of panel p as f32 into `dst` ([k1 - k0, 64]); columns past `out` are zero.
    /// `tmp` holds the values of one row for rows dequantised value by value.
    #[inline(always)]
    fn dequantise(&self, p: usize, k0: usize, k1: usize, dst: &mut [f32], tmp: &mut Vec<f32>) {
        match self.panels.get(p) {
            Some(Panel::Rows(rows)) => rows_piece(rows, k0, k1, dst, tmp),
            Some(panel) => regrouped_piece(panel, k0, k1, dst),
            None => rows_piece(&self.tail, k0, k1, dst, tmp),
        }
    }
}

/// Rows k0..k1 of a regrouped panel into `dst`, with the loops compiled for AVX-512 when the
/// CPU has it (found at run time; the same operations per value either way).
fn regrouped_piece(panel: &Panel, k0: usize, k1: usize, dst: &mut [f32]) {
    #[cfg(target_arch = "x86_64")]
    if features().avx512f {
        // SAFETY: the CPU has AVX-512F (checked just above).
        unsafe { regrouped_piece_avx512(panel, k0, k1, dst) };
        return;
    }
    regrouped_piece_any::<false>(panel, k0, k1, dst);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn regrouped_piece_avx512(panel: &Panel, k0: usize, k1: usize, dst: &mut [f32]) {
    regrouped_piece_any::<true>(panel, k0, k1, dst);
}

/// The group loops of [`regrouped_piece`]; `AVX512` says the caller is compiled for (and runs
/// on) AVX-512F, whose conversion instruction then widens the f16 scales.
#[inline(always)]
fn regrouped_piece_any<const AVX512: bool>(panel: &Panel, k0: usize, k1: usize, dst: &mut [f32]) {
    /// Writes inputs k0..k1 (of the panel) of each group it visits into `dst`.
    struct Fill<'a> {
        k0: usize,
        k1: usize,
        dst: &'a mut [f32],
    }
    impl GroupVisitor for Fill<'_> {
        #[inline(always)]
        fn visit<R: GroupRows>(&mut self, g: usize, rows: &R) {
            let (a, b) = (self.k0.max(g * GROUP), self.k1.min((g + 1) * GROUP));
            for k in a..b {
                let at = (k - self.k0) * PANEL;
                let w: &mut [f32; PANEL] = (&mut self.dst[at..at + PANEL])
                    .try_into()
                    .expect("a row of 64");
                rows.row(k - g * GROUP, w);
            }
        }
    }
    if k0 >= k1 {
        return;
    }
    let mut fill = Fill { k0, k1, dst };
    panel.for_groups::<AVX512, _>(k0 / GROUP, (k1 - 1) / GROUP + 1, &mut fill);
}

/// Rows k0..k1 of a panel of stored rows (fewer than 64 in the last panel: the other columns
/// zero), value by value through [`dequantise_row`].
fn rows_piece(rows: &[Row], k0: usize, k1: usize, dst: &mut [f32], tmp: &mut Vec<f32>) {
    let width = k1 - k0;
    if tmp.len() < width {
        tmp.resize(width, 0.0);
    }
    for l in 0..PANEL {
        let Some((t, bytes)) = rows.get(l) else {
            for k in 0..width {
                dst[k * PANEL + l] = 0.0;
            }
            continue;
        };
        dequantise_row(*t, bytes, k0, k1, tmp);
        for (k, &v) in tmp[..width].iter().enumerate() {
            dst[k * PANEL + l] = v;
        }
    }
}

/// Pieces ahead of the one being dequantised whose bytes are prefetched (about 4 KB of q8_0
/// codes at distance 2: a few hundred nanoseconds of work, more than a memory access takes).
const AHEAD: usize = 2;

thread_local! {
    /// One row's values of the piece being dequantised value by value.
    static ROW: std::cell::RefCell<Vec<f32>> = const { std::cell::RefCell::new(Vec::new()) };
}

impl Panels for GgmlMatrix {
    #[inline(always)]
    fn piece<'a>(&'a self, p: usize, k0: usize, k1: usize, buf: &'a mut [f32]) -> &'a [f32] {
        let piece = &mut buf[..(k1 - k0) * PANEL];
        match self.panels.get(p) {
            Some(Panel::Rows(_)) | None => {
                ROW.with(|row| self.dequantise(p, k0, k1, piece, &mut row.borrow_mut()))
            }
            Some(panel) => {
                // The group AHEAD pieces on: in this panel, or the start of the next one (the
                // panel a task usually takes next).
                let g = (k0 + AHEAD * PIECE_ROWS) / GROUP;
                if g < self.inp / GROUP {
                    panel.prefetch_group(g);
                } else if let Some(next) = self.panels.get(p + 1) {
                    next.prefetch_group(g - self.inp / GROUP);
                }
                regrouped_piece(panel, k0, k1, piece)
            }
        }
        piece
    }

    fn whole(&self, p: usize, f: &mut dyn FnMut(&[f32])) {
        let mut row = Vec::new();
        with_panel_buffer(self.inp * PANEL, |buf| {
            self.dequantise(p, 0, self.inp, buf, &mut row);
            f(buf);
        });
    }

    /// A regrouped panel's product of a batch (up to [`SPAN_ROWS`] rows) on AVX-512: each span
    /// of the panel is dequantised once into a buffer that stays in the first-level cache while
    /// the rows pass over it, with the bytes of the next span prefetched (the same values as
    /// [`Panels::whole`] gives, so the same sums). Panels of stored rows, and prompt steps of
    /// more rows, keep the whole-panel path, which dequantises the panel once for all rows.
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn many_avx512(
        &self,
        x: &[f32],
        p: usize,
        emit: &mut dyn FnMut(usize, &[f32; PANEL]),
    ) -> bool {
        let panel = match self.panels.get(p) {
            Some(Panel::Rows(_)) | None => return false,
            Some(_) if x.len() > SPAN_ROWS * self.inp => return false,
            Some(panel) => panel,
        };
        let groups = self.inp / GROUP;
        let mut fill = |k0: usize, k1: usize, buf: &mut [f32]| {
            for g in k1 / GROUP..(2 * k1 - k0).div_ceil(GROUP).min(groups) {
                panel.prefetch_group(g);
            }
            regrouped_piece(panel, k0, k1, buf);
        };
        // SAFETY: the CPU has AVX-512F (the caller's promise); `x` holds whole rows (the
        // product's); `fill` writes every value of inputs k0..k1 (`regrouped_piece`).
        unsafe { panel_many_spans_avx512(x, self.inp, emit, &mut fill) };
        true
    }
}

#[cfg(test)]
pub(super) mod tests {
    use super::*;
    use crate::kernels::dense::assert_panels_equal_dense;
    use candle_core::quantized::GgmlDType;
    use candle_core::Device;

    /// The types whose panels are regrouped for the fast path.
    pub(in crate::kernels) const REGROUPED: [GgmlType; 10] = [
        GgmlType::Q8_0,
        GgmlType::Q4_0,
        GgmlType::Q4_1,
        GgmlType::Q5_0,
        GgmlType::Q5_1,
        GgmlType::Q2K,
        GgmlType::Q3K,
        GgmlType::Q4K,
        GgmlType::Q5K,
        GgmlType::Q6K,
    ];

    /// Pushes `rows` rows of blocks `b` of type `t` into `m` and appends their values,
    /// dequantised value by value, to `dense` (row-major).
    pub(in crate::kernels) fn push_keeping_values(
        m: &mut GgmlMatrix,
        t: GgmlType,
        rows: usize,
        b: Vec<u8>,
        dense: &mut Vec<f32>,
    ) {
        let inp = m.inp;
        let rb = t.row_bytes(inp);
        for r in 0..rows {
            let start = dense.len();
            dense.resize(start + inp, 0.0);
            dequantise_row(t, &b[r * rb..(r + 1) * rb], 0, inp, &mut dense[start..]);
        }
        m.push(t, rows, b);
    }

    /// The scale scan finds exactly the first non-finite value that dequantising finds, for
    /// every type: random rows, whose f16 scales are NaN or ±Inf in about one block of 32 by
    /// chance (all five exponent bits set), and rows with a scale forced to NaN, +Inf or -Inf.
    #[test]
    fn scale_scan_finds_the_first_non_finite_value() {
        let inp = 512;
        let mut found = 0;
        for (n, t) in ALL.into_iter().enumerate() {
            let (per, size) = t.block();
            for seed in 0..40u64 {
                let mut s = seed * 7919 + n as u64;
                let mut next = || {
                    s = s
                        .wrapping_mul(6364136223846793005)
                        .wrapping_add(1442695040888963407);
                    (s >> 33) as u8
                };
                let mut row: Vec<u8> = (0..t.row_bytes(inp)).map(|_| next()).collect();
                if seed % 4 == 3 {
                    // One block's scale bytes (where the type keeps its f16 d) set to a
                    // non-finite f16: NaN, +Inf or -Inf.
                    let at = match t {
                        GgmlType::Q2K => 80,
                        GgmlType::Q3K => 108,
                        GgmlType::Q6K => 208,
                        _ => 0,
                    };
                    let blk = (next() as usize) % (t.row_bytes(inp) / size);
                    // NaN, +Inf, -Inf: as f16, and as bf16 (also the high half of an f32).
                    let (half, brain) =
                        [(0x7E00u16, 0x7FC0u16), (0x7C00, 0x7F80), (0xFC00, 0xFF80)]
                            [(seed / 4 % 3) as usize];
                    let (at, v) = match t {
                        GgmlType::F32 => (2, brain),
                        GgmlType::Bf16 => (0, brain),
                        _ => (at, half),
                    };
                    row[blk * size + at..blk * size + at + 2].copy_from_slice(&v.to_le_bytes());
                }
                let mut values = vec![0.0f32; inp];
                dequantise_row(t, &row, 0, inp, &mut values);
                let want = values.iter().position(|v| !v.is_finite());
                let got = first_non_finite_block(t, &row).map(|b| b * per);
                assert_eq!(got, want, "{t:?}, seed {seed}");
                found += want.is_some() as usize;
            }
        }
        // The case is not vacuous: many rows hold non-finite values.
        assert!(found > 100, "{found}");
    }

    /// Deterministic block bytes with every f16 scale finite and small (random bytes elsewhere).
    pub(in crate::kernels) fn blocks(t: GgmlType, rows: usize, inp: usize, seed: u64) -> Vec<u8> {
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
    /// matrix: one row (pieces), four rows, many rows (whole panels), a partial
    /// last panel, and parts of different types stacked.
    #[test]
    fn block_products_equal_the_f32_product_of_the_dequantised_matrix() {
        for (n, inp, types) in [
            (1, 256, vec![(GgmlType::Q4K, 40), (GgmlType::Q6K, 30)]),
            (4, 512, vec![(GgmlType::Q8_0, 70)]),
            (1, 512, vec![(GgmlType::Q8_0, 128), (GgmlType::Q4K, 64)]),
            (2, 256, vec![(GgmlType::Q4K, 130)]),
            (3, 256, vec![(GgmlType::Q4_0, 64), (GgmlType::Q4_1, 70)]),
            (9, 256, vec![(GgmlType::Q4K, 100), (GgmlType::Q8_0, 92)]),
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
            // Regrouped panels of the 5-bit and 6-bit types, a product of one row (pieces) and
            // of nine (whole panels).
            (
                1,
                512,
                vec![
                    (GgmlType::Q6K, 64),
                    (GgmlType::Q5K, 64),
                    (GgmlType::Q5_0, 64),
                    (GgmlType::Q5_1, 70),
                ],
            ),
            (9, 256, vec![(GgmlType::Q6K, 128), (GgmlType::Q5K, 64)]),
            // Regrouped panels of the 2-bit and 3-bit k-quants, likewise.
            (1, 512, vec![(GgmlType::Q2K, 64), (GgmlType::Q3K, 64)]),
            (9, 256, vec![(GgmlType::Q3K, 128), (GgmlType::Q2K, 70)]),
            // Batches read span by span (up to SPAN_ROWS rows in one group; a last span of 32
            // inputs when the inputs are not a multiple of 64) and a prompt step past them
            // (the whole-panel path): the same sums.
            (33, 96, vec![(GgmlType::Q8_0, 70)]),
            (
                SPAN_ROWS,
                160,
                vec![(GgmlType::Q4_1, 64), (GgmlType::Q5_0, 64)],
            ),
            (
                SPAN_ROWS + 1,
                256,
                vec![(GgmlType::Q4K, 64), (GgmlType::Q6K, 64)],
            ),
        ] {
            let mut m = GgmlMatrix::new(inp);
            let mut dense = Vec::new();
            for (i, &(t, rows)) in types.iter().enumerate() {
                push_keeping_values(
                    &mut m,
                    t,
                    rows,
                    blocks(t, rows, inp, 100 + i as u64),
                    &mut dense,
                );
            }
            let out = m.out;
            assert_panels_equal_dense(&m, &dense, n, inp, out);
        }
    }

    /// f16 scales at the edges of the format: the largest finite values, the smallest
    /// subnormal, the smallest normal, signed zeros, one.
    const EXTREMES: [u16; 8] = [
        0x7BFF, 0xFBFF, 0x0001, 0x8001, 0x0400, 0x0000, 0x8000, 0x3C00,
    ];

    /// `blocks` with every f16 scale (d, and q4_1's m or a k-quant's dmin) one of [`EXTREMES`].
    pub(in crate::kernels) fn extreme_blocks(
        t: GgmlType,
        rows: usize,
        inp: usize,
        seed: u64,
    ) -> Vec<u8> {
        let mut b = blocks(t, rows, inp, seed);
        let halves: &[usize] = match t {
            GgmlType::Q8_0 | GgmlType::Q4_0 | GgmlType::Q5_0 => &[0],
            GgmlType::Q2K => &[80, 82],
            GgmlType::Q3K => &[108],
            GgmlType::Q6K => &[208],
            _ => &[0, 2],
        };
        for (i, blk) in b.chunks_exact_mut(t.block().1).enumerate() {
            for (n, &h) in halves.iter().enumerate() {
                let v = EXTREMES[(i * 3 + n * 5 + seed as usize) % EXTREMES.len()];
                blk[h..h + 2].copy_from_slice(&v.to_le_bytes());
            }
            if t == GgmlType::Q6K {
                // The 8-bit scales at their edges too: -128, 127, 0, -1.
                for (j, sc) in blk[192..208].iter_mut().enumerate() {
                    *sc = [0x80, 0x7F, 0x00, 0xFF][(i + j) % 4];
                }
            }
            if t == GgmlType::Q2K {
                // The 4-bit scales and mins at 0 and 15, in every pairing.
                for (j, sc) in blk[0..16].iter_mut().enumerate() {
                    *sc = [0x00, 0xFF, 0xF0, 0x0F][(i + j) % 4];
                }
            }
            if t == GgmlType::Q3K && i % 2 == 0 {
                // In every other block, all 6-bit scales at 0 (all bits clear; -32 once the
                // 32 is taken off) or all at 63 (all set; 31); random scales between.
                blk[96..108].fill(if i % 4 == 0 { 0x00 } else { 0xFF });
            }
        }
        b
    }

    /// The regrouped q8_0, q4_0, q4_1, q5_0, q5_1, q2_k, q3_k, q4_k, q5_k and q6_k panels give,
    /// bit for bit, the values the value-by-value reference path ([`dequantise_row`] on the
    /// stored rows, itself checked against the gguf package and candle) gives: every piece and
    /// every whole panel, on random codes with ordinary and extreme scales, rows pushed in two
    /// parts that split a panel, and a partial last panel read from the stored rows.
    #[test]
    fn regrouped_panels_equal_the_value_by_value_path() {
        for t in REGROUPED {
            for extreme in [false, true] {
                let (rows, inp) = (2 * PANEL + 5, 512);
                let b = if extreme {
                    extreme_blocks(t, rows, inp, 3)
                } else {
                    blocks(t, rows, inp, 3)
                };
                let rb = t.row_bytes(inp);
                let mut m = GgmlMatrix::new(inp);
                m.push(t, 40, b[..40 * rb].to_vec());
                m.push(t, rows - 40, b[40 * rb..].to_vec());
                assert!(m.panels.len() == 2 && m.tail.len() == 5);
                assert!(m.panels.iter().all(|p| !matches!(p, Panel::Rows(_))));
                // The bytes of a block are kept, but for q3_k's, q4_k's and q5_k's sub-block
                // scales, a byte each (114, 148 and 180 bytes a block of 256 instead of 110, 144
                // and 176); the last 5 rows stay as stored.
                let regrouped = match t {
                    GgmlType::Q3K => 2 * PANEL * (inp / QK_K) * 114,
                    GgmlType::Q4K => 2 * PANEL * (inp / QK_K) * 148,
                    GgmlType::Q5K => 2 * PANEL * (inp / QK_K) * 180,
                    _ => 2 * PANEL * rb,
                };
                assert_eq!(m.bytes(), regrouped + 5 * rb);
                // The reference: each row value by value, laid out as the panels.
                let mut want = vec![0f32; 3 * inp * PANEL];
                for j in 0..rows {
                    let mut v = vec![0.0; inp];
                    dequantise_row(t, &b[j * rb..(j + 1) * rb], 0, inp, &mut v);
                    for (k, x) in v.into_iter().enumerate() {
                        want[(j / PANEL * inp + k) * PANEL + j % PANEL] = x;
                    }
                }
                let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                let mut buf = vec![0f32; PIECE_ROWS * PANEL];
                for p in 0..3 {
                    let panel = &want[p * inp * PANEL..(p + 1) * inp * PANEL];
                    for k0 in (0..inp).step_by(PIECE_ROWS) {
                        let got = m.piece(p, k0, k0 + PIECE_ROWS, &mut buf);
                        let at = k0 * PANEL..(k0 + PIECE_ROWS) * PANEL;
                        let what = format!("{} extreme {extreme} panel {p} rows {k0}..", t.name());
                        assert_eq!(bits(got), bits(&panel[at.clone()]), "{what}");
                        // The portable loops too (the CPU running the tests may have AVX-512).
                        let mut portable = vec![0f32; PIECE_ROWS * PANEL];
                        if p < 2 {
                            regrouped_piece_any::<false>(
                                &m.panels[p],
                                k0,
                                k0 + PIECE_ROWS,
                                &mut portable,
                            );
                            assert_eq!(bits(&portable), bits(&panel[at]), "portable {what}");
                        }
                    }
                    m.whole(p, &mut |got| {
                        assert_eq!(
                            bits(&got[..inp * PANEL]),
                            bits(panel),
                            "{} whole {p}",
                            t.name()
                        )
                    });
                }
                // Pieces that do not start at a group (the seam allows any k0 < k1).
                let got = m.piece(1, 40, 70, &mut buf).to_vec();
                assert_eq!(
                    bits(&got),
                    bits(&want[(inp + 40) * PANEL..(inp + 70) * PANEL])
                );
            }
        }
    }

    #[test]
    fn unsupported_types_are_named() {
        assert_eq!(GgmlType::from_id(12), Ok(GgmlType::Q4K));
        assert_eq!(GgmlType::from_id(23).unwrap_err(), "iq4_xs (type id 23)");
        assert_eq!(GgmlType::from_id(99).unwrap_err(), "unknown type id 99");
    }
}
