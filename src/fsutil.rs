//! File helpers shared by every command: atomic writes, reading JSONL with line numbers, and
//! content fingerprints.
//!
//! Nothing half-written (docs/interface.md, exit code 2): every output goes to a temporary file in the
//! destination directory and is renamed into place only when complete.

use crate::error::{Error, Result};
use sha2::{Digest, Sha256};
use std::io::{Read, Write};
use std::path::Path;

/// Creates `dir` (and its parents) unless it exists, naming it on failure.
pub fn create_dir(dir: &Path) -> Result<()> {
    std::fs::create_dir_all(dir)
        .map_err(|e| Error::file(dir, format!("cannot create the directory: {e}")))
}

/// Writes `bytes` to `path` atomically: a temporary file beside it, fsync, rename.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    commit_staged(path, stage(path, bytes)?)
}

/// Writes `bytes` to a synced temporary file in `path`'s directory (created if needed), to be
/// renamed into place by [`commit_staged`]. Staging several files first and renaming them
/// after gives "all or nothing" for a group of outputs.
pub fn stage(path: &Path, bytes: &[u8]) -> Result<tempfile::NamedTempFile> {
    stage_with(path, |file| {
        file.write_all(bytes).map_err(|e| write_error(path, e))
    })
}

/// [`stage`] of `rows` as JSONL ([`jsonl_bytes`]), serialised and written in groups: each group
/// is serialised in parallel while the one before it is written, so a large file's write
/// overlaps its serialisation instead of following it, and no copy of the whole file is held.
pub fn stage_jsonl<T: serde::Serialize + Sync>(
    path: &Path,
    rows: &[T],
) -> Result<tempfile::NamedTempFile> {
    // Rows a group: about 4 MB of grades rows, large enough for both cores to share.
    const GROUP: usize = 16_384;
    stage_with(path, |file| {
        let mut pending: Vec<Vec<u8>> = Vec::new();
        for group in rows.chunks(GROUP) {
            let (written, next) = rayon::join(
                || write_chunks(file, &pending).map_err(|e| write_error(path, e)),
                || jsonl_chunks(group),
            );
            written?;
            pending = next?;
        }
        write_chunks(file, &pending).map_err(|e| write_error(path, e))
    })
}

fn write_chunks(file: &mut std::fs::File, chunks: &[Vec<u8>]) -> std::io::Result<()> {
    chunks.iter().try_for_each(|c| file.write_all(c))
}

fn write_error(path: &Path, e: std::io::Error) -> Error {
    Error::file(path, format!("cannot write: {e}"))
}

/// A synced temporary file in `path`'s directory (created if needed) whose content `write`
/// puts in.
fn stage_with(
    path: &Path,
    write: impl FnOnce(&mut std::fs::File) -> Result<()>,
) -> Result<tempfile::NamedTempFile> {
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    std::fs::create_dir_all(dir)
        .map_err(|e| Error::file(dir, format!("cannot create the output directory: {e}")))?;
    let mut tmp = tempfile::Builder::new()
        .prefix(".liftgate-")
        .suffix(".tmp")
        .tempfile_in(dir)
        .map_err(|e| Error::file(dir, format!("cannot create a temporary file: {e}")))?;
    write(tmp.as_file_mut())?;
    tmp.as_file().sync_all().map_err(|e| write_error(path, e))?;
    Ok(tmp)
}

/// Renames a file made by [`stage`] into place.
pub fn commit_staged(path: &Path, tmp: tempfile::NamedTempFile) -> Result<()> {
    tmp.persist(path)
        .map_err(|e| Error::file(path, format!("cannot rename into place: {e}")))?;
    Ok(())
}

/// Serialises `rows` as JSONL (one compact object a line) and writes the file atomically.
pub fn write_jsonl_atomic<T: serde::Serialize + Sync>(path: &Path, rows: &[T]) -> Result<()> {
    write_atomic(path, &jsonl_bytes(rows)?)
}

/// `rows` as JSONL bytes: one compact object a line, serialised in parallel chunks (a large
/// answers or grades file is 100,000 rows) and joined in row order.
pub fn jsonl_bytes<T: serde::Serialize + Sync>(rows: &[T]) -> Result<Vec<u8>> {
    Ok(jsonl_chunks(rows)?.concat())
}

/// [`jsonl_bytes`] in pieces, in row order.
fn jsonl_chunks<T: serde::Serialize + Sync>(rows: &[T]) -> Result<Vec<Vec<u8>>> {
    use rayon::prelude::*;
    rows.par_chunks(2048)
        .map(|chunk| {
            let mut out = Vec::with_capacity(chunk.len() * 256);
            for row in chunk {
                serde_json::to_writer(&mut out, row)
                    .map_err(|e| Error::internal(format!("cannot serialise a row: {e}")))?;
                out.push(b'\n');
            }
            Ok(out)
        })
        .collect()
}

/// Longest accepted line in a JSONL input. A question set is text; a line past this is a
/// corrupted or wrong file, and reading it whole would waste memory.
pub const MAX_LINE_BYTES: usize = 1 << 20;

/// Reads a JSONL file into `(line_number, text)` pairs, 1-based, skipping blank lines and a
/// leading byte-order mark. Fails on non-UTF-8 bytes and on over-long lines, naming the line.
pub fn read_jsonl_lines(path: &Path) -> Result<Vec<(usize, String)>> {
    let bytes = read_file(path)?;
    Ok(jsonl_slices(path, &bytes)?
        .into_iter()
        .map(|(line, text)| (line, text.to_string()))
        .collect())
}

/// The bytes of a file, `path` named in the error.
pub fn read_file(path: &Path) -> Result<Vec<u8>> {
    std::fs::read(path).map_err(|e| Error::file(path, format!("cannot open: {e}")))
}

/// The `(line_number, text)` pairs of JSONL held in memory, as [`read_jsonl_lines`] gives
/// them, borrowed from `bytes` (one buffer for the file instead of one string a line);
/// `path` names the source in messages. Lines end at `\n`; each is trimmed of whitespace
/// (a `\r` included), and blank ones are skipped.
pub fn jsonl_slices<'a>(path: &Path, bytes: &'a [u8]) -> Result<Vec<(usize, &'a str)>> {
    let mut out = Vec::new();
    let mut rest = bytes;
    let mut line_no = 0usize;
    while !rest.is_empty() {
        line_no += 1;
        let (line, next) = match memchr::memchr(b'\n', rest) {
            Some(i) => (&rest[..i], &rest[i + 1..]),
            None => (rest, &rest[rest.len()..]),
        };
        rest = next;
        if line.len() > MAX_LINE_BYTES {
            return Err(Error::line(
                path,
                line_no,
                format!(
                    "line is longer than {} bytes; is this a JSONL file?",
                    MAX_LINE_BYTES
                ),
            ));
        }
        // A UTF-8 byte-order mark (some editors on Windows write one) is not part of the text.
        let line = match line.strip_prefix(b"\xEF\xBB\xBF") {
            Some(after) if line_no == 1 => after,
            _ => line,
        };
        let text = std::str::from_utf8(line).map_err(|e| {
            Error::line(
                path,
                line_no,
                format!("not valid UTF-8 (byte {}): {e}", e.valid_up_to()),
            )
        })?;
        let text = text.trim();
        if !text.is_empty() {
            out.push((line_no, text));
        }
    }
    Ok(out)
}

/// Takes an exclusive advisory lock on `file` without waiting: Ok(false) when another process
/// (or another open of the same file) holds it. The lock goes with the file handle, so a killed
/// process never leaves a stale lock behind. Unix `flock(2)`; elsewhere no lock is taken.
/// (`File::try_lock` does this in std from Rust 1.89, newer than this crate's minimum.)
pub fn try_lock(file: &std::fs::File) -> std::io::Result<bool> {
    #[cfg(unix)]
    {
        use std::os::unix::io::AsRawFd;
        // SAFETY: flock only reads the descriptor number, which `file` keeps open for the call.
        let rc = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
        if rc == 0 {
            return Ok(true);
        }
        let err = std::io::Error::last_os_error();
        if err.kind() == std::io::ErrorKind::WouldBlock {
            return Ok(false);
        }
        Err(err)
    }
    #[cfg(not(unix))]
    {
        let _ = file;
        Ok(true)
    }
}

/// Whether two paths name the same existing file (after resolving links and `..`).
pub fn same_file(a: &Path, b: &Path) -> bool {
    match (std::fs::canonicalize(a), std::fs::canonicalize(b)) {
        (Ok(x), Ok(y)) => x == y,
        _ => false,
    }
}

/// SHA-256 of bytes, hex.
pub fn sha256_hex(bytes: &[u8]) -> String {
    hex(&Sha256::digest(bytes))
}

/// SHA-256 of a file's content, streamed, hex.
pub fn sha256_file(path: &Path) -> Result<String> {
    let mut file =
        std::fs::File::open(path).map_err(|e| Error::file(path, format!("cannot open: {e}")))?;
    let mut hasher = Sha256::new();
    let mut buf = vec![0u8; 1 << 20];
    loop {
        let n = file
            .read(&mut buf)
            .map_err(|e| Error::file(path, format!("cannot read: {e}")))?;
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
    }
    Ok(hex(&hasher.finalize()))
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// The JSON type name of a value, for messages.
pub fn json_kind(v: &serde_json::Value) -> &'static str {
    match v {
        serde_json::Value::Null => "null",
        serde_json::Value::Bool(_) => "a boolean",
        serde_json::Value::Number(_) => "a number",
        serde_json::Value::String(_) => "a string",
        serde_json::Value::Array(_) => "an array",
        serde_json::Value::Object(_) => "an object",
    }
}

/// `s` as one POSIX shell word: unchanged when it holds only safe characters, else in single
/// quotes (a single quote inside becomes `'\''`).
pub fn shell_quote(s: &str) -> String {
    let safe = !s.is_empty()
        && s.chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./=:,+@%".contains(c));
    if safe {
        s.to_string()
    } else {
        format!("'{}'", s.replace('\'', "'\\''"))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn staged_jsonl_in_groups_is_the_whole_serialisation() {
        let dir = tempfile::tempdir().unwrap();
        let out = dir.path().join("rows.jsonl");
        // Across several groups and a partial last one; and no rows at all.
        for n in [40_000usize, 0, 1] {
            let rows: Vec<(usize, String)> = (0..n).map(|i| (i, format!("row \"{i}\""))).collect();
            commit_staged(&out, stage_jsonl(&out, &rows).unwrap()).unwrap();
            let written = std::fs::read(&out).unwrap();
            assert_eq!(written, jsonl_bytes(&rows).unwrap(), "{n} rows");
            assert_eq!(written.iter().filter(|&&b| b == b'\n').count(), n);
        }
    }

    #[test]
    fn shell_words_survive_quoting() {
        assert_eq!(shell_quote("--max-new-tokens"), "--max-new-tokens");
        assert_eq!(shell_quote("models/base"), "models/base");
        assert_eq!(shell_quote("Be brief."), "'Be brief.'");
        assert_eq!(shell_quote("it's"), "'it'\\''s'");
        assert_eq!(shell_quote(""), "''");
    }

    #[test]
    fn atomic_write_replaces_whole_file() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("x.txt");
        write_atomic(&p, b"one").unwrap();
        write_atomic(&p, b"two").unwrap();
        assert_eq!(std::fs::read(&p).unwrap(), b"two");
        // No temporary files are left behind.
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    #[test]
    fn jsonl_lines_are_numbered_and_blank_lines_skipped() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("q.jsonl");
        std::fs::write(&p, "{\"a\":1}\n\n  \n{\"b\":2}").unwrap();
        let lines = read_jsonl_lines(&p).unwrap();
        assert_eq!(
            lines,
            vec![(1, "{\"a\":1}".to_string()), (4, "{\"b\":2}".to_string())]
        );
    }

    #[test]
    fn leading_byte_order_mark_is_skipped() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("q.jsonl");
        std::fs::write(&p, b"\xEF\xBB\xBF{\"a\":1}\r\n\xEF\xBB\xBF{}\n").unwrap();
        let lines = read_jsonl_lines(&p).unwrap();
        assert_eq!(lines[0], (1, "{\"a\":1}".to_string()));
        // Only at the start of the file: elsewhere it stays (and JSON parsing will name it).
        assert_eq!(lines[1], (2, "\u{feff}{}".to_string()));
    }

    #[test]
    fn over_long_lines_are_refused_by_number_and_the_limit_itself_passes() {
        let at_limit = "x".repeat(MAX_LINE_BYTES);
        let text = format!("{{}}\n{at_limit}\n{at_limit}x\n");
        let ok = jsonl_slices(Path::new("f"), &text.as_bytes()[..3 + MAX_LINE_BYTES]).unwrap();
        assert_eq!(ok.len(), 2);
        let err = jsonl_slices(Path::new("f"), text.as_bytes())
            .unwrap_err()
            .to_string();
        assert!(err.contains(":3:") && err.contains("longer than"), "{err}");
    }

    #[test]
    fn last_line_without_newline_and_crlf_endings() {
        let lines = jsonl_slices(Path::new("f"), b"{\"a\":1}\r\n\r\n{\"b\":2}").unwrap();
        assert_eq!(lines, vec![(1, "{\"a\":1}"), (3, "{\"b\":2}")]);
    }

    #[test]
    fn non_utf8_names_the_line() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("q.jsonl");
        std::fs::write(&p, b"{}\n{\"a\":\"\xff\"}\n").unwrap();
        let err = read_jsonl_lines(&p).unwrap_err().to_string();
        assert!(err.contains(":2:"), "{err}");
    }

    #[test]
    fn sha256_of_known_string() {
        // FIPS 180-2 example: SHA-256("abc").
        assert_eq!(
            sha256_hex(b"abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }
}
