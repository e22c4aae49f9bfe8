//! The blocks of a summary besides the gate checks: per-metric lifts, McNemar, refusal rates,
//! categories, the minimum detectable lift and the listed changes.

use super::{mean, Paired, WeighInput};
use crate::formats::questions::{Expect, QuestionSet};
use crate::policy::{IntervalKind, Metric, Policy};
use crate::report::summary::*;
use crate::stats::bootstrap::{lift_intervals, paired_bootstrap, Lift};
use crate::stats::multiple::holm;
use crate::stats::permutation::{self, sign_flip_test};
use crate::stats::power::{self, minimum_detectable_lift};
use crate::stats::proportions::{mcnemar_exact, wilson};
use crate::stats::{normal_quantile, rng, Interval};
use std::collections::BTreeMap;

/// The interval the policy's gate reads.
fn chosen(lift: &Lift, kind: IntervalKind) -> Interval {
    match kind {
        IntervalKind::Bca => lift.bca,
        IntervalKind::Percentile => lift.percentile,
    }
}

pub(super) fn empty_metric(policy: &Policy) -> MetricSummary {
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

pub(super) fn metric_summary(
    p: &Paired,
    lift: Option<&Lift>,
    p_value: Option<f64>,
    policy: &Policy,
) -> MetricSummary {
    let chosen = lift.map(|l| chosen(l, policy.lift.interval));
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

pub(super) fn mcnemar_block(input: &WeighInput) -> McNemar {
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

pub(super) fn refusal_block(input: &WeighInput, confidence: f64) -> Refusal {
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
    let (calls, calls_left_off) = refusal_calls(input);
    Refusal {
        out_of_scope: count(Expect::Refuse),
        false_refusal: count(Expect::Answer),
        interval: "wilson".to_string(),
        calls,
        calls_left_off,
    }
}

/// The calls a person checks to recount the refusal shares by hand: every out-of-scope
/// question (both shares' numerators and denominators), then every in-scope question either
/// variant was counted as declining (the false-refusal numerators); up to
/// [`REFUSAL_CALLS_LISTED`] of each kind, and how many were left off.
fn refusal_calls(input: &WeighInput) -> (Vec<RefusalCall>, usize) {
    let rows = || input.baseline.iter().zip(input.candidate).enumerate();
    let out_of_scope = rows().filter(|(_, (b, _))| b.expect == Expect::Refuse);
    let declined_in_scope =
        rows().filter(|(_, (b, c))| b.expect == Expect::Answer && (b.refused || c.refused));
    let (mut calls, mut left_off) = (Vec::new(), 0);
    for kind in [
        out_of_scope.map(|(i, _)| i).collect::<Vec<_>>(),
        declined_in_scope.map(|(i, _)| i).collect(),
    ] {
        left_off += kind.len().saturating_sub(REFUSAL_CALLS_LISTED);
        calls.extend(kind.into_iter().take(REFUSAL_CALLS_LISTED).map(|i| {
            let q = &input.set.questions[i];
            let (b, c) = (&input.baseline[i], &input.candidate[i]);
            RefusalCall {
                id: q.id.clone(),
                category: q.category.clone(),
                question: q.question.clone(),
                expect: b.expect,
                baseline_answer: b.answer.clone(),
                baseline_declined: b.refused,
                candidate_answer: c.answer.clone(),
                candidate_declined: c.refused,
            }
        }));
    }
    (calls, left_off)
}

/// Fact recall (paired, like the metrics) and contradiction shares (Wilson), over in-scope
/// questions both grades files give fact scores. `None` when neither file has any (grades
/// written before fact scoring).
pub(super) fn facts_block(input: &WeighInput) -> Option<Facts> {
    let has =
        |rows: &[crate::formats::grades::GradeRecord]| rows.iter().any(|g| g.fact_recall.is_some());
    if !has(input.baseline) && !has(input.candidate) {
        return None;
    }
    let s = input.settings;
    let mut p = Paired {
        index: vec![],
        base: vec![],
        cand: vec![],
        diff: vec![],
    };
    let (mut cb, mut cc) = (0u64, 0u64);
    for (i, (b, c)) in input.baseline.iter().zip(input.candidate).enumerate() {
        if b.expect != Expect::Answer {
            continue;
        }
        if let (Some(x), Some(y)) = (b.fact_recall, c.fact_recall) {
            p.index.push(i);
            p.base.push(x);
            p.cand.push(y);
            p.diff.push(y - x);
            cb += u64::from(b.fact_contradiction == Some(true));
            cc += u64::from(c.fact_contradiction == Some(true));
        }
    }
    let lift = (!p.diff.is_empty()).then(|| {
        paired_bootstrap(
            &p.diff,
            s.resamples,
            s.confidence,
            s.seed,
            rng::DOMAIN_FACTS_BOOTSTRAP,
        )
    });
    let p_value = (!p.diff.is_empty()).then(|| {
        sign_flip_test(&p.diff, s.resamples, s.seed, rng::DOMAIN_FACTS_PERMUTATION).p_value
    });
    let n = p.diff.len() as u64;
    let share = |count: u64| {
        let r = rate(count, n, s.confidence);
        Share {
            count,
            share: r.share,
            ci_low: r.ci_low,
            ci_high: r.ci_high,
        }
    };
    Some(Facts {
        n: p.diff.len(),
        recall: metric_summary(&p, lift.as_ref(), p_value, input.policy),
        contradiction: ContradictionRates {
            baseline: share(cb),
            candidate: share(cc),
            interval: "wilson".to_string(),
        },
    })
}

/// Category names in order of first appearance in the set: a category's position gives it its
/// random-stream domain (and its stratum in a joint resample); the block itself is sorted by
/// name.
pub(super) fn category_order(set: &QuestionSet) -> Vec<&str> {
    let mut order: Vec<&str> = Vec::new();
    let mut seen = std::collections::HashSet::new();
    for q in &set.questions {
        if seen.insert(q.category.as_str()) {
            order.push(&q.category);
        }
    }
    order
}

/// The categories block. `boots` and `p_values`, when given, hold each category's bootstrap
/// resample means of the gate metric and its permutation p-value (in [`category_order`],
/// drawn jointly with the metrics': `stats::leaves`, `permutation::sign_flip_tests_by_stratum`);
/// otherwise each category is resampled and tested on streams of its own.
pub(super) fn categories_block(
    input: &WeighInput,
    gate: &Paired,
    boots: Option<&[Vec<f64>]>,
    p_values: Option<&[Option<f64>]>,
) -> BTreeMap<String, CategorySummary> {
    let s = input.settings;
    let policy = input.policy;
    let order = category_order(input.set);
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
            let lift = match boots.and_then(|b| b.get(ci)).filter(|b| !b.is_empty()) {
                Some(boot) => lift_intervals(&diff, boot, s.confidence),
                None => paired_bootstrap(
                    &diff,
                    s.resamples,
                    s.confidence,
                    s.seed,
                    rng::DOMAIN_CATEGORY_BOOTSTRAP + ci as u32,
                ),
            };
            let p = match p_values.and_then(|v| v.get(ci).copied().flatten()) {
                Some(p) => p,
                None => {
                    sign_flip_test(
                        &diff,
                        s.resamples,
                        s.seed,
                        rng::DOMAIN_CATEGORY_PERMUTATION + ci as u32,
                    )
                    .p_value
                }
            };
            with_p.push((name.to_string(), p));
            (Some(lift), Some(p))
        };
        let chosen = lift.as_ref().map(|l| chosen(l, policy.lift.interval));
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

pub(super) fn mde_block(diffs: &[f64], policy: &Policy, warnings: &mut Vec<String>) -> Mde {
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

pub(super) fn changes_block(input: &WeighInput, gate: &Paired, metric: Metric) -> Changes {
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
