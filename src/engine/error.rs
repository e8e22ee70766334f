//! Errors of the engine stage: model files, tokenizer, chat template, forward passes.
//! Every variant names the file, tensor or item it concerns, keeps the underlying
//! cause as a source, and never flattens it into a string where a source exists.

use std::path::PathBuf;

/// Why the engine could not load or run a judge model.
#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    /// The model file could not be opened or read.
    #[error("cannot read model file `{path}`")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// The file is not a GGUF file, or its header is damaged.
    #[error("`{path}` is not a readable GGUF model file: {reason}")]
    NotGguf { path: PathBuf, reason: String },
    /// A header field is impossible: the file is damaged.
    #[error("`{path}` is damaged: {field} {reason}")]
    Damaged {
        path: PathBuf,
        field: String,
        reason: String,
    },
    /// The file ends before the tensor data it declares (an interrupted download).
    #[error("`{path}` is truncated: tensor `{tensor}` needs bytes up to {needed}, the file has {actual}")]
    Truncated {
        path: PathBuf,
        tensor: String,
        needed: u64,
        actual: u64,
    },
    /// A metadata key the engine needs is absent or has the wrong type.
    #[error("`{path}` lacks metadata `{key}` ({expected})")]
    Metadata {
        path: PathBuf,
        key: String,
        expected: String,
    },
    /// The model architecture is not one the engine implements.
    #[error(
        "`{path}` has architecture `{arch}`, which assize does not run (supported: {supported})"
    )]
    UnsupportedArch {
        path: PathBuf,
        arch: String,
        supported: String,
    },
    /// The file asks for a feature of its architecture that the engine does not
    /// implement (a RoPE scaling kind, say); running it anyway would give wrong scores.
    #[error("`{path}` sets `{key}` to `{found}`, which assize does not implement (supported: {supported})")]
    UnsupportedFeature {
        path: PathBuf,
        key: String,
        found: String,
        supported: String,
    },
    /// A tensor the architecture needs is missing or has an unexpected shape.
    #[error("`{path}`: tensor `{tensor}`: {reason}")]
    Tensor {
        path: PathBuf,
        tensor: String,
        reason: String,
    },
    /// The tokenizer described by the model metadata could not be built.
    #[error("cannot build the tokenizer of `{path}`: {reason}")]
    Tokenizer { path: PathBuf, reason: String },
    /// The chat template could not be parsed or rendered.
    #[error("chat template of `{path}` failed")]
    Template {
        path: PathBuf,
        #[source]
        source: minijinja::Error,
    },
    /// A prompt does not fit into the context window.
    #[error("{item}: prompt has {tokens} tokens, more than the context limit of {limit}")]
    ContextOverflow {
        item: String,
        tokens: usize,
        limit: usize,
    },
    /// A tensor operation failed inside candle.
    #[error("tensor operation failed: {context}")]
    Candle {
        context: String,
        #[source]
        source: candle_core::Error,
    },
    /// A caller passed an argument the engine cannot use.
    #[error("{0}")]
    Invalid(String),
}

impl EngineError {
    /// Wrap a candle error with what was being done.
    pub fn candle(context: impl Into<String>) -> impl FnOnce(candle_core::Error) -> EngineError {
        let context = context.into();
        move |source| EngineError::Candle { context, source }
    }
}
