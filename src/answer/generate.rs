//! Greedy generation over a batch of prompts with the KV cache, as transformers 5.24
//! `generate(do_sample=False)` does (docs/model-formats.md §3.2–§3.3).
//!
//! Sequences run in the slots of a preallocated KV cache with no padding: every prompt keeps
//! position ids 0, 1, 2, … as it would alone (docs/model-formats.md §3.3), a finished slot takes the
//! next prompt at once, and the prompt prefix shared by every question is computed once
//! (`generate_stream`).

use crate::error::{Error, Result};
use crate::formats::answers::Finish;
use crate::model::decoder::{Decoder, Segment, Workspace};

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

/// Tokens one forward call takes at most (beyond one per decoding sequence): long prompts are
/// prefilled in chunks of this size, so the scratch buffers stay small.
const STEP_TOKENS: usize = 512;

/// What one forward step of the runner did: for progress, and to split the answering time into
/// prompt prefill and decoding (a decoding step reads every weight once for one new token per
/// sequence; a prompt step also runs prompt tokens through the same products).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Step {
    /// New tokens the step produced (one per sequence whose prompt is all in the cache).
    pub produced: usize,
    /// Prompt tokens the step fed; 0 for a step that only decodes.
    pub prompt_tokens: usize,
    /// Wall-clock seconds of the step: the forward pass and the greedy pick.
    pub secs: f64,
}

/// One sequence to generate: a prompt, answered by one model variant of the decoder
/// ([`crate::model::decoder::Segment::variant`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Job {
    pub prompt: usize,
    pub variant: usize,
}

/// A sequence in a cache slot: its prompt tail still to feed, then one token a step.
struct Active {
    job: Job,
    /// Tokens to feed; `fed` of them are in the cache.
    pending: Vec<u32>,
    fed: usize,
    out: Generated,
    /// Ids the sequence holds so far (only kept when a repetition penalty is set).
    seen: Vec<bool>,
    started: std::time::Instant,
}

/// Length of the prefix every prompt of `todo` shares, kept at least one token short of the
/// shortest prompt so each still has a token whose logits start its answer.
fn shared_prefix_len(prompts: &[Vec<u32>], todo: &[usize]) -> usize {
    let Some((&first, rest)) = todo.split_first() else {
        return 0;
    };
    let mut n = prompts[first].len();
    for &i in rest {
        n = prompts[first][..n]
            .iter()
            .zip(&prompts[i])
            .take_while(|(a, b)| a == b)
            .count();
    }
    let shortest = todo.iter().map(|&i| prompts[i].len()).min().unwrap_or(0);
    n.min(shortest.saturating_sub(1))
}

/// Greedy-decodes `prompts[i]` for every `i` in `todo`, `slots` sequences at a time, and hands
/// each finished answer to `on_done(i, answer)` as soon as it is complete (so a caller can save
/// it at once). Answers arrive in completion order, not in `todo` order. `on_step` gets each
/// step's [`Step`] (tokens produced, prompt tokens fed, seconds), the computation of the shared
/// prompt prefix included; an error from it stops decoding after that step.
///
/// Continuous refill: a slot whose sequence finishes takes the next prompt of `todo` in the
/// very next step, where its prefill runs together with the other slots' decoding. The prefix
/// that every prompt shares (chat-template preamble, system message) is computed once and
/// copied into each slot. Each sequence's arithmetic does not depend on its neighbours, so the
/// answers equal batch-1 answers.
///
/// An error from `on_done` or `on_step` stops decoding and is returned.
pub fn generate_stream(
    decoder: &Decoder,
    prompts: &[Vec<u32>],
    todo: &[usize],
    settings: &GenerationSettings,
    slots: usize,
    on_done: &mut dyn FnMut(usize, Generated) -> Result<()>,
    on_step: &mut dyn FnMut(Step) -> Result<()>,
) -> Result<()> {
    let jobs: Vec<Job> = todo
        .iter()
        .map(|&prompt| Job { prompt, variant: 0 })
        .collect();
    generate_jobs(
        decoder,
        prompts,
        &jobs,
        settings,
        slots,
        &mut |job, g| on_done(job.prompt, g),
        on_step,
    )
}

/// As [`generate_stream`], for jobs that name their model variant as well as their prompt:
/// rows of several variants of one decoder (the base and unmerged adapters on it) run in the
/// same steps, through the same products over the shared base weights. The shared prefix is
/// computed once per variant, since an adapter changes its keys and values.
pub fn generate_jobs(
    decoder: &Decoder,
    prompts: &[Vec<u32>],
    todo: &[Job],
    settings: &GenerationSettings,
    slots: usize,
    on_done: &mut dyn FnMut(Job, Generated) -> Result<()>,
    on_step: &mut dyn FnMut(Step) -> Result<()>,
) -> Result<()> {
    if slots == 0 {
        return Err(Error::internal("generate_stream needs at least one slot"));
    }
    if let Some(j) = todo.iter().find(|j| j.prompt >= prompts.len()) {
        return Err(Error::internal(format!("job {} has no prompt", j.prompt)));
    }
    if let Some(j) = todo.iter().find(|j| prompts[j.prompt].is_empty()) {
        return Err(Error::internal(format!("prompt {} is empty", j.prompt)));
    }
    let fresh = |i: usize| Generated {
        tokens: Vec::new(),
        finish: Finish::Length,
        prompt_tokens: prompts[i].len(),
        ms: 0,
    };
    if todo.is_empty() {
        return Ok(());
    }
    if settings.max_new_tokens == 0 {
        for &j in todo {
            on_done(j, fresh(j.prompt))?;
        }
        return Ok(());
    }
    let slots = slots.min(todo.len());
    let longest = todo
        .iter()
        .map(|j| prompts[j.prompt].len())
        .max()
        .unwrap_or(0);
    let mut cache = decoder.new_cache(slots, longest + settings.max_new_tokens);
    let mut ws = Workspace::default();
    let todo_prompts: Vec<usize> = todo.iter().map(|j| j.prompt).collect();
    // One prompt (however many variants answer it) shares nothing with another.
    let prefix = if todo_prompts.iter().any(|&p| p != todo_prompts[0]) {
        shared_prefix_len(prompts, &todo_prompts)
    } else {
        0
    };
    if prefix > 0 {
        let mut variants: Vec<usize> = todo.iter().map(|j| j.variant).collect();
        variants.sort_unstable();
        variants.dedup();
        for variant in variants {
            let seg = [Segment {
                slot: 0,
                tokens: &prompts[todo[0].prompt][..prefix],
                variant,
            }];
            let started = std::time::Instant::now();
            decoder.forward(&seg, &mut cache, &mut ws)?;
            cache.save_prefix(0, variant);
            cache.reset(0);
            on_step(Step {
                produced: 0,
                prompt_tokens: prefix,
                secs: started.elapsed().as_secs_f64(),
            })?;
        }
    }
    let vocab = decoder.spec().vocab_size;
    let mut queue = todo.iter().copied();
    let mut active: Vec<Option<Active>> = (0..slots).map(|_| None).collect();
    let mut takes: Vec<(usize, usize)> = Vec::with_capacity(slots);
    loop {
        for (slot, a) in active.iter_mut().enumerate() {
            if a.is_none() {
                if let Some(job) = queue.next() {
                    let p = cache.load_prefix(slot, job.variant);
                    let seen = match settings.repetition_penalty {
                        Some(_) => {
                            let mut s = vec![false; vocab];
                            for &t in &prompts[job.prompt] {
                                if let Some(x) = s.get_mut(t as usize) {
                                    *x = true;
                                }
                            }
                            s
                        }
                        None => Vec::new(),
                    };
                    *a = Some(Active {
                        job,
                        pending: prompts[job.prompt][p..].to_vec(),
                        fed: 0,
                        out: fresh(job.prompt),
                        seen,
                        started: std::time::Instant::now(),
                    });
                }
            }
        }
        // One token for every sequence, then prompt chunks up to the step budget.
        takes.clear();
        let mut budget = STEP_TOKENS.max(slots);
        for (slot, a) in active.iter().enumerate() {
            if a.is_some() {
                takes.push((slot, 1));
                budget -= 1;
            }
        }
        if takes.is_empty() {
            break;
        }
        for (slot, take) in takes.iter_mut() {
            let a = active[*slot].as_ref().expect("slot is active");
            let more = (a.pending.len() - a.fed - 1).min(budget);
            *take += more;
            budget -= more;
        }
        let segs: Vec<Segment> = takes
            .iter()
            .map(|&(slot, take)| {
                let a = active[slot].as_ref().expect("slot is active");
                Segment {
                    slot,
                    tokens: &a.pending[a.fed..a.fed + take],
                    variant: a.job.variant,
                }
            })
            .collect();
        let seen: Vec<&[bool]> = takes
            .iter()
            .map(|&(slot, _)| {
                active[slot]
                    .as_ref()
                    .expect("slot is active")
                    .seen
                    .as_slice()
            })
            .collect();
        let penalty = settings.repetition_penalty.map(|p| (p, seen.as_slice()));
        // A sequence with no new token yet is still feeding its prompt.
        let prompt_tokens: usize = takes
            .iter()
            .filter(|&&(slot, _)| {
                active[slot]
                    .as_ref()
                    .is_some_and(|a| a.out.tokens.is_empty())
            })
            .map(|&(_, take)| take)
            .sum();
        let started = std::time::Instant::now();
        // One step runs on a worker of the thread pool, so its many parallel loops start from
        // inside the pool instead of each waking the calling thread when it ends.
        let tokens = rayon::scope(|_| decoder.next_tokens(&segs, &mut cache, &mut ws, penalty))?;
        let secs = started.elapsed().as_secs_f64();
        drop(segs);
        let mut produced = 0;
        for (k, &(slot, take)) in takes.iter().enumerate() {
            let a = active[slot].as_mut().expect("slot is active");
            a.fed += take;
            if a.fed < a.pending.len() {
                continue; // still prefilling
            }
            let tok = tokens[k];
            if let Some(x) = a.seen.get_mut(tok as usize) {
                *x = true;
            }
            produced += 1;
            a.out.tokens.push(tok);
            let finish = if !settings.ignore_eos && settings.eos.contains(&tok) {
                Some(Finish::Eos)
            } else if a.out.tokens.len() >= settings.max_new_tokens {
                Some(Finish::Length)
            } else {
                None
            };
            match finish {
                Some(f) => {
                    let mut done = active[slot].take().expect("slot is active");
                    done.out.finish = f;
                    done.out.ms = done.started.elapsed().as_millis() as u64;
                    cache.reset(slot);
                    on_done(done.job, done.out)?;
                }
                None => {
                    a.pending.clear();
                    a.pending.push(tok);
                    a.fed = 0;
                }
            }
        }
        on_step(Step {
            produced,
            prompt_tokens,
            secs,
        })?;
    }
    Ok(())
}

/// Greedy-decodes every prompt together (one slot each) and returns the answers in prompt
/// order. `on_step` is called after each decoding step with the number of tokens produced.
pub fn generate_batch(
    decoder: &Decoder,
    prompts: &[Vec<u32>],
    settings: &GenerationSettings,
    on_step: &mut dyn FnMut(Step) -> Result<()>,
) -> Result<Vec<Generated>> {
    let todo: Vec<usize> = (0..prompts.len()).collect();
    let mut out: Vec<Option<Generated>> = vec![None; prompts.len()];
    generate_stream(
        decoder,
        prompts,
        &todo,
        settings,
        prompts.len().max(1),
        &mut |i, g| {
            out[i] = Some(g);
            Ok(())
        },
        on_step,
    )?;
    out.into_iter()
        .enumerate()
        .map(|(i, g)| g.ok_or_else(|| Error::internal(format!("prompt {i} got no answer"))))
        .collect()
}

/// Trims surrounding whitespace the way Python's `str.strip()` does (the reference answers
/// are `decode(...).strip()`): Unicode White_Space plus the separators U+001C–U+001F, which
/// Python counts as whitespace and Rust's `str::trim` does not.
pub fn strip_like_python(s: &str) -> &str {
    s.trim_matches(|c: char| c.is_whitespace() || ('\u{1c}'..='\u{1f}').contains(&c))
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
    fn shared_prefix_stops_one_short_of_the_shortest_prompt() {
        let p = vec![vec![1, 2, 3, 4], vec![1, 2, 3, 9], vec![1, 2, 3]];
        assert_eq!(shared_prefix_len(&p, &[0, 1]), 3);
        assert_eq!(shared_prefix_len(&p, &[0, 1, 2]), 2);
        assert_eq!(shared_prefix_len(&p, &[0]), 3);
        assert_eq!(shared_prefix_len(&[vec![5], vec![6]], &[0, 1]), 0);
    }
}
