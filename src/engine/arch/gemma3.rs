//! Engine stage, model family Gemma 3 (`general.architecture = gemma3`, text models).
//! Input: the metadata of such a file. Output: its block description. Never reads
//! tensor data.
//!
//! Layout (Gemma Team 2025): token embeddings scaled by sqrt(hidden); per-head q/k RMS
//! norms before RoPE; an RMS norm on the attention output and on the feed-forward output
//! before each residual addition; tanh-GELU-gated feed-forward; output tied to the
//! embedding table. Most blocks attend through a sliding window with their own RoPE
//! base; every n-th block attends globally with the file's base and its position
//! scaling.
//!
//! Keys, llama.cpp's converter spelling first, candle-transformers' older one second:
//! local RoPE base `rope.freq_base_swa`, else `rope.local_freq_base`, else 10000 (the
//! value llama.cpp and candle fix for Gemma 3); window pattern
//! `attention.sliding_window_pattern`, else `attention.sliding_window_type`, else 6.
//! The pattern is a period n (block i, from 0, is global when (i + 1) is a multiple of
//! n, as in both implementations) or, from memory of llama.cpp's writer, one boolean per
//! block, true for a sliding-window block.

use candle_core::quantized::gguf_file::Value;

use super::{Block, Family, Meta, Plan};
use crate::engine::ops::{Activation, RopePairs};
use crate::engine::EngineError;

/// The table entry.
pub const FAMILY: Family = Family {
    name: "gemma3",
    layout: "q/k norms, post-norms, sliding-window blocks, GELU",
    describe,
};

/// Window pattern key, llama.cpp's spelling, then candle-transformers'.
const PATTERN_KEYS: [&str; 2] = [
    "attention.sliding_window_pattern",
    "attention.sliding_window_type",
];

fn describe(m: &Meta) -> Result<Plan, EngineError> {
    let dims = m.dims(true)?;
    let mut rope = m.rope(RopePairs::Halves, 1e6)?;
    rope.base_local = m.float_of(&["rope.freq_base_swa", "rope.local_freq_base"], 1e4);
    let local = local_blocks(m, dims.layers)?;
    let mut plan = Plan::standard(dims, rope);
    plan.activation = Activation::GeluTanh;
    plan.embed_scale = Some((dims.hidden as f32).sqrt());
    plan.sliding_window = Some(m.uint("attention.sliding_window")?);
    for (i, (b, local)) in plan.blocks.iter_mut().zip(local).enumerate() {
        let p = |s: &str| format!("blk.{i}.{s}");
        *b = Block {
            post_attn_norm: Some(p("post_attention_norm.weight")),
            post_ffn_norm: Some(p("post_ffw_norm.weight")),
            local,
            ..Block::standard(i).with_qk_norm(i)
        };
    }
    Ok(plan)
}

/// Which of `layers` blocks use the sliding window.
fn local_blocks(m: &Meta, layers: usize) -> Result<Vec<bool>, EngineError> {
    let flags = PATTERN_KEYS
        .iter()
        .find_map(|k| match m.gguf.value(&m.key(k)) {
            Some(Value::Array(v)) => Some(
                v.iter()
                    .map(|x| x.to_bool().ok())
                    .collect::<Option<Vec<bool>>>(),
            ),
            _ => None,
        });
    if let Some(flags) = flags {
        return match flags {
            Some(f) if f.len() == layers => Ok(f),
            _ => Err(EngineError::Metadata {
                path: m.gguf.path.clone(),
                key: m.key(PATTERN_KEYS[0]),
                expected: format!("a period, or {layers} booleans (one per block)"),
            }),
        };
    }
    let period = m.uint_of(&PATTERN_KEYS).unwrap_or(6).max(1);
    Ok((0..layers)
        .map(|i| !(i + 1).is_multiple_of(period))
        .collect())
}
