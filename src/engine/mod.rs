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
pub use gguf::{GgufFile, ModelInfo};
pub use session::{JudgeModel, SlotRequest, WorkCounters};
