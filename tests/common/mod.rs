//! Shared helpers of the integration tests: synthetic tiny GGUF models and the
//! location of the real judge models. Never downloads anything.

#![allow(dead_code)]

pub mod tiny_gguf;

use std::path::PathBuf;

/// Directory of the real models: `ASSIZE_MODELS_DIR`, else `models/` in the crate.
pub fn models_dir() -> PathBuf {
    match std::env::var_os("ASSIZE_MODELS_DIR") {
        Some(dir) => PathBuf::from(dir),
        None => PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("models"),
    }
}

/// Path of a real model file; panics with the fix when it is missing.
pub fn real_model(file: &str) -> PathBuf {
    let path = models_dir().join(file);
    assert!(
        path.is_file(),
        "model `{}` is missing; run `scripts/fetch-models --all` (or set ASSIZE_MODELS_DIR)",
        path.display()
    );
    path
}
pub mod grading;
