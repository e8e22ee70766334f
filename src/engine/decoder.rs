//! Transformer decoder of the judge model (Qwen2, Llama, Gemma 3). Input: an opened
//! GGUF file and token ids. Output: next-token logits, with a key/value cache that can
//! be forked to share a prompt prefix between continuations. Never truncates a prompt
//! silently (overflow is an error) and never reads anything but the GGUF file.
//!
//! Threads: candle's CPU kernels size their worker pools from `RAYON_NUM_THREADS` /
//! `CANDLE_NUM_THREADS` the first time a kernel runs. `Decoder::load` sets both to
//! `LoadOptions::threads` (0 = leave them, i.e. all cores) before any kernel runs; the
//! first load in a process fixes the count, and `DecoderConfig::threads` reports the
//! count in effect.

use std::sync::OnceLock;

use super::gguf::GgufFile;
use super::linear::{
    activate, add_bias, add_into, attention, rms_norm, rope, rope_freqs, AttnShape, Embedding,
    Linear, Loader, MatmulPolicy,
};
use super::EngineError;

/// Shape and numerics of a loaded decoder, read from the GGUF metadata.
#[derive(Debug, Clone)]
pub struct DecoderConfig {
    /// `general.architecture`: `qwen2`, `llama` or `gemma3`.
    pub arch: String,
    /// Transformer blocks.
    pub layers: usize,
    /// Residual width.
    pub hidden: usize,
    /// Query heads.
    pub heads: usize,
    /// Key/value heads (grouped-query attention when fewer than `heads`).
    pub kv_heads: usize,
    /// Width of one attention head.
    pub head_dim: usize,
    /// Vocabulary size (rows of the output projection).
    pub vocab: usize,
    /// Trained context length from the file.
    pub context_length: usize,
    /// Tokens a cache may hold: `min(context_length, context_cap)`.
    pub context_limit: usize,
    /// Feed-forward width.
    pub ffn: usize,
    /// RMS-norm epsilon.
    pub rms_eps: f32,
    /// RoPE base of global-attention layers.
    pub rope_base: f32,
    /// RoPE base of sliding-window layers (Gemma 3; equals `rope_base` elsewhere).
    pub rope_base_local: f32,
    /// RoPE pairs adjacent dimensions (Llama) instead of the two halves (Qwen2, Gemma 3).
    pub rope_interleaved: bool,
    /// Linear RoPE scaling (position interpolation, Chen et al. 2023): positions are
    /// multiplied by `1 / factor` (`rope.scaling.type = linear`); 1 when unscaled. Gemma 3
    /// applies it to its global layers only, as llama.cpp does.
    pub rope_position_scale: f32,
    /// Per-frequency divisors from the `rope_freqs.weight` tensor (Llama 3.1-style
    /// long-context scaling as llama.cpp stores it), `head_dim / 2` values.
    pub rope_freq_factors: Option<Vec<f32>>,
    /// Sliding-window width of local layers (Gemma 3), in tokens including the current.
    pub sliding_window: Option<usize>,
    /// Every `sliding_pattern`-th layer is global; the others use the window.
    pub sliding_pattern: usize,
    /// Multiplier of query-key dot products.
    pub attn_scale: f32,
    /// Multiplier of token embeddings (Gemma 3: sqrt(hidden)).
    pub embed_scale: Option<f32>,
    /// Gated feed-forward activation.
    pub activation: Activation,
    /// Gemma 3 layout: q/k norms and post-attention / post-feed-forward norms.
    pub gemma_norms: bool,
    /// Output projection shares the embedding table.
    pub tied_output: bool,
    /// Worker threads in effect for candle's kernels.
    pub threads: usize,
    /// Matrix-multiply policy in use.
    pub matmul: MatmulPolicy,
}

/// Activation of the gated feed-forward block.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Activation {
    /// x·sigmoid(x) (Qwen2, Llama).
    Silu,
    /// GELU, tanh approximation (Gemma 3; Hendrycks & Gimpel 2016).
    GeluTanh,
}

/// How to load a model.
#[derive(Debug, Clone, Default)]
pub struct LoadOptions {
    /// Worker threads for the kernels; 0 = all cores.
    pub threads: usize,
    /// Upper bound on the tokens a cache may hold, below the trained context length.
    pub context_cap: Option<usize>,
}

/// Numerics switches that make the decoder reproduce a reference implementation.
#[derive(Debug, Clone, Copy)]
pub struct Numerics {
    /// Matrix-multiply kernels.
    pub matmul: MatmulPolicy,
    /// Replace the activation (candle-transformers' quantized Gemma 3 uses SiLU).
    pub activation: Option<Activation>,
}

impl Default for Numerics {
    fn default() -> Self {
        Numerics {
            matmul: MatmulPolicy::Fast,
            activation: None,
        }
    }
}

struct Layer {
    attn_norm: Vec<f32>,
    wq: Linear,
    wk: Linear,
    wv: Linear,
    wo: Linear,
    bq: Option<Vec<f32>>,
    bk: Option<Vec<f32>>,
    bv: Option<Vec<f32>>,
    q_norm: Option<Vec<f32>>,
    k_norm: Option<Vec<f32>>,
    post_attn_norm: Option<Vec<f32>>,
    ffn_norm: Vec<f32>,
    gate: Linear,
    up: Linear,
    down: Linear,
    post_ffn_norm: Option<Vec<f32>>,
    /// Sliding window of this layer, `None` for global attention.
    window: Option<usize>,
    /// Rotation speed of each dimension pair: base^(-2i/d), with this layer's scaling.
    rope_freqs: Vec<f32>,
}

/// A loaded judge model.
pub struct Decoder {
    cfg: DecoderConfig,
    embed: Embedding,
    layers: Vec<Layer>,
    out_norm: Vec<f32>,
    output: Linear,
}

/// Keys and values of the tokens seen so far; cloning forks it. One buffer per layer and
/// key/value head (index `layer * kv_heads + head`), so the rows one head attends to
/// lie back to back in memory.
#[derive(Clone, Debug)]
pub struct KvCache {
    k: Vec<Vec<f32>>,
    v: Vec<Vec<f32>>,
    len: usize,
    kv_heads: usize,
    head_dim: usize,
}

impl KvCache {
    /// Tokens held.
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether no token is held.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Forget every token from position `len` on (no-op when `len >= self.len()`).
    pub fn truncate(&mut self, len: usize) {
        if len < self.len {
            for buf in self.k.iter_mut().chain(self.v.iter_mut()) {
                buf.truncate(len * self.head_dim);
            }
            self.len = len;
        }
    }
}

static THREADS: OnceLock<usize> = OnceLock::new();

/// Fix candle's pool sizes before its first kernel runs; later calls keep the first.
fn configure_threads(threads: usize) -> usize {
    *THREADS.get_or_init(|| {
        if threads > 0 {
            // Safe in edition 2021; runs once, before candle spawns its workers.
            std::env::set_var("RAYON_NUM_THREADS", threads.to_string());
            std::env::set_var("CANDLE_NUM_THREADS", threads.to_string());
        }
        candle_core::utils::barrier_pool().n_workers() + 1
    })
}

fn metadata_u(g: &GgufFile, arch: &str, key: &str) -> Result<usize, EngineError> {
    Ok(g.uint(&format!("{arch}.{key}"))? as usize)
}

fn metadata_f(g: &GgufFile, arch: &str, key: &str, default: f32) -> f32 {
    g.float(&format!("{arch}.{key}"))
        .map_or(default, |v| v as f32)
}

impl Decoder {
    /// Load `gguf` with the fast kernels.
    pub fn load(gguf: &GgufFile, opts: &LoadOptions) -> Result<Self, EngineError> {
        Self::load_with(gguf, opts, Numerics::default())
    }

    /// Load `gguf` with explicit numerics (parity checks use the reference kernels).
    pub fn load_with(
        gguf: &GgufFile,
        opts: &LoadOptions,
        numerics: Numerics,
    ) -> Result<Self, EngineError> {
        let arch = gguf.require_supported()?;
        let threads = configure_threads(opts.threads);
        let a = arch.as_str();
        let gemma = a == "gemma3";
        let hidden = metadata_u(gguf, a, "embedding_length")?;
        let heads = metadata_u(gguf, a, "attention.head_count")?;
        let kv_heads = metadata_u(gguf, a, "attention.head_count_kv")?;
        let head_dim = match metadata_u(gguf, a, "attention.key_length") {
            Ok(d) => d,
            Err(_) if !gemma => hidden / heads.max(1),
            Err(e) => return Err(e),
        };
        if heads == 0 || kv_heads == 0 || heads % kv_heads != 0 || head_dim % 2 != 0 {
            return Err(EngineError::Metadata {
                path: gguf.path.clone(),
                key: format!("{a}.attention.head_count_kv"),
                expected: "head counts where query heads are a multiple of key/value heads".into(),
            });
        }
        let context_length = metadata_u(gguf, a, "context_length")?;
        let context_limit = opts
            .context_cap
            .map_or(context_length, |c| c.min(context_length));
        let rope_base = metadata_f(gguf, a, "rope.freq_base", if gemma { 1e6 } else { 1e4 });
        // Gemma 3 local layers: 10000 unless the file says otherwise, as llama.cpp and
        // candle-transformers' quantized_gemma3 do.
        let rope_base_local = if gemma {
            metadata_f(gguf, a, "rope.local_freq_base", 1e4)
        } else {
            rope_base
        };
        let rope_position_scale = rope_scaling(gguf, a)?;
        let sliding_window = if gemma {
            Some(metadata_u(gguf, a, "attention.sliding_window")?)
        } else {
            None
        };
        let sliding_pattern = metadata_u(gguf, a, "attention.sliding_window_type").unwrap_or(6);
        let activation = numerics.activation.unwrap_or(if gemma {
            Activation::GeluTanh
        } else {
            Activation::Silu
        });

        let mut loader = Loader::open(gguf)?;
        let rope_freq_factors = loader.optional("rope_freqs.weight", head_dim / 2)?;
        let token_embd = loader.qtensor("token_embd.weight")?;
        let tied_output = !gguf.content.tensor_infos.contains_key("output.weight");
        let out_q = if tied_output {
            token_embd.clone()
        } else {
            loader.qtensor("output.weight")?
        };
        // The output projection runs on one row per prompt and may share the embedding
        // table, so it is never held twice: when its tiles replace the table, the
        // embedding reads its rows from them.
        let output = Linear::output(out_q, numerics.matmul).map_err(loader.err("output.weight"))?;
        let embed = match output.packed() {
            Some(tiles) if tied_output => Embedding::packed(tiles.clone()),
            _ => Embedding::new(token_embd).map_err(loader.err("token_embd.weight"))?,
        };
        let vocab = output.n;
        let ffn = metadata_u(gguf, a, "feed_forward_length")?;
        let cfg = DecoderConfig {
            arch: arch.clone(),
            layers: metadata_u(gguf, a, "block_count")?,
            hidden,
            heads,
            kv_heads,
            head_dim,
            vocab,
            context_length,
            context_limit,
            ffn,
            rms_eps: gguf.float(&format!("{a}.attention.layer_norm_rms_epsilon"))? as f32,
            rope_base,
            rope_base_local,
            rope_interleaved: a == "llama",
            rope_position_scale,
            rope_freq_factors,
            sliding_window,
            sliding_pattern: sliding_pattern.max(1),
            attn_scale: 1.0 / (head_dim as f32).sqrt(),
            embed_scale: gemma.then(|| (hidden as f32).sqrt()),
            activation,
            gemma_norms: gemma,
            tied_output,
            threads,
            matmul: numerics.matmul,
        };
        let mut layers = Vec::with_capacity(cfg.layers);
        for i in 0..cfg.layers {
            layers.push(read_layer(&mut loader, &cfg, i, numerics.matmul)?);
        }
        let out_norm = loader.vector("output_norm.weight", hidden)?;
        let decoder = Decoder {
            cfg,
            embed,
            layers,
            out_norm,
            output,
        };
        decoder.check_shapes(gguf)?;
        // Candle packs weights for its int8 kernels on first use; do it now so load
        // time includes it and the first prompt is not slowed.
        // Four rows also pack the Q6_K weights, which candle packs only for several rows.
        let warm_len = 4.min(context_limit);
        if warm_len > 0 {
            decoder.forward_last(&mut decoder.new_cache(), &[0; 4][..warm_len])?;
        }
        Ok(decoder)
    }

    fn check_shapes(&self, gguf: &GgufFile) -> Result<(), EngineError> {
        let c = &self.cfg;
        let bad = |tensor: &str, reason: String| EngineError::Tensor {
            path: gguf.path.clone(),
            tensor: tensor.to_string(),
            reason,
        };
        if self.embed.hidden != c.hidden || self.output.k != c.hidden {
            return Err(bad(
                "token_embd.weight",
                format!("width is not {}", c.hidden),
            ));
        }
        for (i, l) in self.layers.iter().enumerate() {
            let want = [
                ("attn_q", &l.wq, c.heads * c.head_dim, c.hidden),
                ("attn_k", &l.wk, c.kv_heads * c.head_dim, c.hidden),
                ("attn_v", &l.wv, c.kv_heads * c.head_dim, c.hidden),
                ("attn_output", &l.wo, c.hidden, c.heads * c.head_dim),
                ("ffn_gate", &l.gate, c.ffn, c.hidden),
                ("ffn_up", &l.up, c.ffn, c.hidden),
                ("ffn_down", &l.down, c.hidden, c.ffn),
            ];
            for (name, w, n, k) in want {
                if w.n != n || w.k != k {
                    let reason = format!("shape {}x{}, expected {n}x{k}", w.n, w.k);
                    return Err(bad(&format!("blk.{i}.{name}.weight"), reason));
                }
            }
        }
        Ok(())
    }

    /// Shape and numerics of the model.
    pub fn config(&self) -> &DecoderConfig {
        &self.cfg
    }

    /// An empty cache for this model.
    pub fn new_cache(&self) -> KvCache {
        let bufs = self.cfg.layers * self.cfg.kv_heads;
        KvCache {
            k: vec![Vec::new(); bufs],
            v: vec![Vec::new(); bufs],
            len: 0,
            kv_heads: self.cfg.kv_heads,
            head_dim: self.cfg.head_dim,
        }
    }

    /// Approximate bytes of weights held in memory (all kernel copies).
    pub fn weight_bytes(&self) -> usize {
        let layers: usize = self
            .layers
            .iter()
            .map(|l| {
                [&l.wq, &l.wk, &l.wv, &l.wo, &l.gate, &l.up, &l.down]
                    .iter()
                    .map(|w| w.bytes())
                    .sum::<usize>()
            })
            .sum();
        layers
            + self.output.bytes()
            + if self.cfg.tied_output {
                // The output projection holds the table (its tiles or the file's copy).
                0
            } else {
                self.embed.bytes()
            }
    }

    /// Append `tokens` to `cache` and return the logits at the last new position.
    pub fn forward_last(
        &self,
        cache: &mut KvCache,
        tokens: &[u32],
    ) -> Result<Vec<f32>, EngineError> {
        let mut rows = self.forward_rows(cache, tokens, false)?;
        rows.pop()
            .ok_or_else(|| EngineError::Invalid("no tokens to run".into()))
    }

    /// Append `tokens` to `cache` and return the logits at every new position.
    pub fn forward_all(
        &self,
        cache: &mut KvCache,
        tokens: &[u32],
    ) -> Result<Vec<Vec<f32>>, EngineError> {
        self.forward_rows(cache, tokens, true)
    }

    fn forward_rows(
        &self,
        cache: &mut KvCache,
        tokens: &[u32],
        all: bool,
    ) -> Result<Vec<Vec<f32>>, EngineError> {
        if tokens.is_empty() {
            return Err(EngineError::Invalid("no tokens to run".into()));
        }
        if cache.k.len() != self.cfg.layers * self.cfg.kv_heads
            || cache.kv_heads != self.cfg.kv_heads
            || cache.head_dim != self.cfg.head_dim
        {
            return Err(EngineError::Invalid(
                "key/value cache belongs to another model".into(),
            ));
        }
        let total = cache.len + tokens.len();
        if total > self.cfg.context_limit {
            return Err(EngineError::ContextOverflow {
                item: "prompt".into(),
                tokens: total,
                limit: self.cfg.context_limit,
            });
        }
        let start = cache.len;
        // Long prompts run in chunks: activation buffers stay bounded by the chunk
        // while the key/value cache grows. On the tile kernels every row's result is
        // independent of the other rows of its call (products and attention alike), so
        // chunking changes no bit; candle's fallback paths pick kernels by row count
        // and may move results by rounding, as a forked prefix does there.
        // Only the rows whose logits are wanted go through the output projection.
        let chunks = tokens.len().div_ceil(PROMPT_CHUNK);
        let result =
            tokens
                .chunks(PROMPT_CHUNK)
                .enumerate()
                .try_fold(Vec::new(), |mut rows, (i, chunk)| {
                    let from = match (all, i + 1 == chunks) {
                        (true, _) => 0,
                        (false, true) => chunk.len() - 1,
                        (false, false) => chunk.len(),
                    };
                    rows.extend(self.run(cache, chunk, from)?);
                    Ok(rows)
                });
        if result.is_err() {
            cache.truncate(start);
        }
        result
    }
}

/// Tokens per forward pass of a long prompt (see `forward_rows`).
const PROMPT_CHUNK: usize = 512;

/// Position multiplier of `{arch}.rope.scaling.*`: 1 without scaling, `1 / factor` for
/// linear scaling. YaRN and other kinds change attention in ways this decoder does not
/// implement, so such files are refused rather than run with wrong positions.
fn rope_scaling(g: &GgufFile, arch: &str) -> Result<f32, EngineError> {
    let kind = g.string(&format!("{arch}.rope.scaling.type")).ok();
    let factor = g
        .float(&format!("{arch}.rope.scaling.factor"))
        .ok()
        .map(|f| f as f32);
    // llama.cpp's older key for the same linear factor.
    let legacy = g
        .float(&format!("{arch}.rope.scale_linear"))
        .ok()
        .map(|f| f as f32);
    let bad = |key: &str, expected: &str| EngineError::Metadata {
        path: g.path.clone(),
        key: format!("{arch}.{key}"),
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
            key: format!("{arch}.rope.scaling.type"),
            found: other.into(),
            supported: "none, linear".into(),
        }),
        (None, _, Some(_)) => Err(bad("rope.scale_linear", "a positive factor")),
    }
}

/// Apply linear position scaling and per-frequency divisors to `freqs` in place, the way
/// llama.cpp's `ggml_rope_ext` forms its angles: `pos · scale · freq_i / factor_i`.
pub(crate) fn scale_rope_freqs(freqs: &mut [f32], scale: f32, factors: Option<&[f32]>) {
    for (i, f) in freqs.iter_mut().enumerate() {
        if scale != 1.0 {
            *f *= scale;
        }
        if let Some(div) = factors.and_then(|d| d.get(i)) {
            *f /= div;
        }
    }
}

/// Read block `i`: its weights with the kernels `policy` picks, norms and biases.
fn read_layer(
    ld: &mut Loader,
    c: &DecoderConfig,
    i: usize,
    policy: MatmulPolicy,
) -> Result<Layer, EngineError> {
    let p = |s: &str| format!("blk.{i}.{s}");
    let (q_dim, kv_dim) = (c.heads * c.head_dim, c.kv_heads * c.head_dim);
    let gemma = c.gemma_norms;
    // Gemma 3: every `sliding_pattern`-th layer (1-based) attends globally.
    let local = c.sliding_window.is_some() && !(i + 1).is_multiple_of(c.sliding_pattern);
    Ok(Layer {
        attn_norm: ld.vector(&p("attn_norm.weight"), c.hidden)?,
        wq: ld.linear(&p("attn_q.weight"), policy)?,
        wk: ld.linear(&p("attn_k.weight"), policy)?,
        wv: ld.linear(&p("attn_v.weight"), policy)?,
        wo: ld.linear(&p("attn_output.weight"), policy)?,
        bq: ld.optional(&p("attn_q.bias"), q_dim)?,
        bk: ld.optional(&p("attn_k.bias"), kv_dim)?,
        bv: ld.optional(&p("attn_v.bias"), kv_dim)?,
        q_norm: if gemma {
            Some(ld.vector(&p("attn_q_norm.weight"), c.head_dim)?)
        } else {
            None
        },
        k_norm: if gemma {
            Some(ld.vector(&p("attn_k_norm.weight"), c.head_dim)?)
        } else {
            None
        },
        post_attn_norm: if gemma {
            Some(ld.vector(&p("post_attention_norm.weight"), c.hidden)?)
        } else {
            None
        },
        ffn_norm: ld.vector(&p("ffn_norm.weight"), c.hidden)?,
        gate: ld.linear(&p("ffn_gate.weight"), policy)?,
        up: ld.linear(&p("ffn_up.weight"), policy)?,
        down: ld.linear(&p("ffn_down.weight"), policy)?,
        post_ffn_norm: if gemma {
            Some(ld.vector(&p("post_ffw_norm.weight"), c.hidden)?)
        } else {
            None
        },
        window: if local { c.sliding_window } else { None },
        rope_freqs: if local {
            rope_freqs(c.head_dim, c.rope_base_local)
        } else {
            let mut f = rope_freqs(c.head_dim, c.rope_base);
            scale_rope_freqs(
                &mut f,
                c.rope_position_scale,
                c.rope_freq_factors.as_deref(),
            );
            f
        },
    })
}

/// `N` products of the same rows in one pool call where the kernels allow.
fn fused<const N: usize>(
    w: &[&Linear; N],
    x: &[f32],
    m: usize,
) -> Result<[Vec<f32>; N], EngineError> {
    let out = Linear::forward_fused(w, x, m)?;
    Ok(out.try_into().expect("one result per weight"))
}

/// Log-softmax of `logits`, computed in f64 for stability.
pub fn log_softmax(logits: &[f32]) -> Vec<f32> {
    let max = logits
        .iter()
        .fold(f64::NEG_INFINITY, |m, &x| m.max(x as f64));
    let sum: f64 = logits.iter().map(|&x| (x as f64 - max).exp()).sum();
    let log_z = max + sum.ln();
    logits.iter().map(|&x| (x as f64 - log_z) as f32).collect()
}

impl Decoder {
    /// One forward pass over `tokens` (non-empty, known to fit): appends to `cache`
    /// and returns the logits of rows `from..` (none when `from == tokens.len()`).
    fn run(
        &self,
        cache: &mut KvCache,
        tokens: &[u32],
        from: usize,
    ) -> Result<Vec<Vec<f32>>, EngineError> {
        let c = &self.cfg;
        let (m, pos0, eps) = (tokens.len(), cache.len, c.rms_eps);
        let shape = AttnShape {
            heads: c.heads,
            kv_heads: c.kv_heads,
            head_dim: c.head_dim,
            scale: c.attn_scale,
        };
        let mut x = self.embed.lookup(tokens)?;
        if let Some(s) = c.embed_scale {
            x.iter_mut().for_each(|v| *v *= s);
        }
        for (li, l) in self.layers.iter().enumerate() {
            let h = rms_norm(&x, &l.attn_norm, eps);
            let [mut q, mut k, mut v] = fused(&[&l.wq, &l.wk, &l.wv], &h, m)?;
            add_bias(&mut q, l.bq.as_deref());
            add_bias(&mut k, l.bk.as_deref());
            add_bias(&mut v, l.bv.as_deref());
            if let (Some(qn), Some(kn)) = (&l.q_norm, &l.k_norm) {
                q = rms_norm(&q, qn, eps);
                k = rms_norm(&k, kn, eps);
            }
            let freqs = &l.rope_freqs;
            let (q_dim, kv_dim) = (c.heads * c.head_dim, c.kv_heads * c.head_dim);
            rope(&mut q, q_dim, c.head_dim, pos0, freqs, c.rope_interleaved);
            rope(&mut k, kv_dim, c.head_dim, pos0, freqs, c.rope_interleaved);
            let heads = li * c.kv_heads..(li + 1) * c.kv_heads;
            for (rk, rv) in k.chunks_exact(kv_dim).zip(v.chunks_exact(kv_dim)) {
                for (g, (hk, hv)) in rk
                    .chunks_exact(c.head_dim)
                    .zip(rv.chunks_exact(c.head_dim))
                    .enumerate()
                {
                    cache.k[heads.start + g].extend_from_slice(hk);
                    cache.v[heads.start + g].extend_from_slice(hv);
                }
            }
            let att = attention(
                &q,
                &cache.k[heads.clone()],
                &cache.v[heads],
                &shape,
                pos0,
                m,
                l.window,
            );
            let mut o = l.wo.forward(&att, m)?;
            if let Some(w) = &l.post_attn_norm {
                o = rms_norm(&o, w, eps);
            }
            add_into(&mut x, &o);
            let h = rms_norm(&x, &l.ffn_norm, eps);
            let [mut a, u] = fused(&[&l.gate, &l.up], &h, m)?;
            let act = c.activation;
            a.iter_mut()
                .zip(&u)
                .for_each(|(g, u)| *g = activate(act, *g) * u);
            let mut d = l.down.forward(&a, m)?;
            if let Some(w) = &l.post_ffn_norm {
                d = rms_norm(&d, w, eps);
            }
            add_into(&mut x, &d);
        }
        cache.len += m;
        if from >= m {
            return Ok(Vec::new());
        }
        let last = rms_norm(&x[from * c.hidden..], &self.out_norm, eps);
        let logits = self.output.forward(&last, m - from)?;
        Ok(logits.chunks(c.vocab).map(<[f32]>::to_vec).collect())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Position interpolation (Chen et al. 2023): with linear scaling factor `f`, the
    /// token at position `p` is rotated as an unscaled one at position `p / f`. Folding
    /// the factor into the frequencies must give that rotation, for factors above and
    /// below 1 and both pair layouts.
    #[test]
    fn scaled_frequencies_rotate_like_interpolated_positions() {
        let d = 64;
        let x: Vec<f32> = (0..2 * d)
            .map(|i| ((i * 37 % 11) as f32 - 5.0) / 7.0)
            .collect();
        for (factor, p) in [(2.0f32, 6usize), (4.0, 12), (0.5, 3)] {
            for interleaved in [false, true] {
                let base = rope_freqs(d, 10_000.0);
                let mut scaled = base.clone();
                scale_rope_freqs(&mut scaled, 1.0 / factor, None);
                let (mut a, mut b) = (x.clone(), x.clone());
                rope(&mut a, 2 * d, d, p, &scaled, interleaved);
                let q = (p as f32 / factor) as usize;
                rope(&mut b, 2 * d, d, q, &base, interleaved);
                for (u, v) in a.iter().zip(&b) {
                    assert!((u - v).abs() < 1e-5, "factor {factor}: {u} vs {v}");
                }
            }
        }
    }

    /// llama.cpp's per-frequency divisors (`rope_freqs.weight`) divide each speed.
    #[test]
    fn frequency_divisors_divide_each_speed() {
        let mut f = vec![1.0, 0.5, 0.25];
        scale_rope_freqs(&mut f, 1.0, Some(&[1.0, 2.0, 8.0]));
        assert_eq!(f, vec![1.0, 0.25, 0.031_25]);
    }
}
