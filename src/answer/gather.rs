//! Gathering: the answers files of every shard of one variant's run (`answer --shard K/N`)
//! joined into the answers file and run record a whole run writes (docs/interface.md,
//! "Sharding").
//!
//! The shards must belong together: each has a run record with a shard entry, all of them the
//! same [`RunIdentity`] apart from the shard, the same count and split; the split is computed
//! again from the question set and must be the recorded one; every shard 0..N-1 is given once,
//! and each file holds exactly its shard's questions in the set's order. Anything else is an
//! input error naming the files (exit 2) and nothing is written.

use super::run::{write_outputs, AnswerRun};
use super::Split;
use crate::error::{Error, Result};
use crate::formats::answers;
use crate::formats::journal::{self, RunIdentity};
use crate::formats::questions::QuestionSet;
use crate::formats::run_record::{self, RunInfo, ShardInfo};
use crate::fsutil;
use std::path::{Path, PathBuf};

/// One shard's output as read from disk.
struct ShardFile {
    path: PathBuf,
    info: RunInfo,
    shard: ShardInfo,
}

/// Reads a shard's run record; a missing, unreadable or unsharded one is an error naming it.
fn read_shard(path: &Path) -> Result<ShardFile> {
    let record = run_record::path_beside(path);
    if !path.is_file() {
        let partial = journal::journal_path(path);
        let why = if partial.exists() {
            format!(
                "no such file, but {} is there: this shard's run has not finished; run its task again to complete it",
                partial.display()
            )
        } else {
            "no such shard answers file".to_string()
        };
        return Err(Error::file(path, why));
    }
    let value = run_record::read(path)?.ok_or_else(|| {
        Error::file(
            &record,
            "missing: gather needs the run record `answer --shard` writes beside each shard's answers",
        )
    })?;
    let info: RunInfo = serde_json::from_value(value).map_err(|e| {
        Error::file(
            &record,
            format!("not a run record written by `liftgate answer`: {e}"),
        )
    })?;
    let shard = info.shard.clone().ok_or_else(|| {
        Error::field(
            &record,
            None,
            "shard",
            "missing: these answers were not made with --shard (a whole run needs no gathering)",
        )
    })?;
    Ok(ShardFile {
        path: path.to_path_buf(),
        info,
        shard,
    })
}

/// The identity of a shard's run without its shard entry: equal for every shard of one run.
fn run_identity(info: &RunInfo) -> RunIdentity {
    RunIdentity {
        shard: None,
        ..RunIdentity::of(info)
    }
}

/// Joins the shard answers files `shards` of one run on `set` into `out` and
/// `<out>.run.json`, as a whole run writes them: the rows in the set's order, the record of
/// shard 0 without its shard entry.
pub fn gather(set: &QuestionSet, shards: &[PathBuf], out: &Path) -> Result<AnswerRun> {
    let mut files = Vec::with_capacity(shards.len());
    for path in shards {
        if fsutil::same_file(path, out) {
            return Err(Error::usage(format!(
                "--out {} is one of the shard files; choose another path so no input is overwritten",
                out.display()
            )));
        }
        files.push(read_shard(path)?);
    }
    let Some(first) = files.first() else {
        return Err(Error::usage("gather needs the shard answers files"));
    };
    let count = first.shard.count;
    let identity = run_identity(&first.info);
    for f in &files {
        let record = run_record::path_beside(&f.path);
        run_record::check_set_fingerprint(&f.path, set)?;
        let diffs = identity.differences(&run_identity(&f.info));
        if let Some((field, _, _)) = diffs.first() {
            let list: Vec<String> = diffs
                .iter()
                .map(|(field, was, is)| {
                    format!("{field} is {is} here but {was} in {}", first.path.display())
                })
                .collect();
            return Err(Error::field(
                &record,
                None,
                format!("identity.{field}"),
                format!(
                    "this shard comes from a different run than {} ({}); gather the shards of one run",
                    first.path.display(),
                    list.join("; ")
                ),
            ));
        }
        if f.shard.index >= f.shard.count {
            return Err(Error::field(
                &record,
                None,
                "shard.index",
                format!(
                    "shard {} of {} does not exist: shards are numbered from 0 to {}",
                    f.shard.index,
                    f.shard.count,
                    f.shard.count.saturating_sub(1)
                ),
            ));
        }
        if f.shard.count != count || f.shard.split != first.shard.split {
            return Err(Error::field(
                &record,
                None,
                "shard",
                format!(
                    "shard {} of {} (split {}…) does not belong with {}, shard {} of {} (split {}…): the shards of one run share count and split",
                    f.shard.index,
                    f.shard.count,
                    short(&f.shard.split),
                    first.path.display(),
                    first.shard.index,
                    count,
                    short(&first.shard.split)
                ),
            ));
        }
    }
    let split = Split::of(set, count)?;
    if split.fingerprint != first.shard.split {
        return Err(Error::field(
            run_record::path_beside(&first.path),
            None,
            "shard.split",
            format!(
                "the recorded split ({}…) is not the split of {} into {count} shards ({}…): the shards were made by a liftgate that splits differently",
                short(&first.shard.split),
                set.path.display(),
                short(&split.fingerprint)
            ),
        ));
    }
    // Every shard once.
    let mut by_index: Vec<Option<&ShardFile>> = vec![None; count];
    for f in &files {
        if let Some(other) = by_index[f.shard.index].replace(f) {
            return Err(Error::file(
                &f.path,
                format!(
                    "shard {} of {count} is given twice: here and as {}; give each shard's answers once",
                    f.shard.index,
                    other.path.display()
                ),
            ));
        }
    }
    let missing: Vec<String> = (0..count)
        .filter(|&k| by_index[k].is_none())
        .map(|k| k.to_string())
        .collect();
    if !missing.is_empty() {
        let given: Vec<String> = files
            .iter()
            .map(|f| format!("{} (shard {})", f.path.display(), f.shard.index))
            .collect();
        let (s, are) = if missing.len() > 1 {
            ("s", "are")
        } else {
            ("", "is")
        };
        return Err(Error::usage(format!(
            "shard{s} {} of {count} {are} missing (shards are numbered from 0 to {}): the shards given are {}; add the answers of every task of the array",
            missing.join(", "),
            count - 1,
            given.join(", ")
        )));
    }
    // Each file holds exactly its questions, in the set's order.
    let mut rows = Vec::with_capacity(count);
    for (k, f) in by_index.iter().enumerate() {
        let f = f.ok_or_else(|| Error::internal("a shard went missing"))?;
        let part = split.part(set, k);
        rows.push(answers::load_rows(&f.path, &part)?.into_iter());
    }
    let mut records = Vec::with_capacity(set.len());
    for (q, &k) in set.questions.iter().zip(&split.shard_of) {
        let row = rows[k]
            .next()
            .ok_or_else(|| Error::internal(format!("question {:?} has no row", q.id)))?;
        records.push(row);
    }
    let lead = by_index[0].ok_or_else(|| Error::internal("shard 0 went missing"))?;
    let info = RunInfo {
        shard: None,
        ..lead.info.clone()
    };
    let run = AnswerRun { records, info };
    write_outputs(out, &run)?;
    Ok(run)
}

fn short(s: &str) -> String {
    s.chars().take(12).collect()
}
