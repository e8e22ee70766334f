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

use std::fs::File;
use std::io::BufReader;
use std::sync::{Arc, OnceLock};

use candle_core::quantized::QTensor;
use candle_core::{DType, Device};

use super::gguf::GgufFile;
use super::linear::{Embedding, Linear, MatmulPolicy};
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
        Numerics { matmul: MatmulPolicy::Fast, activation: None }
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
    rope_base: f32,
}

/// A loaded judge model.
pub struct Decoder {
    cfg: DecoderConfig,
    embed: Embedding,
    layers: Vec<Layer>,
    out_norm: Vec<f32>,
    output: Linear,
}

/// Keys and values of the tokens seen so far; cloning forks it.
#[derive(Clone, Debug)]
pub struct KvCache {
    k: Vec<Vec<f32>>,
    v: Vec<Vec<f32>>,
    len: usize,
    kv_dim: usize,
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
                buf.truncate(len * self.kv_dim);
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
    g.float(&format!("{arch}.{key}")).map_or(default, |v| v as f32)
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
                expected: "head counts where query heads are a multiple of key/value heads"
                    .into(),
            });
        }
        let context_length = metadata_u(gguf, a, "context_length")?;
        let context_limit = opts.context_cap.map_or(context_length, |c| c.min(context_length));
        let rope_base = metadata_f(gguf, a, "rope.freq_base", if gemma { 1e6 } else { 1e4 });
        // Gemma 3 local layers: 10000 unless the file says otherwise, as llama.cpp and
        // candle-transformers' quantized_gemma3 do.
        let rope_base_local =
            if gemma { metadata_f(gguf, a, "rope.local_freq_base", 1e4) } else { rope_base };
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
        let token_embd = loader.qtensor("token_embd.weight")?;
        let embed = Embedding::new(token_embd.clone()).map_err(loader.err("token_embd.weight"))?;
        let tied_output = !gguf.content.tensor_infos.contains_key("output.weight");
        let out_q = if tied_output { token_embd } else { loader.qtensor("output.weight")? };
        // The output projection runs on one row per prompt; its quantised kernel suffices.
        let output = Linear::new(out_q, MatmulPolicy::Reference, DType::F16, true)
            .map_err(loader.err("output.weight"))?;
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
            layers.push(loader.layer(&cfg, i, numerics.matmul)?);
        }
        let out_norm = loader.vector("output_norm.weight", hidden)?;
        let decoder = Decoder { cfg, embed, layers, out_norm, output };
        decoder.check_shapes(gguf)?;
        // Candle packs weights for its int8 kernels on first use; do it now so load
        // time includes it and the first prompt is not slowed.
        let mut warm = decoder.new_cache();
        decoder.forward_last(&mut warm, &[0; 4][..4.min(context_limit.max(1))])?;
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
            return Err(bad("token_embd.weight", format!("width is not {}", c.hidden)));
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
        let kv_dim = self.cfg.kv_heads * self.cfg.head_dim;
        KvCache {
            k: vec![Vec::new(); self.cfg.layers],
            v: vec![Vec::new(); self.cfg.layers],
            len: 0,
            kv_dim,
        }
    }

    /// Approximate bytes of weights held in memory (all kernel copies).
    pub fn weight_bytes(&self) -> usize {
        let layers: usize = self
            .layers
            .iter()
            .map(|l| [&l.wq, &l.wk, &l.wv, &l.wo, &l.gate, &l.up, &l.down].iter().map(|w| w.bytes()).sum::<usize>())
            .sum();
        layers + self.output.bytes() + if self.cfg.tied_output { 0 } else { self.embed.bytes() }
    }

    /// Append `tokens` to `cache` and return the logits at the last new position.
    pub fn forward_last(&self, cache: &mut KvCache, tokens: &[u32]) -> Result<Vec<f32>, EngineError> {
        let mut rows = self.forward_rows(cache, tokens, false)?;
        rows.pop().ok_or_else(|| EngineError::Invalid("no tokens to run".into()))
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
        if cache.k.len() != self.cfg.layers || cache.kv_dim != self.cfg.kv_heads * self.cfg.head_dim {
            return Err(EngineError::Invalid("key/value cache belongs to another model".into()));
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
        let result = self.run(cache, tokens, all);
        if result.is_err() {
            cache.truncate(start);
        }
        result
    }
}

/// Reads tensors of one GGUF file.
struct Loader<'a> {
    gguf: &'a GgufFile,
    reader: BufReader<File>,
}

impl<'a> Loader<'a> {
    fn open(gguf: &'a GgufFile) -> Result<Self, EngineError> {
        let file = File::open(&gguf.path).map_err(|source| EngineError::Io {
            path: gguf.path.clone(),
            source,
        })?;
        Ok(Loader { gguf, reader: BufReader::new(file) })
    }

    fn err(&self, tensor: &str) -> impl FnOnce(candle_core::Error) -> EngineError {
        let path = self.gguf.path.clone();
        let tensor = tensor.to_string();
        move |e| EngineError::Tensor { path, tensor, reason: e.to_string() }
    }

    fn has(&self, name: &str) -> bool {
        self.gguf.content.tensor_infos.contains_key(name)
    }

    fn qtensor(&mut self, name: &str) -> Result<Arc<QTensor>, EngineError> {
        if !self.has(name) {
            return Err(EngineError::Tensor {
                path: self.gguf.path.clone(),
                tensor: name.into(),
                reason: "missing".into(),
            });
        }
        let t = self.gguf.content.tensor(&mut self.reader, name, &Device::Cpu);
        Ok(Arc::new(t.map_err(self.err(name))?))
    }

    fn vector(&mut self, name: &str, len: usize) -> Result<Vec<f32>, EngineError> {
        let t = self.qtensor(name)?;
        let v = t
            .dequantize(&Device::Cpu)
            .and_then(|t| t.flatten_all())
            .and_then(|t| t.to_vec1::<f32>())
            .map_err(self.err(name))?;
        if v.len() != len {
            return Err(EngineError::Tensor {
                path: self.gguf.path.clone(),
                tensor: name.into(),
                reason: format!("{} values, expected {len}", v.len()),
            });
        }
        Ok(v)
    }

    fn optional(&mut self, name: &str, len: usize) -> Result<Option<Vec<f32>>, EngineError> {
        if self.has(name) { self.vector(name, len).map(Some) } else { Ok(None) }
    }

    fn linear(&mut self, name: &str, policy: MatmulPolicy) -> Result<Linear, EngineError> {
        let t = self.qtensor(name)?;
        Linear::new(t, policy, DType::F16, true).map_err(self.err(name))
    }

    fn layer(&mut self, c: &DecoderConfig, i: usize, policy: MatmulPolicy) -> Result<Layer, EngineError> {
        let p = |s: &str| format!("blk.{i}.{s}");
        let (q_dim, kv_dim) = (c.heads * c.head_dim, c.kv_heads * c.head_dim);
        let gemma = c.gemma_norms;
        // Gemma 3: every `sliding_pattern`-th layer (1-based) attends globally.
        let local = c.sliding_window.is_some() && (i + 1) % c.sliding_pattern != 0;
        Ok(Layer {
            attn_norm: self.vector(&p("attn_norm.weight"), c.hidden)?,
            wq: self.linear(&p("attn_q.weight"), policy)?,
            wk: self.linear(&p("attn_k.weight"), policy)?,
            wv: self.linear(&p("attn_v.weight"), policy)?,
            wo: self.linear(&p("attn_output.weight"), policy)?,
            bq: self.optional(&p("attn_q.bias"), q_dim)?,
            bk: self.optional(&p("attn_k.bias"), kv_dim)?,
            bv: self.optional(&p("attn_v.bias"), kv_dim)?,
            q_norm: if gemma { Some(self.vector(&p("attn_q_norm.weight"), c.head_dim)?) } else { None },
            k_norm: if gemma { Some(self.vector(&p("attn_k_norm.weight"), c.head_dim)?) } else { None },
            post_attn_norm: if gemma { Some(self.vector(&p("post_attention_norm.weight"), c.hidden)?) } else { None },
            ffn_norm: self.vector(&p("ffn_norm.weight"), c.hidden)?,
            gate: self.linear(&p("ffn_gate.weight"), policy)?,
            up: self.linear(&p("ffn_up.weight"), policy)?,
            down: self.linear(&p("ffn_down.weight"), policy)?,
            post_ffn_norm: if gemma { Some(self.vector(&p("post_ffw_norm.weight"), c.hidden)?) } else { None },
            window: if local { c.sliding_window } else { None },
            rope_base: if local { c.rope_base_local } else { c.rope_base },
        })
    }
}

/// Log-softmax of `logits`, computed in f64 for stability.
pub fn log_softmax(logits: &[f32]) -> Vec<f32> {
    let max = logits.iter().fold(f64::NEG_INFINITY, |m, &x| m.max(x as f64));
    let sum: f64 = logits.iter().map(|&x| (x as f64 - max).exp()).sum();
    let log_z = max + sum.ln();
    logits.iter().map(|&x| (x as f64 - log_z) as f32).collect()
}

impl Decoder {
    /// One forward pass over `tokens` (non-empty, known to fit): appends to `cache`.
    fn run(&self, cache: &mut KvCache, tokens: &[u32], all: bool) -> Result<Vec<Vec<f32>>, EngineError> {
        let c = &self.cfg;
        let (m, pos0, eps) = (tokens.len(), cache.len, c.rms_eps);
        let mut x = self.embed.lookup(tokens)?;
        if let Some(s) = c.embed_scale {
            x.iter_mut().for_each(|v| *v *= s);
        }
        for (li, l) in self.layers.iter().enumerate() {
            let h = rms_norm(&x, &l.attn_norm, eps);
            let mut q = l.wq.forward(&h, m)?;
            let mut k = l.wk.forward(&h, m)?;
            let mut v = l.wv.forward(&h, m)?;
            add_bias(&mut q, l.bq.as_deref());
            add_bias(&mut k, l.bk.as_deref());
            add_bias(&mut v, l.bv.as_deref());
            if let (Some(qn), Some(kn)) = (&l.q_norm, &l.k_norm) {
                q = rms_norm(&q, qn, eps);
                k = rms_norm(&k, kn, eps);
            }
            let freqs = rope_freqs(c.head_dim, l.rope_base);
            let (q_dim, kv_dim) = (c.heads * c.head_dim, c.kv_heads * c.head_dim);
            rope(&mut q, q_dim, c.head_dim, pos0, &freqs, c.rope_interleaved);
            rope(&mut k, kv_dim, c.head_dim, pos0, &freqs, c.rope_interleaved);
            cache.k[li].extend_from_slice(&k);
            cache.v[li].extend_from_slice(&v);
            let att = attention(&q, &cache.k[li], &cache.v[li], c, pos0, m, l.window);
            let mut o = l.wo.forward(&att, m)?;
            if let Some(w) = &l.post_attn_norm {
                o = rms_norm(&o, w, eps);
            }
            add_into(&mut x, &o);
            let h = rms_norm(&x, &l.ffn_norm, eps);
            let mut a = l.gate.forward(&h, m)?;
            let u = l.up.forward(&h, m)?;
            let act = c.activation;
            a.iter_mut().zip(&u).for_each(|(g, u)| *g = activate(act, *g) * u);
            let mut d = l.down.forward(&a, m)?;
            if let Some(w) = &l.post_ffn_norm {
                d = rms_norm(&d, w, eps);
            }
            add_into(&mut x, &d);
        }
        cache.len += m;
        let first = if all { 0 } else { m - 1 };
        let last = rms_norm(&x[first * c.hidden..], &self.out_norm, eps);
        let logits = self.output.forward(&last, m - first)?;
        Ok(logits.chunks(c.vocab).map(<[f32]>::to_vec).collect())
    }
}

/// RMS norm of each `w.len()`-wide row of `x` (Zhang & Sennrich 2019), as
/// candle's `rms_norm`: x / sqrt(mean(x²) + eps) · w.
fn rms_norm(x: &[f32], w: &[f32], eps: f32) -> Vec<f32> {
    let dim = w.len();
    let mut out = Vec::with_capacity(x.len());
    for row in x.chunks_exact(dim) {
        let sum2: f32 = row.iter().map(|v| v * v).sum();
        let scale = (sum2 / dim as f32 + eps).sqrt();
        out.extend(row.iter().zip(w).map(|(v, w)| v / scale * w));
    }
    out
}

fn add_bias(x: &mut [f32], bias: Option<&[f32]>) {
    if let Some(b) = bias {
        for row in x.chunks_exact_mut(b.len()) {
            row.iter_mut().zip(b).for_each(|(v, b)| *v += b);
        }
    }
}

fn add_into(x: &mut [f32], y: &[f32]) {
    x.iter_mut().zip(y).for_each(|(a, b)| *a += b);
}

fn activate(act: Activation, x: f32) -> f32 {
    match act {
        Activation::Silu => x / (1.0 + (-x).exp()),
        // Hendrycks & Gimpel (2016), tanh approximation.
        Activation::GeluTanh => {
            let c = (2.0f32 / std::f32::consts::PI).sqrt();
            0.5 * x * (1.0 + (c * (x + 0.044_715 * x * x * x)).tanh())
        }
    }
}

/// Inverse frequencies of rotary embeddings (Su et al. 2021): base^(-2i/d).
fn rope_freqs(head_dim: usize, base: f32) -> Vec<f32> {
    (0..head_dim).step_by(2).map(|i| 1.0 / base.powf(i as f32 / head_dim as f32)).collect()
}

/// Rotate every head of each `width`-wide row of `x` in place; row `r` sits at
/// position `pos0 + r`. Interleaved pairs (2i, 2i+1) as in the original Llama layout,
/// otherwise pairs (i, i + d/2) as in GPT-NeoX; angles in f32 as candle computes them.
fn rope(x: &mut [f32], width: usize, d: usize, pos0: usize, freqs: &[f32], interleaved: bool) {
    let half = d / 2;
    let (mut cos, mut sin) = (vec![0f32; half], vec![0f32; half]);
    for (r, row) in x.chunks_exact_mut(width).enumerate() {
        let pos = (pos0 + r) as f32;
        for i in 0..half {
            let angle = pos * freqs[i];
            cos[i] = angle.cos();
            sin[i] = angle.sin();
        }
        for head in row.chunks_exact_mut(d) {
            for i in 0..half {
                let (a, b) = if interleaved { (2 * i, 2 * i + 1) } else { (i, i + half) };
                let (x0, x1) = (head[a], head[b]);
                head[a] = x0 * cos[i] - x1 * sin[i];
                head[b] = x0 * sin[i] + x1 * cos[i];
            }
        }
    }
}

/// Output buffer shared by attention workers; each work unit writes a disjoint slice.
struct SharedOut(*mut f32);
// SAFETY: workers write only to the disjoint `head_dim`-wide slice of their own unit.
unsafe impl Sync for SharedOut {}
impl SharedOut {
    fn ptr(&self) -> *mut f32 {
        self.0
    }
}

/// Causal scaled dot-product attention (Vaswani et al. 2017) of `m` query rows starting
/// at position `pos0` over the cached keys/values, with grouped key/value heads and an
/// optional sliding window of `w` tokens (the current one included, as llama.cpp and
/// Hugging Face Gemma 3 count it). Each (row, head) unit runs on one worker in a fixed
/// order, so results do not depend on scheduling.
fn attention(
    q: &[f32],
    kc: &[f32],
    vc: &[f32],
    c: &DecoderConfig,
    pos0: usize,
    m: usize,
    window: Option<usize>,
) -> Vec<f32> {
    let (heads, d) = (c.heads, c.head_dim);
    let group = heads / c.kv_heads;
    let (q_dim, kv_dim) = (heads * d, c.kv_heads * d);
    let mut out = vec![0f32; m * q_dim];
    let shared = SharedOut(out.as_mut_ptr());
    let scale = c.attn_scale;
    candle_core::utils::barrier_pool().execute_chunked(m * heads, |units| {
        let mut scores = Vec::new();
        for u in units {
            let (r, h) = (u / heads, u % heads);
            let g = h / group;
            let p = pos0 + r;
            let lo = window.map_or(0, |w| (p + 1).saturating_sub(w));
            let qv = &q[u * d..(u + 1) * d];
            scores.clear();
            let mut max = f32::NEG_INFINITY;
            for j in lo..=p {
                let s = dot(qv, &kc[j * kv_dim + g * d..][..d]) * scale;
                max = max.max(s);
                scores.push(s);
            }
            let mut sum = 0f32;
            for s in scores.iter_mut() {
                *s = (*s - max).exp();
                sum += *s;
            }
            // SAFETY: unit u = r * heads + h owns out[u*d..(u+1)*d] (row r, head h);
            // `out` outlives the pool call and no other unit touches this range.
            let o = unsafe { std::slice::from_raw_parts_mut(shared.ptr().add(u * d), d) };
            for (s, j) in scores.iter().zip(lo..=p) {
                let wgt = s / sum;
                let vr = &vc[j * kv_dim + g * d..][..d];
                o.iter_mut().zip(vr).for_each(|(o, v)| *o += wgt * v);
            }
        }
    });
    debug_assert_eq!(out.len(), m * q_dim);
    out
}

/// Dot product with eight independent lanes (vectorises; fixed order, deterministic).
fn dot(a: &[f32], b: &[f32]) -> f32 {
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let tail: f32 = ca.remainder().iter().zip(cb.remainder()).map(|(x, y)| x * y).sum();
    let mut acc = [0f32; 8];
    for (x, y) in ca.zip(cb) {
        for i in 0..8 {
            acc[i] += x[i] * y[i];
        }
    }
    acc.iter().sum::<f32>() + tail
}
