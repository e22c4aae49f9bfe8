//! The lineup: one baseline against several candidates (docs/interface.md, "Several
//! candidates"). `lineup.json` holds the numbers; `report.md` and `report.html` put one row per
//! candidate (its gate-metric lift against the baseline, interval, raw and Holm-adjusted
//! p-value, verdict, link to its own full report in `<name>/`), then for every artifact made
//! from another candidate how much of that candidate's lift it keeps, in plain words; the
//! terminal gets the same table. Computed in `crate::weigh::lineup`.

use super::html::{escape, page_head, stylesheet, user};
use super::markdown::{escape as md, write_cautions};
use crate::error::{Error, Result};
use crate::fsutil;
use comfy_table::{presets, Table};
use serde::{Deserialize, Serialize};
use std::fmt::Write as _;
use std::path::Path;

/// The `format` of lineup.json.
pub const FORMAT: &str = "liftgate-lineup/1";

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Lineup {
    pub format: String,
    pub tool_version: String,
    pub baseline: String,
    /// How the baseline was made, in words.
    pub baseline_describe: String,
    /// The gate metric (`token_f1`, ...) and its label.
    pub metric: String,
    pub metric_label: String,
    pub confidence: f64,
    pub resamples: usize,
    pub seed: u64,
    /// Every candidate is GO.
    pub go: bool,
    pub candidates: Vec<LineupRow>,
    pub kept: Vec<LiftKept>,
}

/// One candidate against the baseline, on the gate metric.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LineupRow {
    pub name: String,
    pub describe: String,
    pub from: Option<String>,
    /// Its full report, relative to the lineup's directory.
    pub report: String,
    pub baseline: Option<f64>,
    pub candidate: Option<f64>,
    pub lift: Option<f64>,
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
    /// Sign-flip permutation p-value of the lift.
    pub p_value: Option<f64>,
    /// Holm-adjusted across the lineup's candidates.
    pub p_holm: f64,
    pub go: bool,
    /// Names of the failed checks.
    pub failed: Vec<String>,
}

/// How much of `from`'s lift the artifact `name` keeps.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LiftKept {
    pub name: String,
    pub from: String,
    /// In-scope questions all three scored.
    pub n: usize,
    /// mean(artifact − baseline) / mean(source − baseline); None when the source has no lift.
    pub share: Option<f64>,
    /// mean(artifact − source) and its paired percentile bootstrap interval.
    pub diff: Option<f64>,
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
    /// The interval lies wholly below zero.
    pub clear_loss: bool,
    /// The finding in plain words.
    pub words: String,
    /// How many in-scope questions the artifact scored lower than its source on the gate metric.
    #[serde(default)]
    pub worse_total: usize,
    /// The first [`WORSE_SHOWN`] of them, largest drop first: what the artifact lost, to read.
    #[serde(default)]
    pub worse: Vec<WorseAnswer>,
}

/// Questions shown per artifact where it answered worse than its source.
pub const WORSE_SHOWN: usize = 10;

/// One question an artifact answered worse than the candidate it was made from, side by side.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WorseAnswer {
    pub id: String,
    pub question: String,
    /// The first reference answer.
    pub reference: String,
    /// The source's answer and its gate-metric score.
    pub source_answer: String,
    pub source_score: f64,
    /// The artifact's answer and its score.
    pub artifact_answer: String,
    pub artifact_score: f64,
}

fn num(x: Option<f64>, signed: bool) -> String {
    match x {
        Some(v) if signed => format!("{v:+.3}"),
        Some(v) => format!("{v:.3}"),
        None => "-".into(),
    }
}

/// The numbers of a row as both tables show them: means, lift, interval, p, Holm p, verdict.
fn cells(r: &LineupRow) -> [String; 6] {
    [
        format!("{} → {}", num(r.baseline, false), num(r.candidate, false)),
        num(r.lift, true),
        format!("{} to {}", num(r.ci_low, true), num(r.ci_high, true)),
        r.p_value.map_or("-".into(), |p| format!("{p:.4}")),
        format!("{:.4}", r.p_holm),
        verdict(r.go).to_string(),
    ]
}

fn verdict(go: bool) -> &'static str {
    if go {
        "GO"
    } else {
        "NO-GO"
    }
}

/// report.md of a lineup.
pub fn markdown(l: &Lineup) -> String {
    let mut o = String::new();
    let _ = writeln!(o, "# Fine-tune check: {} candidates\n", l.candidates.len());
    let _ = writeln!(
        o,
        "Each candidate was compared with the baseline **{}** ({}) on the same questions. \
         Each has its own verdict and full report; its {} lift must be clear even after allowing \
         for the number of candidates compared (Holm-adjusted p-value at most {:.3}).\n",
        md(&l.baseline),
        md(&l.baseline_describe),
        md(&l.metric_label),
        1.0 - l.confidence
    );
    let _ = writeln!(
        o,
        "| candidate | made as | {m} | lift | {c:.0}% interval | p | p (Holm) | verdict | report |",
        m = md(&l.metric_label),
        c = 100.0 * l.confidence
    );
    let _ = writeln!(o, "|---|---|---|---|---|---|---|---|---|");
    for r in &l.candidates {
        let [means, lift, interval, p, holm, v] = cells(r);
        let _ = writeln!(
            o,
            "| {} | {} | {means} | {lift} | {interval} | {p} | {holm} | **{v}** | [{}]({}) |",
            md(&r.name),
            md(&r.describe),
            md(&r.report),
            r.report
        );
    }
    o.push('\n');
    let failed: Vec<&LineupRow> = l.candidates.iter().filter(|r| !r.go).collect();
    for r in failed {
        let _ = writeln!(
            o,
            "- **{}** is NO-GO: failed {}.",
            md(&r.name),
            md(&r.failed.join(", "))
        );
    }
    if !l.kept.is_empty() {
        let _ = writeln!(o, "\n## How much of the lift each artifact keeps\n");
        let _ = writeln!(
            o,
            "Compared question by question with the candidate it was made from ({} resamples, {:.0}% percentile interval of the mean difference in {}).\n",
            l.resamples,
            100.0 * l.confidence,
            md(&l.metric_label)
        );
        for k in &l.kept {
            let _ = writeln!(o, "- {}", md(&k.words));
        }
        for k in l.kept.iter().filter(|k| !k.worse.is_empty()) {
            let _ = writeln!(
                o,
                "\n### Where {} answers worse than {}\n\n{} of {} in-scope questions score lower in {}; {} shown, largest drop first. Read them: a lower score can be a paraphrase, a lost fact or a wrong answer.\n",
                md(&k.name),
                md(&k.from),
                k.worse_total,
                k.n,
                md(&l.metric_label),
                k.worse.len()
            );
            let _ = writeln!(
                o,
                "| question | reference | {} | {} |\n|---|---|---|---|",
                md(&k.from),
                md(&k.name)
            );
            for w in &k.worse {
                let _ = writeln!(
                    o,
                    "| {} | {} | {} ({:.2}) | {} ({:.2}) |",
                    md(&w.question),
                    md(&w.reference),
                    md(&w.source_answer),
                    w.source_score,
                    md(&w.artifact_answer),
                    w.artifact_score
                );
            }
        }
    }
    o.push('\n');
    write_cautions(&mut o);
    o
}

/// report.html of a lineup, self-contained like the single-candidate report.
pub fn html(l: &Lineup) -> String {
    let css = stylesheet();
    let mut o = String::with_capacity(16 * 1024);
    let title = format!(
        "{} · fine-tune check · {} candidates",
        verdict(l.go),
        l.candidates.len()
    );
    o.push_str(&page_head(&title, &l.tool_version, &css));
    let _ = write!(
        o,
        "<header class=\"masthead\"><div class=\"wrap\"><div class=\"brand\">liftgate <span>fine-tune check</span></div>\
         <div class=\"meta\">baseline: {} ({})</div></div></header>\n<main class=\"wrap\">\n",
        user(&l.baseline),
        user(&l.baseline_describe)
    );
    let _ = write!(
        o,
        "<section><h2>{} candidates against one baseline</h2>\n<p>Each candidate has its own verdict and full report. Its {} lift must be clear even after allowing for the number of candidates compared (Holm-adjusted p-value at most {:.3}).</p>\n",
        l.candidates.len(),
        escape(&l.metric_label),
        1.0 - l.confidence
    );
    let _ = writeln!(
        o,
        "<div class=\"tablewrap\"><table><thead><tr><th>candidate</th><th>made as</th><th>{}</th><th>lift</th><th>{:.0}% interval</th><th>p</th><th>p (Holm)</th><th>verdict</th></tr></thead><tbody>",
        escape(&l.metric_label),
        100.0 * l.confidence
    );
    for r in &l.candidates {
        let [means, lift, interval, p, holm, v] = cells(r);
        let _ = writeln!(
            o,
            "<tr><td><a href=\"{}\">{}</a></td><td>{}</td><td>{means}</td><td>{lift}</td><td>{interval}</td><td>{p}</td><td>{holm}</td><td><strong>{v}</strong></td></tr>",
            escape(&format!("{}/report.html", r.name)),
            user(&r.name),
            user(&r.describe),
        );
    }
    o.push_str("</tbody></table></div>\n");
    for r in l.candidates.iter().filter(|r| !r.go) {
        let _ = writeln!(
            o,
            "<p><strong>{}</strong> is NO-GO: failed {}.</p>",
            user(&r.name),
            escape(&r.failed.join(", "))
        );
    }
    o.push_str("</section>\n");
    if !l.kept.is_empty() {
        o.push_str("<section><h2>How much of the lift each artifact keeps</h2>\n<ul>\n");
        for k in &l.kept {
            let _ = writeln!(o, "<li>{}</li>", escape(&k.words));
        }
        o.push_str("</ul>\n");
        for k in l.kept.iter().filter(|k| !k.worse.is_empty()) {
            let _ = writeln!(
                o,
                "<h3>Where {} answers worse than {}</h3>\n<p>{} of {} in-scope questions score lower in {}; {} shown, largest drop first. Read them: a lower score can be a paraphrase, a lost fact or a wrong answer.</p>\n<div class=\"tablewrap\"><table><thead><tr><th>question</th><th>reference</th><th>{}</th><th>{}</th></tr></thead><tbody>",
                user(&k.name),
                user(&k.from),
                k.worse_total,
                k.n,
                escape(&l.metric_label),
                k.worse.len(),
                user(&k.from),
                user(&k.name)
            );
            for w in &k.worse {
                let _ = writeln!(
                    o,
                    "<tr><td>{}</td><td>{}</td><td>{} <strong>{:.2}</strong></td><td>{} <strong>{:.2}</strong></td></tr>",
                    user(&w.question),
                    user(&w.reference),
                    user(&w.source_answer),
                    w.source_score,
                    user(&w.artifact_answer),
                    w.artifact_score
                );
            }
            o.push_str("</tbody></table></div>\n");
        }
        o.push_str("</section>\n");
    }
    o.push_str("<section><h2>Cautions</h2>\n<ul>\n");
    let mut md_cautions = String::new();
    write_cautions(&mut md_cautions);
    for line in md_cautions.lines().filter_map(|l| l.strip_prefix("- ")) {
        let _ = writeln!(o, "<li>{}</li>", escape(line));
    }
    o.push_str("</ul></section>\n</main>\n</body>\n</html>\n");
    o
}

/// The terminal table `vet` prints for a lineup: first line `verdict: GO` when every
/// candidate is GO, then `verdict <name>: GO|NO-GO` per candidate, then the table.
pub fn terminal(l: &Lineup) -> String {
    let mut out = format!("verdict: {}\n", verdict(l.go));
    for r in &l.candidates {
        let _ = writeln!(out, "verdict {}: {}", clean(&r.name), verdict(r.go));
    }
    let mut t = Table::new();
    t.load_style(presets::ASCII_FULL_CONDENSED);
    t.set_header(vec![
        "candidate",
        &l.metric_label,
        "lift",
        "interval",
        "p (Holm)",
        "verdict",
    ]);
    for r in &l.candidates {
        let [means, lift, interval, _, holm, v] = cells(r);
        t.add_row(vec![
            clean(&r.name),
            means.replace('→', "->"),
            lift,
            interval,
            holm,
            v,
        ]);
    }
    let _ = writeln!(out, "{t}");
    for k in &l.kept {
        let _ = writeln!(out, "{}", clean(&k.words));
    }
    out
}

/// Names come from the command line: keep control characters off the terminal.
fn clean(text: &str) -> String {
    text.chars()
        .map(|c| if c.is_control() { '?' } else { c })
        .collect()
}

/// Writes lineup.json, report.md and report.html into `dir`, each atomically.
pub fn write(dir: &Path, l: &Lineup) -> Result<()> {
    let json = serde_json::to_vec_pretty(l)
        .map_err(|e| Error::internal(format!("cannot serialise lineup.json: {e}")))?;
    fsutil::write_atomic(&dir.join("lineup.json"), &json)?;
    fsutil::write_atomic(&dir.join("report.md"), markdown(l).as_bytes())?;
    fsutil::write_atomic(&dir.join("report.html"), html(l).as_bytes())
}
