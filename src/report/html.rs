//! report.html: the weighing as one self-contained page for people who do not read Markdown —
//! a product owner, a support lead, a reviewer.
//!
//! Order: the verdict and its reasons in plain words, warnings, key figures, the charts (lift
//! per metric, lift per category, refusals against the policy's limits, per-question changes),
//! the gate checks, the questions that got worse and better with both answers side by side,
//! cautions, and the inputs with their fingerprints last.
//!
//! Self-contained and inert: one file with inline CSS and inline SVG (see [`super::charts`]), no
//! script, no external resource, no web font (the system's own sans-serif). A
//! Content-Security-Policy forbids scripts, network access, forms and every style but the page's
//! own stylesheet (pinned by its SHA-256), so even text that slipped past escaping could not run
//! or load anything. Every piece of user text (answers, questions, references, ids, categories,
//! paths, and our sentences quoting them) goes through [`escape`]. A print stylesheet lays the
//! page out for A4; below 640 px wide the layout becomes one column.

use super::charts::{self, Chart};
pub use super::inert::escape;
use super::markdown::{pct, rate, share};
use super::summary::*;
use super::Renderer;
use crate::formats::questions::Expect;
use crate::policy::IntervalKind;
use sha2::{Digest, Sha256};
use std::fmt::Write;

/// Answers longer than this (in characters) are folded: a preview, and the whole text behind a
/// `<details>` element that opens without script.
pub const FOLD_CHARS: usize = 360;
/// Characters of a folded answer's preview.
const PREVIEW_CHARS: usize = 240;
/// Longest user text shown at all; the grades file holds the rest.
pub const MAX_CHARS: usize = 10_000;

pub struct Html;

impl Renderer for Html {
    fn file_name(&self) -> &'static str {
        "report.html"
    }

    fn render(&self, s: &Summary) -> String {
        render(s)
    }
}

/// [`escape`] of at most `limit` characters, with "…" when cut.
fn escape_cut(text: &str, limit: usize) -> String {
    if text.chars().count() <= limit {
        escape(text)
    } else {
        let cut: String = text.chars().take(limit).collect();
        format!("{}…", escape(&cut))
    }
}

/// User text as an isolated run (`<bdi>`), so right-to-left text cannot reorder what is
/// around it.
pub(crate) fn user(text: &str) -> String {
    format!("<bdi>{}</bdi>", escape_cut(text, MAX_CHARS))
}

/// The page's stylesheet. Its SHA-256 goes into the Content-Security-Policy, so no other style
/// can apply.
pub fn stylesheet() -> String {
    let mut css = String::from(PAGE_CSS);
    css.push_str(charts::CSS);
    css.push_str(PRINT_CSS);
    css
}

/// The Content-Security-Policy: nothing may load or run; only the page's own stylesheet
/// (by hash) applies. `frame-ancestors` and `sandbox` are not allowed in a `<meta>` policy, so
/// they are left out.
pub fn content_security_policy(css: &str) -> String {
    let digest = Sha256::digest(css.as_bytes());
    format!(
        "default-src 'none'; style-src 'sha256-{}'; img-src data:; base-uri 'none'; form-action 'none'",
        base64::encode(digest)
    )
}

const PAGE_CSS: &str = "\
:root{--ink:#1b2631;--soft:#4d5866;--line:#d9dee4;--panel:#f3f5f8;--blue:#1f63a6;--blue-bg:#e5eef8;--orange:#b4530b;--orange-bg:#fbeadc;--orange-ink:#7f3a06;--blue-ink:#164a7e}\
*{box-sizing:border-box}\
html{-webkit-text-size-adjust:100%;text-size-adjust:100%}\
body{margin:0;background:#fff;color:var(--ink);font:16px/1.5 system-ui,-apple-system,\"Segoe UI\",Roboto,\"Noto Sans\",\"Liberation Sans\",Arial,sans-serif}\
code,.mono{font-family:ui-monospace,\"SFMono-Regular\",Menlo,Consolas,\"Liberation Mono\",monospace;font-size:.88em}\
.wrap{max-width:980px;margin:0 auto;padding:0 20px}\
.masthead{border-bottom:3px solid var(--ink);padding:14px 0 10px}\
.masthead .wrap{display:flex;flex-wrap:wrap;gap:4px 18px;align-items:baseline;justify-content:space-between}\
.brand{font-weight:800;letter-spacing:.02em;font-size:1.05rem}\
.brand span{font-weight:400;color:var(--soft)}\
.masthead .meta{color:var(--soft);font-size:.9rem;overflow-wrap:anywhere}\
h1{font-size:1.7rem;line-height:1.25;margin:0 0 .5rem}\
h2{font-size:1.3rem;margin:2.2rem 0 .6rem;padding-bottom:.25rem;border-bottom:1px solid var(--line)}\
h3{font-size:1.05rem;margin:1.4rem 0 .3rem}\
p{margin:.5rem 0}\
.verdict{margin:22px 0 8px;padding:18px 20px;border-left:10px solid;border-radius:4px}\
.verdict.go{background:var(--blue-bg);border-color:var(--blue)}\
.verdict.nogo{background:var(--orange-bg);border-color:var(--orange)}\
.verdict .head{display:flex;gap:14px;align-items:center}\
.verdict .head svg{flex:none;width:52px;height:52px}\
.verdict .word{display:block;font-size:.8rem;font-weight:700;letter-spacing:.08em;text-transform:uppercase;color:var(--soft)}\
.verdict ul{margin:.4rem 0 .2rem;padding-left:1.3rem}\
.verdict li{margin:.3rem 0}\
.warnings{margin:14px 0;padding:10px 16px;border:1px solid var(--line);border-radius:4px;background:#fffdf3}\
.warnings strong{display:block}\
.warnings ul{margin:.3rem 0;padding-left:1.3rem}\
.figures{display:grid;grid-template-columns:repeat(auto-fit,minmax(200px,1fr));gap:10px;margin:16px 0 0;padding:0;list-style:none}\
.figures li{border:1px solid var(--line);border-radius:4px;padding:10px 12px;background:#fff}\
.figures .k{display:block;font-size:.82rem;color:var(--soft)}\
.figures .v{display:block;font-size:1.35rem;font-weight:700;line-height:1.25}\
.figures .s{display:block;font-size:.85rem;color:var(--soft)}\
.mark{display:inline-flex;align-items:center;gap:5px;font-weight:700;font-size:.82rem;letter-spacing:.04em;padding:1px 8px 1px 4px;border-radius:999px;white-space:nowrap}\
.mark svg{width:16px;height:16px;flex:none}\
.mark.pass{background:var(--blue-bg);color:var(--blue-ink)}\
.mark.fail{background:var(--orange-bg);color:var(--orange-ink)}\
figure{margin:18px 0 26px;padding:0;break-inside:avoid}\
figure h3{margin:0 0 .2rem}\
figcaption{color:var(--soft);font-size:.92rem;margin:0 0 .5rem;max-width:46rem}\
.chart{overflow-x:auto;-webkit-overflow-scrolling:touch;padding:4px 0 0;background:#fff}\
.chart svg{max-width:860px}\
.chart.narrow{display:none}\
.aside{font-size:.92rem;color:var(--soft)}\
details.numbers{margin:.5rem 0 0}\
details.numbers summary,details.calls summary{cursor:pointer;color:var(--blue-ink);font-size:.92rem}\
.print-note{display:none}\
.tablewrap{overflow-x:auto}\
table{border-collapse:collapse;width:100%;font-size:.92rem;margin:.4rem 0}\
th,td{text-align:left;vertical-align:top;padding:6px 8px;border-bottom:1px solid var(--line)}\
th{font-size:.8rem;text-transform:uppercase;letter-spacing:.04em;color:var(--soft);border-bottom:2px solid var(--ink)}\
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}\
.checks td .name{display:block;color:var(--soft);font-size:.82rem;overflow-wrap:anywhere}\
.checks tr.failed td{background:#fdf4ec}\
.checks .why{display:block;margin-top:.2rem}\
.change{border:1px solid var(--line);border-radius:4px;margin:14px 0;padding:12px 14px;break-inside:avoid}\
.change .top{display:flex;flex-wrap:wrap;gap:4px 12px;align-items:baseline;margin-bottom:.3rem}\
.change .id{font-weight:700;overflow-wrap:anywhere}\
.change .cat{color:var(--soft);font-size:.88rem;overflow-wrap:anywhere}\
.delta{margin-left:auto;font-weight:700;font-variant-numeric:tabular-nums;white-space:nowrap}\
.delta.down{color:var(--orange-ink)}\
.delta.up{color:var(--blue-ink)}\
.change .lbl{display:block;font-size:.78rem;font-weight:700;text-transform:uppercase;letter-spacing:.05em;color:var(--soft)}\
.change .q,.change .ref{margin:.35rem 0}\
.text{white-space:pre-wrap;overflow-wrap:anywhere}\
.pair{display:grid;grid-template-columns:1fr 1fr;gap:10px;margin-top:.5rem}\
.ans{border-radius:3px;padding:8px 10px;background:var(--panel);border-top:4px solid var(--soft)}\
.ans.cand{border-top-color:var(--blue)}\
.ans .score{float:right;font-size:.85rem;color:var(--soft);font-variant-numeric:tabular-nums}\
details.fold summary{cursor:pointer;list-style:none}\
details.fold summary::-webkit-details-marker{display:none}\
details.fold summary .more{display:inline-block;margin-top:.3rem;color:var(--blue-ink);font-weight:600;font-size:.88rem;text-decoration:underline}\
details.fold[open] summary .preview{display:none}\
details.fold[open] summary .more::after{content:\" (fold)\"}\
.cautions li{margin:.4rem 0}\
.inputs td{overflow-wrap:anywhere}\
.inputs td.hash{font-family:ui-monospace,Menlo,Consolas,\"Liberation Mono\",monospace;font-size:.8rem;word-break:break-all}\
footer{margin:36px 0 24px;padding-top:10px;border-top:1px solid var(--line);color:var(--soft);font-size:.85rem}\
.sr{position:absolute;width:1px;height:1px;overflow:hidden;clip:rect(0 0 0 0);white-space:nowrap}\
@media (max-width:640px){\
.wrap{padding:0 12px}\
h1{font-size:1.35rem}\
.verdict{padding:14px 12px;border-left-width:7px}\
.verdict .head svg{width:40px;height:40px}\
.pair{grid-template-columns:1fr}\
.delta{margin-left:0}\
table.checks thead{display:none}\
table.checks tr{display:block;border-bottom:2px solid var(--line);padding:6px 0}\
table.checks td{display:block;border:0;padding:2px 4px;text-align:left}\
table.checks td.n{text-align:left;white-space:normal}\
table.checks td[data-label]::before{content:attr(data-label) \": \";color:var(--soft);font-size:.82rem}\
.chart.wide{display:none}\
.chart.narrow{display:block;padding:4px 0 0}\
.chart.narrow svg{max-width:480px}\
}\
";

const PRINT_CSS: &str = "\
@page{size:A4;margin:14mm 13mm}\
@media print{\
body{font-size:10.5pt;-webkit-print-color-adjust:exact;print-color-adjust:exact}\
.wrap{max-width:none;padding:0}\
.chart{overflow:visible;border:0;padding:0}\
.chart svg{max-width:100%}\
.chart.wide{display:block}\
.chart.narrow{display:none}\
h2{break-after:avoid}\
.verdict,.change,figure,tr{break-inside:avoid}\
details.fold summary .preview{display:none}\
details.fold summary .more{display:none}\
details::details-content{content-visibility:visible;display:block}\
details.numbers summary{display:none}\
details.calls .change{display:none}\
.print-note{display:inline}\
}\
";

/// The pass and fail marks: the word and a shape (a circle with a tick, an octagon with a
/// cross), never colour alone.
fn mark(pass: bool) -> &'static str {
    if pass {
        r##"<span class="mark pass"><svg viewBox="0 0 16 16" aria-hidden="true"><circle cx="8" cy="8" r="7.2" fill="#1f63a6"/><path d="M4.3 8.3l2.5 2.5 5-5.4" fill="none" stroke="#fff" stroke-width="2"/></svg>PASS</span>"##
    } else {
        r##"<span class="mark fail"><svg viewBox="0 0 16 16" aria-hidden="true"><path d="M5 .8h6L15.2 5v6L11 15.2H5L.8 11V5z" fill="#b4530b"/><path d="M5.3 5.3l5.4 5.4M10.7 5.3l-5.4 5.4" stroke="#fff" stroke-width="2"/></svg>FAIL</span>"##
    }
}

/// The verdict's large symbol: a circle with a tick for GO, an octagon with a bar for NO-GO.
fn verdict_icon(go: bool) -> &'static str {
    if go {
        r##"<svg viewBox="0 0 52 52" aria-hidden="true"><circle cx="26" cy="26" r="24" fill="#1f63a6"/><path d="M14 27l8 8 16-17" fill="none" stroke="#fff" stroke-width="5" stroke-linecap="round" stroke-linejoin="round"/></svg>"##
    } else {
        r##"<svg viewBox="0 0 52 52" aria-hidden="true"><path d="M16.5 2h19L50 16.5v19L35.5 50h-19L2 35.5v-19z" fill="#b4530b"/><rect x="12" y="22" width="28" height="8" rx="2" fill="#fff"/></svg>"##
    }
}

fn num(x: Option<f64>) -> String {
    x.map(|v| format!("{v:.3}")).unwrap_or_else(|| "–".into())
}

fn signed(x: Option<f64>) -> String {
    x.map(|v| charts::Fmt::Signed(3).show(v))
        .unwrap_or_else(|| "–".into())
}

fn interval(lo: Option<f64>, hi: Option<f64>) -> String {
    match (lo, hi) {
        (Some(l), Some(h)) => format!("{} to {}", signed(Some(l)), signed(Some(h))),
        _ => "–".into(),
    }
}

fn p(x: Option<f64>) -> String {
    match x {
        Some(v) if v < 0.0001 => "&lt; 0.0001".into(),
        Some(v) => format!("{v:.4}"),
        None => "–".into(),
    }
}

/// Fact recall and contradictions: a table, no chart (the numbers are two rows).
fn facts_table(o: &mut String, f: &Facts, conf: &str) {
    let m = &f.recall;
    let c = &f.contradiction;
    let _ = write!(
        o,
        "<figure id=\"facts\">\n<h3>Facts</h3>\n<figcaption>Times, prices, dates, durations, counts, percentages and ages the references state, on the {} in-scope questions whose references state any. \
         Recall: share of a reference's facts the answer states. Contradiction: the answer states a different value of a kind the references give.</figcaption>\n\
         <div class=\"tablewrap\"><table><thead><tr><th></th><th class=\"n\">baseline</th><th class=\"n\">candidate</th><th class=\"n\">lift</th><th class=\"n\">{conf} interval</th><th class=\"n\">p-value</th></tr></thead><tbody>\n\
         <tr><td>fact recall</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>\n\
         <tr><td>contradicted a fact ({conf} Wilson)</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td></td><td></td><td></td></tr>\n\
         </tbody></table></div>\n</figure>\n",
        f.n,
        num(m.baseline),
        num(m.candidate),
        signed(m.lift),
        interval(m.ci_low, m.ci_high),
        p(m.p_value),
        share(&c.baseline),
        share(&c.candidate)
    );
}

fn check_number(c: &Check, v: f64) -> String {
    match c.kind() {
        CheckKind::MinQuestions => format!("{v:.0}"),
        CheckKind::Refusal => pct(Some(v)),
        CheckKind::Facts => format!("{:+.1} points", 100.0 * v),
        CheckKind::Lift | CheckKind::Category(_) => signed(Some(v)),
    }
}

fn comparison_words(c: Comparison) -> &'static str {
    match c {
        Comparison::Above => "more than",
        Comparison::AtLeast => "at least",
        Comparison::AtMost => "at most",
    }
}

/// The number of in-scope questions (the larger metric count, as report.md says it).
fn in_scope(s: &Summary) -> usize {
    s.metrics.token_f1.n.max(s.metrics.exact_match.n)
}

/// The page's start up to `<body>`: the content-security policy that allows only the inline
/// stylesheet `css`, no referrer, the phone viewport, the generator and the `title` (already
/// escaped).
pub(crate) fn page_head(title: &str, tool_version: &str, css: &str) -> String {
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta http-equiv=\"Content-Security-Policy\" content=\"{}\">\n\
         <meta name=\"referrer\" content=\"no-referrer\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <meta name=\"generator\" content=\"liftgate {}\">\n\
         <link rel=\"icon\" href=\"data:,\">\n\
         <title>{title}</title>\n<style>{css}</style>\n</head>\n<body>\n",
        content_security_policy(css),
        escape(tool_version),
    )
}

/// report.html for a summary. Deterministic: the same summary gives the same bytes.
pub fn render(s: &Summary) -> String {
    let css = stylesheet();
    let mut o = String::with_capacity(64 * 1024);
    let verdict = if s.verdict.go { "GO" } else { "NO-GO" };
    let set_name = std::path::Path::new(&s.inputs.questions.path)
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| s.inputs.questions.path.clone());
    let title = format!("{verdict} · fine-tune check · {}", escape(&set_name));
    o.push_str(&page_head(&title, &s.tool_version, &css));
    let _ = write!(
        o,
        "<header class=\"masthead\"><div class=\"wrap\"><div class=\"brand\">liftgate <span>fine-tune check</span></div>\
         <div class=\"meta\">question set {} · {} in-scope questions · {} out of scope</div></div></header>\n<main class=\"wrap\">\n",
        user(&s.inputs.questions.path),
        in_scope(s),
        s.refusal.out_of_scope.n
    );
    verdict_section(&mut o, s);
    charts_section(&mut o, s);
    checks_section(&mut o, s);
    changes_section(&mut o, s, true);
    changes_section(&mut o, s, false);
    refusal_calls_section(&mut o, s);
    cautions_section(&mut o);
    inputs_section(&mut o, s);
    let _ = write!(
        o,
        "</main>\n<footer class=\"wrap\">Written by liftgate {}. This page is one file: it runs no script and loads nothing from the network.</footer>\n</body>\n</html>\n",
        escape(&s.tool_version)
    );
    o
}

fn verdict_section(o: &mut String, s: &Summary) {
    let go = s.verdict.go;
    let failing: Vec<&Check> = s.verdict.checks.iter().filter(|c| !c.pass).collect();
    let _ = write!(
        o,
        "<section id=\"verdict\" class=\"verdict {}\" data-verdict=\"{}\">\n<div class=\"head\">{}<div><span class=\"word\">Verdict</span><h1>{}</h1></div></div>\n",
        if go { "go" } else { "nogo" },
        if go { "GO" } else { "NO-GO" },
        verdict_icon(go),
        if go {
            "GO: the fine-tuned model passed every check"
        } else {
            "NO-GO: the fine-tuned model is not ready to replace the base model"
        }
    );
    if go {
        let _ = writeln!(
            o,
            "<p>The candidate (fine-tuned) passed all {} checks of the gate policy against the baseline on {} in-scope questions. \
             The scores below are automatic; read the cautions at the end before rolling out.</p>",
            s.verdict.checks.len(),
            in_scope(s)
        );
    } else {
        let _ = write!(
            o,
            "<p>The candidate (fine-tuned) did not pass {} of the {} checks of the gate policy. In plain words:</p>\n<ul class=\"reasons\">\n",
            failing.len(),
            s.verdict.checks.len()
        );
        for c in &failing {
            let reason = c.reason.clone().unwrap_or_else(|| c.description.clone());
            let _ = writeln!(o, "<li>{}</li>", user(&reason));
        }
        o.push_str("</ul>\n");
    }
    o.push_str("</section>\n");
    if !s.warnings.is_empty() || !s.inputs.approximations.is_empty() {
        o.push_str("<aside class=\"warnings\" id=\"warnings\"><strong>Warnings</strong><ul>\n");
        for w in &s.warnings {
            let _ = writeln!(o, "<li>{}</li>", user(w));
        }
        for a in &s.inputs.approximations {
            let _ = writeln!(
                o,
                "<li>Answers computed with an approximation of the model: {}</li>",
                user(a)
            );
        }
        o.push_str("</ul></aside>\n");
    }
    key_figures(o, s);
}

/// Four figures a reader can take away: the gate metric, both refusal shares, the set size.
fn key_figures(o: &mut String, s: &Summary) {
    let gate = s.policy.lift.metric;
    let m = s.metrics.get(gate).unwrap_or(&s.metrics.token_f1);
    let check = |prefix: &str| s.verdict.checks.iter().find(|c| c.name.starts_with(prefix));
    let status = |c: Option<&Check>| c.map(|c| mark(c.pass)).unwrap_or("");
    o.push_str("<ul class=\"figures\" id=\"key-figures\">\n");
    let _ = writeln!(
        o,
        "<li><span class=\"k\">{} lift (gate)</span><span class=\"v\">{} {}</span><span class=\"s\">{} → {}; {:.0}% interval {}</span></li>",
        gate.label(),
        signed(m.lift),
        status(check("lift.")),
        num(m.baseline),
        num(m.candidate),
        100.0 * s.settings.confidence,
        interval(m.ci_low, m.ci_high)
    );
    let r = &s.refusal;
    let _ = writeln!(
        o,
        "<li><span class=\"k\">out-of-scope questions declined</span><span class=\"v\">{} {}</span><span class=\"s\">needs at least {}; base model {}</span></li>",
        pct(r.out_of_scope.candidate.share),
        status(check("refusal.out_of_scope")),
        pct(Some(s.policy.refusal.min_out_of_scope)),
        pct(r.out_of_scope.baseline.share)
    );
    let _ = writeln!(
        o,
        "<li><span class=\"k\">in-scope questions wrongly declined</span><span class=\"v\">{} {}</span><span class=\"s\">allows at most {}; base model {}</span></li>",
        pct(r.false_refusal.candidate.share),
        status(check("refusal.false_refusal")),
        pct(Some(s.policy.refusal.max_false_refusal)),
        pct(r.false_refusal.baseline.share)
    );
    let _ = writeln!(
        o,
        "<li><span class=\"k\">questions</span><span class=\"v\">{} {}</span><span class=\"s\">in scope (policy needs {}), plus {} out of scope</span></li>",
        in_scope(s),
        status(check("min_questions")),
        s.policy.min_questions,
        r.out_of_scope.n
    );
    o.push_str("</ul>\n");
}

pub(crate) fn figure(o: &mut String, chart: &Chart, title: &str, numbers: &str) {
    let _ = write!(
        o,
        "<figure id=\"{id}\" data-chart=\"{id}\">\n<h3>{}</h3>\n<figcaption>{}</figcaption>\n<div class=\"chart wide\">{}</div>\n<div class=\"chart narrow\">{}</div>\n",
        escape(title),
        escape(&chart.caption),
        chart.svg,
        chart.svg_narrow,
        id = escape(&chart.id),
    );
    if !numbers.is_empty() {
        let _ = write!(
            o,
            "<details class=\"numbers\"><summary>The numbers behind this chart</summary>\n{numbers}</details>\n"
        );
    }
    o.push_str("</figure>\n");
}

fn charts_section(o: &mut String, s: &Summary) {
    let conf = format!("{:.0}%", 100.0 * s.settings.confidence);
    let gate = s.policy.lift.metric;
    o.push_str("<section id=\"charts\">\n<h2>What changed, and how sure we are</h2>\n");
    let _ = writeln!(
        o,
        "<p class=\"aside\">Lift is the candidate's score minus the baseline's, question by question, averaged. \
         Each bar around a point is a {conf} interval ({} bootstrap, {} resamples, seed {}): the true change is plausibly anywhere along it. \
         p-values come from a paired sign-flip permutation test, two-sided.</p>",
        match s.settings.interval {
            IntervalKind::Bca => "BCa",
            IntervalKind::Percentile => "percentile",
        },
        s.settings.resamples,
        s.settings.seed
    );

    // Lift per metric.
    let mut t = String::new();
    let _ = writeln!(
        t,
        "<div class=\"tablewrap\"><table><thead><tr><th>metric</th><th class=\"n\">baseline</th><th class=\"n\">candidate</th><th class=\"n\">lift</th><th class=\"n\">{conf} interval</th><th class=\"n\">p-value</th><th class=\"n\">questions</th><th class=\"n\">better / worse / same</th></tr></thead><tbody>"
    );
    for (metric, m) in s.metrics.present() {
        let name = metric.label();
        let _ = writeln!(
            t,
            "<tr><td>{name}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{} / {} / {}</td></tr>",
            num(m.baseline),
            num(m.candidate),
            signed(m.lift),
            interval(m.ci_low, m.ci_high),
            p(m.p_value),
            m.n,
            m.better,
            m.worse,
            m.same
        );
    }
    t.push_str("</tbody></table></div>\n");
    let mc = &s.mcnemar;
    let _ = writeln!(
        t,
        "<p class=\"aside\">Exact match changed on {} questions: {} now right that were wrong, {} now wrong that were right (exact McNemar test p = {}).</p>",
        mc.baseline_only + mc.candidate_only,
        mc.candidate_only,
        mc.baseline_only,
        p(Some(mc.p_value))
    );
    match s.mde.value {
        Some(v) => {
            let _ = writeln!(
                t,
                "<p class=\"aside\">Sample size: with {} questions, a true {} lift of {v:.3} or more would be detected {:.0}% of the time (two-sided, {:.0}% level; normal approximation).</p>",
                s.mde.n,
                gate.label(),
                100.0 * s.mde.power,
                100.0 * s.mde.alpha
            );
        }
        None => {
            let _ = writeln!(
                t,
                "<p class=\"aside\">Sample size: the minimum detectable lift could not be estimated ({}).</p>",
                user(s.mde.note.as_deref().unwrap_or("not enough data"))
            );
        }
    }
    figure(o, &charts::lift_chart(s), "Lift per metric", &t);

    // Lift per category.
    let mut t = String::new();
    let _ = writeln!(
        t,
        "<div class=\"tablewrap\"><table><thead><tr><th>category</th><th class=\"n\">questions</th><th class=\"n\">baseline</th><th class=\"n\">candidate</th><th class=\"n\">lift</th><th class=\"n\">{conf} interval</th><th class=\"n\">p-value</th><th class=\"n\">Holm p-value</th><th>checked</th></tr></thead><tbody>"
    );
    for (name, c) in &s.categories {
        let _ = writeln!(
            t,
            "<tr><td>{}</td><td class=\"n\">{}{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td>{}</td></tr>",
            user(name),
            c.n,
            if c.refuse_questions > 0 {
                format!(" (+{} out of scope)", c.refuse_questions)
            } else {
                String::new()
            },
            num(c.baseline),
            num(c.candidate),
            signed(c.lift),
            interval(c.ci_low, c.ci_high),
            p(c.p_value),
            p(c.p_value_holm),
            if c.judged {
                "yes"
            } else if c.n == 0 {
                "no (no in-scope questions)"
            } else {
                "no (too few)"
            }
        );
    }
    t.push_str("</tbody></table></div>\n");
    let _ = writeln!(
        t,
        "<p class=\"aside\">Intervals per category are not adjusted for the number of categories; the Holm-adjusted p-values are. Only categories with at least {} in-scope questions are checked.</p>",
        s.policy.categories.min_questions
    );
    figure(
        o,
        &charts::category_chart(s),
        &format!("{} lift per category", gate.label()),
        &t,
    );

    // Refusals.
    let r = &s.refusal;
    let t = format!(
        "<div class=\"tablewrap\"><table><thead><tr><th>questions</th><th class=\"n\">count</th><th class=\"n\">baseline</th><th class=\"n\">candidate</th></tr></thead><tbody>\n\
         <tr><td>out of scope, should be declined</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>\n\
         <tr><td>in scope, wrongly declined</td><td class=\"n\">{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>\n\
         </tbody></table></div>\n",
        r.out_of_scope.n,
        rate(&r.out_of_scope.baseline),
        rate(&r.out_of_scope.candidate),
        r.false_refusal.n,
        rate(&r.false_refusal.baseline),
        rate(&r.false_refusal.candidate)
    );
    figure(o, &charts::refusal_chart(s), "Refusals", &t);
    if let Some(f) = &s.facts {
        facts_table(o, f, &conf);
    }

    // Per-question changes.
    figure(
        o,
        &charts::changes_chart(s),
        "Questions that scored better, worse or the same",
        "",
    );
    o.push_str("</section>\n");
}

fn checks_section(o: &mut String, s: &Summary) {
    let passed = s.verdict.checks.iter().filter(|c| c.pass).count();
    let _ = write!(
        o,
        "<section id=\"checks\">\n<h2>Gate checks</h2>\n<p>{passed} of {} checks passed. Every check must pass for a GO.</p>\n\
         <div class=\"tablewrap\"><table class=\"checks\"><thead><tr><th>result</th><th>what is checked</th><th class=\"n\">needs</th><th class=\"n\">measured</th></tr></thead><tbody>\n",
        s.verdict.checks.len()
    );
    for c in &s.verdict.checks {
        let why = match (&c.reason, c.pass) {
            (Some(r), false) => format!("<span class=\"why\">{}</span>", user(r)),
            _ => String::new(),
        };
        let _ = writeln!(
            o,
            "<tr class=\"{}\" data-check=\"{}\"><td data-label=\"result\">{}</td><td><bdi>{}</bdi><span class=\"name mono\">{}</span>{why}</td><td class=\"n\" data-label=\"needs\">{} {}</td><td class=\"n\" data-label=\"measured\">{}</td></tr>",
            if c.pass { "passed" } else { "failed" },
            escape(&c.name),
            mark(c.pass),
            escape_cut(&c.description, MAX_CHARS),
            escape_cut(&c.name, MAX_CHARS),
            comparison_words(c.comparison),
            check_number(c, c.threshold),
            c.value
                .map(|v| check_number(c, v))
                .unwrap_or_else(|| "nothing to measure".into())
        );
    }
    o.push_str("</tbody></table></div>\n</section>\n");
}

/// An answer, folded behind `<details>` when long.
fn answer_block(text: &str) -> String {
    if text.is_empty() {
        return "<div class=\"text\"><em>(empty answer)</em></div>".into();
    }
    let n = text.chars().count();
    if n <= FOLD_CHARS {
        return format!("<div class=\"text\"><bdi>{}</bdi></div>", escape(text));
    }
    format!(
        "<details class=\"fold\"><summary><span class=\"preview text\"><bdi>{}</bdi></span><span class=\"more\">show the whole answer ({n} characters)</span></summary><div class=\"text\"><bdi>{}</bdi>{}</div></details>",
        escape_cut(text, PREVIEW_CHARS),
        escape_cut(text, MAX_CHARS),
        if n > MAX_CHARS {
            format!(
                " <em>(cut at {MAX_CHARS} characters; the grades file holds the whole answer)</em>"
            )
        } else {
            String::new()
        }
    )
}

fn changes_section(o: &mut String, s: &Summary, worse: bool) {
    let gate = s.policy.lift.metric;
    let (id, title, list, empty) = if worse {
        (
            "worse",
            "Questions that got worse",
            &s.changes.worse,
            "No question scored lower.",
        )
    } else {
        (
            "better",
            "Questions that got better",
            &s.changes.better,
            "No question scored higher.",
        )
    };
    let _ = write!(o, "<section id=\"{id}\">\n<h2>{title}</h2>\n");
    if list.is_empty() {
        let _ = writeln!(o, "<p>{empty}</p>\n</section>");
        return;
    }
    let _ = writeln!(
        o,
        "<p>Largest changes in {} first (up to {}). Read both answers: a higher score means more words in common with the reference, not necessarily a better answer.</p>",
        gate.label(),
        CHANGES_LISTED
    );
    for (k, ch) in list.iter().enumerate() {
        let arrow = if ch.change < 0.0 { "▼" } else { "▲" };
        let _ = write!(
            o,
            "<article class=\"change\" id=\"{id}-{}\">\n<div class=\"top\"><span class=\"id mono\"><bdi>{}</bdi></span><span class=\"cat\">category <bdi>{}</bdi></span>\
             <span class=\"delta {}\">{arrow} {} {}</span></div>\n\
             <p class=\"q\"><span class=\"lbl\">Question</span><span class=\"text\">{}</span></p>\n",
            k + 1,
            escape_cut(&ch.id, 200),
            escape_cut(&ch.category, 200),
            if ch.change < 0.0 { "down" } else { "up" },
            signed(Some(ch.change)),
            gate.label(),
            user(&ch.question)
        );
        match ch.references.split_first() {
            Some((first, rest)) => {
                let _ = writeln!(
                    o,
                    "<p class=\"ref\"><span class=\"lbl\">Reference answer</span><span class=\"text\">{}</span>{}</p>",
                    user(first),
                    if rest.is_empty() {
                        String::new()
                    } else {
                        format!(
                            " <span class=\"aside\">(and {} more accepted)</span>",
                            rest.len()
                        )
                    }
                );
            }
            None => {
                o.push_str("<p class=\"ref\"><span class=\"lbl\">Reference answer</span>none</p>\n")
            }
        }
        let _ = write!(
            o,
            "<div class=\"pair\">\n<div class=\"ans base\"><span class=\"score\">{:.2}</span><span class=\"lbl\">Baseline answer</span>{}</div>\n\
             <div class=\"ans cand\"><span class=\"score\">{:.2}</span><span class=\"lbl\">Candidate answer</span>{}</div>\n</div>\n</article>\n",
            ch.baseline_score,
            answer_block(&ch.baseline_answer),
            ch.candidate_score,
            answer_block(&ch.candidate_answer)
        );
    }
    o.push_str("</section>\n");
}

/// The detector's calls behind the refusal shares, folded by kind, for a person to recount
/// them: the shares rest on reading the wording of each answer, which on unseen real output
/// misses some declines and flags a few answers wrongly (docs/scoring.md).
fn refusal_calls_section(o: &mut String, s: &Summary) {
    let r = &s.refusal;
    let _ = writeln!(
        o,
        "<section id=\"refusal-calls\">\n<h2>Refusal calls to check</h2>\n\
         <p>{REFUSAL_CALLS_NOTE} A wording your model declines with that the rules miss can be added to the policy's <span class=\"mono\">refusal.extra_phrases</span>.</p>"
    );
    let mut k = 0;
    for (expect, title, none) in REFUSAL_CALL_KINDS {
        let list: Vec<&RefusalCall> = r.calls.iter().filter(|c| c.expect == expect).collect();
        let _ = writeln!(o, "<h3>{title}</h3>");
        if list.is_empty() {
            let _ = writeln!(o, "<p>{none}</p>");
            continue;
        }
        let declined = |f: fn(&RefusalCall) -> bool| list.iter().filter(|c| f(c)).count();
        let _ = writeln!(
            o,
            "<details class=\"calls\"><summary>Show {} question{} (counted as declined: baseline {}, candidate {})<span class=\"print-note\">; listed on screen, left out of print</span></summary>",
            list.len(),
            if list.len() == 1 { "" } else { "s" },
            declined(|c| c.baseline_declined),
            declined(|c| c.candidate_declined)
        );
        for c in list {
            k += 1;
            let call = |d: bool| {
                if d {
                    "counted as <strong>declined</strong>"
                } else {
                    "counted as <strong>answered</strong>"
                }
            };
            let _ = write!(
                o,
                "<article class=\"change\" id=\"call-{k}\">\n<div class=\"top\"><span class=\"id mono\"><bdi>{}</bdi></span><span class=\"cat\">category <bdi>{}</bdi></span>\
                 <span class=\"cat\">{}</span></div>\n\
                 <p class=\"q\"><span class=\"lbl\">Question</span><span class=\"text\">{}</span></p>\n\
                 <div class=\"pair\">\n<div class=\"ans base\"><span class=\"score\">{}</span><span class=\"lbl\">Baseline answer</span>{}</div>\n\
                 <div class=\"ans cand\"><span class=\"score\">{}</span><span class=\"lbl\">Candidate answer</span>{}</div>\n</div>\n</article>\n",
                escape_cut(&c.id, 200),
                escape_cut(&c.category, 200),
                if expect == Expect::Refuse {
                    "should be declined"
                } else {
                    "should be answered"
                },
                user(&c.question),
                call(c.baseline_declined),
                answer_block(&c.baseline_answer),
                call(c.candidate_declined),
                answer_block(&c.candidate_answer)
            );
        }
        o.push_str("</details>\n");
    }
    if r.calls_left_off > 0 {
        let _ = writeln!(
            o,
            "<p>{} more calls are not listed: the report lists the first {REFUSAL_CALLS_LISTED} of each kind. The grades files hold every call (the <span class=\"mono\">refused</span> field).</p>",
            r.calls_left_off
        );
    }
    o.push_str("</section>\n");
}

fn cautions_section(o: &mut String) {
    o.push_str(
        "<section id=\"cautions\" class=\"cautions\">\n<h2>Cautions</h2>\n<ul>\n\
         <li>These scores measure word overlap with the reference answers. They cannot show whether an answer is factually right \
         beyond that overlap, whether its tone fits, whether it gives harmful advice, or whether it follows your organisation's policies.</li>\n\
         <li>Before rolling out, have a person read a random sample of answers from both models (30 to 50 is a common rule of thumb), \
         and every answer in sensitive categories.</li>\n\
         <li>For regulated or high-stakes topics such as refunds, safety, health and money, your organisation's own review rules come first; \
         a GO here does not replace them.</li>\n\
         <li>The questions must be held out from the fine-tuning data; otherwise the lift overstates what users will see.</li>\n\
         </ul>\n</section>\n",
    );
}

fn inputs_section(o: &mut String, s: &Summary) {
    let i = &s.inputs;
    o.push_str("<section id=\"inputs\">\n<h2>Inputs and fingerprints</h2>\n<div class=\"tablewrap\"><table class=\"inputs\"><thead><tr><th>input</th><th>path</th><th>SHA-256</th></tr></thead><tbody>\n");
    for (label, f) in [
        ("questions", &i.questions),
        ("baseline grades", &i.baseline),
        ("candidate grades", &i.candidate),
    ] {
        let _ = writeln!(
            o,
            "<tr><td>{label}</td><td>{}</td><td class=\"hash\">{}</td></tr>",
            user(&f.path),
            escape(&f.sha256)
        );
    }
    match (&i.policy.path, &i.policy.sha256) {
        (Some(path), Some(sha)) => {
            let _ = writeln!(
                o,
                "<tr><td>policy</td><td>{}</td><td class=\"hash\">{}</td></tr>",
                user(path),
                escape(sha)
            );
        }
        _ => o.push_str("<tr><td>policy</td><td>built-in default</td><td>–</td></tr>\n"),
    }
    o.push_str("</tbody></table></div>\n");
    let st = &s.settings;
    let pol = &s.policy;
    let _ = write!(
        o,
        "<h3>Settings</h3>\n<ul>\n\
         <li>{} resamples, seed {}, {:.0}% intervals ({}); {}; p-values: {}; random numbers: {}.</li>\n\
         <li>Policy: at least {} in-scope questions; the lower end of the {} lift interval above {} (target {}); \
         out-of-scope questions declined at least {}; in-scope questions wrongly declined at most {}; \
         categories with at least {} in-scope questions may lose at most {} ({} rule).</li>\n\
         <li>liftgate {}, summary format {}.</li>\n</ul>\n</section>\n",
        st.resamples,
        st.seed,
        100.0 * st.confidence,
        escape(st.interval.as_str()),
        escape(&st.bootstrap_method),
        escape(&st.p_value_method),
        escape(&st.rng),
        pol.min_questions,
        pol.lift.metric.label(),
        signed(Some(pol.lift.min_ci_low)),
        signed(Some(pol.lift.target)),
        pct(Some(pol.refusal.min_out_of_scope)),
        pct(Some(pol.refusal.max_false_refusal)),
        pol.categories.min_questions,
        num(Some(pol.categories.max_regression)),
        pol.categories.rule.as_str(),
        escape(&s.tool_version),
        escape(&s.format)
    );
}

#[cfg(test)]
#[path = "html_tests.rs"]
mod tests;
