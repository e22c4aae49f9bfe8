//! Hostile text cannot break report.md: answers (and ids, questions, references and category
//! names) holding Markdown table pipes, HTML, backticks, line breaks, control and
//! bidirectional characters go through the real `grade` and `weigh` binaries, and the report
//! keeps its structure: the same headings, every table row with its header's cell count, no
//! raw HTML tag other than the `<br>` liftgate writes, no unescaped backtick, no control
//! character. The terminal summary on stdout carries no control character either.

mod common;

use common::Bin;
use serde_json::json;

/// Answers an attacker (or a confused model) might produce.
const HOSTILE: &[&str] = &[
    "| col | injected |\n|---|---|\n| x | y |",
    "<script>alert('ferry')</script><img src=x onerror=alert(1)>",
    "```\nrm -rf /\n```",
    "line one\r\nline two\n\n# Injected heading\n---\n",
    "\u{1b}[31mred\u{1b}[0m \u{7}bell \u{0}nul \u{8}back\u{2028}line\u{2029}para\u{85}nel | x",
    "\u{202e}desrever\u{200b}zero\u{2066}isolate",
    "[pay here](javascript:alert(1)) ![img](http://tracker.invalid/p.png)",
    "<!-- hidden --> &lt;b&gt; &amp; <b>bold</b> </td></tr></table>",
    "\\| escaped pipe \\` and a lone backslash \\",
    "`inline` ``double`` **bold** _it_ ~~strike~~",
];

/// Splits a Markdown table row into cells on unescaped pipes.
fn cells(row: &str) -> usize {
    let mut n = 0;
    let mut escaped = false;
    for c in row.chars() {
        match c {
            '\\' if !escaped => escaped = true,
            '|' if !escaped => n += 1,
            _ => escaped = false,
        }
        if c != '\\' {
            escaped = false;
        }
    }
    n - 1
}

#[test]
fn hostile_answers_cannot_break_report_md() {
    let t = Bin::new();
    let mut set = String::new();
    let mut base = String::new();
    let mut cand = String::new();
    for (i, hostile) in HOSTILE.iter().enumerate() {
        // User text everywhere the report can quote it.
        let id = format!("q{i}|<i>");
        let category = if i % 2 == 0 {
            "boarding | <b>x</b>"
        } else {
            "pets\n## cat"
        };
        let reference = format!("The {i} o'clock boat leaves from pier {i}.");
        // Every third question is out of scope, so the refusal calls quote hostile text too.
        let expect = if i % 3 == 2 { "refuse" } else { "answer" };
        set += &json!({
            "id": id,
            "question": format!("Question {i} `with` <em>markup</em> | pipe\nand a line break?"),
            "references": if expect == "refuse" { vec![] } else { vec![reference.clone()] },
            "category": category,
            "expect": expect
        })
        .to_string();
        set.push('\n');
        for (file, answer) in [(&mut base, reference.as_str()), (&mut cand, *hostile)] {
            *file += &json!({"id": id, "answer": answer, "finish": "eos", "prompt_tokens": 9, "new_tokens": 9, "ms": 1})
                .to_string();
            file.push('\n');
        }
    }
    t.write("set.jsonl", set);
    t.write("base.answers.jsonl", base);
    t.write("cand.answers.jsonl", cand);
    for who in ["base", "cand"] {
        t.run([
            "grade",
            "--questions",
            "set.jsonl",
            "--answers",
            &format!("{who}.answers.jsonl"),
            "--out",
            &format!("{who}.grades.jsonl"),
        ])
        .expect_success();
    }
    let o = t.run([
        "weigh",
        "--questions",
        "set.jsonl",
        "--baseline",
        "base.grades.jsonl",
        "--candidate",
        "cand.grades.jsonl",
        "--report",
        "report",
        "--resamples",
        "1000",
    ]);
    o.expect_verdict();
    let stdout = String::from_utf8(o.stdout_bytes).unwrap();
    assert!(
        !stdout.chars().any(|c| c.is_control() && c != '\n'),
        "control character on stdout: {stdout:?}"
    );
    let md = t.read("report/report.md");

    // The headings are liftgate's own, in order; nothing a user wrote became one.
    let headings: Vec<&str> = md.lines().filter(|l| l.starts_with('#')).collect();
    assert_eq!(
        headings,
        [
            "# Verdict: NO-GO",
            "## Scores",
            "## Refusals",
            "## Facts",
            "## Categories",
            "## Gate checks",
            "## Questions that got worse",
            "## Questions that got better",
            "## Refusal calls to check",
            "### Out-of-scope questions, every one",
            "### In-scope questions with an answer counted as declined",
            "## Cautions",
            "## Inputs"
        ],
        "{md}"
    );
    // Every table row has as many cells as its header.
    let mut header_cells = None;
    for line in md.lines() {
        if line.starts_with('|') {
            let n = cells(line);
            match header_cells {
                None => header_cells = Some(n),
                Some(h) => assert_eq!(n, h, "row {line:?} in\n{md}"),
            }
        } else {
            header_cells = None;
        }
    }
    // The "worse" table lists the in-scope hostile answers (all scored lower than the
    // reference copy), one row each; the refusal calls list every out-of-scope one.
    let section = |title: &str| {
        md.split(title)
            .nth(1)
            .and_then(|s| s.split("\n#").next())
            .unwrap()
    };
    let out_of_scope = (0..HOSTILE.len()).filter(|i| i % 3 == 2).count();
    let worse = section("## Questions that got worse");
    let rows = worse.lines().filter(|l| l.starts_with("| q")).count();
    assert_eq!(rows, HOSTILE.len() - out_of_scope, "{worse}");
    let calls = section("### Out-of-scope questions, every one");
    let rows = calls.lines().filter(|l| l.starts_with("| q")).count();
    assert_eq!(rows, out_of_scope, "{calls}");
    assert!(
        calls.contains("answered: \\`\\`\\`<br>rm -rf /<br>\\`\\`\\`"),
        "{calls}"
    );
    // No HTML but liftgate's own <br>: every other '<' is an entity.
    let without_br = md.replace("<br>", "");
    assert!(!without_br.contains('<'), "raw '<' in report: {md}");
    // Every backtick is escaped (no code span or fence can open).
    for (i, c) in md.char_indices() {
        if c == '`' {
            assert_eq!(
                &md[i - 1..i],
                "\\",
                "unescaped backtick near {:?}",
                md[..i].chars().rev().take(30).collect::<String>()
            );
        }
    }
    // No control characters but newlines; no bidirectional overrides or zero-width characters.
    for c in md.chars() {
        assert!(
            !c.is_control() || c == '\n',
            "control character {c:?} in report"
        );
        assert!(
            !matches!(c as u32, 0x200B..=0x200F | 0x202A..=0x202E | 0x2066..=0x2069 | 0x2028 | 0x2029),
            "format or separator character U+{:04X} in report",
            c as u32
        );
    }
    // The hostile text is shown, made inert, not dropped.
    assert!(
        md.contains("&lt;script&gt;alert('ferry')&lt;/script&gt;"),
        "{md}"
    );
    assert!(md.contains("\\| col \\| injected \\|<br>"), "{md}");
    // summary.json keeps the answers verbatim (it is data, not markup).
    let summary = t.read("report/summary.json");
    let v: serde_json::Value = serde_json::from_str(&summary).unwrap();
    let answers: Vec<&str> = v["changes"]["worse"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["candidate_answer"].as_str().unwrap())
        .collect();
    assert!(answers.contains(&HOSTILE[1]), "{answers:?}");
}
