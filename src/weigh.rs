//! `weigh`: from a question set, two grades files and a policy to a [`Summary`] (issue 2,
//! "Statistics" and "Gate policy").
//!
//! Pure: no files, no clock. The command glue in `commands::weigh` loads the inputs, calls
//! [`weigh`], and renders the summary.
//!
//! What is computed:
//! - per metric, over `expect: answer` questions where both variants have a score: means, the
//!   mean paired lift with percentile and BCa bootstrap intervals (the three metrics resampled
//!   jointly, same indices), and a sign-flip permutation p-value;
//! - exact McNemar on exact match;
//! - refusal rates with Wilson intervals;
//! - per category, the gate metric's lift, interval, p-value and Holm-adjusted p-value;
//! - the minimum detectable lift of the gate metric;
//! - the gate checks and the verdict.

use crate::error::{Error, Result};
use crate::grades::GradeRecord;
use crate::policy::{Metric, Policy, RegressionRule};
use crate::questions::{Expect, QuestionSet};
use crate::report::summary::*;
use crate::stats::bootstrap::{lift_intervals, paired_bootstrap, resample_means, Lift};
use crate::stats::multiple::holm;
use crate::stats::permutation::{self, sign_flip_test};
use crate::stats::power::{self, minimum_detectable_lift};
use crate::stats::proportions::{mcnemar_exact, wilson};
use crate::stats::{normal_quantile, rng};
use std::collections::BTreeMap;

/// Fewest bootstrap resamples accepted: below about a thousand the 2.5% and 97.5% quantiles
/// rest on a couple of dozen resamples and the interval ends wobble from seed to seed.
pub const MIN_RESAMPLES: usize = 1000;
/// Most resamples accepted (memory: 8 bytes per resample per metric).
pub const MAX_RESAMPLES: usize = 10_000_000;
/// Questions listed under "worse" and under "better".
pub const CHANGES_LISTED: usize = 10;

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

fn score(row: &GradeRecord, metric: Metric) -> Option<f64> {
    match metric {
        Metric::ExactMatch => row.exact_match.map(f64::from),
        Metric::TokenF1 => row.token_f1,
        Metric::RougeL => row.rouge_l,
    }
}

/// Paired scores of one metric: question indices and both scores.
struct Paired {
    index: Vec<usize>,
    base: Vec<f64>,
    cand: Vec<f64>,
    diff: Vec<f64>,
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

fn mean(xs: &[f64]) -> Option<f64> {
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
    let lifts: Vec<Option<Lift>> = if pairs[0].index.is_empty() && same_rows {
        vec![None, None, None]
    } else if same_rows {
        let cols: Vec<&[f64]> = pairs.iter().map(|p| p.diff.as_slice()).collect();
        let boots = resample_means(&cols, s.resamples, s.seed, rng::DOMAIN_METRICS_BOOTSTRAP);
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
        let pv = (!p.diff.is_empty()).then(|| {
            sign_flip_test(
                &p.diff,
                s.resamples,
                s.seed,
                rng::DOMAIN_METRICS_PERMUTATION + k as u32,
            )
            .p_value
        });
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
    let unscored = answer_total - pairs[gate.index()].index.len();
    if unscored > 0 {
        warnings.push(format!(
            "{unscored} in-scope question(s) have no {} score in one of the grades files and were left out of its lift.",
            gate.label()
        ));
    }
    let mut ms = metric_summaries.into_iter();
    let metrics = Metrics {
        exact_match: ms.next().unwrap_or_else(|| empty_metric(policy)),
        token_f1: ms.next().unwrap_or_else(|| empty_metric(policy)),
        rouge_l: ms.next().unwrap_or_else(|| empty_metric(policy)),
    };

    let mcnemar = mcnemar_block(input);
    let refusal = refusal_block(input, s.confidence);
    let categories = categories_block(input, &pairs[gate.index()]);
    let mde = mde_block(&pairs[gate.index()].diff, policy, &mut warnings);
    let changes = changes_block(input, &pairs[gate.index()], gate);

    let gate_summary = match gate {
        Metric::ExactMatch => &metrics.exact_match,
        Metric::TokenF1 => &metrics.token_f1,
        Metric::RougeL => &metrics.rouge_l,
    };
    let checks = checks(policy, answer_total, gate_summary, &refusal, &categories);
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
            interval: policy.lift.interval.as_str().to_string(),
            bootstrap_method: "paired bootstrap of the mean per-question difference (questions resampled with replacement, the three metrics jointly); percentile and BCa (Efron 1987, jackknife acceleration) intervals".to_string(),
            p_value_method: permutation::METHOD.to_string(),
            rng: "Xoshiro256++ per chunk of 64 resamples, seeded from ChaCha8 keyed by the seed (independent of thread count)".to_string(),
        },
        policy: policy.clone(),
        metrics,
        mcnemar,
        refusal,
        categories,
        mde,
        changes,
        warnings,
        verdict: Verdict { go, checks },
    })
}

fn empty_metric(policy: &Policy) -> MetricSummary {
    metric_summary(
        &Paired {
            index: vec![],
            base: vec![],
            cand: vec![],
            diff: vec![],
        },
        None,
        None,
        policy,
    )
}

fn metric_summary(
    p: &Paired,
    lift: Option<&Lift>,
    p_value: Option<f64>,
    policy: &Policy,
) -> MetricSummary {
    let chosen = lift.map(|l| match policy.lift.interval {
        crate::policy::IntervalKind::Bca => l.bca,
        crate::policy::IntervalKind::Percentile => l.percentile,
    });
    MetricSummary {
        baseline: mean(&p.base),
        candidate: mean(&p.cand),
        lift: lift.map(|l| l.estimate),
        ci_low: chosen.map(|i| i.low),
        ci_high: chosen.map(|i| i.high),
        p_value,
        n: p.diff.len(),
        percentile: lift.map(|l| l.percentile),
        bca: lift.map(|l| l.bca),
        p_value_method: permutation::METHOD.to_string(),
        better: p.diff.iter().filter(|&&d| d > 0.0).count(),
        worse: p.diff.iter().filter(|&&d| d < 0.0).count(),
        same: p.diff.iter().filter(|&&d| d == 0.0).count(),
    }
}

fn mcnemar_block(input: &WeighInput) -> McNemar {
    let (mut b, mut c, mut both, mut neither) = (0u64, 0u64, 0u64, 0u64);
    for (x, y) in input.baseline.iter().zip(input.candidate) {
        if x.expect != Expect::Answer {
            continue;
        }
        match (x.exact_match, y.exact_match) {
            (Some(1), Some(0)) => b += 1,
            (Some(0), Some(1)) => c += 1,
            (Some(1), Some(1)) => both += 1,
            (Some(0), Some(0)) => neither += 1,
            _ => {}
        }
    }
    McNemar {
        baseline_only: b,
        candidate_only: c,
        both,
        neither,
        p_value: mcnemar_exact(b, c),
        method: "exact McNemar: two-sided binomial test on the discordant pairs, p = min(1, 2·P(X ≤ min(b, c))), X ~ Binomial(b + c, 1/2)".to_string(),
    }
}

fn rate(declined: u64, n: u64, confidence: f64) -> Rate {
    let iv = wilson(declined, n, confidence);
    Rate {
        declined,
        share: (n > 0).then(|| declined as f64 / n as f64),
        ci_low: iv.map(|i| i.low),
        ci_high: iv.map(|i| i.high),
    }
}

fn refusal_block(input: &WeighInput, confidence: f64) -> Refusal {
    let count = |expect: Expect| {
        let (mut n, mut b, mut c) = (0u64, 0u64, 0u64);
        for (x, y) in input.baseline.iter().zip(input.candidate) {
            if x.expect == expect {
                n += 1;
                b += x.refused as u64;
                c += y.refused as u64;
            }
        }
        RefusalRates {
            n,
            baseline: rate(b, n, confidence),
            candidate: rate(c, n, confidence),
        }
    };
    Refusal {
        out_of_scope: count(Expect::Refuse),
        false_refusal: count(Expect::Answer),
        interval: "wilson".to_string(),
    }
}

fn categories_block(input: &WeighInput, gate: &Paired) -> BTreeMap<String, CategorySummary> {
    let s = input.settings;
    let policy = input.policy;
    // Category names in order of first appearance give each its random-stream domain; the
    // block itself is sorted by name.
    let mut order: Vec<&str> = Vec::new();
    for q in &input.set.questions {
        if !order.contains(&q.category.as_str()) {
            order.push(&q.category);
        }
    }
    let mut out = BTreeMap::new();
    let mut with_p: Vec<(String, f64)> = Vec::new();
    for (ci, name) in order.iter().enumerate() {
        let refuse_questions = input
            .set
            .questions
            .iter()
            .filter(|q| q.category == *name && q.expect == Expect::Refuse)
            .count();
        let idx: Vec<usize> = (0..gate.index.len())
            .filter(|&k| input.set.questions[gate.index[k]].category == *name)
            .collect();
        let base: Vec<f64> = idx.iter().map(|&k| gate.base[k]).collect();
        let cand: Vec<f64> = idx.iter().map(|&k| gate.cand[k]).collect();
        let diff: Vec<f64> = idx.iter().map(|&k| gate.diff[k]).collect();
        let (lift, p_value) = if diff.is_empty() {
            (None, None)
        } else {
            let lift = paired_bootstrap(
                &diff,
                s.resamples,
                s.confidence,
                s.seed,
                rng::DOMAIN_CATEGORY_BOOTSTRAP + ci as u32,
            );
            let p = sign_flip_test(
                &diff,
                s.resamples,
                s.seed,
                rng::DOMAIN_CATEGORY_PERMUTATION + ci as u32,
            )
            .p_value;
            with_p.push((name.to_string(), p));
            (Some(lift), Some(p))
        };
        let chosen = lift.as_ref().map(|l| match policy.lift.interval {
            crate::policy::IntervalKind::Bca => l.bca,
            crate::policy::IntervalKind::Percentile => l.percentile,
        });
        out.insert(
            name.to_string(),
            CategorySummary {
                n: diff.len(),
                refuse_questions,
                baseline: mean(&base),
                candidate: mean(&cand),
                lift: lift.as_ref().map(|l| l.estimate),
                ci_low: chosen.map(|i| i.low),
                ci_high: chosen.map(|i| i.high),
                p_value,
                p_value_holm: None,
                judged: diff.len() >= policy.categories.min_questions,
            },
        );
    }
    let adjusted = holm(&with_p.iter().map(|(_, p)| *p).collect::<Vec<_>>());
    for ((name, _), adj) in with_p.iter().zip(adjusted) {
        if let Some(c) = out.get_mut(name) {
            c.p_value_holm = Some(adj);
        }
    }
    out
}

fn mde_block(diffs: &[f64], policy: &Policy, warnings: &mut Vec<String>) -> Mde {
    let target = policy.lift.target;
    let metric = policy.lift.metric;
    let factor = normal_quantile(1.0 - power::ALPHA / 2.0) + normal_quantile(power::POWER);
    let (value, sd, n, note) = match minimum_detectable_lift(diffs) {
        power::Mde::Lift { value, sd, n } => (Some(value), Some(sd), n, None),
        power::Mde::TooFew { n } => (
            None,
            None,
            n,
            Some("fewer than two questions compared: no estimate of the variability".to_string()),
        ),
        power::Mde::NoVariation { n } => (
            None,
            Some(0.0),
            n,
            Some("every question changed by the same amount: the variability is zero, so no minimum detectable lift can be estimated".to_string()),
        ),
    };
    let questions_for_target = match sd {
        Some(sd) if sd > 0.0 && target > 0.0 => {
            Some(((factor * sd / target).powi(2)).ceil() as u64)
        }
        _ => None,
    };
    let bar = target.max(policy.lift.min_ci_low);
    if let Some(v) = value {
        if v > bar {
            let more = questions_for_target
                .map(|q| format!(" About {q} in-scope questions would be needed."))
                .unwrap_or_default();
            warnings.push(format!(
                "The set is too small to show the lift the policy asks for: with {n} questions, only a true {} lift of {:.3} or more would be detected reliably (80% of the time), but the policy aims for {:.3}.{more}",
                metric.label(),
                v,
                bar
            ));
        }
    }
    Mde {
        metric: metric.as_str().to_string(),
        alpha: power::ALPHA,
        power: power::POWER,
        value,
        sd_diff: sd,
        n,
        target,
        questions_for_target,
        method: "paired normal approximation: (z_{1-alpha/2} + z_{power}) * sd(diff) / sqrt(n)"
            .to_string(),
        note,
    }
}

fn changes_block(input: &WeighInput, gate: &Paired, metric: Metric) -> Changes {
    let make = |k: usize| {
        let i = gate.index[k];
        let q = &input.set.questions[i];
        Change {
            id: q.id.clone(),
            category: q.category.clone(),
            question: q.question.clone(),
            references: q.references.clone(),
            baseline_answer: input.baseline[i].answer.clone(),
            candidate_answer: input.candidate[i].answer.clone(),
            baseline_score: gate.base[k],
            candidate_score: gate.cand[k],
            change: gate.diff[k],
        }
    };
    let mut order: Vec<usize> = (0..gate.diff.len()).collect();
    // Stable sort: equal changes keep the set's order.
    order.sort_by(|&a, &b| gate.diff[a].total_cmp(&gate.diff[b]));
    let worse = order
        .iter()
        .take_while(|&&k| gate.diff[k] < 0.0)
        .take(CHANGES_LISTED)
        .map(|&k| make(k))
        .collect();
    order.sort_by(|&a, &b| gate.diff[b].total_cmp(&gate.diff[a]));
    let better = order
        .iter()
        .take_while(|&&k| gate.diff[k] > 0.0)
        .take(CHANGES_LISTED)
        .map(|&k| make(k))
        .collect();
    Changes {
        metric: metric.as_str().to_string(),
        worse,
        better,
    }
}

fn pct(x: f64) -> String {
    format!("{:.1}%", 100.0 * x)
}

fn checks(
    policy: &Policy,
    answer_total: usize,
    gate: &MetricSummary,
    refusal: &Refusal,
    categories: &BTreeMap<String, CategorySummary>,
) -> Vec<Check> {
    let mut out = Vec::new();
    let metric = policy.lift.metric;

    let need = policy.min_questions;
    let pass = answer_total >= need;
    out.push(Check {
        name: "min_questions".into(),
        description: "number of in-scope (expect: answer) questions".into(),
        threshold: need as f64,
        value: Some(answer_total as f64),
        comparison: ">=".into(),
        pass,
        reason: (!pass).then(|| {
            format!(
                "The set has {answer_total} in-scope questions; the policy needs at least {need} before the result can be trusted."
            )
        }),
    });

    let bar = policy.lift.min_ci_low;
    let pass = gate.ci_low.is_some_and(|v| v > bar);
    out.push(Check {
        name: format!("lift.{}", metric.as_str()),
        description: format!(
            "lower end of the {} interval of the {} lift",
            match policy.lift.interval {
                crate::policy::IntervalKind::Bca => "BCa",
                crate::policy::IntervalKind::Percentile => "percentile",
            },
            metric.label()
        ),
        threshold: bar,
        value: gate.ci_low,
        comparison: ">".into(),
        pass,
        reason: (!pass).then(|| match (gate.lift, gate.ci_low, gate.ci_high) {
            (Some(l), Some(lo), Some(hi)) => format!(
                "The improvement in {} is not clearly above {bar}: the measured lift is {l:+.3}, but it could plausibly be anywhere from {lo:+.3} to {hi:+.3}.",
                metric.label()
            ),
            _ => format!("No in-scope question had a {} score for both variants.", metric.label()),
        }),
    });

    let oos = &refusal.out_of_scope;
    let bar = policy.refusal.min_out_of_scope;
    let (pass, reason) = match oos.candidate.share {
        Some(v) if v >= bar => (true, None),
        Some(v) => (
            false,
            Some(format!(
                "The fine-tuned model declines only {} of the out-of-scope questions ({} of {}); the policy needs at least {}.",
                pct(v),
                oos.candidate.declined,
                oos.n,
                pct(bar)
            )),
        ),
        None if bar == 0.0 => (true, None),
        None => (
            false,
            Some("The set has no out-of-scope (expect: refuse) questions, so declining could not be checked; add some, or set refusal.min_out_of_scope = 0 in the policy.".to_string()),
        ),
    };
    out.push(Check {
        name: "refusal.out_of_scope".into(),
        description: "share of out-of-scope questions the candidate declines".into(),
        threshold: bar,
        value: oos.candidate.share,
        comparison: ">=".into(),
        pass,
        reason,
    });

    let fr = &refusal.false_refusal;
    let bar = policy.refusal.max_false_refusal;
    let (pass, reason) = match fr.candidate.share {
        Some(v) if v <= bar => (true, None),
        Some(v) => (
            false,
            Some(format!(
                "The fine-tuned model wrongly declines {} of the questions it should answer ({} of {}); the policy allows at most {}.",
                pct(v),
                fr.candidate.declined,
                fr.n,
                pct(bar)
            )),
        ),
        None => (
            false,
            Some("The set has no in-scope questions, so wrong refusals could not be checked.".to_string()),
        ),
    };
    out.push(Check {
        name: "refusal.false_refusal".into(),
        description: "share of in-scope questions the candidate wrongly declines".into(),
        threshold: bar,
        value: fr.candidate.share,
        comparison: "<=".into(),
        pass,
        reason,
    });

    let allowance = policy.categories.max_regression;
    for (name, c) in categories.iter().filter(|(_, c)| c.judged) {
        let (value, comparison, pass) = match policy.categories.rule {
            RegressionRule::ClearRegression => {
                (c.ci_high, ">=", c.ci_high.is_some_and(|v| v >= -allowance))
            }
            RegressionRule::NonInferiority => {
                (c.ci_low, ">", c.ci_low.is_some_and(|v| v > -allowance))
            }
        };
        let reason = (!pass).then(|| match (c.lift, c.ci_low, c.ci_high) {
            (Some(l), Some(lo), Some(hi)) => match policy.categories.rule {
                RegressionRule::ClearRegression => format!(
                    "Answers in category \"{name}\" got clearly worse: {} changed by {l:+.3} (plausibly {lo:+.3} to {hi:+.3}), beyond the allowed loss of {allowance}.",
                    metric.label()
                ),
                RegressionRule::NonInferiority => format!(
                    "Category \"{name}\" may have got worse by more than the allowed {allowance}: {} changed by {l:+.3}, plausibly as low as {lo:+.3}.",
                    metric.label()
                ),
            },
            _ => format!("Category \"{name}\" could not be measured."),
        });
        out.push(Check {
            name: format!("category.{name}"),
            description: match policy.categories.rule {
                RegressionRule::ClearRegression => format!(
                    "upper end of the {} lift interval in category \"{name}\" ({} questions)",
                    metric.label(),
                    c.n
                ),
                RegressionRule::NonInferiority => format!(
                    "lower end of the {} lift interval in category \"{name}\" ({} questions)",
                    metric.label(),
                    c.n
                ),
            },
            threshold: -allowance,
            value,
            comparison: comparison.into(),
            pass,
            reason,
        });
    }
    out
}
