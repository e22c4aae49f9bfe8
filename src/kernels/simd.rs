//! The scaffolding the bf16 and int8 kernels share.
//!
//! Both keep a matrix as blocks of 16 output lanes (one 512-bit vector of 32-bit values), both
//! walk the activations in token groups, and both pick their AVX-512 form at run time. Written
//! once here: the CPU features (detected once per process), the token groups, the tasks over
//! pairs of blocks, and the dispatch from (blocks, group size) to a kernel compiled for those
//! constants. A kernel itself ([`BlockKernel`]) is only its portable loop and its AVX-512 loop.

use rayon::prelude::*;
use std::sync::OnceLock;

/// Output lanes per weight block: one 512-bit vector of 32-bit values.
pub const LANES: usize = 16;

/// The AVX-512 extensions the kernels use, as found on this CPU.
#[derive(Debug, Clone, Copy, Default)]
pub struct Features {
    /// AVX-512 Foundation: 16-wide f32 vectors (and fused multiply-add, which every CPU with
    /// AVX-512F has).
    pub avx512f: bool,
    /// AVX2 with fused multiply-add: the products' portable loops are compiled for it, so a
    /// fused multiply-add is one instruction rather than a library call.
    pub fma: bool,
    /// AVX-512F and AVX-512 BF16 (`vdpbf16ps`).
    pub avx512_bf16: bool,
    /// AVX-512F and AVX-512 VNNI (`vpdpbusd`).
    pub avx512_vnni: bool,
}

/// The CPU's features, detected on the first call and kept for the life of the process.
pub fn features() -> Features {
    static FEATURES: OnceLock<Features> = OnceLock::new();
    *FEATURES.get_or_init(detect)
}

#[cfg(target_arch = "x86_64")]
fn detect() -> Features {
    let f = std::arch::is_x86_feature_detected!("avx512f");
    Features {
        avx512f: f,
        fma: std::arch::is_x86_feature_detected!("avx2")
            && std::arch::is_x86_feature_detected!("fma"),
        avx512_bf16: f && std::arch::is_x86_feature_detected!("avx512bf16"),
        avx512_vnni: f && std::arch::is_x86_feature_detected!("avx512vnni"),
    }
}

#[cfg(not(target_arch = "x86_64"))]
fn detect() -> Features {
    Features::default()
}

/// Token groups of the kernels: eights, then fours, then ones, in token order. Activations are
/// packed group by group, so one step of a kernel reads all its tokens' values from one place.
pub fn groups(n: usize) -> impl Iterator<Item = (usize, usize)> {
    let eights = n / 8 * 8;
    let fours = eights + (n - eights) / 4 * 4;
    (0..eights)
        .step_by(8)
        .map(|t| (t, 8))
        .chain((eights..fours).step_by(4).map(|t| (t, 4)))
        .chain((fours..n).map(|t| (t, 1)))
}

/// A kernel over weight blocks of 16 lanes: each block holds `steps`·16 packed weights
/// ([step][lane]), each token `steps` packed activations (in token groups, see [`groups`]), and
/// each (block, token) pair gives 16 outputs.
pub trait BlockKernel {
    /// The output values (f32 sums, or exact i32 sums).
    type Out: Copy + Default + Send + Sync;

    /// Whether this CPU runs [`BlockKernel::group`].
    fn fast() -> bool;

    /// The portable form of one block `w` for every token of `x`: outputs [n][16].
    fn portable(w: &[u32], x: &[u32], n: usize, steps: usize, out: &mut [Self::Out]);

    /// The AVX-512 form for the T tokens from `t0` and the B blocks of `b`, compiled once per
    /// token-group size T (8, 4 or 1) and block count B (1 or 2).
    ///
    /// # Safety
    /// [`BlockKernel::fast`] is true on this CPU, and `b`'s slices hold what its fields say
    /// ([`run_groups`], the only caller, checks them).
    #[cfg(target_arch = "x86_64")]
    unsafe fn group<const T: usize, const B: usize>(b: &mut Blocks<'_, Self::Out>, t0: usize);
}

/// The operands of one task: `nb` (1 or 2) consecutive weight blocks `w`, the packed
/// activations `x` of `n` tokens, and their outputs `out`, [nb][n][16].
#[cfg(target_arch = "x86_64")]
pub struct Blocks<'a, T> {
    pub w: &'a [u32],
    pub nb: usize,
    pub x: &'a [u32],
    pub n: usize,
    pub steps: usize,
    pub out: &'a mut [T],
}

/// out[(b·n + t)·16 + l] = the kernel's output for block b, token t and lane l, for every
/// block of `packed` ([blocks][steps][16]) and the `n` tokens of `x`; `out` grows as needed.
///
/// The blocks go in pairs, one task each: one pass over the activations feeds two weight
/// blocks. The tasks run on the rayon pool when `parallel`. Each output is written by one
/// task in a fixed order, so the result does not depend on the thread count.
pub fn block_products<K: BlockKernel>(
    packed: &[u32],
    blocks: usize,
    steps: usize,
    x: &[u32],
    n: usize,
    out: &mut Vec<K::Out>,
    parallel: bool,
) {
    assert!(packed.len() >= blocks * steps * LANES && x.len() >= n * steps);
    let tile = n * LANES;
    if tile == 0 {
        return;
    }
    if out.len() < blocks * tile {
        out.resize(blocks * tile, K::Out::default());
    }
    let fast = K::fast();
    let one = |(bp, ys): (usize, &mut [K::Out])| {
        let b0 = 2 * bp;
        let nb = (blocks - b0).min(2);
        let w = &packed[b0 * steps * LANES..(b0 + nb) * steps * LANES];
        if fast {
            #[cfg(target_arch = "x86_64")]
            {
                let mut b = Blocks {
                    w,
                    nb,
                    x,
                    n,
                    steps,
                    out: ys,
                };
                // SAFETY: `fast` says the CPU runs `group`; the operands hold nb blocks of
                // steps·16 weights, n·steps activations and nb·n·16 outputs (asserted and
                // sliced above).
                unsafe { run_groups::<K>(&mut b) }
            }
        } else {
            for k in 0..nb {
                let wk = &w[k * steps * LANES..(k + 1) * steps * LANES];
                K::portable(wk, x, n, steps, &mut ys[k * tile..(k + 1) * tile]);
            }
        }
    };
    let work = &mut out[..blocks * tile];
    if parallel {
        work.par_chunks_mut(2 * tile).enumerate().for_each(one);
    } else {
        work.chunks_mut(2 * tile).enumerate().for_each(one);
    }
}

/// Runs `K::group` over every token group of `b`; panics unless `b`'s slices hold what its
/// fields say.
///
/// # Safety
/// `K::fast()` is true on this CPU.
#[cfg(target_arch = "x86_64")]
pub unsafe fn run_groups<K: BlockKernel>(b: &mut Blocks<'_, K::Out>) {
    assert!(
        (1..=2).contains(&b.nb)
            && b.w.len() >= b.nb * b.steps * LANES
            && b.x.len() >= b.n * b.steps
            && b.out.len() >= b.nb * b.n * LANES
    );
    for (t0, size) in groups(b.n) {
        // SAFETY: passed on from the caller; the lengths are asserted above.
        unsafe {
            match (b.nb, size) {
                (2, 8) => K::group::<8, 2>(b, t0),
                (2, 4) => K::group::<4, 2>(b, t0),
                (2, _) => K::group::<1, 2>(b, t0),
                (_, 8) => K::group::<8, 1>(b, t0),
                (_, 4) => K::group::<4, 1>(b, t0),
                _ => K::group::<1, 1>(b, t0),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn groups_cover_every_token_once_in_order() {
        for n in 0..40 {
            let mut next = 0;
            for (t0, size) in groups(n) {
                assert_eq!(t0, next, "n {n}");
                assert!([1, 4, 8].contains(&size));
                next += size;
            }
            assert_eq!(next, n);
        }
        assert_eq!(groups(13).collect::<Vec<_>>(), [(0, 8), (8, 4), (12, 1)]);
    }
}
