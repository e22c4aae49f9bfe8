//! `liftgate answer`: arguments → [`answer::Settings`] → [`answer::answer_to`].
//!
//! The shard comes from `--shard`, else from `LIFTGATE_SHARD`; `auto` in either reads the
//! scheduler's environment. Where it came from is said on stderr, so a task that answers the
//! wrong part is seen in its log.

use super::{args, Outcome};
use crate::answer::{self, shard, ShardSpec};
use crate::cli::AnswerArgs;
use crate::error::{Error, Result};
use crate::formats::questions::QuestionSet;
use crate::interrupt::StopFlag;

pub fn run(args: &AnswerArgs) -> Result<Outcome> {
    let generation = args::default_generation(&args.generation)?;
    let mut settings =
        match (&args.model, &args.gguf) {
            // A GGUF file alone: its own tokenizer and chat template.
            (None, Some(gguf)) => answer::Settings::gguf_alone(gguf, generation, args.restart)?,
            (Some(model), gguf) => answer::Settings::new(
                model,
                args.adapter.as_deref(),
                args.merge.unwrap_or_default(),
                generation,
                args.restart,
            )?
            .on_base(args.base)?
            .with_gguf(gguf.as_deref())?,
            (None, None) => return Err(Error::usage(
                "--model DIR is required (or --gguf FILE, a model file carrying its own tokenizer)",
            )),
        };
    if let Some(name) = &args.name {
        args::check_name("--name", name)?;
        settings.name = Some(name.clone());
    }
    args::check_questions_and_out(&args.questions, &args.out)?;
    let shard = shard_spec(args.shard.as_deref(), |k| std::env::var(k).ok())?;
    let set = QuestionSet::load(&args.questions)?;
    if let Some((s, from)) = shard {
        let info = answer::Split::of(&set, s.count)?.info(s.index);
        eprintln!(
            "liftgate: answering shard {} of {} (counted from 0; taken from {from}): {} of the {} questions, split {}",
            s.index,
            s.count,
            info.questions,
            set.len(),
            info.split.chars().take(12).collect::<String>()
        );
        settings.shard = Some(s);
    }
    let stop = StopFlag::install()?;
    answer::answer_to(&args.out, &settings, &set, &stop)?;
    Ok(Outcome::Success)
}

/// The shard to answer and where it was taken from: `--shard` (`flag`), else `LIFTGATE_SHARD`
/// read through `env`; `auto` asks the scheduler's variables.
pub(super) fn shard_spec(
    flag: Option<&str>,
    env: impl Fn(&str) -> Option<String>,
) -> Result<Option<(ShardSpec, String)>> {
    let given = match (flag, env(shard::SHARD_ENV)) {
        (Some(f), _) => format!("--shard {f}"),
        (None, Some(v)) if !v.trim().is_empty() => format!("{}={v}", shard::SHARD_ENV),
        (None, _) => return Ok(None),
    };
    let text = flag.map(str::to_string).or_else(|| env(shard::SHARD_ENV));
    let text = text.as_deref().unwrap_or_default().trim();
    if text == "auto" {
        ShardSpec::from_env(&env)
            .map(|(spec, from)| Some((spec, format!("{from}, as {given} asks"))))
            .map_err(|e| match e {
                Error::Usage(m) => Error::usage(format!("{given}: {m}")),
                other => other,
            })
    } else {
        let source = given.split([' ', '=']).next().unwrap_or_default();
        Ok(Some((ShardSpec::parse(source, text)?, given.clone())))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_flag_wins_over_the_variable_and_auto_reads_the_scheduler() {
        let env = |k: &str| match k {
            "LIFTGATE_SHARD" => Some("auto".to_string()),
            "JOB_COMPLETION_INDEX" => Some("1".to_string()),
            "LIFTGATE_SHARD_COUNT" => Some("3".to_string()),
            _ => None,
        };
        let (spec, from) = shard_spec(Some("0/2"), env).unwrap().unwrap();
        assert_eq!((spec.index, spec.count), (0, 2));
        assert_eq!(from, "--shard 0/2");
        let (spec, from) = shard_spec(None, env).unwrap().unwrap();
        assert_eq!((spec.index, spec.count), (1, 3));
        assert!(
            from.contains("JOB_COMPLETION_INDEX=1") && from.contains("LIFTGATE_SHARD=auto"),
            "{from}"
        );
        assert!(shard_spec(None, |_| None).unwrap().is_none());
        let err = shard_spec(Some("auto"), |_| None).unwrap_err().to_string();
        assert!(err.starts_with("--shard auto: neither"), "{err}");
        let err = shard_spec(None, |k| (k == "LIFTGATE_SHARD").then(|| "5/5".to_string()))
            .unwrap_err()
            .to_string();
        assert!(
            err.starts_with("LIFTGATE_SHARD: shard 5 does not exist") && err.contains("0 to 4"),
            "{err}"
        );
    }
}
