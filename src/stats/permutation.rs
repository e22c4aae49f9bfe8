//! Paired sign-flip permutation test of a mean lift: the lift p-values of `weigh`.
//!
//! Null hypothesis: for every question the two variants' scores are exchangeable, so each
//! difference `d_i` is as likely to have been `−d_i`. Under it, flipping the signs of the `d_i`
//! at random gives the null distribution of `T = Σ d_i` (equivalently of the mean). The test is
//! two-sided: a flip counts as at least as extreme when `|T*| ≥ |T|` (up to a relative
//! tolerance of 1e-9, so ties between equal sums are not lost to rounding).
//!
//! - Monte-Carlo (the usual case): m random flips, `b` of them at least as extreme,
//!   `p = (b + 1) / (m + 1)` (Phipson & Smyth 2010, "Permutation p-values should never be
//!   zero"), which is never 0 and is a valid p-value.
//! - Exact: when the non-zero differences number k with 2^k ≤ m, all 2^k flips are enumerated
//!   and `p = b / 2^k`.
//!
//! Zero differences are left out: flipping them changes nothing. With no non-zero difference,
//! p = 1. `scipy.stats.permutation_test(permutation_type='samples')` computes the same null
//! distribution; its two-sided p-value is `2·min(P(T* ≤ T), P(T* ≥ T))`, which for this
//! symmetric null agrees with ours within Monte-Carlo error.
//!
//! [`sign_flip_tests_by_stratum`] runs the tests of a large set and of each of its categories
//! on one set of flips.

use super::rng::{chunk_rng, CHUNK};
use rand::rngs::Xoshiro256PlusPlus;
use rand::Rng;
use rayon::prelude::*;

/// Short name of this method, as written to summary.json (`p_value_method`).
pub const METHOD: &str = "paired sign-flip permutation test, two-sided, p = (b+1)/(m+1)";

/// The outcome of a sign-flip test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SignFlip {
    pub p_value: f64,
    /// Flips drawn (Monte-Carlo) or enumerated (exact).
    pub flips: u64,
    pub exact: bool,
}

/// Two-sided paired sign-flip test of `mean(diffs) = 0` with `resamples` random flips.
pub fn sign_flip_test(diffs: &[f64], resamples: usize, seed: u64, domain: u32) -> SignFlip {
    let nz: Vec<f64> = diffs.iter().copied().filter(|&d| d != 0.0).collect();
    if nz.is_empty() {
        return SignFlip {
            p_value: 1.0,
            flips: 0,
            exact: true,
        };
    }
    let observed: f64 = nz.iter().sum::<f64>().abs();
    let scale: f64 = nz.iter().map(|d| d.abs()).sum();
    let bar = observed - 1e-9 * scale;
    let k = nz.len();
    if k < 63 && (1u64 << k) <= resamples as u64 {
        let total = 1u64 << k;
        let b = (0..total)
            .into_par_iter()
            .filter(|mask| flipped_sum(&nz, *mask).abs() >= bar)
            .count() as u64;
        return SignFlip {
            p_value: b as f64 / total as f64,
            flips: total,
            exact: true,
        };
    }
    let (groups, singles) = group_magnitudes(&nz);
    let part = [Part {
        groups,
        singles,
        bar,
    }];
    let chunks = resamples.div_ceil(CHUNK);
    let b: u64 = (0..chunks)
        .into_par_iter()
        .map(|chunk| {
            let mut rng = chunk_rng(seed, domain, chunk as u32);
            let count = CHUNK.min(resamples - chunk * CHUNK);
            let mut part_hits = [0u64];
            flip_chunk(&part, f64::INFINITY, count, &mut part_hits, &mut rng);
            part_hits[0]
        })
        .sum();
    SignFlip {
        p_value: (b + 1) as f64 / (resamples + 1) as f64,
        flips: resamples as u64,
        exact: false,
    }
}

/// The sign-flip test of the whole set and of each stratum (category) of it, from the same
/// flips: `None` when the whole set's test would be exact (then test each part on its own).
///
/// Under the null every question's sign is flipped independently with probability ½, so the
/// flips a random sign vector gives one stratum's questions are themselves a random sign
/// vector for that stratum: each stratum's flipped sum is drawn exactly as its own test would
/// draw it, and the whole set's flipped sum is the sum of the strata's. One pass over the
/// questions therefore serves every test. A stratum small enough for the exact test
/// (2^k ≤ `resamples` non-zero differences) gets it, as [`sign_flip_test`] would; an empty
/// stratum gets `None`. `strata[i]` is row i's stratum, below `n_strata`.
pub fn sign_flip_tests_by_stratum(
    diffs: &[f64],
    strata: &[u32],
    n_strata: usize,
    resamples: usize,
    seed: u64,
    domain: u32,
) -> Option<(SignFlip, Vec<Option<SignFlip>>)> {
    assert_eq!(diffs.len(), strata.len(), "one stratum per row");
    let nz_all: Vec<f64> = diffs.iter().copied().filter(|&d| d != 0.0).collect();
    let k = nz_all.len();
    if k == 0 || (k < 63 && (1u64 << k) <= resamples as u64) {
        return None;
    }
    let bar_of = |nz: &[f64]| {
        let observed: f64 = nz.iter().sum::<f64>().abs();
        let scale: f64 = nz.iter().map(|d| d.abs()).sum();
        observed - 1e-9 * scale
    };
    let bar = bar_of(&nz_all);
    let mut rows: Vec<Vec<f64>> = vec![Vec::new(); n_strata];
    for (&d, &s) in diffs.iter().zip(strata) {
        rows[s as usize].push(d);
    }
    // Each stratum's own outcome, when its test is exact; else its flips are counted below.
    let (parts, exact): (Vec<Part>, Vec<Option<SignFlip>>) = rows
        .iter()
        .map(|r| {
            let nz: Vec<f64> = r.iter().copied().filter(|&d| d != 0.0).collect();
            let k = nz.len();
            let exact = (k < 63 && (1u64 << k) <= resamples as u64)
                .then(|| sign_flip_test(&nz, resamples, seed, domain));
            let (groups, singles) = group_magnitudes(&nz);
            let part = Part {
                groups,
                singles,
                bar: bar_of(&nz),
            };
            (part, exact)
        })
        .unzip();
    let chunks = resamples.div_ceil(CHUNK);
    let per_chunk: Vec<(u64, Vec<u64>)> = (0..chunks)
        .into_par_iter()
        .map(|chunk| {
            let mut rng = chunk_rng(seed, domain, chunk as u32);
            let count = CHUNK.min(resamples - chunk * CHUNK);
            let mut part_hits = vec![0u64; parts.len()];
            let hits = flip_chunk(&parts, bar, count, &mut part_hits, &mut rng);
            (hits, part_hits)
        })
        .collect();
    let mut b = 0u64;
    let mut part_b = vec![0u64; parts.len()];
    for (h, ph) in per_chunk {
        b += h;
        for (x, y) in part_b.iter_mut().zip(ph) {
            *x += y;
        }
    }
    let monte_carlo = |b: u64| SignFlip {
        p_value: (b + 1) as f64 / (resamples + 1) as f64,
        flips: resamples as u64,
        exact: false,
    };
    let by_stratum = exact
        .into_iter()
        .zip(&rows)
        .zip(part_b)
        .map(|((e, r), b)| (!r.is_empty()).then(|| e.unwrap_or_else(|| monte_carlo(b))))
        .collect();
    Some((monte_carlo(b), by_stratum))
}

/// The magnitudes of one test's non-zero differences ([`group_magnitudes`]) and the bar its
/// flipped sums are counted against.
struct Part {
    groups: Vec<Group>,
    singles: Vec<f64>,
    bar: f64,
}

/// `count` random flips of every part in turn, from `rng`: adds to `part_hits[i]` the flips
/// whose sum of part i is at least as extreme as its bar, and returns how many flips have the
/// parts' sums together at least as extreme as `bar`. Compiled for AVX2 (and POPCNT) where the
/// CPU has them, so the flip loop runs on 256-bit vectors; the sums are the same either way
/// (the same additions in the same order, lane by lane).
fn flip_chunk(
    parts: &[Part],
    bar: f64,
    count: usize,
    part_hits: &mut [u64],
    rng: &mut Xoshiro256PlusPlus,
) -> u64 {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("popcnt")
    {
        // SAFETY: the CPU has AVX2 and POPCNT (checked just above).
        return unsafe { flip_chunk_avx2(parts, bar, count, part_hits, rng) };
    }
    flip_chunk_with(parts, bar, count, part_hits, rng, singles_sum)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,popcnt")]
unsafe fn flip_chunk_avx2(
    parts: &[Part],
    bar: f64,
    count: usize,
    part_hits: &mut [u64],
    rng: &mut Xoshiro256PlusPlus,
) -> u64 {
    flip_chunk_with(parts, bar, count, part_hits, rng, |singles, rng| {
        // SAFETY: this runs inside flip_chunk_avx2, only called on a CPU with AVX2.
        unsafe { singles_sum_avx2(singles, rng) }
    })
}

/// [`flip_chunk`] with `singles` the flipped sum of a part's single differences.
#[inline(always)]
fn flip_chunk_with(
    parts: &[Part],
    bar: f64,
    count: usize,
    part_hits: &mut [u64],
    rng: &mut Xoshiro256PlusPlus,
    singles: impl Fn(&[f64], &mut Xoshiro256PlusPlus) -> f64,
) -> u64 {
    let mut hits = 0u64;
    for _ in 0..count {
        let mut total = 0.0f64;
        for (p, h) in parts.iter().zip(part_hits.iter_mut()) {
            let t = grouped_sum(&p.groups, rng) + singles(&p.singles, rng);
            if t.abs() >= p.bar {
                *h += 1;
            }
            total += t;
        }
        if total.abs() >= bar {
            hits += 1;
        }
    }
    hits
}

/// One random flip of grouped magnitudes (see [`group_magnitudes`]): their flipped sum. The
/// flip of a part is this plus [`singles_sum`] of its single differences, drawn after it.
#[inline(always)]
fn grouped_sum(groups: &[Group], rng: &mut impl Rng) -> f64 {
    let mut grouped = 0.0f64;
    // Random bits not yet used: a group of fewer than 64 takes its bits from here, so small
    // groups share words instead of each drawing one (most groups are small).
    let mut spare = 0u64;
    let mut spare_bits = 0u32;
    for g in groups {
        let mut left = g.count;
        let mut negative = 0u32;
        while left >= 64 {
            negative += rng.next_u64().count_ones();
            left -= 64;
        }
        if left > 0 {
            if spare_bits < left {
                // The spare bits are too few: use them all, and the rest from a new word.
                negative += spare.count_ones();
                left -= spare_bits;
                spare = rng.next_u64();
                spare_bits = 64;
            }
            negative += (spare & ((1u64 << left) - 1)).count_ones();
            spare = spare.checked_shr(left).unwrap_or(0);
            spare_bits -= left;
        }
        grouped += g.value * (g.count as f64 - 2.0 * negative as f64);
    }
    grouped
}

/// One random flip of single differences: their flipped sum, one random word per 64 of them,
/// added in eight lanes (term j into lane j mod 8) and the lanes summed in a fixed order.
#[inline(always)]
fn singles_sum(singles: &[f64], rng: &mut impl Rng) -> f64 {
    let mut acc = [0.0f64; 8];
    for block in singles.chunks(64) {
        flip_accumulate(&mut acc, block, rng.next_u64());
    }
    lane_total(&acc)
}

fn lane_total(acc: &[f64; 8]) -> f64 {
    ((acc[0] + acc[1]) + (acc[2] + acc[3])) + ((acc[4] + acc[5]) + (acc[6] + acc[7]))
}

/// [`singles_sum`] with the eight lanes in two 256-bit registers: the same additions, lane by
/// lane, in the same order, so the same sum. (Written with intrinsics: the compiler's own
/// vectorisation of the portable loop paired lanes across 128-bit halves.)
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn singles_sum_avx2(singles: &[f64], rng: &mut Xoshiro256PlusPlus) -> f64 {
    use std::arch::x86_64::*;
    let mut lo = _mm256_setzero_pd();
    let mut hi = _mm256_setzero_pd();
    for block in singles.chunks(64) {
        let mask = rng.next_u64();
        let groups = block.chunks_exact(8);
        let rest = groups.remainder();
        let mut g = 0;
        for group in groups {
            let signs = &SIGN_BITS[((mask >> (8 * g)) & 0xff) as usize];
            // SAFETY: `group` holds eight f64 and `signs` eight u64: two unaligned loads of
            // four each from each.
            unsafe {
                let s_lo = _mm256_loadu_pd(signs.as_ptr().cast::<f64>());
                let s_hi = _mm256_loadu_pd(signs.as_ptr().add(4).cast::<f64>());
                let v_lo = _mm256_loadu_pd(group.as_ptr());
                let v_hi = _mm256_loadu_pd(group.as_ptr().add(4));
                lo = _mm256_add_pd(lo, _mm256_xor_pd(v_lo, s_lo));
                hi = _mm256_add_pd(hi, _mm256_xor_pd(v_hi, s_hi));
            }
            g += 1;
        }
        if !rest.is_empty() {
            // Only the last block has a remainder: add it lane by lane, as the portable loop.
            let mut acc = [0.0f64; 8];
            // SAFETY: `acc` holds eight f64: two unaligned stores of four.
            unsafe {
                _mm256_storeu_pd(acc.as_mut_ptr(), lo);
                _mm256_storeu_pd(acc.as_mut_ptr().add(4), hi);
            }
            let signs = &SIGN_BITS[((mask >> (8 * g)) & 0xff) as usize];
            for (l, d) in rest.iter().enumerate() {
                acc[l] += f64::from_bits(d.to_bits() ^ signs[l]);
            }
            // SAFETY: as above, two unaligned loads of four.
            unsafe {
                lo = _mm256_loadu_pd(acc.as_ptr());
                hi = _mm256_loadu_pd(acc.as_ptr().add(4));
            }
        }
    }
    let mut acc = [0.0f64; 8];
    // SAFETY: `acc` holds eight f64: two unaligned stores of four.
    unsafe {
        _mm256_storeu_pd(acc.as_mut_ptr(), lo);
        _mm256_storeu_pd(acc.as_mut_ptr().add(4), hi);
    }
    lane_total(&acc)
}

/// Magnitudes shared by at least this many non-zero differences are flipped as a group.
const GROUP_MIN: u32 = 16;

/// One magnitude `value` = |d| shared by `count` non-zero differences.
struct Group {
    value: f64,
    count: u32,
}

/// Splits the non-zero differences by magnitude. Under the null each `d_i` is `±|d_i|` with
/// probability ½ each, independently, so only the magnitudes matter; the `count` differences
/// that share one magnitude `v` contribute `v · (count − 2K)` to a flipped sum, where
/// `K ~ Binomial(count, ½)` is the number flipped negative, drawn exactly as the number of set
/// bits in `count` random bits. Magnitudes shared by at least [`GROUP_MIN`] differences become
/// [`Group`]s; the others are returned one by one, to be flipped term by term. The order is
/// fixed (by magnitude), so the flipped sums are reproducible.
fn group_magnitudes(nz: &[f64]) -> (Vec<Group>, Vec<f64>) {
    let mut mags: Vec<f64> = nz.iter().map(|d| d.abs()).collect();
    mags.sort_by(|a, b| a.total_cmp(b));
    let mut groups = Vec::new();
    let mut singles = Vec::new();
    for run in mags.chunk_by(|a, b| a.to_bits() == b.to_bits()) {
        match u32::try_from(run.len()) {
            Ok(count) if count >= GROUP_MIN => groups.push(Group {
                value: run[0],
                count,
            }),
            _ => singles.extend_from_slice(run),
        }
    }
    (groups, singles)
}

/// Σ ± block[j], the sign of term j flipped when bit j of `mask` is set (block ≤ 64 long).
/// Flipping is an XOR on the IEEE sign bit, which keeps the loop branch-free.
#[inline(always)]
fn flipped_sum(block: &[f64], mask: u64) -> f64 {
    let mut acc = [0.0f64; 8];
    flip_accumulate(&mut acc, block, mask);
    lane_total(&acc)
}

/// Sign masks for the eight bits of a byte: `SIGN_BITS[b][l]` is the IEEE sign bit when bit l
/// of b is set. Expanding a mask byte by table lookup lets the flip loop run as plain vector
/// XORs and additions.
static SIGN_BITS: [[u64; 8]; 256] = {
    let mut t = [[0u64; 8]; 256];
    let mut b = 0;
    while b < 256 {
        let mut l = 0;
        while l < 8 {
            t[b][l] = (((b >> l) & 1) as u64) << 63;
            l += 1;
        }
        b += 1;
    }
    t
};

/// Adds ± block[j] into eight lane accumulators (term j into lane j mod 8), the sign of term j
/// flipped when bit j of `mask` is set. Fixed lane order keeps the sum reproducible.
#[inline(always)]
fn flip_accumulate(acc: &mut [f64; 8], block: &[f64], mask: u64) {
    let groups = block.chunks_exact(8);
    let rest = groups.remainder();
    let mut g = 0;
    for group in groups {
        let signs = &SIGN_BITS[((mask >> (8 * g)) & 0xff) as usize];
        for l in 0..8 {
            acc[l] += f64::from_bits(group[l].to_bits() ^ signs[l]);
        }
        g += 1;
    }
    if !rest.is_empty() {
        let signs = &SIGN_BITS[((mask >> (8 * g)) & 0xff) as usize];
        for (l, d) in rest.iter().enumerate() {
            acc[l] += f64::from_bits(d.to_bits() ^ signs[l]);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[cfg(target_arch = "x86_64")]
    #[test]
    fn vector_and_portable_single_flips_give_the_same_sums() {
        if !std::arch::is_x86_feature_detected!("avx2") {
            return;
        }
        let mut data_rng = chunk_rng(5, 0, 0);
        for len in [0, 1, 7, 8, 9, 63, 64, 65, 127, 200, 1000, 4099] {
            let singles: Vec<f64> = (0..len)
                .map(|_| (data_rng.next_u64() >> 11) as f64 / (1u64 << 53) as f64 - 0.5)
                .collect();
            let (mut a, mut b) = (chunk_rng(9, 1, len as u32), chunk_rng(9, 1, len as u32));
            for _ in 0..50 {
                let portable = singles_sum(&singles, &mut a);
                // SAFETY: the CPU has AVX2 (checked above).
                let vector = unsafe { singles_sum_avx2(&singles, &mut b) };
                assert_eq!(portable.to_bits(), vector.to_bits(), "{len} singles");
            }
        }
    }

    #[test]
    fn no_difference_gives_one() {
        assert_eq!(sign_flip_test(&[0.0; 10], 1000, 1, 1).p_value, 1.0);
        assert_eq!(sign_flip_test(&[], 1000, 1, 1).p_value, 1.0);
    }

    #[test]
    fn exact_enumeration_by_hand() {
        // Three positive differences 1, 2, 3: T = 6. Of the 8 flips only (+,+,+) and (−,−,−)
        // reach |T*| = 6, so p = 2/8 (worked by hand).
        let r = sign_flip_test(&[1.0, 0.0, 2.0, 3.0], 1000, 1, 1);
        assert!(r.exact);
        assert_eq!(r.flips, 8);
        assert!((r.p_value - 0.25).abs() < 1e-15);
        // Ties: 1, 1 → T = 2; flips give 2, 0, 0, −2 → p = 2/4.
        assert!((sign_flip_test(&[1.0, 1.0], 1000, 1, 1).p_value - 0.5).abs() < 1e-15);
    }

    #[test]
    fn monte_carlo_matches_exact_within_error() {
        // 12 non-zero differences: exact with 4096 ≤ m, Monte-Carlo with m = 4000 < 4096.
        let d = [
            0.4, 0.1, -0.2, 0.3, 0.5, 0.05, -0.1, 0.2, 0.25, 0.15, -0.05, 0.35,
        ];
        let exact = sign_flip_test(&d, 5000, 3, 1);
        let mc = sign_flip_test(&d, 4000, 3, 1);
        assert!(exact.exact && !mc.exact);
        // Binomial standard error of p at m = 4000 is below 0.008; allow 4 of them.
        assert!(
            (exact.p_value - mc.p_value).abs() < 0.032,
            "{exact:?} {mc:?}"
        );
    }

    #[test]
    fn deterministic_across_thread_counts() {
        let d: Vec<f64> = (0..300)
            .map(|i| ((i * 13 % 17) as f64 - 7.5) / 20.0)
            .collect();
        let a = sign_flip_test(&d, 2000, 9, 4);
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let b = pool.install(|| sign_flip_test(&d, 2000, 9, 4));
        assert_eq!(a, b);
    }

    #[test]
    fn grouped_magnitudes_match_the_binomial_null() {
        // 300 differences of +1 and 200 of −1 (one magnitude, flipped as a group), plus three
        // distinct small ones flipped term by term. T = 100 + 0.003. Under the null the ±1 part
        // is 500 − 2K with K ~ Binomial(500, ½), so (the small terms shift |T*| by at most
        // 0.006 and the ±1 part is even) p = P(|500 − 2K| ≥ 100) = 2·P(K ≤ 200), computed
        // here from the binomial pmf (textbook definition).
        let mut d = vec![1.0; 300];
        d.extend(std::iter::repeat_n(-1.0, 200));
        d.extend([0.001, 0.0015, 0.0005]);
        let mut pmf = 0.5f64.powi(500);
        let mut tail = pmf;
        for k in 1..=200 {
            pmf *= (500 - k + 1) as f64 / k as f64;
            tail += pmf;
        }
        let want = 2.0 * tail;
        let got = sign_flip_test(&d, 20_000, 5, 2);
        assert!(!got.exact);
        // want ≈ 1e-5: with m = 20,000 almost no flip reaches T, so p is (b+1)/(m+1).
        assert!(got.p_value < 5.0 / 20_001.0, "{got:?} vs {want}");
        // A weaker lift: 260 of +1, 240 of −1, T = 20: p = 2·P(K ≤ 240) ≈ 0.39.
        let mut d = vec![1.0; 260];
        d.extend(std::iter::repeat_n(-1.0, 240));
        let mut pmf = 0.5f64.powi(500);
        let mut tail = pmf;
        for k in 1..=240 {
            pmf *= (500 - k + 1) as f64 / k as f64;
            tail += pmf;
        }
        let want = 2.0 * tail;
        let got = sign_flip_test(&d, 20_000, 5, 2);
        // Binomial standard error of p at m = 20,000 is below 0.0035; allow 4 of them.
        assert!((got.p_value - want).abs() < 0.014, "{got:?} vs {want}");
    }

    #[test]
    fn small_groups_sharing_words_are_independent_binomials() {
        // Groups of 20 and 30 (each fewer than 64, so they share random words): in
        // T = 1·(20 − 2K₁) + 1000·(30 − 2K₂) the two counts can be read back, and each must
        // be Binomial(n, ½) (mean n/2, variance n/4) and uncorrelated with the other.
        let groups = [
            Group {
                value: 1.0,
                count: 20,
            },
            Group {
                value: 1000.0,
                count: 30,
            },
        ];
        let mut rng = chunk_rng(11, 3, 0);
        let draws = 200_000;
        let (mut s1, mut s2, mut q1, mut q2, mut c12) = (0.0, 0.0, 0.0, 0.0, 0.0);
        for _ in 0..draws {
            let t = grouped_sum(&groups, &mut rng);
            let big = (t / 1000.0).round();
            let k2 = (30.0 - big) / 2.0;
            let k1 = (20.0 - (t - 1000.0 * big)) / 2.0;
            assert!(k1.fract() == 0.0 && (0.0..=20.0).contains(&k1), "{t}");
            assert!(k2.fract() == 0.0 && (0.0..=30.0).contains(&k2), "{t}");
            s1 += k1;
            s2 += k2;
            q1 += k1 * k1;
            q2 += k2 * k2;
            c12 += k1 * k2;
        }
        let n = draws as f64;
        let (m1, m2) = (s1 / n, s2 / n);
        let (v1, v2) = (q1 / n - m1 * m1, q2 / n - m2 * m2);
        let cov = c12 / n - m1 * m2;
        // Standard errors at 200,000 draws: mean ~0.005, variance ~0.02, covariance ~0.01.
        assert!(
            (m1 - 10.0).abs() < 0.03 && (m2 - 15.0).abs() < 0.03,
            "{m1} {m2}"
        );
        assert!(
            (v1 - 5.0).abs() < 0.1 && (v2 - 7.5).abs() < 0.15,
            "{v1} {v2}"
        );
        assert!(cov.abs() < 0.06, "{cov}");
    }

    #[test]
    fn strata_share_flips_and_keep_each_test() {
        // Three strata: a clear lift, no lift, and four differences (exact: 16 flips ≤ m).
        // Each p-value from the shared flips must agree with the stratum's own test within
        // Monte Carlo error, and the whole set's with its own.
        let mut diffs = Vec::new();
        let mut strata = Vec::new();
        for i in 0..3000 {
            let x = ((i * 7919) % 997) as f64 / 997.0 - 0.5;
            let (d, s) = match i % 3 {
                0 => (x + 0.03, 0),
                1 => (x, 1),
                _ => (x * 0.5 + 0.01, 2),
            };
            diffs.push(d);
            strata.push(s);
        }
        diffs.extend([0.5, -0.25, 0.125, 1.0]);
        strata.extend([3, 3, 3, 3]);
        let m = 20_000;
        let (all, parts) = sign_flip_tests_by_stratum(&diffs, &strata, 5, m, 3, 7).unwrap();
        let own = sign_flip_test(&diffs, m, 3, 8);
        // Binomial standard error of p at m = 20,000 is below 0.0036; allow 4 of them.
        assert!(
            (all.p_value - own.p_value).abs() < 0.0144,
            "{all:?} {own:?}"
        );
        for s in 0..4u32 {
            let d: Vec<f64> = diffs
                .iter()
                .zip(&strata)
                .filter(|(_, &k)| k == s)
                .map(|(d, _)| *d)
                .collect();
            let want = sign_flip_test(&d, m, 3, 100 + s);
            let got = parts[s as usize].unwrap();
            assert_eq!(got.exact, want.exact);
            assert!(
                (got.p_value - want.p_value).abs() < 0.0144,
                "{s}: {got:?} {want:?}"
            );
        }
        // Stratum 3 is exact: T = 1 + 0.5 + 0.125 − 0.25 = 1.375. |T*| reaches it for
        // ±(1 + a) with a = ±0.5 ± 0.25 ± 0.125 ≥ 0.375, that is a = 0.875, 0.625 or 0.375:
        // 6 of the 16 flips (worked by hand), p = 6/16.
        assert_eq!(parts[3].unwrap().p_value, 0.375);
        assert_eq!(parts[4], None);
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let again = pool.install(|| sign_flip_tests_by_stratum(&diffs, &strata, 5, m, 3, 7));
        assert_eq!(again, Some((all, parts)));
        // A set with a handful of non-zero differences is left to the exact test.
        assert_eq!(
            sign_flip_tests_by_stratum(&[1.0, 0.0, 2.0], &[0, 0, 1], 2, m, 3, 7),
            None
        );
    }
}
