//! `liftgate answer`: arguments → [`answer::Settings`] → [`answer::answer_to`].

use super::{args, Outcome};
use crate::answer;
use crate::cli::AnswerArgs;
use crate::error::{Error, Result};
use crate::formats::questions::QuestionSet;
use crate::fsutil;
use crate::interrupt::StopFlag;

pub fn run(args: &AnswerArgs) -> Result<Outcome> {
    let mut settings = answer::Settings::new(
        &args.model,
        args.adapter.as_deref(),
        args.merge.unwrap_or_default(),
        args::default_generation(&args.generation)?,
        args.restart,
    )?;
    if let Some(name) = &args.name {
        args::check_name("--name", name)?;
        settings.name = Some(name.clone());
    }
    if !args.questions.is_file() {
        return Err(Error::usage(format!(
            "--questions {}: no such file",
            args.questions.display()
        )));
    }
    if args.out.is_dir() {
        return Err(Error::usage(format!(
            "--out {}: is a directory; expected a file path",
            args.out.display()
        )));
    }
    if fsutil::same_file(&args.out, &args.questions) {
        return Err(Error::usage(format!(
            "--out {} is the --questions file; choose another path so the input is not overwritten",
            args.out.display()
        )));
    }
    let set = QuestionSet::load(&args.questions)?;
    let stop = StopFlag::install()?;
    answer::answer_to(&args.out, &settings, &set, &stop)?;
    Ok(Outcome::Success)
}
