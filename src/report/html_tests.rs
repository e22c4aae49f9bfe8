//! Unit tests of `html`.
use super::*;
use crate::formats::questions::Expect;
use crate::policy::Policy;
use std::collections::BTreeMap;

/// Answers an attacker (or a confused model) might produce.
const HOSTILE: &[&str] = &[
    "<img src=x onerror=alert(1)><script>window.__pwned=1</script>",
    "</div></article><style>body{display:none}</style><link rel=stylesheet href=http://tracker.invalid/x.css>",
    "<a href=\"javascript:alert(1)\">pay here</a> <a href='http://phish.invalid'>x</a>",
    "\" onmouseover=\"alert(1)\" x=' <svg onload=alert(1)><foreignObject>",
    "\u{202e}desrever\u{2066}isolate\u{2069}\u{200b}zero\u{feff}bom",
    "\u{1b}[31mred\u{7}bell\u{0}nul\r\nline\u{2028}sep",
    "<!-- open comment <![CDATA[ x ]]> &amp; &lt;b&gt; <meta http-equiv=refresh content=0;url=http://x.invalid>",
    "<iframe srcdoc=\"<script>parent.__pwned=1</script>\"></iframe><object data=x></object>",
];

fn metric(lift: f64, n: usize) -> MetricSummary {
    MetricSummary {
        baseline: Some(0.05),
        candidate: Some(0.05 + lift),
        lift: Some(lift),
        ci_low: Some(lift - 0.03),
        ci_high: Some(lift + 0.04),
        p_value: Some(0.00001),
        n,
        percentile: None,
        bca: None,
        p_value_method: "sign-flip".into(),
        better: n / 2,
        worse: n / 5,
        same: n - n / 2 - n / 5,
    }
}

fn rate(declined: u64, n: u64) -> Rate {
    let share = declined as f64 / n as f64;
    Rate {
        declined,
        share: Some(share),
        ci_low: Some((share - 0.1).max(0.0)),
        ci_high: Some((share + 0.1).min(1.0)),
    }
}

fn file(path: &str) -> InputFile {
    InputFile {
        path: path.into(),
        sha256: "ab".repeat(32),
    }
}

/// A summary whose every user-text field holds hostile text.
fn summary(hostile: bool) -> Summary {
    let h = |i: usize, plain: &str| {
        if hostile {
            format!("{plain} {}", HOSTILE[i % HOSTILE.len()])
        } else {
            plain.to_string()
        }
    };
    let mut categories = BTreeMap::new();
    for (k, name) in ["fares", "pets", "timetables"].iter().enumerate() {
        categories.insert(
            h(k, name),
            CategorySummary {
                n: 4 + 8 * k,
                refuse_questions: k,
                baseline: Some(0.1),
                candidate: Some(0.15),
                lift: Some(0.05 - 0.04 * k as f64),
                ci_low: Some(-0.05),
                ci_high: Some(0.12),
                p_value: Some(0.3),
                p_value_holm: Some(0.6),
                judged: k > 0,
            },
        );
    }
    let changes = |sign: f64| -> Vec<Change> {
        HOSTILE
            .iter()
            .enumerate()
            .map(|(i, a)| Change {
                id: h(i, &format!("q{i}")),
                category: h(i + 1, "pets"),
                question: h(i + 2, "Can I bring my dog?"),
                references: vec![h(i + 3, "Yes, on a lead."), "Yes.".into()],
                baseline_answer: if hostile {
                    a.to_string()
                } else {
                    "Dogs travel free.".into()
                },
                candidate_answer: if hostile {
                    format!("{a} {}", "long ".repeat(100))
                } else {
                    "Yes, dogs travel free on a lead.".into()
                },
                baseline_score: 0.5,
                candidate_score: 0.5 + sign * 0.25,
                change: sign * 0.25,
            })
            .collect()
    };
    let policy = Policy::default();
    Summary {
        format: FORMAT.into(),
        tool_version: "0.1.0".into(),
        inputs: Inputs {
            questions: file(&h(0, "eval-sets/ferry.jsonl")),
            baseline: file(&h(1, "base.grades.jsonl")),
            candidate: file(&h(2, "cand.grades.jsonl")),
            policy: PolicySource {
                path: Some(h(3, "gate.toml")),
                sha256: Some("cd".repeat(32)),
                source: "file".into(),
            },
            approximations: vec![h(4, "candidate: bf16")],
        },
        settings: Settings {
            resamples: 1000,
            seed: 7,
            confidence: 0.95,
            interval: IntervalKind::Bca,
            bootstrap_method: "paired".into(),
            p_value_method: "sign-flip".into(),
            rng: "chacha".into(),
        },
        policy,
        metrics: Metrics {
            exact_match: metric(0.0, 40),
            token_f1: metric(0.08, 40),
            rouge_l: metric(0.06, 40),
            semantic: None,
        },
        mcnemar: McNemar {
            baseline_only: 1,
            candidate_only: 2,
            both: 3,
            neither: 34,
            p_value: 1.0,
            method: "exact".into(),
        },
        refusal: Refusal {
            out_of_scope: RefusalRates {
                n: 10,
                baseline: rate(2, 10),
                candidate: rate(7, 10),
            },
            false_refusal: RefusalRates {
                n: 40,
                baseline: rate(1, 40),
                candidate: rate(6, 40),
            },
            interval: "wilson".into(),
            calls: HOSTILE
                .iter()
                .enumerate()
                .map(|(i, a)| RefusalCall {
                    id: h(i, &format!("c{i}")),
                    category: h(i + 1, "off-topic"),
                    question: h(i + 2, "What is the capital of the moon?"),
                    expect: if i < 5 {
                        Expect::Refuse
                    } else {
                        Expect::Answer
                    },
                    baseline_answer: if hostile {
                        a.to_string()
                    } else {
                        "The capital is Tranquility.".into()
                    },
                    baseline_declined: i % 2 == 0,
                    candidate_answer: "I can only help with ferry questions.".into(),
                    candidate_declined: true,
                })
                .collect(),
            calls_left_off: 3,
        },
        facts: None,
        leakage: None,
        categories,
        mde: Mde {
            metric: "token_f1".into(),
            alpha: 0.05,
            power: 0.8,
            value: Some(0.05),
            sd_diff: Some(0.1),
            n: 40,
            target: 0.03,
            questions_for_target: Some(280),
            method: "normal".into(),
            note: None,
        },
        changes: Changes {
            metric: "token_f1".into(),
            worse: changes(-1.0),
            better: changes(1.0),
        },
        warnings: vec![h(5, "The set is small.")],
        verdict: Verdict {
            go: false,
            checks: vec![
                Check {
                    name: "refusal.out_of_scope".into(),
                    description: "share declined".into(),
                    threshold: 0.8,
                    value: Some(0.7),
                    comparison: Comparison::AtLeast,
                    pass: false,
                    reason: Some("The fine-tuned model declines only 70.0%.".into()),
                },
                Check {
                    name: h(6, "category.pets"),
                    description: h(7, "upper end in category"),
                    threshold: -0.05,
                    value: Some(0.12),
                    comparison: Comparison::AtLeast,
                    pass: !hostile,
                    reason: hostile.then(|| h(0, "Category got clearly worse:")),
                },
            ],
        },
    }
}

#[test]
fn escape_makes_markup_and_format_characters_inert() {
    let e = escape("<a href='x' title=\"y\">&amp;</a>");
    assert_eq!(
        e,
        "&lt;a href=&#39;x&#39; title=&quot;y&quot;&gt;&amp;amp;&lt;/a&gt;"
    );
    let e = escape("a\u{202e}b\u{2066}c\u{200b}d\u{1b}e\u{0}f\r\ng\u{2028}h\ti");
    assert_eq!(e, "a\u{FFFD}b\u{FFFD}c\u{FFFD}d\u{FFFD}e\u{FFFD}f\ng\nh\ti");
    // Legitimate right-to-left and non-Latin text is kept.
    assert_eq!(escape("שלום · Ελλάδα · 東京"), "שלום · Ελλάδα · 東京");
}

/// The tags and attributes the page itself writes; anything else in the output would be
/// live markup from user text.
const OUR_TAGS: &[&str] = &[
    "html",
    "head",
    "meta",
    "link",
    "title",
    "style",
    "body",
    "header",
    "div",
    "span",
    "main",
    "section",
    "h1",
    "h2",
    "h3",
    "p",
    "ul",
    "li",
    "aside",
    "strong",
    "svg",
    "circle",
    "path",
    "rect",
    "figure",
    "figcaption",
    "desc",
    "defs",
    "pattern",
    "line",
    "text",
    "details",
    "summary",
    "table",
    "thead",
    "tbody",
    "tr",
    "th",
    "td",
    "article",
    "bdi",
    "em",
    "footer",
];

/// Every tag in `html`, in order (a minimal scanner: '<' starts a tag, as an HTML parser
/// would read it in text).
fn tags(html: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut rest = html;
    while let Some(i) = rest.find('<') {
        rest = &rest[i + 1..];
        let name: String = rest
            .trim_start_matches('/')
            .chars()
            .take_while(|c| c.is_ascii_alphanumeric() || *c == '!')
            .collect();
        out.push(name.to_ascii_lowercase());
    }
    out
}

#[test]
fn hostile_text_stays_text() {
    let page = render(&summary(true));
    // No tag the page does not write itself: no script, style, img, a, iframe, object,
    // link to a stylesheet, meta refresh, foreignObject, comment or CDATA from user text.
    for t in tags(&page) {
        assert!(
            t == "!doctype" || OUR_TAGS.contains(&t.as_str()),
            "unexpected tag <{t}> in page"
        );
    }
    assert_eq!(page.matches("<style>").count(), 1);
    assert_eq!(page.matches("<link ").count(), 1);
    assert!(page.contains("<link rel=\"icon\" href=\"data:,\">"));
    assert_eq!(page.matches("<meta ").count(), 5);
    assert!(!page.to_ascii_lowercase().contains("<script"));
    assert!(!page.contains("javascript:alert(1)\">"));
    // No attribute quote broken out of: every '"' belongs to an attribute we wrote, so
    // the count of `="` openings equals half the quotes.
    let body = page.replace(&format!("<style>{}</style>", stylesheet()), "");
    let quotes = body.matches('"').count();
    let openings = body.matches("=\"").count();
    assert_eq!(quotes, 2 * openings, "a stray quote in the page");
    // No event-handler attribute anywhere outside text: every "on...=" is escaped text.
    for handler in ["onerror=", "onload=", "onmouseover="] {
        for (i, _) in page.match_indices(handler) {
            let before = &page[..i];
            let last_lt = before.rfind('<').unwrap_or(0);
            let last_gt = before.rfind('>').unwrap_or(0);
            assert!(
                last_gt > last_lt,
                "{handler} inside a tag near {}",
                &page[i.saturating_sub(60)..i]
            );
        }
    }
    // Bidirectional overrides and isolates, zero-width and control characters are gone.
    for c in page.chars() {
        assert!(
            !matches!(c as u32, 0x200B..=0x200F | 0x202A..=0x202E | 0x2066..=0x2069 | 0xFEFF),
            "format character U+{:04X}",
            c as u32
        );
        assert!(!c.is_control() || c == '\n' || c == '\t', "control {c:?}");
    }
    // The hostile text is shown, made inert, not dropped.
    assert!(page.contains(
        "&lt;img src=x onerror=alert(1)&gt;&lt;script&gt;window.__pwned=1&lt;/script&gt;"
    ));
    assert!(page.contains("&lt;a href=&quot;javascript:alert(1)&quot;&gt;pay here"));
    assert!(page.contains("\u{FFFD}desrever\u{FFFD}isolate"));
}

#[test]
fn the_page_loads_nothing_and_runs_nothing() {
    let page = render(&summary(false));
    let css = stylesheet();
    let csp = content_security_policy(&css);
    assert!(page.contains(&format!(
        "<meta http-equiv=\"Content-Security-Policy\" content=\"{csp}\">"
    )));
    assert!(csp.starts_with("default-src 'none'; style-src 'sha256-"));
    assert!(!csp.contains("script-src") && !csp.contains("unsafe"));
    // The hash is of the exact stylesheet in the page (the browser hashes the element's
    // text): base64 of 32 bytes is 44 characters.
    assert!(page.contains(&format!("<style>{css}</style>")));
    let hash = csp
        .split("'sha256-")
        .nth(1)
        .unwrap()
        .split('\'')
        .next()
        .unwrap();
    assert_eq!(hash.len(), 44);
    // No reference to any network resource: the only URLs are the SVG namespace (an
    // identifier, never fetched).
    let without_ns = page.replace("xmlns=\"http://www.w3.org/2000/svg\"", "");
    assert!(!without_ns.contains("http://") && !without_ns.contains("https://"));
    assert!(!without_ns.contains("url(http") && !without_ns.contains("@import"));
    assert!(!page.contains(" src=") && !page.contains(" href=\"http"));
    assert!(!page.to_ascii_lowercase().contains("<script"));
}

#[test]
fn sections_come_in_the_documented_order() {
    let page = render(&summary(false));
    let order = [
        "id=\"verdict\"",
        "id=\"key-figures\"",
        "data-chart=\"chart-lift\"",
        "data-chart=\"chart-categories\"",
        "data-chart=\"chart-refusals\"",
        "data-chart=\"chart-changes\"",
        "id=\"checks\"",
        "id=\"worse\"",
        "id=\"better\"",
        "id=\"refusal-calls\"",
        "id=\"cautions\"",
        "id=\"inputs\"",
    ];
    let mut last = 0;
    for key in order {
        let at = page.find(key).unwrap_or_else(|| panic!("{key} missing"));
        assert!(at > last, "{key} out of order");
        last = at;
    }
    // The verdict is in words and carries the failing reason.
    assert!(page.contains("data-verdict=\"NO-GO\""));
    assert!(page.contains("The fine-tuned model declines only 70.0%."));
    // Pass and fail in words, not colour only.
    assert!(page.contains("PASS</span>") && page.contains("FAIL</span>"));
    // Every chart has a title, a description and a caption.
    for id in [
        "chart-lift",
        "chart-categories",
        "chart-refusals",
        "chart-changes",
    ] {
        assert!(page.contains(&format!("<title id=\"{id}-title\">")), "{id}");
        assert!(page.contains(&format!("<desc id=\"{id}-desc\">")), "{id}");
    }
    assert_eq!(page.matches("<figcaption>").count(), 4);
    // The cautions recommend human review and defer to the organisation's rules.
    assert!(page.contains("have a person read a random sample"));
    assert!(page.contains("your organisation's own review rules come first"));
    // Full fingerprints are shown.
    assert!(page.contains(&"ab".repeat(32)));
}

#[test]
fn long_answers_fold_without_script() {
    let long = "word ".repeat(200);
    let block = answer_block(&long);
    assert!(block.starts_with("<details class=\"fold\"><summary>"));
    assert!(block.contains("show the whole answer (1000 characters)"));
    // The whole text is inside the details, the preview in the summary.
    assert!(block.contains(&escape(&long)));
    let short = answer_block("Yes.");
    assert!(!short.contains("<details"));
    // An absurdly long answer is cut, and says so.
    let huge = "x".repeat(MAX_CHARS + 5);
    assert!(answer_block(&huge).contains("cut at 10000 characters"));
}

#[test]
fn rendering_is_deterministic() {
    assert_eq!(render(&summary(true)), render(&summary(true)));
    assert_eq!(render(&summary(false)), render(&summary(false)));
}

#[test]
fn go_verdict_says_so_in_words() {
    let mut s = summary(false);
    s.verdict.go = true;
    for c in &mut s.verdict.checks {
        c.pass = true;
        c.reason = None;
    }
    let page = render(&s);
    assert!(page.contains("data-verdict=\"GO\""));
    assert!(page.contains("passed all 2 checks"));
    assert!(!page.contains("FAIL</span>"));
}

#[test]
fn refusal_calls_are_listed_by_kind_with_both_calls() {
    let page = render(&summary(false));
    let section =
        &page[page.find("id=\"refusal-calls\"").unwrap()..page.find("id=\"cautions\"").unwrap()];
    // Five out-of-scope calls, then three in-scope ones, each kind folded with its counts:
    // baseline declined calls 0, 2, 4 of the first kind and 6 of the second.
    assert!(section.contains("Show 5 questions (counted as declined: baseline 3, candidate 5)"));
    assert!(section.contains("Show 3 questions (counted as declined: baseline 1, candidate 3)"));
    assert_eq!(section.matches("<article ").count(), 8);
    assert_eq!(section.matches("should be declined").count(), 5);
    assert_eq!(section.matches("should be answered").count(), 3);
    assert_eq!(
        section
            .matches("counted as <strong>answered</strong>")
            .count(),
        4
    );
    assert!(section.contains("3 more calls are not listed"));
    // What the rules cannot do is said before the list.
    assert!(section.contains("Rules read the wording; they do not understand it."));
}

#[test]
fn refusal_calls_section_says_when_there_is_nothing_to_list() {
    let mut s = summary(false);
    s.refusal.calls.clear();
    s.refusal.calls_left_off = 0;
    let page = render(&s);
    assert!(page.contains("The question set has no out-of-scope questions."));
    assert!(page.contains("No in-scope answer was counted as declined."));
    assert!(!page.contains("more calls are not listed"));
}

#[test]
fn summaries_written_before_the_refusal_calls_still_read() {
    // summary.json files from before the calls were listed (kept in run histories) have no
    // `refusal.calls` or `refusal.calls_left_off`: they read as an empty list.
    let mut v = serde_json::to_value(summary(false)).unwrap();
    let refusal = v["refusal"].as_object_mut().unwrap();
    assert!(refusal.remove("calls").is_some() && refusal.remove("calls_left_off").is_some());
    let s: Summary = serde_json::from_value(v).unwrap();
    assert!(s.refusal.calls.is_empty());
    assert_eq!(s.refusal.calls_left_off, 0);
    let page = render(&s);
    assert!(page.contains("The question set has no out-of-scope questions."));
}
