//! The gate checks of the policy (docs/policy.md): each with its threshold, the measured value,
//! pass or fail, and a plain-words reason when it fails.

use crate::policy::{IntervalKind, Policy, RegressionRule};
use crate::report::summary::*;
use std::collections::BTreeMap;

fn pct(x: f64) -> String {
    format!("{:.1}%", 100.0 * x)
}

pub(super) fn checks(
    policy: &Policy,
    answer_total: usize,
    gate: &MetricSummary,
    refusal: &Refusal,
    facts: Option<&Facts>,
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
        comparison: Comparison::AtLeast,
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
                IntervalKind::Bca => "BCa",
                IntervalKind::Percentile => "percentile",
            },
            metric.label()
        ),
        threshold: bar,
        value: gate.ci_low,
        comparison: Comparison::Above,
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
        comparison: Comparison::AtLeast,
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
        comparison: Comparison::AtMost,
        pass,
        reason,
    });

    if let Some(bar) = policy.facts.max_contradiction_increase {
        out.push(contradiction_check(bar, facts));
    }

    let allowance = policy.categories.max_regression;
    for (name, c) in categories.iter().filter(|(_, c)| c.judged) {
        let (value, comparison, pass) = match policy.categories.rule {
            RegressionRule::ClearRegression => (
                c.ci_high,
                Comparison::AtLeast,
                c.ci_high.is_some_and(|v| v >= -allowance),
            ),
            RegressionRule::NonInferiority => (
                c.ci_low,
                Comparison::Above,
                c.ci_low.is_some_and(|v| v > -allowance),
            ),
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
            comparison,
            pass,
            reason,
        });
    }
    out
}

/// `facts.contradiction`: the candidate's share of questions with a contradicted fact minus the
/// baseline's, at most `bar`.
fn contradiction_check(bar: f64, facts: Option<&Facts>) -> Check {
    let measured = facts.and_then(|f| {
        let c = &f.contradiction;
        Some((c.candidate.share? - c.baseline.share?, f))
    });
    let (value, pass, reason) = match measured {
        // A hair of slack so that shares like 3/10 − 2/10 = 0.1000…02 meet a 0.1 allowance.
        Some((v, _)) if v <= bar + 1e-12 => (Some(v), true, None),
        Some((v, f)) => (
            Some(v),
            false,
            Some(format!(
                "The fine-tuned model states a wrong time, price, date or other fact in {} of the questions with facts ({} of {}), against {} for the base model ({}); the policy allows at most {} more.",
                pct(f.contradiction.candidate.share.unwrap_or(0.0)),
                f.contradiction.candidate.count,
                f.n,
                pct(f.contradiction.baseline.share.unwrap_or(0.0)),
                f.contradiction.baseline.count,
                pct(bar)
            )),
        ),
        None => (
            None,
            false,
            Some(match facts {
                None => "The grades files hold no fact scores (graded by an older liftgate); grade the answers again to check contradictions.".to_string(),
                Some(_) => "No in-scope question has a reference stating a time, price, date or other checkable fact, so contradictions could not be checked.".to_string(),
            }),
        ),
    };
    Check {
        name: "facts.contradiction".into(),
        description:
            "candidate's share of questions with a contradicted fact, minus the baseline's".into(),
        threshold: bar,
        value,
        comparison: Comparison::AtMost,
        pass,
        reason,
    }
}
