//! The answers journal: `<out>.partial`, written while `answer` runs so that a stopped or killed
//! run loses at most the answers in progress.
//!
//! Format (JSONL, UTF-8):
//! - line 1, the header: `{"journal": "liftgate answers journal", "version": 1, "identity": {...}}`,
//!   where `identity` ([`RunIdentity`]) holds everything that decides the answers: tool version,
//!   model, adapter and chat-template fingerprints, generation settings, question-set
//!   fingerprint, and for a sharded run its shard. Batch size, threads, paths and timings are
//!   left out: they do not change greedy f32 output, and a moved model directory should still
//!   resume.
//! - then one answer row a line, exactly as in the answers file, in the order the answers
//!   finished. Each row is written with one `write` and synced before the next answer counts as
//!   saved.
//!
//! Read back, a last line that is not newline-terminated or not a valid row was cut mid-write
//! (a kill or power loss) and is dropped; a bad line before the last one is corruption and an
//! error. The journal is locked while a run writes it, so two runs cannot append to one file.

use super::answers::AnswerRecord;
use super::questions::QuestionSet;
use super::run_record::{RunInfo, ShardInfo};
use crate::error::{Error, Result};
use crate::fsutil;
use serde::{Deserialize, Serialize};
use std::collections::HashMap;
use std::fs::File;
use std::io::{Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

const FORMAT: &str = "liftgate answers journal";
const VERSION: u32 = 1;

/// What decides the answers of a run; two runs with equal identities give the same answers.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RunIdentity {
    pub tool_version: String,
    pub model_fingerprint: String,
    /// The dtype the checkpoint stores its weights in.
    pub stored_dtype: String,
    pub adapter_fingerprint: Option<String>,
    /// How the adapter was applied (merged answers are not unmerged answers).
    #[serde(default)]
    pub adapter_applied: Option<String>,
    pub chat_template_fingerprint: String,
    pub chat_template_from_model: bool,
    pub system: Option<String>,
    pub decoding: String,
    pub max_new_tokens: usize,
    pub ignore_eos: bool,
    pub eos_token_ids: Vec<u32>,
    pub repetition_penalty: Option<f64>,
    pub questions_fingerprint: String,
    pub compute_dtype: String,
    /// The 4-bit quantisation of the base (`nf4`, ...), when there is one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub base_quant: Option<String>,
    /// The part of the set a sharded run answers: a shard's saved answers continue only that
    /// shard.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shard: Option<ShardInfo>,
}

impl RunIdentity {
    pub fn of(info: &RunInfo) -> Self {
        RunIdentity {
            tool_version: info.tool_version.clone(),
            model_fingerprint: info.model.fingerprint.clone(),
            stored_dtype: info.model.stored_dtype.clone(),
            adapter_fingerprint: info.adapter.as_ref().map(|a| a.fingerprint.clone()),
            adapter_applied: info.adapter.as_ref().map(|a| a.applied.clone()),
            chat_template_fingerprint: info.chat_template.fingerprint.clone(),
            chat_template_from_model: info.chat_template.from_model,
            system: info.generation.system.clone(),
            decoding: info.generation.decoding.clone(),
            max_new_tokens: info.generation.max_new_tokens,
            ignore_eos: info.generation.ignore_eos,
            eos_token_ids: info.generation.eos_token_ids.clone(),
            repetition_penalty: info.generation.repetition_penalty,
            questions_fingerprint: info.questions.fingerprint.clone(),
            compute_dtype: info.compute_dtype.clone(),
            base_quant: info.base_quant.as_ref().map(|q| q.name.clone()),
            shard: info.shard.clone(),
        }
    }

    /// The fields that differ: (field, value in `self`, value in `other`), in field order.
    pub fn differences(&self, other: &RunIdentity) -> Vec<(String, String, String)> {
        let (a, b) = match (serde_json::to_value(self), serde_json::to_value(other)) {
            (Ok(serde_json::Value::Object(a)), Ok(serde_json::Value::Object(b))) => (a, b),
            _ => return vec![("identity".into(), String::new(), String::new())],
        };
        a.iter()
            .filter(|(k, v)| b.get(*k) != Some(*v))
            .map(|(k, v)| {
                let other = b.get(k).cloned().unwrap_or(serde_json::Value::Null);
                (k.clone(), short(v), short(&other))
            })
            .collect()
    }
}

fn short(v: &serde_json::Value) -> String {
    let s = v.to_string();
    if s.chars().count() > 80 {
        format!("{}...", s.chars().take(77).collect::<String>())
    } else {
        s
    }
}

#[derive(Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct Header {
    journal: String,
    version: u32,
    identity: RunIdentity,
}

/// `<out>.partial` beside the answers file.
pub fn journal_path(out: &Path) -> PathBuf {
    let mut s = out.as_os_str().to_os_string();
    s.push(".partial");
    PathBuf::from(s)
}

/// A journal's readable content.
#[derive(Debug, Clone, PartialEq)]
pub struct Contents {
    /// None: an empty journal, or one whose header was cut mid-write.
    pub identity: Option<RunIdentity>,
    /// (index in the question set, row), in the order they were written.
    pub records: Vec<(usize, AnswerRecord)>,
    /// Bytes up to the end of the last valid row; what follows is dropped.
    pub valid_len: u64,
    /// The 1-based line number of a dropped last line.
    pub dropped_line: Option<usize>,
}

/// Parses a journal's bytes against the question set it must belong to.
pub fn parse(path: &Path, bytes: &[u8], set: &QuestionSet) -> Result<Contents> {
    let empty = Contents {
        identity: None,
        records: Vec::new(),
        valid_len: 0,
        dropped_line: None,
    };
    // Lines with their end offsets; `complete` when newline-terminated.
    let mut lines: Vec<(&[u8], u64, bool)> = Vec::new();
    let mut start = 0usize;
    while start < bytes.len() {
        match bytes[start..].iter().position(|&b| b == b'\n') {
            Some(n) => {
                lines.push((&bytes[start..start + n], (start + n + 1) as u64, true));
                start += n + 1;
            }
            None => {
                lines.push((&bytes[start..], bytes.len() as u64, false));
                start = bytes.len();
            }
        }
    }
    let Some(&(head, head_end, head_complete)) = lines.first() else {
        return Ok(empty);
    };
    if !head_complete {
        // The header is written in one piece before any row: cut off, nothing was saved.
        return Ok(Contents {
            dropped_line: Some(1),
            ..empty
        });
    }
    let header: Header = std::str::from_utf8(head)
        .ok()
        .and_then(|s| serde_json::from_str(s).ok())
        .filter(|h: &Header| h.journal == FORMAT)
        .ok_or_else(|| {
            Error::line(
                path,
                1,
                "not a liftgate answers journal (or one from an incompatible version); move it away or pass --restart to replace it",
            )
        })?;
    if header.version != VERSION {
        return Err(Error::field(
            path,
            Some(1),
            "version",
            format!(
                "journal version {} is not supported (expected {VERSION}); pass --restart to start over",
                header.version
            ),
        ));
    }
    let index: HashMap<&str, usize> = set
        .questions
        .iter()
        .enumerate()
        .map(|(i, q)| (q.id.as_str(), i))
        .collect();
    let mut seen = vec![false; set.len()];
    let mut records = Vec::new();
    let mut valid_len = head_end;
    let mut dropped_line = None;
    let last = lines.len() - 1;
    for (k, &(text, end, complete)) in lines.iter().enumerate().skip(1) {
        let line_no = k + 1;
        let row: Option<AnswerRecord> = complete
            .then(|| std::str::from_utf8(text).ok())
            .flatten()
            .and_then(|s| serde_json::from_str(s).ok());
        let Some(row) = row else {
            if k == last {
                dropped_line = Some(line_no);
                break;
            }
            return Err(Error::line(
                path,
                line_no,
                "not a valid answer row, and not the last line (which a kill can cut): the journal is damaged; pass --restart to start over",
            ));
        };
        let Some(&i) = index.get(row.id.as_str()) else {
            return Err(Error::field(
                path,
                Some(line_no),
                "id",
                format!(
                    "{:?} is not a question of {}; pass --restart to start over",
                    row.id,
                    set.path.display()
                ),
            ));
        };
        if std::mem::replace(&mut seen[i], true) {
            return Err(Error::field(
                path,
                Some(line_no),
                "id",
                format!(
                    "{:?} is answered twice; the journal is damaged; pass --restart to start over",
                    row.id
                ),
            ));
        }
        records.push((i, row));
        valid_len = end;
    }
    Ok(Contents {
        identity: Some(header.identity),
        records,
        valid_len,
        dropped_line,
    })
}

/// The identity in a journal's header, without reading the rows; None when there is no
/// readable header.
pub fn read_identity(path: &Path) -> Option<RunIdentity> {
    let mut first = String::new();
    let file = File::open(path).ok()?;
    std::io::BufRead::read_line(&mut std::io::BufReader::new(file.take(1 << 20)), &mut first)
        .ok()?;
    let header: Header = serde_json::from_str(first.trim_end()).ok()?;
    (header.journal == FORMAT).then_some(header.identity)
}

/// An open, locked journal.
#[derive(Debug)]
pub struct Journal {
    file: File,
    path: PathBuf,
}

impl Journal {
    /// Opens (creating if absent) and locks the journal; another run holding it is an error.
    pub fn open(path: &Path) -> Result<Journal> {
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir).map_err(|e| {
                Error::file(dir, format!("cannot create the output directory: {e}"))
            })?;
        }
        let file = std::fs::OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(path)
            .map_err(|e| Error::file(path, format!("cannot open the answers journal: {e}")))?;
        if !fsutil::try_lock(&file)
            .map_err(|e| Error::file(path, format!("cannot lock the answers journal: {e}")))?
        {
            return Err(Error::file(
                path,
                "another liftgate run is writing this answers journal; wait for it or choose another --out",
            ));
        }
        Ok(Journal {
            file,
            path: path.to_path_buf(),
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Reads and parses the whole journal.
    pub fn read(&mut self, set: &QuestionSet) -> Result<Contents> {
        let mut bytes = Vec::new();
        self.file
            .seek(SeekFrom::Start(0))
            .and_then(|_| self.file.read_to_end(&mut bytes))
            .map_err(|e| Error::file(&self.path, format!("cannot read: {e}")))?;
        parse(&self.path, &bytes, set)
    }

    /// Empties the journal and writes the header of a new run.
    pub fn start(&mut self, identity: &RunIdentity) -> Result<()> {
        let header = Header {
            journal: FORMAT.into(),
            version: VERSION,
            identity: identity.clone(),
        };
        let mut line = serde_json::to_vec(&header)
            .map_err(|e| Error::internal(format!("cannot serialise the journal header: {e}")))?;
        line.push(b'\n');
        self.truncate(0)?;
        self.write_synced(&line)
    }

    /// Keeps the first `valid_len` bytes ([`Contents::valid_len`]: a cut last line goes) and
    /// appends after them.
    pub fn resume(&mut self, valid_len: u64) -> Result<()> {
        self.truncate(valid_len)
    }

    /// Appends one answer row and syncs it to disk.
    pub fn append(&mut self, row: &AnswerRecord) -> Result<()> {
        let mut line = serde_json::to_vec(row)
            .map_err(|e| Error::internal(format!("cannot serialise an answer row: {e}")))?;
        line.push(b'\n');
        self.write_synced(&line)
    }

    /// Deletes the journal once the answers file is in place.
    pub fn remove(self) -> Result<()> {
        std::fs::remove_file(&self.path).map_err(|e| {
            Error::file(
                &self.path,
                format!("cannot remove the answers journal: {e}"),
            )
        })
    }

    fn truncate(&mut self, len: u64) -> Result<()> {
        self.file
            .set_len(len)
            .and_then(|_| self.file.seek(SeekFrom::Start(len)).map(|_| ()))
            .map_err(|e| Error::file(&self.path, format!("cannot truncate: {e}")))
    }

    fn write_synced(&mut self, bytes: &[u8]) -> Result<()> {
        self.file
            .write_all(bytes)
            .and_then(|_| self.file.sync_data())
            .map_err(|e| Error::file(&self.path, format!("cannot write: {e}")))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::formats::answers::Finish;

    fn set(dir: &Path) -> QuestionSet {
        let p = dir.join("set.jsonl");
        std::fs::write(
            &p,
            "{\"id\":\"a\",\"question\":\"q?\",\"references\":[\"x\"]}\n{\"id\":\"b\",\"question\":\"r?\",\"references\":[\"y\"]}\n{\"id\":\"c\",\"question\":\"s?\",\"references\":[\"z\"]}\n",
        )
        .unwrap();
        QuestionSet::load(&p).unwrap()
    }

    fn identity() -> RunIdentity {
        RunIdentity {
            tool_version: "0.1.0".into(),
            model_fingerprint: "m".repeat(64),
            stored_dtype: "F32".into(),
            adapter_fingerprint: None,
            adapter_applied: None,
            chat_template_fingerprint: "t".repeat(64),
            chat_template_from_model: true,
            system: None,
            decoding: "greedy".into(),
            max_new_tokens: 16,
            ignore_eos: false,
            eos_token_ids: vec![2],
            repetition_penalty: None,
            questions_fingerprint: "q".repeat(64),
            compute_dtype: "f32".into(),
            base_quant: None,
            shard: None,
        }
    }

    fn row(id: &str) -> AnswerRecord {
        AnswerRecord {
            id: id.into(),
            answer: format!("answer {id}"),
            finish: Some(Finish::Eos),
            prompt_tokens: Some(5),
            new_tokens: Some(3),
            ms: Some(7),
            extra: Default::default(),
        }
    }

    /// A journal with header and rows b, a written through [`Journal`].
    fn written(dir: &Path) -> (PathBuf, Vec<u8>) {
        let path = dir.join("out.jsonl.partial");
        let mut j = Journal::open(&path).unwrap();
        j.start(&identity()).unwrap();
        j.append(&row("b")).unwrap();
        j.append(&row("a")).unwrap();
        drop(j);
        let bytes = std::fs::read(&path).unwrap();
        (path, bytes)
    }

    #[test]
    fn rows_read_back_with_their_set_index() {
        let dir = tempfile::tempdir().unwrap();
        let s = set(dir.path());
        let (path, bytes) = written(dir.path());
        let c = parse(&path, &bytes, &s).unwrap();
        assert_eq!(c.identity, Some(identity()));
        assert_eq!(c.records, vec![(1, row("b")), (0, row("a"))]);
        assert_eq!(c.valid_len, bytes.len() as u64);
        assert_eq!(c.dropped_line, None);
        assert_eq!(read_identity(&path), Some(identity()));
    }

    #[test]
    fn a_cut_last_line_is_dropped_and_truncated_away_on_resume() {
        let dir = tempfile::tempdir().unwrap();
        let s = set(dir.path());
        let (path, bytes) = written(dir.path());
        // Every cut inside the last row (with or without its newline) keeps only row b.
        let last_start = bytes[..bytes.len() - 1]
            .iter()
            .rposition(|&b| b == b'\n')
            .unwrap()
            + 1;
        for cut in last_start + 1..bytes.len() {
            let c = parse(&path, &bytes[..cut], &s).unwrap();
            assert_eq!(c.records, vec![(1, row("b"))], "cut at {cut}");
            assert_eq!(c.valid_len, last_start as u64);
            assert_eq!(c.dropped_line, Some(3));
        }
        // A garbled but newline-terminated last line is dropped too.
        let mut garbled = bytes[..last_start].to_vec();
        garbled.extend_from_slice(b"{\"id\":\"c\",\"ans\x00\n");
        let c = parse(&path, &garbled, &s).unwrap();
        assert_eq!(c.records.len(), 1);
        // Resuming truncates the cut line away so the next row starts on its own line.
        std::fs::write(&path, &bytes[..bytes.len() - 4]).unwrap();
        let mut j = Journal::open(&path).unwrap();
        let c = j.read(&s).unwrap();
        j.resume(c.valid_len).unwrap();
        j.append(&row("c")).unwrap();
        drop(j);
        let c = parse(&path, &std::fs::read(&path).unwrap(), &s).unwrap();
        assert_eq!(c.records, vec![(1, row("b")), (2, row("c"))]);
        assert_eq!(c.dropped_line, None);
    }

    #[test]
    fn a_cut_header_means_nothing_was_saved() {
        let dir = tempfile::tempdir().unwrap();
        let s = set(dir.path());
        let (path, bytes) = written(dir.path());
        let head_end = bytes.iter().position(|&b| b == b'\n').unwrap();
        let c = parse(&path, &bytes[..head_end], &s).unwrap();
        assert_eq!(c.identity, None);
        assert!(c.records.is_empty());
        assert_eq!(parse(&path, b"", &s).unwrap().identity, None);
    }

    #[test]
    fn damage_before_the_last_line_is_an_error_naming_the_line() {
        let dir = tempfile::tempdir().unwrap();
        let s = set(dir.path());
        let (path, bytes) = written(dir.path());
        let text = String::from_utf8(bytes).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        let damaged = format!("{}\nnot json\n{}\n", lines[0], lines[2]);
        let err = parse(&path, damaged.as_bytes(), &s)
            .unwrap_err()
            .to_string();
        assert!(err.contains(":2:") && err.contains("--restart"), "{err}");
        let twice = format!("{}\n{}\n{}\n", lines[0], lines[1], lines[1]);
        let err = parse(&path, twice.as_bytes(), &s).unwrap_err().to_string();
        assert!(err.contains(":3") && err.contains("twice"), "{err}");
        let stranger = format!(
            "{}\n{}\n",
            lines[0],
            serde_json::to_string(&row("zz")).unwrap()
        );
        let err = parse(&path, stranger.as_bytes(), &s)
            .unwrap_err()
            .to_string();
        assert!(err.contains("\"zz\""), "{err}");
        let err = parse(&path, b"{\"x\":1}\n", &s).unwrap_err().to_string();
        assert!(err.contains("not a liftgate answers journal"), "{err}");
    }

    #[test]
    fn differences_name_each_field() {
        let a = identity();
        let mut b = identity();
        assert!(a.differences(&b).is_empty());
        b.max_new_tokens = 32;
        b.adapter_fingerprint = Some("f".repeat(64));
        let d = a.differences(&b);
        let fields: Vec<&str> = d.iter().map(|(f, _, _)| f.as_str()).collect();
        assert_eq!(fields, vec!["adapter_fingerprint", "max_new_tokens"]);
        assert_eq!(d[1], ("max_new_tokens".into(), "16".into(), "32".into()));
    }

    #[test]
    fn the_output_directory_is_made_when_missing() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("new/sub/out.jsonl.partial");
        Journal::open(&path).unwrap();
        assert!(path.is_file());
    }

    #[test]
    fn a_second_writer_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("x.partial");
        let _first = Journal::open(&path).unwrap();
        let err = Journal::open(&path).unwrap_err().to_string();
        assert!(err.contains("another liftgate run"), "{err}");
    }
}
