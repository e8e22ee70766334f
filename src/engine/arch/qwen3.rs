//! Engine stage, model family Qwen3 (`general.architecture = qwen3`, dense models).
//! Input: the metadata of such a file. Output: its block description. Never reads
//! tensor data.
//!
//! Layout: Qwen2's blocks without the q/k/v biases and with a per-head RMS norm of
//! queries and keys (`attn_q_norm`, `attn_k_norm`, `head_dim` values each) before RoPE,
//! as llama.cpp and candle-transformers' `quantized_qwen3` run it. The head width is
//! `attention.key_length` (Qwen3 heads are wider than `hidden / heads`), else
//! `hidden / heads` as llama.cpp falls back.

use super::{Block, Family, Meta, Plan};
use crate::engine::ops::RopePairs;
use crate::engine::EngineError;

/// The table entry.
pub const FAMILY: Family = Family {
    name: "qwen3",
    layout: "per-head q/k RMS norm, RoPE on head halves",
    describe,
};

fn describe(m: &Meta) -> Result<Plan, EngineError> {
    let dims = m.dims(false)?;
    let rope = m.rope(RopePairs::Halves, 1e4)?;
    let mut plan = Plan::standard(dims, rope);
    plan.blocks = (0..dims.layers)
        .map(|i| Block::standard(i).with_qk_norm(i))
        .collect();
    Ok(plan)
}
