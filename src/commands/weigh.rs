//! `liftgate weigh` (placeholder until its issue lands).

use super::Outcome;
use crate::cli::WeighArgs;
use crate::error::{Error, Result};

pub fn run(_args: &WeighArgs) -> Result<Outcome> {
    Err(Error::internal("`weigh` is not built yet"))
}
