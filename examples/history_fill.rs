//! Fills a history file with synthetic runs for bench/history.sh: `RUNS` runs of a
//! `QUESTIONS`-question set whose content changes every 100 runs (5 questions edited, 2
//! removed, 2 added), each weighed by the real `weigh` and recorded by the real
//! `history::record`, as `weigh` and `vet` do.
//!
//! Usage: cargo run --release --example history_fill -- FILE [RUNS] [QUESTIONS]

use liftgate::formats::grades::GradeRecord;
use liftgate::formats::questions::{Expect, QuestionSet};
use liftgate::history::{self, RecordOptions};
use liftgate::policy::Policy;
use liftgate::report::summary::{InputFile, Inputs, PolicySource};
use liftgate::weigh::{self, Settings, WeighInput};
use std::path::{Path, PathBuf};

/// A small deterministic generator (SplitMix64), enough for synthetic scores.
struct Mix(u64);

impl Mix {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    }
}

fn set_text(n: usize, revision: usize) -> String {
    let mut out = String::new();
    // Each revision drops its two lowest ids and adds two new ones, and edits five.
    let first = 2 * revision;
    for i in first..first + n {
        let edited = revision > 0 && (i * 7 + revision) % n < 5;
        let expect = if i % 10 == 9 { "refuse" } else { "answer" };
        let refs = if expect == "refuse" {
            "[]".to_string()
        } else if edited {
            format!("[\"The answer to question {i}, corrected in revision {revision}.\"]")
        } else {
            format!("[\"The answer to question {i}.\"]")
        };
        out.push_str(&format!(
            "{{\"id\": \"q{i:05}\", \"question\": \"Question number {i}?\", \"references\": {refs}, \"category\": \"c{}\", \"expect\": \"{expect}\"}}\n",
            i % 12
        ));
    }
    out
}

fn grades(set: &QuestionSet, rng: &mut Mix, quality: f64) -> Vec<GradeRecord> {
    set.questions
        .iter()
        .map(|q| {
            let answer = q.expect == Expect::Answer;
            let f1 = (rng.next() * 0.6 + quality).clamp(0.0, 1.0);
            GradeRecord {
                id: q.id.clone(),
                category: q.category.clone(),
                expect: q.expect,
                exact_match: answer.then_some((f1 > 0.9) as u8),
                token_f1: answer.then_some(f1),
                rouge_l: answer.then_some((f1 * 0.9).clamp(0.0, 1.0)),
                refused: if answer {
                    rng.next() < 0.05
                } else {
                    rng.next() < 0.8
                },
                fact_recall: None,
                fact_contradiction: None,
                semantic: None,
                answer: String::new(),
            }
        })
        .collect()
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let file = PathBuf::from(
        args.get(1)
            .expect("usage: history_fill FILE [RUNS] [QUESTIONS]"),
    );
    let runs: usize = args.get(2).map_or(1000, |s| s.parse().expect("RUNS"));
    let n: usize = args.get(3).map_or(2000, |s| s.parse().expect("QUESTIONS"));
    let policy = Policy::default();
    let settings = Settings::new(1000, 7, 0.95).expect("settings");
    let opts = RecordOptions {
        path: file.clone(),
        label: None,
        source: "weigh",
    };
    let mut rng = Mix(42);
    let start = std::time::UNIX_EPOCH + std::time::Duration::from_secs(1_767_225_600);
    let t0 = std::time::Instant::now();
    let mut set = None;
    for r in 0..runs {
        let revision = r / 100;
        if r % 100 == 0 {
            let text = set_text(n, revision);
            set = Some(
                QuestionSet::parse(Path::new("bench-set.jsonl"), text.as_bytes()).expect("set"),
            );
        }
        let set = set.as_ref().expect("set");
        let baseline = grades(set, &mut rng, 0.1);
        let candidate = grades(set, &mut rng, 0.15 + 0.0001 * r as f64);
        let file_input = |p: &str| InputFile {
            path: p.to_string(),
            sha256: String::new(),
        };
        let summary = weigh::weigh(&WeighInput {
            set,
            baseline: &baseline,
            candidate: &candidate,
            policy: &policy,
            settings,
            inputs: Inputs {
                questions: file_input("bench-set.jsonl"),
                baseline: file_input("baseline.grades.jsonl"),
                candidate: file_input("candidate.grades.jsonl"),
                policy: PolicySource {
                    path: None,
                    sha256: None,
                    source: "built-in".into(),
                },
                approximations: vec![],
            },
        })
        .expect("weigh");
        let graded = history::two(
            (&baseline, Path::new("baseline.grades.jsonl")),
            (&candidate, Path::new("candidate.grades.jsonl")),
        );
        let when = history::rfc3339(start + std::time::Duration::from_secs(3600 * r as u64));
        history::record(
            &opts,
            set,
            &graded,
            &summary,
            Path::new(&format!("bench-reports/run-{r:04}")),
            when,
        )
        .expect("record");
        if (r + 1) % 100 == 0 {
            eprintln!(
                "{} runs recorded ({:.1} s)",
                r + 1,
                t0.elapsed().as_secs_f64()
            );
        }
    }
}
