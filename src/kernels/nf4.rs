//! The 4-bit block quantisation of QLoRA as bitsandbytes 0.50 computes it on CPU: the NF4 and
//! FP4 code tables, the quantiser of a weight matrix in blocks of 64 with an absmax scale each,
//! the "double quantisation" of those scales (8-bit dynamic code in blocks of 256 after taking
//! out their mean) and the dequantised f32 scale the 4-bit linear layer multiplies by.
//!
//! Hand-written, not taken from a crate: what must match is the reference library's rounding
//! to the bit, including its quirks (the scale's reciprocal multiplied rather than divided; FP4
//! small positives going to the second of its two zero codes; a 65 536-bin lookup table, not a nearest search,
//! for the 8-bit code; the mean of the scales summed in PyTorch's cascade order). Every step
//! names the reference code it follows (bitsandbytes 0.50.2 from PyPI; PyTorch 2.15 for the
//! mean). `tests/reference/make_nf4_fixtures.py` checks the result against bitsandbytes itself:
//! the SHA-256 of every dequantised weight of the reference fixtures.
//!
//! A weight W [rows, inp] is quantised over its row-major values, 64 at a time: block b holds
//! values 64b..64b + 64. Callers keep `inp` a multiple of 64 so that no block spans two rows.

use std::sync::OnceLock;

/// Values per 4-bit block (bitsandbytes' `blocksize=64`, what transformers' `BitsAndBytesConfig`
/// uses for 4-bit weights).
pub const BLOCK: usize = 64;

/// Scales per block of the second (8-bit) quantisation (`quantize_blockwise(..., blocksize=256)`
/// in `bitsandbytes/functional.py`, `quantize_4bit`, `compress_statistics=True`).
pub const BLOCK2: usize = 256;

/// Which 4-bit code.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Codebook {
    /// NormalFloat4 (Dettmers et al. 2023, "QLoRA", appendix E): quantiles of N(0, 1) scaled
    /// to [-1, 1], with an exact zero.
    Nf4,
    /// bitsandbytes' 4-bit float (1 sign, 2 exponent, 1 mantissa bit), normalised by 12.
    Fp4,
}

/// NF4 code values as bitsandbytes holds them (`get_4bit_type("nf4")` in
/// `bitsandbytes/functional.py`; the same f32 literals as `dDequantizeNF4` in its C sources).
const NF4: [f32; 16] = [
    -1.0,
    -0.696_192_8,
    -0.525_073_05,
    -0.394_917_5,
    -0.284_441_38,
    -0.184_773_43,
    -0.091_050_036,
    0.0,
    0.079_580_3,
    0.160_930_2,
    0.246_112_3,
    0.337_915_24,
    0.440_709_83,
    0.562_617,
    0.722_956_84,
    1.0,
];

/// FP4 code values, `get_4bit_type("fp4")`: [0, 0.0625, 8, 12, 4, 6, 2, 3] and their negatives,
/// divided by 12 in f32. Index 8 is the list's `-0`, a Python int, so +0.0 like index 0.
const FP4: [f32; 16] = {
    let raw = [
        0.0f32, 0.0625, 8.0, 12.0, 4.0, 6.0, 2.0, 3.0, 0.0, -0.0625, -8.0, -12.0, -4.0, -6.0, -2.0,
        -3.0,
    ];
    let mut t = [0.0f32; 16];
    let mut i = 0;
    while i < 16 {
        t[i] = raw[i] / 12.0;
        i += 1;
    }
    t
};

impl Codebook {
    /// The 16 values a code stands for (times the block's scale).
    pub fn values(self) -> [f32; 16] {
        match self {
            Codebook::Nf4 => NF4,
            Codebook::Fp4 => FP4,
        }
    }

    /// The codes sorted by value (a stable sort: FP4's zero at index 0 before the one at 8, as
    /// `torch.argsort` orders them in `_get_4bit_quantize_bounds`,
    /// `bitsandbytes/backends/default/ops.py` lines 226-230) and the 15 midpoints between
    /// neighbours, `(code[i] + code[i + 1]) / 2` in f32.
    fn bounds(self) -> ([u8; 16], [f32; 15]) {
        let v = self.values();
        let mut order: [u8; 16] = std::array::from_fn(|i| i as u8);
        // Equal values (FP4's two zeros) keep their index order, as torch's argsort leaves them.
        order.sort_by(|&a, &b| {
            v[a as usize]
                .partial_cmp(&v[b as usize])
                .unwrap_or(std::cmp::Ordering::Equal)
                .then(a.cmp(&b))
        });
        let mids = std::array::from_fn(|i| (v[order[i] as usize] + v[order[i + 1] as usize]) / 2.0);
        (order, mids)
    }
}

/// The 8-bit signed dynamic code of the second quantisation: bitsandbytes
/// `create_dynamic_map(signed=True)` (`bitsandbytes/functional.py` line 296) as f32, sorted.
/// Copied from the reference library's table (its generator rounds through `torch.linspace`);
/// `tests/nf4_reference.rs` checks these values against the SHA-256 the fixture script records.
pub const DYNAMIC: [f32; 256] = [
    -0.99296874,
    -0.9789063,
    -0.96484375,
    -0.9507812,
    -0.93671876,
    -0.92265624,
    -0.9085938,
    -0.89453125,
    -0.8804687,
    -0.86640626,
    -0.85234374,
    -0.8382813,
    -0.82421875,
    -0.8101562,
    -0.79609376,
    -0.78203124,
    -0.7679688,
    -0.75390625,
    -0.7398437,
    -0.72578126,
    -0.7117188,
    -0.6976563,
    -0.68359375,
    -0.6695312,
    -0.65546876,
    -0.6414063,
    -0.6273438,
    -0.61328125,
    -0.5992187,
    -0.58515626,
    -0.5710938,
    -0.5570313,
    -0.54296875,
    -0.5289062,
    -0.5148437,
    -0.50078124,
    -0.4867187,
    -0.47265625,
    -0.45859373,
    -0.44453126,
    -0.43046874,
    -0.41640624,
    -0.40234375,
    -0.38828123,
    -0.37421876,
    -0.36015624,
    -0.34609374,
    -0.33203125,
    -0.31796873,
    -0.30390626,
    -0.28984374,
    -0.27578127,
    -0.26171875,
    -0.24765624,
    -0.23359375,
    -0.21953125,
    -0.20546874,
    -0.19140625,
    -0.17734376,
    -0.16328125,
    -0.14921875,
    -0.13515624,
    -0.12109375,
    -0.107031256,
    -0.09859375,
    -0.09578126,
    -0.092968754,
    -0.09015625,
    -0.08734375,
    -0.08453125,
    -0.08171876,
    -0.07890625,
    -0.07609375,
    -0.07328125,
    -0.070468746,
    -0.067656256,
    -0.06484375,
    -0.06203125,
    -0.059218753,
    -0.05640625,
    -0.05359375,
    -0.05078125,
    -0.04796875,
    -0.04515625,
    -0.042343747,
    -0.03953125,
    -0.036718752,
    -0.03390625,
    -0.03109375,
    -0.028281251,
    -0.02546875,
    -0.02265625,
    -0.019843752,
    -0.01703125,
    -0.01421875,
    -0.01140625,
    -0.00971875,
    -0.009156249,
    -0.00859375,
    -0.00803125,
    -0.00746875,
    -0.00690625,
    -0.00634375,
    -0.00578125,
    -0.0052187503,
    -0.0046562497,
    -0.00409375,
    -0.0035312497,
    -0.00296875,
    -0.00240625,
    -0.00184375,
    -0.0012812499,
    -0.0009437501,
    -0.00083125,
    -0.00071875006,
    -0.0006062501,
    -0.00049375003,
    -0.00038125002,
    -0.00026875004,
    -0.00015625001,
    -8.875e-5,
    -6.625e-5,
    -4.375e-5,
    -2.1249998e-5,
    -7.75e-6,
    -3.2500002e-6,
    -5.5000004e-7,
    0.0,
    5.5000004e-7,
    3.2500002e-6,
    7.75e-6,
    2.1249998e-5,
    4.375e-5,
    6.625e-5,
    8.875e-5,
    0.00015625001,
    0.00026875004,
    0.00038125002,
    0.00049375003,
    0.0006062501,
    0.00071875006,
    0.00083125,
    0.0009437501,
    0.0012812499,
    0.00184375,
    0.00240625,
    0.00296875,
    0.0035312497,
    0.00409375,
    0.0046562497,
    0.0052187503,
    0.00578125,
    0.00634375,
    0.00690625,
    0.00746875,
    0.00803125,
    0.00859375,
    0.009156249,
    0.00971875,
    0.01140625,
    0.01421875,
    0.01703125,
    0.019843752,
    0.02265625,
    0.02546875,
    0.028281251,
    0.03109375,
    0.03390625,
    0.036718752,
    0.03953125,
    0.042343747,
    0.04515625,
    0.04796875,
    0.05078125,
    0.05359375,
    0.05640625,
    0.059218753,
    0.06203125,
    0.06484375,
    0.067656256,
    0.070468746,
    0.07328125,
    0.07609375,
    0.07890625,
    0.08171876,
    0.08453125,
    0.08734375,
    0.09015625,
    0.092968754,
    0.09578126,
    0.09859375,
    0.107031256,
    0.12109375,
    0.13515624,
    0.14921875,
    0.16328125,
    0.17734376,
    0.19140625,
    0.20546874,
    0.21953125,
    0.23359375,
    0.24765624,
    0.26171875,
    0.27578127,
    0.28984374,
    0.30390626,
    0.31796873,
    0.33203125,
    0.34609374,
    0.36015624,
    0.37421876,
    0.38828123,
    0.40234375,
    0.41640624,
    0.43046874,
    0.44453126,
    0.45859373,
    0.47265625,
    0.4867187,
    0.50078124,
    0.5148437,
    0.5289062,
    0.54296875,
    0.5570313,
    0.5710938,
    0.58515626,
    0.5992187,
    0.61328125,
    0.6273438,
    0.6414063,
    0.65546876,
    0.6695312,
    0.68359375,
    0.6976563,
    0.7117188,
    0.72578126,
    0.7398437,
    0.75390625,
    0.7679688,
    0.78203124,
    0.79609376,
    0.8101562,
    0.82421875,
    0.8382813,
    0.85234374,
    0.86640626,
    0.8804687,
    0.89453125,
    0.9085938,
    0.92265624,
    0.93671876,
    0.9507812,
    0.96484375,
    0.9789063,
    0.99296874,
    1.0,
];

/// A weight quantised to 4 bits: the codes, two per byte (value 2i in the low half of byte i,
/// 2i + 1 in the high half), and the f32 scale of each block of 64 values as the linear layer
/// multiplies by it (after the double quantisation's round trip, when there is one).
pub struct Quantised {
    pub codes: Vec<u8>,
    pub scales: Vec<f32>,
}

impl Quantised {
    /// The code of value i.
    #[inline]
    pub fn code(&self, i: usize) -> u8 {
        (self.codes[i / 2] >> (4 * (i % 2))) & 0xF
    }

    /// The f32 value of value i as the 4-bit layer multiplies by it: table[code] · scale.
    pub fn value(&self, book: Codebook, i: usize) -> f32 {
        book.values()[self.code(i) as usize] * self.scales[i / BLOCK]
    }

    /// Bytes held.
    pub fn bytes(&self) -> usize {
        self.codes.len() + 4 * self.scales.len()
    }
}

/// Quantises `values` (a weight's row-major values, widened exactly to f32 from its stored
/// dtype; a multiple of 64 long) as bitsandbytes' `quantize_4bit(A, blocksize=64,
/// compress_statistics=double, quant_type=...)` does, and returns the codes with the scale the
/// 4-bit product uses (`gemm_4bit` in `bitsandbytes/backends/default/ops.py` lines 323-342).
///
/// Each weight then dequantises to `values()[code] * scale` in f32, as
/// `dequantizeBlockwise4bitCpu` computes it (one f32 multiply).
pub fn quantise(values: &[f32], book: Codebook, double: bool) -> Quantised {
    debug_assert_eq!(values.len() % BLOCK, 0);
    let (order, mids) = book.bounds();
    let mut codes = Vec::with_capacity(values.len().div_ceil(2));
    let mut n = 0usize;
    let mut absmax = Vec::with_capacity(values.len() / BLOCK);
    // bitsandbytes/backends/default/ops.py lines 233-260 (`quantize_4bit`, no CPU override):
    //   absmax = A_com.abs().max(dim=-1)[0]
    //   scaled = torch.clamp(A_com * (1.0 / absmax.clamp(min=1e-38).view(-1, 1)), -1, 1)
    //   q = torch.bucketize(scaled, bounds); if quant_type != "nf4": q = order[q]
    for block in values.chunks(BLOCK) {
        let am = block.iter().fold(0.0f32, |m, v| m.max(v.abs()));
        let recip = 1.0 / am.max(1e-38);
        for &v in block {
            let s = (v * recip).clamp(-1.0, 1.0);
            // bucketize (right=False): the number of bounds strictly below s.
            let q = order[mids.partition_point(|&m| m < s)];
            if n.is_multiple_of(2) {
                codes.push(q);
            } else if let Some(last) = codes.last_mut() {
                *last |= q << 4;
            }
            n += 1;
        }
        absmax.push(am);
    }
    let scales = if double {
        double_quantised(&absmax)
    } else {
        absmax
    };
    Quantised { codes, scales }
}

/// The scales after the double quantisation's round trip, as the 4-bit product dequantises
/// them: `dequantize_blockwise(qabsmax, absmax2, code, 256) + offset` (`gemm_4bit`,
/// `bitsandbytes/backends/default/ops.py` lines 336-340).
///
/// `quantize_4bit` (`bitsandbytes/functional.py` lines 938-940) takes `offset = absmax.mean()`
/// and quantises `absmax - offset` with `quantize_blockwise(..., blocksize=256)`, which on CPU
/// is the C kernel `quantize_cpu_impl` (`csrc/cpu_ops.cpp`): per block of 256 the max of |a|,
/// its reciprocal `inv`, and the code `lut[(uint16)(((clamp(a·inv, -1, 1) + 1)·0.5)·65535 +
/// 0.5)]` from a 65 536-entry table of nearest codes (`build_quantize_lut`). Dequantising is
/// `code[q] * absmax2` in f32 (`dequantizeBlockwise8bitCpu`), then `+ offset` in f32 (torch).
pub fn double_quantised(absmax: &[f32]) -> Vec<f32> {
    let offset = torch_sum(absmax) / absmax.len() as f32;
    let a: Vec<f32> = absmax.iter().map(|&v| v - offset).collect();
    let lut = lut();
    let mut out = Vec::with_capacity(a.len());
    for block in a.chunks(BLOCK2) {
        let am2 = block.iter().fold(0.0f32, |m, v| m.max(v.abs()));
        for &v in block {
            let q = if am2 == 0.0 {
                0
            } else {
                let inv = 1.0 / am2;
                let s = (v * inv).clamp(-1.0, 1.0);
                lut[(((s + 1.0) * 0.5) * 65535.0 + 0.5) as u16 as usize]
            };
            out.push(DYNAMIC[q as usize] * am2 + offset);
        }
    }
    out
}

/// The nearest-code table of `build_quantize_lut` (`csrc/cpu_ops.cpp`): bin i stands for
/// -1 + 2i/65535 and holds the first code whose upper midpoint is not below it.
fn lut() -> &'static [u8] {
    static LUT: OnceLock<Vec<u8>> = OnceLock::new();
    LUT.get_or_init(|| {
        let mids: Vec<f32> = DYNAMIC.windows(2).map(|w| 0.5 * (w[0] + w[1])).collect();
        let mut lut = Vec::with_capacity(65536);
        let mut code = 0usize;
        for i in 0..65536u32 {
            let val = -1.0f32 + (2.0f32 * i as f32) / 65535.0;
            while code < 255 && mids[code] < val {
                code += 1;
            }
            lut.push(code as u8);
        }
        lut
    })
}

/// `torch.sum` of a contiguous f32 vector on CPU, in its order of additions (PyTorch
/// `aten/src/ATen/native/cpu/SumKernel.cpp`: `cascade_sum` → `vectorized_inner_sum` over
/// vectors of 8 lanes, `row_sum` with 4 interleaved partial sums, `multi_row_sum` cascading
/// them over 4 levels), so that the mean bitsandbytes subtracts is the same f32 value.
/// Checked bit for bit against `torch.sum` and `torch.mean` (one thread) for lengths 1 to 129
/// and up to 917 504, the scales of an 8B-class MLP matrix (tests/fixtures/nf4_sums.json); the
/// dequantised-weight hashes depend on it too. Past 32 768 values PyTorch with several threads
/// may split the sum between them (from memory of ATen's `parallel_reduce`, not checked), and
/// the last bit of the mean would then depend on its thread count.
pub fn torch_sum(x: &[f32]) -> f32 {
    const LANES: usize = 8;
    if x.len() < LANES {
        return row_sum::<1>(x.len(), |i| [x[i]])[0];
    }
    let vectors = x.len() / LANES;
    let acc = row_sum::<LANES>(vectors, |i| std::array::from_fn(|l| x[i * LANES + l]));
    let mut total = 0.0f32;
    for &v in &x[vectors * LANES..] {
        total += v;
    }
    for v in acc {
        total += v;
    }
    total
}

/// `row_sum`: the `size` elements as [size / 4, 4] summed per column by [`multi_row_sum`], the
/// leftover elements added to column 0, then the columns added in order.
fn row_sum<const W: usize>(size: usize, load: impl Fn(usize) -> [f32; W]) -> [f32; W] {
    let ilp = size / 4;
    let mut ps = multi_row_sum::<W>(ilp, |i, k| load(i * 4 + k));
    for i in ilp * 4..size {
        add(&mut ps[0], &load(i));
    }
    let [mut a, b, c, d] = ps;
    for other in [b, c, d] {
        add(&mut a, &other);
    }
    a
}

/// `multi_row_sum` with 4 rows and 4 levels: level 0 takes 2^p rows at a time (p = max(4,
/// ⌈log₂ size⌉ / 4)), then carries up the levels as a binary counter carries.
fn multi_row_sum<const W: usize>(
    size: usize,
    load: impl Fn(usize, usize) -> [f32; W],
) -> [[f32; W]; 4] {
    const LEVELS: usize = 4;
    let ceil_log2 = if size > 1 {
        (usize::BITS - (size - 1).leading_zeros()) as usize
    } else {
        0
    };
    let power = 4.max(ceil_log2 / LEVELS);
    let step = 1usize << power;
    let mask = step - 1;
    let mut acc = [[[0.0f32; W]; 4]; LEVELS];
    let mut i = 0;
    while i + step <= size {
        for _ in 0..step {
            for (k, a) in acc[0].iter_mut().enumerate() {
                add(a, &load(i, k));
            }
            i += 1;
        }
        for j in 1..LEVELS {
            let (below, above) = acc.split_at_mut(j);
            for (lower, upper) in below[j - 1].iter_mut().zip(above[0].iter_mut()) {
                add(upper, lower);
                *lower = [0.0; W];
            }
            if i & (mask << (j * power)) != 0 {
                break;
            }
        }
    }
    while i < size {
        for (k, a) in acc[0].iter_mut().enumerate() {
            add(a, &load(i, k));
        }
        i += 1;
    }
    let [mut total, rest @ ..] = acc;
    for level in rest {
        for (t, upper) in total.iter_mut().zip(&level) {
            add(t, upper);
        }
    }
    total
}

#[inline]
fn add<const W: usize>(a: &mut [f32; W], b: &[f32; W]) {
    for (x, y) in a.iter_mut().zip(b) {
        *x += y;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The NF4 table is sorted with an exact zero at 7 and ±1 at the ends (QLoRA appendix E);
    /// the FP4 table is [0, 1/192, 2/3, 1, 1/3, 1/2, 1/6, 1/4] and negatives (hand-worked from
    /// bitsandbytes' list divided by 12).
    #[test]
    fn code_tables_hold_the_published_values() {
        assert!(NF4.windows(2).all(|w| w[0] < w[1]));
        assert_eq!((NF4[0], NF4[7], NF4[15]), (-1.0, 0.0, 1.0));
        assert_eq!(FP4[1], 0.0625f32 / 12.0);
        assert_eq!(FP4[3], 1.0);
        assert_eq!(FP4[2], 8.0f32 / 12.0);
        assert_eq!(FP4[11], -1.0);
        assert!(FP4[8] == 0.0 && FP4[8].is_sign_positive());
        assert!(DYNAMIC.windows(2).all(|w| w[0] < w[1]));
        assert_eq!((DYNAMIC[127], DYNAMIC[255]), (0.0, 1.0));
    }

    /// FP4's sort order as torch.argsort gives it (copied from
    /// `_get_4bit_quantize_bounds("fp4")` run on bitsandbytes 0.50.2): the two zero codes in
    /// index order, 0 before 8, so zero gets code 0 and a small positive value code 8.
    #[test]
    fn fp4_order_is_the_reference_argsort() {
        let (order, mids) = Codebook::Fp4.bounds();
        assert_eq!(
            order,
            [11, 10, 13, 12, 15, 14, 9, 0, 8, 1, 6, 7, 4, 5, 2, 3]
        );
        assert_eq!(mids[7], 0.0);
        let (order, _) = Codebook::Nf4.bounds();
        assert_eq!(order, std::array::from_fn(|i| i as u8));
        let q = quantise(
            &[[1.0f32, 0.001].as_slice(), &[0.0; 62]].concat(),
            Codebook::Fp4,
            false,
        );
        assert_eq!((q.code(0), q.code(1), q.code(2)), (3, 8, 0));
        assert_eq!(q.codes[0], 3 | (8 << 4));
    }

    /// Hand-worked block: absmax 2, so scaled values are v/2; 0.5·… checks each NF4 bucket edge
    /// on both sides of a midpoint, and a zero block quantises to code 7 (zero) with scale 0.
    #[test]
    fn nf4_quantises_to_the_nearest_code_by_midpoints() {
        let mut v = vec![0.0f32; 64];
        v[0] = 2.0; // scaled 1.0 → code 15
        v[1] = -2.0; // -1.0 → code 0
        v[2] = 2.0 * 0.03; // 0.03 < midpoint 0.0398 (0 and 0.0796) → code 7
        v[3] = 2.0 * 0.05; // above it → code 8
        v[4] = 2.0 * -0.05; // between -0.0455 and 0 → -0.05 < -0.0455 → code 6
        let q = quantise(&v, Codebook::Nf4, false);
        let codes: Vec<u8> = (0..6).map(|i| q.code(i)).collect();
        assert_eq!(codes, [15, 0, 7, 8, 6, 7]);
        assert_eq!(q.scales, vec![2.0]);
        let z = quantise(&[0.0; 64], Codebook::Nf4, false);
        assert!((0..64).all(|i| z.code(i) == 7));
        assert_eq!(z.codes.len(), 32);
        assert_eq!(z.scales, vec![0.0]);
    }

    /// Double quantisation of hand-picked scales: mean 2 (exact), a = [-1, 1] in a block with
    /// max 1: -1 falls in the table's first bin (code 0, -0.99296874, the dynamic code's low
    /// end) and 1 in its last (code 255, 1.0), so the round trip gives 2 - 0.99296874 and 3.
    /// A 0 lands in bin 32768, which stands for 1/65535 and so not for the exact zero code.
    #[test]
    fn double_quantisation_round_trips_hand_worked_scales() {
        let out = double_quantised(&[1.0, 3.0]);
        assert_eq!(out, vec![2.0 - 0.992_968_74, 3.0]);
        let lut = lut();
        assert_eq!((lut[0], lut[65535]), (0, 255));
        assert!(lut.windows(2).all(|w| w[0] <= w[1]));
        assert!(lut[32768] > 127);
    }

    /// The cascade order: below 8 values, 4 interleaved partial sums; the result of a sum whose
    /// order matters (1e8 + 1 - 1e8 …) tells the orders apart.
    #[test]
    fn torch_sum_follows_the_cascade_order() {
        // Four partial sums: (1e8 + -1e8) + (1 + 0) + ... : exact in this order, 0 in a naive one.
        let x = [1e8f32, 1.0, 1.0, 1.0, -1e8];
        // columns: c0 = 1e8 + -1e8 (leftover added to column 0) = 0, c1 = c2 = c3 = 1 → 3.
        assert_eq!(torch_sum(&x), 3.0);
        let naive: f32 = x.iter().sum();
        assert_ne!(naive, 3.0);
        let ones = vec![1.0f32; 1000];
        assert_eq!(torch_sum(&ones), 1000.0);
    }
}
