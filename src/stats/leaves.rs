//! Bootstrap resamples of a large set drawn leaf by leaf, with the resamples of each stratum
//! (category) of one column coupled to them.
//!
//! Rows are split into strata (the categories of the set; one stratum when there are none) and
//! each stratum into leaves of at most [`LEAF`] consecutive rows. A resample of the whole set,
//! n rows uniformly with replacement, is drawn in three exact steps:
//!
//! 1. how many of the n draws fall in each stratum: `(M_1..M_s) ~ Multinomial(n; n_c / n)`;
//! 2. how many of a stratum's draws fall in each of its leaves: `Multinomial(M_c; leaf / n_c)`;
//! 3. within a leaf, that many indices uniform on the leaf's rows, from 16-bit words
//!    (Lemire 2019's multiply-shift with rejection, so exactly uniform).
//!
//! Steps 1 and 2 are the aggregation property of the multinomial: the n counts of a uniform
//! resample, summed over a partition of the rows, are multinomial with the parts' shares, and
//! given those totals the draws inside each part are uniform on it. The multinomials are drawn
//! as conditional binomials (Devroye 1986, "Non-Uniform Random Variate Generation", §XI.1.3).
//! The result is the same distribution of resample sums as n independent uniform indices; what
//! it buys is speed: the rows of a leaf (at most 24 KiB for three columns) stay in the core's
//! first-level cache while they are gathered, and six indices come from one 64-bit word. The
//! resamples of one chunk ([`CHUNK`]) first draw all their counts, then take their draws leaf
//! by leaf, every resample drawing from a leaf before the next leaf is read: the set is read
//! from memory once a chunk, not once a resample (a 100,000-row set of three metrics is 2.4 MB,
//! more than a core's second-level cache; drawing resample by resample spent most of its time
//! waiting for those reads).
//!
//! The per-stratum bootstrap (a category's own resample: `n_c` rows of that stratum, uniformly
//! with replacement) reuses the same draws. Both the whole set's resample and the stratum's
//! take uniform draws from the stratum's rows, `M_c` and `n_c` of them; the first
//! `min(M_c, n_c)` are shared, and the `|M_c − n_c|` more that one of them needs are drawn on
//! their own (uniform on the stratum, index by index). Each resample therefore has exactly its
//! own distribution (n uniform rows of the set; `n_c` uniform rows of the stratum), as if drawn
//! separately; the two are only dependent on each other, which no interval of either reads.
//! The stratum resamples then cost about `Σ_c √n_c` draws instead of n.
//!
//! Deterministic for a given `(seed, domain)` whatever the thread count: resamples are drawn
//! in chunks of [`CHUNK`] with one generator per chunk (see [`super::rng`]), and every sum is
//! added in a fixed order.

use super::rng::{chunk_rng, index_below, CHUNK};
use rand::rngs::Xoshiro256PlusPlus;
use rand::Rng;
use rand_distr::{Binomial, Distribution};
use rayon::prelude::*;

/// Rows in a leaf: 1,024 rows of three f64 columns are 24 KiB, within a first-level data
/// cache, and a power of two, so a leaf index never needs a rejection.
pub const LEAF: usize = 1024;

/// Resample sums, drawn leaf by leaf.
pub struct StratifiedSums<const K: usize> {
    /// Per resample, the sum of each column over the n drawn rows.
    pub overall: Vec<[f64; K]>,
    /// Per stratum, per resample: the sum of column `column` over the stratum's own resample
    /// of `n_c` rows.
    pub strata: Vec<Vec<f64>>,
}

/// One stratum's rows, in the set's order.
struct Stratum<const K: usize> {
    rows: Vec<[f64; K]>,
    /// The same rows padded with zeros to four columns: one 256-bit load and add a draw.
    wide: Vec<Wide>,
    leaves: Vec<u64>,
}

/// A row padded to four columns (at most [`WIDE`] columns are resampled together).
type Wide = [f64; WIDE];

/// Columns of a padded row.
const WIDE: usize = 4;

/// Counts `(c_1..c_m) ~ Multinomial(total; w_j / Σ w)` into `out`, by conditional binomials
/// (`c_1 ~ Bin(total, w_1 / Σ w)`, then `c_j ~ Bin(total − c_1 − … − c_{j−1}, w_j / (Σ w − w_1 −
/// … − w_{j−1}))`); the probabilities are ratios of integers, so their remainders are exact.
pub(super) fn multinomial(weights: &[u64], total: u64, out: &mut [u64], rng: &mut impl Rng) {
    let mut rows_left: u64 = weights.iter().sum();
    let mut left = total;
    for (&w, o) in weights.iter().zip(out.iter_mut()) {
        let c = if left == 0 || w == 0 {
            0
        } else if w == rows_left {
            left
        } else {
            // 0 < w < rows_left, so the probability is in (0, 1).
            match Binomial::new(left, w as f64 / rows_left as f64) {
                Ok(b) => b.sample(rng),
                Err(_) => 0,
            }
        };
        *o = c;
        left -= c;
        rows_left -= w;
    }
}

/// Adds `count` rows drawn uniformly from `leaf` (2^BITS rows) into the lanes: each index is
/// BITS bits of a 64-bit word, so it is exactly uniform with no rejection, and one word gives
/// `64 / BITS` of them.
#[inline(always)]
fn draw_pow2<const BITS: u32>(
    leaf: &[Wide],
    count: u64,
    acc: &mut [Wide; LANES],
    rng: &mut Xoshiro256PlusPlus,
) {
    let per = (64 / BITS) as u64;
    let mask = (1u64 << BITS) - 1;
    let leaf = &leaf[..1 << BITS];
    // Sums and generator as locals, so they live in registers through the loop rather than
    // making a round trip through memory on every draw.
    let mut lanes = *acc;
    let mut gen = rng.clone();
    let mut left = count;
    while left >= per {
        let mut w = gen.next_u64();
        for l in 0..per as usize {
            let row = &leaf[(w & mask) as usize];
            w >>= BITS;
            for c in 0..WIDE {
                lanes[l % LANES][c] += row[c];
            }
        }
        left -= per;
    }
    let mut w = gen.next_u64();
    for l in 0..left as usize {
        let row = &leaf[(w & mask) as usize];
        w >>= BITS;
        for c in 0..WIDE {
            lanes[l % LANES][c] += row[c];
        }
    }
    *acc = lanes;
    *rng = gen;
}

/// Adds `count` rows drawn uniformly from `leaf`, whose length is a power of two up to
/// [`LEAF`], into four lanes.
#[inline(always)]
fn draw_leaf(leaf: &[Wide], count: u64, acc: &mut [Wide; LANES], rng: &mut Xoshiro256PlusPlus) {
    if count == 0 {
        return;
    }
    match leaf.len().trailing_zeros() {
        0 => {
            for c in 0..WIDE {
                acc[0][c] += count as f64 * leaf[0][c];
            }
        }
        1 => draw_pow2::<1>(leaf, count, acc, rng),
        2 => draw_pow2::<2>(leaf, count, acc, rng),
        3 => draw_pow2::<3>(leaf, count, acc, rng),
        4 => draw_pow2::<4>(leaf, count, acc, rng),
        5 => draw_pow2::<5>(leaf, count, acc, rng),
        6 => draw_pow2::<6>(leaf, count, acc, rng),
        7 => draw_pow2::<7>(leaf, count, acc, rng),
        8 => draw_pow2::<8>(leaf, count, acc, rng),
        9 => draw_pow2::<9>(leaf, count, acc, rng),
        _ => draw_pow2::<10>(leaf, count, acc, rng),
    }
}

/// A stratum's leaves: as many full leaves of [`LEAF`] rows as fit, then the rest split by
/// the binary digits of its length (e.g. 283 = 256 + 16 + 8 + 2 + 1), so every leaf's length
/// is a power of two. Returns the lengths in row order.
fn leaf_sizes(rows: usize) -> Vec<u64> {
    let mut out = vec![LEAF as u64; rows / LEAF];
    let rest = rows % LEAF;
    for bit in (0..LEAF.trailing_zeros()).rev() {
        if rest & (1 << bit) != 0 {
            out.push(1 << bit);
        }
    }
    out
}

/// Accumulators a draw loop adds into, draw j of a word into lane j mod 8: with six draws a
/// word from a full leaf, each lane waits on one addition a word rather than two, so the loop
/// is bound by its instructions, not by the latency of the additions. Fixed, so the sums do
/// not depend on anything but the draws.
const LANES: usize = 8;

fn lanes<const K: usize>(acc: &[Wide; LANES]) -> [f64; K] {
    std::array::from_fn(|c| {
        ((acc[0][c] + acc[1][c]) + (acc[2][c] + acc[3][c]))
            + ((acc[4][c] + acc[5][c]) + (acc[6][c] + acc[7][c]))
    })
}

/// One chunk's counts and unshared draws, ready for its shared draws.
struct Shared<'a, const K: usize> {
    parts: &'a [Stratum<K>],
    counts: &'a [u64],
    total_leaves: usize,
    leaf_offset: &'a [usize],
    to_overall: &'a [[f64; K]],
    to_stratum: &'a [f64],
    column: usize,
    n_strata: usize,
}

impl<const K: usize> Shared<'_, K> {
    /// The chunk's `nb` resample sums, and each stratum's own sums into `cats`
    /// (`cats[b * n_strata + s]`). Compiled for AVX2 where the CPU has it, so a draw is one
    /// 256-bit load and add; the sums are the same either way (the same additions in the same
    /// order).
    fn draw(&self, nb: usize, cats: &mut [f64], rng: &mut Xoshiro256PlusPlus) -> Vec<[f64; K]> {
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has AVX2 (checked just above).
            return unsafe { self.draw_avx2(nb, cats, rng) };
        }
        self.draw_portable(nb, cats, rng)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn draw_avx2(
        &self,
        nb: usize,
        cats: &mut [f64],
        rng: &mut Xoshiro256PlusPlus,
    ) -> Vec<[f64; K]> {
        self.draw_portable(nb, cats, rng)
    }

    #[inline(always)]
    fn draw_portable(
        &self,
        nb: usize,
        cats: &mut [f64],
        rng: &mut Xoshiro256PlusPlus,
    ) -> Vec<[f64; K]> {
        let n_strata = self.n_strata;
        let mut totals = vec![[0.0f64; K]; nb];
        let mut acc = vec![[[0.0f64; WIDE]; LANES]; nb];
        for (s, p) in self.parts.iter().enumerate() {
            if p.rows.is_empty() {
                continue;
            }
            acc.iter_mut().for_each(|a| *a = [[0.0; WIDE]; LANES]);
            let mut start = 0;
            for (l, &len) in p.leaves.iter().enumerate() {
                let end = start + len as usize;
                let leaf = &p.wide[start..end];
                for (b, a) in acc.iter_mut().enumerate() {
                    let c = self.counts[b * self.total_leaves + self.leaf_offset[s] + l];
                    draw_leaf(leaf, c, a, rng);
                }
                start = end;
            }
            for (b, (a, total)) in acc.iter().zip(totals.iter_mut()).enumerate() {
                let common: [f64; K] = lanes(a);
                let j = b * n_strata + s;
                for c in 0..K {
                    total[c] += common[c] + self.to_overall[j][c];
                }
                cats[j] = common[self.column] + self.to_stratum[j];
            }
        }
        totals
    }
}

/// Resample sums of `rows` (n rows of K columns) and, per stratum, of column `column` over the
/// stratum's own resample (see the module doc). `strata[i]` is row i's stratum, below
/// `n_strata`; a stratum may be empty (its sums are then 0).
pub fn stratified_sums<const K: usize>(
    rows: &[[f64; K]],
    strata: &[u32],
    n_strata: usize,
    column: usize,
    resamples: usize,
    seed: u64,
    domain: u32,
) -> StratifiedSums<K> {
    assert_eq!(rows.len(), strata.len(), "one stratum per row");
    assert!(column < K, "stratum column out of range");
    assert!(K <= WIDE, "at most {WIDE} columns are resampled together");
    let mut parts: Vec<Stratum<K>> = (0..n_strata)
        .map(|_| Stratum {
            rows: Vec::new(),
            wide: Vec::new(),
            leaves: Vec::new(),
        })
        .collect();
    for (r, &s) in rows.iter().zip(strata) {
        parts[s as usize].rows.push(*r);
    }
    for p in &mut parts {
        p.leaves = leaf_sizes(p.rows.len());
        p.wide = p
            .rows
            .iter()
            .map(|r| std::array::from_fn(|c| if c < K { r[c] } else { 0.0 }))
            .collect();
        assert!(
            p.rows.len() <= u32::MAX as usize,
            "more rows than the index generator supports"
        );
    }
    let sizes: Vec<u64> = parts.iter().map(|p| p.rows.len() as u64).collect();
    let n = rows.len() as u64;
    // Where each stratum's leaf counts start in a resample's row of counts.
    let mut leaf_offset = Vec::with_capacity(n_strata);
    let mut total_leaves = 0;
    for p in &parts {
        leaf_offset.push(total_leaves);
        total_leaves += p.leaves.len();
    }
    let mut overall = vec![[0.0f64; K]; resamples];
    // Resample-major: `by_resample[b * n_strata + s]`.
    let mut by_resample = vec![0.0f64; resamples * n_strata];
    overall
        .par_chunks_mut(CHUNK)
        .zip(by_resample.par_chunks_mut(CHUNK * n_strata.max(1)))
        .enumerate()
        .for_each(|(chunk, (slots, cats))| {
            let mut rng = chunk_rng(seed, domain, chunk as u32);
            let nb = slots.len();
            // First every resample's counts (strata, then leaves) and its unshared draws...
            let mut m = vec![0u64; n_strata];
            let mut counts = vec![0u64; nb * total_leaves];
            let mut to_overall = vec![[0.0f64; K]; nb * n_strata];
            let mut to_stratum = vec![0.0f64; nb * n_strata];
            for b in 0..nb {
                multinomial(&sizes, n, &mut m, &mut rng);
                for (s, p) in parts.iter().enumerate() {
                    let n_c = p.rows.len() as u64;
                    if n_c == 0 {
                        continue;
                    }
                    let shared = m[s].min(n_c);
                    let at = b * total_leaves + leaf_offset[s];
                    multinomial(
                        &p.leaves,
                        shared,
                        &mut counts[at..at + p.leaves.len()],
                        &mut rng,
                    );
                    let mut extra = [0.0f64; K];
                    let size = n_c as u32;
                    for _ in 0..m[s].abs_diff(n_c) {
                        let i = index_below(rng.next_u32(), size, || rng.next_u32());
                        for (e, v) in extra.iter_mut().zip(&p.rows[i]) {
                            *e += v;
                        }
                    }
                    if m[s] > n_c {
                        to_overall[b * n_strata + s] = extra;
                    } else {
                        to_stratum[b * n_strata + s] = extra[column];
                    }
                }
            }
            // ...then the shared draws leaf by leaf, every resample of the chunk drawing from a
            // leaf while its rows are in the first-level cache: the set is read from memory once
            // a chunk instead of once a resample.
            let shared = Shared {
                parts: &parts,
                counts: &counts,
                total_leaves,
                leaf_offset: &leaf_offset,
                to_overall: &to_overall,
                to_stratum: &to_stratum,
                column,
                n_strata,
            };
            let totals = shared.draw(nb, cats, &mut rng);
            slots.copy_from_slice(&totals);
        });
    let strata_sums = (0..n_strata)
        .map(|s| {
            (0..resamples)
                .map(|b| by_resample[b * n_strata + s])
                .collect()
        })
        .collect();
    StratifiedSums {
        overall,
        strata: strata_sums,
    }
}

/// Sets of at least this many rows are resampled leaf by leaf by `weigh`, with the
/// categories' resamples coupled to the set's. Below it a whole weighing takes milliseconds
/// either way, and the rows are drawn index by index ([`super::bootstrap::resample_means`]).
pub const MIN_ROWS: usize = 10_000;

/// Resample means from [`stratified_sums`].
#[derive(Debug, Clone, PartialEq)]
pub struct StratifiedMeans {
    /// `columns[c][b]`: the mean of column c over resample b of the whole set.
    pub columns: Vec<Vec<f64>>,
    /// `strata[s][b]`: the mean of the chosen column over stratum s's own resample b (empty
    /// for an empty stratum).
    pub strata: Vec<Vec<f64>>,
}

/// [`stratified_sums`] of one to three columns of equal length n ≥ 1, as means. `strata[i]`
/// is row i's stratum, below `n_strata`; `column` picks the column the strata are resampled
/// on.
pub fn stratified_means(
    columns: &[&[f64]],
    strata: &[u32],
    n_strata: usize,
    column: usize,
    resamples: usize,
    seed: u64,
    domain: u32,
) -> StratifiedMeans {
    fn run<const K: usize>(
        columns: &[&[f64]],
        strata: &[u32],
        n_strata: usize,
        column: usize,
        resamples: usize,
        seed: u64,
        domain: u32,
    ) -> StratifiedMeans {
        let n = columns[0].len();
        assert!(
            columns.iter().all(|c| c.len() == n) && n >= 1,
            "columns differ in length or are empty"
        );
        let rows: Vec<[f64; K]> = (0..n)
            .map(|i| std::array::from_fn(|c| columns[c][i]))
            .collect();
        let sums = stratified_sums(&rows, strata, n_strata, column, resamples, seed, domain);
        let mut sizes = vec![0usize; n_strata];
        for &s in strata {
            sizes[s as usize] += 1;
        }
        let inv_n = 1.0 / n as f64;
        StratifiedMeans {
            columns: (0..K)
                .map(|c| sums.overall.iter().map(|s| s[c] * inv_n).collect())
                .collect(),
            strata: sums
                .strata
                .into_iter()
                .zip(&sizes)
                .map(|(v, &size)| {
                    if size == 0 {
                        Vec::new()
                    } else {
                        let inv = 1.0 / size as f64;
                        v.into_iter().map(|x| x * inv).collect()
                    }
                })
                .collect(),
        }
    }
    match columns.len() {
        1 => run::<1>(columns, strata, n_strata, column, resamples, seed, domain),
        2 => run::<2>(columns, strata, n_strata, column, resamples, seed, domain),
        3 => run::<3>(columns, strata, n_strata, column, resamples, seed, domain),
        k => panic!("stratified_means takes one to three columns, got {k}"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn leaves_are_powers_of_two_covering_the_rows() {
        assert_eq!(leaf_sizes(283), vec![256, 16, 8, 2, 1]);
        assert_eq!(leaf_sizes(2 * LEAF + 5), vec![1024, 1024, 4, 1]);
        assert_eq!(leaf_sizes(0), Vec::<u64>::new());
        for n in [1, 7, 1023, 1024, 1025, 16_667] {
            let l = leaf_sizes(n);
            assert_eq!(l.iter().sum::<u64>(), n as u64);
            assert!(l.iter().all(|s| s.is_power_of_two() && *s <= LEAF as u64));
        }
    }

    #[test]
    fn multinomial_counts_add_up_and_skip_empty_cells() {
        let mut rng = chunk_rng(3, 9, 0);
        let weights = [5u64, 0, 1000, 3, 0, 992];
        let mut out = [0u64; 6];
        let mut first = 0u64;
        for _ in 0..2000 {
            multinomial(&weights, 777, &mut out, &mut rng);
            assert_eq!(out.iter().sum::<u64>(), 777);
            assert_eq!((out[1], out[4]), (0, 0));
            first += out[2];
        }
        // E[c_3] = 777 · 1000/2000 = 388.5; sd of the average of 2,000 ≈ 0.31.
        let avg = first as f64 / 2000.0;
        assert!((avg - 388.5).abs() < 1.6, "{avg}");
    }

    /// Rows with a value column and a column of ones (whose resample sum counts the draws), in
    /// three strata of unequal size, one of them with a partial leaf.
    fn example() -> (Vec<[f64; 2]>, Vec<u32>) {
        let n = 6000;
        let rows = (0..n)
            .map(|i| {
                [
                    ((i * 7919) % 1000) as f64 / 1000.0 + (i % 3) as f64 * 0.1,
                    1.0,
                ]
            })
            .collect();
        let strata = (0..n).map(|i| (i % 3) as u32).collect();
        (rows, strata)
    }

    #[test]
    fn every_resample_draws_exactly_its_rows() {
        let (rows, strata) = example();
        // Stratum column 1 (all ones): the set's resample draws n rows, each stratum's n_c.
        let s = stratified_sums(&rows, &strata, 4, 1, 300, 5, 1);
        assert!(s.overall.iter().all(|x| x[1] == 6000.0));
        for (k, want) in [(0, 2000.0), (1, 2000.0), (2, 2000.0), (3, 0.0)] {
            assert!(s.strata[k].iter().all(|&x| x == want), "stratum {k}");
        }
    }

    #[test]
    fn resample_means_have_the_bootstrap_distribution() {
        // The bootstrap distribution of a mean of n rows has the data's mean and sd σ/√n
        // (σ the population sd of the rows, divisor n): the set's resamples and each
        // stratum's must show both, within Monte Carlo error of 4,000 resamples (the sd
        // within about 2.2 % at one standard error, so 10 % is over four).
        let (rows, strata) = example();
        let col: Vec<f64> = rows.iter().map(|r| r[0]).collect();
        let ones = vec![1.0; rows.len()];
        let b = 4000;
        let m = stratified_means(&[&col, &ones], &strata, 3, 0, b, 11, 1);
        let check = |data: &[f64], boot: &[f64]| {
            let n = data.len() as f64;
            let mean = data.iter().sum::<f64>() / n;
            let sigma = (data.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n).sqrt();
            let want_sd = sigma / n.sqrt();
            let avg = boot.iter().sum::<f64>() / boot.len() as f64;
            let sd = crate::stats::sample_sd(boot).unwrap();
            assert!((avg - mean).abs() < 4.0 * want_sd / (boot.len() as f64).sqrt());
            assert!((sd - want_sd).abs() < 0.1 * want_sd, "{sd} vs {want_sd}");
        };
        check(&col, &m.columns[0]);
        for s in 0..3u32 {
            let part: Vec<f64> = col
                .iter()
                .zip(&strata)
                .filter(|(_, &k)| k == s)
                .map(|(x, _)| *x)
                .collect();
            check(&part, &m.strata[s as usize]);
        }
    }

    #[test]
    fn same_seed_same_resamples_whatever_the_thread_count() {
        let (rows, strata) = example();
        let a = stratified_sums(&rows, &strata, 3, 0, 500, 2, 1);
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let b = pool.install(|| stratified_sums(&rows, &strata, 3, 0, 500, 2, 1));
        assert_eq!(a.overall, b.overall);
        assert_eq!(a.strata, b.strata);
        let c = stratified_sums(&rows, &strata, 3, 0, 500, 3, 1);
        assert_ne!(a.overall, c.overall);
    }
}
