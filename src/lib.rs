//! assize: grade open-ended answers with a small local judge model on a CPU, vet the
//! judge against human labels, and estimate quality with honest intervals.
//!
//! The flow, one module per stage:
//! `data` + `rubric` -> forms -> `engine` (token probabilities) -> `judge` (verdicts)
//! -> `stats` / `probes` -> `report`. See ARCHITECTURE.md.

pub mod calibrate;
pub mod cli;
pub mod data;
pub mod engine;
pub mod guard;
pub mod jobs;
pub mod judge;
pub mod overlap;
pub mod probes;
pub mod report;
pub mod rubric;
pub mod stats;
pub mod store;
pub mod vet;
