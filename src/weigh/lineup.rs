//! A baseline against several candidates (docs/interface.md, "Several candidates"): each
//! candidate is weighed against the baseline on its own ([`super::weigh`]); this module adds
//! what only the whole lineup can say.
//!
//! - **Holm across candidates.** Each candidate's gate-metric lift has a sign-flip permutation
//!   p-value; with k candidates, the chance that at least one looks better by luck grows with
//!   k. The p-values are adjusted with Holm's step-down method (`stats::multiple::holm`) and
//!   every candidate's verdict gets one more check: its adjusted p-value must be at most
//!   1 − confidence.
//! - **Lift kept.** An artifact made from another candidate (a merged or 16-bit checkpoint of the
//!   same adapter) is compared with it question by question: the share of the source's lift it
//!   keeps, mean(artifact − baseline) / mean(source − baseline), and the paired bootstrap
//!   interval of mean(artifact − source) over the questions all three have scored (the same
//!   questions, so the comparison is paired). An interval wholly below zero is a loss the data
//!   show.

use super::{score, Settings};
use crate::formats::grades::GradeRecord;
use crate::formats::questions::{Expect, QuestionSet};
use crate::policy::Policy;
use crate::report::lineup::{LiftKept, Lineup, LineupRow, WorseAnswer, FORMAT, WORSE_SHOWN};
use crate::report::summary::{Check, Comparison, Summary};
use crate::stats::bootstrap::paired_bootstrap;
use crate::stats::multiple::holm;
use crate::stats::rng;

/// One candidate of the lineup: its name, how it was made, its grades and its summary against
/// the baseline (verdict before the lineup's own check).
pub struct Candidate<'a> {
    pub name: &'a str,
    pub describe: String,
    /// `from`: the candidate this artifact was made from.
    pub from: Option<&'a str>,
    pub grades: &'a [GradeRecord],
    pub summary: &'a mut Summary,
}

/// Adds the Holm check to every candidate's verdict and builds the lineup.
pub fn lineup(
    set: &QuestionSet,
    baseline_name: &str,
    baseline_describe: String,
    baseline: &[GradeRecord],
    candidates: &mut [Candidate],
    policy: &Policy,
    settings: Settings,
) -> Lineup {
    let metric = policy.lift.metric;
    let alpha = 1.0 - settings.confidence;
    let k = candidates.len();
    // Weighing refuses a policy that gates on a metric the grades lack, so the gate metric
    // is there; an empty one would only mean "no p-value".
    let gate_of = |s: &Summary| {
        s.metrics
            .get(metric)
            .cloned()
            .unwrap_or_else(|| super::blocks::empty_metric(policy))
    };
    // A candidate with no p-value (nothing scored) counts as p = 1.
    let raw: Vec<f64> = candidates
        .iter()
        .map(|c| gate_of(c.summary).p_value.unwrap_or(1.0))
        .collect();
    let adjusted = holm(&raw);
    let mut rows = Vec::with_capacity(k);
    for (c, &p_holm) in candidates.iter_mut().zip(&adjusted) {
        let pass = p_holm <= alpha;
        c.summary.verdict.checks.push(Check {
            name: format!("lift.{}.holm", metric.as_str()),
            description: format!(
                "p-value of the {} lift, Holm-adjusted across the {k} candidates of this run",
                metric.label()
            ),
            threshold: alpha,
            value: Some(p_holm),
            comparison: Comparison::AtMost,
            pass,
            reason: (!pass).then(|| format!(
                "With {k} candidates compared against one baseline, some would look better by chance alone; after allowing for that (Holm), this candidate's lift in {} is not clear (adjusted p = {p_holm:.3}, needs at most {alpha:.3}).",
                metric.label()
            )),
        });
        c.summary.verdict.go = c.summary.verdict.checks.iter().all(|ch| ch.pass);
        let g = gate_of(c.summary);
        rows.push(LineupRow {
            name: c.name.to_string(),
            describe: c.describe.clone(),
            from: c.from.map(str::to_string),
            report: format!("{}/report.md", c.name),
            baseline: g.baseline,
            candidate: g.candidate,
            lift: g.lift,
            ci_low: g.ci_low,
            ci_high: g.ci_high,
            p_value: g.p_value,
            p_holm,
            go: c.summary.verdict.go,
            failed: c
                .summary
                .verdict
                .checks
                .iter()
                .filter(|ch| !ch.pass)
                .map(|ch| ch.name.clone())
                .collect(),
        });
    }
    let mut kept = Vec::new();
    for (i, c) in candidates.iter().enumerate() {
        let Some(from) = c.from else { continue };
        let Some(src) = candidates.iter().find(|s| s.name == from) else {
            continue;
        };
        kept.push(lift_kept(
            set, baseline, c.name, c.grades, src.name, src.grades, metric, settings, i,
        ));
    }
    Lineup {
        format: FORMAT.to_string(),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        baseline: baseline_name.to_string(),
        baseline_describe,
        metric: metric.as_str().to_string(),
        metric_label: metric.label().to_string(),
        confidence: settings.confidence,
        resamples: settings.resamples,
        seed: settings.seed,
        go: rows.iter().all(|r| r.go),
        candidates: rows,
        kept,
    }
}

/// How much of `source`'s lift `artifact` keeps, with the paired interval of their difference.
#[allow(clippy::too_many_arguments)]
fn lift_kept(
    set: &QuestionSet,
    baseline: &[GradeRecord],
    artifact: &str,
    art: &[GradeRecord],
    source: &str,
    src: &[GradeRecord],
    metric: crate::policy::Metric,
    settings: Settings,
    index: usize,
) -> LiftKept {
    let (mut lift_src, mut lift_art, mut diff) = (Vec::new(), Vec::new(), Vec::new());
    let mut worse = Vec::new();
    for (((q, b), ag), sg) in set.questions.iter().zip(baseline).zip(art).zip(src) {
        if q.expect != Expect::Answer {
            continue;
        }
        if let (Some(b), Some(a), Some(s)) =
            (score(b, metric), score(ag, metric), score(sg, metric))
        {
            lift_src.push(s - b);
            lift_art.push(a - b);
            diff.push(a - s);
            if a < s {
                worse.push(WorseAnswer {
                    id: q.id.clone(),
                    question: q.question.clone(),
                    reference: q.references.first().cloned().unwrap_or_default(),
                    source_answer: sg.answer.clone(),
                    source_score: s,
                    artifact_answer: ag.answer.clone(),
                    artifact_score: a,
                });
            }
        }
    }
    // Largest drop first; ties in set order (the sort is stable).
    worse.sort_by(|x, y| {
        let drop = |w: &WorseAnswer| w.source_score - w.artifact_score;
        drop(y).total_cmp(&drop(x))
    });
    let worse_total = worse.len();
    worse.truncate(WORSE_SHOWN);
    let n = diff.len();
    let mean = |v: &[f64]| crate::stats::mean(v);
    let (ms, ma) = (mean(&lift_src), mean(&lift_art));
    let share = match (ms, ma) {
        (Some(s), Some(a)) if s > 0.0 => Some(a / s),
        _ => None,
    };
    let interval = (n > 0).then(|| {
        paired_bootstrap(
            &diff,
            settings.resamples,
            settings.confidence,
            settings.seed,
            rng::DOMAIN_LINEUP_BOOTSTRAP + index as u32,
        )
    });
    let (d, lo, hi) = match &interval {
        Some(l) => (
            Some(l.estimate),
            Some(l.percentile.low),
            Some(l.percentile.high),
        ),
        None => (None, None, None),
    };
    let clear_loss = hi.is_some_and(|h| h < 0.0);
    let label = metric.label();
    let words = match (share, d, lo, hi) {
        (_, None, _, _) => format!("{artifact} and {source} have no in-scope question scored by both; nothing can be said about the lift {artifact} keeps."),
        (None, Some(d), Some(lo), Some(hi)) => format!(
            "{source} shows no lift over the baseline, so there is no lift for {artifact} to keep; {artifact} − {source}: {d:+.3} {label} ({lo:+.3} to {hi:+.3})."
        ),
        (Some(sh), Some(d), Some(lo), Some(hi)) if clear_loss => format!(
            "{artifact} keeps {:.0}% of the lift of {source} and loses a clear part of it: {d:+.3} {label} against {source} ({lo:+.3} to {hi:+.3}).",
            100.0 * sh
        ),
        (Some(sh), Some(d), Some(lo), Some(hi)) => format!(
            "{artifact} keeps {:.0}% of the lift of {source}; nothing lost that the data can show ({artifact} − {source}: {d:+.3} {label}, {lo:+.3} to {hi:+.3}).",
            100.0 * sh
        ),
        _ => String::new(),
    };
    LiftKept {
        name: artifact.to_string(),
        from: source.to_string(),
        n,
        share,
        diff: d,
        ci_low: lo,
        ci_high: hi,
        clear_loss,
        words,
        worse_total,
        worse,
    }
}

/// [`lift_kept`] on the token F1 with small settings, for the weighing tests.
#[cfg(test)]
pub(super) fn lift_kept_for_tests(
    set: &QuestionSet,
    baseline: &[GradeRecord],
    artifact: &str,
    art: &[GradeRecord],
    source: &str,
    src: &[GradeRecord],
) -> LiftKept {
    let settings = Settings {
        resamples: 200,
        seed: 7,
        confidence: 0.95,
    };
    let metric = crate::policy::Metric::TokenF1;
    lift_kept(
        set, baseline, artifact, art, source, src, metric, settings, 0,
    )
}
