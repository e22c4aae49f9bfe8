//! Run records: `<file>.run.json` beside an answers or grades file, saying what produced it
//! (docs/interface.md, "Answers file" and "Grades file"). Writers take the path from
//! [`path_beside`] and the bytes from [`to_bytes`] and stage them with their file; readers go
//! through [`read`].
//!
//! A record is optional for a reader: answers made by another system have none, and every
//! check that uses one (the question-set fingerprint, the compute dtype) is skipped without it.

use crate::error::{Error, Result};
use crate::formats::questions::QuestionSet;
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// `<file>.run.json`: where the record of `file` lives.
pub fn path_beside(file: &Path) -> PathBuf {
    let mut s = file.as_os_str().to_os_string();
    s.push(".run.json");
    PathBuf::from(s)
}

/// The record beside `file` as pretty JSON bytes with a trailing newline, ready to stage.
pub fn to_bytes<T: Serialize>(record: &T) -> Result<Vec<u8>> {
    let mut bytes = serde_json::to_vec_pretty(record)
        .map_err(|e| Error::internal(format!("cannot serialise run.json: {e}")))?;
    bytes.push(b'\n');
    Ok(bytes)
}

/// The record beside `file` parsed as JSON; None when there is none. A record that exists but
/// cannot be read or parsed is an error naming it.
pub fn read(file: &Path) -> Result<Option<serde_json::Value>> {
    let run = path_beside(file);
    let bytes = match std::fs::read(&run) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(Error::file(&run, format!("cannot read: {e}"))),
    };
    serde_json::from_slice(&bytes)
        .map(Some)
        .map_err(|e| Error::line(&run, e.line(), format!("not valid JSON: {e}")))
}

/// The answers record beside `file` as a [`RunInfo`], when there is one of that shape.
pub fn read_answers_record(file: &Path) -> Option<RunInfo> {
    serde_json::from_value(read(file).ok()??).ok()
}

/// The `compute_dtype` recorded beside `file`, if the record exists and has one.
pub fn recorded_compute_dtype(file: &Path) -> Option<String> {
    let value = read(file).ok()??;
    value.get("compute_dtype")?.as_str().map(str::to_string)
}

/// When the record beside `file` exists and records the question set's fingerprint
/// (`questions.fingerprint`), it must be `set`'s: the same ids in a changed set (edited
/// references, expectations or questions) would otherwise be scored or weighed silently
/// against answers made for other questions.
pub fn check_set_fingerprint(file: &Path, set: &QuestionSet) -> Result<()> {
    let run = path_beside(file);
    let Some(value) = read(file)? else {
        return Ok(());
    };
    let Some(recorded) = value.pointer("/questions/fingerprint") else {
        return Ok(());
    };
    let recorded = recorded.as_str().ok_or_else(|| {
        Error::field(
            &run,
            None,
            "questions.fingerprint",
            "expected a SHA-256 hex string",
        )
    })?;
    if recorded != set.fingerprint {
        let short = |s: &str| s.chars().take(12).collect::<String>();
        return Err(Error::field(
            &run,
            None,
            "questions.fingerprint",
            format!(
                "{} was made from a different question set (sha256 {}…) than {} (sha256 {}…); \
                 run it again with this set, or use the set it was made from",
                file.display(),
                short(recorded),
                set.path.display(),
                short(&set.fingerprint)
            ),
        ));
    }
    Ok(())
}

/// A file read as input: the path as given and the SHA-256 of its content.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputFile {
    /// The path as given on the command line.
    pub path: String,
    pub sha256: String,
}

/// `<grades>.run.json`, written by `grade` beside the grades file: what was graded.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GradeRunInfo {
    pub tool: String,
    pub tool_version: String,
    pub questions: QuestionsInfo,
    /// The answers file graded: path and SHA-256 of its content.
    pub answers: InputFile,
    /// The answers' `compute_dtype` (from their run.json), when recorded.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub compute_dtype: Option<String>,
    /// The sentence-embedding model of the `semantic` scores (`grade --embedder`): its
    /// directory and the SHA-256 of its model.safetensors. Absent when none was given.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub embedder: Option<InputFile>,
}

/// What produced an answers file: written as `<out>.run.json` (docs/interface.md, "Answers file").
/// Fingerprints are SHA-256 hex of file contents, so a changed file shows up even under the
/// same path.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RunInfo {
    pub tool: String,
    pub tool_version: String,
    /// The variant's name in its run (`vet`'s baseline and candidates; `answer --name`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub variant: Option<String>,
    pub model: ModelInfo,
    pub adapter: Option<AdapterInfo>,
    pub chat_template: TemplateInfo,
    pub generation: GenerationInfo,
    pub questions: QuestionsInfo,
    /// The dtype every tensor was computed in.
    pub compute_dtype: String,
    /// Present when the base's linear layers were quantised to 4 bits (`--base`, `base=`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub base_quant: Option<BaseQuantInfo>,
    /// Present when this file holds one shard of the set (`answer --shard`); a whole run and a
    /// gathered run have none.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shard: Option<ShardInfo>,
}

/// The 4-bit quantisation of the base (docs/interface.md, "Answers file"): the settings of
/// transformers' `BitsAndBytesConfig` it reproduces.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct BaseQuantInfo {
    /// `nf4`, `nf4-single`, `fp4` or `fp4-single`.
    pub name: String,
    pub method: String,
    /// `bnb_4bit_quant_type`: `nf4` or `fp4`.
    pub quant_type: String,
    /// Weights per block with one absmax scale (bitsandbytes' `blocksize`).
    pub block_size: usize,
    /// `bnb_4bit_use_double_quant`: the scales quantised again to 8 bits.
    pub double_quant: bool,
    /// Scales per block of that second quantisation.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub double_quant_block_size: Option<usize>,
    /// `bnb_4bit_compute_dtype`.
    pub compute_dtype: String,
    /// Which layers were quantised, and which kept as stored.
    pub quantised: String,
    pub kept_as_stored: String,
}

/// Which part of the question set a sharded run answered (docs/interface.md, "Sharding").
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ShardInfo {
    /// 0-based: shard `index` of `count`.
    pub index: usize,
    pub count: usize,
    /// SHA-256 of the split (the shard of every question of the set): every shard of one run
    /// records the same value.
    pub split: String,
    /// Questions in this shard.
    pub questions: usize,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelInfo {
    pub path: String,
    /// SHA-256 over the per-file SHA-256s of config, generation config, safetensors (and
    /// index) and tokenizer files, listed in `files`.
    pub fingerprint: String,
    pub files: Vec<FileDigest>,
    pub model_type: String,
    pub architecture: String,
    /// The dtype the checkpoint stored its weights in.
    pub stored_dtype: String,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FileDigest {
    pub name: String,
    pub sha256: String,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AdapterInfo {
    pub path: String,
    pub fingerprint: String,
    /// LoRA modules applied (merged or beside the base).
    pub modules_merged: usize,
    /// How it was applied: "unmerged (the adapter as trained)", "merged in f32", "merged and
    /// saved in bf16", "merged and saved in f16". Records written before variants say nothing
    /// here and were merged in f32.
    #[serde(default = "merged_in_f32")]
    pub applied: String,
    /// Why an unmerged request was merged instead.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub merged_because: Option<String>,
}

fn merged_in_f32() -> String {
    "merged in f32".to_string()
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TemplateInfo {
    /// SHA-256 of the template source, or of the plain fallback's name.
    pub fingerprint: String,
    /// false: the documented plain fallback prompt was used.
    pub from_model: bool,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GenerationInfo {
    pub decoding: String,
    pub max_new_tokens: usize,
    pub ignore_eos: bool,
    pub eos_token_ids: Vec<u32>,
    /// "generation_config.json" or "config.json".
    pub eos_source: String,
    pub system: Option<String>,
    /// From generation_config.json; null when none.
    pub repetition_penalty: Option<f64>,
    /// generation_config.json logits-processor keys that were not applied.
    pub ignored_generation_config_keys: Vec<String>,
    pub batch: usize,
    pub threads: usize,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct QuestionsInfo {
    pub path: String,
    pub fingerprint: String,
    pub count: usize,
}
