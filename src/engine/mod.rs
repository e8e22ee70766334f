//! Engine stage: the only place that knows tensors exist. Input: a GGUF judge model
//! and token sequences. Output: token ids, log-probabilities, generated text.
//! Never reads answers files or rubrics, never prints.

pub mod arch;
pub mod attention;
pub mod bench;
pub mod chat;
pub mod decoder;
pub mod error;
pub mod gguf;
pub mod gguf_check;
pub mod kernels;
pub mod linear;
pub mod ops;
pub mod session;
pub mod tokenizer;

pub use error::EngineError;

/// Revision of the engine's arithmetic. Bump it with any change that can alter one
/// bit of a judge's output (a reduction order, a norm, a rounding rule): run folders
/// record it, so a run graded with other arithmetic is refused on resume instead of
/// mixing records from two engines. 2: RMS norm summed in lanes.
pub const NUMERICS: u32 = 2;
pub use gguf::{GgufFile, ModelInfo};
pub use session::{JudgeModel, SlotRequest, WorkCounters};
