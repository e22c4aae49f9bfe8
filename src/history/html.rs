//! trend.html: the trend for people, one self-contained page with the same look, safety and
//! rules as report.html (docs/html-report.md): no script, no request to anywhere, every piece
//! of user text escaped.
//!
//! Per question set: each metric's lift over the runs with its interval as a band and set
//! changes marked; the runs table (set revision and what changed, means, lift, refusal shares,
//! verdict); the like-for-like table on the questions common to every run shown and unchanged;
//! and the candidate-against-candidate comparisons in plain words.

use super::trend::{run_name, Comparison, Series, Trend, TrendRun};
use crate::policy::Metric;
use crate::report::charts::{trend_chart, TrendPoint};
use crate::report::html::{escape, figure, page_head, stylesheet, user};
use std::fmt::Write;

/// trend.html for a trend. Deterministic: the same trend gives the same bytes.
pub fn render(t: &Trend) -> String {
    let css = stylesheet();
    let mut o = String::with_capacity(32 * 1024);
    o.push_str(&page_head(
        "Runs over time · liftgate",
        &t.tool_version,
        &css,
    ));
    let _ = write!(
        o,
        "<header class=\"masthead\"><div class=\"wrap\"><div class=\"brand\">liftgate <span>runs over time</span></div>\
         <div class=\"meta\">history {} · {} question set(s)</div></div></header>\n<main class=\"wrap\">\n",
        user(&t.history),
        t.series.len()
    );
    if t.series.is_empty() {
        o.push_str("<section id=\"empty\"><h2>No runs recorded</h2><p>The history holds no run of the chosen set yet: <code>liftgate vet</code> and <code>liftgate weigh</code> record every run they finish, and <code>liftgate record</code> imports earlier report directories.</p></section>\n");
    }
    for (k, s) in t.series.iter().enumerate() {
        series_section(&mut o, k, s, t);
    }
    let _ = writeln!(
        o,
        "<section id=\"reading\"><h2>How to read this page</h2>\
         <p>Each run's own scores are over the question set as it was then. Where the set changed (questions added, removed or edited), those scores are not one series: a rise can come from easier questions as well as from a better model. The like-for-like table scores every run on the questions common to all runs shown whose content did not change, and the comparisons pair the candidates question by question on the questions both runs share unchanged.</p>\
         <p>Comparisons use {:.0}% intervals: about one comparison in {:.0} of two equally good candidates is flagged by chance. Automatic scores cannot show whether answers are right in ways the references do not cover, or safe; have people review a sample of answers for each revision you ship, and follow your organisation's own review rules for regulated topics.</p></section>",
        100.0 * t.comparison_settings.confidence,
        2.0 / (1.0 - t.comparison_settings.confidence)
    );
    let _ = write!(
        o,
        "</main>\n<footer class=\"wrap\">Written by liftgate {}. This page is one file: it runs no script and loads nothing from the network.</footer>\n</body>\n</html>\n",
        escape(&t.tool_version)
    );
    o
}

fn changed(r: &TrendRun) -> bool {
    r.set
        .change
        .as_ref()
        .is_some_and(|c| c.added + c.removed + c.edited + c.unverified > 0)
}

fn short_label(r: &TrendRun) -> String {
    match &r.label {
        Some(l) if !l.is_empty() => l.clone(),
        _ => format!("run {}", r.run),
    }
}

fn num(x: Option<f64>) -> String {
    x.map_or_else(|| "–".into(), |v| format!("{v:.3}"))
}

fn signed(x: Option<f64>) -> String {
    x.map_or_else(|| "–".into(), super::trend::signed)
}

fn pct(x: Option<f64>) -> String {
    x.map_or_else(|| "–".into(), |v| format!("{:.1}%", 100.0 * v))
}

fn series_section(o: &mut String, k: usize, s: &Series, t: &Trend) {
    let _ = write!(
        o,
        "<section id=\"set-{k}\" class=\"series\" data-set=\"{}\"><h2>Question set {}</h2>\n<p>{} run(s), {} revision(s) of the set.",
        escape(&s.set_name),
        user(&s.set_name),
        s.runs.len(),
        s.revisions
    );
    if s.set_changed {
        let _ = write!(
            o,
            " <strong>The set changed between these runs</strong>: its whole-set scores are not one series. {} question(s) are in every run with unchanged content; the like-for-like table below uses those.",
            s.common_unchanged_questions
        );
    }
    o.push_str("</p>\n");
    let gate = s
        .runs
        .last()
        .map(|r| r.gate_metric.as_str())
        .unwrap_or("token_f1");
    for m in Metric::ALL {
        let points: Vec<TrendPoint> = s
            .runs
            .iter()
            .map(|r| {
                let v = r.metrics.get(m);
                TrendPoint {
                    label: short_label(r),
                    value: v.lift,
                    ci_low: v.ci_low,
                    ci_high: v.ci_high,
                    set_changed: changed(r),
                }
            })
            .collect();
        let chart = trend_chart(m.label(), &points, (m.as_str() == gate).then_some(0.0));
        let numbers = runs_numbers(s, m);
        figure(
            o,
            &chart,
            &format!("{} lift over runs", m.label()),
            &numbers,
        );
    }
    runs_table(o, s, gate);
    like_for_like_table(o, s);
    let comparisons: Vec<&Comparison> = t
        .comparisons
        .iter()
        .filter(|c| s.runs.iter().any(|r| r.run == c.later))
        .collect();
    if !comparisons.is_empty() {
        o.push_str("<h3>Candidate against candidate</h3>\n<ul class=\"comparisons\">\n");
        for c in comparisons {
            let _ = writeln!(
                o,
                "<li class=\"{}\" data-regression=\"{}\">{}{}</li>",
                if c.regression { "fail" } else { "ok" },
                c.regression,
                if c.regression {
                    "<strong>Clearly worse:</strong> "
                } else {
                    ""
                },
                user(&c.sentence)
            );
        }
        o.push_str("</ul>\n");
    }
    o.push_str("</section>\n");
}

/// The numbers behind one metric's chart: run, lift and interval.
fn runs_numbers(s: &Series, m: Metric) -> String {
    let mut o = String::from("<div class=\"tablewrap\"><table><thead><tr><th>run</th><th>lift</th><th>interval</th><th>set</th></tr></thead><tbody>");
    for r in &s.runs {
        let v = r.metrics.get(m);
        let _ = write!(
            o,
            "<tr><td>{}</td><td>{}</td><td>{} to {}</td><td>{}</td></tr>",
            user(&run_name(r.run, r.label.as_deref())),
            signed(v.lift),
            signed(v.ci_low),
            signed(v.ci_high),
            if changed(r) { "changed" } else { "same" }
        );
    }
    o.push_str("</tbody></table></div>");
    o
}

fn runs_table(o: &mut String, s: &Series, gate: &str) {
    let metric = Metric::ALL
        .into_iter()
        .find(|m| m.as_str() == gate)
        .unwrap_or(Metric::TokenF1);
    let _ = write!(
        o,
        "<h3>Runs</h3>\n<div class=\"tablewrap\"><table class=\"runs\"><thead><tr><th>run</th><th>finished (UTC)</th><th>set revision</th><th>questions</th><th>{0} baseline → candidate</th><th>{0} lift (interval)</th><th>out of scope declined</th><th>in scope wrongly declined</th><th>verdict</th></tr></thead><tbody>\n",
        metric.label()
    );
    for r in &s.runs {
        let v = r.metrics.get(metric);
        let change = match &r.set.change {
            None => String::new(),
            Some(c) if c.added + c.removed + c.edited + c.unverified == 0 => " (unchanged)".into(),
            Some(c) => format!(
                " ({} added, {} removed, {} edited{})",
                c.added,
                c.removed,
                c.edited,
                if c.unverified > 0 {
                    format!(", {} unverified", c.unverified)
                } else {
                    String::new()
                }
            ),
        };
        let _ = writeln!(
            o,
            "<tr><td>{}</td><td>{}</td><td><code>{}</code>{}</td><td>{}</td><td>{} → {}</td><td>{} ({} to {})</td><td>{} → {}</td><td>{} → {}</td><td class=\"{}\">{}</td></tr>",
            user(&run_name(r.run, r.label.as_deref())),
            escape(&r.finished_at),
            escape(&r.set.short),
            escape(&change),
            r.set.questions,
            num(v.baseline),
            num(v.candidate),
            signed(v.lift),
            signed(v.ci_low),
            signed(v.ci_high),
            pct(r.refusal.out_of_scope.baseline),
            pct(r.refusal.out_of_scope.candidate),
            pct(r.refusal.false_refusal.baseline),
            pct(r.refusal.false_refusal.candidate),
            if r.verdict == "GO" { "pass" } else { "fail" },
            escape(&r.verdict)
        );
    }
    o.push_str("</tbody></table></div>\n");
}

fn like_for_like_table(o: &mut String, s: &Series) {
    let _ = write!(
        o,
        "<h3>Like for like</h3>\n<p>Every run scored on the {} question(s) common to all runs shown whose content did not change (in-scope ones count towards the means).</p>\n<div class=\"tablewrap\"><table class=\"like\"><thead><tr><th>run</th>",
        s.common_unchanged_questions
    );
    for m in Metric::ALL {
        let _ = write!(o, "<th>{} baseline → candidate (lift)</th>", m.label());
    }
    o.push_str("</tr></thead><tbody>\n");
    for r in &s.runs {
        let _ = write!(
            o,
            "<tr><td>{}</td>",
            user(&run_name(r.run, r.label.as_deref()))
        );
        for m in Metric::ALL {
            let v = r.like_for_like.get(m);
            let _ = write!(
                o,
                "<td>{} → {} ({}), n = {}</td>",
                num(v.baseline),
                num(v.candidate),
                signed(v.lift),
                v.n
            );
        }
        o.push_str("</tr>\n");
    }
    o.push_str("</tbody></table></div>\n");
}
