//! The report's charts: each maps summary data onto one of the general drawings.

use super::*;
use crate::policy::RegressionRule;
use crate::report::summary::{MetricSummary, Rate, Summary};

/// The candidates of a summary with their series (one today; the list is general so several
/// fine-tunes get consistent colours).
fn candidates(_s: &Summary) -> Vec<Series> {
    vec![candidate_series(0, "candidate (fine-tuned)", "candidate")]
}

fn conf(s: &Summary) -> String {
    format!("{:.0}%", 100.0 * s.settings.confidence)
}

/// The metrics the summary holds: key, label and figures.
fn present_metrics(s: &Summary) -> Vec<(&str, &str, &MetricSummary)> {
    s.metrics
        .present()
        .into_iter()
        .map(|(m, summary)| (m.as_str(), m.label(), summary))
        .collect()
}

/// The lift of each metric with its interval, the zero line, the gate's bar and the target.
pub fn lift_chart(s: &Summary) -> Chart {
    let gate = s.policy.lift.metric;
    let cands = candidates(s);
    let metrics = present_metrics(s);
    let rows = metrics
        .iter()
        .map(|(key, label, m)| {
            let is_gate = *key == gate.as_str();
            Row {
                label: if is_gate {
                    format!("{label} (gate)")
                } else {
                    label.to_string()
                },
                note: match (m.baseline, m.candidate) {
                    (Some(b), Some(c)) => format!("{b:.3} → {c:.3}, n = {}", m.n),
                    _ => format!("n = {}", m.n),
                },
                strong: is_gate,
                muted: false,
                points: m
                    .lift
                    .map(|v| Point {
                        series: 0,
                        value: v,
                        lo: m.ci_low,
                        hi: m.ci_high,
                    })
                    .into_iter()
                    .collect(),
                limit: None,
                empty: "no questions to compare".into(),
            }
        })
        .collect();
    let bar = s.policy.lift.min_ci_low;
    let lines = vec![
        RefLine {
            value: 0.0,
            label: "no change".into(),
            kind: LineKind::Zero,
        },
        RefLine {
            value: bar,
            label: "gate bar".into(),
            kind: LineKind::Bar,
        },
        RefLine {
            value: s.policy.lift.target,
            label: format!("target {}", Fmt::Signed(3).show(s.policy.lift.target)),
            kind: LineKind::Target,
        },
    ];
    let caption = format!(
        "How much each score changed from the base model to the fine-tune (candidate minus baseline), with {} intervals; the gate needs the whole {} interval to the right of {}.",
        conf(s),
        gate.label(),
        Fmt::Signed(3).show(bar)
    );
    dot_whisker(&DotWhisker {
        id: "chart-lift".into(),
        title: "Lift per metric".into(),
        caption,
        series: cands,
        rows,
        lines,
        fmt: Fmt::Signed(3),
        domain: None,
    })
}

/// The gate metric's lift per category; categories too small to be judged drawn hollow and
/// dashed and labelled so.
pub fn category_chart(s: &Summary) -> Chart {
    let gate = s.policy.lift.metric;
    let min = s.policy.categories.min_questions;
    let rows = s
        .categories
        .iter()
        .map(|(name, c)| {
            let note = if c.judged {
                format!("n = {}", c.n)
            } else if c.n == 0 {
                format!("only out of scope ({})", c.refuse_questions)
            } else {
                format!("n = {}: too few to judge", c.n)
            };
            Row {
                label: name.clone(),
                note,
                strong: false,
                muted: !c.judged,
                points: c
                    .lift
                    .map(|v| Point {
                        series: 0,
                        value: v,
                        lo: c.ci_low,
                        hi: c.ci_high,
                    })
                    .into_iter()
                    .collect(),
                limit: None,
                empty: "no in-scope questions".into(),
            }
        })
        .collect();
    let allowance = s.policy.categories.max_regression;
    let rule = match s.policy.categories.rule {
        RegressionRule::ClearRegression => {
            "a category fails only if its whole interval lies left of the allowed loss"
        }
        RegressionRule::NonInferiority => {
            "a category passes only if its whole interval lies right of the allowed loss"
        }
    };
    let caption = format!(
        "Change in {} per category with {} intervals; {rule}; categories with fewer than {min} in-scope questions are drawn hollow and not judged.",
        gate.label(),
        conf(s)
    );
    dot_whisker(&DotWhisker {
        id: "chart-categories".into(),
        title: format!("{} lift per category", gate.label()),
        caption,
        series: candidates(s),
        rows,
        lines: vec![
            RefLine {
                value: 0.0,
                label: "no change".into(),
                kind: LineKind::Zero,
            },
            RefLine {
                value: -allowance,
                label: format!("allowed loss {}", Fmt::Signed(3).show(-allowance)),
                kind: LineKind::Bar,
            },
        ],
        fmt: Fmt::Signed(3),
        domain: None,
    })
}

/// Refusal shares with Wilson intervals, baseline and candidate, against the policy's limits.
pub fn refusal_chart(s: &Summary) -> Chart {
    let mut series = vec![baseline_series()];
    series.extend(candidates(s));
    let point = |series: usize, r: &Rate| {
        r.share.map(|v| Point {
            series,
            value: v,
            lo: r.ci_low,
            hi: r.ci_high,
        })
    };
    let r = &s.refusal;
    let p = &s.policy.refusal;
    let rows = vec![
        Row {
            label: "out of scope, declined".into(),
            note: format!(
                "n = {}; needs at least {}",
                r.out_of_scope.n,
                Fmt::Percent(0).show(p.min_out_of_scope)
            ),
            strong: false,
            muted: false,
            points: [
                point(0, &r.out_of_scope.baseline),
                point(1, &r.out_of_scope.candidate),
            ]
            .into_iter()
            .flatten()
            .collect(),
            limit: Some(Limit {
                value: p.min_out_of_scope,
                fail: FailSide::Below,
            }),
            empty: "no out-of-scope questions".into(),
        },
        Row {
            label: "in scope, wrongly declined".into(),
            note: format!(
                "n = {}; allows at most {}",
                r.false_refusal.n,
                Fmt::Percent(0).show(p.max_false_refusal)
            ),
            strong: false,
            muted: false,
            points: [
                point(0, &r.false_refusal.baseline),
                point(1, &r.false_refusal.candidate),
            ]
            .into_iter()
            .flatten()
            .collect(),
            limit: Some(Limit {
                value: p.max_false_refusal,
                fail: FailSide::Above,
            }),
            empty: "no in-scope questions".into(),
        },
    ];
    let caption = format!(
        "Share of questions each model declined, with {} Wilson intervals: out-of-scope questions should be declined, in-scope ones answered; the hatched side of each heavy dashed line fails the policy.",
        conf(s)
    );
    dot_whisker(&DotWhisker {
        id: "chart-refusals".into(),
        title: "Refusals against the policy's limits".into(),
        caption,
        series,
        rows,
        lines: vec![],
        fmt: Fmt::Percent(1),
        domain: Some((0.0, 1.0)),
    })
}

/// How many questions scored higher, lower or the same with the fine-tune, per metric.
pub fn changes_chart(s: &Summary) -> Chart {
    let gate = s.policy.lift.metric;
    let metrics = present_metrics(s);
    let rows = metrics
        .iter()
        .map(|(key, label, m)| BarRow {
            label: if *key == gate.as_str() {
                format!("{label} (gate)")
            } else {
                label.to_string()
            },
            note: format!("n = {}", m.n),
            strong: *key == gate.as_str(),
            segments: vec![
                Segment {
                    label: "worse".into(),
                    count: m.worse as u64,
                    colour: WORSE,
                    hatched: true,
                },
                Segment {
                    label: "same".into(),
                    count: m.same as u64,
                    colour: SAME,
                    hatched: false,
                },
                Segment {
                    label: "better".into(),
                    count: m.better as u64,
                    colour: BETTER,
                    hatched: false,
                },
            ],
        })
        .collect();
    stacked_bars(&StackedBars {
        id: "chart-changes".into(),
        title: "Per-question changes".into(),
        caption: "How many in-scope questions scored lower, the same or higher with the fine-tune than with the base model, per metric.".into(),
        rows,
    })
}

/// One metric over runs with interval bands and set changes marked (for a page over the
/// history of runs). `bar` is the policy's bar for this metric, if it has one.
pub fn trend_chart(metric_label: &str, points: &[TrendPoint], bar: Option<f64>) -> Chart {
    let id = format!("chart-trend-{}", sanitize_id(metric_label));
    let caption = format!(
        "Lift in {metric_label} run by run, with its interval as a band; a dashed mark shows where the question set changed, so values either side are not directly comparable."
    );
    let bar_label = bar.map(|b| format!("gate bar {}", Fmt::Signed(3).show(b)));
    time_series(&TimeSeries {
        id: &id,
        title: &format!("{metric_label} lift over runs"),
        caption: &caption,
        points,
        fmt: Fmt::Signed(3),
        bar: bar.zip(bar_label.as_deref()),
        series: &candidate_series(0, "candidate", "candidate"),
    })
}
