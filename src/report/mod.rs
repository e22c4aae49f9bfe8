//! Reports of a weighing: the data (`summary`, the summary.json format) kept apart from its
//! renderings, one module per format: `markdown` (report.md), `html` (report.html, drawing with
//! `charts`) and `terminal` (the short table `weigh` and `vet` print). [`write_report_dir`]
//! writes summary.json, report.md and report.html together: all or none. `dir` claims and
//! locks the report directories of `vet`.

pub mod charts;
pub mod dir;
pub mod html;
mod inert;
pub mod lineup;
pub mod markdown;
pub mod summary;
pub mod terminal;

use crate::error::{Error, Result};
use crate::fsutil;
use std::path::Path;
use summary::Summary;

/// One output format of a summary.
pub trait Renderer {
    /// File name inside the report directory.
    fn file_name(&self) -> &'static str;
    /// The whole file's text; deterministic for a given summary.
    fn render(&self, summary: &Summary) -> String;
}

/// summary.json as bytes: pretty-printed, fields in declaration order, trailing newline.
pub fn summary_json(summary: &Summary) -> Result<Vec<u8>> {
    let mut bytes = serde_json::to_vec_pretty(summary)
        .map_err(|e| Error::internal(format!("cannot serialise the summary: {e}")))?;
    bytes.push(b'\n');
    Ok(bytes)
}

/// Writes summary.json, report.md and report.html into `dir` (created if needed), all or
/// none: each is written to a temporary file in `dir` first and renamed into place only when
/// all are complete.
pub fn write_report_dir(dir: &Path, summary: &Summary) -> Result<()> {
    let files: Vec<(&str, Vec<u8>)> = vec![
        ("summary.json", summary_json(summary)?),
        (
            markdown::Markdown.file_name(),
            markdown::Markdown.render(summary).into_bytes(),
        ),
        (
            html::Html.file_name(),
            html::Html.render(summary).into_bytes(),
        ),
    ];
    // A rename that cannot succeed must fail before any file is renamed (both or neither).
    for (name, _) in &files {
        let path = dir.join(name);
        if path.is_dir() {
            return Err(Error::file(
                &path,
                "is a directory; the report directory must be free to hold this file",
            ));
        }
    }
    let mut staged = Vec::new();
    for (name, bytes) in &files {
        let path = dir.join(name);
        let tmp = fsutil::stage(&path, bytes)?;
        staged.push((path, tmp));
    }
    for (path, tmp) in staged {
        fsutil::commit_staged(&path, tmp)?;
    }
    Ok(())
}
