//! liftgate: shows, on held-out questions, whether a LoRA fine-tune answers better than its base
//! model, with paired statistics and a go/no-go verdict, on CPU.
//!
//! The pipeline, one module each (see DEVELOPERS.md):
//! question set → `answer` (model load, LoRA merge, chat template, greedy decode) → answers →
//! `grade` (scorers) → grades → `weigh` (paired statistics, gate policy) → summary.json and
//! report.md.

pub mod answers;
pub mod chat;
pub mod cli;
pub mod commands;
pub mod error;
pub mod fsutil;
pub mod generate;
pub mod grades;
pub mod history;
pub mod interrupt;
pub mod journal;
pub mod model;
pub mod policy;
pub mod questions;
pub mod report;
pub mod score;
pub mod stats;
pub mod weigh;

pub use error::{Error, Result};
