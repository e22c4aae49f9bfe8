//! The history end to end (docs/history.md): the real binary records `vet` and `weigh` runs in
//! an SQLite file, `trend` reads them back, `record` imports a report directory; concurrent
//! writers, damaged, foreign and newer-schema files.

use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn liftgate(dir: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_liftgate"))
        .current_dir(dir)
        .args(args)
        .output()
        .unwrap()
}

fn text(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

fn json(path: &Path) -> Value {
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

/// The report directory a `vet`/`weigh` printed (`report: DIR/report.md`).
fn report_dir(dir: &Path, out: &Output) -> PathBuf {
    let stdout = text(&out.stdout);
    let md = stdout
        .lines()
        .find_map(|l| l.strip_prefix("report: "))
        .unwrap_or_else(|| panic!("no report line: {stdout}\n{}", text(&out.stderr)));
    dir.join(md).parent().unwrap().to_path_buf()
}

/// The demo question set with three questions' references edited and two questions added.
fn edited_demo_set(path: &Path) {
    let original = std::fs::read_to_string(repo().join("eval-sets/ferry-faq.jsonl")).unwrap();
    let mut rows: Vec<Value> = original
        .lines()
        .filter(|l| !l.trim().is_empty())
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let mut edited = 0;
    for row in rows.iter_mut() {
        if row["expect"] == "answer" && edited < 3 {
            row["references"]
                .as_array_mut()
                .unwrap()
                .push(Value::from("As printed in the winter timetable."));
            edited += 1;
        }
    }
    for (id, q, r) in [
        (
            "new-001",
            "Can I pay for my crossing on board?",
            "Yes, cards are taken on board.",
        ),
        (
            "new-002",
            "Is there a cafe on the ferry?",
            "Yes, a small cafe opens on every crossing.",
        ),
    ] {
        rows.push(serde_json::json!({"id": id, "question": q, "references": [r], "category": "onboard", "expect": "answer"}));
    }
    let body: String = rows.iter().map(|r| format!("{r}\n")).collect();
    std::fs::write(path, body).unwrap();
}

#[test]
fn two_demo_runs_show_in_the_trend_with_the_set_change_and_like_for_like() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    let first = liftgate(
        dir,
        &["vet", "--resamples", "1000", "--label", "adapter v1"],
    );
    assert!(
        matches!(first.status.code(), Some(0 | 1)),
        "{}",
        text(&first.stderr)
    );
    assert!(text(&first.stderr).contains("recorded as run 1 in reports/history.sqlite"));
    let first_dir = report_dir(dir, &first);

    std::fs::create_dir(dir.join("v2")).unwrap();
    edited_demo_set(&dir.join("v2/ferry-faq.jsonl"));
    let demo = repo().join("demo/models");
    let second = liftgate(
        dir,
        &[
            "vet",
            "--model",
            demo.join("base").to_str().unwrap(),
            "--adapter",
            demo.join("adapter").to_str().unwrap(),
            "--questions",
            "v2/ferry-faq.jsonl",
            "--max-new-tokens",
            "48",
            "--resamples",
            "1000",
            "--label",
            "adapter v2",
        ],
    );
    assert!(
        matches!(second.status.code(), Some(0 | 1)),
        "{}",
        text(&second.stderr)
    );
    assert!(text(&second.stderr).contains("recorded as run 2"));
    let second_dir = report_dir(dir, &second);
    assert!(dir.join("reports/history.sqlite").is_file());

    let trend = liftgate(dir, &["trend", "--out", "trend-out", "--resamples", "1000"]);
    let stdout = text(&trend.stdout);
    assert_eq!(trend.status.code(), Some(0), "{}", text(&trend.stderr));
    assert!(
        stdout.contains("adapter v1") && stdout.contains("adapter v2"),
        "{stdout}"
    );
    assert!(stdout.contains("2 added, 3 edited"), "{stdout}");
    assert!(stdout.contains("NOT one like-for-like series"), "{stdout}");
    // 141 demo questions, 3 edited: 138 common and unchanged.
    assert!(
        stdout.contains(
            "run 2 (adapter v2) vs run 1 (adapter v1) on 138 shared unchanged questions: token F1"
        ),
        "{stdout}"
    );
    let md = std::fs::read_to_string(dir.join("trend-out/trend.md")).unwrap();
    assert!(md.contains("Like for like: the 138 questions"), "{md}");
    // trend.html: the same trend for people, self-contained (the browser test in
    // tests/browser/ opens it in Chromium).
    let html = std::fs::read_to_string(dir.join("trend-out/trend.html")).unwrap();
    assert_eq!(html.matches("data-chart=\"chart-trend-").count(), 3);
    assert!(
        html.contains("2 added, 0 removed, 3 edited"),
        "the set change is shown"
    );
    assert!(html.contains("138 question(s) are in every run with unchanged content"));
    assert!(html.contains("<strong>The set changed between these runs</strong>"));
    assert!(!html.contains("<script"));
    for reference in ["src=\"http", "href=\"http", "url(http", "@import"] {
        assert!(
            !html.contains(reference),
            "no outside resource: {reference}"
        );
    }

    let t = json(&dir.join("trend-out/trend.json"));
    assert_eq!(t["format"], "liftgate-trend/1");
    let series = &t["series"][0];
    assert_eq!(series["set_name"], "ferry-faq");
    assert_eq!(series["revisions"], 2);
    assert_eq!(series["set_changed"], true);
    assert_eq!(series["common_unchanged_questions"], 138);
    let runs = series["runs"].as_array().unwrap();
    assert_eq!(runs.len(), 2);
    assert!(runs[0]["set"]["change"].is_null());
    assert_eq!(
        runs[1]["set"]["change"],
        serde_json::json!({"added": 2, "removed": 0, "edited": 3, "unverified": 0})
    );
    assert_eq!(runs[1]["set"]["questions"], 143);
    // Whole-set numbers are each run's own summary.json values, under the same names.
    for (run, rdir) in runs.iter().zip([&first_dir, &second_dir]) {
        let s = json(&rdir.join("summary.json"));
        for m in ["exact_match", "token_f1", "rouge_l"] {
            for f in [
                "baseline",
                "candidate",
                "lift",
                "ci_low",
                "ci_high",
                "p_value",
                "n",
            ] {
                assert_eq!(run["metrics"][m][f], s["metrics"][m][f], "{m}.{f}");
            }
        }
        for kind in ["out_of_scope", "false_refusal"] {
            for v in ["baseline", "candidate"] {
                assert_eq!(run["refusal"][kind][v], s["refusal"][kind][v]["share"]);
            }
            assert_eq!(run["refusal"][kind]["n"], s["refusal"][kind]["n"]);
        }
        let go = s["verdict"]["go"].as_bool().unwrap();
        assert_eq!(run["verdict"], if go { "GO" } else { "NO-GO" });
        assert_eq!(run["variants"][1]["kind"], "base+adapter");
        assert_eq!(run["variants"][0]["kind"], "base");
    }
    // The same model answers the same unchanged questions the same way: the like-for-like
    // means agree between the runs, and the comparison finds no difference.
    assert_eq!(
        runs[0]["like_for_like"]["token_f1"],
        runs[1]["like_for_like"]["token_f1"]
    );
    let c = &t["comparisons"][0];
    assert_eq!(c["shared_questions"], 138);
    assert_eq!(c["metrics"]["token_f1"]["difference"], 0.0);
    assert_eq!(c["regression"], false);

    // --between by label gives the same pair.
    let between = liftgate(
        dir,
        &[
            "trend",
            "--between",
            "adapter v1",
            "2",
            "--resamples",
            "1000",
        ],
    );
    assert_eq!(between.status.code(), Some(0), "{}", text(&between.stderr));
    assert!(text(&between.stdout).contains("run 2 (adapter v2) vs run 1 (adapter v1)"));
    let unknown = liftgate(dir, &["trend", "--between", "nope", "2"]);
    assert_eq!(unknown.status.code(), Some(2));
    assert!(text(&unknown.stderr).contains("\"nope\""));
}

const SET: &str = r#"{"id": "a1", "question": "When does the first boat leave?", "references": ["At 06:50."], "category": "timetables"}
{"id": "a2", "question": "Can I bring my dog?", "references": ["Yes, on a lead."], "category": "pets"}
{"id": "a3", "question": "Is there parking?", "references": ["Yes, at the quay."], "category": "parking"}
{"id": "x1", "question": "What will the weather be?", "references": [], "category": "out-of-scope", "expect": "refuse"}
"#;

fn grade_row(id: &str, f1: Option<f64>, refused: bool) -> String {
    let expect = if id.starts_with('x') {
        "refuse"
    } else {
        "answer"
    };
    serde_json::json!({
        "id": id, "category": "c", "expect": expect,
        "exact_match": f1.map(|v| (v == 1.0) as u8), "token_f1": f1, "rouge_l": f1,
        "refused": refused, "answer": "text"
    })
    .to_string()
}

/// A set and two grades files for `weigh`.
fn weigh_inputs(dir: &Path) {
    std::fs::write(dir.join("set.jsonl"), SET).unwrap();
    let rows = |fs: [f64; 3]| -> String {
        let mut s: String = ["a1", "a2", "a3"]
            .iter()
            .zip(fs)
            .map(|(id, f)| grade_row(id, Some(f), false) + "\n")
            .collect();
        s.push_str(&(grade_row("x1", None, true) + "\n"));
        s
    };
    std::fs::write(dir.join("base.jsonl"), rows([0.2, 0.5, 0.0])).unwrap();
    std::fs::write(dir.join("cand.jsonl"), rows([0.8, 0.5, 1.0])).unwrap();
}

fn weigh(dir: &Path, report: &str, extra: &[&str]) -> Output {
    let mut args = vec![
        "weigh",
        "--questions",
        "set.jsonl",
        "--baseline",
        "base.jsonl",
        "--candidate",
        "cand.jsonl",
        "--resamples",
        "1000",
        "--report",
        report,
    ];
    args.extend_from_slice(extra);
    liftgate(dir, &args)
}

#[test]
fn eight_weighs_finishing_at_once_are_all_recorded() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    weigh_inputs(dir);
    let children: Vec<std::process::Child> = (0..8)
        .map(|i| {
            Command::new(env!("CARGO_BIN_EXE_liftgate"))
                .current_dir(dir)
                .args([
                    "weigh",
                    "--questions",
                    "set.jsonl",
                    "--baseline",
                    "base.jsonl",
                    "--candidate",
                    "cand.jsonl",
                    "--resamples",
                    "1000",
                    "--report",
                    &format!("reports/run-{i}"),
                    "--history",
                    "shared/history.sqlite",
                    "--label",
                    &format!("writer {i}"),
                ])
                .stdout(std::process::Stdio::piped())
                .stderr(std::process::Stdio::piped())
                .spawn()
                .unwrap()
        })
        .collect();
    for child in children {
        let out = child.wait_with_output().unwrap();
        let stderr = text(&out.stderr);
        assert!(matches!(out.status.code(), Some(0 | 1)), "{stderr}");
        assert!(stderr.contains("recorded as run"), "{stderr}");
    }
    let trend = liftgate(
        dir,
        &[
            "trend",
            "--history",
            "shared/history.sqlite",
            "--out",
            "t",
            "--resamples",
            "1000",
        ],
    );
    assert_eq!(trend.status.code(), Some(0), "{}", text(&trend.stderr));
    let t = json(&dir.join("t/trend.json"));
    let runs = t["series"][0]["runs"].as_array().unwrap();
    assert_eq!(runs.len(), 8);
    let mut labels: Vec<String> = runs
        .iter()
        .map(|r| r["label"].as_str().unwrap().to_string())
        .collect();
    labels.sort();
    assert_eq!(
        labels,
        (0..8).map(|i| format!("writer {i}")).collect::<Vec<_>>()
    );
    // Same set throughout: no like-for-like table, the comparisons find no change.
    assert_eq!(t["series"][0]["set_changed"], false);
}

#[test]
fn damaged_or_foreign_history_files_exit_2_and_stay_untouched() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    weigh_inputs(dir);
    let mut damaged = b"SQLite format 3\0".to_vec();
    damaged.extend(std::iter::repeat_n(0xa5u8, 4096));
    for (name, bytes) in [
        (
            "notes.sqlite",
            b"these are my notes, not a database\n".to_vec(),
        ),
        ("damaged.sqlite", damaged),
    ] {
        let path = dir.join(name);
        std::fs::write(&path, &bytes).unwrap();
        let out = weigh(dir, "reports/r", &["--history", name]);
        assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
        assert!(text(&out.stderr).contains(name), "{}", text(&out.stderr));
        assert!(
            !dir.join("reports/r/summary.json").exists(),
            "weigh ran anyway"
        );
        let out = liftgate(dir, &["trend", "--history", name]);
        assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
        assert!(text(&out.stderr).contains(name));
        assert_eq!(std::fs::read(&path).unwrap(), bytes, "{name} was changed");
    }
}

#[test]
fn a_newer_schema_is_refused_and_left_unchanged() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    weigh_inputs(dir);
    let out = weigh(dir, "reports/one", &[]);
    assert!(
        matches!(out.status.code(), Some(0 | 1)),
        "{}",
        text(&out.stderr)
    );
    let history = dir.join("reports/history.sqlite");
    {
        let conn = rusqlite::Connection::open(&history).unwrap();
        conn.execute_batch("PRAGMA user_version = 7; PRAGMA wal_checkpoint(TRUNCATE);")
            .unwrap();
    }
    let before = std::fs::read(&history).unwrap();
    let out = liftgate(dir, &["trend"]);
    let stderr = text(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{stderr}");
    assert!(stderr.contains("history.sqlite"), "{stderr}");
    assert!(
        stderr.contains("schema version 7") && stderr.contains("version 1"),
        "{stderr}"
    );
    let out = weigh(dir, "reports/two", &[]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert_eq!(std::fs::read(&history).unwrap(), before);
}

#[test]
fn a_weigh_that_fails_after_reading_leaves_the_history_as_it_was() {
    // The history's transaction is begun while the statistics are computed; a weigh that
    // fails there (a policy gating on scores the grades lack) must roll it back.
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    weigh_inputs(dir);
    std::fs::write(dir.join("semantic.toml"), "[lift]\nmetric = \"semantic\"\n").unwrap();
    // No history yet: none is left behind.
    let out = weigh(dir, "reports/a", &["--policy", "semantic.toml"]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert!(!dir.join("reports/history.sqlite").exists());
    assert!(!dir.join("reports/a").exists());
    // A history with one run: byte for byte unchanged, no journal beside it.
    let first = weigh(dir, "reports/b", &[]);
    assert!(
        matches!(first.status.code(), Some(0 | 1)),
        "{}",
        text(&first.stderr)
    );
    let history = dir.join("reports/history.sqlite");
    let before = std::fs::read(&history).unwrap();
    let out = weigh(dir, "reports/c", &["--policy", "semantic.toml"]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert_eq!(std::fs::read(&history).unwrap(), before);
    let mut names: Vec<String> = std::fs::read_dir(dir.join("reports"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    assert_eq!(names, ["b", "history.sqlite"]);
}

#[test]
fn a_new_history_in_an_existing_directory_leaves_no_temporary_file() {
    // A history that does not exist yet is built under a temporary name beside it while the
    // statistics run, and linked into place with the run: neither a failed nor a finished
    // weigh may leave that file (or SQLite's companions) behind.
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    weigh_inputs(dir);
    std::fs::create_dir(dir.join("reports")).unwrap();
    std::fs::write(dir.join("semantic.toml"), "[lift]\nmetric = \"semantic\"\n").unwrap();
    let listing = || {
        let mut names: Vec<String> = std::fs::read_dir(dir.join("reports"))
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        names.sort();
        names
    };
    let out = weigh(dir, "reports/a", &["--policy", "semantic.toml"]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert!(listing().is_empty(), "{:?}", listing());
    let out = weigh(dir, "reports/b", &[]);
    let stderr = text(&out.stderr);
    assert!(matches!(out.status.code(), Some(0 | 1)), "{stderr}");
    assert!(stderr.contains("recorded as run 1 in"), "{stderr}");
    assert_eq!(listing(), ["b", "history.sqlite"]);
    // The linked file is a complete history: the next run is run 2, and both are listed.
    let out = weigh(dir, "reports/c", &[]);
    assert!(
        text(&out.stderr).contains("recorded as run 2 in"),
        "{}",
        text(&out.stderr)
    );
    let out = liftgate(
        dir,
        &[
            "trend",
            "--history",
            "reports/history.sqlite",
            "--out",
            "t",
            "--resamples",
            "1000",
        ],
    );
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let trend = json(&dir.join("t/trend.json"));
    let runs = trend["series"][0]["runs"].as_array().map(Vec::len);
    assert_eq!(runs, Some(2), "{trend}");
}

#[test]
fn a_failed_recording_keeps_the_report_and_says_how_to_record_it() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    weigh_inputs(dir);
    // A history path that cannot be created (its parent is a file).
    std::fs::write(dir.join("blocker"), "x").unwrap();
    let out = weigh(
        dir,
        "reports/r",
        &["--history", "blocker/history.sqlite", "--label", "try 1"],
    );
    let stderr = text(&out.stderr);
    let summary = json(&dir.join("reports/r/summary.json"));
    let go = summary["verdict"]["go"].as_bool().unwrap();
    assert_eq!(out.status.code(), Some(if go { 0 } else { 1 }), "{stderr}");
    assert!(stderr.contains("NOT recorded"), "{stderr}");
    assert!(
        stderr.contains("liftgate record reports/r --questions set.jsonl --history blocker/history.sqlite --label 'try 1'"),
        "{stderr}"
    );
    // The import, into a usable file.
    let rec = liftgate(
        dir,
        &[
            "record",
            "reports/r",
            "--history",
            "h.sqlite",
            "--label",
            "try 1",
        ],
    );
    assert_eq!(rec.status.code(), Some(0), "{}", text(&rec.stderr));
    assert!(text(&rec.stdout).contains("as run 1"));
    // A second import of the same report is refused.
    let again = liftgate(dir, &["record", "reports/r", "--history", "h.sqlite"]);
    assert_eq!(again.status.code(), Some(2));
    assert!(
        text(&again.stderr).contains("already recorded"),
        "{}",
        text(&again.stderr)
    );
    let trend = liftgate(dir, &["trend", "--history", "h.sqlite", "--out", "t"]);
    assert_eq!(trend.status.code(), Some(0), "{}", text(&trend.stderr));
    let t = json(&dir.join("t/trend.json"));
    let run = &t["series"][0]["runs"][0];
    assert_eq!(run["source"], "record");
    assert_eq!(run["label"], "try 1");
    assert_eq!(
        run["metrics"]["token_f1"]["lift"],
        summary["metrics"]["token_f1"]["lift"]
    );
    assert_eq!(run["like_for_like"]["token_f1"]["n"], 3);

    // --no-history records nothing.
    let out = weigh(dir, "reports/quiet", &["--no-history"]);
    assert!(
        !text(&out.stderr).contains("recorded"),
        "{}",
        text(&out.stderr)
    );
    assert!(!dir.join("reports/history.sqlite").exists());
}
