//! Paired bootstrap of a mean lift, with percentile and BCa intervals.
//!
//! Setting: n questions answered by both variants; `d_i` = candidate score − baseline score on
//! question i. The lift is the mean `d̄`. Questions are assumed exchangeable draws from the
//! population of questions the set stands for; the pairing (both variants on the same
//! question) is kept by resampling whole questions, so the bootstrap of `d̄` is the paired
//! bootstrap of the difference of means (what `scipy.stats.bootstrap(..., paired=True)` does).
//!
//! A resample draws n question indices uniformly with replacement and takes the mean of the
//! drawn `d_i`. With B resamples `θ*_1..θ*_B`:
//!
//! - **percentile** interval (Efron & Tibshirani 1993, §13.3): the α/2 and 1 − α/2 quantiles of
//!   the θ*, α = 1 − confidence, quantiles by linear interpolation between order statistics
//!   (position p·(B − 1), NumPy's default, as scipy uses);
//! - **BCa** interval (Efron 1987, "Better bootstrap confidence intervals", JASA 82:171–185):
//!   bias correction `z0 = Φ⁻¹(#{θ*_b < d̄} / B)`, acceleration from the jackknife, which for a
//!   mean has the closed form `a = Σ c_i³ / (6 (Σ c_i²)^{3/2})` with `c_i = d_i − d̄` (the
//!   jackknife influence values `(n−1)(θ̄_(·) − θ_(i))` of a mean equal `c_i`, so no O(n²)
//!   leave-one-out loop is needed); the interval is the quantiles at
//!   `α1 = Φ(z0 + (z0 + z_{α/2}) / (1 − a (z0 + z_{α/2})))` and likewise α2 with `z_{1−α/2}`.
//!
//! Degenerate cases, handled explicitly: all `d_i` equal (or n = 1) → every resample equals the
//! estimate and both intervals have zero width at it; when every resample lies on one side of
//! the estimate (z0 would be ±∞, scipy returns NaN) the share in `z0` is clamped to
//! `[1/(2B), 1 − 1/(2B)]`, documented in [`Lift::bca_clamped`].
//!
//! Several metrics can be resampled jointly ([`resample_means`]): the same drawn indices serve
//! every column, which keeps the metrics' intervals consistent with each other and costs one
//! index draw per question per resample whatever the number of metrics.
//!
//! When the rows take few distinct values (a 0/1 score, fact recall over a handful of facts, a
//! large set of short answers), a resample is drawn as counts over the distinct rows instead of
//! index by index ([`distinct_rows`], [`multinomial_chunk`]): the same distribution of resample
//! means at a cost that grows with the number of distinct rows, not with n.
//!
//! A large set's metrics and categories are resampled together by [`super::leaves`] instead
//! (`weigh` chooses): the same distributions, drawn leaf by leaf.

use super::rng::{chunk_rng, index_below, CHUNK};
use super::{normal_cdf, normal_quantile, Interval};
use rand::Rng;
use rand_distr::{Binomial, Distribution};
use rayon::prelude::*;

/// The bootstrap summary of one mean lift.
#[derive(Debug, Clone, PartialEq)]
pub struct Lift {
    /// The observed mean difference d̄.
    pub estimate: f64,
    pub percentile: Interval,
    pub bca: Interval,
    /// BCa bias correction z0 (0 when degenerate).
    pub z0: f64,
    /// BCa acceleration a (0 when degenerate).
    pub acceleration: f64,
    /// True when every resample fell on one side of the estimate and z0 was clamped.
    pub bca_clamped: bool,
    /// Number of bootstrap resamples.
    pub resamples: usize,
}

/// For each column, the mean of every bootstrap resample: `out[c][b]` is the mean of column
/// `c` over the indices drawn for resample `b`. All columns must have the same length n ≥ 1;
/// resample b uses the same indices in every column. Deterministic for a given
/// `(seed, domain)` whatever the thread count (see [`super::rng`]).
pub fn resample_means(
    columns: &[&[f64]],
    resamples: usize,
    seed: u64,
    domain: u32,
) -> Vec<Vec<f64>> {
    let k = columns.len();
    if k == 0 || resamples == 0 {
        return vec![Vec::new(); k];
    }
    let n = columns[0].len();
    assert!(n >= 1, "resample_means needs at least one row");
    assert!(
        columns.iter().all(|c| c.len() == n),
        "columns differ in length"
    );
    assert!(
        n <= u32::MAX as usize,
        "more rows than the index generator supports"
    );
    let inv_n = 1.0 / n as f64;
    fn split<const K: usize>(sums: Vec<[f64; K]>, inv_n: f64) -> Vec<Vec<f64>> {
        (0..K)
            .map(|c| sums.iter().map(|s| s[c] * inv_n).collect())
            .collect()
    }
    match k {
        1 => split(
            sums_k::<1>(&interleave::<1>(columns), resamples, seed, domain),
            inv_n,
        ),
        2 => split(
            sums_k::<2>(&interleave::<2>(columns), resamples, seed, domain),
            inv_n,
        ),
        3 => split(
            sums_k::<3>(&interleave::<3>(columns), resamples, seed, domain),
            inv_n,
        ),
        _ => {
            // Rare: more than three columns; resample them three at a time on the same streams
            // (the same indices while the rows are drawn index by index).
            let mut out = Vec::with_capacity(k);
            for group in columns.chunks(3) {
                out.extend(resample_means(group, resamples, seed, domain));
            }
            out
        }
    }
}

/// The distinct rows and how often each occurs, the most frequent first (then by value, so the
/// order is fixed). Rows are equal when every column is bit for bit equal.
fn distinct_rows<const K: usize>(rows: &[[f64; K]]) -> Vec<([f64; K], u64)> {
    let key = |r: &[f64; K]| -> [u64; K] { std::array::from_fn(|c| r[c].to_bits()) };
    let mut sorted: Vec<[u64; K]> = rows.iter().map(key).collect();
    sorted.sort_unstable();
    let mut out: Vec<([f64; K], u64)> = sorted
        .chunk_by(|a, b| a == b)
        .map(|run| {
            (
                std::array::from_fn(|c| f64::from_bits(run[0][c])),
                run.len() as u64,
            )
        })
        .collect();
    out.sort_by(|a, b| b.1.cmp(&a.1).then_with(|| key(&a.0).cmp(&key(&b.0))));
    out
}

/// Rows per distinct row above which resampling by counts over the distinct rows is used.
/// One binomial draw (rand_distr's BTPE, with its set-up) costs about as much as a few dozen
/// uniform index draws; 32 keeps the counts path to where it is clearly cheaper.
const ROWS_PER_DISTINCT: usize = 32;

/// Resample sums by counts over the distinct rows.
///
/// Why the distribution is unchanged: a resample of n rows drawn uniformly with replacement
/// gives each row a count, `(c_1..c_n) ~ Multinomial(n; 1/n, ..., 1/n)`, and its sum is
/// `Σ_i c_i x_i`. Rows with equal values contribute only through the total count of their
/// group, and by the aggregation property of the multinomial the group totals are
/// `(C_1..C_m) ~ Multinomial(n; w_1/n, ..., w_m/n)` (`w_j` rows share value `v_j`); the sum
/// `Σ_j C_j v_j` is the same random variable. The group totals are drawn exactly as
/// conditional binomials (Devroye 1986, "Non-Uniform Random Variate Generation", §XI.1.3:
/// `C_1 ~ Bin(n, p_1)`, then `C_j ~ Bin(n − C_1 − … − C_{j−1}, p_j / (1 − p_1 − … − p_{j−1}))`),
/// the most frequent group first so the remaining count shrinks fast; only rounding in the
/// final sum differs from adding the drawn rows one by one.
fn multinomial_chunk<const K: usize>(
    groups: &[([f64; K], u64)],
    n: u64,
    slots: &mut [[f64; K]],
    rng: &mut impl Rng,
) {
    // Weights as integers, the probabilities' remainders exact: p_j / (1 − Σ_{<j} p) is
    // w_j / (rows not yet in an earlier group).
    let mut after: Vec<u64> = Vec::with_capacity(groups.len());
    let mut left = n;
    for g in groups {
        after.push(left);
        left -= g.1;
    }
    for slot in slots.iter_mut() {
        let mut acc = [0.0f64; K];
        let mut draws_left = n;
        for (g, &rows_left) in groups.iter().zip(&after) {
            if draws_left == 0 {
                break;
            }
            let count = if g.1 == rows_left {
                draws_left
            } else {
                // 0 < w_j < rows_left here, so the probability is in (0, 1).
                match Binomial::new(draws_left, g.1 as f64 / rows_left as f64) {
                    Ok(b) => b.sample(rng),
                    Err(_) => 0,
                }
            };
            let w = count as f64;
            for (a, v) in acc.iter_mut().zip(&g.0) {
                *a += w * v;
            }
            draws_left -= count;
        }
        *slot = acc;
    }
}

/// Rows above this many bytes whose values repeat (at least two rows per distinct row, at most
/// 65,536 distinct rows) are resampled through [`grouped_chunk`]: the random reads then go to a
/// 2-byte group id a row instead of the rows themselves, a table small enough for the
/// core's cache (a 100,000-row, 3-metric set is 2.4 MB of rows but 0.2 MB of ids).
const GROUPED_MIN_BYTES: usize = 1024 * 1024;

/// Each row's position in `groups` (as [`distinct_rows`] made them).
fn group_ids<const K: usize>(rows: &[[f64; K]], groups: &[([f64; K], u64)]) -> Vec<u16> {
    let key = |r: &[f64; K]| -> [u64; K] { std::array::from_fn(|c| r[c].to_bits()) };
    let index: std::collections::HashMap<[u64; K], u16> = groups
        .iter()
        .enumerate()
        .map(|(g, (v, _))| (key(v), g as u16))
        .collect();
    rows.iter().map(|r| index[&key(r)]).collect()
}

/// Resample sums from the same index draws as [`gather_chunk`] (two 32-bit words of each
/// 64-bit draw, low then high), counted per group of equal rows and summed as
/// `Σ_g count_g · value_g`: the same resample as adding the drawn rows, up to the order of the
/// floating-point additions.
fn grouped_chunk<const K: usize>(
    ids: &[u16],
    groups: &[([f64; K], u64)],
    slots: &mut [[f64; K]],
    rng: &mut impl Rng,
) {
    let n = ids.len() as u32;
    let mut counts = vec![0u32; groups.len()];
    for slot in slots.iter_mut() {
        counts.fill(0);
        let mut left = n as usize;
        while left >= 2 {
            let w = rng.next_u64();
            let i = index_below(w as u32, n, || rng.next_u32());
            let j = index_below((w >> 32) as u32, n, || rng.next_u32());
            counts[ids[i] as usize] += 1;
            counts[ids[j] as usize] += 1;
            left -= 2;
        }
        if left == 1 {
            let i = index_below(rng.next_u32(), n, || rng.next_u32());
            counts[ids[i] as usize] += 1;
        }
        let mut acc = [[0.0f64; K]; 4];
        for (q, cs) in groups.chunks(4).zip(counts.chunks(4)) {
            for (l, (g, &c)) in q.iter().zip(cs).enumerate() {
                let w = c as f64;
                for (a, v) in acc[l].iter_mut().zip(&g.0) {
                    *a += w * v;
                }
            }
        }
        *slot = std::array::from_fn(|c| (acc[0][c] + acc[1][c]) + (acc[2][c] + acc[3][c]));
    }
}

fn interleave<const K: usize>(columns: &[&[f64]]) -> Vec<[f64; K]> {
    let n = columns[0].len();
    (0..n)
        .map(|i| std::array::from_fn(|c| columns[c][i]))
        .collect()
}

/// Rows up to this many bytes are resampled by direct gathers: the random reads are served
/// from the last-level cache, which measured faster than the counts pass for a 100,000-row,
/// 3-metric set (2.4 MB). Larger rows go through counts (see [`sums_k`]).
const GATHER_BYTES: usize = 8 * 1024 * 1024;

/// Resample sums by adding the drawn rows in draw order (small data), four lanes
/// (draws 4j..4j+3 into lanes 0..3) so the additions overlap.
fn gather_chunk<const K: usize>(rows: &[[f64; K]], slots: &mut [[f64; K]], rng: &mut impl Rng) {
    let n = rows.len() as u32;
    for slot in slots.iter_mut() {
        let mut acc = [[0.0f64; K]; 4];
        let mut left = n as usize;
        while left >= 4 {
            let w1 = rng.next_u64();
            let w2 = rng.next_u64();
            let idx = [
                index_below(w1 as u32, n, || rng.next_u32()),
                index_below((w1 >> 32) as u32, n, || rng.next_u32()),
                index_below(w2 as u32, n, || rng.next_u32()),
                index_below((w2 >> 32) as u32, n, || rng.next_u32()),
            ];
            for l in 0..4 {
                for c in 0..K {
                    acc[l][c] += rows[idx[l]][c];
                }
            }
            left -= 4;
        }
        while left > 0 {
            let i = index_below(rng.next_u32(), n, || rng.next_u32());
            for c in 0..K {
                acc[0][c] += rows[i][c];
            }
            left -= 1;
        }
        *slot = std::array::from_fn(|c| (acc[0][c] + acc[1][c]) + (acc[2][c] + acc[3][c]));
    }
}

/// Resample sums, one `[f64; K]` per resample, chunk by chunk in parallel.
///
/// Rows with few distinct values (at least [`ROWS_PER_DISTINCT`] rows per distinct row) are
/// resampled by counts over the distinct rows ([`multinomial_chunk`]); otherwise rows that fit
/// [`GATHER_BYTES`] are resampled by [`gather_chunk`], and larger data as follows.
/// A resample is drawn as a vector of counts (how often each row was drawn: n uniform indices,
/// 32 random bits each), then summed as `Σ_i count_i · row_i` in row order. This gives the same
/// resample as adding the drawn rows one by one, but the random accesses go to a small array of
/// counts that stays in cache instead of to the rows, and the sum is one sequential pass, in a
/// fixed order, so it is reproducible.
fn sums_k<const K: usize>(
    rows: &[[f64; K]],
    resamples: usize,
    seed: u64,
    domain: u32,
) -> Vec<[f64; K]> {
    let n = rows.len() as u32;
    let mut out = vec![[0.0f64; K]; resamples];
    let groups = distinct_rows(rows);
    let by_counts = groups.len() * ROWS_PER_DISTINCT <= rows.len();
    let ids = (!by_counts
        && rows.len() * K * 8 > GROUPED_MIN_BYTES
        && groups.len() <= u16::MAX as usize + 1
        && groups.len() * 2 <= rows.len())
    .then(|| group_ids(rows, &groups));
    out.par_chunks_mut(CHUNK)
        .enumerate()
        .for_each(|(chunk, slots)| {
            let mut rng = chunk_rng(seed, domain, chunk as u32);
            if by_counts {
                multinomial_chunk(&groups, n as u64, slots, &mut rng);
                return;
            }
            if let Some(ids) = &ids {
                grouped_chunk(ids, &groups, slots, &mut rng);
                return;
            }
            if rows.len() * K * 8 <= GATHER_BYTES {
                gather_chunk(rows, slots, &mut rng);
                return;
            }
            let mut counts = vec![0u32; n as usize];
            for slot in slots.iter_mut() {
                counts.iter_mut().for_each(|c| *c = 0);
                let mut left = n as usize;
                while left >= 2 {
                    let w = rng.next_u64();
                    let i = index_below(w as u32, n, || rng.next_u32());
                    let j = index_below((w >> 32) as u32, n, || rng.next_u32());
                    counts[i] += 1;
                    counts[j] += 1;
                    left -= 2;
                }
                if left == 1 {
                    let i = index_below(rng.next_u32(), n, || rng.next_u32());
                    counts[i] += 1;
                }
                // Four lanes (rows 4j..4j+3 into lanes 0..3) so the additions overlap.
                let mut acc = [[0.0f64; K]; 4];
                let quads = rows.chunks_exact(4);
                let tail = quads.remainder();
                for (q, cs) in quads.zip(counts.chunks_exact(4)) {
                    for l in 0..4 {
                        let w = cs[l] as f64;
                        for c in 0..K {
                            acc[l][c] += w * q[l][c];
                        }
                    }
                }
                let base = rows.len() - tail.len();
                for (l, row) in tail.iter().enumerate() {
                    let w = counts[base + l] as f64;
                    for c in 0..K {
                        acc[l][c] += w * row[c];
                    }
                }
                *slot = std::array::from_fn(|c| (acc[0][c] + acc[1][c]) + (acc[2][c] + acc[3][c]));
            }
        });
    out
}

/// Percentile and BCa intervals for the mean of `diffs` from its bootstrap resample means
/// `boot` (as made by [`resample_means`]). `confidence` in (0, 1). `diffs` must be non-empty.
pub fn lift_intervals(diffs: &[f64], boot: &[f64], confidence: f64) -> Lift {
    let n = diffs.len();
    assert!(
        n >= 1 && !boot.is_empty(),
        "lift_intervals needs data and resamples"
    );
    let estimate = diffs.iter().sum::<f64>() / n as f64;
    let all_equal = diffs.iter().all(|&d| d == diffs[0]);
    if all_equal {
        return Lift {
            estimate,
            percentile: Interval::point(estimate),
            bca: Interval::point(estimate),
            z0: 0.0,
            acceleration: 0.0,
            bca_clamped: false,
            resamples: boot.len(),
        };
    }
    let mut sorted = boot.to_vec();
    sorted.sort_by(|a, b| a.total_cmp(b));
    let alpha = (1.0 - confidence) / 2.0;
    let percentile = Interval {
        low: quantile_sorted(&sorted, alpha),
        high: quantile_sorted(&sorted, 1.0 - alpha),
    };

    let b = sorted.len() as f64;
    let below = sorted.partition_point(|&x| x < estimate) as f64;
    let lo_share = 0.5 / b;
    let share = below / b;
    let bca_clamped = !(lo_share..=1.0 - lo_share).contains(&share);
    let z0 = normal_quantile(share.clamp(lo_share, 1.0 - lo_share));
    let acceleration = jackknife_acceleration_of_mean(diffs);
    let adjusted = |z_alpha: f64| {
        let s = z0 + z_alpha;
        normal_cdf(z0 + s / (1.0 - acceleration * s))
    };
    let a1 = adjusted(normal_quantile(alpha));
    let a2 = adjusted(normal_quantile(1.0 - alpha));
    let bca = Interval {
        low: quantile_sorted(&sorted, a1),
        high: quantile_sorted(&sorted, a2),
    };
    Lift {
        estimate,
        percentile,
        bca,
        z0,
        acceleration,
        bca_clamped,
        resamples: boot.len(),
    }
}

/// Bootstrap a single lift: [`resample_means`] on one column, then [`lift_intervals`].
pub fn paired_bootstrap(
    diffs: &[f64],
    resamples: usize,
    confidence: f64,
    seed: u64,
    domain: u32,
) -> Lift {
    let boot = resample_means(&[diffs], resamples, seed, domain)
        .pop()
        .unwrap_or_default();
    lift_intervals(diffs, &boot, confidence)
}

/// The BCa acceleration of a mean by the jackknife, closed form (see the module doc):
/// `a = Σ c³ / (6 (Σ c²)^{3/2})`, `c_i = d_i − d̄`; 0 when every `c_i` is 0.
pub fn jackknife_acceleration_of_mean(diffs: &[f64]) -> f64 {
    let n = diffs.len() as f64;
    let m = diffs.iter().sum::<f64>() / n;
    let (mut s2, mut s3) = (0.0, 0.0);
    for &d in diffs {
        let c = d - m;
        s2 += c * c;
        s3 += c * c * c;
    }
    if s2 == 0.0 {
        0.0
    } else {
        s3 / (6.0 * s2.powf(1.5))
    }
}

/// Quantile `p` of sorted data by linear interpolation at position p·(len − 1) (NumPy's
/// default "linear" method). `p` is clamped to [0, 1].
pub fn quantile_sorted(sorted: &[f64], p: f64) -> f64 {
    let last = sorted.len() - 1;
    let pos = p.clamp(0.0, 1.0) * last as f64;
    let lo = pos.floor() as usize;
    let hi = (lo + 1).min(last);
    let frac = pos - lo as f64;
    sorted[lo] + (sorted[hi] - sorted[lo]) * frac
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantiles_interpolate_like_numpy() {
        // numpy.percentile([1, 2, 3, 4], [0, 25, 50, 90, 100]) = [1, 1.75, 2.5, 3.7, 4].
        let s = [1.0, 2.0, 3.0, 4.0];
        for (p, want) in [(0.0, 1.0), (0.25, 1.75), (0.5, 2.5), (0.9, 3.7), (1.0, 4.0)] {
            assert!((quantile_sorted(&s, p) - want).abs() < 1e-12, "p={p}");
        }
    }

    #[test]
    fn all_equal_differences_give_zero_width_intervals() {
        for diffs in [vec![0.25; 40], vec![0.0; 3], vec![-1.0]] {
            let lift = paired_bootstrap(&diffs, 2000, 0.95, 7, 1);
            assert_eq!(lift.percentile, Interval::point(diffs[0]));
            assert_eq!(lift.bca, Interval::point(diffs[0]));
            assert!(lift.estimate == diffs[0]);
        }
    }

    #[test]
    fn acceleration_closed_form_matches_leave_one_out() {
        // Definition (Efron 1987, eq. 6.6): u_i = (n−1)(θ̄(·) − θ(i)) from leave-one-out means.
        let d = [0.3, -0.1, 0.0, 0.9, 0.2, -0.4, 0.5, 0.5];
        let n = d.len();
        let loo: Vec<f64> = (0..n)
            .map(|i| (d.iter().sum::<f64>() - d[i]) / (n - 1) as f64)
            .collect();
        let dot = loo.iter().sum::<f64>() / n as f64;
        let u: Vec<f64> = loo.iter().map(|t| (n - 1) as f64 * (dot - t)).collect();
        let a = u.iter().map(|x| x.powi(3)).sum::<f64>()
            / (6.0 * u.iter().map(|x| x * x).sum::<f64>().powf(1.5));
        assert!((a - jackknife_acceleration_of_mean(&d)).abs() < 1e-12);
    }

    #[test]
    fn same_seed_same_result_and_independent_of_threads() {
        let d: Vec<f64> = (0..500)
            .map(|i| ((i * 37 % 101) as f64 - 50.0) / 100.0)
            .collect();
        let one = paired_bootstrap(&d, 3000, 0.95, 11, 1);
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let single = pool.install(|| paired_bootstrap(&d, 3000, 0.95, 11, 1));
        assert_eq!(one, single);
        let other = paired_bootstrap(&d, 3000, 0.95, 12, 1);
        assert_ne!(one.percentile, other.percentile);
    }

    #[test]
    fn joint_columns_share_indices() {
        // Column 2 is column 1 times two, so each resample mean is exactly doubled.
        let a: Vec<f64> = (0..97).map(|i| (i % 5) as f64 / 4.0).collect();
        let b: Vec<f64> = a.iter().map(|x| 2.0 * x).collect();
        let m = resample_means(&[&a, &b], 500, 3, 1);
        for (x, y) in m[0].iter().zip(&m[1]) {
            assert!((2.0 * x - y).abs() < 1e-12);
        }
        // A single column on the same stream draws the same indices.
        let single = resample_means(&[&a], 500, 3, 1);
        assert_eq!(single[0], m[0]);
    }

    #[test]
    fn large_data_goes_through_counts_with_the_same_guarantees() {
        // 360,000 rows × 3 columns = 8.6 MB > GATHER_BYTES: the counts path (100,000
        // distinct values, too many for counts over distinct rows).
        let rows = 360_000;
        let a: Vec<f64> = (0..rows)
            .map(|i| ((i * 7919) % 100_000) as f64 / 100_000.0 - 0.4)
            .collect();
        let b: Vec<f64> = a.iter().map(|x| 2.0 * x).collect();
        let c: Vec<f64> = a.iter().map(|x| -x).collect();
        assert!(rows * 3 * 8 > GATHER_BYTES);
        let m = resample_means(&[&a, &b, &c], 64, 5, 1);
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        assert_eq!(pool.install(|| resample_means(&[&a, &b, &c], 64, 5, 1)), m);
        for ((a_r, b_r), c_r) in m[0].iter().zip(&m[1]).zip(&m[2]) {
            assert_eq!(2.0 * a_r, *b_r);
            assert_eq!(-a_r, *c_r);
        }
        // The resample means scatter around the mean with sd ≈ sd(a)/√n ≈ 0.00048 (sd of a
        // uniform grid on [0, 1) ≈ 0.2887); 64 resamples estimate it within about 9 %.
        let mean_a = a.iter().sum::<f64>() / rows as f64;
        let avg = m[0].iter().sum::<f64>() / 64.0;
        assert!((avg - mean_a).abs() < 0.0003, "{avg} vs {mean_a}");
        let spread = crate::stats::sample_sd(&m[0]).unwrap();
        let want = 0.2887 / (rows as f64).sqrt();
        assert!((spread - want).abs() < 0.3 * want, "{spread} vs {want}");
    }

    #[test]
    fn counts_over_distinct_rows_draw_n_rows_and_match_index_draws_in_distribution() {
        // 4,000 rows with four distinct values (weights 0.5, 0.3, 0.15, 0.05 of the rows): the
        // counts path. Column 2 is all ones, so its resample sum is the number of rows drawn.
        let n = 4000;
        let value = |i: usize| match i % 20 {
            0..=9 => 0.0,
            10..=15 => 0.5,
            16..=18 => 1.0,
            _ => -1.0,
        };
        let rows: Vec<[f64; 2]> = (0..n).map(|i| [value(i), 1.0]).collect();
        let groups = distinct_rows(&rows);
        assert_eq!(groups.len(), 4);
        assert_eq!(groups[0], ([0.0, 1.0], 2000));
        assert!(groups.len() * ROWS_PER_DISTINCT <= n);
        let b = 20_000;
        let mut by_counts = vec![[0.0; 2]; b];
        let mut by_index = vec![[0.0; 2]; b];
        for (k, (x, y)) in by_counts
            .chunks_mut(CHUNK)
            .zip(by_index.chunks_mut(CHUNK))
            .enumerate()
        {
            multinomial_chunk(&groups, n as u64, x, &mut chunk_rng(3, 1, k as u32));
            gather_chunk(&rows, y, &mut chunk_rng(4, 1, k as u32));
        }
        assert!(by_counts.iter().all(|s| s[1] == n as f64));
        // Both estimate the sampling distribution of the mean: mean 0.25 (0.3·0.5 + 0.15 −
        // 0.05), sd = σ/√n with σ² = E[x²] − 0.25² = 0.075 + 0.15 + 0.05 − 0.0625 = 0.2125,
        // so sd ≈ 0.00729. With 20,000 resamples each, means agree within a few 1e-4 and the
        // sds and 2.5 % / 97.5 % quantiles within a few per cent.
        let stats = |sums: &[[f64; 2]]| {
            let mut m: Vec<f64> = sums.iter().map(|s| s[0] / n as f64).collect();
            m.sort_by(f64::total_cmp);
            let mean = m.iter().sum::<f64>() / m.len() as f64;
            let sd = crate::stats::sample_sd(&m).unwrap();
            (
                mean,
                sd,
                quantile_sorted(&m, 0.025),
                quantile_sorted(&m, 0.975),
            )
        };
        let (mc, sc, lc, hc) = stats(&by_counts);
        let (mi, si, li, hi) = stats(&by_index);
        let sd = (0.2125f64 / n as f64).sqrt();
        for (mean, spread) in [(mc, sc), (mi, si)] {
            assert!((mean - 0.25).abs() < 3e-4, "{mean}");
            assert!((spread - sd).abs() < 0.04 * sd, "{spread} vs {sd}");
        }
        assert!((lc - li).abs() < 0.05 * 1.96 * sd, "{lc} vs {li}");
        assert!((hc - hi).abs() < 0.05 * 1.96 * sd, "{hc} vs {hi}");
        // Reproducible and thread-count independent through resample_means too.
        let col: Vec<f64> = (0..n).map(value).collect();
        let one = resample_means(&[&col], 1000, 9, 1);
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        assert_eq!(pool.install(|| resample_means(&[&col], 1000, 9, 1)), one);
    }

    #[test]
    fn grouped_counts_give_the_resamples_of_the_index_draws() {
        // Same streams, same draws: the grouped sums equal the row-by-row sums up to rounding.
        let rows: Vec<[f64; 3]> = (0..5000)
            .map(|i| {
                let x = ((i * 37) % 211) as f64 / 211.0;
                [x, (i % 3) as f64 - 1.0, -x * 0.5]
            })
            .collect();
        let groups = distinct_rows(&rows);
        let ids = group_ids(&rows, &groups);
        assert!(groups.len() < rows.len() / 2);
        let mut a = vec![[0.0; 3]; 200];
        let mut b = vec![[0.0; 3]; 200];
        grouped_chunk(&ids, &groups, &mut a, &mut chunk_rng(5, 2, 0));
        gather_chunk(&rows, &mut b, &mut chunk_rng(5, 2, 0));
        for (x, y) in a.iter().zip(&b) {
            for c in 0..3 {
                assert!((x[c] - y[c]).abs() < 1e-9, "{x:?} vs {y:?}");
            }
        }
    }

    #[test]
    fn interval_covers_the_estimate_and_is_ordered() {
        let d: Vec<f64> = (0..200)
            .map(|i| if i % 3 == 0 { 1.0 } else { 0.0 })
            .collect();
        let lift = paired_bootstrap(&d, 4000, 0.9, 5, 1);
        for iv in [lift.percentile, lift.bca] {
            assert!(iv.low < lift.estimate && lift.estimate < iv.high, "{iv:?}");
        }
        // Normal-theory check: half-width ≈ z_0.95·sd/√n = 1.645·0.4725/√200 ≈ 0.055.
        let half = (lift.percentile.high - lift.percentile.low) / 2.0;
        assert!((half - 0.055).abs() < 0.006, "{half}");
    }
}
