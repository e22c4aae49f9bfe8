//! Reports of a weighing (issue 2, "Reports"): the data (`summary`, the summary.json format)
//! kept apart from its renderings, one module per format: `markdown` (report.md) and `terminal`
//! (the short table `weigh` prints). [`write_report_dir`] writes summary.json and report.md
//! together: both or neither.

pub mod markdown;
pub mod summary;
pub mod terminal;

use crate::error::{Error, Result};
use std::io::Write;
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

/// Writes summary.json and report.md into `dir` (created if needed), both or neither: both
/// are written to temporary files in `dir` first and renamed into place only when both are
/// complete.
pub fn write_report_dir(dir: &Path, summary: &Summary) -> Result<()> {
    let files: Vec<(&str, Vec<u8>)> = vec![
        ("summary.json", summary_json(summary)?),
        (
            markdown::Markdown.file_name(),
            markdown::Markdown.render(summary).into_bytes(),
        ),
    ];
    std::fs::create_dir_all(dir)
        .map_err(|e| Error::file(dir, format!("cannot create the report directory: {e}")))?;
    let mut temps = Vec::new();
    for (name, bytes) in &files {
        let mut tmp = tempfile::Builder::new()
            .prefix(".liftgate-")
            .suffix(".tmp")
            .tempfile_in(dir)
            .map_err(|e| Error::file(dir, format!("cannot create a temporary file: {e}")))?;
        tmp.write_all(bytes)
            .and_then(|_| tmp.as_file().sync_all())
            .map_err(|e| Error::file(dir.join(name), format!("cannot write: {e}")))?;
        temps.push((name, tmp));
    }
    for (name, tmp) in temps {
        let path = dir.join(name);
        tmp.persist(&path)
            .map_err(|e| Error::file(&path, format!("cannot rename into place: {e}")))?;
    }
    Ok(())
}
