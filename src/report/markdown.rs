//! report.md: the weighing for people and pull-request comments.
//!
//! Order: the verdict with the failing reasons in plain words, warnings, the metrics with
//! intervals, refusals, categories, the gate checks, the questions that got worse and better
//! (side by side), the refusal calls to check, cautions about what automatic scores cannot
//! show, and the inputs.
//!
//! All text that comes from user files (questions, references, answers, category names) goes
//! through [`escape`], so it cannot break the Markdown structure: no table cell split by a
//! pipe, no HTML, no code span, no line break, no control or bidirectional-override character.

use super::summary::*;
use super::Renderer;
use crate::policy::IntervalKind;
use std::fmt::Write;

/// Longest user text shown in one table cell, in characters.
pub const CELL_CHARS: usize = 300;

pub struct Markdown;

impl Renderer for Markdown {
    fn file_name(&self) -> &'static str {
        "report.md"
    }

    fn render(&self, s: &Summary) -> String {
        render(s)
    }
}

/// Makes user text inert inside a Markdown table cell or a line of prose, cut to
/// [`CELL_CHARS`] characters (with "…").
///
/// - `& < >` become HTML entities (no tags, no entities of the user's);
/// - `\ ` * _ [ ] ~ | # !` are backslash-escaped (no emphasis, links, code spans, strike,
///   headings, images; `\|` is GitHub's escape for a pipe inside a table cell);
/// - a line break becomes `<br>` written by us, a tab a space;
/// - other control characters and Unicode bidirectional/zero-width format characters become
///   U+FFFD, so they can neither reorder nor hide text.
pub fn escape(text: &str) -> String {
    escape_limited(text, Some(CELL_CHARS))
}

/// [`escape`] with a chosen length limit (`None`: whole text).
fn escape_limited(text: &str, limit: Option<usize>) -> String {
    let mut out = String::with_capacity(text.len() + 8);
    let mut chars = 0usize;
    let mut iter = text.chars().peekable();
    while let Some(c) = iter.next() {
        if Some(chars) == limit {
            out.push('…');
            break;
        }
        chars += 1;
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '\\' | '`' | '*' | '_' | '[' | ']' | '~' | '|' | '#' | '!' => {
                out.push('\\');
                out.push(c);
            }
            '\r' => {
                if iter.peek() != Some(&'\n') {
                    out.push_str("<br>");
                }
            }
            // Unicode line and paragraph separators break lines in some renderers.
            '\n' | '\u{2028}' | '\u{2029}' => out.push_str("<br>"),
            '\t' => out.push(' '),
            c if c.is_control() || is_format_char(c) => out.push('\u{FFFD}'),
            c => out.push(c),
        }
    }
    out
}

/// Zero-width and bidirectional formatting characters (Unicode category Cf, the ones that can
/// hide or reorder text).
fn is_format_char(c: char) -> bool {
    matches!(c as u32,
        0x00AD | 0x061C | 0x180E | 0x200B..=0x200F | 0x202A..=0x202E | 0x2060..=0x2064
        | 0x2066..=0x206F | 0xFEFF | 0xFFF9..=0xFFFB)
}

fn num(x: Option<f64>) -> String {
    x.map(|v| format!("{v:.3}")).unwrap_or_else(|| "–".into())
}

fn signed(x: Option<f64>) -> String {
    x.map(|v| format!("{v:+.3}")).unwrap_or_else(|| "–".into())
}

/// A share as a percentage; report.md and report.html write numbers alike.
pub(crate) fn pct(x: Option<f64>) -> String {
    x.map(|v| format!("{:.1}%", 100.0 * v))
        .unwrap_or_else(|| "–".into())
}

fn interval(lo: Option<f64>, hi: Option<f64>) -> String {
    match (lo, hi) {
        (Some(l), Some(h)) => format!("{l:+.3} to {h:+.3}"),
        _ => "–".into(),
    }
}

fn p(x: Option<f64>) -> String {
    match x {
        Some(v) if v < 0.0001 => "< 0.0001".into(),
        Some(v) => format!("{v:.4}"),
        None => "–".into(),
    }
}

/// A refusal rate with its Wilson interval and count (both reports).
pub(crate) fn rate(r: &Rate) -> String {
    match r.share {
        Some(_) => format!(
            "{} ({}–{}), {} declined",
            pct(r.share),
            pct(r.ci_low),
            pct(r.ci_high),
            r.declined
        ),
        None => "–".into(),
    }
}

/// A check's value or threshold on its own scale: a count, a share, or a lift.
fn check_number(c: &Check, v: f64) -> String {
    match c.kind() {
        CheckKind::MinQuestions => format!("{v:.0}"),
        CheckKind::Refusal => pct(Some(v)),
        CheckKind::Facts => format!("{:+.1} points", 100.0 * v),
        CheckKind::Lift | CheckKind::Category(_) => format!("{v:+.3}"),
    }
}

fn check_value(c: &Check) -> String {
    c.value.map_or_else(|| "–".into(), |v| check_number(c, v))
}

fn check_threshold(c: &Check) -> String {
    format!(
        "{} {}",
        c.comparison
            .as_str()
            .replace('>', "&gt;")
            .replace('<', "&lt;"),
        check_number(c, c.threshold)
    )
}

/// A share with its interval and count (both reports).
pub(crate) fn share(x: &Share) -> String {
    match x.share {
        Some(_) => format!(
            "{} ({}–{}), {} questions",
            pct(x.share),
            pct(x.ci_low),
            pct(x.ci_high),
            x.count
        ),
        None => "–".into(),
    }
}

/// "## Facts": fact recall like a metric row, contradiction shares like refusal rates.
fn facts_section(o: &mut String, f: &Facts, conf: &str) {
    let _ = writeln!(o, "## Facts\n");
    let _ = writeln!(
        o,
        "Times, prices, dates, durations, counts, percentages and ages the references state (docs/scoring.md, \"Facts\"), on the {} in-scope questions whose references state any. \
         Recall: share of a reference's facts the answer states. Contradiction: the answer states a different value of a kind the references give.\n",
        f.n
    );
    let m = &f.recall;
    let _ = writeln!(
        o,
        "| | baseline | candidate | lift | {conf} interval | p-value |"
    );
    let _ = writeln!(o, "|---|---:|---:|---:|---:|---:|");
    let _ = writeln!(
        o,
        "| fact recall | {} | {} | {} | {} | {} |",
        num(m.baseline),
        num(m.candidate),
        signed(m.lift),
        interval(m.ci_low, m.ci_high),
        p(m.p_value)
    );
    let c = &f.contradiction;
    let _ = writeln!(
        o,
        "| contradicted a fact ({conf} Wilson) | {} | {} | | | |\n",
        share(&c.baseline),
        share(&c.candidate)
    );
}

/// report.md for a summary. Deterministic: the same summary gives the same bytes.
pub fn render(s: &Summary) -> String {
    let mut o = String::new();
    let conf = format!("{:.0}%", 100.0 * s.settings.confidence);
    let gate = s.policy.lift.metric;
    let verdict = if s.verdict.go { "GO" } else { "NO-GO" };
    let _ = writeln!(o, "# Verdict: {verdict}\n");
    let failing: Vec<&Check> = s.verdict.checks.iter().filter(|c| !c.pass).collect();
    if s.verdict.go {
        let _ = writeln!(
            o,
            "The candidate (fine-tuned) passed all {} checks of the gate policy against the baseline on {} in-scope questions. \
             The scores below are automatic; read the cautions at the end before rolling out.\n",
            s.verdict.checks.len(),
            s.metrics.token_f1.n.max(s.metrics.exact_match.n)
        );
    } else {
        let _ = writeln!(
            o,
            "The candidate (fine-tuned) did not pass {} of the {} checks of the gate policy. In plain words:\n",
            failing.len(),
            s.verdict.checks.len()
        );
        for c in &failing {
            let reason = c.reason.clone().unwrap_or_else(|| c.description.clone());
            let _ = writeln!(o, "- {}", escape_prose(&reason));
        }
        o.push('\n');
    }
    if !s.warnings.is_empty() {
        let _ = writeln!(o, "**Warnings**\n");
        for w in &s.warnings {
            let _ = writeln!(o, "- {}", escape_prose(w));
        }
        o.push('\n');
    }

    let _ = writeln!(o, "## Scores\n");
    let _ = writeln!(
        o,
        "Means over in-scope questions; lift = candidate − baseline, question by question. \
         Interval: {conf} {} bootstrap ({} resamples, seed {}). p-value: paired sign-flip permutation test, two-sided. \
         The gate reads **{}**.\n",
        match s.settings.interval {
            IntervalKind::Bca => "BCa",
            IntervalKind::Percentile => "percentile",
        },
        s.settings.resamples,
        s.settings.seed,
        gate.label()
    );
    let _ = writeln!(
        o,
        "| metric | baseline | candidate | lift | {conf} interval | p-value | questions | better / worse / same |"
    );
    let _ = writeln!(o, "|---|---:|---:|---:|---:|---:|---:|---:|");
    for (metric, m) in s.metrics.present() {
        let name = metric.label();
        let _ = writeln!(
            o,
            "| {name} | {} | {} | {} | {} | {} | {} | {} / {} / {} |",
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
    let mc = &s.mcnemar;
    let _ = writeln!(
        o,
        "\nExact match changed on {} questions: {} now right that were wrong, {} now wrong that were right (exact McNemar test p = {}).\n",
        mc.baseline_only + mc.candidate_only,
        mc.candidate_only,
        mc.baseline_only,
        p(Some(mc.p_value))
    );
    match s.mde.value {
        Some(v) => {
            let _ = writeln!(
                o,
                "Sample size: with {} questions, a true {} lift of {v:.3} or more would be detected 80% of the time (two-sided, 5% level; normal approximation).\n",
                s.mde.n,
                gate.label()
            );
        }
        None => {
            let _ = writeln!(
                o,
                "Sample size: the minimum detectable lift could not be estimated ({}).\n",
                s.mde.note.as_deref().unwrap_or("not enough data")
            );
        }
    }

    let _ = writeln!(o, "## Refusals\n");
    let _ = writeln!(o, "Shares with {conf} Wilson intervals.\n");
    let _ = writeln!(o, "| questions | count | baseline | candidate |");
    let _ = writeln!(o, "|---|---:|---:|---:|");
    let r = &s.refusal;
    let _ = writeln!(
        o,
        "| out of scope, should be declined | {} | {} | {} |",
        r.out_of_scope.n,
        rate(&r.out_of_scope.baseline),
        rate(&r.out_of_scope.candidate)
    );
    let _ = writeln!(
        o,
        "| in scope, wrongly declined | {} | {} | {} |\n",
        r.false_refusal.n,
        rate(&r.false_refusal.baseline),
        rate(&r.false_refusal.candidate)
    );
    if let Some(f) = &s.facts {
        facts_section(&mut o, f, &conf);
    }

    let _ = writeln!(o, "## Categories\n");
    let _ = writeln!(
        o,
        "{} per category ({conf} intervals, not adjusted; p-values raw and Holm-adjusted across categories). \
         Only categories with at least {} in-scope questions are checked.\n",
        gate.label(),
        s.policy.categories.min_questions
    );
    let _ = writeln!(
        o,
        "| category | questions | baseline | candidate | lift | {conf} interval | p-value | Holm p-value | checked |"
    );
    let _ = writeln!(o, "|---|---:|---:|---:|---:|---:|---:|---:|---|");
    for (name, c) in &s.categories {
        let _ = writeln!(
            o,
            "| {} | {}{} | {} | {} | {} | {} | {} | {} | {} |",
            escape(name),
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
    o.push('\n');

    let _ = writeln!(o, "## Gate checks\n");
    let _ = writeln!(o, "| check | what | needs | measured | result |");
    let _ = writeln!(o, "|---|---|---:|---:|---|");
    for c in &s.verdict.checks {
        let _ = writeln!(
            o,
            "| {} | {} | {} | {} | {} |",
            escape(&c.name),
            escape(&c.description),
            check_threshold(c),
            check_value(c),
            if c.pass { "pass" } else { "**FAIL**" }
        );
    }
    o.push('\n');

    for (title, list, empty) in [
        (
            "Questions that got worse",
            &s.changes.worse,
            "No question scored lower.",
        ),
        (
            "Questions that got better",
            &s.changes.better,
            "No question scored higher.",
        ),
    ] {
        let _ = writeln!(o, "## {title}\n");
        if list.is_empty() {
            let _ = writeln!(o, "{empty}\n");
            continue;
        }
        let _ = writeln!(
            o,
            "Largest changes in {} first (up to {}).\n",
            gate.label(),
            CHANGES_LISTED
        );
        let _ = writeln!(
            o,
            "| id | question | reference | baseline answer | candidate answer | score |"
        );
        let _ = writeln!(o, "|---|---|---|---|---|---:|");
        for ch in list.iter() {
            let _ = writeln!(
                o,
                "| {} | {} | {} | {} | {} | {:.2} → {:.2} |",
                escape(&ch.id),
                escape(&ch.question),
                escape(ch.references.first().map(String::as_str).unwrap_or("")),
                escape(&ch.baseline_answer),
                escape(&ch.candidate_answer),
                ch.baseline_score,
                ch.candidate_score
            );
        }
        o.push('\n');
    }

    refusal_calls_section(&mut o, &s.refusal);
    write_cautions(&mut o);

    let _ = writeln!(o, "## Inputs\n");
    let i = &s.inputs;
    for (label, f) in [
        ("questions", &i.questions),
        ("baseline grades", &i.baseline),
        ("candidate grades", &i.candidate),
    ] {
        let _ = writeln!(
            o,
            "- {label}: {} (sha256 {})",
            escape(&f.path),
            &f.sha256[..f.sha256.len().min(12)]
        );
    }
    match (&i.policy.path, &i.policy.sha256) {
        (Some(path), Some(sha)) => {
            let _ = writeln!(
                o,
                "- policy: {} (sha256 {})",
                escape(path),
                &sha[..sha.len().min(12)]
            );
        }
        _ => {
            let _ = writeln!(o, "- policy: built-in default");
        }
    }
    let _ = writeln!(o, "- liftgate {}", s.tool_version);
    o
}

/// "## Refusal calls to check": the detector's calls behind the refusal shares, for a person to
/// recount them (every out-of-scope question, then the in-scope answers counted as declined).
fn refusal_calls_section(o: &mut String, r: &Refusal) {
    let _ = writeln!(o, "## Refusal calls to check\n");
    let _ = writeln!(
        o,
        "{REFUSAL_CALLS_NOTE} A wording your model declines with that the rules miss can be added to the policy's refusal.extra_phrases.\n"
    );
    for (expect, title, none) in REFUSAL_CALL_KINDS {
        let list: Vec<&RefusalCall> = r.calls.iter().filter(|c| c.expect == expect).collect();
        let _ = writeln!(o, "### {title}\n");
        if list.is_empty() {
            let _ = writeln!(o, "{none}\n");
            continue;
        }
        let _ = writeln!(o, "| id | question | baseline answer | candidate answer |");
        let _ = writeln!(o, "|---|---|---|---|");
        let call = |declined: bool, answer: &str| {
            format!(
                "{}: {}",
                if declined { "**declined**" } else { "answered" },
                escape(answer)
            )
        };
        for c in list {
            let _ = writeln!(
                o,
                "| {} | {} | {} | {} |",
                escape(&c.id),
                escape(&c.question),
                call(c.baseline_declined, &c.baseline_answer),
                call(c.candidate_declined, &c.candidate_answer)
            );
        }
        o.push('\n');
    }
    if r.calls_left_off > 0 {
        let _ = writeln!(
            o,
            "{} more calls are not listed: the report lists the first {REFUSAL_CALLS_LISTED} of each kind. The grades files hold every call (the refused field).\n",
            r.calls_left_off
        );
    }
}

/// The cautions every report ends with: what automatic scores cannot show, the human review
/// they need, and the organisation's own rules first.
pub(crate) fn write_cautions(o: &mut String) {
    let _ = writeln!(o, "## Cautions\n");
    let _ = writeln!(
        o,
        "- These scores measure word overlap with the reference answers. They cannot show whether an answer is factually right \
         beyond that overlap, whether its tone fits, whether it gives harmful advice, or whether it follows your organisation's policies."
    );
    let _ = writeln!(
        o,
        "- Before rolling out, have a person read a random sample of answers from both models (30 to 50 is a common rule of thumb), \
         and every answer in sensitive categories."
    );
    let _ = writeln!(
        o,
        "- For regulated or high-stakes topics such as refunds, safety, health and money, your organisation's own review rules come first; \
         a GO here does not replace them."
    );
    let _ = writeln!(
        o,
        "- The questions must be held out from the fine-tuning data; otherwise the lift overstates what users will see.\n"
    );
}

/// Our own sentences can quote user text (category names); escape them whole, without the
/// cell length limit.
fn escape_prose(text: &str) -> String {
    escape_limited(text, None)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escape_neutralises_markdown_and_html() {
        let nasty = "a|b `code` <script>x</script> **bold** [l](u) \\ ~s~ #h !i\nline2\r\nline3\u{1b}[31m\u{202e}rev";
        let e = escape(nasty);
        assert!(!e.contains('\n') && !e.contains('\r'), "{e}");
        assert!(!e.contains("<script>"), "{e}");
        assert!(!e.contains('\u{1b}') && !e.contains('\u{202e}'), "{e}");
        // Every pipe and backtick is escaped.
        for (i, c) in e.char_indices() {
            if c == '|' || c == '`' {
                assert_eq!(&e[i - 1..i], "\\", "{e}");
            }
        }
        assert!(e.contains("line2<br>line3"), "{e}");
        assert_eq!(escape("plain words, 3.5 km."), "plain words, 3.5 km.");
    }

    #[test]
    fn escape_cuts_long_text_on_characters() {
        let long = "é".repeat(CELL_CHARS + 10);
        let e = escape(&long);
        assert_eq!(e.chars().count(), CELL_CHARS + 1);
        assert!(e.ends_with('…'));
    }
}
