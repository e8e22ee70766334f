//! Engine stage: the only place that knows tensors exist. Input: a GGUF judge model
//! and token sequences. Output: token ids, log-probabilities, generated text.
//! Never reads answers files or rubrics, never prints.

pub mod error;
pub mod gguf;

pub use error::EngineError;
pub use gguf::{GgufFile, ModelInfo};
