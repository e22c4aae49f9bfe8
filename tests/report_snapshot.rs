//! Snapshot of `weigh` output on fixed grades: report.md and summary.json, compared byte for
//! byte with tests/fixtures/report/expected/. A change to the report, the statistics or the
//! summary fields shows up here as a diff; when the change is meant, rewrite the expected
//! files with `LIFTGATE_BLESS=1 cargo test --release --test report_snapshot` and review the
//! diff in version control. Inputs: tests/fixtures/report/, made by
//! tests/reference/make_report_fixture.py (see tests/reference/README.md).

mod common;

use common::Bin;
use std::path::Path;

const INPUTS: [&str; 3] = [
    "questions.jsonl",
    "baseline.grades.jsonl",
    "candidate.grades.jsonl",
];
const SNAPSHOTS: [&str; 2] = ["report.md", "summary.json"];
/// Lines of context shown before the first difference, and most lines shown per side.
const CONTEXT: usize = 3;
const SHOWN: usize = 40;

fn blessing() -> bool {
    std::env::var_os("LIFTGATE_BLESS").is_some_and(|v| v == "1")
}

/// A unified-style hunk for the first region where `want` and `got` differ (the lines between
/// their common prefix and common suffix), or `None` when they are equal.
fn first_diff(name: &str, want: &str, got: &str) -> Option<String> {
    if want == got {
        return None;
    }
    let a: Vec<&str> = want.split_inclusive('\n').collect();
    let b: Vec<&str> = got.split_inclusive('\n').collect();
    let prefix = a.iter().zip(&b).take_while(|(x, y)| x == y).count();
    let suffix = a[prefix..]
        .iter()
        .rev()
        .zip(b[prefix..].iter().rev())
        .take_while(|(x, y)| x == y)
        .count();
    let (a_end, b_end) = (a.len() - suffix, b.len() - suffix);
    let start = prefix.saturating_sub(CONTEXT);
    let mut out = format!(
        "--- expected/{name}\n+++ actual/{name}\n@@ -{},{} +{},{} @@\n",
        start + 1,
        a_end - start,
        start + 1,
        b_end - start
    );
    let line = |sign: char, l: &str| {
        let mut s = format!("{sign}{}", l.strip_suffix('\n').unwrap_or(l));
        if !l.ends_with('\n') {
            s.push_str("\n\\ No newline at end of file");
        }
        s.push('\n');
        s
    };
    for l in &a[start..prefix] {
        out += &line(' ', l);
    }
    for (sign, lines) in [('-', &a[prefix..a_end]), ('+', &b[prefix..b_end])] {
        for l in lines.iter().take(SHOWN) {
            out += &line(sign, l);
        }
        if lines.len() > SHOWN {
            out += &format!("{sign}... {} more lines\n", lines.len() - SHOWN);
        }
    }
    Some(out)
}

/// `weigh --resamples 2000 --seed 7` on the fixed inputs, copied into a temp dir and named by
/// relative paths so the recorded input paths are the same on every machine.
fn weigh_fixture() -> (Bin, common::Run) {
    let t = Bin::new();
    for f in INPUTS {
        t.write(f, std::fs::read(common::fixture("report").join(f)).unwrap());
    }
    let run = t.run([
        "weigh",
        "--questions",
        "questions.jsonl",
        "--baseline",
        "baseline.grades.jsonl",
        "--candidate",
        "candidate.grades.jsonl",
        "--report",
        "report",
        "--resamples",
        "2000",
        "--seed",
        "7",
    ]);
    (t, run)
}

#[test]
fn report_md_and_summary_json_match_the_snapshot() {
    let (t, run) = weigh_fixture();
    let code = run.expect_verdict();
    let summary: serde_json::Value = serde_json::from_str(&t.read("report/summary.json")).unwrap();
    assert_eq!(
        code == 0,
        summary["verdict"]["go"].as_bool().unwrap(),
        "exit code and summary verdict disagree\n{}",
        run.describe()
    );
    let expected = common::fixture("report/expected");
    if blessing() {
        std::fs::create_dir_all(&expected).unwrap();
        for f in SNAPSHOTS {
            std::fs::write(expected.join(f), t.read_bytes(&format!("report/{f}"))).unwrap();
            eprintln!("blessed {}", expected.join(f).display());
        }
        return;
    }
    let mut diffs = Vec::new();
    for f in SNAPSHOTS {
        let got = t.read(&format!("report/{f}"));
        let want = read_expected(&expected.join(f));
        if let Some(d) = first_diff(f, &want, &got) {
            diffs.push(d);
        }
    }
    assert!(
        diffs.is_empty(),
        "weigh output differs from the snapshot in tests/fixtures/report/expected/.\n\
         If the change is intended, rerun with LIFTGATE_BLESS=1 and review the diff.\n\n{}",
        diffs.join("\n")
    );
}

fn read_expected(path: &Path) -> String {
    std::fs::read_to_string(path).unwrap_or_else(|e| {
        panic!(
            "{}: {e}; create it with LIFTGATE_BLESS=1 cargo test --release --test report_snapshot",
            path.display()
        )
    })
}

/// The diff printer itself, on small texts.
#[test]
fn first_diff_shows_the_first_differing_lines_with_context() {
    assert_eq!(first_diff("x", "a\nb\n", "a\nb\n"), None);
    let want = "1\n2\n3\n4\n5\n6\n7\n";
    let got = "1\n2\n3\n4\nfive\n6\n7\n";
    assert_eq!(
        first_diff("r.md", want, got).unwrap(),
        "--- expected/r.md\n+++ actual/r.md\n@@ -2,4 +2,4 @@\n 2\n 3\n 4\n-5\n+five\n"
    );
    // A line added at the end, and a missing final newline.
    assert_eq!(
        first_diff("s", "a\n", "a\nb").unwrap(),
        "--- expected/s\n+++ actual/s\n@@ -1,1 +1,2 @@\n a\n+b\n\\ No newline at end of file\n"
    );
}
