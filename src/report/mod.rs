//! Reports of a weighing (issue 2, "Reports"): the data (`summary`, the summary.json format)
//! kept apart from its renderings, one module per format: `markdown` (report.md) and `terminal`
//! (the short table `weigh` prints).

pub mod summary;
