//! Greedy generation over a batch of prompts with the KV cache, as transformers 5.24
//! `generate(do_sample=False)` does (model-formats.md §3.2–§3.3).
//!
//! Prompts of different lengths are left-padded into one batch: the padding mask hides pad
//! keys, position ids count only real tokens (`cumsum(mask) − 1`), so each row computes what it
//! would compute alone. A finished row keeps its slot (fed the pad id, its output ignored) until
//! the whole batch is done; refilling slots belongs to the throughput work.

use crate::answers::Finish;
use crate::error::{Error, Result};
use crate::model::decoder::{Decoder, StepInput};

/// How the next token is chosen. Only greedy decoding exists; a sampling mode would be a new
/// variant, and every place that must handle it becomes a compile error.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Decoding {
    /// argmax of the f32 last-position logits, ties to the lowest index (as `torch.argmax`).
    #[default]
    Greedy,
}

impl Decoding {
    pub fn as_str(self) -> &'static str {
        match self {
            Decoding::Greedy => "greedy",
        }
    }
}

/// Settings of one generation run.
#[derive(Debug, Clone, PartialEq)]
pub struct GenerationSettings {
    pub decoding: Decoding,
    pub max_new_tokens: usize,
    /// Stop ids (generation_config.json, else config.json). Empty: no EOS stop.
    pub eos: Vec<u32>,
    /// Generate exactly `max_new_tokens`, never stopping on EOS.
    pub ignore_eos: bool,
    /// Token fed to finished rows and used for left padding (never attended to).
    pub pad: u32,
    /// transformers' RepetitionPenaltyLogitsProcessor: every id already in the row (prompt and
    /// generated) has its score s replaced by s·p if s < 0, else s/p. None: off.
    pub repetition_penalty: Option<f32>,
}

/// One generated answer.
#[derive(Debug, Clone, PartialEq)]
pub struct Generated {
    /// New token ids, including the EOS token when `finish` is `Eos`.
    pub tokens: Vec<u32>,
    pub finish: Finish,
    pub prompt_tokens: usize,
    /// Milliseconds from the start of the batch until this row finished.
    pub ms: u64,
}

impl Generated {
    /// The new tokens without the final EOS (what the answer text is decoded from).
    pub fn answer_tokens(&self) -> &[u32] {
        match self.finish {
            Finish::Eos => &self.tokens[..self.tokens.len().saturating_sub(1)],
            _ => &self.tokens,
        }
    }
}

/// Index of the largest value; the first one on ties (as `torch.argmax`).
pub fn argmax(xs: &[f32]) -> usize {
    let mut best = 0;
    for (i, &x) in xs.iter().enumerate() {
        if x > xs[best] {
            best = i;
        }
    }
    best
}

/// s·p for negative scores, s/p otherwise, on every id marked in `seen`.
pub fn apply_repetition_penalty(scores: &mut [f32], seen: &[bool], p: f32) {
    for (s, &hit) in scores.iter_mut().zip(seen) {
        if hit {
            *s = if *s < 0.0 { *s * p } else { *s / p };
        }
    }
}

/// The left-padded prefill input for `prompts`.
pub fn prefill_input(prompts: &[Vec<u32>], pad: u32) -> StepInput {
    let b = prompts.len();
    let len = prompts.iter().map(Vec::len).max().unwrap_or(0);
    let mut tokens = Vec::with_capacity(b * len);
    let mut positions = Vec::with_capacity(b * len);
    let mut key_mask = Vec::with_capacity(b * len);
    for p in prompts {
        let padn = len - p.len();
        tokens.extend(std::iter::repeat_n(pad, padn));
        tokens.extend_from_slice(p);
        positions.extend(std::iter::repeat_n(0, padn));
        positions.extend(0..p.len() as u32);
        key_mask.extend(std::iter::repeat_n(0u8, padn));
        key_mask.extend(std::iter::repeat_n(1u8, p.len()));
    }
    StepInput {
        batch: b,
        len,
        tokens,
        positions,
        key_mask,
    }
}

/// Greedy-decodes every prompt of the batch. `on_token` is called after each decoding step with
/// the number of tokens produced in that step (for progress).
pub fn generate_batch(
    decoder: &Decoder,
    prompts: &[Vec<u32>],
    settings: &GenerationSettings,
    on_step: &mut dyn FnMut(usize),
) -> Result<Vec<Generated>> {
    let start = std::time::Instant::now();
    let b = prompts.len();
    if b == 0 {
        return Ok(Vec::new());
    }
    if let Some(i) = prompts.iter().position(Vec::is_empty) {
        return Err(Error::internal(format!("prompt {i} of the batch is empty")));
    }
    let mut out: Vec<Generated> = prompts
        .iter()
        .map(|p| Generated {
            tokens: Vec::new(),
            finish: Finish::Length,
            prompt_tokens: p.len(),
            ms: 0,
        })
        .collect();
    if settings.max_new_tokens == 0 {
        return Ok(out);
    }
    let mut cache = decoder.new_cache();
    let mut input = prefill_input(prompts, settings.pad);
    let mut key_mask = input.key_mask.clone();
    let mut next_pos: Vec<u32> = prompts.iter().map(|p| p.len() as u32).collect();
    let mut done = vec![false; b];
    let vocab = decoder.spec().vocab_size;
    // Per row: which ids the sequence holds so far (only kept when a penalty is set).
    let mut seen: Vec<Vec<bool>> = match settings.repetition_penalty {
        Some(_) => prompts
            .iter()
            .map(|p| {
                let mut s = vec![false; vocab];
                for &t in p {
                    if let Some(x) = s.get_mut(t as usize) {
                        *x = true;
                    }
                }
                s
            })
            .collect(),
        None => Vec::new(),
    };
    loop {
        let logits = decoder.forward(&input, &mut cache)?;
        let mut logits: Vec<f32> = logits.flatten_all()?.to_vec1()?;
        let mut produced = 0;
        let mut step_tokens = Vec::with_capacity(b);
        for row in 0..b {
            if done[row] {
                step_tokens.push(settings.pad);
                continue;
            }
            let scores = &mut logits[row * vocab..(row + 1) * vocab];
            if let Some(p) = settings.repetition_penalty {
                apply_repetition_penalty(scores, &seen[row], p);
            }
            let tok = match settings.decoding {
                Decoding::Greedy => argmax(scores) as u32,
            };
            if let Some(x) = seen.get_mut(row).and_then(|s| s.get_mut(tok as usize)) {
                *x = true;
            }
            produced += 1;
            let g = &mut out[row];
            g.tokens.push(tok);
            if !settings.ignore_eos && settings.eos.contains(&tok) {
                g.finish = Finish::Eos;
                done[row] = true;
            } else if g.tokens.len() >= settings.max_new_tokens {
                g.finish = Finish::Length;
                done[row] = true;
            }
            if done[row] {
                g.ms = start.elapsed().as_millis() as u64;
            }
            step_tokens.push(tok);
        }
        on_step(produced);
        if done.iter().all(|&d| d) {
            break;
        }
        // Next step: one token a row; every row's mask grows by one real slot.
        let total = cache.len() + 1;
        let prev = total - 1;
        let mut new_mask = Vec::with_capacity(b * total);
        for row in 0..b {
            new_mask.extend_from_slice(&key_mask[row * prev..(row + 1) * prev]);
            new_mask.push(1);
        }
        key_mask = new_mask;
        let positions = next_pos.clone();
        for p in next_pos.iter_mut() {
            *p += 1;
        }
        input = StepInput {
            batch: b,
            len: 1,
            tokens: step_tokens,
            positions,
            key_mask: key_mask.clone(),
        };
    }
    Ok(out)
}

/// Greedy-decodes `prompts[i]` for every `i` in `todo`, at most `slots` sequences at a time,
/// and hands each finished answer to `on_done(i, answer)` as soon as it is complete (so a
/// caller can save it at once). Answers arrive in completion order, not in `todo` order.
/// `on_step` gets the number of tokens produced by each decoding step (for progress).
///
/// An error from `on_done` stops decoding and is returned.
pub fn generate_stream(
    decoder: &Decoder,
    prompts: &[Vec<u32>],
    todo: &[usize],
    settings: &GenerationSettings,
    slots: usize,
    on_done: &mut dyn FnMut(usize, Generated) -> Result<()>,
    on_step: &mut dyn FnMut(usize),
) -> Result<()> {
    if slots == 0 {
        return Err(Error::internal("generate_stream needs at least one slot"));
    }
    if let Some(&i) = todo.iter().find(|&&i| i >= prompts.len()) {
        return Err(Error::internal(format!("job {i} has no prompt")));
    }
    for chunk in todo.chunks(slots) {
        let batch: Vec<Vec<u32>> = chunk.iter().map(|&i| prompts[i].clone()).collect();
        let out = generate_batch(decoder, &batch, settings, on_step)?;
        for (&i, g) in chunk.iter().zip(out) {
            on_done(i, g)?;
        }
    }
    Ok(())
}

/// Trims surrounding whitespace the way Python's `str.strip()` does (the reference answers
/// are `decode(...).strip()`): Unicode White_Space plus the separators U+001C–U+001F, which
/// Python counts as whitespace and Rust's `str::trim` does not.
pub fn strip_like_python(s: &str) -> &str {
    s.trim_matches(|c: char| c.is_whitespace() || ('\u{1c}'..='\u{1f}').contains(&c))
}

/// What produced an answers file: written as `<out>.run.json` (interface.md, "Answers file").
/// Fingerprints are SHA-256 hex of file contents, so a changed file shows up even under the
/// same path.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct RunInfo {
    pub tool: String,
    pub tool_version: String,
    pub model: ModelInfo,
    pub adapter: Option<AdapterInfo>,
    pub chat_template: TemplateInfo,
    pub generation: GenerationInfo,
    pub questions: QuestionsInfo,
    /// The dtype every tensor was computed in.
    pub compute_dtype: String,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
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

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct FileDigest {
    pub name: String,
    pub sha256: String,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct AdapterInfo {
    pub path: String,
    pub fingerprint: String,
    pub modules_merged: usize,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct TemplateInfo {
    /// SHA-256 of the template source, or of the plain fallback's name.
    pub fingerprint: String,
    /// false: the documented plain fallback prompt was used.
    pub from_model: bool,
}

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
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

#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct QuestionsInfo {
    pub path: String,
    pub fingerprint: String,
    pub count: usize,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn strip_matches_python_str_strip() {
        // Python 3: " \x1c a \x1f\u3000".strip() == "a" (str.isspace is true for \x1c-\x1f).
        assert_eq!(strip_like_python(" \u{1c} a \u{1f}\u{3000}"), "a");
        assert_eq!(strip_like_python("\u{1b}a"), "\u{1b}a");
    }

    #[test]
    fn argmax_ties_go_to_the_lowest_index() {
        // torch.argmax returns the first maximal index (PyTorch documentation).
        assert_eq!(argmax(&[1.0, 3.0, 3.0, 2.0]), 1);
        assert_eq!(argmax(&[-1.0]), 0);
    }

    #[test]
    fn prefill_is_left_padded_with_cumsum_positions() {
        let input = prefill_input(&[vec![5, 6, 7], vec![9]], 0);
        assert_eq!(input.len, 3);
        assert_eq!(input.tokens, vec![5, 6, 7, 0, 0, 9]);
        assert_eq!(input.positions, vec![0, 1, 2, 0, 0, 0]);
        assert_eq!(input.key_mask, vec![1, 1, 1, 0, 0, 1]);
    }
}
