//! Report directories of `vet`: claiming one, locking it while a run writes into it, and
//! finding the unfinished one a stopped run left, so the same command continues it.
//!
//! The default directory is `reports/<YYYY-MM-DD>-<set name>`, with `-2`, `-3`, ... added when
//! it exists; it is claimed before any work so runs never overwrite each other. A directory in
//! use is locked (flock), so a second `vet` started meanwhile never continues it.

use crate::answer::Generation;
use crate::error::{Error, Result};
use crate::formats::journal::{self, RunIdentity};
use crate::formats::questions::QuestionSet;
use crate::formats::run_record;
use crate::fsutil;
use std::path::{Path, PathBuf};

/// File names inside a report directory: `<variant name>` plus one of these.
const ANSWERS_SUFFIX: &str = ".answers.jsonl";
const GRADES_SUFFIX: &str = ".grades.jsonl";

/// The answers file of the variant `name`, e.g. `baseline.answers.jsonl`.
pub fn answers_file(name: &str) -> String {
    format!("{name}{ANSWERS_SUFFIX}")
}

/// The grades file of the variant `name`, e.g. `candidate.grades.jsonl`.
pub fn grades_file(name: &str) -> String {
    format!("{name}{GRADES_SUFFIX}")
}

/// The subdirectory of a report directory that the tasks of a job array (`vet --shard`) write
/// their answers into.
pub const SHARDS_DIR: &str = "shards";

/// The answers file of shard `index` of `count` of the variant `name`, e.g.
/// `baseline.2-of-4.answers.jsonl`.
pub fn shard_answers_file(name: &str, index: usize, count: usize) -> String {
    format!("{name}.{index}-of-{count}{ANSWERS_SUFFIX}")
}

/// The shard answers files of the variant `name` under `dir`/shards (finished ones: a shard
/// still answering has only its `.partial` journal, which `gather` then names as missing or
/// unfinished). Sorted by shard number.
pub fn shard_files(dir: &Path, name: &str) -> Vec<PathBuf> {
    let shards = dir.join(SHARDS_DIR);
    let mut found: Vec<(usize, PathBuf)> = Vec::new();
    for entry in std::fs::read_dir(&shards).into_iter().flatten().flatten() {
        let file = entry.file_name().to_string_lossy().into_owned();
        let middle = file
            .strip_prefix(name)
            .and_then(|f| f.strip_prefix('.'))
            .and_then(|f| f.strip_suffix(ANSWERS_SUFFIX));
        let index = middle.and_then(|m| {
            let (k, n) = m.split_once("-of-")?;
            let digits = |t: &str| !t.is_empty() && t.bytes().all(|b| b.is_ascii_digit());
            (digits(k) && digits(n)).then(|| k.parse::<usize>().ok())?
        });
        if let Some(k) = index {
            found.push((k, shards.join(&file)));
        }
    }
    found.sort();
    found.into_iter().map(|(_, p)| p).collect()
}

/// Any shard answers, finished or not, under `dir`/shards.
pub fn has_shards(dir: &Path) -> bool {
    std::fs::read_dir(dir.join(SHARDS_DIR))
        .into_iter()
        .flatten()
        .flatten()
        .next()
        .is_some()
}

/// The files of `dir` with the name each stands for: `<x>.partial` and `<x>.run.json` stand
/// for `<x>` (a journal and a record of the file they go with).
fn entries(dir: &Path) -> Vec<(String, String)> {
    let mut out = Vec::new();
    for entry in std::fs::read_dir(dir).into_iter().flatten().flatten() {
        let file = entry.file_name().to_string_lossy().into_owned();
        let stem = file
            .strip_suffix(".partial")
            .or_else(|| file.strip_suffix(".run.json"))
            .unwrap_or(&file)
            .to_string();
        out.push((file, stem));
    }
    out
}

/// The answers files (finished or journaled) in `dir`, by their `<name>.answers.jsonl` path.
fn answers_in(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for (_, stem) in entries(dir) {
        if stem.ends_with(ANSWERS_SUFFIX) {
            let p = dir.join(stem);
            if !out.contains(&p) {
                out.push(p);
            }
        }
    }
    out.sort();
    out
}

/// A report directory this run writes into, locked for as long as the value lives.
pub struct Claim {
    pub dir: PathBuf,
    /// This run created the directory.
    created: bool,
    /// The directory held no saved work of an earlier run.
    pub fresh: bool,
    _lock: Option<std::fs::File>,
}

impl Claim {
    /// Locks `dir`; None when another run holds it.
    fn lock(dir: &Path, created: bool) -> Result<Option<Claim>> {
        // A directory opens as a file (and takes an flock) on unix only.
        #[cfg(unix)]
        let lock = {
            let file = std::fs::File::open(dir)
                .map_err(|e| Error::file(dir, format!("cannot open the report directory: {e}")))?;
            if !fsutil::try_lock(&file)
                .map_err(|e| Error::file(dir, format!("cannot lock the report directory: {e}")))?
            {
                return Ok(None);
            }
            Some(file)
        };
        #[cfg(not(unix))]
        let lock = None;
        Ok(Some(Claim {
            dir: dir.to_path_buf(),
            created,
            fresh: created || !has_saved_work(dir),
            _lock: lock,
        }))
    }

    /// After a failure of a new run: nothing half-written is left (the directory if this run
    /// made it, else the files it wrote). Earlier runs' saved work is never removed.
    pub fn discard_if_fresh(&self) {
        if !self.fresh {
            return;
        }
        if self.created {
            let _ = std::fs::remove_dir_all(&self.dir);
            return;
        }
        for name in stage_files(&self.dir) {
            let _ = std::fs::remove_file(self.dir.join(name));
        }
    }
}

/// Every file a run writes into its report directory before the report itself: answers,
/// their journals and records, grades and their records.
fn stage_files(dir: &Path) -> Vec<String> {
    entries(dir)
        .into_iter()
        .filter(|(_, stem)| stem.ends_with(ANSWERS_SUFFIX) || stem.ends_with(GRADES_SUFFIX))
        .map(|(file, _)| file)
        .collect()
}

/// Whether `dir` holds answers (finished or journaled) of an earlier run, or of the tasks of a
/// job array.
fn has_saved_work(dir: &Path) -> bool {
    has_shards(dir)
        || answers_in(dir)
            .iter()
            .any(|out| journal::journal_path(out).exists() || run_record::path_beside(out).exists())
}

/// The identities of the answers saved in a report directory (journals and finished files).
fn saved_identities(dir: &Path) -> Vec<RunIdentity> {
    let mut ids = Vec::new();
    for out in answers_in(dir) {
        if let Some(id) = journal::read_identity(&journal::journal_path(&out)) {
            ids.push(id);
        } else if let Some(info) = run_record::read_answers_record(&out) {
            ids.push(RunIdentity::of(&info));
        }
    }
    ids
}

/// The newest unlocked, unfinished `<date>-<name>[-N]` directory under `parent` whose saved
/// answers were made for this question set and these generation settings. Model and adapter
/// are checked later, against the full identity, when the answers are continued.
pub fn find_unfinished(
    parent: &Path,
    name: &str,
    set: &QuestionSet,
    generation: &Generation,
) -> Option<Claim> {
    let mut found: Vec<(std::time::SystemTime, PathBuf)> = Vec::new();
    for entry in std::fs::read_dir(parent).ok()?.flatten() {
        let path = entry.path();
        let file_name = entry.file_name().to_string_lossy().into_owned();
        if !is_dated_dir_name(&file_name, name)
            || !path.is_dir()
            || path.join("summary.json").exists()
            || path.join("report.md").exists()
        {
            continue;
        }
        let ids = saved_identities(&path);
        let same = |id: &RunIdentity| {
            id.questions_fingerprint == set.fingerprint
                && id.max_new_tokens == generation.max_new_tokens
                && id.ignore_eos == generation.ignore_eos
                && id.system == generation.system
        };
        if ids.is_empty() || !ids.iter().all(same) {
            continue;
        }
        let modified = entry
            .metadata()
            .and_then(|m| m.modified())
            .unwrap_or(std::time::UNIX_EPOCH);
        found.push((modified, path));
    }
    found.sort();
    found
        .into_iter()
        .rev()
        .find_map(|(_, dir)| Claim::lock(&dir, false).ok().flatten())
}

/// `YYYY-MM-DD-<name>` or `YYYY-MM-DD-<name>-<N>`, as [`claim_dated_dir`] makes them.
fn is_dated_dir_name(dir_name: &str, name: &str) -> bool {
    let bytes = dir_name.as_bytes();
    let dated = bytes.len() > 11
        && bytes[..10].iter().enumerate().all(|(i, b)| {
            if i == 4 || i == 7 {
                *b == b'-'
            } else {
                b.is_ascii_digit()
            }
        })
        && bytes[10] == b'-';
    if !dated {
        return false;
    }
    let rest = &dir_name[11..];
    rest == name
        || rest
            .strip_prefix(name)
            .and_then(|r| r.strip_prefix('-'))
            .is_some_and(|n| !n.is_empty() && n.bytes().all(|b| b.is_ascii_digit()))
}

/// The question set's file name without extension, for the report directory name.
pub fn set_name(questions: &Path) -> String {
    let stem = questions
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let clean: String = stem
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '-'
            }
        })
        .collect();
    if clean.is_empty() {
        "set".into()
    } else {
        clean
    }
}

/// A `--report DIR` given by the user: created if absent; refused when it already holds a report
/// (runs never overwrite each other) or another run is writing into it.
pub fn claim_given_dir(dir: &Path) -> Result<Claim> {
    if dir.join("summary.json").exists() || dir.join("report.md").exists() {
        return Err(Error::usage(format!(
            "--report {}: already holds a report; choose a new directory",
            dir.display()
        )));
    }
    let created = !dir.exists();
    std::fs::create_dir_all(dir)
        .map_err(|e| Error::file(dir, format!("cannot create the report directory: {e}")))?;
    Claim::lock(dir, created)?.ok_or_else(|| {
        Error::usage(format!(
            "--report {}: another liftgate vet is writing into it",
            dir.display()
        ))
    })
}

/// Creates `parent/<date>-<name>`, or `-2`, `-3`, ... when taken; `create_dir` is atomic, so two
/// runs started together still get different directories.
pub fn claim_dated_dir(parent: &Path, name: &str) -> Result<Claim> {
    std::fs::create_dir_all(parent)
        .map_err(|e| Error::file(parent, format!("cannot create the reports directory: {e}")))?;
    let base = format!("{}-{name}", utc_date_today());
    for n in 1..10_000 {
        let candidate = if n == 1 {
            parent.join(&base)
        } else {
            parent.join(format!("{base}-{n}"))
        };
        match std::fs::create_dir(&candidate) {
            Ok(()) => {
                return Claim::lock(&candidate, true)?.ok_or_else(|| {
                    Error::internal(format!("{} was locked as it was made", candidate.display()))
                })
            }
            Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => continue,
            Err(e) => {
                return Err(Error::file(
                    &candidate,
                    format!("cannot create the report directory: {e}"),
                ))
            }
        }
    }
    Err(Error::file(
        parent,
        "too many report directories for today; clean up old ones",
    ))
}

/// Today's date in UTC as YYYY-MM-DD.
fn utc_date_today() -> String {
    let secs = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs())
        .unwrap_or(0);
    let (y, m, d) = civil_from_days((secs / 86_400) as i64);
    format!("{y:04}-{m:02}-{d:02}")
}

/// Days since 1970-01-01 to a proleptic Gregorian (year, month, day): H. Hinnant's
/// `civil_from_days` algorithm ("chrono-Compatible Low-Level Date Algorithms").
pub fn civil_from_days(z: i64) -> (i64, u32, u32) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let y = yoe + era * 400;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    (if m <= 2 { y + 1 } else { y }, m, d)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn civil_dates_match_known_days() {
        // Unix epoch, a leap day and a far date (values checked with GNU `date -u -d @N`).
        assert_eq!(civil_from_days(0), (1970, 1, 1));
        assert_eq!(civil_from_days(11_016), (2000, 2, 29));
        assert_eq!(civil_from_days(20_789), (2026, 12, 2));
    }

    #[test]
    fn dated_dirs_never_collide() {
        let tmp = tempfile::tempdir().unwrap();
        let a = claim_dated_dir(tmp.path(), "set").unwrap();
        let b = claim_dated_dir(tmp.path(), "set").unwrap();
        assert_ne!(a.dir, b.dir);
        assert!(b.dir.to_string_lossy().ends_with("-set-2"));
        // A claimed directory is locked: nobody else can claim it to continue it.
        assert!(Claim::lock(&a.dir, false).unwrap().is_none());
        let a_dir = a.dir.clone();
        drop(a);
        assert!(Claim::lock(&a_dir, false).unwrap().is_some());
    }

    #[test]
    fn dated_dir_names_are_recognised_for_their_set_only() {
        assert!(is_dated_dir_name("2026-12-02-ferry-faq", "ferry-faq"));
        assert!(is_dated_dir_name("2026-12-02-ferry-faq-12", "ferry-faq"));
        assert!(!is_dated_dir_name("2026-12-02-ferry-faq-x", "ferry-faq"));
        assert!(!is_dated_dir_name("2026-12-02-ferry", "ferry-faq"));
        assert!(!is_dated_dir_name("2026-12-02-ferry-faq-", "ferry-faq"));
        assert!(!is_dated_dir_name("latest", "ferry-faq"));
        assert!(!is_dated_dir_name("2026-1x-02-ferry-faq", "ferry-faq"));
    }

    #[test]
    fn set_names_are_path_safe() {
        assert_eq!(
            set_name(Path::new("eval-sets/ferry-faq.jsonl")),
            "ferry-faq"
        );
        assert_eq!(set_name(Path::new("a b.jsonl")), "a-b");
    }
}
