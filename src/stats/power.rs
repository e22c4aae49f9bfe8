//! The minimum detectable lift of a paired design.
//!
//! For n paired differences with standard deviation σ_d, a two-sided test at level α has power
//! 1 − β against a true mean lift δ when, by the normal approximation,
//! `δ = (z_{1−α/2} + z_{1−β}) · σ_d / √n` (e.g. Chow, Shao & Wang, "Sample Size Calculations in
//! Clinical Research", paired-mean formula). `weigh` uses α = 0.05 and power 0.8, so the factor
//! is 1.960 + 0.842 = 2.802, and σ_d is the sample standard deviation of the observed
//! differences (n − 1 denominator). The approximation ignores the t-correction, which matters
//! only for very small n, and treats the observed σ_d as the true one.

use super::{normal_quantile, sample_sd};

/// Significance level of the minimum detectable lift.
pub const ALPHA: f64 = 0.05;
/// Power of the minimum detectable lift.
pub const POWER: f64 = 0.8;

/// The outcome of a minimum-detectable-lift computation.
#[derive(Debug, Clone, PartialEq)]
pub enum Mde {
    /// The smallest true lift detected with the given power.
    Lift { value: f64, sd: f64, n: usize },
    /// Fewer than two differences: no variability estimate.
    TooFew { n: usize },
    /// Every difference equal: the observed variability is zero, so the formula gives 0,
    /// which would claim any lift is detectable; reported as not estimable instead.
    NoVariation { n: usize },
}

/// Minimum detectable lift for the paired differences `diffs` (α = [`ALPHA`], power [`POWER`]).
pub fn minimum_detectable_lift(diffs: &[f64]) -> Mde {
    let n = diffs.len();
    let Some(sd) = sample_sd(diffs) else {
        return Mde::TooFew { n };
    };
    if sd == 0.0 {
        return Mde::NoVariation { n };
    }
    let factor = normal_quantile(1.0 - ALPHA / 2.0) + normal_quantile(POWER);
    Mde::Lift {
        value: factor * sd / (n as f64).sqrt(),
        sd,
        n,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn textbook_factor_and_edge_cases() {
        // 1.959964 + 0.841621 = 2.801585 (normal tables); sd of [0, 1] repeated is known.
        let d: Vec<f64> = (0..100).map(|i| (i % 2) as f64).collect();
        let sd = sample_sd(&d).unwrap();
        match minimum_detectable_lift(&d) {
            Mde::Lift { value, .. } => assert!((value - 2.801_585 * sd / 10.0).abs() < 1e-6),
            other => panic!("{other:?}"),
        }
        assert_eq!(minimum_detectable_lift(&[0.3]), Mde::TooFew { n: 1 });
        assert_eq!(minimum_detectable_lift(&[]), Mde::TooFew { n: 0 });
        assert_eq!(
            minimum_detectable_lift(&[0.1, 0.1]),
            Mde::NoVariation { n: 2 }
        );
    }
}
