//! Paired statistics for `weigh` (README, "Statistics"): pure functions over slices.
//!
//! - [`bootstrap`]: paired bootstrap of a mean lift, percentile and BCa intervals (Efron 1987);
//! - [`leaves`]: the resamples of a large set drawn leaf by leaf, with its categories' own
//!   resamples coupled to them;
//! - [`permutation`]: paired sign-flip permutation test of a mean lift (the lift p-values);
//! - [`proportions`]: Wilson score intervals and the exact McNemar test;
//! - [`multiple`]: Holm's step-down adjustment of a family of p-values;
//! - [`power`]: the minimum detectable lift for a paired design.
//!
//! Randomness comes only from [`rng`]: a `--seed`, a domain number naming what is being
//! resampled, and a chunk number. Work is split into fixed chunks of resamples, each with its
//! own generator, so results are identical for a given seed whatever the thread count.

pub mod bootstrap;
pub mod leaves;
pub mod multiple;
pub mod permutation;
pub mod power;
pub mod proportions;
pub mod rng;

use serde::{Deserialize, Serialize};

/// A closed interval `[low, high]` on the scale of the statistic it bounds.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Interval {
    pub low: f64,
    pub high: f64,
}

impl Interval {
    pub fn point(x: f64) -> Self {
        Interval { low: x, high: x }
    }

    pub fn contains(&self, x: f64) -> bool {
        self.low <= x && x <= self.high
    }
}

/// Standard normal quantile Φ⁻¹(p), for p in (0, 1).
pub fn normal_quantile(p: f64) -> f64 {
    use statrs::distribution::{ContinuousCDF, Normal};
    Normal::standard().inverse_cdf(p)
}

/// Standard normal distribution function Φ(x).
pub fn normal_cdf(x: f64) -> f64 {
    use statrs::distribution::{ContinuousCDF, Normal};
    Normal::standard().cdf(x)
}

/// Arithmetic mean; `None` for an empty slice.
pub fn mean(xs: &[f64]) -> Option<f64> {
    if xs.is_empty() {
        None
    } else {
        Some(xs.iter().sum::<f64>() / xs.len() as f64)
    }
}

/// Sample standard deviation (denominator n − 1); `None` when n < 2.
pub fn sample_sd(xs: &[f64]) -> Option<f64> {
    let n = xs.len();
    if n < 2 {
        return None;
    }
    let m = mean(xs)?;
    let ss: f64 = xs.iter().map(|x| (x - m) * (x - m)).sum();
    Some((ss / (n - 1) as f64).sqrt())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn normal_quantiles_match_tables() {
        // Standard normal table values (any statistics textbook): z_0.975 = 1.959964,
        // z_0.8 = 0.841621.
        assert!((normal_quantile(0.975) - 1.959_963_984_540_054).abs() < 1e-9);
        assert!((normal_quantile(0.8) - 0.841_621_233_572_914_3).abs() < 1e-9);
        assert!((normal_cdf(0.0) - 0.5).abs() < 1e-15);
    }

    #[test]
    fn mean_and_sd_edge_cases() {
        assert_eq!(mean(&[]), None);
        assert_eq!(sample_sd(&[1.0]), None);
        assert_eq!(sample_sd(&[2.0, 2.0, 2.0]), Some(0.0));
        // sd of 1..=5 with n − 1 denominator is sqrt(2.5).
        let sd = sample_sd(&[1.0, 2.0, 3.0, 4.0, 5.0]).unwrap();
        assert!((sd - 2.5f64.sqrt()).abs() < 1e-12);
    }
}

#[cfg(test)]
mod reference_tests;
