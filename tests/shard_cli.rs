//! Sharded answering and gathering (docs/interface.md, "Sharding"): the real binary on the tiny
//! reference llama model (tests/fixtures/runner/llama). A set answered in shards, each shard its
//! own `answer --shard K/N` run, then `gather`ed, gives the answers file of a whole run byte for
//! byte apart from the `ms` timings, and the same run record; grading the gathered answers gives
//! the whole run's grades. The shard is read from a Slurm array's and a Kubernetes Indexed Job's
//! environment variables as the schedulers set them. Broken gathers (a shard missing, given
//! twice, from another run) are in tests/bad_inputs.rs.

mod common;

use common::{Bin, Run};
use serde_json::Value;
use std::path::PathBuf;

/// Scheduler variables that must not leak in from the environment the tests run in.
const SCHEDULER_VARS: [&str; 8] = [
    "LIFTGATE_SHARD",
    "LIFTGATE_SHARD_COUNT",
    "SLURM_ARRAY_TASK_ID",
    "SLURM_ARRAY_TASK_MIN",
    "SLURM_ARRAY_TASK_MAX",
    "SLURM_ARRAY_TASK_COUNT",
    "SLURM_ARRAY_TASK_STEP",
    "JOB_COMPLETION_INDEX",
];

/// Ten ferry questions of different lengths (the split balances characters, not counts).
const QUESTIONS: [&str; 10] = [
    "When does the first boat leave Gull Point?",
    "Can I bring my dog?",
    "Is there a late crossing from Tern Isle on Fridays in the summer timetable, and does it call at Saltmarsh?",
    "How much is a return ticket?",
    "Do bicycles travel free?",
    "Where do I buy a season pass for the cooperative's boats, and can members of the cooperative pay less?",
    "Is the café open?",
    "What happens to my booking when a sailing is cancelled for the wind?",
    "Can a car go on the small boat?",
    "Who runs the ferries?",
];

fn model() -> PathBuf {
    common::fixture("runner/llama/model")
}

fn with_set() -> Bin {
    let t = Bin::new();
    let text: String = QUESTIONS
        .iter()
        .enumerate()
        .map(|(i, q)| {
            serde_json::json!({"id": format!("q{i}"), "question": q, "references": ["At 06:50."]})
                .to_string()
                + "\n"
        })
        .collect();
    t.write("set.jsonl", text);
    t
}

/// Runs `args` with `env` set and the scheduler variables otherwise cleared.
fn scheduled(t: &Bin, args: Vec<&str>, env: &[(&str, &str)]) -> Run {
    let mut c = t.command(args);
    for v in SCHEDULER_VARS {
        c.env_remove(v);
    }
    for (k, v) in env {
        c.env(k, v);
    }
    Run::of(c)
}

/// `answer` into `out` with `extra` arguments and `env` set, scheduler variables otherwise
/// cleared.
fn answer(t: &Bin, out: &str, extra: &[&str], env: &[(&str, &str)]) -> Run {
    let m = model();
    let mut args = vec![
        "answer",
        "--model",
        m.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--out",
        out,
        "--max-new-tokens",
        "8",
        "--threads",
        "1",
    ];
    args.extend_from_slice(extra);
    scheduled(t, args, env)
}

/// An answers file with every `"ms":N` field cut out, otherwise byte for byte.
fn without_ms(bytes: &[u8]) -> String {
    let text = String::from_utf8(bytes.to_vec()).unwrap();
    let mut out = String::new();
    for line in text.lines() {
        let at = line.find(",\"ms\":").expect("an ms field");
        let end = line[at + 6..]
            .find(|c: char| !c.is_ascii_digit())
            .map(|n| at + 6 + n)
            .unwrap();
        out.push_str(&line[..at]);
        out.push_str(&line[end..]);
        out.push('\n');
    }
    out
}

fn record(t: &Bin, name: &str) -> Value {
    serde_json::from_str(&t.read(&format!("{name}.run.json"))).unwrap()
}

#[test]
fn sharded_answers_gathered_equal_a_whole_run() {
    let t = with_set();
    answer(&t, "whole.jsonl", &[], &[]).expect_success();
    let mut shard_files = Vec::new();
    let mut split = None;
    let mut answered = 0;
    for k in 0..3 {
        let out = format!("shards/part-{k}.jsonl");
        let run = answer(&t, &out, &["--shard", &format!("{k}/3")], &[]);
        run.expect_success()
            .expect_no_stdout()
            .expect_stderr(&[&format!("answering shard {k} of 3"), "taken from --shard"]);
        let shard = record(&t, &out)["shard"].clone();
        assert_eq!(shard["index"], k);
        assert_eq!(shard["count"], 3);
        let n = shard["questions"].as_u64().unwrap() as usize;
        assert_eq!(t.read(&out).lines().count(), n);
        answered += n;
        // Every task computes the same split.
        assert_eq!(*split.get_or_insert(shard["split"].clone()), shard["split"]);
        shard_files.push(out);
    }
    assert_eq!(answered, QUESTIONS.len());

    // The shards in any order.
    let mut args = vec![
        "gather",
        "--questions",
        "set.jsonl",
        "--out",
        "gathered.jsonl",
    ];
    args.extend(shard_files.iter().rev().map(String::as_str));
    t.run(args)
        .expect_success()
        .expect_no_stdout()
        .expect_stderr(&["gathered 3 shards, 10 answers"]);
    assert_eq!(
        without_ms(&t.read_bytes("gathered.jsonl")),
        without_ms(&t.read_bytes("whole.jsonl"))
    );
    assert_eq!(
        t.read("gathered.jsonl.run.json"),
        t.read("whole.jsonl.run.json"),
        "the gathered run record is the whole run's"
    );

    // Grading continues from the gathered answers as from a whole run.
    for name in ["whole", "gathered"] {
        t.run([
            "grade",
            "--questions",
            "set.jsonl",
            "--answers",
            &format!("{name}.jsonl"),
            "--out",
            &format!("{name}.grades.jsonl"),
        ])
        .expect_success();
    }
    assert_eq!(
        t.read("gathered.grades.jsonl"),
        t.read("whole.grades.jsonl")
    );

    // A finished shard is kept by the same command, like a whole run.
    let again = answer(&t, &shard_files[1], &["--shard", "1/3"], &[]);
    again
        .expect_success()
        .expect_stderr(&["already complete", "kept as it is"]);
}

#[test]
fn slurm_array_variables_give_the_shard() {
    let t = with_set();
    answer(&t, "explicit.jsonl", &["--shard", "1/3"], &[]).expect_success();
    // `sbatch --array=1-3`: task 2 is the second shard, index 1.
    let run = answer(
        &t,
        "auto.jsonl",
        &["--shard", "auto"],
        &[
            ("SLURM_ARRAY_TASK_ID", "2"),
            ("SLURM_ARRAY_TASK_MIN", "1"),
            ("SLURM_ARRAY_TASK_MAX", "3"),
            ("SLURM_ARRAY_TASK_COUNT", "3"),
            ("SLURM_ARRAY_TASK_STEP", "1"),
        ],
    );
    run.expect_success().expect_stderr(&[
        "answering shard 1 of 3",
        "SLURM_ARRAY_TASK_ID=2 of the array 1-3 (3 tasks), as --shard auto asks",
    ]);
    assert_eq!(
        record(&t, "auto.jsonl")["shard"],
        record(&t, "explicit.jsonl")["shard"]
    );
    assert_eq!(
        without_ms(&t.read_bytes("auto.jsonl")),
        without_ms(&t.read_bytes("explicit.jsonl"))
    );
    // A gapped array (`--array=0,2,5`) has no shard numbering: exit 2, nothing written.
    answer(
        &t,
        "gapped.jsonl",
        &["--shard", "auto"],
        &[
            ("SLURM_ARRAY_TASK_ID", "2"),
            ("SLURM_ARRAY_TASK_MIN", "0"),
            ("SLURM_ARRAY_TASK_MAX", "5"),
            ("SLURM_ARRAY_TASK_COUNT", "3"),
        ],
    )
    .expect_code(2)
    .expect_stderr(&["not one range of consecutive indices"]);
    assert!(!t.path("gapped.jsonl").exists() && !t.path("gapped.jsonl.partial").exists());
}

#[test]
fn kubernetes_indexed_job_variables_give_the_shard() {
    let t = with_set();
    answer(&t, "explicit.jsonl", &["--shard", "2/3"], &[]).expect_success();
    // The manifest sets LIFTGATE_SHARD=auto and LIFTGATE_SHARD_COUNT to the completions; the
    // Job controller sets JOB_COMPLETION_INDEX.
    let run = answer(
        &t,
        "auto.jsonl",
        &[],
        &[
            ("LIFTGATE_SHARD", "auto"),
            ("LIFTGATE_SHARD_COUNT", "3"),
            ("JOB_COMPLETION_INDEX", "2"),
        ],
    );
    run.expect_success().expect_stderr(&[
        "answering shard 2 of 3",
        "JOB_COMPLETION_INDEX=2 with LIFTGATE_SHARD_COUNT=3, as LIFTGATE_SHARD=auto asks",
    ]);
    assert_eq!(
        without_ms(&t.read_bytes("auto.jsonl")),
        without_ms(&t.read_bytes("explicit.jsonl"))
    );
    // Without the count the pod cannot know N: exit 2 naming the variable to set.
    answer(
        &t,
        "nocount.jsonl",
        &[],
        &[("LIFTGATE_SHARD", "auto"), ("JOB_COMPLETION_INDEX", "0")],
    )
    .expect_code(2)
    .expect_stderr(&["LIFTGATE_SHARD=auto: ", "LIFTGATE_SHARD_COUNT is not"]);
    // No variable, no flag: the whole set, no shard entry.
    answer(&t, "whole.jsonl", &[], &[("JOB_COMPLETION_INDEX", "0")]).expect_success();
    assert!(record(&t, "whole.jsonl").get("shard").is_none());
    assert_eq!(t.read("whole.jsonl").lines().count(), QUESTIONS.len());
}

/// `vet --shard K/N --report DIR` with every variant, then `vet --report DIR`: the gathered
/// answers and the report equal a whole `vet` run's.
#[test]
fn vet_in_shards_then_gathered_equals_a_whole_vet() {
    let t = with_set();
    let m = model();
    let adapter = common::fixture("runner/llama/adapters/all");
    let spec = format!("name=merged,adapter={},merge=f32", adapter.display());
    let vet = |report: &str, extra: &[&str], env: &[(&str, &str)]| {
        let mut args = vec![
            "vet",
            "--model",
            m.to_str().unwrap(),
            "--adapter",
            adapter.to_str().unwrap(),
            "--candidate",
            &spec,
            "--questions",
            "set.jsonl",
            "--report",
            report,
            "--max-new-tokens",
            "8",
            "--threads",
            "1",
            "--no-history",
        ];
        args.extend_from_slice(extra);
        scheduled(&t, args, env)
    };
    let whole = vet("whole", &[], &[]);
    for k in 0..3 {
        let (flag, env): (Vec<&str>, Vec<(&str, &str)>) = if k == 2 {
            // The last task as a Slurm array would start it.
            (
                vec!["--shard", "auto"],
                vec![
                    ("SLURM_ARRAY_TASK_ID", "12"),
                    ("SLURM_ARRAY_TASK_MIN", "10"),
                    ("SLURM_ARRAY_TASK_MAX", "12"),
                    ("SLURM_ARRAY_TASK_COUNT", "3"),
                    ("SLURM_ARRAY_TASK_STEP", "1"),
                ],
            )
        } else {
            (vec!["--shard", if k == 0 { "0/3" } else { "1/3" }], vec![])
        };
        vet("array", &flag, &env)
            .expect_success()
            .expect_no_stdout()
            .expect_stderr(&[&format!("answering shard {k} of 3")]);
        for name in ["baseline", "candidate", "merged"] {
            assert!(t
                .path(&format!("array/shards/{name}.{k}-of-3.answers.jsonl"))
                .is_file());
        }
        assert!(!t.path("array/summary.json").exists());
    }
    let gathered = vet("array", &[], &[]);
    gathered.expect_stderr(&["gathering 3 shard answers files of merged", "kept as it is"]);
    assert_eq!(gathered.expect_verdict(), whole.expect_verdict());
    assert_eq!(
        gathered.stdout.replace("array", "DIR"),
        whole.stdout.replace("whole", "DIR")
    );
    for name in ["baseline", "candidate", "merged"] {
        let answers = format!("{name}.answers.jsonl");
        assert_eq!(
            without_ms(&t.read_bytes(&format!("array/{answers}"))),
            without_ms(&t.read_bytes(&format!("whole/{answers}")))
        );
        assert_eq!(
            t.read(&format!("array/{answers}.run.json")),
            t.read(&format!("whole/{answers}.run.json"))
        );
    }
    let lineup = |dir: &str| t.read(&format!("{dir}/lineup.json")).replace(dir, "DIR");
    assert_eq!(lineup("array"), lineup("whole"));
    assert_eq!(
        t.read("array/candidate/summary.json")
            .replace("array", "DIR"),
        t.read("whole/candidate/summary.json")
            .replace("whole", "DIR")
    );
}

/// The gathering `vet` refuses shards answered with other settings rather than answering the
/// whole set again on one machine, and a task without `--report` is refused.
#[test]
fn vet_gathering_refuses_shards_of_other_settings() {
    let t = with_set();
    let m = model();
    let adapter = common::fixture("runner/llama/adapters/all");
    let vet = |extra: &[&str]| {
        let mut args = vec![
            "vet",
            "--model",
            m.to_str().unwrap(),
            "--adapter",
            adapter.to_str().unwrap(),
            "--questions",
            "set.jsonl",
            "--threads",
            "1",
            "--no-history",
        ];
        args.extend_from_slice(extra);
        scheduled(&t, args, &[])
    };
    for k in ["0/2", "1/2"] {
        vet(&["--shard", k, "--report", "r", "--max-new-tokens", "8"]).expect_success();
    }
    let run = vet(&["--report", "r", "--max-new-tokens", "6"]);
    run.expect_code(2).expect_stderr(&[
        "r/baseline.answers.jsonl.run.json",
        "max_new_tokens was 8, is now 6",
        "same model, adapters, question set and settings as the shard tasks",
    ]);
    assert!(!t.path("r/summary.json").exists());
    assert!(t.path("r/shards/candidate.1-of-2.answers.jsonl").is_file());

    let args = vec![
        "vet",
        "--model",
        m.to_str().unwrap(),
        "--adapter",
        adapter.to_str().unwrap(),
        "--questions",
        "set.jsonl",
        "--no-history",
    ];
    scheduled(&t, args, &[("LIFTGATE_SHARD", "0/2")])
        .expect_code(2)
        .expect_stderr(&["LIFTGATE_SHARD=0/2", "give --report DIR"]);
}
