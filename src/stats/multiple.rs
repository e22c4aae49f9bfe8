//! Holm's step-down adjustment for a family of p-values (Holm 1979, "A simple sequentially
//! rejective multiple test procedure", Scand. J. Stat. 6:65–70).
//!
//! Sort the m p-values ascending, `p_(1) ≤ … ≤ p_(m)`; the adjusted value of the j-th is
//! `max_{i ≤ j} min(1, (m − i + 1)·p_(i))`: the running maximum enforces monotonicity, the cap
//! keeps values at most 1. Rejecting where the adjusted p ≤ α controls the family-wise error
//! rate at α under any dependence. Matches `statsmodels.stats.multitest.multipletests(method=
//! 'holm')`. Ties keep their input order (the adjusted values of tied p-values are equal anyway).

/// Holm-adjusted p-values, in the input order.
pub fn holm(p_values: &[f64]) -> Vec<f64> {
    let m = p_values.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p_values[a].total_cmp(&p_values[b]));
    let mut adjusted = vec![0.0; m];
    let mut running = 0.0f64;
    for (rank, &i) in order.iter().enumerate() {
        let v = ((m - rank) as f64 * p_values[i]).min(1.0);
        running = running.max(v);
        adjusted[i] = running;
    }
    adjusted
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn holm_by_hand() {
        // m = 4, sorted 0.01, 0.02, 0.03, 0.5 → 0.04, 0.06, 0.06 (monotone), 0.5.
        let adj = holm(&[0.03, 0.5, 0.01, 0.02]);
        let want = [0.06, 0.5, 0.04, 0.06];
        for (a, w) in adj.iter().zip(want) {
            assert!((a - w).abs() < 1e-15, "{adj:?}");
        }
        assert_eq!(holm(&[0.6, 0.9]), vec![1.0, 1.0]);
        assert!(holm(&[]).is_empty());
        assert_eq!(holm(&[0.2]), vec![0.2]);
    }
}
