//! Calibration stage: learn from human-labelled items a mapping from the judges'
//! evidence to the human consensus, and apply it. Input: `GradeRecord`s of one or
//! more judge runs (each label's probability, captured mass and expected score for
//! every criterion graded), optional reference-overlap scores, and consensus scale
//! positions of the labelled items. Output: calibrated predictions (a distribution
//! over the scale and an expected score) that are out of sample for every labelled
//! item (K-fold cross-fitting), a mapping fitted on all labelled items that can be
//! saved and applied to new runs of the same setup, and the checks that refuse a run
//! that does not match. Never does I/O, never scores a model on an item it was fitted
//! on, and draws every random number from the seed it is given.
//!
//! Models (chosen per fold by an inner cross-validation on squared error of the
//! expected score): the proportional-odds model with a ridge penalty (McCullagh
//! 1980) on standardised features, or isotonic regression of the consensus value on
//! one judge's expected score.

mod crossfit;
mod features;
mod mapping;
mod model;

pub use crossfit::{cross_fit, group_folds, CrossFit};
pub use features::{FeatureTable, Source};
pub use mapping::{calibrated_record, MAPPING_FORMAT};
pub use mapping::{MappingFile, MappingMismatch, SavedMapping, SourceFingerprint};
pub use model::{choose_and_fit, Calibrator, Method, Prediction, Target};
