//! Engine stage, model family Qwen2 / Qwen2.5 (`general.architecture = qwen2`). Input:
//! the metadata of such a file. Output: its block description. Never reads tensor data.
//!
//! Layout: standard pre-norm blocks with biases on the query, key and value projections
//! (loaded because the file has them), RoPE over the two halves of each head (GPT-NeoX
//! layout, as llama.cpp runs `qwen2`), SiLU-gated feed-forward, an output projection of
//! its own or tied to the embedding table. RoPE base `rope.freq_base`, default 10000
//! as in llama.cpp.

use super::{Family, Meta, Plan};
use crate::engine::ops::RopePairs;
use crate::engine::EngineError;

/// The table entry.
pub const FAMILY: Family = Family {
    name: "qwen2",
    layout: "q/k/v biases, RoPE on head halves",
    describe,
};

fn describe(m: &Meta) -> Result<Plan, EngineError> {
    let dims = m.dims(false)?;
    let rope = m.rope(RopePairs::Halves, 1e4)?;
    Ok(Plan::standard(dims, rope))
}
