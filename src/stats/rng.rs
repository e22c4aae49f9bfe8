//! Seeded, thread-count-independent random streams.
//!
//! Every random draw in `weigh` comes from a generator made by [`chunk_rng`] from three numbers:
//! the user's `--seed`, a *domain* (which test on which data: see the `DOMAIN_*` constants and
//! the callers) and a *chunk* (a fixed block of [`CHUNK`] resamples). The generator for a chunk
//! is a Xoshiro256++ whose 256-bit state is drawn from ChaCha8 keyed by the seed, on the ChaCha
//! stream `domain << 32 | chunk`. ChaCha gives independent, well-mixed streams; Xoshiro256++
//! is then fast enough for the hundreds of millions of index draws a large set needs. Because a
//! chunk's draws depend only on (seed, domain, chunk), splitting chunks across any number of
//! threads gives the same numbers.

use rand::rngs::Xoshiro256PlusPlus;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Resamples handled by one generator.
pub const CHUNK: usize = 64;

/// Domain of the joint bootstrap of the per-metric lifts.
pub const DOMAIN_METRICS_BOOTSTRAP: u32 = 1;
/// Domains of the permutation tests of the metric lifts: this plus the metric's index.
pub const DOMAIN_METRICS_PERMUTATION: u32 = 16;
/// Domain of the bootstrap of the fact-recall lift.
pub const DOMAIN_FACTS_BOOTSTRAP: u32 = 32;
/// Domain of the permutation test of the fact-recall lift.
pub const DOMAIN_FACTS_PERMUTATION: u32 = 33;
/// Domains of the per-category bootstraps: this plus the category's index (a large set's
/// categories are drawn on the metrics' domains instead: `super::leaves`).
pub const DOMAIN_CATEGORY_BOOTSTRAP: u32 = 1 << 20;
/// Domains of the per-category permutation tests: this plus the category's index (a large
/// set's categories share the gate metric's flips instead).
pub const DOMAIN_CATEGORY_PERMUTATION: u32 = 1 << 21;
/// "Lift kept" of lineup artifact k: domain + k.
pub const DOMAIN_LINEUP_BOOTSTRAP: u32 = 1 << 22;

/// The generator for one chunk of one domain.
pub fn chunk_rng(seed: u64, domain: u32, chunk: u32) -> Xoshiro256PlusPlus {
    let mut master = ChaCha8Rng::seed_from_u64(seed);
    master.set_stream(((domain as u64) << 32) | chunk as u64);
    let mut state = [0u8; 32];
    for part in state.chunks_exact_mut(8) {
        part.copy_from_slice(&master.next_u64().to_le_bytes());
    }
    Xoshiro256PlusPlus::from_seed(state)
}

/// An index uniform on `0..n` from 32 random bits (Lemire 2019, "Fast random integer
/// generation in an interval", multiply-shift with rejection, so exactly uniform).
/// `n` must be in `1..=u32::MAX`; `next` supplies fresh 32-bit words for rejections.
#[inline(always)]
pub fn index_below(mut word: u32, n: u32, mut next: impl FnMut() -> u32) -> usize {
    let mut m = word as u64 * n as u64;
    let mut low = m as u32;
    if low < n {
        let threshold = n.wrapping_neg() % n;
        while low < threshold {
            word = next();
            m = word as u64 * n as u64;
            low = m as u32;
        }
    }
    (m >> 32) as usize
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn streams_are_reproducible_and_distinct() {
        let a = chunk_rng(7, 1, 0).next_u64();
        assert_eq!(a, chunk_rng(7, 1, 0).next_u64());
        assert_ne!(a, chunk_rng(7, 1, 1).next_u64());
        assert_ne!(a, chunk_rng(7, 2, 0).next_u64());
        assert_ne!(a, chunk_rng(8, 1, 0).next_u64());
    }

    #[test]
    fn index_below_is_in_range_and_covers_it() {
        let mut rng = chunk_rng(1, 0, 0);
        let mut seen = [0usize; 7];
        for _ in 0..7000 {
            let w = rng.next_u32();
            let i = index_below(w, 7, || rng.next_u32());
            seen[i] += 1;
        }
        // Each of 7 cells expects 1000; 5 standard deviations is about 150.
        assert!(seen.iter().all(|&c| (850..1150).contains(&c)), "{seen:?}");
        assert_eq!(index_below(u32::MAX, 1, || 0), 0);
    }
}
