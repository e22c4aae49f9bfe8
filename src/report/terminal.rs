//! The terminal summary `weigh` prints on stdout: scriptable first line `verdict: GO` or
//! `verdict: NO-GO`, then `failed: <check names>` when any failed, then one compact ASCII table
//! of the metrics (with `fact_recall` and `fact_contradiction` rows when the grades hold fact
//! scores; the contradiction row's lift is the difference of shares) and one of the gate checks. No colours, no terminal-width dependence.

use super::summary::*;
use super::Renderer;
use comfy_table::{presets, Table};

pub struct Terminal;

impl Renderer for Terminal {
    fn file_name(&self) -> &'static str {
        "summary.txt"
    }

    fn render(&self, s: &Summary) -> String {
        render(s)
    }
}

fn f(x: Option<f64>, signed: bool) -> String {
    match x {
        Some(v) if signed => format!("{v:+.3}"),
        Some(v) => format!("{v:.3}"),
        None => "-".into(),
    }
}

pub fn render(s: &Summary) -> String {
    let mut out = format!("verdict: {}\n", if s.verdict.go { "GO" } else { "NO-GO" });
    let failed: Vec<String> = s
        .verdict
        .checks
        .iter()
        .filter(|c| !c.pass)
        .map(|c| sanitize(&c.name))
        .collect();
    if !failed.is_empty() {
        out.push_str(&format!("failed: {}\n", failed.join(", ")));
    }
    let mut t = Table::new();
    t.load_style(presets::ASCII_FULL_CONDENSED);
    t.set_header(vec![
        "metric",
        "baseline",
        "candidate",
        "lift",
        "ci_low",
        "ci_high",
        "p_value",
        "n",
    ]);
    for (metric, m) in s.metrics.present() {
        t.add_row(metric_row(metric.as_str(), m));
    }
    if let Some(fa) = &s.facts {
        t.add_row(metric_row("fact_recall", &fa.recall));
        let c = &fa.contradiction;
        let lift = match (c.baseline.share, c.candidate.share) {
            (Some(b), Some(c)) => Some(c - b),
            _ => None,
        };
        t.add_row(vec![
            "fact_contradiction".to_string(),
            f(c.baseline.share, false),
            f(c.candidate.share, false),
            f(lift, true),
            "-".into(),
            "-".into(),
            "-".into(),
            fa.n.to_string(),
        ]);
    }
    out.push_str(&t.to_string());
    out.push('\n');
    let mut c = Table::new();
    c.load_style(presets::ASCII_FULL_CONDENSED);
    c.set_header(vec!["check", "threshold", "value", "result"]);
    for ch in &s.verdict.checks {
        c.add_row(vec![
            sanitize(&ch.name),
            format!("{} {}", ch.comparison.as_str(), trim(ch.threshold)),
            ch.value.map(trim).unwrap_or_else(|| "-".into()),
            if ch.pass { "pass" } else { "FAIL" }.to_string(),
        ]);
    }
    out.push_str(&c.to_string());
    out.push('\n');
    out
}

fn metric_row(name: &str, m: &MetricSummary) -> Vec<String> {
    vec![
        name.to_string(),
        f(m.baseline, false),
        f(m.candidate, false),
        f(m.lift, true),
        f(m.ci_low, true),
        f(m.ci_high, true),
        m.p_value
            .map(|p| format!("{p:.4}"))
            .unwrap_or_else(|| "-".into()),
        m.n.to_string(),
    ]
}

fn trim(v: f64) -> String {
    let s = format!("{v:.4}");
    let s = s.trim_end_matches('0').trim_end_matches('.');
    if s == "-0" {
        "0".into()
    } else {
        s.to_string()
    }
}

/// Category names come from user files: keep control characters off the terminal.
fn sanitize(text: &str) -> String {
    text.chars()
        .map(|c| if c.is_control() { '?' } else { c })
        .collect()
}
