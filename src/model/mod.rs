//! (being built)
pub mod lora;
