//! `liftgate answer` (placeholder until its issue lands).

use super::Outcome;
use crate::cli::AnswerArgs;
use crate::error::{Error, Result};

pub fn run(_args: &AnswerArgs) -> Result<Outcome> {
    Err(Error::internal("`answer` is not built yet"))
}
