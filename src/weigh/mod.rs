//! The weighing stage: from a question set, two grades files and a policy to a [`Summary`]
//! (README, "Statistics" and "The gate policy"; docs/policy.md).
//!
//! Pure but for [`describe_inputs`], which fingerprints the input files: no clock, no output.
//! `blocks` computes each block of the summary, `gate` the policy's checks.
//!
//! What is computed:
//! - per metric, over `expect: answer` questions where both variants have a score: means, the
//!   mean paired lift with percentile and BCa bootstrap intervals (the three metrics resampled
//!   jointly, same indices), and a sign-flip permutation p-value;
//! - semantic similarity like the metrics, when both grades files hold it;
//! - exact McNemar on exact match;
//! - refusal rates with Wilson intervals;
//! - fact recall (paired, like the metrics) and contradiction shares (Wilson), when the grades
//!   hold fact scores;
//! - per category, the gate metric's lift, interval, p-value and Holm-adjusted p-value (in a
//!   large set the categories' resamples and sign flips are drawn with the metrics':
//!   `stats::leaves`, `permutation::sign_flip_tests_by_stratum`);
//! - the minimum detectable lift of the gate metric;
//! - the gate checks and the verdict.

mod blocks;
mod gate;
pub mod lineup;

use crate::error::{Error, Result};
use crate::formats::grades::GradeRecord;
use crate::formats::questions::{Expect, QuestionSet};
use crate::formats::run_record::{self, InputFile};
use crate::fsutil;
use crate::policy::{Metric, Policy};
use crate::report::summary::*;
use crate::stats::bootstrap::{lift_intervals, paired_bootstrap, resample_means, Lift};
use crate::stats::permutation::{self, sign_flip_test};
use crate::stats::{leaves, rng};
use blocks::{
    categories_block, changes_block, empty_metric, facts_block, mcnemar_block, mde_block,
    metric_summary, refusal_block,
};
use std::path::Path;

/// Bootstrap resamples unless `--resamples` says otherwise.
pub const DEFAULT_RESAMPLES: usize = 10_000;
/// Seed of the bootstrap and permutation tests unless `--seed` says otherwise.
pub const DEFAULT_SEED: u64 = 7;
/// Confidence level of every interval unless `--confidence` says otherwise.
pub const DEFAULT_CONFIDENCE: f64 = 0.95;
/// Fewest bootstrap resamples accepted: below about a thousand the 2.5% and 97.5% quantiles
/// rest on a couple of dozen resamples and the interval ends wobble from seed to seed.
pub const MIN_RESAMPLES: usize = 1000;
/// Most resamples accepted (memory: 8 bytes per resample per metric).
pub const MAX_RESAMPLES: usize = 10_000_000;

/// Validated statistics settings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Settings {
    pub resamples: usize,
    pub seed: u64,
    pub confidence: f64,
}

impl Settings {
    /// Checks the flags: `--confidence` in (0, 1) exclusive, `--resamples` in
    /// [`MIN_RESAMPLES`]..=[`MAX_RESAMPLES`].
    pub fn new(resamples: usize, seed: u64, confidence: f64) -> Result<Settings> {
        if !(confidence > 0.0 && confidence < 1.0) {
            return Err(Error::usage(format!(
                "--confidence must be between 0 and 1 (exclusive), e.g. 0.95; got {confidence}"
            )));
        }
        if !(MIN_RESAMPLES..=MAX_RESAMPLES).contains(&resamples) {
            return Err(Error::usage(format!(
                "--resamples must be from {MIN_RESAMPLES} to {MAX_RESAMPLES}; got {resamples}"
            )));
        }
        Ok(Settings {
            resamples,
            seed,
            confidence,
        })
    }
}

/// Everything [`weigh`] needs. The grades must already match the set (as
/// `grades::load_for_set` guarantees): same ids, same order, same `expect`.
pub struct WeighInput<'a> {
    pub set: &'a QuestionSet,
    pub baseline: &'a [GradeRecord],
    pub candidate: &'a [GradeRecord],
    pub policy: &'a Policy,
    pub settings: Settings,
    /// Paths and fingerprints, copied into the summary.
    pub inputs: Inputs,
}

pub(crate) fn score(row: &GradeRecord, metric: Metric) -> Option<f64> {
    match metric {
        Metric::ExactMatch => row.exact_match.map(f64::from),
        Metric::TokenF1 => row.token_f1,
        Metric::RougeL => row.rouge_l,
        Metric::Semantic => row.semantic,
    }
}

/// Paired scores of one metric: question indices and both scores.
pub(crate) struct Paired {
    pub index: Vec<usize>,
    pub base: Vec<f64>,
    pub cand: Vec<f64>,
    pub diff: Vec<f64>,
}

fn paired(input: &WeighInput, metric: Metric, keep: impl Fn(usize) -> bool) -> Paired {
    let mut p = Paired {
        index: Vec::new(),
        base: Vec::new(),
        cand: Vec::new(),
        diff: Vec::new(),
    };
    for (i, (b, c)) in input.baseline.iter().zip(input.candidate).enumerate() {
        if b.expect != Expect::Answer || !keep(i) {
            continue;
        }
        if let (Some(x), Some(y)) = (score(b, metric), score(c, metric)) {
            p.index.push(i);
            p.base.push(x);
            p.cand.push(y);
            p.diff.push(y - x);
        }
    }
    p
}

pub(crate) fn mean(xs: &[f64]) -> Option<f64> {
    crate::stats::mean(xs)
}

/// Builds the summary: statistics, checks and verdict.
pub fn weigh(input: &WeighInput) -> Result<Summary> {
    let n_rows = input.set.len();
    if input.baseline.len() != n_rows || input.candidate.len() != n_rows {
        return Err(Error::internal(
            "grades were not matched to the question set before weighing",
        ));
    }
    let s = input.settings;
    let policy = input.policy;
    let gate = policy.lift.metric;
    let mut warnings = Vec::new();
    for a in &input.inputs.approximations {
        warnings.push(format!(
            "Answers computed with an approximation of the model ({a}): they can differ from what the model itself answers. Confirm the verdict with f32 answers (--weights f32, the default) before relying on it."
        ));
    }

    // Metrics, resampled jointly when they cover the same questions (the usual case).
    let pairs: Vec<Paired> = Metric::ALL
        .iter()
        .map(|&m| paired(input, m, |_| true))
        .collect();
    let same_rows = pairs.iter().all(|p| p.index == pairs[0].index);
    // A large set's categories are resampled, and their permutation tests drawn, with the
    // metrics (stats::leaves, permutation::sign_flip_tests_by_stratum) when the gate reads one
    // of the jointly resampled metrics: each row's category is its stratum.
    let strata: Option<(Vec<u32>, usize)> = (same_rows
        && gate != Metric::Semantic
        && pairs[0].index.len() >= leaves::MIN_ROWS)
        .then(|| {
            let order = blocks::category_order(input.set);
            let position: std::collections::HashMap<&str, u32> = order
                .iter()
                .enumerate()
                .map(|(k, name)| (*name, k as u32))
                .collect();
            let rows = pairs[0]
                .index
                .iter()
                .map(|&i| position[input.set.questions[i].category.as_str()])
                .collect();
            (rows, order.len())
        });
    let mut category_boots: Option<Vec<Vec<f64>>> = None;
    let mut category_tests: Option<Vec<Option<f64>>> = None;
    let lifts: Vec<Option<Lift>> = if pairs[0].index.is_empty() && same_rows {
        vec![None, None, None]
    } else if same_rows {
        let cols: Vec<&[f64]> = pairs.iter().map(|p| p.diff.as_slice()).collect();
        let boots = match &strata {
            Some((rows, n_strata)) => {
                let joint = leaves::stratified_means(
                    &cols,
                    rows,
                    *n_strata,
                    gate.index(),
                    s.resamples,
                    s.seed,
                    rng::DOMAIN_METRICS_BOOTSTRAP,
                );
                category_boots = Some(joint.strata);
                joint.columns
            }
            None => resample_means(&cols, s.resamples, s.seed, rng::DOMAIN_METRICS_BOOTSTRAP),
        };
        pairs
            .iter()
            .zip(&boots)
            .map(|(p, b)| Some(lift_intervals(&p.diff, b, s.confidence)))
            .collect()
    } else {
        pairs
            .iter()
            .enumerate()
            .map(|(k, p)| {
                (!p.diff.is_empty()).then(|| {
                    paired_bootstrap(
                        &p.diff,
                        s.resamples,
                        s.confidence,
                        s.seed,
                        rng::DOMAIN_METRICS_BOOTSTRAP + 1 + k as u32,
                    )
                })
            })
            .collect()
    };
    let mut metric_summaries = Vec::new();
    for (k, (p, lift)) in pairs.iter().zip(&lifts).enumerate() {
        let domain = rng::DOMAIN_METRICS_PERMUTATION + k as u32;
        let shared = match &strata {
            Some((rows, n_strata)) if k == gate.index() => permutation::sign_flip_tests_by_stratum(
                &p.diff,
                rows,
                *n_strata,
                s.resamples,
                s.seed,
                domain,
            ),
            _ => None,
        };
        let pv = match shared {
            Some((all, by_category)) => {
                category_tests = Some(by_category.iter().map(|t| t.map(|t| t.p_value)).collect());
                Some(all.p_value)
            }
            None => (!p.diff.is_empty())
                .then(|| sign_flip_test(&p.diff, s.resamples, s.seed, domain).p_value),
        };
        if let Some(l) = lift {
            if l.bca_clamped {
                warnings.push(format!(
                    "{}: every bootstrap resample fell on one side of the observed lift, so the BCa bias correction was clamped; read its interval with care.",
                    Metric::ALL[k].label()
                ));
            }
        }
        metric_summaries.push(metric_summary(p, lift.as_ref(), pv, policy));
    }
    let answer_total = input
        .set
        .questions
        .iter()
        .filter(|q| q.expect == Expect::Answer)
        .count();
    let unscored = answer_total
        - if gate == Metric::Semantic {
            paired(input, Metric::Semantic, |_| true).index.len()
        } else {
            pairs[gate.index()].index.len()
        };
    if unscored > 0 {
        warnings.push(format!(
            "{unscored} in-scope question(s) have no {} score in one of the grades files and were left out of its lift.",
            gate.label()
        ));
    }
    // Semantic similarity, when both grades files hold it, on a stream of its own: the other
    // three metrics and their resamples stay exactly what they are without it.
    let sem = paired(input, Metric::Semantic, |_| true);
    if gate == Metric::Semantic && sem.index.is_empty() {
        return Err(Error::usage(
            "the policy gates on semantic similarity (lift.metric = \"semantic\") but the grades files hold no semantic scores in common; grade both variants with --embedder DIR",
        ));
    }
    let semantic = (!sem.index.is_empty()).then(|| {
        let k = Metric::Semantic.index() as u32;
        let lift = paired_bootstrap(
            &sem.diff,
            s.resamples,
            s.confidence,
            s.seed,
            rng::DOMAIN_METRICS_BOOTSTRAP + 1 + k,
        );
        if lift.bca_clamped {
            warnings.push(format!(
                "{}: every bootstrap resample fell on one side of the observed lift, so the BCa bias correction was clamped; read its interval with care.",
                Metric::Semantic.label()
            ));
        }
        let pv = sign_flip_test(
            &sem.diff,
            s.resamples,
            s.seed,
            rng::DOMAIN_METRICS_PERMUTATION + k,
        )
        .p_value;
        metric_summary(&sem, Some(&lift), Some(pv), policy)
    });
    let gate_pair = if gate == Metric::Semantic {
        &sem
    } else {
        &pairs[gate.index()]
    };
    let mut ms = metric_summaries.into_iter();
    let metrics = Metrics {
        exact_match: ms.next().unwrap_or_else(|| empty_metric(policy)),
        token_f1: ms.next().unwrap_or_else(|| empty_metric(policy)),
        rouge_l: ms.next().unwrap_or_else(|| empty_metric(policy)),
        semantic,
    };

    let mcnemar = mcnemar_block(input);
    let refusal = refusal_block(input, s.confidence);
    let facts = facts_block(input);
    let categories = categories_block(
        input,
        gate_pair,
        category_boots.as_deref(),
        category_tests.as_deref(),
    );
    let mde = mde_block(&gate_pair.diff, policy, &mut warnings);
    let changes = changes_block(input, gate_pair, gate);

    let gate_summary = metrics
        .get(gate)
        .ok_or_else(|| Error::internal("the gate metric has no summary"))?;
    let checks = gate::checks(
        policy,
        answer_total,
        gate_summary,
        &refusal,
        facts.as_ref(),
        &categories,
    );
    if !categories.values().any(|c| c.judged) {
        warnings.push(format!(
            "No category has {} or more in-scope questions, so no category was checked for a regression.",
            policy.categories.min_questions
        ));
    }
    let go = checks.iter().all(|c| c.pass);

    Ok(Summary {
        format: FORMAT.to_string(),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        inputs: input.inputs.clone(),
        settings: crate::report::summary::Settings {
            resamples: s.resamples,
            seed: s.seed,
            confidence: s.confidence,
            interval: policy.lift.interval,
            bootstrap_method: "paired bootstrap of the mean per-question difference (questions resampled with replacement, the three metrics jointly); percentile and BCa (Efron 1987, jackknife acceleration) intervals".to_string(),
            p_value_method: permutation::METHOD.to_string(),
            rng: "Xoshiro256++ per chunk of 64 resamples, seeded from ChaCha8 keyed by the seed (independent of thread count)".to_string(),
        },
        policy: policy.clone(),
        metrics,
        mcnemar,
        refusal,
        facts,
        leakage: None,
        categories,
        mde,
        changes,
        warnings,
        verdict: Verdict { go, checks },
    })
}

/// The inputs a summary records: paths and SHA-256 fingerprints of the set, both grades files
/// and the policy (or "built-in"), and the approximations the grades' run records name.
pub fn describe_inputs(
    set: &QuestionSet,
    baseline: &Path,
    candidate: &Path,
    policy: Option<&Path>,
) -> Result<Inputs> {
    let policy = match policy {
        Some(p) => PolicySource {
            path: Some(p.display().to_string()),
            sha256: Some(fsutil::sha256_file(p)?),
            source: "file".into(),
        },
        None => PolicySource {
            path: None,
            sha256: None,
            source: "built-in".into(),
        },
    };
    let mut approximations = Vec::new();
    for (label, grades) in [("baseline", baseline), ("candidate", candidate)] {
        if let Some(dtype) = run_record::recorded_compute_dtype(grades) {
            if dtype != "f32" {
                approximations.push(format!("{label}: {dtype}"));
            }
        }
    }
    let file = |path: &Path, sha256: String| InputFile {
        path: path.display().to_string(),
        sha256,
    };
    let (baseline_sha, candidate_sha) = rayon::join(
        || fsutil::sha256_file(baseline),
        || fsutil::sha256_file(candidate),
    );
    Ok(Inputs {
        questions: file(&set.path, set.fingerprint.clone()),
        baseline: file(baseline, baseline_sha?),
        candidate: file(candidate, candidate_sha?),
        policy,
        approximations,
    })
}

#[cfg(test)]
mod tests;
