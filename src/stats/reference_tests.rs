//! The statistics checked against scipy 1.17 and statsmodels 0.15 on committed data:
//! tests/fixtures/stats/reference.json, made by tests/reference/make_stats_fixtures.py.

use super::bootstrap::{lift_intervals, resample_means};
use super::multiple::holm;
use super::permutation::sign_flip_test;
use super::proportions::{mcnemar_exact, wilson};
use super::{normal_quantile, sample_sd};
use serde_json::Value;

const FIXTURE: &str = include_str!("../../tests/fixtures/stats/reference.json");

fn fixture() -> Value {
    serde_json::from_str(FIXTURE).expect("reference.json parses")
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_f64().expect("a number"))
        .collect()
}

/// Monte-Carlo standard error of a bootstrap quantile at tail share `p` with `b` resamples,
/// for a statistic whose sampling sd is `sd_stat`, under approximate normality:
/// `sqrt(p(1−p)/b) / φ(z_p) · sd_stat` (the asymptotic sd of a sample quantile; e.g. Efron &
/// Tibshirani 1993, §19.3 on Monte-Carlo error of bootstrap intervals).
fn quantile_mc_se(p: f64, b: f64, sd_stat: f64) -> f64 {
    let z = normal_quantile(p);
    let density = (-z * z / 2.0).exp() / (2.0 * std::f64::consts::PI).sqrt();
    (p * (1.0 - p) / b).sqrt() / density * sd_stat
}

#[test]
fn bootstrap_intervals_match_scipy() {
    // Source: scipy.stats.bootstrap(paired=True, method='BCa' | 'percentile',
    // n_resamples=10000, confidence_level=0.95) of mean(candidate) − mean(baseline).
    // Both sides are Monte-Carlo estimates from 10,000 resamples, with independent random
    // streams, so the ends differ by noise: the tolerance is 5 standard errors of the difference
    // of two independent quantile estimates (√2 · se), plus one grid step 1/n for data taking
    // few values (0/1 exact match makes every resample mean a multiple of 1/n, and the
    // interpolated quantile can land a step away). For the 150-question F1 set that is ≈ 0.003.
    let doc = fixture();
    let resamples = doc["resamples"].as_u64().unwrap() as usize;
    for ds in doc["datasets"].as_array().unwrap() {
        let name = ds["name"].as_str().unwrap();
        let base = floats(&ds["baseline"]);
        let cand = floats(&ds["candidate"]);
        let diffs: Vec<f64> = cand.iter().zip(&base).map(|(c, b)| c - b).collect();
        let n = diffs.len() as f64;
        let sd_stat = sample_sd(&diffs).unwrap() / n.sqrt();
        let boot = resample_means(&[&diffs], resamples, 7, 1).pop().unwrap();
        let lift = lift_intervals(&diffs, &boot, 0.95);
        assert!(
            (lift.estimate - ds["lift"].as_f64().unwrap()).abs() < 1e-12,
            "{name}"
        );
        let distinct = {
            let mut v = diffs.clone();
            v.sort_by(|a, b| a.total_cmp(b));
            v.dedup();
            v.len()
        };
        let grid = if distinct <= 5 { 1.0 / n } else { 0.0 };
        for (kind, ours) in [("bca", lift.bca), ("percentile", lift.percentile)] {
            let want = floats(&ds["bootstrap"][kind]);
            // BCa reads quantiles further out in the tail when z0, a ≠ 0; 0.02 covers that.
            let tol = 5.0 * 2f64.sqrt() * quantile_mc_se(0.02, resamples as f64, sd_stat) + grid;
            assert!(
                (ours.low - want[0]).abs() < tol && (ours.high - want[1]).abs() < tol,
                "{name} {kind}: ours [{}, {}], scipy {want:?}, tolerance {tol}",
                ours.low,
                ours.high
            );
        }
    }
}

#[test]
fn permutation_p_values_match_scipy() {
    // Source: scipy.stats.permutation_test(permutation_type='samples', n_resamples=10000,
    // alternative='two-sided'). Each side's p is a Monte-Carlo estimate with binomial standard
    // error sqrt(p(1−p)/m); the tolerance is 5 standard errors of the difference of two.
    let doc = fixture();
    let m = doc["resamples"].as_u64().unwrap() as usize;
    for ds in doc["datasets"].as_array().unwrap() {
        let name = ds["name"].as_str().unwrap();
        let base = floats(&ds["baseline"]);
        let cand = floats(&ds["candidate"]);
        let diffs: Vec<f64> = cand.iter().zip(&base).map(|(c, b)| c - b).collect();
        let want = ds["permutation_p"].as_f64().unwrap();
        let ours = sign_flip_test(&diffs, m, 7, 16);
        let se = (want * (1.0 - want) / m as f64).sqrt();
        let tol = 5.0 * 2f64.sqrt() * se + 2.0 / m as f64;
        assert!(
            (ours.p_value - want).abs() < tol,
            "{name}: ours {}, scipy {want}, tolerance {tol}",
            ours.p_value
        );
    }
}

#[test]
fn mcnemar_matches_scipy_binomtest() {
    // Source: scipy.stats.binomtest(min(b, c), b + c, 0.5).pvalue (exact two-sided binomial).
    for case in fixture()["mcnemar"].as_array().unwrap() {
        let b = case["b"].as_u64().unwrap();
        let c = case["c"].as_u64().unwrap();
        let want = case["p"].as_f64().unwrap();
        let got = mcnemar_exact(b, c);
        assert!((got - want).abs() < 1e-9, "b={b} c={c}: {got} vs {want}");
    }
}

#[test]
fn wilson_matches_statsmodels() {
    // Source: statsmodels.stats.proportion.proportion_confint(method='wilson').
    for case in fixture()["wilson"].as_array().unwrap() {
        let k = case["successes"].as_u64().unwrap();
        let n = case["n"].as_u64().unwrap();
        let conf = case["confidence"].as_f64().unwrap();
        let iv = wilson(k, n, conf).unwrap();
        let (lo, hi) = (
            case["low"].as_f64().unwrap(),
            case["high"].as_f64().unwrap(),
        );
        assert!(
            (iv.low - lo).abs() < 1e-9 && (iv.high - hi).abs() < 1e-9,
            "{k}/{n} at {conf}: {iv:?} vs [{lo}, {hi}]"
        );
    }
}

#[test]
fn holm_matches_statsmodels() {
    // Source: statsmodels.stats.multitest.multipletests(method='holm')[1].
    for case in fixture()["holm"].as_array().unwrap() {
        let got = holm(&floats(&case["p"]));
        let want = floats(&case["adjusted"]);
        for (g, w) in got.iter().zip(&want) {
            assert!((g - w).abs() < 1e-9, "{got:?} vs {want:?}");
        }
    }
}
