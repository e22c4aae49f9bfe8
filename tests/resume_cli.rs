//! Resuming `answer` and `vet` after a stop: the real binary on the tiny reference llama model
//! (tests/fixtures/runner/llama), killed with SIGKILL or stopped with SIGINT/SIGTERM while it
//! answers, then run again with the same command. The final answers must equal those of an
//! uninterrupted run (greedy f32 decoding is deterministic; the `ms` timings are not compared),
//! with no id missing or repeated; a journal made with other settings must be refused.
#![cfg(unix)]

mod common;

use common::{Bin, Run};
use serde_json::Value;
use std::collections::HashSet;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::OnceLock;
use std::time::{Duration, Instant};

fn fixture() -> PathBuf {
    common::fixture("runner/llama")
}

const ISLANDS: [&str; 6] = [
    "Gullrock",
    "Tern Isle",
    "Saltmarsh",
    "Kelp Point",
    "Brae",
    "Lowe",
];
const ASKS: [&str; 5] = [
    "When does the first boat to {} leave on {}?",
    "Can I bring a bicycle to {} on {}?",
    "Is there a late crossing from {} on {}?",
    "How much is a return ticket to {} on {}?",
    "Do dogs travel free to {} on {}?",
];
const DAYS: [&str; 4] = ["Monday", "Friday", "Saturday", "a holiday"];

/// A question set of `n` different ferry questions.
fn write_set(path: &Path, n: usize) {
    let mut text = String::new();
    for i in 0..n {
        let q = ASKS[i % ASKS.len()]
            .replacen("{}", ISLANDS[(i / 5) % ISLANDS.len()], 1)
            .replacen("{}", DAYS[(i / 30) % DAYS.len()], 1);
        text.push_str(
            &serde_json::json!({"id": format!("q{i:03}"), "question": q, "references": ["x"]})
                .to_string(),
        );
        text.push('\n');
    }
    std::fs::write(path, text).unwrap();
}

/// `liftgate answer` on the fixture model, by default one question at a time so answers are
/// saved one by one, each exactly 24 tokens long so a run lasts long enough to be stopped (about 10 ms an
/// answer; fsync of each journal line measured at 0.2 ms of that).
fn answer_cmd(set: &Path, out: &Path, extra: &[&str]) -> Command {
    let mut c = common::command(["answer"]);
    c.arg("--model")
        .arg(fixture().join("model"))
        .arg("--questions")
        .arg(set)
        .arg("--out")
        .arg(out)
        .args(["--threads", "1", "--ignore-eos"])
        .args(extra);
    if !extra.contains(&"--batch") {
        c.args(["--batch", "1"]);
    }
    if !extra.contains(&"--max-new-tokens") {
        c.args(["--max-new-tokens", "24"]);
    }
    c
}

fn output(c: Command) -> Run {
    Run::of(c)
}

fn journal(out: &Path) -> PathBuf {
    PathBuf::from(format!("{}.partial", out.display()))
}

/// Checks a journal as a resuming run will read it: a header line, then answer rows with
/// distinct ids, every complete line valid except possibly a last one cut by a kill. Returns
/// the ids of the valid rows.
fn check_journal(path: &Path) -> Vec<String> {
    let bytes = std::fs::read(path).unwrap();
    if bytes.is_empty() {
        return Vec::new();
    }
    let text = String::from_utf8_lossy(&bytes);
    let mut lines: Vec<&str> = text.split_inclusive('\n').collect();
    let header: Value = serde_json::from_str(lines.remove(0).trim_end()).expect("header");
    assert_eq!(header["journal"], "liftgate answers journal");
    assert_eq!(header["identity"]["max_new_tokens"].as_u64(), Some(24));
    let mut ids = Vec::new();
    let mut seen = HashSet::new();
    let last = lines.len().saturating_sub(1);
    for (k, line) in lines.iter().enumerate() {
        let row = line
            .strip_suffix('\n')
            .and_then(|l| serde_json::from_str::<Value>(l).ok());
        match row {
            Some(row) => {
                let id = row["id"].as_str().unwrap().to_string();
                assert!(seen.insert(id.clone()), "{id} twice in the journal");
                ids.push(id);
            }
            None => assert_eq!(k, last, "only the last line may be cut: {line:?}"),
        }
    }
    ids
}

/// Complete answer rows in the journal so far.
fn saved_rows(path: &Path) -> usize {
    std::fs::read(path)
        .map(|b| b.iter().filter(|&&c| c == b'\n').count().saturating_sub(1))
        .unwrap_or(0)
}

/// Waits until `journal` holds at least `rows` complete answers; false if the child exited first
/// or a minute passed.
fn wait_for_rows(child: &mut Child, journal: &Path, rows: usize) -> bool {
    let start = Instant::now();
    while start.elapsed() < Duration::from_secs(60) {
        if saved_rows(journal) >= rows {
            return true;
        }
        if child.try_wait().unwrap().is_some() {
            return false;
        }
        std::thread::sleep(Duration::from_millis(1));
    }
    false
}

fn send(child: &Child, signal: &str) {
    let ok = Command::new("kill")
        .args(["-s", signal, &child.id().to_string()])
        .status()
        .unwrap()
        .success();
    assert!(ok, "kill -s {signal}");
}

/// xorshift64*: a small seeded generator, so the kill points are the same on every run.
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
    }
    /// Uniform-enough integer in lo..=hi.
    fn range(&mut self, lo: u64, hi: u64) -> u64 {
        lo + self.next() % (hi - lo + 1)
    }
}

const N: usize = 200;

/// The uninterrupted run every resumed run is compared with, made once per test binary.
fn reference() -> &'static (PathBuf, Vec<Value>) {
    static REF: OnceLock<(PathBuf, Vec<Value>)> = OnceLock::new();
    REF.get_or_init(|| {
        let dir = Path::new(env!("CARGO_TARGET_TMPDIR")).join("resume-reference");
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let set = dir.join("set.jsonl");
        write_set(&set, N);
        let out = dir.join("answers.jsonl");
        let o = output(answer_cmd(&set, &out, &[]));
        o.expect_success();
        assert!(!journal(&out).exists(), "the journal is removed when done");
        let rows = common::answers_without_ms(&out);
        assert_eq!(rows.len(), N);
        (set, rows)
    })
}

/// Starts a run on the reference set and SIGKILLs it once `rows` answers are saved.
fn killed_run(out: &Path, rows: usize, extra: &[&str]) {
    let (set, _) = reference();
    let mut child = answer_cmd(set, out, extra)
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    assert!(
        wait_for_rows(&mut child, &journal(out), rows),
        "the run ended before {rows} answers were saved"
    );
    child.kill().unwrap(); // SIGKILL on unix
    child.wait().unwrap();
}

#[test]
fn a_cut_journal_resumes_to_the_uninterrupted_answers() {
    let (set, expected) = reference();
    let tmp = Bin::new();
    let out = tmp.path("answers.jsonl");
    killed_run(&out, 6, &[]);
    // Keep the header and three answers, then half of the fourth: a write cut by a kill.
    let text = std::fs::read_to_string(journal(&out)).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    let fourth = lines[4];
    let cut = format!(
        "{}\n{}\n{}\n{}\n{}",
        lines[0],
        lines[1],
        lines[2],
        lines[3],
        &fourth[..fourth.len() / 2]
    );
    std::fs::write(journal(&out), &cut).unwrap();
    let o = output(answer_cmd(set, &out, &[]));
    let err = &o.stderr;
    o.expect_success();
    assert!(
        err.contains(&format!("3 of {N} questions already answered")),
        "{err}"
    );
    assert!(err.contains("line 5, cut off mid-write, dropped"), "{err}");
    assert_eq!(&common::answers_without_ms(&out), expected);
    assert!(!journal(&out).exists());
    let run: Value = serde_json::from_str(
        &std::fs::read_to_string(format!("{}.run.json", out.display())).unwrap(),
    )
    .unwrap();
    assert_eq!(run["questions"]["count"].as_u64(), Some(N as u64));

    // A garbled last line that does end in a newline is dropped the same way.
    std::fs::remove_file(&out).unwrap();
    let garbled = format!("{}\n{}\n{{\"id\":\"q0\u{0}\n", lines[0], lines[1]);
    std::fs::write(journal(&out), garbled).unwrap();
    let o = output(answer_cmd(set, &out, &[]));
    let err = &o.stderr;
    o.expect_success();
    assert!(
        err.contains(&format!("1 of {N} questions already answered")),
        "{err}"
    );
    assert_eq!(&common::answers_without_ms(&out), expected);

    // Killed after the last answer was saved but before the answers file was written: every
    // answer is in the journal (in completion order), nothing is left to compute.
    let done = std::fs::read_to_string(&out).unwrap();
    let mut full = format!("{}\n", lines[0]);
    for row in done.lines().rev() {
        full.push_str(row);
        full.push('\n');
    }
    std::fs::write(journal(&out), full).unwrap();
    std::fs::remove_file(&out).unwrap();
    let o = output(answer_cmd(set, &out, &[]));
    let err = &o.stderr;
    o.expect_success();
    assert!(
        err.contains(&format!("{N} of {N} questions already answered")),
        "{err}"
    );
    assert_eq!(
        std::fs::read_to_string(&out).unwrap(),
        done,
        "rows back in set order"
    );
    assert!(!journal(&out).exists());

    // Run again once complete: the answers file is kept as it is, nothing recomputed.
    let before = std::fs::read(&out).unwrap();
    let o = output(answer_cmd(set, &out, &[]));
    let err = &o.stderr;
    o.expect_success();
    assert!(err.contains("already complete"), "{err}");
    assert_eq!(std::fs::read(&out).unwrap(), before);
}

#[test]
fn a_journal_from_another_run_is_refused_unless_restarting() {
    let (set, expected) = reference();
    let tmp = Bin::new();
    let out = tmp.path("answers.jsonl");
    killed_run(&out, 3, &[]);
    let saved = std::fs::read(journal(&out)).unwrap();

    // Other settings, then another model variant (base + adapter): exit 2, journal untouched.
    let adapter = fixture().join("adapters/qv");
    for (extra, field) in [
        (
            vec!["--max-new-tokens", "9"],
            "max_new_tokens was 24, is now 9",
        ),
        (vec!["--system", "Be brief."], "system was null"),
        (
            vec!["--adapter", adapter.to_str().unwrap()],
            "adapter_fingerprint was null",
        ),
    ] {
        let o = output(answer_cmd(set, &out, &extra));
        let err = &o.stderr;
        o.expect_code(2);
        assert!(err.contains(&journal(&out).display().to_string()), "{err}");
        assert!(err.contains(field), "{extra:?}: {err}");
        assert!(err.contains("--restart"), "{err}");
        assert!(!out.exists());
        assert_eq!(std::fs::read(journal(&out)).unwrap(), saved);
    }
    // Batch size and threads are not part of a run's identity: this continues the journal.
    let o = output(answer_cmd(set, &out, &["--batch", "3"]));
    let err = &o.stderr;
    o.expect_success();
    assert!(err.contains("continuing from"), "{err}");
    assert_eq!(&common::answers_without_ms(&out), expected);
    // --restart starts over (here over the finished file) with whatever settings are given.
    let o = output(answer_cmd(
        set,
        &out,
        &["--restart", "--max-new-tokens", "9"],
    ));
    let err = &o.stderr;
    o.expect_success();
    assert!(
        !err.contains("continuing") && !err.contains("already complete"),
        "{err}"
    );
    let nine: Vec<Value> = common::answers_without_ms(&out);
    assert_eq!(nine.len(), N);
    assert!(nine.iter().all(|r| r["new_tokens"] == 9));
    assert!(!journal(&out).exists());
}

/// The check: SIGKILL at seeded random points, several times, resuming each time.
#[test]
fn sigkill_at_random_points_then_resuming_gives_the_uninterrupted_answers() {
    let (set, expected) = reference();
    let tmp = Bin::new();
    let out = tmp.path("answers.jsonl");
    let mut rng = Rng(0x5eed_f3a7);
    let mut partial_kills = 0;
    for round in 0..6 {
        let saved = saved_rows(&journal(&out));
        let mut child = answer_cmd(set, &out, &[])
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        if round == 0 {
            // Anywhere in start-up: loading, fingerprinting, the journal's creation.
            std::thread::sleep(Duration::from_millis(rng.range(0, 150)));
        } else {
            // After a random number of further answers, plus a random few milliseconds so
            // some kills land in the middle of an answer or of a write.
            let more = rng.range(1, ((N - saved) / 4).max(1) as u64) as usize;
            if !wait_for_rows(&mut child, &journal(&out), saved + more) {
                break;
            }
            std::thread::sleep(Duration::from_micros(rng.range(0, 8000)));
        }
        child.kill().unwrap();
        child.wait().unwrap();
        if journal(&out).exists() {
            let ids = check_journal(&journal(&out));
            assert!(ids.len() >= saved, "round {round}: answers were lost");
            if !ids.is_empty() && ids.len() < N {
                partial_kills += 1;
            }
        }
        assert!(
            !out.exists(),
            "round {round}: no answers file before the end"
        );
    }
    assert!(
        partial_kills >= 3,
        "only {partial_kills} kills landed while answering"
    );
    let o = output(answer_cmd(set, &out, &[]));
    o.expect_success();
    let rows = common::answers_without_ms(&out);
    let ids: HashSet<&str> = rows.iter().map(|r| r["id"].as_str().unwrap()).collect();
    assert_eq!(ids.len(), N, "no id missing or repeated");
    assert_eq!(&rows, expected);
    assert!(!journal(&out).exists());
}

#[test]
fn ctrl_c_and_sigterm_stop_cleanly_and_say_how_to_continue() {
    let (set, expected) = reference();
    let tmp = Bin::new();
    let out = tmp.path("answers.jsonl");
    for (signal, code, rows) in [("INT", 130, 2), ("TERM", 143, 20)] {
        let mut child = answer_cmd(set, &out, &[])
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        assert!(wait_for_rows(&mut child, &journal(&out), rows));
        send(&child, signal);
        let o = child.wait_with_output().unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(code), "SIG{signal}: {err}");
        assert!(err.contains(&format!("stopped by SIG{signal}")), "{err}");
        assert!(err.contains("run the same command again"), "{err}");
        assert!(
            err.contains(&format!("--out {}", out.display())),
            "the hint repeats the command: {err}"
        );
        assert!(!out.exists());
        // A clean stop leaves only complete lines.
        let text = std::fs::read_to_string(journal(&out)).unwrap();
        assert!(text.ends_with('\n'), "{text}");
        let ids = check_journal(&journal(&out));
        assert!(ids.len() >= rows && ids.len() < N, "{} saved", ids.len());
        assert!(
            err.contains(&format!("{} of {N} answers saved", ids.len())),
            "{err}"
        );
    }
    let o = output(answer_cmd(set, &out, &[]));
    o.expect_success();
    assert_eq!(&common::answers_without_ms(&out), expected);
}

fn vet_cmd(cwd: &Path, extra: &[&str]) -> Command {
    vet_cmd_with(cwd, &fixture().join("adapters/qv"), extra)
}

fn vet_cmd_with(cwd: &Path, adapter: &Path, extra: &[&str]) -> Command {
    let f = fixture();
    let mut c = common::command(["vet"]);
    c.current_dir(cwd)
        .arg("--model")
        .arg(f.join("model"))
        .arg("--adapter")
        .arg(adapter)
        .args([
            "--questions",
            "set.jsonl",
            "--max-new-tokens",
            "24",
            "--ignore-eos",
            "--batch",
            "1",
            "--threads",
            "1",
            "--resamples",
            "1000",
        ])
        .args(extra);
    c
}

/// The only directory under `reports/`, once it exists.
fn report_dir(cwd: &Path) -> Option<PathBuf> {
    let dirs: Vec<PathBuf> = std::fs::read_dir(cwd.join("reports"))
        .ok()?
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.is_dir())
        .collect();
    assert!(dirs.len() <= 1, "{dirs:?}");
    dirs.into_iter().next()
}

#[test]
fn vet_continues_a_killed_then_stopped_run_in_its_own_directory() {
    let tmp = Bin::new();
    write_set(&tmp.path("set.jsonl"), 60);
    let reference_dir = tmp.path("uninterrupted");
    let o = output(vet_cmd(
        tmp.dir(),
        &["--report", reference_dir.to_str().unwrap()],
    ));
    o.expect_verdict();

    let work = tmp.path("work");
    std::fs::create_dir(&work).unwrap();
    write_set(&work.join("set.jsonl"), 60);
    // SIGKILL while the baseline and the candidate answer (together: one copy of the base,
    // the rows of both in the same steps).
    let mut child = vet_cmd(&work, &[]).stderr(Stdio::null()).spawn().unwrap();
    let start = Instant::now();
    let dir = loop {
        if let Some(d) = report_dir(&work) {
            break d;
        }
        assert!(start.elapsed() < Duration::from_secs(60));
        std::thread::sleep(Duration::from_millis(1));
    };
    let base_journal = dir.join("baseline.answers.jsonl.partial");
    assert!(wait_for_rows(&mut child, &base_journal, 4));
    child.kill().unwrap();
    child.wait().unwrap();
    // Ctrl-C once the continued run has saved answers of its own: the same command continues
    // in the same directory.
    let cand_journal = dir.join("candidate.answers.jsonl.partial");
    let before = saved_rows(&cand_journal);
    let mut child = vet_cmd(&work, &[]).stderr(Stdio::piped()).spawn().unwrap();
    assert!(wait_for_rows(&mut child, &cand_journal, before + 2));
    send(&child, "INT");
    let o = child.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(130), "{err}");
    assert!(err.contains("continuing the unfinished run"), "{err}");
    assert!(base_journal.is_file() || dir.join("baseline.answers.jsonl").is_file());
    assert!(!dir.join("summary.json").exists());
    // Finish.
    let o = output(vet_cmd(&work, &[]));
    let err = &o.stderr;
    o.expect_verdict();
    assert!(err.contains("continuing the unfinished run"), "{err}");
    assert_eq!(report_dir(&work), Some(dir.clone()));
    for f in ["baseline.answers.jsonl", "candidate.answers.jsonl"] {
        assert_eq!(
            common::answers_without_ms(&dir.join(f)),
            common::answers_without_ms(&reference_dir.join(f)),
            "{f}"
        );
        assert!(!dir.join(format!("{f}.partial")).exists());
    }
    assert_eq!(
        std::fs::read(dir.join("candidate.grades.jsonl")).unwrap(),
        std::fs::read(reference_dir.join("candidate.grades.jsonl")).unwrap()
    );
    assert!(dir.join("summary.json").is_file());
    // A finished directory is never continued: the next run gets a new one.
    let o = output(vet_cmd(&work, &[]));
    o.expect_verdict();
    let dirs = std::fs::read_dir(work.join("reports"))
        .unwrap()
        .flatten()
        .filter(|e| e.path().is_dir())
        .count();
    assert_eq!(dirs, 2);
}

/// An input error (a damaged adapter_config.json): a new run leaves no report directory behind;
/// a continued run keeps the answers its earlier runs saved, the baseline's and the
/// candidate's.
#[test]
fn vet_input_errors_leave_nothing_half_written_but_keep_saved_work() {
    let tmp = Bin::new();
    write_set(&tmp.path("set.jsonl"), 40);
    let broken = tmp.path("broken-adapter");
    std::fs::create_dir(&broken).unwrap();
    for e in std::fs::read_dir(fixture().join("adapters/qv"))
        .unwrap()
        .flatten()
    {
        std::fs::copy(e.path(), broken.join(e.file_name())).unwrap();
    }
    std::fs::write(broken.join("adapter_config.json"), "{\"r\": 8,").unwrap();
    let report = tmp.path("rep");
    let rep = report.to_str().unwrap();

    let o = output(vet_cmd_with(tmp.dir(), &broken, &["--report", rep]));
    let err = &o.stderr;
    o.expect_code(2);
    assert!(err.contains("adapter_config.json"), "{err}");
    assert!(!report.exists(), "a failed new run leaves no directory");

    // Killed while the candidate answers, then continued with the broken adapter: exit 2, and
    // the baseline answers and the candidate journal are still there.
    let mut child = vet_cmd(tmp.dir(), &["--report", rep])
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let cand_journal = report.join("candidate.answers.jsonl.partial");
    assert!(wait_for_rows(&mut child, &cand_journal, 2));
    child.kill().unwrap();
    child.wait().unwrap();
    let saved = std::fs::read(&cand_journal).unwrap();
    let base_saved = std::fs::read(report.join("baseline.answers.jsonl.partial")).unwrap();
    let o = output(vet_cmd_with(tmp.dir(), &broken, &["--report", rep]));
    o.expect_code(2);
    assert_eq!(
        std::fs::read(report.join("baseline.answers.jsonl.partial")).unwrap(),
        base_saved
    );
    assert_eq!(std::fs::read(&cand_journal).unwrap(), saved);
    // And with the right adapter the run completes from there.
    let o = output(vet_cmd(tmp.dir(), &["--report", rep]));
    let err = &o.stderr;
    o.expect_verdict();
    assert!(err.contains("continuing from"), "{err}");
    assert!(report.join("summary.json").is_file());
    assert!(!cand_journal.exists());
}
