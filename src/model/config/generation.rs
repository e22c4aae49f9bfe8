//! `generation_config.json`: the stop ids, the pad id and the logits processors transformers
//! applies under greedy decoding (docs/model-formats.md §1.4, §3.2).

use super::json::Cfg;
use super::spec::ModelSpec;
use crate::error::{Error, Result};
use serde_json::Value;
use std::path::Path;

/// Generation defaults (docs/model-formats.md §1.4).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct GenerationDefaults {
    /// Stop ids; empty means no EOS stop.
    pub eos: Vec<u32>,
    /// generation_config pad id, else eos[0] (docs/model-formats.md §3.2 step 4).
    pub pad: Option<u32>,
    /// Whether generation_config.json existed.
    pub from_generation_config: bool,
    /// generation_config.json `repetition_penalty`; it applies under greedy decoding too
    /// (docs/model-formats.md §3.2). None or 1.0: no penalty.
    pub repetition_penalty: Option<f64>,
    /// generation_config.json keys that transformers would still apply under greedy decoding
    /// but liftgate does not implement (reported, not silently dropped).
    pub unsupported_keys: Vec<String>,
}

/// Logits processors transformers applies even with do_sample=False (docs/model-formats.md §3.2).
const UNSUPPORTED_PROCESSOR_KEYS: [&str; 9] = [
    "no_repeat_ngram_size",
    "min_length",
    "min_new_tokens",
    "suppress_tokens",
    "begin_suppress_tokens",
    "bad_words_ids",
    "forced_bos_token_id",
    "forced_eos_token_id",
    "sequence_bias",
];

impl GenerationDefaults {
    /// If `<dir>/generation_config.json` exists only it is used; otherwise config.json's ids.
    pub fn load(dir: &Path, spec: &ModelSpec) -> Result<Self> {
        let path = dir.join("generation_config.json");
        if !path.exists() {
            let pad = spec.config_pad.or_else(|| spec.config_eos.first().copied());
            return Ok(GenerationDefaults {
                eos: spec.config_eos.clone(),
                pad,
                from_generation_config: false,
                repetition_penalty: None,
                unsupported_keys: Vec::new(),
            });
        }
        let text = std::fs::read_to_string(&path)
            .map_err(|e| Error::file(&path, format!("cannot read: {e}")))?;
        let value: Value = serde_json::from_str(&text)
            .map_err(|e| Error::line(&path, e.line(), format!("not valid JSON: {e}")))?;
        let obj = value
            .as_object()
            .ok_or_else(|| Error::file(&path, "expected a JSON object"))?;
        let c = Cfg { path: &path, obj };
        let eos = c.token_ids("eos_token_id")?;
        let pad = c
            .token_ids("pad_token_id")?
            .first()
            .copied()
            .or_else(|| eos.first().copied());
        let repetition_penalty = c.opt_f64("repetition_penalty")?;
        if repetition_penalty.is_some_and(|p| p <= 0.0 || !p.is_finite()) {
            return Err(Error::field(
                &path,
                None,
                "repetition_penalty",
                "must be a positive number",
            ));
        }
        Ok(GenerationDefaults {
            eos,
            pad,
            from_generation_config: true,
            repetition_penalty: repetition_penalty.filter(|&p| p != 1.0),
            unsupported_keys: UNSUPPORTED_PROCESSOR_KEYS
                .iter()
                .filter(|k| match obj.get(**k) {
                    None | Some(Value::Null) => false,
                    Some(Value::Number(n)) => n.as_f64() != Some(0.0),
                    Some(Value::Array(a)) => !a.is_empty(),
                    Some(Value::Object(o)) => !o.is_empty(),
                    Some(_) => true,
                })
                .map(|k| k.to_string())
                .collect(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::config::spec::tests::{base, spec, with};
    use serde_json::json;

    #[test]
    fn generation_config_wins_when_present() {
        let dir = tempfile::tempdir().unwrap();
        let s = spec(with(base("llama"), "eos_token_id", json!([2, 3]))).unwrap();
        let g = GenerationDefaults::load(dir.path(), &s).unwrap();
        assert_eq!(g.eos, vec![2, 3]);
        std::fs::write(
            dir.path().join("generation_config.json"),
            "{\"bos_token_id\": 1}",
        )
        .unwrap();
        let g = GenerationDefaults::load(dir.path(), &s).unwrap();
        assert!(g.eos.is_empty());
        std::fs::write(
            dir.path().join("generation_config.json"),
            "{\"eos_token_id\": 7}",
        )
        .unwrap();
        assert_eq!(
            GenerationDefaults::load(dir.path(), &s).unwrap().eos,
            vec![7]
        );
        std::fs::write(
            dir.path().join("generation_config.json"),
            r#"{"repetition_penalty": 1.05, "no_repeat_ngram_size": 3, "suppress_tokens": []}"#,
        )
        .unwrap();
        let g = GenerationDefaults::load(dir.path(), &s).unwrap();
        assert_eq!(g.repetition_penalty, Some(1.05));
        assert_eq!(g.unsupported_keys, vec!["no_repeat_ngram_size".to_string()]);
    }
}
