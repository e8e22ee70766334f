//! Statistics stage: agreement, correlation, calibration, bootstrap, ranking and
//! estimation on plain numbers. Input: slices of scores, labels and probabilities.
//! Output: numbers and small result structs. Never does I/O and never draws a
//! random number from anywhere but the seeded generator it is handed.

pub mod error;
pub use error::StatsError;
pub mod agreement;
pub mod bootstrap;
pub mod calibration;
pub mod correlation;
pub mod intervals;
pub mod isotonic;
pub mod krippendorff;
pub mod logistic;
pub mod ordinal;
pub mod pairwise;
pub mod ppi;
pub mod ranking;
pub mod sample_size;
pub mod scoring;
