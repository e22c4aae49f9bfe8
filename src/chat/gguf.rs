//! The tokenizer and chat template stored in a GGUF file's metadata, built as transformers
//! 5.24.0 builds them for `AutoTokenizer.from_pretrained(dir, gguf_file=...)`
//! (`transformers/integrations/gguf/gguf_tokenizer_mapping.py`: `get_gguf_tokenizer`,
//! `byte_level_tokenizer`, `add_gguf_special_tokens`, `set_split_regex`; then
//! `TokenizersBackend.__init__` and `update_post_processor` in `tokenization_utils_tokenizers.py`).
//! Rules: docs/model-formats.md §7.4.
//!
//! `tokenizer.ggml.model = "gpt2"` (byte-level BPE), in this order:
//! 1. the vocabulary is `tokenizer.ggml.tokens` by position; a token with a character outside
//!    GPT-2's byte alphabet is respelled as its UTF-8 bytes in that alphabet (a later duplicate
//!    wins, as in a Python dict); the merges are `tokenizer.ggml.merges` split at the space;
//! 2. a BPE model without unknown token, dropout or fused unknowns, the byte-level
//!    pre-tokenizer (GPT-2's expression, no prefix space) and the byte-level decoder
//!    (`GPT2Tokenizer.__init__`), which also adds its default special token `<|endoftext|>`;
//! 3. every token typed 3 (control) whose characters are all in the byte alphabet is added as a
//!    special token; every token typed 4 (user-defined) that is in the vocabulary as a plain
//!    added token, matched whole, not normalised;
//! 4. when `tokenizer.ggml.pre` names an expression in transformers' table
//!    (`GGUF_PRE_TOKENIZER_SPLITS`, [`split_expression`]), the pre-tokenizer becomes that
//!    expression (isolated) followed by the byte-level step without its own expression;
//! 5. the BOS, EOS, unknown and padding tokens are the tokens at `tokenizer.ggml.bos_token_id`,
//!    `eos_token_id`, `unknown_token_id`, `padding_token_id` (absent key: none), added as
//!    special tokens when not yet added; the post-processor puts BOS first when
//!    `tokenizer.ggml.add_bos_token` is true and EOS last when `add_eos_token` is (both false
//!    when absent);
//! 6. the chat template is `tokenizer.chat_template` (none: the plain prompt of the module
//!    above); decoding does no clean-up.
//!
//! `tokenizer.ggml.model = "llama"` (SentencePiece-style BPE, `sentencepiece_tokenizer` and
//! `LlamaTokenizer.__init__`) differs in: the vocabulary as the file spells it; merges from
//! the file, else derived from `tokenizer.ggml.scores` ([`generate_merges`]); a BPE model with
//! byte fallback and fused unknowns; the Metaspace pre-tokenizer (`▁`, prefix on the first
//! piece only, no split) and the decoder `▁`→space, byte fallback, fuse, strip one leading
//! space; default special tokens `<s>`, `</s>`, `<unk>`; every control token added; BOS added
//! when `add_bos_token` is absent.
//!
//! transformers picks the `llama` builder by architecture (`GGUF_SENTENCEPIECE_BUILDERS`):
//! - gemma2 (`gemma_tokenizer`, `GemmaTokenizer.__init__`): whitespace-only tokens with a space
//!   respelled as that many `▁`; merges derived ranked by place in the file, not by score; unknown
//!   token `<unk>`; normalizer space→`▁` (no prefix), pre-tokenizer split at spaces (merged with
//!   the previous), decoder without the strip; defaults `<bos>`, `<eos>`, `<unk>`, `<pad>`,
//!   `<mask>`, and `mask_token` named `<mask>`;
//! - phi3 (`phi3_tokenizer`): LlamaTokenizer with no pre-tokenizer and the normalizer
//!   prepend `▁`, space→`▁`.
//!
//! Refused naming the file, the key and the reason: gemma (1) files (transformers 5.24.0 cannot
//! load them: no reference), gemma3 files (not run by liftgate, not checked), every other kind.
//! transformers' regex patch for large Mistral vocabularies needs a config.json or the Hub and
//! does not apply to a file read alone.

use super::pyfmt::is_py_space;
use super::{collect_special_tokens, ChatTokenizer, LoadedTemplate, TemplateOrigin};
use crate::error::{Error, Result};
use candle_core::quantized::gguf_file::Value;
use serde_json::Value as Json;
use std::collections::{HashMap, HashSet};
use std::path::Path;
use template::ChatTemplate;
use tokenizers::decoders::byte_fallback::ByteFallback;
use tokenizers::decoders::byte_level::ByteLevel as ByteLevelDecoder;
use tokenizers::decoders::fuse::Fuse;
use tokenizers::decoders::sequence::Sequence as DecoderSequence;
use tokenizers::decoders::strip::Strip;
use tokenizers::decoders::DecoderWrapper;
use tokenizers::models::bpe::{Vocab, BPE};
use tokenizers::normalizers::prepend::Prepend;
use tokenizers::normalizers::replace::Replace;
use tokenizers::normalizers::utils::Sequence as NormalizerSequence;
use tokenizers::pre_tokenizers::byte_level::ByteLevel;
use tokenizers::pre_tokenizers::metaspace::{Metaspace, PrependScheme};
use tokenizers::pre_tokenizers::sequence::Sequence;
use tokenizers::pre_tokenizers::split::{Split, SplitPattern};
use tokenizers::processors::template::TemplateProcessing;
use tokenizers::NormalizerWrapper;
use tokenizers::{AddedToken, PreTokenizerWrapper, SplitDelimiterBehavior, Tokenizer};

use super::template;

/// The key that says which kind of tokenizer a file describes.
pub const MODEL_KEY: &str = "tokenizer.ggml.model";

/// `tokenizer.ggml.token_type` values (llama.cpp's `LLAMA_TOKEN_TYPE_*`).
const CONTROL: i64 = 3;
const USER_DEFINED: i64 = 4;

/// The default special token `GPT2Tokenizer.__init__` adds (its unk, bos and eos defaults).
const GPT2_DEFAULT_SPECIAL: &str = "<|endoftext|>";
/// `LlamaTokenizer.__init__`'s defaults, in transformers' order (bos, eos, unk).
const LLAMA_DEFAULT_SPECIALS: [&str; 3] = ["<s>", "</s>", "<unk>"];

/// `GemmaTokenizer.__init__`'s defaults, in transformers' order (bos, eos, unk, pad, mask),
/// and its unknown token, which its BPE model also names.
const GEMMA_DEFAULT_SPECIALS: [&str; 5] = ["<bos>", "<eos>", "<unk>", "<pad>", "<mask>"];
const GEMMA_UNK: &str = "<unk>";
const GEMMA_MASK: &str = "<mask>";

/// The tokenizer a file describes: `tokenizer.ggml.model`, and for `llama` the architecture
/// transformers picks a builder by (`GGUF_SENTENCEPIECE_BUILDERS`).
#[derive(Clone, Copy, PartialEq, Eq, Debug)]
enum Kind {
    /// `gpt2`: `byte_level_tokenizer`, GPT2Tokenizer.
    ByteLevel,
    /// `llama`: `sentencepiece_tokenizer`, LlamaTokenizer.
    Llama,
    /// `llama` in a gemma2 file: `gemma_tokenizer`, GemmaTokenizer.
    Gemma,
    /// `llama` in a phi3 file: `phi3_tokenizer`, LlamaTokenizer with a normalizer for the prefix.
    Phi3,
}

/// Llama 3's expression (`_LLAMA3_SPLIT`).
const LLAMA3_SPLIT: &str = r"(?i:'s|'t|'re|'ve|'m|'ll|'d)|[^\r\n\p{L}\p{N}]?\p{L}+|\p{N}{1,3}| ?[^\s\p{L}\p{N}]+[\r\n]*|\s*[\r\n]+|\s+(?!\S)|\s+";
/// Qwen2's expression (`models/qwen2/tokenization_qwen2.py` `PRETOKENIZE_REGEX`).
const QWEN2_SPLIT: &str = r"(?i:'s|'t|'re|'ve|'m|'ll|'d)|[^\r\n\p{L}\p{N}]?\p{L}+|\p{N}| ?[^\s\p{L}\p{N}]+[\r\n]*|\s*[\r\n]+|\s+(?!\S)|\s+";
/// Mistral's tekken expression (`_TEKKEN_SPLIT`).
const TEKKEN_SPLIT: &str = r"[^\r\n\p{L}\p{N}]?[\p{Lu}\p{Lt}\p{Lm}\p{Lo}\p{M}]*[\p{Ll}\p{Lm}\p{Lo}\p{M}]+|[^\r\n\p{L}\p{N}]?[\p{Lu}\p{Lt}\p{Lm}\p{Lo}\p{M}]+[\p{Ll}\p{Lm}\p{Lo}\p{M}]*|\p{N}| ?[^\s\p{L}\p{N}]+[\r\n/]*|\s*[\r\n]+|\s+(?!\S)|\s+";
/// GPT-4o's expression (`_GPT4O_SPLIT`).
const GPT4O_SPLIT: &str = r"[^\r\n\p{L}\p{N}]?[\p{Lu}\p{Lt}\p{Lm}\p{Lo}\p{M}]*[\p{Ll}\p{Lm}\p{Lo}\p{M}]+(?i:'s|'t|'re|'ve|'m|'ll|'d)?|[^\r\n\p{L}\p{N}]?[\p{Lu}\p{Lt}\p{Lm}\p{Lo}\p{M}]+[\p{Ll}\p{Lm}\p{Lo}\p{M}]*(?i:'s|'t|'re|'ve|'m|'ll|'d)?|\p{N}{1,3}| ?[^\s\p{L}\p{N}]+[\r\n/]*|\s*[\r\n]+|\s+(?!\S)|\s+";

/// transformers' `GGUF_PRE_TOKENIZER_SPLITS`: the split expression for a `tokenizer.ggml.pre`
/// value, None for the byte-level default. Qwen3.5's own expression is not carried.
pub fn split_expression(pre: &str) -> Option<&'static str> {
    Some(match pre {
        "llama3" | "llama-v3" | "llama-bpe" | "falcon3" | "falcon-h1" | "pixtral" | "midm-2.0"
        | "lfm2" | "jina-v5-nano" | "dbrx" | "smaug-bpe" => LLAMA3_SPLIT,
        "tekken" => TEKKEN_SPLIT,
        "qwen2" | "deepseek-r1-qwen" | "kormo" | "f2llmv2" | "megrez" => QWEN2_SPLIT,
        "gpt-4o" | "llama4" | "kanana2" | "talkie" | "minimax-m2" => GPT4O_SPLIT,
        _ => return None,
    })
}

/// GPT-2's byte-to-character table (`bytes_to_unicode` in transformers'
/// `convert_slow_tokenizer.py`; the tokenizers crate keeps its copy private): printable bytes
/// stand for themselves, the others for the characters from U+0100 on, in byte order.
fn bytes_to_unicode() -> [char; 256] {
    let mut table = ['\0'; 256];
    let mut next = 256u32;
    for b in 0..=255u8 {
        let printable = matches!(b, b'!'..=b'~' | 0xA1..=0xAC | 0xAE..=0xFF);
        table[b as usize] = if printable {
            b as char
        } else {
            let c = char::from_u32(next).unwrap_or('\0');
            next += 1;
            c
        };
    }
    table
}

/// Reads the metadata of one file for the builder, naming the file and key in every error.
struct Meta<'a, F: Fn(&str) -> Option<&'a Value>> {
    path: &'a Path,
    get: F,
}

impl<'a, F: Fn(&str) -> Option<&'a Value>> Meta<'a, F> {
    fn bad(&self, key: &str, msg: impl Into<String>) -> Error {
        Error::field(self.path, None, key, msg.into())
    }

    fn string(&self, key: &str) -> Result<Option<&'a str>> {
        match (self.get)(key) {
            None => Ok(None),
            Some(v) => v
                .to_string()
                .map(|s| Some(s.as_str()))
                .map_err(|_| self.bad(key, "expected a string")),
        }
    }

    fn strings(&self, key: &str) -> Result<Option<Vec<&'a str>>> {
        let Some(v) = (self.get)(key) else {
            return Ok(None);
        };
        let items = v
            .to_vec()
            .map_err(|_| self.bad(key, "expected an array of strings"))?;
        items
            .iter()
            .enumerate()
            .map(|(i, x)| {
                x.to_string()
                    .map(String::as_str)
                    .map_err(|_| self.bad(key, format!("item {i} is not a string")))
            })
            .collect::<Result<Vec<_>>>()
            .map(Some)
    }

    fn integer(v: &Value) -> Option<i64> {
        match v {
            Value::U8(x) => Some(*x as i64),
            Value::I8(x) => Some(*x as i64),
            Value::U16(x) => Some(*x as i64),
            Value::I16(x) => Some(*x as i64),
            Value::U32(x) => Some(*x as i64),
            Value::I32(x) => Some(*x as i64),
            Value::U64(x) => i64::try_from(*x).ok(),
            Value::I64(x) => Some(*x),
            _ => None,
        }
    }

    fn integers(&self, key: &str) -> Result<Option<Vec<i64>>> {
        let Some(v) = (self.get)(key) else {
            return Ok(None);
        };
        let items = v
            .to_vec()
            .map_err(|_| self.bad(key, "expected an array of integers"))?;
        items
            .iter()
            .enumerate()
            .map(|(i, x)| {
                Self::integer(x).ok_or_else(|| self.bad(key, format!("item {i} is not an integer")))
            })
            .collect::<Result<Vec<_>>>()
            .map(Some)
    }

    fn floats(&self, key: &str) -> Result<Option<Vec<f64>>> {
        let Some(v) = (self.get)(key) else {
            return Ok(None);
        };
        let items = v
            .to_vec()
            .map_err(|_| self.bad(key, "expected an array of numbers"))?;
        items
            .iter()
            .enumerate()
            .map(|(i, x)| match x {
                Value::F32(f) => Ok(*f as f64),
                Value::F64(f) => Ok(*f),
                other => Self::integer(other)
                    .map(|n| n as f64)
                    .ok_or_else(|| self.bad(key, format!("item {i} is not a number"))),
            })
            .collect::<Result<Vec<_>>>()
            .map(Some)
    }

    fn index(&self, key: &str, len: usize) -> Result<Option<usize>> {
        match (self.get)(key) {
            None => Ok(None),
            Some(v) => match Self::integer(v) {
                Some(i) if i >= 0 && (i as u64) < len as u64 => Ok(Some(i as usize)),
                Some(i) => Err(self.bad(
                    key,
                    format!("token id {i} is outside tokenizer.ggml.tokens ({len} tokens)"),
                )),
                None => Err(self.bad(key, "expected an unsigned integer")),
            },
        }
    }

    fn flag(&self, key: &str) -> Result<Option<bool>> {
        match (self.get)(key) {
            None => Ok(None),
            Some(v) => v
                .to_bool()
                .map(Some)
                .map_err(|_| self.bad(key, "expected a boolean")),
        }
    }
}

/// Builds the tokenizer and chat template a GGUF file describes; `get` looks up its metadata.
/// A file without `tokenizer.ggml.model` is refused naming that key: a directory must then give
/// the tokenizer.
pub fn load<'a>(path: &'a Path, get: impl Fn(&str) -> Option<&'a Value>) -> Result<ChatTokenizer> {
    let meta = Meta { path, get };
    let kind = match meta.string(MODEL_KEY)? {
        Some(k) => k,
        None => {
            return Err(meta.bad(
                MODEL_KEY,
                "missing: the file carries no tokenizer; give the model directory the export was made from (`answer --model DIR`, or a candidate's `model=DIR`) for its tokenizer and chat template",
            ))
        }
    };
    let kind = match kind {
        "gpt2" => Kind::ByteLevel,
        "llama" => {
            let arch = meta.string("general.architecture")?.unwrap_or_default();
            match arch {
                "gemma2" => Kind::Gemma,
                "phi3" => Kind::Phi3,
                "gemma" => {
                    return Err(meta.bad(
                        MODEL_KEY,
                        "`llama` with architecture `gemma` is not supported: transformers 5.24.0 cannot load a gemma (1) GGUF file (\"GGUF model with architecture gemma is not supported yet\"), so there is no reference to build its tokenizer to; give the model directory the export was made from for its tokenizer",
                    ))
                }
                "gemma3" => {
                    return Err(meta.bad(
                        MODEL_KEY,
                        "`llama` with architecture `gemma3` is not supported: liftgate does not run gemma3 models, and their stored tokenizer is not checked against transformers; give the model directory the export was made from for its tokenizer",
                    ))
                }
                _ => Kind::Llama,
            }
        }
        other => {
            return Err(meta.bad(
                MODEL_KEY,
                format!("`{other}` is not supported (supported: gpt2, byte-level BPE; llama, SentencePiece-style BPE); give the model directory the export was made from for its tokenizer"),
            ))
        }
    };
    let byte_level = kind == Kind::ByteLevel;
    let tokens_key = "tokenizer.ggml.tokens";
    let tokens = meta
        .strings(tokens_key)?
        .ok_or_else(|| meta.bad(tokens_key, "missing: a tokenizer needs its token list"))?;
    let types_key = "tokenizer.ggml.token_type";
    let types = meta.integers(types_key)?.unwrap_or_default();
    let merges_key = "tokenizer.ggml.merges";
    let merges = meta.strings(merges_key)?;

    // 1. The vocabulary (in GPT-2's byte alphabet for byte-level files) and the merges.
    let spelling = bytes_to_unicode();
    let alphabet: HashSet<char> = spelling.iter().copied().collect();
    let in_alphabet = |t: &str| t.chars().all(|c| alphabet.contains(&c));
    let mut vocab = Vocab::with_capacity(tokens.len());
    // gemma: a token of spaces (and other whitespace, with at least one space) stored as real
    // spaces is spelled as that many `▁`, as `GemmaTokenizer` looks it up.
    let respelled: Vec<String> = tokens
        .iter()
        .map(|t| match kind {
            Kind::ByteLevel if !in_alphabet(t) => t.bytes().map(|b| spelling[b as usize]).collect(),
            Kind::Gemma if t.contains(' ') && t.chars().all(is_py_space) => {
                "\u{2581}".repeat(t.chars().count())
            }
            _ => t.to_string(),
        })
        .collect();
    for (i, key) in respelled.iter().enumerate() {
        vocab.insert(key.clone(), i as u32);
    }
    let pairs = match (&merges, byte_level) {
        (Some(merges), _) => {
            let mut pairs = Vec::with_capacity(merges.len());
            for (i, m) in merges.iter().enumerate() {
                let parts: Vec<&str> = m.split(' ').collect();
                match parts[..] {
                    [a, b] => pairs.push((a.to_string(), b.to_string())),
                    _ => {
                        return Err(meta.bad(
                            merges_key,
                            format!("merge {i} `{m}` is not two tokens joined by one space"),
                        ))
                    }
                }
            }
            pairs
        }
        (None, true) => {
            return Err(meta.bad(
                merges_key,
                "missing: a gpt2 (byte-level BPE) tokenizer needs its merges",
            ))
        }
        (None, false) if kind == Kind::Gemma => {
            // Ranked by place in the file, not by score (`gemma_tokenizer`: `vocab_scores` is
            // `-index`).
            let respelled: Vec<&str> = respelled.iter().map(String::as_str).collect();
            let places: Vec<f64> = (0..respelled.len()).map(|i| -(i as f64)).collect();
            generate_merges(&vocab, &respelled, &places)
        }
        (None, false) => {
            let scores_key = "tokenizer.ggml.scores";
            let scores = meta.floats(scores_key)?.ok_or_else(|| {
                meta.bad(
                    scores_key,
                    "missing: a llama tokenizer without merges needs the scores to derive them",
                )
            })?;
            generate_merges(&vocab, &tokens, &scores)
        }
    };

    // 2. The model, pre-tokenizer and decoder of GPT2Tokenizer (byte-level) or LlamaTokenizer
    //    (SentencePiece-style: byte fallback, Metaspace with the prefix on the first piece
    //    only, the decoder that undoes both), and the class's default special tokens.
    let builder = match kind {
        Kind::ByteLevel => BPE::builder()
            .continuing_subword_prefix(String::new())
            .end_of_word_suffix(String::new())
            .fuse_unk(false)
            .byte_fallback(false),
        Kind::Gemma => BPE::builder()
            .fuse_unk(true)
            .byte_fallback(true)
            .unk_token(GEMMA_UNK.to_string()),
        Kind::Llama | Kind::Phi3 => BPE::builder().fuse_unk(true).byte_fallback(true),
    };
    let bpe = builder
        .vocab_and_merges(vocab.clone(), pairs)
        .build()
        .map_err(|e| meta.bad(merges_key, format!("cannot build the BPE model: {e}")))?;
    let mut tokenizer = Tokenizer::new(bpe);
    let replace = |from: &str, to: &str| {
        Replace::new(from, to).map_err(|e| Error::internal(format!("replace {from:?}: {e}")))
    };
    // `▁` back to spaces, byte pieces to bytes, joined; LlamaTokenizer (prefix space on) also
    // strips the one space its prefix put first.
    let spm_decoder = |strip: bool| -> Result<DecoderWrapper> {
        let mut steps = vec![
            DecoderWrapper::Replace(replace("\u{2581}", " ")?),
            DecoderWrapper::ByteFallback(ByteFallback::new()),
            DecoderWrapper::Fuse(Fuse::new()),
        ];
        if strip {
            steps.push(DecoderWrapper::Strip(Strip::new(' ', 1, 0)));
        }
        Ok(DecoderSequence::new(steps).into())
    };
    let defaults: &[&str] = match kind {
        Kind::ByteLevel => {
            tokenizer.with_pre_tokenizer(Some(ByteLevel::new(false, true, true)));
            tokenizer.with_decoder(Some(ByteLevelDecoder::default()));
            &[GPT2_DEFAULT_SPECIAL]
        }
        Kind::Llama => {
            tokenizer.with_pre_tokenizer(Some(Metaspace::new(
                '\u{2581}',
                PrependScheme::First,
                false,
            )));
            tokenizer.with_decoder(Some(spm_decoder(true)?));
            &LLAMA_DEFAULT_SPECIALS
        }
        Kind::Phi3 => {
            // `phi3_tokenizer`: no pre-tokenizer; the normalizer puts `▁` before every piece
            // of text between added tokens and spells spaces as `▁`.
            tokenizer
                .with_normalizer(Some(NormalizerSequence::new(vec![
                    NormalizerWrapper::Prepend(Prepend::new("\u{2581}".to_string())),
                    NormalizerWrapper::Replace(replace(" ", "\u{2581}")?),
                ])))
                .map_err(|e| Error::internal(format!("phi3 normalizer: {e}")))?;
            tokenizer.with_decoder(Some(spm_decoder(true)?));
            &LLAMA_DEFAULT_SPECIALS
        }
        Kind::Gemma => {
            // `GemmaTokenizer.__init__`: spaces spelled `▁`, no prefix; the split at spaces
            // after it finds none and is kept for exactness.
            tokenizer
                .with_normalizer(Some(replace(" ", "\u{2581}")?))
                .map_err(|e| Error::internal(format!("gemma normalizer: {e}")))?;
            tokenizer.with_pre_tokenizer(Some(
                Split::new(
                    SplitPattern::String(" ".to_string()),
                    SplitDelimiterBehavior::MergedWithPrevious,
                    false,
                )
                .map_err(|e| Error::internal(format!("gemma split: {e}")))?,
            ));
            tokenizer.with_decoder(Some(spm_decoder(false)?));
            &GEMMA_DEFAULT_SPECIALS
        }
    };
    let checked = |r: tokenizers::Result<usize>| {
        r.map_err(|e| Error::file(path, format!("cannot add the special tokens: {e}")))
    };
    let mut seen: Vec<&str> = Vec::new();
    for t in defaults {
        if !seen.contains(t) {
            seen.push(t);
        }
    }
    checked(tokenizer.add_special_tokens(seen.iter().map(|t| special(t))))?;

    // 3. Control tokens as special tokens, user-defined ones as plain added tokens.
    let typed = |want: i64| {
        tokens
            .iter()
            .zip(types.iter())
            .filter(move |(_, &ty)| ty == want)
            .map(|(t, _)| *t)
    };
    let control: Vec<AddedToken> = typed(CONTROL)
        .filter(|t| !byte_level || in_alphabet(t))
        .map(special)
        .collect();
    if !control.is_empty() {
        checked(tokenizer.add_special_tokens(control))?;
    }
    let user: Vec<AddedToken> = typed(USER_DEFINED)
        .filter(|t| vocab.contains_key(*t))
        .map(|t| AddedToken::from(t, false).normalized(false))
        .collect();
    if !user.is_empty() {
        checked(tokenizer.add_tokens(user))?;
    }

    // 4. The split expression the vocabulary's merges were learned with.
    if let Some(pre) = meta.string("tokenizer.ggml.pre")? {
        if let Some(expr) = split_expression(pre) {
            let split = Split::new(
                SplitPattern::Regex(expr.to_string()),
                SplitDelimiterBehavior::Isolated,
                false,
            )
            .map_err(|e| Error::internal(format!("split expression for `{pre}`: {e}")))?;
            tokenizer.with_pre_tokenizer(Some(Sequence::new(vec![
                PreTokenizerWrapper::Split(split),
                PreTokenizerWrapper::ByteLevel(ByteLevel::new(false, true, false)),
            ])));
        }
    }

    // 5. Named special tokens and the post-processor.
    let n = tokens.len();
    let mut named: Vec<(String, Json)> = Vec::new();
    for (name, key) in [
        ("bos_token", "tokenizer.ggml.bos_token_id"),
        ("eos_token", "tokenizer.ggml.eos_token_id"),
        ("unk_token", "tokenizer.ggml.unknown_token_id"),
        ("pad_token", "tokenizer.ggml.padding_token_id"),
    ] {
        if let Some(i) = meta.index(key, n)? {
            named.push((name.to_string(), Json::String(tokens[i].to_string())));
        }
    }
    if kind == Kind::Gemma {
        // The outer `GemmaTokenizer`'s own default: the file names no mask token.
        named.push((
            "mask_token".to_string(),
            Json::String(GEMMA_MASK.to_string()),
        ));
    }
    let special_tokens = collect_special_tokens(&named);
    let added: HashSet<String> = tokenizer
        .get_added_tokens_decoder()
        .values()
        .map(|t| t.content.clone())
        .collect();
    let missing: Vec<AddedToken> = special_tokens
        .iter()
        .filter(|(_, t)| !added.contains(t))
        .map(|(_, t)| special(t))
        .collect();
    if !missing.is_empty() {
        checked(tokenizer.add_special_tokens(missing))?;
    }
    let token = |name: &str| {
        special_tokens
            .iter()
            .find(|(k, _)| k == name)
            .map(|(_, v)| v.clone())
    };
    // A SentencePiece-style file without the key gets BOS (llama.cpp's default, as
    // transformers' `get_gguf_tokenizer` sets it).
    let add_bos = meta
        .flag("tokenizer.ggml.add_bos_token")?
        .unwrap_or(!byte_level);
    let add_eos = meta.flag("tokenizer.ggml.add_eos_token")?.unwrap_or(false);
    let bos = token("bos_token").filter(|_| add_bos);
    let eos = token("eos_token").filter(|_| add_eos);
    let processor = post_processor(&tokenizer, bos.as_deref(), eos.as_deref())?;
    tokenizer.with_post_processor(Some(processor));

    // 6. The template.
    let template_key = "tokenizer.chat_template";
    let template = match meta.string(template_key)? {
        None => None,
        Some(source) => {
            let origin = TemplateOrigin {
                file: path.to_path_buf(),
                field: Some(template_key.to_string()),
            };
            let compiled =
                ChatTemplate::compile(source).map_err(|e| super::template_error(&origin, &e))?;
            Some(LoadedTemplate {
                source: source.to_string(),
                origin,
                compiled,
            })
        }
    };
    let pad_token = token("pad_token");
    Ok(ChatTokenizer {
        tokenizer,
        tokenizer_path: path.to_path_buf(),
        template,
        special_tokens,
        pad_token,
        clean_up: false,
    })
}

/// transformers' `generate_merges(vocab, vocab_scores)` (`tokenization_utils_base.py`) for a
/// file without merges: every split of every token (at character boundaries) into two tokens
/// of the vocabulary is a merge ranked by the whole token's score, highest first, then by the
/// lengths of the halves (longer first); splits of one token are ordered by the halves' ids,
/// and ties keep that order (Python's sort is stable, also in reverse). `scores` pair with
/// `tokens` by position; a repeated token keeps its first place and its last score, as a Python
/// dict built from the pairs does.
fn generate_merges(vocab: &Vocab, tokens: &[&str], scores: &[f64]) -> Vec<(String, String)> {
    let mut order: Vec<(&str, f64)> = Vec::with_capacity(tokens.len());
    let mut place: HashMap<&str, usize> = HashMap::with_capacity(tokens.len());
    for (t, &score) in tokens.iter().zip(scores) {
        match place.get(t) {
            Some(&i) => order[i].1 = score,
            None => {
                place.insert(t, order.len());
                order.push((t, score));
            }
        }
    }
    let mut merges: Vec<(&str, &str, f64)> = Vec::new();
    for (token, score) in order {
        let mut local: Vec<(&str, &str, f64)> = token
            .char_indices()
            .skip(1)
            .map(|(at, _)| token.split_at(at))
            .filter(|(l, r)| vocab.contains_key(*l) && vocab.contains_key(*r))
            .map(|(l, r)| (l, r, score))
            .collect();
        local.sort_by_key(|(l, r, _)| (vocab[*l], vocab[*r]));
        merges.extend(local);
    }
    let key = |m: &(&str, &str, f64)| (m.2, m.0.chars().count(), m.1.chars().count());
    merges.sort_by(|a, b| {
        let (ka, kb) = (key(a), key(b));
        kb.0.partial_cmp(&ka.0)
            .unwrap_or(std::cmp::Ordering::Equal)
            .then(kb.1.cmp(&ka.1))
            .then(kb.2.cmp(&ka.2))
    });
    merges
        .into_iter()
        .map(|(l, r, _)| (l.to_string(), r.to_string()))
        .collect()
}

/// A special added token as transformers adds it (`AddedToken(t, special=True)`: not
/// normalised).
fn special(t: &str) -> AddedToken {
    AddedToken::from(t, true).normalized(false)
}

/// `update_post_processor`: `bos:0 $A:0 eos:0` for one sequence (`bos` and `eos` only when they
/// are to be added), the pair the same with type id 1.
fn post_processor(
    tokenizer: &Tokenizer,
    bos: Option<&str>,
    eos: Option<&str>,
) -> Result<TemplateProcessing> {
    let id = |t: &str| {
        tokenizer
            .token_to_id(t)
            .ok_or_else(|| Error::internal(format!("special token {t} has no id")))
    };
    let part = |t: Option<&str>, ty: u8| t.map(|t| format!("{t}:{ty}"));
    let join =
        |items: Vec<Option<String>>| items.into_iter().flatten().collect::<Vec<_>>().join(" ");
    let single = join(vec![part(bos, 0), Some("$A:0".to_string()), part(eos, 0)]);
    let pair = join(vec![
        Some(single.clone()),
        part(bos, 1),
        Some("$B:1".to_string()),
        part(eos, 1),
    ]);
    let mut specials: Vec<(String, u32)> = Vec::new();
    for t in [bos, eos].into_iter().flatten() {
        if !specials.iter().any(|(s, _)| s == t) {
            specials.push((t.to_string(), id(t)?));
        }
    }
    TemplateProcessing::builder()
        .try_single(single.as_str())
        .and_then(|b| b.try_pair(pair.as_str()))
        .map_err(|e| Error::internal(format!("post-processor template: {e}")))?
        .special_tokens(specials)
        .build()
        .map_err(|e| Error::internal(format!("post-processor: {e}")))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_byte_table_is_gpt2s() {
        // bytes_to_unicode: 188 printable bytes map to themselves, space (0x20) to U+0120 'Ġ',
        // newline (0x0A) to U+010A 'Ċ' [transformers convert_slow_tokenizer.py].
        let t = bytes_to_unicode();
        assert_eq!(t[b' ' as usize], 'Ġ');
        assert_eq!(t[b'\n' as usize], 'Ċ');
        assert_eq!(t[b'a' as usize], 'a');
        assert_eq!(t[0xAD], 'Ń');
        let distinct: HashSet<char> = t.iter().copied().collect();
        assert_eq!(distinct.len(), 256);
    }

    #[test]
    fn pre_names_pick_transformers_expressions() {
        assert_eq!(split_expression("qwen2"), Some(QWEN2_SPLIT));
        assert_eq!(split_expression("llama-bpe"), Some(LLAMA3_SPLIT));
        assert_eq!(split_expression("smollm"), None);
        assert_eq!(split_expression("gpt-2"), None);
    }

    #[test]
    fn merges_derived_from_scores_follow_transformers() {
        // Expected lists: transformers 5.24.0 `generate_merges` on the same vocabulary and
        // scores (a repeated token keeps its first place and its last score).
        let derive = |toks: &[&str], scores: &[f64]| {
            let mut vocab = Vocab::new();
            for (i, t) in toks.iter().enumerate() {
                vocab.insert(t.to_string(), i as u32);
            }
            generate_merges(&vocab, toks, scores)
        };
        let pairs = |v: &[(&str, &str)]| -> Vec<(String, String)> {
            v.iter()
                .map(|(a, b)| (a.to_string(), b.to_string()))
                .collect()
        };
        assert_eq!(
            derive(
                &["a", "b", "ab", "c", "bc", "abc", "x", "x"],
                &[0.0, 0.0, -1.0, 0.0, -1.0, -2.0, -3.0, -0.5]
            ),
            pairs(&[("a", "b"), ("b", "c"), ("ab", "c"), ("a", "bc")])
        );
        assert_eq!(
            derive(&["é", "e", "ée", "eé", "éé"], &[0.0, 0.0, -1.0, -1.0, -1.0]),
            pairs(&[("é", "e"), ("e", "é"), ("é", "é")])
        );
    }

    fn text(s: &str) -> Value {
        Value::String(s.to_string())
    }

    #[test]
    fn a_missing_or_unsupported_kind_names_the_file_and_key() {
        let path = Path::new("m.gguf");
        let empty: HashMap<String, Value> = HashMap::new();
        let err = load(path, |k| empty.get(k)).unwrap_err().to_string();
        assert!(
            err.contains("m.gguf") && err.contains("tokenizer.ggml.model"),
            "{err}"
        );
        let mut m = HashMap::new();
        m.insert(MODEL_KEY.to_string(), text("bert"));
        let err = load(path, |k| m.get(k)).unwrap_err().to_string();
        assert!(err.contains("`bert` is not supported"), "{err}");
        // SentencePiece-style files of the architectures transformers cannot load (gemma) or
        // that liftgate does not check (gemma3) are refused by name with the reason.
        m.insert(MODEL_KEY.to_string(), text("llama"));
        for (arch, why) in [("gemma", "cannot load"), ("gemma3", "not checked")] {
            m.insert("general.architecture".to_string(), text(arch));
            let err = load(path, |k| m.get(k)).unwrap_err().to_string();
            assert!(
                err.contains(&format!("architecture `{arch}`"))
                    && err.contains(why)
                    && err.contains("m.gguf")
                    && err.contains(MODEL_KEY),
                "{err}"
            );
        }
    }

    #[test]
    fn gemma_spells_runs_of_spaces_and_ranks_merges_by_place() {
        // Expected ids: transformers 5.24.0 `gemma_tokenizer` and `sentencepiece_tokenizer`
        // (gguf_tokenizer_mapping.py) on the same tokens and scores. gemma looks "  " up as
        // "▁▁" and ranks the merges by place ("bc" at 4 before "ab" at 6), a plain llama file
        // by score ("ab" at 0 before "bc" at -5) and puts `▁` before the text.
        let toks = ["\u{2581}", "a", "b", "c", "bc", "  ", "ab", "<unk>"];
        let scores = [0.0f32, 0.0, 0.0, 0.0, -5.0, -9.0, 0.0, 0.0];
        let file = |arch: &str| {
            let mut m = HashMap::new();
            m.insert(MODEL_KEY.to_string(), text("llama"));
            m.insert("general.architecture".to_string(), text(arch));
            m.insert(
                "tokenizer.ggml.tokens".to_string(),
                Value::Array(toks.iter().map(|t| text(t)).collect()),
            );
            m.insert(
                "tokenizer.ggml.scores".to_string(),
                Value::Array(scores.iter().map(|&s| Value::F32(s)).collect()),
            );
            m
        };
        let m = file("gemma2");
        let gemma = load(Path::new("m.gguf"), |k| m.get(k)).unwrap();
        assert_eq!(gemma.token_id("\u{2581}\u{2581}"), Some(5));
        assert_eq!(gemma.encode("  abc", false).unwrap(), vec![5, 1, 4]);
        assert_eq!(gemma.decode(&[5, 1, 4]).unwrap(), "  abc");
        assert!(gemma
            .special_tokens()
            .contains(&("mask_token".to_string(), "<mask>".to_string())));
        let m = file("llama");
        let llama = load(Path::new("m.gguf"), |k| m.get(k)).unwrap();
        assert_eq!(llama.encode("abc", false).unwrap(), vec![0, 6, 3]);
    }

    #[test]
    fn a_small_vocabulary_merges_and_keeps_control_tokens_whole() {
        let mut m = HashMap::new();
        m.insert(MODEL_KEY.to_string(), text("gpt2"));
        let toks = ["<|end|>", "a", "b", "ab", "Ġ", "Ġab"];
        m.insert(
            "tokenizer.ggml.tokens".to_string(),
            Value::Array(toks.iter().map(|t| text(t)).collect()),
        );
        m.insert(
            "tokenizer.ggml.token_type".to_string(),
            Value::Array([3, 1, 1, 1, 1, 1].iter().map(|&t| Value::I32(t)).collect()),
        );
        m.insert(
            "tokenizer.ggml.merges".to_string(),
            Value::Array(vec![text("a b"), text("Ġ ab")]),
        );
        m.insert("tokenizer.ggml.eos_token_id".to_string(), Value::U32(0));
        let chat = load(Path::new("m.gguf"), |k| m.get(k)).unwrap();
        assert_eq!(chat.encode("ab ab<|end|>", true).unwrap(), vec![3, 5, 0]);
        assert_eq!(chat.decode(&[3, 5, 0]).unwrap(), "ab ab");
        // GPT2Tokenizer's own default special token is appended after the file's tokens.
        assert_eq!(chat.token_id("<|endoftext|>"), Some(6));
        assert_eq!(
            chat.special_tokens(),
            &[("eos_token".to_string(), "<|end|>".to_string())]
        );
    }
}
