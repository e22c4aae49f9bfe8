//! `liftgate vet` (placeholder until its issue lands).

use super::Outcome;
use crate::cli::VetArgs;
use crate::error::{Error, Result};

pub fn run(_args: &VetArgs) -> Result<Outcome> {
    Err(Error::internal("`vet` is not built yet"))
}
