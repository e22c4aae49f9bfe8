#!/usr/bin/env python
"""Reference values for liftgate's paired statistics (src/stats/), from scipy and statsmodels.

Run with the reference virtualenv (versions pinned in requirements.txt beside this file):

    python tests/reference/make_stats_fixtures.py

It writes tests/fixtures/stats/reference.json: invented per-question scores (token-F1-like
values in [0, 1] and 0/1 exact-match values for a baseline and a candidate, on 150 invented
questions, plus a small skewed set of 20) and, computed on them:

- scipy.stats.bootstrap, paired=True, statistic mean(candidate) - mean(baseline), vectorized,
  n_resamples=10000, confidence 0.95, methods 'BCa' and 'percentile';
- scipy.stats.permutation_test, permutation_type='samples' (swaps a question's two scores,
  i.e. a sign flip of its difference), same statistic, two-sided, n_resamples=10000;
- scipy.stats.binomtest(min(b, c), b + c, 0.5) for the exact McNemar test;
- statsmodels proportion_confint(method='wilson');
- statsmodels multipletests(method='holm').

The Rust tests in src/stats/reference_tests.rs compare against these values.
"""
import json
import os

import numpy as np
import scipy
import scipy.stats
import statsmodels
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import proportion_confint

OUT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "fixtures", "stats", "reference.json")
RESAMPLES = 10000


def invented_f1_pairs(rng, n, lift):
    """Scores shaped like token F1: a mass at 0, a mass at 1, the rest in between."""
    base = np.clip(rng.beta(2.0, 2.5, size=n), 0, 1)
    base[rng.random(n) < 0.15] = 0.0
    base[rng.random(n) < 0.10] = 1.0
    cand = np.clip(base + rng.normal(lift, 0.22, size=n), 0, 1)
    same = rng.random(n) < 0.25  # a quarter of the questions answered alike by both
    cand[same] = base[same]
    return np.round(base, 4), np.round(cand, 4)


def invented_em_pairs(rng, n):
    base = (rng.random(n) < 0.42).astype(int)
    flip = rng.random(n)
    cand = base.copy()
    cand[(base == 0) & (flip < 0.22)] = 1
    cand[(base == 1) & (flip < 0.12)] = 0
    return base, cand


def mean_diff(x, y, axis=-1):
    return np.mean(x, axis=axis) - np.mean(y, axis=axis)


def bootstrap_both(baseline, candidate):
    out = {}
    for method, key in (("BCa", "bca"), ("percentile", "percentile")):
        res = scipy.stats.bootstrap(
            (np.asarray(candidate, float), np.asarray(baseline, float)), mean_diff, paired=True,
            vectorized=True, n_resamples=RESAMPLES, method=method, confidence_level=0.95,
            rng=np.random.default_rng(20260101))
        out[key] = [float(res.confidence_interval.low), float(res.confidence_interval.high)]
    return out


def permutation_p(baseline, candidate):
    res = scipy.stats.permutation_test(
        (np.asarray(candidate, float), np.asarray(baseline, float)), mean_diff,
        permutation_type="samples", vectorized=True, n_resamples=RESAMPLES,
        alternative="two-sided", rng=np.random.default_rng(20260102))
    return float(res.pvalue)


def dataset(name, baseline, candidate):
    d = np.asarray(candidate, float) - np.asarray(baseline, float)
    return {
        "name": name,
        "baseline": [float(x) for x in baseline],
        "candidate": [float(x) for x in candidate],
        "lift": float(d.mean()),
        "sd_diff": float(d.std(ddof=1)),
        "bootstrap": bootstrap_both(baseline, candidate),
        "permutation_p": permutation_p(baseline, candidate),
    }


def main():
    rng = np.random.default_rng(7)
    f1_base, f1_cand = invented_f1_pairs(rng, 150, 0.03)
    em_base, em_cand = invented_em_pairs(rng, 150)
    small_base = np.round(rng.beta(1.2, 4.0, size=20), 4)
    small_cand = np.round(np.clip(small_base + rng.exponential(0.08, size=20) - 0.05, 0, 1), 4)

    datasets = [
        dataset("f1_150", f1_base, f1_cand),
        dataset("em_150", em_base, em_cand),
        dataset("skewed_20", small_base, small_cand),
    ]

    b_em = int(((em_base == 1) & (em_cand == 0)).sum())
    c_em = int(((em_base == 0) & (em_cand == 1)).sum())
    mcnemar = [
        {"b": b, "c": c, "p": float(scipy.stats.binomtest(min(b, c), b + c, 0.5).pvalue)}
        for b, c in [(b_em, c_em), (3, 11), (10, 10), (1, 0), (0, 7), (25, 40), (120, 161), (2, 9)]
    ]

    wilson = []
    for count, nobs, conf in [(0, 10, 0.95), (10, 10, 0.95), (81, 263, 0.95), (7, 31, 0.95),
                              (45, 50, 0.9), (1, 3, 0.99), (120, 150, 0.95), (3, 400, 0.95)]:
        low, high = proportion_confint(count, nobs, alpha=1 - conf, method="wilson")
        wilson.append({"successes": count, "n": nobs, "confidence": conf,
                       "low": float(low), "high": float(high)})

    holm_cases = [
        [0.01, 0.04, 0.03, 0.005, 0.20, 0.04],
        [0.5, 0.001, 0.3, 0.3, 0.049],
        [0.9, 0.8],
        [0.0001],
    ]
    holm = [{"p": ps, "adjusted": [float(x) for x in multipletests(ps, method="holm")[1]]}
            for ps in holm_cases]

    doc = {
        "generated_by": "tests/reference/make_stats_fixtures.py",
        "versions": {"numpy": np.__version__, "scipy": scipy.__version__,
                     "statsmodels": statsmodels.__version__},
        "resamples": RESAMPLES,
        "confidence": 0.95,
        "datasets": datasets,
        "mcnemar": mcnemar,
        "wilson": wilson,
        "holm": holm,
    }
    os.makedirs(os.path.dirname(OUT), exist_ok=True)
    with open(OUT, "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")
    print(f"wrote {os.path.normpath(OUT)}")


if __name__ == "__main__":
    main()
