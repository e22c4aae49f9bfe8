//! The answering stage: one model variant (a base model, or base + LoRA adapter) answers every
//! question of a set, greedy, on CPU (docs/interface.md, "Commands").
//!
//! - `prompts`: every question through the chat template to token ids, before any model work,
//!   so a template error stops the run with nothing computed; and a finished generation back to
//!   an answers-file row.
//! - `generate`: greedy decoding over a ragged batch with continuous refill.
//! - `run`: loads the variant, decodes, saves each answer to the resume journal as it finishes,
//!   and writes the answers file and its run record at the end ([`answer_to`]).
//! - `shard`: the split of a set over the tasks of a job array, and the scheduler's shard index;
//!   `gather`: the shards' answers files joined into the one a whole run writes.

mod gather;
pub mod generate;
mod prompts;
mod run;
pub mod shard;

pub use gather::gather;
pub use generate::Decoding;
pub use run::{answer_group, answer_to, AnswerRun, Member};
pub use shard::{ShardSpec, Split};

use crate::error::{Error, Result};
use crate::model::{BaseQuant, Merge, WeightFormat};
use std::path::{Path, PathBuf};

/// New tokens per answer unless `--max-new-tokens` says otherwise.
pub const DEFAULT_MAX_NEW_TOKENS: usize = 128;
/// Questions decoded together unless `--batch` says otherwise.
pub const DEFAULT_BATCH: usize = 16;

/// How every variant of a run generates: the options that do not depend on the model.
#[derive(Debug, Clone, PartialEq)]
pub struct Generation {
    /// System message given to the chat template.
    pub system: Option<String>,
    pub decoding: Decoding,
    pub max_new_tokens: usize,
    /// Generate exactly `max_new_tokens`, never stopping on end-of-sequence.
    pub ignore_eos: bool,
    /// Cache slots: questions decoded together (answers do not depend on it).
    pub batch: usize,
    /// None: all cores.
    pub threads: Option<usize>,
    /// How the runner holds the weights of the matrix products.
    pub weights: WeightFormat,
}

impl Generation {
    /// Checks the numbers; a bad one is a usage error (exit 2) naming its flag.
    pub fn checked(self) -> Result<Self> {
        if self.max_new_tokens == 0 {
            return Err(Error::usage("--max-new-tokens must be at least 1"));
        }
        if self.batch == 0 {
            return Err(Error::usage("--batch must be at least 1"));
        }
        if self.threads == Some(0) {
            return Err(Error::usage("--threads must be at least 1"));
        }
        Ok(self)
    }
}

/// Validated settings of one answering run: which variant, how to generate, and whether to
/// discard the saved answers of an earlier run.
#[derive(Debug, Clone, PartialEq)]
pub struct Settings {
    /// The variant's name, recorded in the run record.
    pub name: Option<String>,
    pub model: PathBuf,
    pub adapter: Option<PathBuf>,
    /// How the adapter is applied (unmerged unless a merge is asked for).
    pub merge: Merge,
    /// The base's linear layers quantised to 4 bits (the base as QLoRA trains against it);
    /// None: the base as stored.
    pub base: Option<BaseQuant>,
    /// A GGUF file holding the whole model (`--gguf`, `gguf=`); `model` then only supplies the
    /// tokenizer and chat template.
    pub gguf: Option<PathBuf>,
    /// The GGUF file's own tokenizer and chat template (its `tokenizer.*` metadata) instead of
    /// the directory's; `model` is then the file itself.
    pub gguf_tokenizer: bool,
    pub generation: Generation,
    /// Discard saved answers of an earlier run instead of continuing it.
    pub restart: bool,
    /// Answer only this shard of the set (`answer --shard`); None: the whole set.
    pub shard: Option<ShardSpec>,
}

impl Settings {
    /// Checks that the model (and adapter) are directories; every problem is a usage error
    /// (exit 2) naming the path. What is inside them is checked when they are loaded.
    pub fn new(
        model: &Path,
        adapter: Option<&Path>,
        merge: Merge,
        generation: Generation,
        restart: bool,
    ) -> Result<Self> {
        if adapter.is_none() && merge != Merge::Unmerged {
            return Err(Error::usage(
                "a merge needs an adapter: give --adapter with --merge",
            ));
        }
        if !model.is_dir() {
            return Err(Error::usage(format!(
                "--model {}: not a directory (expected a Hugging Face model directory with config.json, *.safetensors, tokenizer.json)",
                model.display()
            )));
        }
        if let Some(a) = adapter {
            if !a.is_dir() {
                return Err(Error::usage(format!(
                    "--adapter {}: not a directory (expected a peft adapter directory with adapter_config.json and adapter_model.safetensors)",
                    a.display()
                )));
            }
        }
        Ok(Settings {
            name: None,
            merge,
            base: None,
            gguf: None,
            gguf_tokenizer: false,
            model: model.to_path_buf(),
            adapter: adapter.map(Path::to_path_buf),
            generation: generation.checked()?,
            restart,
            shard: None,
        })
    }

    /// The same variant on its base quantised to 4 bits as `base` says (`--base`, `base=`):
    /// the adapter then stays unmerged and the products compute in f32, as bitsandbytes' 4-bit
    /// layers do with `bnb_4bit_compute_dtype=float32`; anything else is a usage error.
    pub fn on_base(mut self, base: Option<BaseQuant>) -> Result<Self> {
        let Some(q) = base else {
            return Ok(self);
        };
        if self.merge != Merge::Unmerged {
            return Err(Error::usage(format!(
                "a 4-bit base ({}) takes the adapter unmerged, as QLoRA trains it; a merge is another artifact (merge into the base as stored, without the 4-bit base)",
                q.name()
            )));
        }
        if self.generation.weights != WeightFormat::F32 {
            return Err(Error::usage(format!(
                "a 4-bit base ({}) computes in f32 (bnb_4bit_compute_dtype=float32, the default); bf16 computation on it is not supported: drop --weights bf16",
                q.name()
            )));
        }
        self.base = Some(q);
        Ok(self)
    }

    /// The model read from the GGUF file `gguf` (`--gguf`, `gguf=`) instead of the directory,
    /// whose tokenizer and chat template are still used. A GGUF file is a finished export: no
    /// adapter, merge or 4-bit base applies to it, and it computes in f32 as transformers does
    /// after loading it.
    pub fn with_gguf(mut self, gguf: Option<&Path>) -> Result<Self> {
        let Some(g) = gguf else {
            return Ok(self);
        };
        if self.adapter.is_some() || self.base.is_some() {
            return Err(Error::usage(format!(
                "{}: a GGUF file is a finished export; an adapter or a 4-bit base does not apply to it",
                g.display()
            )));
        }
        if self.generation.weights != WeightFormat::F32 {
            return Err(Error::usage(format!(
                "{}: a GGUF model computes in f32 on its stored blocks; drop --weights bf16",
                g.display()
            )));
        }
        if !g.is_file() {
            return Err(Error::usage(format!(
                "--gguf {}: not a file (expected a .gguf model file)",
                g.display()
            )));
        }
        self.gguf = Some(g.to_path_buf());
        Ok(self)
    }

    /// The model in the GGUF file `gguf` with the tokenizer and chat template stored in it
    /// (`answer --gguf FILE` without `--model`, a candidate's `tokenizer=gguf`): no directory is
    /// read. A file without tokenizer metadata is refused when the run loads it.
    pub fn gguf_alone(gguf: &Path, generation: Generation, restart: bool) -> Result<Self> {
        let mut s = Settings {
            name: None,
            model: gguf.to_path_buf(),
            adapter: None,
            merge: Merge::Unmerged,
            base: None,
            gguf: None,
            gguf_tokenizer: true,
            generation: generation.checked()?,
            restart,
            shard: None,
        }
        .with_gguf(Some(gguf))?;
        s.gguf_tokenizer = true;
        Ok(s)
    }
}
