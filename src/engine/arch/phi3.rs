//! Engine stage, model family Phi-3 (`general.architecture = phi3`, 4k-context files).
//! Input: the metadata of such a file. Output: its block description. Never reads
//! tensor data.
//!
//! Layout: standard pre-norm blocks whose query, key and value projections are one
//! fused tensor (`attn_qkv`: rows q, then k, then v) and whose gate and up projections
//! are one fused tensor (`ffn_up`: gate rows, then up rows), as llama.cpp and
//! candle-transformers' `quantized_phi3` read them; each part becomes a weight of its
//! own at load. RoPE over head halves with base `rope.freq_base` (default 10000), an
//! output projection of its own.
//!
//! Refused rather than run wrong: long-context files (`rope_factors_long` /
//! `rope_factors_short` tensors, LongRoPE) and partial rotary embeddings
//! (`rope.dimension_count` below the head width). The sliding window some files declare
//! is not applied, as llama.cpp and candle do not apply it either; judge prompts are far
//! shorter than it.

use super::{Block, Family, Meta, Part, Plan};
use crate::engine::ops::RopePairs;
use crate::engine::EngineError;

/// The table entry.
pub const FAMILY: Family = Family {
    name: "phi3",
    layout: "fused qkv and gate-up tensors",
    describe,
};

fn describe(m: &Meta) -> Result<Plan, EngineError> {
    let dims = m.dims(false)?;
    for t in ["rope_factors_long.weight", "rope_factors_short.weight"] {
        if m.has_tensor(t) {
            return Err(EngineError::Tensor {
                path: m.gguf.path.clone(),
                tensor: t.into(),
                reason: "long-context RoPE factors (LongRoPE) are not implemented; \
                         use a 4k-context Phi-3 file"
                    .into(),
            });
        }
    }
    if let Some(d) = m.uint_of(&["rope.dimension_count"]) {
        if d != dims.head_dim {
            return Err(EngineError::UnsupportedFeature {
                path: m.gguf.path.clone(),
                key: m.key("rope.dimension_count"),
                found: d.to_string(),
                supported: format!("the head width {}", dims.head_dim),
            });
        }
    }
    let rope = m.rope(RopePairs::Halves, 1e4)?;
    let (q, kv, ffn) = (
        dims.heads * dims.head_dim,
        dims.kv_heads * dims.head_dim,
        dims.ffn,
    );
    let part = |name: &str, from: usize, len: usize| Part {
        tensor: name.to_string(),
        rows: Some(from..from + len),
    };
    let mut plan = Plan::standard(dims, rope);
    for (i, b) in plan.blocks.iter_mut().enumerate() {
        let (qkv, up) = (
            format!("blk.{i}.attn_qkv.weight"),
            format!("blk.{i}.ffn_up.weight"),
        );
        *b = Block {
            q: part(&qkv, 0, q),
            k: part(&qkv, q, kv),
            v: part(&qkv, q + kv, kv),
            gate: part(&up, 0, ffn),
            up: part(&up, ffn, ffn),
            ..Block::standard(i)
        };
    }
    Ok(plan)
}
