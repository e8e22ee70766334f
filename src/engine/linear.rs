//! Weights and kernels of the decoder: reading tensors from the GGUF file, the
//! matrix-multiply path chosen per tensor at load, embedding rows dequantised on
//! demand, and the row-wise kernels (RMS norm, RoPE, attention, activations). Input:
//! weight tensors and f32 activation rows. Output: f32 rows. Never changes numerics
//! between two calls with the same input and thread count, and never holds more than
//! two copies of one weight.
//!
//! Why several paths: on processors with AVX-512 VNNI, Q4_K, Q6_K, Q8_0, Q5_0 and Q4_0
//! weights are repacked once into this crate's int8 tiles (`kernels`), which serve
//! every row count and replace the file's copy. Elsewhere, or with
//! `ASSIZE_KERNELS=candle`, candle's repacked int8 kernels take Q4_K, Q6_K (several
//! rows) and Q8_0 weights whose inner dimension is a multiple of 256; Q5_0 / Q4_0 are
//! rewritten as such Q8_0, and any other weight falls back to a row-by-row dot product
//! plus a dequantised copy for prompts.

use std::borrow::Cow;
use std::fs::File;
use std::io::BufReader;
use std::sync::Arc;

use candle_core::quantized::{GgmlDType, QMatMul, QStorage, QTensor};
use candle_core::{DType, Device, Module, Tensor};

use super::decoder::Activation;
use super::gguf::GgufFile;
use super::kernels::{self, Packed};
use super::EngineError;

/// How weights are multiplied.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MatmulPolicy {
    /// Per-tensor choice of the fastest kernel (the default).
    Fast,
    /// Every weight dequantised to f32 and multiplied in f32: the numerics of
    /// candle-transformers' stock models with `CANDLE_DEQUANTIZE_ALL=1`. Slow and
    /// memory-hungry (4 bytes per weight); for parity checks.
    Reference,
}

/// Rows at or above which a weight with a dense copy uses it.
const DENSE_MIN_ROWS: usize = 4;

/// One weight matrix `n × k` (GGUF stores it as out-features by in-features).
pub struct Linear {
    /// This crate's int8 tiles; when set they serve every row count. Shared with the
    /// token embedding when the output projection is tied to it.
    packed: Option<Arc<Packed>>,
    /// Quantised kernel; serves every row count unless `dense` or `packed` is set.
    quant: Option<QMatMul>,
    /// Dequantised f16 copy for prompts of `DENSE_MIN_ROWS` rows or more; only for
    /// weight types that can be neither packed nor requantised exactly.
    dense: Option<Tensor>,
    /// Inner width the quantised kernel expects (`k` zero-padded to a multiple of 256
    /// for requantised weights).
    k_pad: usize,
    /// Rows go through the AVX-512 VNNI Q8_0 kernel of this module.
    vnni: bool,
    /// Output features.
    pub n: usize,
    /// Input features.
    pub k: usize,
}

/// Whether candle's repacked int8 kernel takes this weight for several rows.
fn packed_kernel(dtype: GgmlDType, n: usize, k: usize) -> bool {
    k.is_multiple_of(256)
        && n.is_multiple_of(16)
        && matches!(dtype, GgmlDType::Q4K | GgmlDType::Q6K | GgmlDType::Q8_0)
}

/// Rewrite a Q4_0 / Q5_0 / Q8_0 weight as Q8_0 with rows zero-padded to a multiple of
/// 256, so candle's packed int8 kernel takes it. Exact: each source block is `d · q`
/// with an integer `|q| <= 127`, kept with the same f16 scale `d`.
fn requantise_q8_0(qt: &QTensor, n: usize, k: usize) -> candle_core::Result<(QTensor, usize)> {
    let k_pad = k.div_ceil(256) * 256;
    let src = qt.data()?;
    let block_bytes = qt.dtype().type_size();
    let blocks = n * k / 32;
    // The f16 scale opens every Q4_0 / Q5_0 / Q8_0 block.
    let mut scale_bytes = Vec::with_capacity(blocks * 2);
    for b in 0..blocks {
        scale_bytes.extend_from_slice(&src[b * block_bytes..b * block_bytes + 2]);
    }
    let scales = Tensor::from_raw_buffer(&scale_bytes, DType::F16, &[blocks], &Device::Cpu)?
        .to_dtype(DType::F32)?
        .to_vec1::<f32>()?;
    let values = qt
        .dequantize(&Device::Cpu)?
        .flatten_all()?
        .to_vec1::<f32>()?;
    let mut out = Vec::with_capacity(n * k_pad / 32 * 34);
    for r in 0..n {
        for b in 0..k_pad / 32 {
            if b * 32 >= k {
                out.extend_from_slice(&[0u8; 34]);
                continue;
            }
            let blk = r * (k / 32) + b;
            out.extend_from_slice(&scale_bytes[blk * 2..blk * 2 + 2]);
            let d = scales[blk];
            for &y in &values[r * k + b * 32..r * k + b * 32 + 32] {
                let q = if d == 0.0 { 0.0 } else { (y / d).round() };
                out.push(q as i8 as u8);
            }
        }
    }
    let storage = QStorage::from_data(Cow::Owned(out), &Device::Cpu, GgmlDType::Q8_0)?;
    Ok((QTensor::new(storage, (n, k_pad))?, k_pad))
}

impl Linear {
    /// Choose the kernel for `qt` under `policy`.
    pub fn new(qt: Arc<QTensor>, policy: MatmulPolicy) -> candle_core::Result<Self> {
        let (n, k) = qt.shape().dims2()?;
        let dtype = qt.dtype();
        let float = matches!(dtype, GgmlDType::F32 | GgmlDType::F16 | GgmlDType::BF16);
        if policy == MatmulPolicy::Reference || float {
            return Self::dense_f32(&qt);
        }
        if kernels::enabled() {
            if let Some(p) = Packed::new(&qt)? {
                // The file's copy of the weight is dropped with `qt`.
                return Ok(Linear {
                    packed: Some(Arc::new(p)),
                    quant: None,
                    dense: None,
                    k_pad: k,
                    vnni: false,
                    n,
                    k,
                });
            }
        }
        if packed_kernel(dtype, n, k) {
            return Ok(Self::quantised(QMatMul::QTensor(qt), n, k));
        }
        if matches!(dtype, GgmlDType::Q4_0 | GgmlDType::Q5_0 | GgmlDType::Q8_0) && n % 16 == 0 {
            let (q8, k_pad) = requantise_q8_0(&qt, n, k)?;
            let quant = Some(QMatMul::QTensor(Arc::new(q8)));
            return Ok(Linear {
                packed: None,
                quant,
                dense: None,
                k_pad,
                vnni: false,
                n,
                k,
            });
        }
        let dense = Some(qt.dequantize_f16(&Device::Cpu)?);
        Ok(Linear {
            dense,
            ..Self::quantised(QMatMul::QTensor(qt), n, k)
        })
    }

    /// The enum variants are built directly, not through `QMatMul::from_arc`, so that
    /// candle's `CANDLE_DEQUANTIZE_ALL` variables cannot change the kernels chosen here.
    fn quantised(q: QMatMul, n: usize, k: usize) -> Self {
        Linear {
            packed: None,
            quant: Some(q),
            dense: None,
            k_pad: k,
            vnni: false,
            n,
            k,
        }
    }

    /// f32 dequantised weights and f32 matrix products: the numerics of
    /// `MatmulPolicy::Reference`.
    fn dense_f32(qt: &QTensor) -> candle_core::Result<Self> {
        let (n, k) = qt.shape().dims2()?;
        Ok(Self::quantised(
            QMatMul::Tensor(qt.dequantize(&Device::Cpu)?),
            n,
            k,
        ))
    }

    /// Kernel for the output projection, which may share its table with the token
    /// embedding and must not be copied twice: this crate's tiles when the table packs
    /// (the embedding then reads its rows from them, see `Embedding::packed`), a Q8_0
    /// table that does not pack through this module's VNNI kernel, anything else
    /// through candle's `QMatMul`.
    pub fn output(qt: Arc<QTensor>, policy: MatmulPolicy) -> candle_core::Result<Self> {
        let (n, k) = qt.shape().dims2()?;
        if policy == MatmulPolicy::Reference {
            return Self::dense_f32(&qt);
        }
        if kernels::enabled() {
            if let Some(p) = Packed::new(&qt)? {
                return Ok(Self::from_packed(Arc::new(p)));
            }
        }
        #[cfg(target_arch = "x86_64")]
        let vnni = qt.dtype() == GgmlDType::Q8_0
            && !packed_kernel(qt.dtype(), n, k)
            && q8_0_vnni::available();
        #[cfg(not(target_arch = "x86_64"))]
        let vnni = false;
        Ok(Linear {
            vnni,
            ..Self::quantised(QMatMul::QTensor(qt), n, k)
        })
    }

    /// A weight already in this crate's tiles.
    pub fn from_packed(p: Arc<Packed>) -> Self {
        Linear {
            n: p.n,
            k: p.k,
            k_pad: p.k,
            packed: Some(p),
            quant: None,
            dense: None,
            vnni: false,
        }
    }

    /// The tiles of this weight, when it has them.
    pub fn packed(&self) -> Option<&Arc<Packed>> {
        self.packed.as_ref()
    }

    /// Multiply the same rows `x` by several weights of input width `k`: one pool call
    /// when all of them have tiles, separate calls otherwise. Bit-identical either way.
    pub fn forward_fused(
        weights: &[&Linear],
        x: &[f32],
        m: usize,
    ) -> Result<Vec<Vec<f32>>, EngineError> {
        let tiles: Option<Vec<&Packed>> = weights.iter().map(|w| w.packed.as_deref()).collect();
        match tiles {
            Some(t) if t.iter().all(|p| p.k == weights[0].k) && x.len() == m * weights[0].k => {
                Ok(Packed::forward_many(&t, x, m))
            }
            _ => weights.iter().map(|w| w.forward(x, m)).collect(),
        }
    }

    /// Bytes held by this weight's own copies (candle's packed tiles not counted).
    pub fn bytes(&self) -> usize {
        let q = match &self.quant {
            Some(QMatMul::QTensor(t)) => t.storage_size_in_bytes(),
            Some(QMatMul::Tensor(t)) | Some(QMatMul::TensorF16(t)) => {
                t.elem_count() * t.dtype().size_in_bytes()
            }
            None => 0,
        };
        let d = self
            .dense
            .as_ref()
            .map_or(0, |t| t.elem_count() * t.dtype().size_in_bytes());
        q + d + self.packed.as_ref().map_or(0, |p| p.bytes())
    }

    /// Multiply `m` rows of `x` (`m × k`, row-major) by the weight: `m × n`.
    pub fn forward(&self, x: &[f32], m: usize) -> Result<Vec<f32>, EngineError> {
        let ctx = "matrix multiply";
        if x.len() != m * self.k {
            return Err(EngineError::Invalid(format!(
                "{} activation values for {m} rows of width {}",
                x.len(),
                self.k
            )));
        }
        if let Some(p) = &self.packed {
            return Ok(p.forward(x, m));
        }
        #[cfg(target_arch = "x86_64")]
        if let (true, Some(QMatMul::QTensor(t))) = (self.vnni, &self.quant) {
            let data = t.data().map_err(EngineError::candle(ctx))?;
            let mut out = Vec::with_capacity(m * self.n);
            for row in x.chunks_exact(self.k) {
                out.extend(q8_0_vnni::gemv(&data, self.n, self.k, row));
            }
            return Ok(out);
        }
        let xt = if self.k_pad == self.k {
            Tensor::from_slice(x, (m, self.k), &Device::Cpu)
        } else {
            let mut padded = vec![0f32; m * self.k_pad];
            for (dst, src) in padded
                .chunks_exact_mut(self.k_pad)
                .zip(x.chunks_exact(self.k))
            {
                dst[..self.k].copy_from_slice(src);
            }
            Tensor::from_vec(padded, (m, self.k_pad), &Device::Cpu)
        }
        .map_err(EngineError::candle(ctx))?;
        let out = match (&self.dense, &self.quant) {
            (Some(w), q) if m >= DENSE_MIN_ROWS || q.is_none() => {
                let xs = xt.to_dtype(w.dtype()).map_err(EngineError::candle(ctx))?;
                let wt = w.t().map_err(EngineError::candle(ctx))?;
                xs.matmul(&wt)
                    .and_then(|y| y.to_dtype(DType::F32))
                    .map_err(EngineError::candle(ctx))?
            }
            (_, Some(q)) => q.forward(&xt).map_err(EngineError::candle(ctx))?,
            _ => return Err(EngineError::Invalid("weight without a kernel".into())),
        };
        out.flatten_all()
            .and_then(|t| t.to_vec1::<f32>())
            .map_err(EngineError::candle(ctx))
    }
}

/// Token embedding table kept quantised; rows are dequantised when looked up.
pub struct Embedding {
    table: EmbedTable,
    /// Embedding width.
    pub hidden: usize,
    /// Rows (vocabulary entries).
    pub rows: usize,
}

enum EmbedTable {
    /// The file's tensor.
    File(Arc<QTensor>),
    /// The tiles of a tied output projection (the file's copy is dropped).
    Packed(Arc<Packed>),
}

impl Embedding {
    /// Wrap a `rows × hidden` table.
    pub fn new(table: Arc<QTensor>) -> candle_core::Result<Self> {
        let (rows, hidden) = table.shape().dims2()?;
        Ok(Embedding {
            table: EmbedTable::File(table),
            hidden,
            rows,
        })
    }

    /// Read rows from the tiles of a tied output projection; they dequantise to the
    /// file's values exactly (`Packed::row`).
    pub fn packed(tiles: Arc<Packed>) -> Self {
        Embedding {
            hidden: tiles.k,
            rows: tiles.n,
            table: EmbedTable::Packed(tiles),
        }
    }

    /// Bytes of the table held (shared tiles counted here too).
    pub fn bytes(&self) -> usize {
        match &self.table {
            EmbedTable::File(t) => t.storage_size_in_bytes(),
            EmbedTable::Packed(p) => p.bytes(),
        }
    }

    /// Dequantised rows for `tokens`, concatenated (`tokens.len() × hidden`).
    pub fn lookup(&self, tokens: &[u32]) -> Result<Vec<f32>, EngineError> {
        let ctx = "embedding lookup";
        let mut out = Vec::with_capacity(tokens.len() * self.hidden);
        for &t in tokens {
            let t = t as usize;
            if t >= self.rows {
                return Err(EngineError::Invalid(format!(
                    "token id {t} is outside the vocabulary of {} entries",
                    self.rows
                )));
            }
            let table = match &self.table {
                EmbedTable::Packed(p) => {
                    out.extend_from_slice(&p.row(t));
                    continue;
                }
                EmbedTable::File(table) => table,
            };
            let dtype = table.dtype();
            let row_bytes = self.hidden / dtype.block_size() * dtype.type_size();
            let data = table.data().map_err(EngineError::candle(ctx))?;
            let bytes = &data[t * row_bytes..(t + 1) * row_bytes];
            let storage = QStorage::from_data(Cow::Borrowed(bytes), &Device::Cpu, dtype)
                .map_err(EngineError::candle(ctx))?;
            let row = QTensor::new(storage, (1, self.hidden))
                .and_then(|q| q.dequantize(&Device::Cpu))
                .and_then(|t| t.flatten_all())
                .and_then(|t| t.to_vec1::<f32>())
                .map_err(EngineError::candle(ctx))?;
            out.extend_from_slice(&row);
        }
        Ok(out)
    }
}

/// Reads tensors of one GGUF file.
pub(crate) struct Loader<'a> {
    gguf: &'a GgufFile,
    reader: BufReader<File>,
}

impl<'a> Loader<'a> {
    pub(crate) fn open(gguf: &'a GgufFile) -> Result<Self, EngineError> {
        let file = File::open(&gguf.path).map_err(|source| EngineError::Io {
            path: gguf.path.clone(),
            source,
        })?;
        Ok(Loader {
            gguf,
            reader: BufReader::new(file),
        })
    }

    pub(crate) fn err(&self, tensor: &str) -> impl FnOnce(candle_core::Error) -> EngineError {
        let path = self.gguf.path.clone();
        let tensor = tensor.to_string();
        move |e| EngineError::Tensor {
            path,
            tensor,
            reason: e.to_string(),
        }
    }

    pub(crate) fn has(&self, name: &str) -> bool {
        self.gguf.content.tensor_infos.contains_key(name)
    }

    pub(crate) fn qtensor(&mut self, name: &str) -> Result<Arc<QTensor>, EngineError> {
        if !self.has(name) {
            return Err(EngineError::Tensor {
                path: self.gguf.path.clone(),
                tensor: name.into(),
                reason: "missing".into(),
            });
        }
        let t = self
            .gguf
            .content
            .tensor(&mut self.reader, name, &Device::Cpu);
        Ok(Arc::new(t.map_err(self.err(name))?))
    }

    pub(crate) fn vector(&mut self, name: &str, len: usize) -> Result<Vec<f32>, EngineError> {
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

    pub(crate) fn optional(
        &mut self,
        name: &str,
        len: usize,
    ) -> Result<Option<Vec<f32>>, EngineError> {
        if self.has(name) {
            self.vector(name, len).map(Some)
        } else {
            Ok(None)
        }
    }

    pub(crate) fn linear(
        &mut self,
        name: &str,
        policy: MatmulPolicy,
    ) -> Result<Linear, EngineError> {
        let t = self.qtensor(name)?;
        Linear::new(t, policy).map_err(self.err(name))
    }
}

/// Head layout of one attention call.
pub(crate) struct AttnShape {
    pub heads: usize,
    pub kv_heads: usize,
    pub head_dim: usize,
    pub scale: f32,
}

/// RMS norm of each `w.len()`-wide row of `x` (Zhang & Sennrich 2019), as
/// candle's `rms_norm`: x / sqrt(mean(x²) + eps) · w.
pub(crate) fn rms_norm(x: &[f32], w: &[f32], eps: f32) -> Vec<f32> {
    let dim = w.len();
    let mut out = Vec::with_capacity(x.len());
    for row in x.chunks_exact(dim) {
        let sum2: f32 = row.iter().map(|v| v * v).sum();
        let scale = (sum2 / dim as f32 + eps).sqrt();
        out.extend(row.iter().zip(w).map(|(v, w)| v / scale * w));
    }
    out
}

pub(crate) fn add_bias(x: &mut [f32], bias: Option<&[f32]>) {
    if let Some(b) = bias {
        for row in x.chunks_exact_mut(b.len()) {
            row.iter_mut().zip(b).for_each(|(v, b)| *v += b);
        }
    }
}

pub(crate) fn add_into(x: &mut [f32], y: &[f32]) {
    x.iter_mut().zip(y).for_each(|(a, b)| *a += b);
}

/// Gated feed-forward activation. Branch-free and without library calls, so the
/// element loops that call it vectorise (a scalar `tanhf` per element cost about as
/// much as Gemma 3's matrix products on prompts).
#[inline]
pub(crate) fn activate(act: Activation, x: f32) -> f32 {
    match act {
        Activation::Silu => x / (1.0 + exp(-x)),
        // Hendrycks & Gimpel (2016), tanh approximation, written with
        // 0.5 (1 + tanh z) = 1 / (1 + e^(-2z)).
        Activation::GeluTanh => {
            let c = (2.0f32 / std::f32::consts::PI).sqrt();
            x / (1.0 + exp(-2.0 * c * (x + 0.044_715 * x * x * x)))
        }
    }
}

/// e^x in f32 within about 2 ulp (Moshier's Cephes `expf`, 1992: range reduction by
/// ln 2 in two parts, degree-6 polynomial), inputs clamped to [-87.3, 88.3] so that
/// 2^n stays a normal number (e^-87.3 ≈ 1.2e-38); 0.693_359_4 is Cephes' exact
/// 0.693359375 as f32 writes it. Inlined so loops vectorise.
#[inline]
pub(crate) fn exp(x: f32) -> f32 {
    let x = x.clamp(-87.3, 88.3);
    let n = (x * std::f32::consts::LOG2_E).round_ties_even();
    let r = x - n * 0.693_359_4 - n * -2.121_944_4e-4;
    let z = r * r;
    let p = ((((1.987_569_1e-4 * r + 1.398_199_9e-3) * r + 8.333_452e-3) * r + 4.166_579_6e-2) * r
        + 1.666_666_5e-1)
        * r
        + 0.5; // Cephes 5.0000001201e-1, which rounds to 0.5 in f32
    let y = p * z + r + 1.0;
    y * f32::from_bits(((n as i32 + 127) as u32) << 23)
}

/// Inverse frequencies of rotary embeddings (Su et al. 2021): base^(-2i/d).
pub(crate) fn rope_freqs(head_dim: usize, base: f32) -> Vec<f32> {
    (0..head_dim)
        .step_by(2)
        .map(|i| 1.0 / base.powf(i as f32 / head_dim as f32))
        .collect()
}

/// Rotate every head of each `width`-wide row of `x` in place; row `r` sits at
/// position `pos0 + r`. Interleaved pairs (2i, 2i+1) as in the original Llama layout,
/// otherwise pairs (i, i + d/2) as in GPT-NeoX; angles in f32 as candle computes them.
pub(crate) fn rope(
    x: &mut [f32],
    width: usize,
    d: usize,
    pos0: usize,
    freqs: &[f32],
    interleaved: bool,
) {
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
                let (a, b) = if interleaved {
                    (2 * i, 2 * i + 1)
                } else {
                    (i, i + half)
                };
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
/// the reference Python Gemma 3 implementation counts it). Each (row, head) unit runs on one worker in a fixed
/// order, so results do not depend on scheduling.
pub(crate) fn attention(
    q: &[f32],
    kc: &[Vec<f32>],
    vc: &[Vec<f32>],
    c: &AttnShape,
    pos0: usize,
    m: usize,
    window: Option<usize>,
) -> Vec<f32> {
    let (heads, d) = (c.heads, c.head_dim);
    let group = heads / c.kv_heads;
    let q_dim = heads * d;
    let mut out = vec![0f32; m * q_dim];
    let shared = SharedOut(out.as_mut_ptr());
    let scale = c.scale;
    #[cfg(target_arch = "x86_64")]
    let simd = d.is_multiple_of(16) && d <= 256 && attn_simd::available();
    #[cfg(target_arch = "x86_64")]
    if simd {
        // Work units are (row, key/value head, part of its query heads): the heads that
        // share a key/value head read each key and value row once. A single row gets
        // its query heads split so that every thread has a unit. Each head's arithmetic
        // is the same whatever the split.
        let pool = candle_core::utils::barrier_pool();
        let threads = pool.n_workers() + 1;
        let per_row = c.kv_heads;
        let parts = if m * per_row >= threads {
            1
        } else {
            threads.div_ceil(m * per_row).min(group)
        };
        pool.execute_chunked(m * per_row * parts, |units| {
            let mut scores = Vec::new();
            for u in units {
                let (r, rest) = (u / (per_row * parts), u % (per_row * parts));
                let (g, part) = (rest / parts, rest % parts);
                let h0 = g * group + part * group / parts;
                let h1 = g * group + (part + 1) * group / parts;
                let p = pos0 + r;
                let lo = window.map_or(0, |w| (p + 1).saturating_sub(w));
                let span = (r * heads + h0) * d..(r * heads + h1) * d;
                // SAFETY: this unit owns heads h0..h1 of row r in `out`, which outlives
                // the pool call; no other unit touches that range.
                let o = unsafe {
                    std::slice::from_raw_parts_mut(shared.ptr().add(span.start), span.len())
                };
                // SAFETY: features checked by `available()`; d is a multiple of 16.
                unsafe {
                    attn_simd::attend(&q[span], &kc[g], &vc[g], d, lo, p, scale, o, &mut scores, d)
                };
            }
        });
        return out;
    }
    candle_core::utils::barrier_pool().execute_chunked(m * heads, |units| {
        let mut scores = Vec::new();
        for u in units {
            let (r, h) = (u / heads, u % heads);
            let g = h / group;
            let p = pos0 + r;
            let lo = window.map_or(0, |w| (p + 1).saturating_sub(w));
            let qv = &q[u * d..(u + 1) * d];
            // SAFETY: unit u = r * heads + h owns out[u*d..(u+1)*d] (row r, head h);
            // `out` outlives the pool call and no other unit touches this range.
            let o = unsafe { std::slice::from_raw_parts_mut(shared.ptr().add(u * d), d) };
            let (keys, vals) = (&kc[g], &vc[g]);
            scores.clear();
            let mut max = f32::NEG_INFINITY;
            for j in lo..=p {
                let s = dot(qv, &keys[j * d..][..d]) * scale;
                max = max.max(s);
                scores.push(s);
            }
            let mut sum = 0f32;
            for s in scores.iter_mut() {
                *s = (*s - max).exp();
                sum += *s;
            }
            for (s, j) in scores.iter().zip(lo..=p) {
                let wgt = s / sum;
                let vr = &vals[j * d..][..d];
                o.iter_mut().zip(vr).for_each(|(o, v)| *o += wgt * v);
            }
        }
    });
    debug_assert_eq!(out.len(), m * q_dim);
    out
}

/// Attention of the query heads that share one key/value head, with AVX-512. Keys and
/// values are visited in tiles of `TILE` positions that stay in the L1 cache while
/// every head of the unit uses them. Per head: scores of four keys at a time (four
/// independent accumulators, each key summed in the same order whatever its group),
/// softmax in position order, then the weighted sum of values held in registers and
/// accumulated in position order. A head's result therefore does not depend on which
/// other heads or rows share its unit.
#[cfg(target_arch = "x86_64")]
mod attn_simd {
    use std::arch::x86_64::*;

    /// Positions per tile: 32 rows of keys or values of width 256 are 32 KiB.
    const TILE: usize = 32;

    pub fn available() -> bool {
        is_x86_feature_detected!("avx512f")
    }

    /// Query heads `q` (`nh × d` values), key and value rows `j` at `j * stride` of
    /// `keys` / `vals` for `j` in `lo..=p`; writes `out` (`nh × d` values). Dispatches on the head width so a query and an output stay in
    /// registers.
    #[target_feature(enable = "avx512f")]
    #[allow(clippy::too_many_arguments)]
    pub unsafe fn attend(
        q: &[f32],
        keys: &[f32],
        vals: &[f32],
        stride: usize,
        lo: usize,
        p: usize,
        scale: f32,
        out: &mut [f32],
        scores: &mut Vec<f32>,
        d: usize,
    ) {
        assert!(d.is_multiple_of(16) && d <= 256 && out.len() == q.len());
        assert!(q.len().is_multiple_of(d));
        assert!(keys.len() >= p * stride + d && vals.len() >= p * stride + d);
        let args = (q, keys, vals, stride, lo, p, scale, out, scores);
        match d / 16 {
            4 => heads::<4>(args),
            8 => heads::<8>(args),
            16 => heads::<16>(args),
            1 => heads::<1>(args),
            2 => heads::<2>(args),
            3 => heads::<3>(args),
            5 => heads::<5>(args),
            6 => heads::<6>(args),
            7 => heads::<7>(args),
            9 => heads::<9>(args),
            10 => heads::<10>(args),
            11 => heads::<11>(args),
            12 => heads::<12>(args),
            13 => heads::<13>(args),
            14 => heads::<14>(args),
            _ => heads::<15>(args),
        }
    }

    type Args<'a> = (
        &'a [f32],
        &'a [f32],
        &'a [f32],
        usize,
        usize,
        usize,
        f32,
        &'a mut [f32],
        &'a mut Vec<f32>,
    );

    #[target_feature(enable = "avx512f")]
    unsafe fn heads<const C: usize>(args: Args<'_>) {
        let (q, keys, vals, stride, lo, p, scale, out, scores) = args;
        let d = 16 * C;
        let nh = q.len() / d;
        let n = p + 1 - lo;
        let (kp, vp) = (keys.as_ptr(), vals.as_ptr());
        let score = |acc: __m512| _mm512_reduce_add_ps(acc) * scale;
        scores.clear();
        scores.resize(nh * n, 0.0);
        let mut t0 = lo;
        while t0 <= p {
            let t1 = (t0 + TILE).min(p + 1);
            for h in 0..nh {
                let qv: [__m512; C] =
                    std::array::from_fn(|c| _mm512_loadu_ps(q.as_ptr().add(h * d + 16 * c)));
                let row = &mut scores[h * n..(h + 1) * n];
                let mut j = t0;
                while j + 4 <= t1 {
                    let mut acc = [_mm512_setzero_ps(); 4];
                    for (c, qc) in qv.iter().enumerate() {
                        for (t, a) in acc.iter_mut().enumerate() {
                            let k = _mm512_loadu_ps(kp.add((j + t) * stride + 16 * c));
                            *a = _mm512_fmadd_ps(*qc, k, *a);
                        }
                    }
                    for (t, a) in acc.into_iter().enumerate() {
                        row[j + t - lo] = score(a);
                    }
                    j += 4;
                }
                while j < t1 {
                    let mut a = _mm512_setzero_ps();
                    for (c, qc) in qv.iter().enumerate() {
                        a = _mm512_fmadd_ps(*qc, _mm512_loadu_ps(kp.add(j * stride + 16 * c)), a);
                    }
                    row[j - lo] = score(a);
                    j += 1;
                }
            }
            t0 = t1;
        }
        // Softmax weights per head, in position order.
        for row in scores.chunks_exact_mut(n) {
            let max = row.iter().fold(f32::NEG_INFINITY, |m, &s| m.max(s));
            // The branch-free `exp` of this module vectorises; the library's is a call
            // per score.
            for s in row.iter_mut() {
                *s = super::exp(*s - max);
            }
            let sum = row.iter().fold(0f32, |a, &s| a + s);
            for s in row.iter_mut() {
                *s /= sum;
            }
        }
        out.fill(0.0);
        let mut t0 = lo;
        while t0 <= p {
            let t1 = (t0 + TILE).min(p + 1);
            for h in 0..nh {
                let op = out.as_mut_ptr().add(h * d);
                let mut o: [__m512; C] = std::array::from_fn(|c| _mm512_loadu_ps(op.add(16 * c)));
                for (j, &w) in (t0..t1).zip(&scores[h * n + t0 - lo..h * n + t1 - lo]) {
                    let w = _mm512_set1_ps(w);
                    for (c, oc) in o.iter_mut().enumerate() {
                        *oc = _mm512_fmadd_ps(w, _mm512_loadu_ps(vp.add(j * stride + 16 * c)), *oc);
                    }
                }
                for (c, oc) in o.iter().enumerate() {
                    _mm512_storeu_ps(op.add(16 * c), *oc);
                }
            }
            t0 = t1;
        }
    }
}

/// Dot product with eight independent lanes (vectorises; fixed order, deterministic).
pub(crate) fn dot(a: &[f32], b: &[f32]) -> f32 {
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let tail: f32 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    let mut acc = [0f32; 8];
    for (x, y) in ca.zip(cb) {
        for i in 0..8 {
            acc[i] += x[i] * y[i];
        }
    }
    acc.iter().sum::<f32>() + tail
}

/// Matrix-vector products of a Q8_0 weight whose rows candle cannot pack (inner width
/// not a multiple of 256, e.g. Gemma 3's 640-wide output projection), with AVX-512
/// VNNI: per 32-value block, `d_w · d_x · Σ q_w q_x` as in ggml's Q8_0 dot product,
/// the activation quantised to Q8_0 the way candle quantises it.
#[cfg(target_arch = "x86_64")]
pub(crate) mod q8_0_vnni {
    use super::SharedOut;
    use std::arch::x86_64::*;

    const BLOCK_BYTES: usize = 34;

    /// Whether this processor runs the kernel.
    pub fn available() -> bool {
        is_x86_feature_detected!("avx512f")
            && is_x86_feature_detected!("avx512bw")
            && is_x86_feature_detected!("avx512vnni")
            && is_x86_feature_detected!("f16c")
    }

    /// Q8_0 quantisation of `x` (ggml's rule: d = max|x| / 127, q = round(x / d)), with
    /// q stored offset by +128 so it can be the unsigned operand of `vpdpbusd`.
    fn quantise(x: &[f32]) -> (Vec<u8>, Vec<f32>) {
        let mut qs = Vec::with_capacity(x.len());
        let mut ds = Vec::with_capacity(x.len() / 32);
        for block in x.chunks_exact(32) {
            let amax = block.iter().fold(0f32, |m, v| m.max(v.abs()));
            let d = amax / 127.0;
            let id = if d != 0.0 { 1.0 / d } else { 0.0 };
            // candle stores d as f16; round-trip so products use the same scale.
            let d16 = f16_round(d);
            ds.push(d16);
            qs.extend(block.iter().map(|v| ((v * id).round() as i32 + 128) as u8));
        }
        (qs, ds)
    }

    fn f16_round(v: f32) -> f32 {
        // SAFETY: `available()` checked F16C before any call reaches here.
        unsafe {
            _mm_cvtss_f32(_mm_cvtph_ps(_mm_cvtps_ph::<_MM_FROUND_TO_NEAREST_INT>(
                _mm_set_ss(v),
            )))
        }
    }

    /// `out[r] = Σ_k w[r, k] · x[k]` for all `n` rows of the Q8_0 bytes `w` (`k / 32`
    /// blocks per row). Rows are split over candle's worker pool; each row is summed by
    /// one worker in a fixed order, so results are deterministic.
    pub fn gemv(w: &[u8], n: usize, k: usize, x: &[f32]) -> Vec<f32> {
        let (xq, dx) = quantise(x);
        let mut out = vec![0f32; n];
        let shared = SharedOut(out.as_mut_ptr());
        let nb = k / 32;
        candle_core::utils::barrier_pool().execute_chunked(n, |rows| {
            for r in rows {
                let row = &w[r * nb * BLOCK_BYTES..(r + 1) * nb * BLOCK_BYTES];
                // SAFETY: features checked by the caller via `available()`; row r of
                // `out` is written by this unit only.
                unsafe { *shared.ptr().add(r) = row_dot(row, nb, &xq, &dx) };
            }
        });
        out
    }

    #[target_feature(enable = "avx512f,avx512bw,avx512vnni,f16c")]
    unsafe fn row_dot(row: &[u8], nb: usize, xq: &[u8], dx: &[f32]) -> f32 {
        let offset = _mm512_set1_epi8(-128i8); // bytes 0x80 = 128 as unsigned
        let mut acc = _mm512_setzero_ps();
        let mut b = 0;
        while b + 2 <= nb {
            let pa = row.as_ptr().add(b * BLOCK_BYTES);
            let pb = pa.add(BLOCK_BYTES);
            let wa = _mm256_loadu_si256(pa.add(2) as *const __m256i);
            let wb = _mm256_loadu_si256(pb.add(2) as *const __m256i);
            let wv = _mm512_inserti64x4::<1>(_mm512_castsi256_si512(wa), wb);
            let xv = _mm512_loadu_si512(xq.as_ptr().add(b * 32) as *const __m512i);
            // Σ (q_x + 128) q_w − 128 Σ q_w = Σ q_x q_w, four products per lane.
            let dot = _mm512_dpbusd_epi32(_mm512_setzero_si512(), xv, wv);
            let corr = _mm512_dpbusd_epi32(_mm512_setzero_si512(), offset, wv);
            let sumi = _mm512_sub_epi32(dot, corr);
            let da = f16_at(pa) * dx[b];
            let db = f16_at(pb) * dx[b + 1];
            let scale = _mm512_castps256_ps512(_mm256_set1_ps(da));
            let scale = _mm512_insertf32x8::<1>(scale, _mm256_set1_ps(db));
            acc = _mm512_fmadd_ps(_mm512_cvtepi32_ps(sumi), scale, acc);
            b += 2;
        }
        let mut sum = _mm512_reduce_add_ps(acc);
        if b < nb {
            let p = row.as_ptr().add(b * BLOCK_BYTES);
            let mut s = 0i32;
            for i in 0..32 {
                s += (*p.add(2 + i) as i8 as i32) * (xq[b * 32 + i] as i32 - 128);
            }
            sum += s as f32 * f16_at(p) * dx[b];
        }
        sum
    }

    #[target_feature(enable = "f16c")]
    unsafe fn f16_at(p: *const u8) -> f32 {
        let bits = u16::from_le_bytes([*p, *p.add(1)]);
        _mm_cvtss_f32(_mm_cvtph_ps(_mm_cvtsi32_si128(bits as i32)))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pseudo(n: usize, seed: u32) -> Vec<f32> {
        let mut s = seed.wrapping_mul(2_654_435_761) | 1;
        (0..n)
            .map(|_| {
                s ^= s << 13;
                s ^= s >> 17;
                s ^= s << 5;
                (s >> 8) as f32 / (1u32 << 24) as f32 * 2.0 - 1.0
            })
            .collect()
    }

    /// Scaled dot-product attention (Vaswani et al. 2017) straight from its definition,
    /// in f64: softmax(q·k / sqrt(d)) · v over the visible positions.
    fn textbook(q: &[f32], k: &[f32], v: &[f32], d: usize, lo: usize, p: usize) -> Vec<f64> {
        let s: Vec<f64> = (lo..=p)
            .map(|j| {
                (0..d)
                    .map(|i| q[i] as f64 * k[j * d + i] as f64)
                    .sum::<f64>()
                    / (d as f64).sqrt()
            })
            .collect();
        let max = s.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let w: Vec<f64> = s.iter().map(|x| (x - max).exp()).collect();
        let z: f64 = w.iter().sum();
        (0..d)
            .map(|i| {
                (lo..=p)
                    .zip(&w)
                    .map(|(j, w)| w / z * v[j * d + i] as f64)
                    .sum()
            })
            .collect()
    }

    /// Grouped-query attention with causal masking and a sliding window: every
    /// (row, head) equals the textbook formula within f32 rounding, and equals the
    /// same row computed alone bit for bit (so a prompt and a forked continuation see
    /// the same numbers however the heads are split over threads).
    #[test]
    fn attention_matches_the_definition_and_is_batch_invariant() {
        for (d, window) in [(64, None), (128, Some(5)), (80, None), (40, None)] {
            let (heads, kv_heads, pos0, m) = (6, 2, 9, 4);
            let n = pos0 + m;
            let shape = AttnShape {
                heads,
                kv_heads,
                head_dim: d,
                scale: 1.0 / (d as f32).sqrt(),
            };
            let q = pseudo(m * heads * d, 1);
            let kc: Vec<Vec<f32>> = (0..kv_heads)
                .map(|g| pseudo(n * d, 10 + g as u32))
                .collect();
            let vc: Vec<Vec<f32>> = (0..kv_heads)
                .map(|g| pseudo(n * d, 20 + g as u32))
                .collect();
            let all = attention(&q, &kc, &vc, &shape, pos0, m, window);
            for r in 0..m {
                let row = &q[r * heads * d..(r + 1) * heads * d];
                let alone = attention(row, &kc, &vc, &shape, pos0 + r, 1, window);
                let batch = &all[r * heads * d..(r + 1) * heads * d];
                let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                assert_eq!(bits(&alone), bits(batch), "d {d}, row {r}");
                let p = pos0 + r;
                let lo = window.map_or(0, |w| (p + 1).saturating_sub(w));
                for h in 0..heads {
                    let g = h / (heads / kv_heads);
                    let want = textbook(&row[h * d..(h + 1) * d], &kc[g], &vc[g], d, lo, p);
                    for (got, want) in batch[h * d..(h + 1) * d].iter().zip(&want) {
                        assert!((*got as f64 - want).abs() < 1e-5, "d {d} row {r} head {h}");
                    }
                }
            }
        }
    }

    /// Cephes `expf` (Moshier 1992) claims about 2 ulp; checked against the standard
    /// library's `exp` in f64 on a grid over the whole clamped range.
    #[test]
    fn exp_is_within_a_few_ulp_of_the_library_exp() {
        let mut worst = 0f64;
        for i in 0..=200_000 {
            let x = -87.0 + 175.0 * i as f32 / 200_000.0;
            let want = (x as f64).exp();
            worst = worst.max(((exp(x) as f64 - want) / want).abs());
        }
        assert!(
            worst < 4.0 * f32::EPSILON as f64,
            "max relative error {worst}"
        );
        assert_eq!(exp(0.0), 1.0);
        assert!(exp(-1000.0) < 1e-37 && exp(1000.0) > 1e38);
    }

    /// SiLU (Elfwing et al. 2018) and tanh-GELU (Hendrycks & Gimpel 2016) against their
    /// textbook formulas in f64 with the library `exp` / `tanh`. The bound grows with
    /// the exponent's size `a` (rounding the f32 argument moves e^a by ~ε·|a|), and an
    /// absolute floor covers x below about -9, where 1 + tanh z cancels to 0 in f64.
    #[test]
    fn activations_match_their_textbook_formulas() {
        let c = (2.0f64 / std::f64::consts::PI).sqrt();
        for i in 0..=4000 {
            let x = -20.0 + 40.0 * i as f32 / 4000.0;
            let xd = x as f64;
            let silu = xd / (1.0 + (-xd).exp());
            let gelu = 0.5 * xd * (1.0 + (c * (xd + 0.044_715 * xd.powi(3))).tanh());
            let z2 = 2.0 * c * (xd + 0.044_715 * xd.powi(3));
            for (got, want, a) in [
                (activate(Activation::Silu, x), silu, xd),
                (activate(Activation::GeluTanh, x), gelu, z2),
            ] {
                let tol = 4.0 * f32::EPSILON as f64 * (1.0 + a.abs()) * want.abs() + 1e-15;
                assert!((got as f64 - want).abs() <= tol, "x {x}: {got} vs {want}");
            }
        }
    }
}
