//! Arguments to settings, shared by the commands that answer (`answer`, `vet`) and the ones that
//! weigh (`weigh`, `vet`): one fallible step each, every default taken from the stage that owns
//! it.

use crate::answer::{self, Decoding, Generation};
use crate::cli::{GenerationArgs, StatsArgs};
use crate::error::Result;
use crate::policy::Policy;
use crate::weigh;

/// The generation options; `max_new_tokens` applies when `--max-new-tokens` is not given.
pub fn generation(args: &GenerationArgs, max_new_tokens: usize) -> Result<Generation> {
    Generation {
        system: args.system.clone(),
        decoding: Decoding::Greedy,
        max_new_tokens: args.max_new_tokens.unwrap_or(max_new_tokens),
        ignore_eos: args.ignore_eos,
        batch: args.batch,
        threads: args.threads,
        weights: args.weights,
    }
    .checked()
}

/// [`generation`] with the default number of new tokens.
pub fn default_generation(args: &GenerationArgs) -> Result<Generation> {
    generation(args, answer::DEFAULT_MAX_NEW_TOKENS)
}

/// The statistics settings and the policy (the file's, or the built-in default).
pub fn stats(args: &StatsArgs) -> Result<(weigh::Settings, Policy)> {
    let settings = weigh::Settings::new(args.resamples, args.seed, args.confidence)?;
    let policy = Policy::load_or_default(args.policy.as_deref())?;
    Ok((settings, policy))
}
