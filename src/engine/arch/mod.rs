//! Engine stage, model families: the table of families the decoder runs, and the block
//! description ("plan") each family file makes from a GGUF file's metadata and tensor
//! names. Input: an opened GGUF header. Output: a `Plan` the shared decoder loads and
//! runs. Never reads tensor data and never computes anything: a family is data for the
//! decoder, so no code outside these files asks which family a model belongs to.
//!
//! Adding a family: one file here with a `FAMILY` constant, one line in `FAMILIES`
//! (DEVELOPERS.md, "Adding a model family").

mod gemma3;
mod llama;
mod phi3;
mod qwen2;
mod qwen3;

use std::ops::Range;

use super::gguf::GgufFile;
use super::ops::{Activation, RopePairs};
use super::EngineError;

/// One model family, as named in `general.architecture`.
pub struct Family {
    /// `general.architecture`.
    pub name: &'static str,
    /// What sets the family's blocks apart, in a few words (`assize model info`).
    pub layout: &'static str,
    /// The block description of a file of this family.
    pub describe: fn(&Meta) -> Result<Plan, EngineError>,
}

/// Every family the decoder runs.
pub const FAMILIES: &[Family] = &[
    qwen2::FAMILY,
    llama::FAMILY,
    gemma3::FAMILY,
    qwen3::FAMILY,
    phi3::FAMILY,
];

/// The family named `arch`, if the decoder runs it.
pub fn find(arch: &str) -> Option<&'static Family> {
    FAMILIES.iter().find(|f| f.name == arch)
}

/// Names of every family, in table order.
pub fn names() -> Vec<&'static str> {
    FAMILIES.iter().map(|f| f.name).collect()
}

/// The family of `gguf`, or an error naming the file and the families there are.
pub fn family_of(gguf: &GgufFile) -> Result<&'static Family, EngineError> {
    let arch = gguf.arch()?;
    find(&arch).ok_or_else(|| EngineError::UnsupportedArch {
        path: gguf.path.clone(),
        arch,
        supported: names().join(", "),
    })
}

/// The block description of `gguf`.
pub fn plan(gguf: &GgufFile) -> Result<Plan, EngineError> {
    let family = family_of(gguf)?;
    (family.describe)(&Meta {
        gguf,
        arch: family.name,
    })
}

/// What the decoder loads and runs for one file.
#[derive(Debug, Clone)]
pub struct Plan {
    /// Sizes of the model.
    pub dims: Dims,
    /// Rotary position embeddings.
    pub rope: Rope,
    /// Gated feed-forward activation.
    pub activation: Activation,
    /// Multiplier of token embeddings (Gemma 3: sqrt(hidden)).
    pub embed_scale: Option<f32>,
    /// Sliding-window width of the blocks that use one, in tokens including the current.
    pub sliding_window: Option<usize>,
    /// Token embedding table.
    pub embed: String,
    /// Output projection; when the file lacks it, the embedding table serves (tied).
    pub output: String,
    /// Final RMS norm.
    pub output_norm: String,
    /// One entry per transformer block.
    pub blocks: Vec<Block>,
}

/// Sizes read from the metadata.
#[derive(Debug, Clone, Copy)]
pub struct Dims {
    /// Transformer blocks.
    pub layers: usize,
    /// Residual width.
    pub hidden: usize,
    /// Query heads.
    pub heads: usize,
    /// Key/value heads.
    pub kv_heads: usize,
    /// Width of one attention head.
    pub head_dim: usize,
    /// Feed-forward width.
    pub ffn: usize,
    /// Trained context length.
    pub context_length: usize,
    /// RMS-norm epsilon.
    pub rms_eps: f32,
}

/// Rotary position embeddings (Su et al. 2021) of a family.
#[derive(Debug, Clone)]
pub struct Rope {
    /// Which dimensions rotate together.
    pub pairs: RopePairs,
    /// Base of global-attention blocks.
    pub base: f32,
    /// Base of sliding-window blocks (equals `base` where there are none).
    pub base_local: f32,
    /// Position multiplier of linear scaling on global blocks (1 when unscaled).
    pub position_scale: f32,
    /// Optional tensor of per-frequency divisors (`head_dim / 2` values).
    pub factors: String,
}

/// One weight matrix: a whole tensor, or a row range of a fused one.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Part {
    /// Tensor name.
    pub tensor: String,
    /// Output rows taken from a fused tensor; `None` for the whole tensor.
    pub rows: Option<Range<usize>>,
}

impl Part {
    /// A whole tensor.
    pub fn whole(tensor: String) -> Self {
        Part { tensor, rows: None }
    }
}

/// One transformer block: pre-norm attention and gated feed-forward, each with an
/// optional norm of its output before the residual addition.
#[derive(Debug, Clone)]
pub struct Block {
    /// Norm before attention.
    pub attn_norm: String,
    /// Query, key, value and output projections.
    pub q: Part,
    pub k: Part,
    pub v: Part,
    pub o: Part,
    /// Biases of q, k, v, added when the file has them.
    pub qkv_bias: [String; 3],
    /// Per-head RMS norms of queries and keys before RoPE.
    pub qk_norm: Option<[String; 2]>,
    /// Norm of the attention output before the residual addition.
    pub post_attn_norm: Option<String>,
    /// Norm before the feed-forward block.
    pub ffn_norm: String,
    /// Gate, up and down projections.
    pub gate: Part,
    pub up: Part,
    pub down: Part,
    /// Norm of the feed-forward output before the residual addition.
    pub post_ffn_norm: Option<String>,
    /// Attends to the last `sliding_window` tokens only, with the local RoPE base and
    /// no position scaling.
    pub local: bool,
}

impl Block {
    /// Block `i` in the tensor names llama.cpp gives every family: separate q/k/v and
    /// gate/up weights, optional q/k/v biases, no extra norms.
    pub fn standard(i: usize) -> Self {
        let p = |s: &str| format!("blk.{i}.{s}");
        Block {
            attn_norm: p("attn_norm.weight"),
            q: Part::whole(p("attn_q.weight")),
            k: Part::whole(p("attn_k.weight")),
            v: Part::whole(p("attn_v.weight")),
            o: Part::whole(p("attn_output.weight")),
            qkv_bias: [p("attn_q.bias"), p("attn_k.bias"), p("attn_v.bias")],
            qk_norm: None,
            post_attn_norm: None,
            ffn_norm: p("ffn_norm.weight"),
            gate: Part::whole(p("ffn_gate.weight")),
            up: Part::whole(p("ffn_up.weight")),
            down: Part::whole(p("ffn_down.weight")),
            post_ffn_norm: None,
            local: false,
        }
    }

    /// Block `i` with per-head q/k RMS norms (`attn_q_norm`, `attn_k_norm`).
    pub fn with_qk_norm(mut self, i: usize) -> Self {
        let p = |s: &str| format!("blk.{i}.{s}");
        self.qk_norm = Some([p("attn_q_norm.weight"), p("attn_k_norm.weight")]);
        self
    }
}

impl Plan {
    /// A plan with standard blocks and tensor names, SiLU, no window.
    pub fn standard(dims: Dims, rope: Rope) -> Self {
        Plan {
            blocks: (0..dims.layers).map(Block::standard).collect(),
            dims,
            rope,
            activation: Activation::Silu,
            embed_scale: None,
            sliding_window: None,
            embed: "token_embd.weight".into(),
            output: "output.weight".into(),
            output_norm: "output_norm.weight".into(),
        }
    }
}

/// Metadata of one file, read under its family's key prefix.
pub struct Meta<'a> {
    /// The file.
    pub gguf: &'a GgufFile,
    /// Key prefix (`general.architecture`).
    pub arch: &'static str,
}

impl Meta<'_> {
    /// `{arch}.{key}`.
    pub fn key(&self, key: &str) -> String {
        format!("{}.{key}", self.arch)
    }

    /// A required unsigned integer.
    pub fn uint(&self, key: &str) -> Result<usize, EngineError> {
        Ok(self.gguf.uint(&self.key(key))? as usize)
    }

    /// The first of `keys` present as an unsigned integer (newer spelling first).
    pub fn uint_of(&self, keys: &[&str]) -> Option<usize> {
        keys.iter().find_map(|k| self.uint(k).ok())
    }

    /// The first of `keys` present as a float, else `default`.
    pub fn float_of(&self, keys: &[&str], default: f32) -> f32 {
        keys.iter()
            .find_map(|k| self.gguf.float(&self.key(k)).ok())
            .map_or(default, |v| v as f32)
    }

    /// Whether the file has tensor `name`.
    pub fn has_tensor(&self, name: &str) -> bool {
        self.gguf.content.tensor_infos.contains_key(name)
    }

    /// Sizes shared by every family; the head width is `attention.key_length`, or
    /// `hidden / heads` where the file omits it and `head_dim_required` is false.
    pub fn dims(&self, head_dim_required: bool) -> Result<Dims, EngineError> {
        let hidden = self.uint("embedding_length")?;
        let heads = self.uint("attention.head_count")?;
        let kv_heads = self.uint("attention.head_count_kv")?;
        let head_dim = match self.uint("attention.key_length") {
            Ok(d) => d,
            Err(_) if !head_dim_required => hidden / heads.max(1),
            Err(e) => return Err(e),
        };
        if heads == 0 || kv_heads == 0 || heads % kv_heads != 0 || head_dim % 2 != 0 {
            return Err(EngineError::Metadata {
                path: self.gguf.path.clone(),
                key: self.key("attention.head_count_kv"),
                expected: "head counts where query heads are a multiple of key/value heads".into(),
            });
        }
        Ok(Dims {
            layers: self.uint("block_count")?,
            hidden,
            heads,
            kv_heads,
            head_dim,
            ffn: self.uint("feed_forward_length")?,
            context_length: self.uint("context_length")?,
            rms_eps: self
                .gguf
                .float(&self.key("attention.layer_norm_rms_epsilon"))? as f32,
        })
    }

    /// RoPE with `pairs`, base `rope.freq_base` (else `default_base`), linear scaling
    /// from the file, the standard divisor tensor, no local base.
    pub fn rope(&self, pairs: RopePairs, default_base: f32) -> Result<Rope, EngineError> {
        let base = self.float_of(&["rope.freq_base"], default_base);
        Ok(Rope {
            pairs,
            base,
            base_local: base,
            position_scale: self.rope_scaling()?,
            factors: "rope_freqs.weight".into(),
        })
    }

    /// Position multiplier of `{arch}.rope.scaling.*`: 1 without scaling, `1 / factor`
    /// for linear scaling. YaRN and other kinds change attention in ways the decoder
    /// does not implement, so such files are refused rather than run with wrong
    /// positions.
    fn rope_scaling(&self) -> Result<f32, EngineError> {
        let g = self.gguf;
        let kind = g.string(&self.key("rope.scaling.type")).ok();
        let float = |k: &str| g.float(&self.key(k)).ok().map(|f| f as f32);
        // llama.cpp's older key for the same linear factor.
        let (factor, legacy) = (float("rope.scaling.factor"), float("rope.scale_linear"));
        let bad = |key: &str, expected: &str| EngineError::Metadata {
            path: g.path.clone(),
            key: self.key(key),
            expected: expected.into(),
        };
        match (kind.as_deref(), factor, legacy) {
            (Some("none"), _, _) | (None, _, None) => Ok(1.0),
            (Some("linear"), Some(f), _) | (None, _, Some(f)) if f > 0.0 => Ok(1.0 / f),
            (Some("linear"), _, _) => Err(bad(
                "rope.scaling.factor",
                "a positive factor for linear scaling",
            )),
            (Some(other), _, _) => Err(EngineError::UnsupportedFeature {
                path: g.path.clone(),
                key: self.key("rope.scaling.type"),
                found: other.into(),
                supported: "none, linear".into(),
            }),
            (None, _, Some(_)) => Err(bad("rope.scale_linear", "a positive factor")),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every family is in the table once, under the name its file declares.
    #[test]
    fn family_names_are_unique_and_found() {
        let names = names();
        for (i, n) in names.iter().enumerate() {
            assert!(!names[..i].contains(n), "{n} twice");
            assert_eq!(find(n).map(|f| f.name), Some(*n));
        }
        assert!(find("mamba").is_none());
    }
}
