//! Sharding: one answering run split over the tasks of a cluster job array (docs/interface.md,
//! "Sharding").
//!
//! - [`Split`]: which shard answers which question. Computed from the question set and the
//!   shard count alone, so every task of an array computes the same split without talking to
//!   the others. It balances work by prompt length, not by count: questions in order of
//!   decreasing length (ties in set order), each into the shard with the least text so far
//!   (ties to the lowest index), the longest-processing-time-first rule of list scheduling
//!   (Graham, "Bounds on multiprocessing timing anomalies", 1969). A question's length is the
//!   characters of its text, the one part of the prompt that differs between questions.
//! - [`ShardSpec`]: shard K of N, K counted from 0 as Slurm array indices and Kubernetes
//!   completion indices are; given as `K/N` or read from the scheduler's environment
//!   ([`ShardSpec::from_env`]).

use crate::error::{Error, Result};
use crate::formats::questions::QuestionSet;
use crate::formats::run_record::ShardInfo;
use crate::fsutil;
use std::cmp::Reverse;
use std::collections::BinaryHeap;

/// Shard `index` of `count`, 0-based.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ShardSpec {
    pub index: usize,
    pub count: usize,
}

/// The environment variable that, set to `auto` or `K/N`, stands for `--shard`.
pub const SHARD_ENV: &str = "LIFTGATE_SHARD";
/// The shard count a Kubernetes Indexed Job passes to its pods (its `completions`), which a pod
/// does not see otherwise.
pub const COUNT_ENV: &str = "LIFTGATE_SHARD_COUNT";

impl ShardSpec {
    /// `K/N` with 0 ≤ K < N; `flag` names the source in the message.
    pub fn parse(flag: &str, text: &str) -> Result<ShardSpec> {
        let bad = || {
            Error::usage(format!(
                "{flag} {text}: expected K/N, shard K of N counted from 0 (0/4 … 3/4), or `auto`"
            ))
        };
        let (k, n) = text.trim().split_once('/').ok_or_else(bad)?;
        let index: usize = k.trim().parse().map_err(|_| bad())?;
        let count: usize = n.trim().parse().map_err(|_| bad())?;
        ShardSpec::new(flag, index, count)
    }

    fn new(source: &str, index: usize, count: usize) -> Result<ShardSpec> {
        if count == 0 {
            return Err(Error::usage(format!(
                "{source}: the shard count must be at least 1"
            )));
        }
        if index >= count {
            return Err(Error::usage(format!(
                "{source}: shard {index} does not exist: shards of {count} are numbered 0 to {}",
                count - 1
            )));
        }
        Ok(ShardSpec { index, count })
    }

    /// The shard a scheduler gave this task, read through `env` (the process environment in
    /// use, a map in tests), and a line saying where it came from. Slurm: a job array's
    /// `SLURM_ARRAY_TASK_ID` counted from `SLURM_ARRAY_TASK_MIN`, `SLURM_ARRAY_TASK_COUNT`
    /// tasks, which must be the whole range MIN..=MAX with step 1. Kubernetes:
    /// `JOB_COMPLETION_INDEX` of an Indexed Job with [`COUNT_ENV`] set by the manifest to
    /// the job's `completions`. Both at once, or neither, is an error: nothing is guessed.
    pub fn from_env(env: impl Fn(&str) -> Option<String>) -> Result<(ShardSpec, String)> {
        let num = |name: &str| -> Result<Option<usize>> {
            match env(name) {
                None => Ok(None),
                Some(v) => v.trim().parse().map(Some).map_err(|_| {
                    Error::usage(format!("{name}={v:?} is not a non-negative whole number"))
                }),
            }
        };
        let slurm = num("SLURM_ARRAY_TASK_ID")?;
        let k8s = num("JOB_COMPLETION_INDEX")?;
        match (slurm, k8s) {
            (Some(_), Some(_)) => Err(Error::usage(
                "both SLURM_ARRAY_TASK_ID and JOB_COMPLETION_INDEX are set; give --shard K/N to say which shard this is",
            )),
            (None, None) => Err(Error::usage(
                "neither SLURM_ARRAY_TASK_ID (a Slurm job array) nor JOB_COMPLETION_INDEX (a Kubernetes Indexed Job) is set; give --shard K/N",
            )),
            (Some(id), None) => {
                let missing = |name: &str| {
                    Error::usage(format!(
                        "SLURM_ARRAY_TASK_ID is set but {name} is not; give --shard K/N"
                    ))
                };
                let min = num("SLURM_ARRAY_TASK_MIN")?.ok_or_else(|| missing("SLURM_ARRAY_TASK_MIN"))?;
                let max = num("SLURM_ARRAY_TASK_MAX")?.ok_or_else(|| missing("SLURM_ARRAY_TASK_MAX"))?;
                let step = num("SLURM_ARRAY_TASK_STEP")?.unwrap_or(1);
                let span = max.checked_sub(min).map(|d| d + 1).unwrap_or(0);
                let count = num("SLURM_ARRAY_TASK_COUNT")?.unwrap_or(span);
                if step != 1 || count != span || id < min || id > max {
                    return Err(Error::usage(format!(
                        "the Slurm array is not one range of consecutive indices (SLURM_ARRAY_TASK_ID={id}, MIN={min}, MAX={max}, STEP={step}, COUNT={count}); submit it as --array=0-{} or give --shard K/N",
                        count.max(1) - 1
                    )));
                }
                let spec = ShardSpec::new("the scheduler's index", id - min, count)?;
                let from = format!(
                    "SLURM_ARRAY_TASK_ID={id} of the array {min}-{max} ({count} tasks)"
                );
                Ok((spec, from))
            }
            (None, Some(index)) => {
                let count = num(COUNT_ENV)?.ok_or_else(|| {
                    Error::usage(format!(
                        "JOB_COMPLETION_INDEX={index} is set but {COUNT_ENV} is not; the Indexed Job's pod template must set {COUNT_ENV} to the job's completions (see deploy/kubernetes/), or give --shard K/N"
                    ))
                })?;
                let spec = ShardSpec::new("the scheduler's index", index, count)?;
                let from = format!("JOB_COMPLETION_INDEX={index} with {COUNT_ENV}={count}");
                Ok((spec, from))
            }
        }
    }
}

/// The assignment of every question of a set to one of `count` shards.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Split {
    pub count: usize,
    /// The shard of each question, in the set's order.
    pub shard_of: Vec<usize>,
    /// SHA-256 over the version of the rule, the set's fingerprint, the count and the
    /// assignment: equal in every task that splits the same set the same way.
    pub fingerprint: String,
}

/// How much work a question is taken to be: the characters of its text.
fn weight(text: &str) -> usize {
    text.chars().count()
}

impl Split {
    /// Splits `set` into `count` shards (see the module doc). Every shard gets at least one
    /// question: more shards than questions is a usage error.
    pub fn of(set: &QuestionSet, count: usize) -> Result<Split> {
        if count == 0 {
            return Err(Error::usage("the shard count must be at least 1"));
        }
        if count > set.len() {
            return Err(Error::usage(format!(
                "{count} shards for the {} questions of {}: every shard needs at least one question; use at most {} shards",
                set.len(),
                set.path.display(),
                set.len()
            )));
        }
        let mut order: Vec<usize> = (0..set.len()).collect();
        order.sort_by_key(|&i| (Reverse(weight(&set.questions[i].question)), i));
        // The lightest shard on top: (load, index), smallest first.
        let mut heap: BinaryHeap<Reverse<(usize, usize)>> =
            (0..count).map(|k| Reverse((0, k))).collect();
        let mut shard_of = vec![0; set.len()];
        for i in order {
            let Some(Reverse((load, k))) = heap.pop() else {
                return Err(Error::internal("the shard heap is empty"));
            };
            shard_of[i] = k;
            heap.push(Reverse((load + weight(&set.questions[i].question), k)));
        }
        let mut text = format!(
            "liftgate split 1: longest first by characters\nset {}\nshards {count}\n",
            set.fingerprint
        );
        for k in &shard_of {
            text.push_str(&format!("{k}\n"));
        }
        Ok(Split {
            count,
            fingerprint: fsutil::sha256_hex(text.as_bytes()),
            shard_of,
        })
    }

    /// The questions of shard `index`, in the set's order, as a set of their own (same path and
    /// fingerprint: its answers are answers to that set).
    pub fn part(&self, set: &QuestionSet, index: usize) -> QuestionSet {
        QuestionSet {
            path: set.path.clone(),
            fingerprint: set.fingerprint.clone(),
            questions: set
                .questions
                .iter()
                .zip(&self.shard_of)
                .filter(|(_, &k)| k == index)
                .map(|(q, _)| q.clone())
                .collect(),
        }
    }

    /// The run-record entry of shard `index`.
    pub fn info(&self, index: usize) -> ShardInfo {
        ShardInfo {
            index,
            count: self.count,
            split: self.fingerprint.clone(),
            questions: self.shard_of.iter().filter(|&&k| k == index).count(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::HashMap;
    use std::path::Path;

    fn set(texts: &[&str]) -> QuestionSet {
        let body: String = texts
            .iter()
            .enumerate()
            .map(|(i, t)| {
                format!("{{\"id\":\"q{i}\",\"question\":{t:?},\"references\":[\"x\"]}}\n")
            })
            .collect();
        QuestionSet::parse(Path::new("set.jsonl"), body.as_bytes()).unwrap()
    }

    #[test]
    fn longest_first_into_the_lightest_shard_ties_by_order() {
        // Lengths 10, 3, 7, 3, 6, 1. Order: 10(q0) 7(q2) 6(q4) 3(q1) 3(q3) 1(q5).
        // q0→0 (10,0); q2→1 (10,7); q4→1 (10,13); q1→0 (13,13); q3→0 (16,13); q5→1 (16,14).
        let s = set(&["aaaaaaaaaa", "bbb", "ccccccc", "ddd", "eeeeee", "f"]);
        let split = Split::of(&s, 2).unwrap();
        assert_eq!(split.shard_of, vec![0, 0, 1, 0, 1, 1]);
        let part = split.part(&s, 1);
        let ids: Vec<&str> = part.questions.iter().map(|q| q.id.as_str()).collect();
        assert_eq!(ids, ["q2", "q4", "q5"]);
        assert_eq!(part.fingerprint, s.fingerprint);
        assert_eq!(split.info(0).questions, 3);
        // Characters, not bytes: "ééé" weighs 3.
        let u = set(&["ééé", "abcd"]);
        assert_eq!(Split::of(&u, 2).unwrap().shard_of, vec![1, 0]);
    }

    #[test]
    fn the_split_is_a_function_of_set_and_count() {
        let s = set(&["one", "two two", "three three three", "four", "five five"]);
        let a = Split::of(&s, 3).unwrap();
        assert_eq!(a, Split::of(&s, 3).unwrap());
        assert_ne!(a.fingerprint, Split::of(&s, 2).unwrap().fingerprint);
        let other = set(&["one", "two two", "three three three", "four", "five fiv"]);
        assert_ne!(a.fingerprint, Split::of(&other, 3).unwrap().fingerprint);
        // Every shard has a question; one shard is the whole set.
        for k in 0..3 {
            assert!(a.shard_of.contains(&k));
        }
        assert!(Split::of(&s, 1).unwrap().shard_of.iter().all(|&k| k == 0));
        assert!(Split::of(&s, 6).is_err());
        assert!(Split::of(&s, 0).is_err());
    }

    #[test]
    fn shard_spec_parses_k_of_n_from_zero() {
        assert_eq!(
            ShardSpec::parse("--shard", "2/4").unwrap(),
            ShardSpec { index: 2, count: 4 }
        );
        for bad in ["4/4", "1/0", "-1/3", "a/3", "3", ""] {
            assert!(ShardSpec::parse("--shard", bad).is_err(), "{bad}");
        }
    }

    fn env(pairs: &[(&str, &str)]) -> impl Fn(&str) -> Option<String> {
        let map: HashMap<String, String> = pairs
            .iter()
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect();
        move |k| map.get(k).cloned()
    }

    #[test]
    fn slurm_arrays_count_from_their_minimum() {
        let (spec, from) = ShardSpec::from_env(env(&[
            ("SLURM_ARRAY_TASK_ID", "3"),
            ("SLURM_ARRAY_TASK_MIN", "1"),
            ("SLURM_ARRAY_TASK_MAX", "4"),
            ("SLURM_ARRAY_TASK_COUNT", "4"),
        ]))
        .unwrap();
        assert_eq!(spec, ShardSpec { index: 2, count: 4 });
        assert!(from.contains("SLURM_ARRAY_TASK_ID=3"), "{from}");
        // A gapped or stepped array has no consecutive numbering: refused.
        for extra in [
            ("SLURM_ARRAY_TASK_COUNT", "3"),
            ("SLURM_ARRAY_TASK_STEP", "2"),
        ] {
            let mut pairs = vec![
                ("SLURM_ARRAY_TASK_ID", "0"),
                ("SLURM_ARRAY_TASK_MIN", "0"),
                ("SLURM_ARRAY_TASK_MAX", "3"),
            ];
            pairs.push(extra);
            let err = ShardSpec::from_env(env(&pairs)).unwrap_err().to_string();
            assert!(err.contains("consecutive"), "{err}");
        }
        let err = ShardSpec::from_env(env(&[("SLURM_ARRAY_TASK_ID", "0")]))
            .unwrap_err()
            .to_string();
        assert!(err.contains("SLURM_ARRAY_TASK_MIN"), "{err}");
    }

    #[test]
    fn kubernetes_needs_the_count_from_the_manifest() {
        let (spec, _) =
            ShardSpec::from_env(env(&[("JOB_COMPLETION_INDEX", "0"), (COUNT_ENV, "3")])).unwrap();
        assert_eq!(spec, ShardSpec { index: 0, count: 3 });
        let err = ShardSpec::from_env(env(&[("JOB_COMPLETION_INDEX", "0")]))
            .unwrap_err()
            .to_string();
        assert!(err.contains(COUNT_ENV), "{err}");
        let err = ShardSpec::from_env(env(&[("JOB_COMPLETION_INDEX", "3"), (COUNT_ENV, "3")]))
            .unwrap_err()
            .to_string();
        assert!(err.contains("numbered 0 to 2"), "{err}");
        assert!(ShardSpec::from_env(env(&[])).is_err());
        let both = env(&[
            ("JOB_COMPLETION_INDEX", "0"),
            (COUNT_ENV, "3"),
            ("SLURM_ARRAY_TASK_ID", "0"),
        ]);
        assert!(ShardSpec::from_env(both)
            .unwrap_err()
            .to_string()
            .contains("both"));
    }
}
