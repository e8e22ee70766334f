//! Engine stage, model family Llama (`general.architecture = llama`; also the files of
//! many Llama-shaped models). Input: the metadata of such a file. Output: its block
//! description. Never reads tensor data.
//!
//! Layout: standard pre-norm blocks, RoPE over adjacent dimension pairs (llama.cpp
//! converts Llama checkpoints so that its "normal" RoPE applies), SiLU-gated
//! feed-forward, output projection of its own or tied to the embedding table. Linear
//! RoPE scaling and Llama 3.1's per-frequency divisors (`rope_freqs.weight`) come from
//! the file; other scaling kinds are refused (`Meta::rope`).

use super::{Family, Meta, Plan};
use crate::engine::ops::RopePairs;
use crate::engine::EngineError;

/// The table entry.
pub const FAMILY: Family = Family {
    name: "llama",
    layout: "RoPE on adjacent pairs",
    describe,
};

fn describe(m: &Meta) -> Result<Plan, EngineError> {
    let dims = m.dims(false)?;
    let rope = m.rope(RopePairs::Adjacent, 1e4)?;
    Ok(Plan::standard(dims, rope))
}
