//! Bytes per second of the product over a GGUF block matrix (`kernels::ggml::GgmlMatrix`, the
//! product every linear layer of a GGUF model runs), for one type, batch size and shape: the
//! block-matrix counterpart of `product_speed`. Several matrices are held at once so their
//! bytes, read in turn, exceed the caches as a model's layers do; batch 1 is then bound by
//! memory bandwidth, and `bench/kernels.sh` sets the rate beside the machine's triad bandwidth.
//!
//!   cargo run --release --example gguf_product_speed -- TYPE ROWS INPUTS OUTPUTS MATRICES CALLS
//!
//! TYPE is a ggml type name (q8_0, q4_k, q6_k, ...). Prints one line: the shape, GB/s of block
//! bytes, GFLOP/s and milliseconds a call, after one untimed pass; the thread count is rayon's
//! (RAYON_NUM_THREADS). The blocks are seeded random bytes with finite f16 scales.

use liftgate::kernels::ggml::{GgmlMatrix, GgmlType};
use std::time::Instant;

fn usage() -> ! {
    eprintln!(
        "usage: gguf_product_speed TYPE ROWS INPUTS OUTPUTS MATRICES CALLS \
         (TYPE a block type such as q8_0 or q4_k, then five whole numbers)"
    );
    std::process::exit(2);
}

/// The byte offsets of a block's f16 scales (set to small finite values).
fn half_offsets(t: GgmlType) -> &'static [usize] {
    match t {
        GgmlType::Q4_0 | GgmlType::Q5_0 | GgmlType::Q8_0 => &[0],
        GgmlType::Q4_1 | GgmlType::Q5_1 => &[0, 2],
        GgmlType::Q4K | GgmlType::Q5K => &[0, 2],
        GgmlType::Q2K => &[80, 82],
        GgmlType::Q3K => &[108],
        GgmlType::Q6K => &[208],
        _ => &[],
    }
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    if args.len() != 6 {
        usage();
    }
    // The block types: every type liftgate reads whose blocks hold more than one value.
    let Some(t) = (0..64)
        .filter_map(|id| GgmlType::from_id(id).ok())
        .find(|t| t.block().0 > 1 && t.name() == args[0])
    else {
        usage();
    };
    let nums: Option<Vec<usize>> = args[1..].iter().map(|a| a.parse().ok()).collect();
    let Some([n, inp, out, mats, calls]) = nums.and_then(|a| <[usize; 5]>::try_from(a).ok()) else {
        usage();
    };
    let (per, size) = t.block();
    if n == 0 || inp == 0 || out == 0 || mats == 0 || !inp.is_multiple_of(per) {
        eprintln!(
            "gguf_product_speed: INPUTS must be a positive multiple of {per} for {}, and ROWS, \
             OUTPUTS, MATRICES positive",
            t.name()
        );
        std::process::exit(2);
    }
    // A small xorshift stream: the same bytes on every run.
    let mut state = 0x9E37_79B9_7F4A_7C15u64;
    let mut next = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state
    };
    let matrices: Vec<GgmlMatrix> = (0..mats)
        .map(|_| {
            let mut bytes: Vec<u8> = (0..out * t.row_bytes(inp)).map(|_| next() as u8).collect();
            for blk in bytes.chunks_exact_mut(size) {
                for &at in half_offsets(t) {
                    // An f16 between 2^-10 and 2^-7, sign random.
                    let h = half::f16::from_f32((1 + next() % 7) as f32 * 1.0e-3);
                    blk[at..at + 2].copy_from_slice(&h.to_bits().to_le_bytes());
                }
            }
            let mut m = GgmlMatrix::new(inp);
            m.push(t, out, bytes);
            m
        })
        .collect();
    let bytes: usize = matrices.iter().map(GgmlMatrix::bytes).sum();
    let x: Vec<f32> = (0..n * inp)
        .map(|i| ((i * 31) % 97) as f32 * 1e-2 - 0.5)
        .collect();
    let mut y = vec![0f32; n * out];
    for m in &matrices {
        m.matmul(&x, n, &mut y);
    }
    let t0 = Instant::now();
    for _ in 0..calls {
        for m in &matrices {
            m.matmul(&x, n, &mut y);
        }
    }
    let s = t0.elapsed().as_secs_f64();
    let passes = calls as f64;
    println!(
        "{} rows {n} inputs {inp} outputs {out} matrices {mats} ({:.0} MB): {:.1} GB/s, {:.1} GFLOP/s, {:.3} ms a pass",
        t.name(),
        bytes as f64 / 1e6,
        bytes as f64 * passes / s / 1e9,
        2.0 * (n * inp * out * mats) as f64 * passes / s / 1e9,
        s * 1e3 / passes
    );
}
