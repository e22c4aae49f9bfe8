//! report.html on the bundled demo, through the real binary: `vet` writes it beside report.md
//! and summary.json; it is self-contained (no script, no http:// or https:// reference but the
//! SVG namespace, a Content-Security-Policy that forbids loading anything), holds the verdict
//! and the four charts, and the same inputs give the same bytes. The page's behaviour in a
//! browser is checked by tests/browser/run.sh (headless Chromium).

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn liftgate(dir: &Path, args: &[&str]) -> Output {
    let o = Command::new(env!("CARGO_BIN_EXE_liftgate"))
        .current_dir(dir)
        .args(args)
        .output()
        .unwrap();
    assert!(
        matches!(o.status.code(), Some(0 | 1)),
        "{args:?}: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    o
}

#[test]
fn demo_report_html_is_self_contained_and_deterministic() {
    let tmp = tempfile::tempdir().unwrap();
    let d = tmp.path();
    let r = repo();
    let model = r.join("demo/models/base");
    let adapter = r.join("demo/models/adapter");
    let set = r.join("eval-sets/ferry-faq.jsonl");
    liftgate(
        d,
        &[
            "vet",
            "--model",
            model.to_str().unwrap(),
            "--adapter",
            adapter.to_str().unwrap(),
            "--questions",
            set.to_str().unwrap(),
            "--report",
            "vet",
        ],
    );
    let vet = d.join("vet");
    for f in ["summary.json", "report.md", "report.html"] {
        assert!(vet.join(f).is_file(), "{f} missing");
    }
    let page = std::fs::read_to_string(vet.join("report.html")).unwrap();

    // Nothing to run, nothing to load.
    let lower = page.to_ascii_lowercase();
    assert!(!lower.contains("<script"), "a script element");
    let without_ns = page.replace("xmlns=\"http://www.w3.org/2000/svg\"", "");
    assert!(
        !without_ns.contains("http://") && !without_ns.contains("https://"),
        "a network reference"
    );
    assert!(!lower.contains("@import") && !lower.contains("url(http"));
    assert!(page.contains("<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'sha256-"));
    // The verdict first, then the charts.
    let verdict = page.find("id=\"verdict\"").expect("verdict section");
    for chart in [
        "chart-lift",
        "chart-categories",
        "chart-refusals",
        "chart-changes",
    ] {
        let at = page
            .find(&format!("data-chart=\"{chart}\""))
            .unwrap_or_else(|| panic!("{chart} missing"));
        assert!(at > verdict, "{chart} before the verdict");
    }
    // The demo's verdict, in words, agrees with summary.json.
    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(vet.join("summary.json")).unwrap()).unwrap();
    let go = summary["verdict"]["go"].as_bool().unwrap();
    let word = if go { "GO" } else { "NO-GO" };
    assert!(page.contains(&format!("data-verdict=\"{word}\"")));
    // Every check of summary.json has its row.
    for check in summary["verdict"]["checks"].as_array().unwrap() {
        let name = check["name"].as_str().unwrap();
        assert!(page.contains(&format!("data-check=\"{name}\"")), "{name}");
    }

    // Same inputs, same bytes: weigh the vet's grades twice (relative paths, so the recorded
    // inputs are identical).
    for out in ["w1", "w2"] {
        liftgate(
            &vet,
            &[
                "weigh",
                "--questions",
                set.to_str().unwrap(),
                "--baseline",
                "baseline.grades.jsonl",
                "--candidate",
                "candidate.grades.jsonl",
                "--report",
                out,
                "--resamples",
                "2000",
            ],
        );
    }
    let a = std::fs::read(vet.join("w1/report.html")).unwrap();
    let b = std::fs::read(vet.join("w2/report.html")).unwrap();
    assert!(a == b, "report.html differs between identical runs");
    assert!(!a.is_empty());
}

/// Answers that try to inject markup, script, styles, links and bidirectional tricks.
const HOSTILE: &[&str] = &[
    "<img src=x onerror=alert(1)><script>window.__pwned=1</script>",
    "</div></section><style>body{display:none}</style><link rel=stylesheet href=http://x.invalid/s.css>",
    "<a href=\"javascript:alert(1)\">pay here</a> \" onmouseover=\"alert(1)\" x='",
    "\u{202e}desrever\u{2066}isolate\u{2069}\u{200b}zero <svg onload=alert(1)><foreignObject>",
    "<iframe srcdoc=\"<script>parent.__pwned=1</script>\"></iframe><!-- <meta http-equiv=refresh content=0>",
];

#[test]
fn hostile_grades_stay_text_in_report_html() {
    let tmp = tempfile::tempdir().unwrap();
    let d = tmp.path();
    let mut set = String::new();
    let (mut base, mut cand) = (String::new(), String::new());
    for i in 0..30 {
        let hostile = HOSTILE[i % HOSTILE.len()];
        // Ids, categories and questions carry hostile text too.
        let id = format!("q{i}<b>\"'");
        let category = if i % 2 == 0 {
            "pets <i>x</i>".to_string()
        } else {
            format!("fares\u{202e} {}", &hostile[..hostile.len().min(20)])
        };
        set += &serde_json::json!({
            "id": id, "category": category,
            "question": format!("Question {i} <em>markup</em> {hostile}"),
            "references": [format!("Reference {i} {hostile}")],
        })
        .to_string();
        set.push('\n');
        for (file, answer, f1) in [
            (&mut base, "The boat leaves at nine.".to_string(), 0.5),
            (
                &mut cand,
                format!("{hostile} {}", "padding ".repeat(i * 3)),
                0.1 + 0.05 * (i % 7) as f64,
            ),
        ] {
            *file += &serde_json::json!({
                "id": id, "category": category, "expect": "answer", "exact_match": 0,
                "token_f1": f1, "rouge_l": f1, "refused": false, "answer": answer,
            })
            .to_string();
            file.push('\n');
        }
    }
    std::fs::write(d.join("set.jsonl"), set).unwrap();
    std::fs::write(d.join("base.grades.jsonl"), base).unwrap();
    std::fs::write(d.join("cand.grades.jsonl"), cand).unwrap();
    liftgate(
        d,
        &[
            "weigh",
            "--questions",
            "set.jsonl",
            "--baseline",
            "base.grades.jsonl",
            "--candidate",
            "cand.grades.jsonl",
            "--report",
            "r",
            "--resamples",
            "1000",
        ],
    );
    let page = std::fs::read_to_string(d.join("r/report.html")).unwrap();
    let lower = page.to_ascii_lowercase();
    for live in [
        "<script",
        "<img",
        "<iframe",
        "<a ",
        "<i>",
        "<b>",
        "<em>",
        "<foreignobject",
        "<!--",
        "<link rel=stylesheet",
        "<meta http-equiv=refresh",
    ] {
        assert!(!lower.contains(live), "live markup {live:?} in report.html");
    }
    assert_eq!(lower.matches("<style>").count(), 1);
    // Every svg element is one of ours: a chart or a pass/fail/verdict symbol.
    for (i, _) in page.match_indices("<svg ") {
        let head = &page[i..(i + 60).min(page.len())];
        assert!(
            head.starts_with("<svg xmlns=\"http://www.w3.org/2000/svg\" class=\"lg-chart\"")
                || head.starts_with("<svg viewBox=\"0 0 16 16\" aria-hidden")
                || head.starts_with("<svg viewBox=\"0 0 52 52\" aria-hidden"),
            "{head}"
        );
    }
    assert_eq!(page.matches("class=\"lg-chart\"").count(), 8);
    for c in page.chars() {
        assert!(
            !matches!(c as u32, 0x200B..=0x200F | 0x202A..=0x202E | 0x2066..=0x2069),
            "format character U+{:04X}",
            c as u32
        );
    }
    // Shown, as text.
    assert!(page.contains("&lt;script&gt;window.__pwned=1&lt;/script&gt;"));
    assert!(page.contains("q0&lt;b&gt;&quot;&#39;"));
}
