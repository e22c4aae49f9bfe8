//! Proportions: Wilson score intervals and the exact McNemar test.

use super::{normal_quantile, Interval};
use statrs::function::factorial::ln_binomial;

/// Wilson score interval for `successes` out of `n` at `confidence` (Wilson 1927, JASA 22:209;
/// the form used by `statsmodels.stats.proportion.proportion_confint(method='wilson')`):
///
/// `(p̂ + z²/2n ± z·sqrt(p̂(1−p̂)/n + z²/4n²)) / (1 + z²/n)`, `z = Φ⁻¹(1 − α/2)`.
///
/// Unlike the Wald interval it stays inside [0, 1] and is not degenerate at 0/n or n/n.
/// `None` when n = 0 (no data, no interval).
pub fn wilson(successes: u64, n: u64, confidence: f64) -> Option<Interval> {
    if n == 0 || successes > n {
        return None;
    }
    let z = normal_quantile(1.0 - (1.0 - confidence) / 2.0);
    let n_f = n as f64;
    let p = successes as f64 / n_f;
    let z2 = z * z;
    let denom = 1.0 + z2 / n_f;
    let centre = (p + z2 / (2.0 * n_f)) / denom;
    let half = z / denom * (p * (1.0 - p) / n_f + z2 / (4.0 * n_f * n_f)).sqrt();
    // At 0/n and n/n the bounds are exactly 0 and 1; rounding would leave ±1e-17.
    let low = if successes == 0 {
        0.0
    } else {
        (centre - half).max(0.0)
    };
    let high = if successes == n {
        1.0
    } else {
        (centre + half).min(1.0)
    };
    Some(Interval { low, high })
}

/// The exact McNemar test on paired 0/1 outcomes (McNemar 1947; exact binomial form).
///
/// `b` = pairs where only the baseline is right, `c` = pairs where only the candidate is right
/// (the discordant pairs; concordant pairs carry no information on the difference). Under the
/// null of equal accuracy each discordant pair is a fair coin, so with `X ~ Binomial(b + c,
/// 1/2)`, `p = min(1, 2·P(X ≤ min(b, c)))`. This equals
/// `scipy.stats.binomtest(min(b,c), b+c, 0.5).pvalue`. With no discordant pair, p = 1.
pub fn mcnemar_exact(b: u64, c: u64) -> f64 {
    let n = b + c;
    if n == 0 {
        return 1.0;
    }
    let k = b.min(c);
    let ln_half_n = -(n as f64) * std::f64::consts::LN_2;
    let tail: f64 = (0..=k).map(|i| (ln_binomial(n, i) + ln_half_n).exp()).sum();
    (2.0 * tail).min(1.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wilson_textbook_cases() {
        // 0/n and n/n (Agresti & Coull 1998, Am. Stat. 52:119; the Wilson bounds are
        // [0, z²/(n+z²)] and [n/(n+z²), 1]).
        let z = normal_quantile(0.975);
        let iv = wilson(0, 10, 0.95).unwrap();
        assert_eq!(iv.low, 0.0);
        assert!((iv.high - z * z / (10.0 + z * z)).abs() < 1e-12);
        let iv = wilson(10, 10, 0.95).unwrap();
        assert!((iv.low - 10.0 / (10.0 + z * z)).abs() < 1e-12);
        assert_eq!(iv.high, 1.0);
        assert_eq!(wilson(0, 0, 0.95), None);
        // 81/263 at 95%: Newcombe (1998), Stat. Med. 17:857, Table I gives 0.2553–0.3662.
        let iv = wilson(81, 263, 0.95).unwrap();
        assert!(
            (iv.low - 0.2553).abs() < 5e-5 && (iv.high - 0.3662).abs() < 5e-5,
            "{iv:?}"
        );
    }

    #[test]
    fn mcnemar_hand_cases() {
        // No discordant pairs: nothing to test.
        assert_eq!(mcnemar_exact(0, 0), 1.0);
        // b = c: p = 1 (capped).
        assert_eq!(mcnemar_exact(4, 4), 1.0);
        // b = 0, c = 5: p = 2·(1/2)^5 = 1/16 (by hand).
        assert!((mcnemar_exact(0, 5) - 0.0625).abs() < 1e-15);
        // b = 1, c = 9: p = 2·(1 + 10)/1024 = 22/1024 (by hand).
        assert!((mcnemar_exact(9, 1) - 22.0 / 1024.0).abs() < 1e-14);
    }
}
