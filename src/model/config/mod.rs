//! Reading `config.json` and `generation_config.json` the way transformers 5.24 does, into one
//! [`ModelSpec`] of per-family options for the generic decoder.
//!
//! Every rule here comes from docs/model-formats.md §1.2–§1.4 and §2.4–§2.6 (transformers
//! 5.24.0, `configuration_*.py` and `modeling_rope_utils.py`). The decoder never looks at the
//! raw JSON: family differences are spelled out as fields (norm style, activation, biases,
//! soft-caps, ...) so adding a family means filling in a spec, not writing another model.
//!
//! `spec` builds the [`ModelSpec`] and its per-layer attention windows, `family` names the
//! families and their kinds of norm and activation, `rope` reads the RoPE settings,
//! `generation` reads generation_config.json, `json` gives typed access to a config object.

mod family;
mod generation;
mod json;
mod rope;
mod spec;

pub use family::{Activation, Family, NormStyle};
pub use generation::GenerationDefaults;
pub use rope::{RopeScaling, RopeSpec};
pub use spec::ModelSpec;
