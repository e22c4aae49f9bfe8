//! The scaffolding the bf16 and int8 kernels share.
//!
//! Both keep a matrix as blocks of 16 output lanes (one 512-bit vector of 32-bit values) and
//! both walk the activations in token groups; both pick their AVX-512 form at run time. Written
//! once here: the CPU features (detected once per process), the token groups, the walk over
//! pairs of blocks, and the dispatch from a (blocks, group size) pair to a kernel compiled for
//! those constants.

use rayon::prelude::*;
use std::sync::OnceLock;

/// Output lanes per weight block: one 512-bit vector of 32-bit values.
pub const LANES: usize = 16;

/// The AVX-512 extensions the kernels use, as found on this CPU.
#[derive(Debug, Clone, Copy, Default)]
pub struct Features {
    /// AVX-512 Foundation: 16-wide f32 vectors.
    pub avx512f: bool,
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

/// Calls `pair(b0, nb, out)` for the weight blocks in pairs, b0 = 0, 2, 4, … with nb = 2 (1 for
/// an odd last block): one pass over the activations then feeds two weight blocks. `out` holds
/// [blocks][n][LANES] values, `tile` = n·LANES of them per block (tile > 0); each call gets
/// the tiles of its blocks. The pairs run on the rayon pool when `parallel`.
pub fn block_pairs<T: Send>(
    out: &mut [T],
    tile: usize,
    blocks: usize,
    parallel: bool,
    pair: impl Fn(usize, usize, &mut [T]) + Sync + Send,
) {
    let one = |(bp, ys): (usize, &mut [T])| {
        let b0 = 2 * bp;
        pair(b0, (blocks - b0).min(2), ys)
    };
    let work = &mut out[..blocks * tile];
    if parallel {
        work.par_chunks_mut(2 * tile).enumerate().for_each(one);
    } else {
        work.chunks_mut(2 * tile).enumerate().for_each(one);
    }
}

/// A kernel compiled for each token-group size T (8, 4 or 1) and block count B (1 or 2), with
/// its operands held by the implementing type.
#[cfg(target_arch = "x86_64")]
pub trait GroupKernel {
    /// Writes the outputs of B blocks for the T tokens starting at `t0`.
    ///
    /// # Safety
    /// The CPU has the features the implementation is compiled for, and the operands hold the
    /// values the group reads and writes (checked by the caller of [`run_groups`]).
    unsafe fn group<const T: usize, const B: usize>(&mut self, t0: usize);
}

/// Runs `kernel` over every token group of `n` tokens for `nb` (1 or 2) blocks.
///
/// # Safety
/// As [`GroupKernel::group`], for every group of `n`.
#[cfg(target_arch = "x86_64")]
pub unsafe fn run_groups<K: GroupKernel>(kernel: &mut K, nb: usize, n: usize) {
    for (t0, size) in groups(n) {
        // SAFETY: passed on from the caller.
        unsafe {
            match (nb, size) {
                (2, 8) => kernel.group::<8, 2>(t0),
                (2, 4) => kernel.group::<4, 2>(t0),
                (2, _) => kernel.group::<1, 2>(t0),
                (_, 8) => kernel.group::<8, 1>(t0),
                (_, 4) => kernel.group::<4, 1>(t0),
                _ => kernel.group::<1, 1>(t0),
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
