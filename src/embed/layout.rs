//! The sentence-embedding model directory, read and checked before any weight is loaded.
//!
//! The layout is the one sentence-transformers saves and most published embedding models ship
//! (all-MiniLM-L6-v2 among them):
//!
//! ```text
//! DIR/modules.json               the pipeline: Transformer, Pooling, optionally Normalize
//! DIR/config.json                the encoder's transformers config (model_type "bert")
//! DIR/model.safetensors          the encoder's weights
//! DIR/tokenizer.json             the `tokenizers` pipeline
//! DIR/sentence_bert_config.json  the Transformer module's settings (max_seq_length, do_lower_case)
//! DIR/1_Pooling/config.json      the pooling mode (path as modules.json gives it)
//! ```
//!
//! Two generations of the files are read: older sentence-transformers wrote module types as
//! `sentence_transformers.models.Pooling`, one `pooling_mode_<mode>` flag per mode and
//! `max_seq_length` in sentence_bert_config.json; version 6 writes
//! `sentence_transformers.<package>.Pooling`, one `pooling_mode` string and the length as the
//! tokenizer's `model_max_length` in tokenizer_config.json. Module types are matched on their
//! class name (the part after the last dot) so both spellings work.
//!
//! What is supported, and refused by name otherwise (exit 2): a BERT encoder, CLS or mean
//! pooling (exactly one mode), an optional Normalize module last, nothing else in the pipeline
//! (a Dense projection, for one, would change the embedding and is refused, not skipped).

use crate::error::{Error, Result};
use serde_json::{Map, Value};
use std::path::{Path, PathBuf};

/// How token vectors become one sentence vector (sentence-transformers' Pooling module).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Pooling {
    /// The first token's vector ([CLS]).
    Cls,
    /// The mean of the token vectors over the attention mask (padding excluded).
    Mean,
}

impl Pooling {
    pub fn as_str(self) -> &'static str {
        match self {
            Pooling::Cls => "cls",
            Pooling::Mean => "mean",
        }
    }
}

/// A checked model directory: where each file is and what the small config files say.
#[derive(Debug, Clone, PartialEq)]
pub struct Layout {
    pub dir: PathBuf,
    /// The encoder's directory (modules.json's Transformer path; usually DIR itself).
    pub encoder_dir: PathBuf,
    pub pooling: Pooling,
    /// Whether modules.json ends with a Normalize module (unit-length embeddings).
    pub normalize: bool,
    /// Tokens per text, special tokens included; longer texts are truncated.
    pub max_seq_length: usize,
    /// Lower-case the text before tokenizing (sentence_bert_config.json's `do_lower_case`).
    pub lower_case: bool,
    /// The encoder's config.json, `model_type` checked to be "bert".
    pub config: Map<String, Value>,
}

impl Layout {
    pub fn config_path(&self) -> PathBuf {
        self.encoder_dir.join("config.json")
    }
    pub fn weights_path(&self) -> PathBuf {
        self.encoder_dir.join("model.safetensors")
    }
    pub fn tokenizer_path(&self) -> PathBuf {
        self.encoder_dir.join("tokenizer.json")
    }
}

/// Reads a JSON file that must exist; `what` says what the file is for in the message.
fn read_json(path: &Path, what: &str) -> Result<Value> {
    let text = std::fs::read_to_string(path).map_err(|e| {
        if e.kind() == std::io::ErrorKind::NotFound {
            Error::file(
                path,
                format!("not found: an embedding model directory needs {what} (sentence-transformers layout, docs/scoring.md, \"Semantic similarity\")"),
            )
        } else {
            Error::file(path, format!("cannot read: {e}"))
        }
    })?;
    serde_json::from_str(&text).map_err(|e| Error::file(path, format!("not valid JSON: {e}")))
}

fn object(path: &Path, v: Value) -> Result<Map<String, Value>> {
    match v {
        Value::Object(m) => Ok(m),
        _ => Err(Error::file(path, "expected a JSON object")),
    }
}

fn positive_int(path: &Path, map: &Map<String, Value>, key: &str) -> Result<Option<usize>> {
    match map.get(key) {
        None | Some(Value::Null) => Ok(None),
        Some(v) => match v.as_u64() {
            Some(n) if n > 0 => Ok(Some(n as usize)),
            _ => Err(Error::field(
                path,
                None,
                key,
                format!("must be a positive whole number, found {v}"),
            )),
        },
    }
}

/// Reads and checks the directory's small files (not the weights or the tokenizer).
pub fn read(dir: &Path) -> Result<Layout> {
    if !dir.is_dir() {
        return Err(Error::file(
            dir,
            "not a directory: --embedder takes a sentence-embedding model directory (modules.json, config.json, model.safetensors, tokenizer.json, 1_Pooling/config.json)",
        ));
    }
    let modules_path = dir.join("modules.json");
    let modules = match read_json(&modules_path, "modules.json, the list of its modules")? {
        Value::Array(a) => a,
        _ => {
            return Err(Error::file(
                &modules_path,
                "expected a JSON list of modules ({\"type\": ..., \"path\": ...})",
            ))
        }
    };
    let mut kinds = Vec::new();
    for (i, m) in modules.iter().enumerate() {
        let field = |name: &str| format!("[{i}].{name}");
        let ty = m.get("type").and_then(Value::as_str).ok_or_else(|| {
            Error::field(
                &modules_path,
                None,
                field("type"),
                "missing or not a string",
            )
        })?;
        let path = m.get("path").and_then(Value::as_str).unwrap_or("");
        let class = ty.rsplit('.').next().unwrap_or(ty);
        if !["Transformer", "Pooling", "Normalize"].contains(&class) {
            return Err(Error::field(
                &modules_path,
                None,
                field("type"),
                format!("module {ty:?} is not supported: liftgate runs Transformer, Pooling and Normalize modules only, and leaving one out would change the embeddings"),
            ));
        }
        kinds.push((class, path.to_string(), field("type")));
    }
    let order: Vec<&str> = kinds.iter().map(|(c, _, _)| *c).collect();
    if order != ["Transformer", "Pooling"] && order != ["Transformer", "Pooling", "Normalize"] {
        return Err(Error::file(
            &modules_path,
            format!(
                "the modules are {order:?}; expected Transformer, Pooling and optionally Normalize, in that order"
            ),
        ));
    }
    let encoder_dir = dir.join(&kinds[0].1);
    let normalize = order.len() == 3;

    let config_path = encoder_dir.join("config.json");
    let config = object(
        &config_path,
        read_json(&config_path, "config.json, the encoder's configuration")?,
    )?;
    match config.get("model_type").and_then(Value::as_str) {
        Some("bert") => {}
        Some(other) => {
            return Err(Error::field(
                &config_path,
                None,
                "model_type",
                format!(
                    "is {other:?}; liftgate embeds with BERT encoders only (model_type \"bert\")"
                ),
            ))
        }
        None => {
            return Err(Error::field(
                &config_path,
                None,
                "model_type",
                "missing; liftgate embeds with BERT encoders only (model_type \"bert\")",
            ))
        }
    }
    let hidden = positive_int(&config_path, &config, "hidden_size")?
        .ok_or_else(|| Error::field(&config_path, None, "hidden_size", "missing"))?;
    let positions = positive_int(&config_path, &config, "max_position_embeddings")?
        .ok_or_else(|| Error::field(&config_path, None, "max_position_embeddings", "missing"))?;

    let pooling_path = dir.join(&kinds[1].1).join("config.json");
    let pooling_cfg = object(
        &pooling_path,
        read_json(&pooling_path, "the Pooling module's config.json")?,
    )?;
    let pooling = pooling_mode(&pooling_path, &pooling_cfg)?;
    for key in ["embedding_dimension", "word_embedding_dimension"] {
        if let Some(d) = positive_int(&pooling_path, &pooling_cfg, key)? {
            if d != hidden {
                return Err(Error::field(
                    &pooling_path,
                    None,
                    key,
                    format!("is {d} but the encoder's hidden_size is {hidden}"),
                ));
            }
        }
    }

    let st_path = encoder_dir.join("sentence_bert_config.json");
    let st_cfg = object(
        &st_path,
        read_json(
            &st_path,
            "sentence_bert_config.json, the Transformer module's settings",
        )?,
    )?;
    let lower_case = match st_cfg.get("do_lower_case") {
        None | Some(Value::Null) => false,
        Some(Value::Bool(b)) => *b,
        Some(v) => {
            return Err(Error::field(
                &st_path,
                None,
                "do_lower_case",
                format!("must be true or false, found {v}"),
            ))
        }
    };
    // The length sentence-transformers truncates at: sentence_bert_config.json's
    // max_seq_length (older layout), else the tokenizer's model_max_length (version 6),
    // else the encoder's position count; never more than the encoder has positions for.
    let tok_cfg_path = encoder_dir.join("tokenizer_config.json");
    let from_tokenizer = match std::fs::read_to_string(&tok_cfg_path) {
        Ok(text) => {
            let v: Value = serde_json::from_str(&text)
                .map_err(|e| Error::file(&tok_cfg_path, format!("not valid JSON: {e}")))?;
            // Tokenizers without a limit store a huge sentinel (int(1e30)); it is not a length.
            v.get("model_max_length")
                .and_then(Value::as_u64)
                .filter(|&n| n > 0 && n < 1 << 20)
                .map(|n| n as usize)
        }
        Err(_) => None,
    };
    let max_seq_length = positive_int(&st_path, &st_cfg, "max_seq_length")?
        .or(from_tokenizer)
        .unwrap_or(positions)
        .min(positions);

    for (path, what) in [
        (
            encoder_dir.join("model.safetensors"),
            "model.safetensors, the encoder's weights",
        ),
        (
            encoder_dir.join("tokenizer.json"),
            "tokenizer.json, the tokenizer",
        ),
    ] {
        if !path.is_file() {
            return Err(Error::file(
                &path,
                format!("not found: an embedding model directory needs {what} (sentence-transformers layout, docs/scoring.md, \"Semantic similarity\")"),
            ));
        }
    }
    Ok(Layout {
        dir: dir.to_path_buf(),
        encoder_dir,
        pooling,
        normalize,
        max_seq_length,
        lower_case,
        config,
    })
}

/// The pooling mode from either generation of the Pooling config (module doc).
fn pooling_mode(path: &Path, cfg: &Map<String, Value>) -> Result<Pooling> {
    let supported = |name: &str, field: &str| -> Result<Pooling> {
        match name {
            "cls" | "cls_token" => Ok(Pooling::Cls),
            "mean" | "mean_tokens" => Ok(Pooling::Mean),
            other => Err(Error::field(
                path,
                None,
                field,
                format!("pooling mode {other:?} is not supported; liftgate pools by \"cls\" or \"mean\""),
            )),
        }
    };
    if let Some(mode) = cfg.get("pooling_mode") {
        let name = mode.as_str().ok_or_else(|| {
            Error::field(
                path,
                None,
                "pooling_mode",
                format!("must be a string, found {mode}"),
            )
        })?;
        return supported(name, "pooling_mode");
    }
    let mut on = Vec::new();
    for (key, v) in cfg {
        let Some(mode) = key.strip_prefix("pooling_mode_") else {
            continue;
        };
        match v {
            Value::Bool(true) => on.push((mode.to_string(), key.clone())),
            Value::Bool(false) => {}
            other => {
                return Err(Error::field(
                    path,
                    None,
                    key.as_str(),
                    format!("must be true or false, found {other}"),
                ))
            }
        }
    }
    match on.as_slice() {
        [(mode, key)] => supported(mode, key),
        [] => Err(Error::field(
            path,
            None,
            "pooling_mode_mean_tokens",
            "no pooling mode is set (expected pooling_mode_mean_tokens or pooling_mode_cls_token true, or \"pooling_mode\": \"mean\")",
        )),
        several => Err(Error::field(
            path,
            None,
            several[1].1.as_str(),
            format!(
                "several pooling modes are set ({}); liftgate pools by exactly one, \"cls\" or \"mean\"",
                several.iter().map(|(m, _)| m.as_str()).collect::<Vec<_>>().join(", ")
            ),
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    fn mode(v: Value) -> Result<Pooling> {
        let Value::Object(m) = v else { unreachable!() };
        pooling_mode(Path::new("p.json"), &m)
    }

    #[test]
    fn pooling_modes_of_both_generations() {
        assert_eq!(
            mode(json!({"pooling_mode": "mean"})).unwrap(),
            Pooling::Mean
        );
        assert_eq!(mode(json!({"pooling_mode": "cls"})).unwrap(), Pooling::Cls);
        assert_eq!(
            mode(json!({"pooling_mode_cls_token": false, "pooling_mode_mean_tokens": true}))
                .unwrap(),
            Pooling::Mean
        );
        assert_eq!(
            mode(json!({"pooling_mode_cls_token": true, "pooling_mode_max_tokens": false}))
                .unwrap(),
            Pooling::Cls
        );
    }

    #[test]
    fn other_pooling_modes_are_refused_by_name() {
        let e = mode(json!({"pooling_mode": "max"}))
            .unwrap_err()
            .to_string();
        assert!(e.contains("pooling_mode") && e.contains("\"max\""), "{e}");
        let e = mode(json!({"pooling_mode_max_tokens": true}))
            .unwrap_err()
            .to_string();
        assert!(e.contains("pooling_mode_max_tokens"), "{e}");
        let e = mode(json!({"pooling_mode_cls_token": true, "pooling_mode_mean_tokens": true}))
            .unwrap_err()
            .to_string();
        assert!(e.contains("several"), "{e}");
        assert!(mode(json!({})).is_err());
    }
}
