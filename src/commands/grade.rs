//! `liftgate grade` (placeholder until its issue lands).

use super::Outcome;
use crate::cli::GradeArgs;
use crate::error::{Error, Result};

pub fn run(_args: &GradeArgs) -> Result<Outcome> {
    Err(Error::internal("`grade` is not built yet"))
}
