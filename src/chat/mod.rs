//! Tokenizer and chat template of a Hugging Face model directory (docs/model-formats.md §3.4–§4).
//!
//! [`ChatTokenizer::load`] reads, as transformers 5 does (docs/model-formats.md §1.1, §3.4, §3.5):
//! - `tokenizer.json`: the whole `tokenizers` pipeline (required);
//! - `tokenizer_config.json`: special-token strings, `chat_template`, `pad_token`,
//!   `clean_up_tokenization_spaces` (optional);
//! - `chat_template.jinja`: the v5 template file, which wins over `tokenizer_config.json`'s
//!   `chat_template`;
//! - `special_tokens_map.json`: legacy, read only when `tokenizer_config.json` has no
//!   `added_tokens_decoder`; its entries then override the config's.
//!
//! The prompt for a question is the template rendered with `messages = [system?, user]` and
//! `add_generation_prompt = true`, then tokenised **without** adding special tokens again
//! (`apply_chat_template(tokenize=True)` semantics), so a template that prints `{{ bos_token }}`
//! yields exactly one BOS.
//!
//! # Plain fallback (no chat template)
//! When the directory has no chat template, the prompt is
//!
//! ```text
//! {system}\n\nQuestion: {question}\nAnswer:
//! ```
//!
//! where the `{system}\n\n` part appears only when a system text is given. Because no template
//! placed a BOS or other markers, this text is tokenised **with** the tokenizer's
//! post-processor special tokens (`add_special_tokens = true`), as a plain `tokenizer(text)` call
//! would; a Llama-style tokenizer thus gets its BOS.
//!
//! # Known limits
//! - For tokenizer classes that transformers 5 rebuilds from vocab and merges
//!   (`LlamaTokenizer` with model_type llama, `GemmaTokenizer`, `Qwen2Tokenizer`), token ids can
//!   differ from `tokenizer.json` right after special tokens (docs/model-formats.md §3.4); liftgate
//!   always uses `tokenizer.json` as written.
//! - `strftime_now` formats the current UTC time (transformers uses local time); a template that
//!   calls it renders a different prompt every day.

pub mod gguf;
mod pyfmt;
pub use pyfmt::py_strip;
pub mod strftime;
pub mod template;

use crate::error::{Error, Result};
use minijinja::value::Value;
use serde_json::{Map, Value as Json};
use std::path::{Path, PathBuf};
use template::{ChatTemplate, RenderError};
use tokenizers::models::ModelWrapper;
use tokenizers::Tokenizer;

/// Name hashed for [`ChatTokenizer::template_fingerprint`] when the plain fallback is used.
pub const PLAIN_FALLBACK_NAME: &str =
    "liftgate plain fallback v1: {system}\\n\\nQuestion: {question}\\nAnswer:";

/// The standard special-token attributes transformers passes to templates
/// (`SPECIAL_TOKENS_ATTRIBUTES` in `tokenization_utils_base.py`).
const STANDARD_SPECIAL_TOKENS: [&str; 7] = [
    "bos_token",
    "eos_token",
    "unk_token",
    "sep_token",
    "pad_token",
    "cls_token",
    "mask_token",
];

/// Where the template came from, for error messages.
#[derive(Debug, Clone)]
struct TemplateOrigin {
    file: PathBuf,
    /// `Some("chat_template")` when read from tokenizer_config.json.
    field: Option<String>,
}

#[derive(Debug)]
struct LoadedTemplate {
    source: String,
    origin: TemplateOrigin,
    compiled: ChatTemplate,
}

/// A model directory's tokenizer plus chat template, ready to build prompts and decode answers.
#[derive(Debug)]
pub struct ChatTokenizer {
    tokenizer: Tokenizer,
    tokenizer_path: PathBuf,
    template: Option<LoadedTemplate>,
    /// Special-token variables passed to the template, in transformers' order.
    special_tokens: Vec<(String, String)>,
    pad_token: Option<String>,
    /// Apply transformers' `clean_up_tokenization` after decoding.
    clean_up: bool,
}

fn read_json(path: &Path) -> Result<Option<Json>> {
    let text = match std::fs::read_to_string(path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(Error::file(path, format!("cannot read: {e}"))),
    };
    serde_json::from_str(&text)
        .map(Some)
        .map_err(|e| Error::line(path, e.line(), format!("invalid JSON: {e}")))
}

/// A special token as tokenizer_config.json stores it: a string, or an AddedToken dict with
/// `content`.
fn token_string(value: &Json) -> Option<String> {
    match value {
        Json::String(s) => Some(s.clone()),
        Json::Object(map) => map
            .get("content")
            .and_then(Json::as_str)
            .map(str::to_string),
        _ => None,
    }
}

/// Picks the template out of tokenizer_config.json's `chat_template`: a string, a list of
/// `{name, template}` (older files) or a dict of named templates; named ones use "default".
fn select_template(path: &Path, value: &Json) -> Result<Option<String>> {
    let bad = |msg: &str| Error::field(path, None, "chat_template", msg.to_string());
    match value {
        Json::Null => Ok(None),
        Json::String(s) => Ok(Some(s.clone())),
        Json::Array(items) => {
            for item in items {
                let name = item.get("name").and_then(Json::as_str);
                if name == Some("default") {
                    return item
                        .get("template")
                        .and_then(Json::as_str)
                        .map(|s| Some(s.to_string()))
                        .ok_or_else(|| bad("the \"default\" entry has no string \"template\""));
                }
            }
            Err(bad("a list of named templates needs one named \"default\""))
        }
        Json::Object(map) => match map.get("default") {
            Some(Json::String(s)) => Ok(Some(s.clone())),
            _ => Err(bad(
                "a dict of named templates needs a string entry \"default\"",
            )),
        },
        _ => Err(bad(
            "expected a string, a list of {name, template} or a dict of named templates",
        )),
    }
}

/// transformers' `clean_up_tokenization` (`tokenization_utils_base.py`).
fn clean_up_tokenization(text: &str) -> String {
    text.replace(" .", ".")
        .replace(" ?", "?")
        .replace(" !", "!")
        .replace(" ,", ",")
        .replace(" ' ", "'")
        .replace(" n't", "n't")
        .replace(" 'm", "'m")
        .replace(" 's", "'s")
        .replace(" 've", "'ve")
        .replace(" 're", "'re")
}

impl ChatTokenizer {
    /// Loads tokenizer.json, tokenizer_config.json, chat_template.jinja (v5 file wins over
    /// tokenizer_config's chat_template; special_tokens_map.json only as legacy fallback), from a
    /// HF model directory. Errors name the file and field.
    pub fn load(model_dir: &Path) -> Result<Self> {
        let tokenizer_path = model_dir.join("tokenizer.json");
        if !tokenizer_path.is_file() {
            return Err(Error::file(
                &tokenizer_path,
                "not found: the model directory needs a tokenizer.json (the `tokenizers` pipeline saved by save_pretrained)",
            ));
        }
        let tokenizer = Tokenizer::from_file(&tokenizer_path)
            .map_err(|e| Error::file(&tokenizer_path, format!("cannot load tokenizer: {e}")))?;

        let config_path = model_dir.join("tokenizer_config.json");
        let config = match read_json(&config_path)? {
            None => Map::new(),
            Some(Json::Object(m)) => m,
            Some(_) => return Err(Error::file(&config_path, "expected a JSON object")),
        };

        // Special tokens: the config's, then (legacy) special_tokens_map.json over them.
        let mut entries: Vec<(String, Json)> =
            config.iter().map(|(k, v)| (k.clone(), v.clone())).collect();
        if !config.contains_key("added_tokens_decoder") {
            let map_path = model_dir.join("special_tokens_map.json");
            match read_json(&map_path)? {
                None => {}
                Some(Json::Object(m)) => {
                    for (k, v) in m {
                        match entries.iter_mut().find(|(key, _)| *key == k) {
                            Some(slot) => slot.1 = v,
                            None => entries.push((k, v)),
                        }
                    }
                }
                Some(_) => return Err(Error::file(&map_path, "expected a JSON object")),
            }
        }
        let special_tokens = collect_special_tokens(&entries);
        let pad_token = special_tokens
            .iter()
            .find(|(k, _)| k == "pad_token")
            .map(|(_, v)| v.clone());

        // Decode clean-up (v5): ignored for BPE models unless explicitly forced.
        let wants_clean_up = config
            .get("clean_up_tokenization_spaces")
            .and_then(Json::as_bool)
            .unwrap_or(false);
        let force_bpe = config
            .get("clean_up_tokenization_spaces_for_bpe_even_though_it_will_corrupt_output")
            .and_then(Json::as_bool)
            .unwrap_or(false);
        let is_bpe = matches!(tokenizer.get_model(), ModelWrapper::BPE(_));
        let clean_up = wants_clean_up && (!is_bpe || force_bpe);

        // Template: chat_template.jinja first, then tokenizer_config.json's chat_template.
        let jinja_path = model_dir.join("chat_template.jinja");
        let found = match std::fs::read_to_string(&jinja_path) {
            Ok(source) => Some((
                source,
                TemplateOrigin {
                    file: jinja_path.clone(),
                    field: None,
                },
            )),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => match config.get("chat_template")
            {
                Some(v) => select_template(&config_path, v)?.map(|s| {
                    (
                        s,
                        TemplateOrigin {
                            file: config_path.clone(),
                            field: Some("chat_template".into()),
                        },
                    )
                }),
                None => None,
            },
            Err(e) => return Err(Error::file(&jinja_path, format!("cannot read: {e}"))),
        };
        let template = match found {
            None => None,
            Some((source, origin)) => {
                let compiled =
                    ChatTemplate::compile(&source).map_err(|e| template_error(&origin, &e))?;
                Some(LoadedTemplate {
                    source,
                    origin,
                    compiled,
                })
            }
        };

        Ok(ChatTokenizer {
            tokenizer,
            tokenizer_path,
            template,
            special_tokens,
            pad_token,
            clean_up,
        })
    }

    /// Replaces the chat template with `source`, as if it had been read from `origin` (the file
    /// errors will name). For an explicitly chosen template file and for tests.
    pub fn with_template(mut self, source: &str, origin: &Path) -> Result<Self> {
        let origin = TemplateOrigin {
            file: origin.to_path_buf(),
            field: None,
        };
        let compiled = ChatTemplate::compile(source).map_err(|e| template_error(&origin, &e))?;
        self.template = Some(LoadedTemplate {
            source: source.to_string(),
            origin,
            compiled,
        });
        Ok(self)
    }

    /// Renders the template for an arbitrary conversation of `(role, content)` pairs.
    pub fn render_messages(
        &self,
        messages: &[(&str, &str)],
        add_generation_prompt: bool,
    ) -> Result<String> {
        let Some(t) = &self.template else {
            return Err(Error::internal(
                "render_messages called without a chat template",
            ));
        };
        let mut ctx = Map::new();
        for (k, v) in &self.special_tokens {
            ctx.insert(k.clone(), Json::String(v.clone()));
        }
        let msgs: Vec<Json> = messages
            .iter()
            .map(|(role, content)| serde_json::json!({"role": role, "content": content}))
            .collect();
        ctx.insert("messages".into(), Json::Array(msgs));
        ctx.insert("tools".into(), Json::Null);
        ctx.insert("documents".into(), Json::Null);
        ctx.insert(
            "add_generation_prompt".into(),
            Json::Bool(add_generation_prompt),
        );
        t.compiled
            .render(Value::from(minijinja::value::Serde(Json::Object(ctx))))
            .map_err(|e| template_error(&t.origin, &e))
    }

    /// The prompt text for one question: messages = [system?] + [user], add_generation_prompt = true.
    pub fn render_prompt(&self, system: Option<&str>, question: &str) -> Result<String> {
        if self.template.is_none() {
            return Ok(plain_prompt(system, question));
        }
        let mut messages = Vec::with_capacity(2);
        if let Some(s) = system {
            messages.push(("system", s));
        }
        messages.push(("user", question));
        self.render_messages(&messages, true)
    }

    /// render_prompt, then tokenize WITHOUT adding special tokens again (apply_chat_template
    /// semantics). The plain fallback is tokenised WITH them (see the module docs).
    pub fn encode_prompt(&self, system: Option<&str>, question: &str) -> Result<Vec<u32>> {
        let text = self.render_prompt(system, question)?;
        self.encode(&text, self.template.is_none())
    }

    /// Tokenises `text` with tokenizer.json's pipeline.
    pub fn encode(&self, text: &str, add_special_tokens: bool) -> Result<Vec<u32>> {
        let enc = self
            .tokenizer
            .encode(text, add_special_tokens)
            .map_err(|e| {
                Error::file(
                    &self.tokenizer_path,
                    format!("cannot tokenise the prompt: {e}"),
                )
            })?;
        Ok(enc.get_ids().to_vec())
    }

    /// Decode generated ids, skipping special tokens (added tokens with special=true), as
    /// transformers decode(skip_special_tokens=True) does; the caller trims surrounding
    /// whitespace.
    pub fn decode(&self, ids: &[u32]) -> Result<String> {
        let text = self.tokenizer.decode(ids, true).map_err(|e| {
            Error::internal(format!(
                "decoding with {} failed: {e}",
                self.tokenizer_path.display()
            ))
        })?;
        Ok(if self.clean_up {
            clean_up_tokenization(&text)
        } else {
            text
        })
    }

    /// [`decode`](Self::decode), then Python's `str.strip()` ([`py_strip`]): the answer text as
    /// `tokenizer.decode(ids, skip_special_tokens=True).strip()` gives it. Rust's `str::trim`
    /// differs: it keeps U+001C..U+001F, which Python strips.
    pub fn decode_answer(&self, ids: &[u32]) -> Result<String> {
        Ok(py_strip(&self.decode(ids)?).to_string())
    }

    /// SHA-256 hex of the template source actually used (or of the fallback's name) for run.json.
    ///
    /// It covers the template source, not the rendered prompt: a template that calls
    /// `strftime_now` (see [`template_uses_date`](Self::template_uses_date)) renders a different
    /// prompt every day under the same fingerprint, so fingerprint the prompt ids as well when
    /// that matters.
    pub fn template_fingerprint(&self) -> String {
        match &self.template {
            Some(t) => crate::fsutil::sha256_hex(t.source.as_bytes()),
            None => crate::fsutil::sha256_hex(PLAIN_FALLBACK_NAME.as_bytes()),
        }
    }

    /// Whether the template reads the current date (`strftime_now`), so its prompts change daily.
    pub fn template_uses_date(&self) -> bool {
        self.template
            .as_ref()
            .is_some_and(|t| t.source.contains("strftime_now"))
    }

    /// Whether a chat template was found (false = the documented plain fallback is in use).
    pub fn has_template(&self) -> bool {
        self.template.is_some()
    }

    /// The template source in use, if any.
    pub fn template_source(&self) -> Option<&str> {
        self.template.as_ref().map(|t| t.source.as_str())
    }

    /// Token id for a token string (for eos/pad lookups), if present.
    pub fn token_id(&self, token: &str) -> Option<u32> {
        self.tokenizer.token_to_id(token)
    }

    /// The pad token id if configured (tokenizer_config pad_token), for batching later.
    pub fn pad_token_id(&self) -> Option<u32> {
        self.pad_token.as_deref().and_then(|t| self.token_id(t))
    }

    /// The special-token variables the template sees (`bos_token`, `eos_token`, ...).
    pub fn special_tokens(&self) -> &[(String, String)] {
        &self.special_tokens
    }

    /// The underlying `tokenizers` pipeline.
    pub fn tokenizer(&self) -> &Tokenizer {
        &self.tokenizer
    }
}

/// The documented plain prompt: `"{system}\n\n"` if a system text is given, then
/// `"Question: {question}\nAnswer:"`.
pub fn plain_prompt(system: Option<&str>, question: &str) -> String {
    match system {
        Some(s) => format!("{s}\n\nQuestion: {question}\nAnswer:"),
        None => format!("Question: {question}\nAnswer:"),
    }
}

/// Special-token template variables as transformers builds them: the standard attributes in
/// their fixed order, then every other `*_token` key holding a string (or AddedToken dict), then
/// the named entries of an `extra_special_tokens` dict.
fn collect_special_tokens(entries: &[(String, Json)]) -> Vec<(String, String)> {
    let mut out: Vec<(String, String)> = Vec::new();
    let get = |key: &str| entries.iter().find(|(k, _)| k == key).map(|(_, v)| v);
    for key in STANDARD_SPECIAL_TOKENS {
        if let Some(s) = get(key).and_then(token_string) {
            out.push((key.to_string(), s));
        }
    }
    let mut push = |k: &str, s: String| match out.iter_mut().find(|(key, _)| key == k) {
        Some(slot) => slot.1 = s,
        None => out.push((k.to_string(), s)),
    };
    for (k, v) in entries {
        if k.ends_with("_token") && !STANDARD_SPECIAL_TOKENS.contains(&k.as_str()) {
            if let Some(s) = token_string(v) {
                push(k, s);
            }
        }
    }
    if let Some(Json::Object(extra)) = get("extra_special_tokens") {
        for (k, v) in extra {
            if let Some(s) = token_string(v) {
                push(k, s);
            }
        }
    }
    out
}

/// A template failure as a bad-input error naming the template's file (and field).
fn template_error(origin: &TemplateOrigin, err: &RenderError) -> Error {
    match &origin.field {
        Some(field) => Error::field(&origin.file, None, field.clone(), err.to_string()),
        None => Error::file(&origin.file, err.to_string()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plain_prompt_format() {
        assert_eq!(plain_prompt(None, "Q?"), "Question: Q?\nAnswer:");
        assert_eq!(
            plain_prompt(Some("Be brief."), "Q?"),
            "Be brief.\n\nQuestion: Q?\nAnswer:"
        );
    }

    #[test]
    fn special_tokens_from_strings_dicts_and_extras() {
        let entries: Vec<(String, Json)> = vec![
            (
                "eos_token".into(),
                serde_json::json!({"content": "</s>", "lstrip": false}),
            ),
            ("add_bos_token".into(), Json::Bool(true)),
            ("bos_token".into(), Json::String("<s>".into())),
            ("image_token".into(), Json::String("<img>".into())),
            ("pad_token".into(), Json::Null),
            (
                "extra_special_tokens".into(),
                serde_json::json!({"tool_token": "<tool>"}),
            ),
        ];
        assert_eq!(
            collect_special_tokens(&entries),
            vec![
                ("bos_token".to_string(), "<s>".to_string()),
                ("eos_token".to_string(), "</s>".to_string()),
                ("image_token".to_string(), "<img>".to_string()),
                ("tool_token".to_string(), "<tool>".to_string()),
            ]
        );
    }

    #[test]
    fn template_selection_forms() {
        let p = Path::new("tokenizer_config.json");
        assert_eq!(
            select_template(p, &serde_json::json!("T"))
                .unwrap()
                .as_deref(),
            Some("T")
        );
        let list = serde_json::json!([{"name": "tool_use", "template": "X"}, {"name": "default", "template": "D"}]);
        assert_eq!(select_template(p, &list).unwrap().as_deref(), Some("D"));
        let dict = serde_json::json!({"rag": "R", "default": "D"});
        assert_eq!(select_template(p, &dict).unwrap().as_deref(), Some("D"));
        let err = select_template(p, &serde_json::json!({"rag": "R"})).unwrap_err();
        assert!(err.to_string().contains("chat_template"), "{err}");
    }

    #[test]
    fn clean_up_matches_transformers_replacements() {
        assert_eq!(
            clean_up_tokenization("it 's a test , is n't it ?"),
            "it's a test, isn't it?"
        );
    }
}
