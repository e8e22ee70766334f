//! Errors of the statistics stage: input shapes and values a statistic cannot use.
//! Pure: never does I/O, never prints.

/// Why a statistic could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum StatsError {
    /// Two inputs that must pair up have different lengths.
    #[error("inputs have different lengths: {left} and {right}")]
    LengthMismatch { left: usize, right: usize },
    /// Too few observations for the statistic.
    #[error("need at least {needed} observations, got {got}")]
    TooFew { needed: usize, got: usize },
    /// A value lies outside the declared scale or domain.
    #[error("value {value} is outside the allowed range: {allowed}")]
    OutOfRange { value: String, allowed: String },
    /// The statistic is undefined for this input (e.g. zero variance).
    #[error("undefined for this input: {0}")]
    Undefined(String),
    /// An iterative fit did not converge.
    #[error("fit did not converge after {iterations} iterations")]
    NoConvergence { iterations: usize },
}
