//! liftgate: shows, on held-out questions, whether a LoRA fine-tune answers better than its base
//! model, with paired statistics and a go/no-go verdict, on CPU.
//!
//! The source is laid out as the pipeline (DEVELOPERS.md maps each stage to its files):
//! question set → `answer` (model load, LoRA, chat template, greedy decoding) → answers →
//! `grade` (scorers in `score`) → grades → `weigh` (paired statistics in `stats`, gate
//! `policy`) → summary → `report` (summary.json, report.md, terminal table). The file formats
//! between the stages live in `formats`; `commands` turns each subcommand's arguments into
//! settings and calls the stages.

pub mod answer;
pub mod chat;
pub mod cli;
pub mod commands;
pub mod embed;
pub mod error;
pub mod formats;
pub mod fsutil;
pub mod grade;
pub mod history;
pub mod interrupt;
pub mod kernels;
pub mod model;
pub mod policy;
pub mod report;
pub mod score;
pub mod stats;
pub mod weigh;

pub use error::{Error, Result};
