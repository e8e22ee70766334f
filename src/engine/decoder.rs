//! Transformer decoder shared by every model family. Input: an opened GGUF file, the
//! block description its family file makes of it (`arch`), and token ids. Output:
//! next-token logits, with a key/value cache that can be forked to share a prompt
//! prefix between continuations. Never asks which family a model belongs to (that is
//! data in the description), never truncates a prompt silently (overflow is an error)
//! and never reads anything but the GGUF file.
//!
//! Threads: candle's CPU kernels size their worker pools from `RAYON_NUM_THREADS` /
//! `CANDLE_NUM_THREADS` the first time a kernel runs. `Decoder::load` sets both to
//! `LoadOptions::threads` (0 = leave them, i.e. all cores) before any kernel runs; the
//! first load in a process fixes the count, and `DecoderConfig::threads` reports the
//! count in effect.

use std::sync::OnceLock;

use super::arch::{self, Block, Part, Plan};
use super::attention::{attend_block, AttnShape};
use super::gguf::GgufFile;
use super::kernels::{self, Kernels};
use super::linear::{Embedding, Linear, Loader, MatmulPolicy};
use super::ops::{add_bias, add_into, rope_freqs, scale_rope_freqs, RopeTable};
use super::EngineError;

pub use super::attention::KvCache;
pub use super::ops::{Activation, RopePairs};

/// Shape and numerics of a loaded decoder, read from the GGUF metadata.
#[derive(Debug, Clone)]
pub struct DecoderConfig {
    /// `general.architecture` (a name in `arch::FAMILIES`).
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
    /// Which dimensions of a head RoPE rotates together.
    pub rope_pairs: RopePairs,
    /// Linear RoPE scaling (position interpolation, Chen et al. 2023): positions are
    /// multiplied by `1 / factor` (`rope.scaling.type = linear`); 1 when unscaled. Gemma 3
    /// applies it to its global layers only, as llama.cpp does.
    pub rope_position_scale: f32,
    /// Per-frequency divisors from the `rope_freqs.weight` tensor (Llama 3.1-style
    /// long-context scaling as llama.cpp stores it), `head_dim / 2` values.
    pub rope_freq_factors: Option<Vec<f32>>,
    /// Sliding-window width of local layers (Gemma 3), in tokens including the current.
    pub sliding_window: Option<usize>,
    /// Blocks (from 0) that attend through the sliding window.
    pub local_layers: Vec<usize>,
    /// Multiplier of query-key dot products.
    pub attn_scale: f32,
    /// Multiplier of token embeddings (Gemma 3: sqrt(hidden)).
    pub embed_scale: Option<f32>,
    /// Gated feed-forward activation.
    pub activation: Activation,
    /// Output projection shares the embedding table.
    pub tied_output: bool,
    /// Worker threads in effect for candle's kernels.
    pub threads: usize,
    /// Matrix-multiply policy in use.
    pub matmul: MatmulPolicy,
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
    qk_norm: Option<[Vec<f32>; 2]>,
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
        let plan = arch::plan(gguf)?;
        let threads = configure_threads(opts.threads);
        let (d, rope) = (plan.dims, &plan.rope);
        let context_limit = opts
            .context_cap
            .map_or(d.context_length, |c| c.min(d.context_length));
        let activation = numerics.activation.unwrap_or(plan.activation);

        let mut loader = Loader::open(gguf)?;
        let rope_freq_factors = loader.optional(&rope.factors, d.head_dim / 2)?;
        let token_embd = loader.qtensor(&plan.embed)?;
        let tied_output = !loader.has(&plan.output);
        let out_q = if tied_output {
            token_embd.clone()
        } else {
            loader.qtensor(&plan.output)?
        };
        // The output projection runs on one row per prompt and may share the embedding
        // table, so it is never held twice: when its tiles replace the table, the
        // embedding reads its rows from them.
        let output = Linear::output(out_q, numerics.matmul).map_err(loader.err(&plan.output))?;
        let embed = match output.packed() {
            Some(tiles) if tied_output => Embedding::packed(tiles.clone()),
            _ => Embedding::new(token_embd).map_err(loader.err(&plan.embed))?,
        };
        let cfg = DecoderConfig {
            arch: gguf.arch()?,
            layers: d.layers,
            hidden: d.hidden,
            heads: d.heads,
            kv_heads: d.kv_heads,
            head_dim: d.head_dim,
            vocab: output.n,
            context_length: d.context_length,
            context_limit,
            ffn: d.ffn,
            rms_eps: d.rms_eps,
            rope_base: rope.base,
            rope_base_local: rope.base_local,
            rope_pairs: rope.pairs,
            rope_position_scale: rope.position_scale,
            rope_freq_factors,
            sliding_window: plan.sliding_window,
            local_layers: (0..d.layers).filter(|&i| plan.blocks[i].local).collect(),
            attn_scale: 1.0 / (d.head_dim as f32).sqrt(),
            embed_scale: plan.embed_scale,
            activation,
            tied_output,
            threads,
            matmul: numerics.matmul,
        };
        let layers = plan
            .blocks
            .iter()
            .map(|b| read_layer(&mut loader, &cfg, b, numerics.matmul))
            .collect::<Result<Vec<_>, _>>()?;
        let out_norm = loader.vector(&plan.output_norm, d.hidden)?;
        let decoder = Decoder {
            cfg,
            embed,
            layers,
            out_norm,
            output,
        };
        decoder.check_shapes(gguf, &plan)?;
        // Candle packs weights for its int8 kernels on first use; do it now so load
        // time includes it and the first prompt is not slowed.
        // Four rows also pack the Q6_K weights, which candle packs only for several rows.
        let warm_len = 4.min(decoder.cfg.context_limit);
        if warm_len > 0 {
            decoder.forward_last(&mut decoder.new_cache(), &[0; 4][..warm_len])?;
        }
        Ok(decoder)
    }

    fn check_shapes(&self, gguf: &GgufFile, plan: &Plan) -> Result<(), EngineError> {
        let c = &self.cfg;
        let bad = |tensor: &str, reason: String| EngineError::Tensor {
            path: gguf.path.clone(),
            tensor: tensor.to_string(),
            reason,
        };
        if self.embed.hidden != c.hidden || self.output.k != c.hidden {
            return Err(bad(&plan.embed, format!("width is not {}", c.hidden)));
        }
        for (l, b) in self.layers.iter().zip(&plan.blocks) {
            let want = [
                (&b.q, &l.wq, c.heads * c.head_dim, c.hidden),
                (&b.k, &l.wk, c.kv_heads * c.head_dim, c.hidden),
                (&b.v, &l.wv, c.kv_heads * c.head_dim, c.hidden),
                (&b.o, &l.wo, c.hidden, c.heads * c.head_dim),
                (&b.gate, &l.gate, c.ffn, c.hidden),
                (&b.up, &l.up, c.ffn, c.hidden),
                (&b.down, &l.down, c.hidden, c.ffn),
            ];
            for (part, w, n, k) in want {
                if w.n != n || w.k != k {
                    let rows = part
                        .rows
                        .as_ref()
                        .map_or(String::new(), |r| format!(" (rows {r:?})"));
                    let reason = format!("shape {}x{}{rows}, expected {n}x{k}", w.n, w.k);
                    return Err(bad(&part.tensor, reason));
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
        KvCache::new(self.cfg.layers, self.cfg.kv_heads, self.cfg.head_dim)
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
        let c = &self.cfg;
        if !cache.fits(c.layers, c.kv_heads, c.head_dim) {
            return Err(EngineError::Invalid(
                "key/value cache belongs to another model".into(),
            ));
        }
        let total = cache.len() + tokens.len();
        if total > self.cfg.context_limit {
            return Err(EngineError::ContextOverflow {
                item: "prompt".into(),
                tokens: total,
                limit: self.cfg.context_limit,
            });
        }
        let start = cache.len();
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

/// Read one block: its weights with the kernels `policy` picks, norms and biases.
fn read_layer(
    ld: &mut Loader,
    c: &DecoderConfig,
    b: &Block,
    policy: MatmulPolicy,
) -> Result<Layer, EngineError> {
    let (q_dim, kv_dim) = (c.heads * c.head_dim, c.kv_heads * c.head_dim);
    let mut weight = |p: &Part| match &p.rows {
        None => ld.linear(&p.tensor, policy),
        Some(rows) => ld.linear_rows(&p.tensor, rows, policy),
    };
    let [wq, wk, wv, wo, gate, up, down] =
        [&b.q, &b.k, &b.v, &b.o, &b.gate, &b.up, &b.down].map(&mut weight);
    let mut norm =
        |name: &Option<String>, len| name.as_ref().map(|n| ld.vector(n, len)).transpose();
    let post_attn_norm = norm(&b.post_attn_norm, c.hidden)?;
    let post_ffn_norm = norm(&b.post_ffn_norm, c.hidden)?;
    let qk_norm = match &b.qk_norm {
        Some([q, k]) => Some([ld.vector(q, c.head_dim)?, ld.vector(k, c.head_dim)?]),
        None => None,
    };
    let [bq, bk, bv] = &b.qkv_bias;
    let rope_freqs = if b.local {
        rope_freqs(c.head_dim, c.rope_base_local)
    } else {
        let mut f = rope_freqs(c.head_dim, c.rope_base);
        scale_rope_freqs(
            &mut f,
            c.rope_position_scale,
            c.rope_freq_factors.as_deref(),
        );
        f
    };
    Ok(Layer {
        attn_norm: ld.vector(&b.attn_norm, c.hidden)?,
        wq: wq?,
        wk: wk?,
        wv: wv?,
        wo: wo?,
        bq: ld.optional(bq, q_dim)?,
        bk: ld.optional(bk, kv_dim)?,
        bv: ld.optional(bv, kv_dim)?,
        qk_norm,
        post_attn_norm,
        ffn_norm: ld.vector(&b.ffn_norm, c.hidden)?,
        gate: gate?,
        up: up?,
        down: down?,
        post_ffn_norm,
        window: if b.local { c.sliding_window } else { None },
        rope_freqs,
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
        let (m, pos0, eps) = (tokens.len(), cache.len(), c.rms_eps);
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
        let rows = Kernels::for_rows();
        let norm = |x: &[f32], w: &[f32]| kernels::rms_norm(rows, x, w, eps);
        // One table of rotary angles per distinct frequency set (two in Gemma 3).
        let mut tables: Vec<RopeTable> = Vec::new();
        for (li, l) in self.layers.iter().enumerate() {
            let h = norm(&x, &l.attn_norm);
            let [mut q, mut k, mut v] = fused(&[&l.wq, &l.wk, &l.wv], &h, m)?;
            add_bias(&mut q, l.bq.as_deref());
            add_bias(&mut k, l.bk.as_deref());
            add_bias(&mut v, l.bv.as_deref());
            if let Some([qn, kn]) = &l.qk_norm {
                q = norm(&q, qn);
                k = norm(&k, kn);
            }
            let freqs = &l.rope_freqs;
            let (q_dim, kv_dim) = (c.heads * c.head_dim, c.kv_heads * c.head_dim);
            let t = match tables.iter().position(|t| t.serves(freqs)) {
                Some(t) => t,
                None => {
                    tables.push(RopeTable::new(freqs, pos0, m));
                    tables.len() - 1
                }
            };
            kernels::rope(rows, &mut q, q_dim, c.head_dim, &tables[t], c.rope_pairs);
            kernels::rope(rows, &mut k, kv_dim, c.head_dim, &tables[t], c.rope_pairs);
            let att = attend_block(cache, li, [&q, &k, &v], &shape, m, l.window);
            let mut o = l.wo.forward(&att, m)?;
            if let Some(w) = &l.post_attn_norm {
                o = norm(&o, w);
            }
            add_into(&mut x, &o);
            let h = norm(&x, &l.ffn_norm);
            let [mut a, u] = fused(&[&l.gate, &l.up], &h, m)?;
            kernels::gate(rows, c.activation, &mut a, &u);
            let mut d = l.down.forward(&a, m)?;
            if let Some(w) = &l.post_ffn_norm {
                d = norm(&d, w);
            }
            add_into(&mut x, &d);
        }
        cache.advance(m);
        if from >= m {
            return Ok(Vec::new());
        }
        let last = kernels::rms_norm(
            Kernels::for_rows(),
            &x[from * c.hidden..],
            &self.out_norm,
            eps,
        );
        let logits = self.output.forward(&last, m - from)?;
        Ok(logits.chunks(c.vocab).map(<[f32]>::to_vec).collect())
    }
}
