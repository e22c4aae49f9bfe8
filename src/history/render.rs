//! Renderings of a [`Trend`]: the terminal tables `trend` prints on stdout and trend.md.
//! trend.json is the [`Trend`] itself ([`trend_json`]); any other rendering reads the same
//! struct.
//!
//! Where a series' runs were made on different set contents, both renderings say so above
//! the whole-set table and show the like-for-like table beside it: whole-set scores of
//! different sets are never laid out as one series without that note.

use super::trend::{MeanPair, MetricValues, SharePair, Trend, TrendRun};
use crate::error::{Error, Result};
use crate::policy::Metric;
use crate::report::markdown::escape;
use comfy_table::{presets, Table};

/// trend.json as bytes: pretty-printed, trailing newline.
pub fn trend_json(t: &Trend) -> Result<Vec<u8>> {
    let mut bytes = serde_json::to_vec_pretty(t)
        .map_err(|e| Error::internal(format!("cannot serialise the trend: {e}")))?;
    bytes.push(b'\n');
    Ok(bytes)
}

fn num(x: Option<f64>) -> String {
    x.map_or("-".into(), |v| format!("{v:.3}"))
}

fn arrow(b: Option<f64>, c: Option<f64>) -> String {
    format!("{} → {}", num(b), num(c))
}

fn lift_cell(m: &MetricValues) -> String {
    match (m.lift, m.ci_low, m.ci_high) {
        (Some(l), Some(lo), Some(hi)) => format!(
            "{} ({} to {})",
            super::trend::signed(l),
            super::trend::signed(lo),
            super::trend::signed(hi)
        ),
        (Some(l), _, _) => super::trend::signed(l),
        _ => "-".into(),
    }
}

fn shares(s: &SharePair) -> String {
    format!("{} → {} of {}", num(s.baseline), num(s.candidate), s.n)
}

fn gate(run: &TrendRun) -> Metric {
    Metric::ALL
        .into_iter()
        .find(|m| m.as_str() == run.gate_metric)
        .unwrap_or(Metric::TokenF1)
}

/// `2026-03-04 10:11` from an RFC 3339 time.
fn minute(t: &str) -> String {
    t.get(..16).unwrap_or(t).replace('T', " ")
}

fn plain(text: &str) -> String {
    text.chars()
        .map(|c| if c.is_control() { '?' } else { c })
        .collect()
}

fn change_cell(run: &TrendRun) -> String {
    match &run.set.change {
        None => "first shown".into(),
        Some(c) => c.describe(),
    }
}

/// The header line of a series.
fn series_heading(s: &super::trend::Series) -> String {
    let runs = s.runs.len();
    let mut h = format!(
        "question set {}: {runs} run{}, {} revision{}",
        s.set_name,
        if runs == 1 { "" } else { "s" },
        s.revisions,
        if s.revisions == 1 { "" } else { "s" }
    );
    if s.set_changed {
        h.push_str(&format!(
            ". The set's content changed between these runs: their whole-set scores are NOT one like-for-like series. Like for like: {} question{} common to all runs shown with unchanged content",
            s.common_unchanged_questions,
            if s.common_unchanged_questions == 1 { "" } else { "s" }
        ));
    }
    h
}

fn whole_set_rows(s: &super::trend::Series) -> (Vec<&'static str>, Vec<Vec<String>>) {
    let header = vec![
        "run",
        "finished (UTC)",
        "label",
        "set",
        "change",
        "questions",
        "exact match",
        "token F1",
        "ROUGE-L",
        "gate lift (interval)",
        "out-of-scope declined",
        "false refusals",
        "verdict",
    ];
    let rows = s
        .runs
        .iter()
        .map(|r| {
            let g = gate(r);
            vec![
                r.run.to_string(),
                minute(&r.finished_at),
                r.label.clone().unwrap_or_default(),
                r.set.short.clone(),
                change_cell(r),
                r.set.questions.to_string(),
                arrow(
                    r.metrics.exact_match.baseline,
                    r.metrics.exact_match.candidate,
                ),
                arrow(r.metrics.token_f1.baseline, r.metrics.token_f1.candidate),
                arrow(r.metrics.rouge_l.baseline, r.metrics.rouge_l.candidate),
                format!("{}: {}", g.label(), lift_cell(r.metrics.get(g))),
                shares(&r.refusal.out_of_scope),
                shares(&r.refusal.false_refusal),
                r.verdict.clone(),
            ]
        })
        .collect();
    (header, rows)
}

fn pair(m: &MeanPair) -> String {
    format!("{} (n={})", arrow(m.baseline, m.candidate), m.n)
}

fn like_rows(s: &super::trend::Series) -> (Vec<&'static str>, Vec<Vec<String>>) {
    let header = vec!["run", "label", "exact match", "token F1", "ROUGE-L"];
    let rows = s
        .runs
        .iter()
        .map(|r| {
            vec![
                r.run.to_string(),
                r.label.clone().unwrap_or_default(),
                pair(&r.like_for_like.exact_match),
                pair(&r.like_for_like.token_f1),
                pair(&r.like_for_like.rouge_l),
            ]
        })
        .collect();
    (header, rows)
}

/// The terminal rendering: per series a heading, the whole-set table, the like-for-like
/// table when the set changed; then one line per comparison.
pub fn terminal(t: &Trend) -> String {
    let mut out = String::new();
    let table = |header: Vec<&str>, rows: Vec<Vec<String>>| {
        let mut tb = Table::new();
        tb.load_style(presets::ASCII_FULL_CONDENSED);
        tb.set_header(header);
        for r in rows {
            tb.add_row(r.into_iter().map(|c| plain(&c)).collect::<Vec<_>>());
        }
        tb.to_string()
    };
    for s in &t.series {
        out.push_str(&plain(&series_heading(s)));
        out.push('\n');
        let (h, rows) = whole_set_rows(s);
        out.push_str(&table(h, rows));
        out.push('\n');
        if s.set_changed {
            out.push_str(&format!(
                "like for like, on the {} questions common to all runs shown with unchanged content (baseline → candidate; n = in-scope questions scored):\n",
                s.common_unchanged_questions
            ));
            let (h, rows) = like_rows(s);
            out.push_str(&table(h, rows));
            out.push('\n');
        }
        out.push('\n');
    }
    if !t.comparisons.is_empty() {
        out.push_str(&format!(
            "candidate against candidate ({:.0}% BCa interval of the mean per-question difference, {} resamples):\n",
            t.comparison_settings.confidence * 100.0,
            t.comparison_settings.resamples
        ));
        for c in &t.comparisons {
            out.push_str(&format!("- {}\n", plain(&c.sentence)));
        }
    }
    out
}

fn md_table(header: &[&str], rows: &[Vec<String>]) -> String {
    let mut s = format!("| {} |\n", header.join(" | "));
    s.push_str(&format!("|{}\n", "---|".repeat(header.len())));
    for r in rows {
        let cells: Vec<String> = r.iter().map(|c| escape(c)).collect();
        s.push_str(&format!("| {} |\n", cells.join(" | ")));
    }
    s
}

/// trend.md.
pub fn markdown(t: &Trend) -> String {
    let mut out = String::from("# Trend of recorded runs\n\n");
    out.push_str(&format!(
        "History: {}. Each run's whole-set numbers are copied from its own summary.json. Arrows read baseline → candidate.\n\n",
        escape(&t.history)
    ));
    for s in &t.series {
        out.push_str(&format!("## {}\n\n", escape(&s.set_name)));
        out.push_str(&format!("{}.\n\n", escape(&series_heading(s))));
        let (h, rows) = whole_set_rows(s);
        out.push_str(&md_table(&h, &rows));
        out.push('\n');
        if s.set_changed {
            out.push_str(&format!(
                "### Like for like: the {} questions common to all runs above with unchanged content\n\n",
                s.common_unchanged_questions
            ));
            let (h, rows) = like_rows(s);
            out.push_str(&md_table(&h, &rows));
            out.push('\n');
        }
    }
    if !t.comparisons.is_empty() {
        out.push_str("## Candidate against candidate\n\n");
        out.push_str(&format!(
            "Question by question on the questions both runs hold with unchanged content; {:.0}% BCa interval of the mean difference ({} resamples, seed {}).\n\n",
            t.comparison_settings.confidence * 100.0,
            t.comparison_settings.resamples,
            t.comparison_settings.seed
        ));
        for c in &t.comparisons {
            let flag = if c.regression { "**Regression.** " } else { "" };
            out.push_str(&format!("- {flag}{}\n", escape(&c.sentence)));
        }
        out.push('\n');
    }
    out.push_str(
        "## What these numbers cannot show\n\n\
         Automatic scores compare answers with reference texts; they cannot tell whether an answer \
         that scores well is correct, safe or kind to a customer, nor whether the questions still \
         stand for what customers ask. Read a sample of each revision's answers side by side before \
         rolling it out, and follow your organisation's own review rules for regulated topics.\n",
    );
    out
}
