//! Weights of the decoder: reading tensors from the GGUF file (whole, or a row range of
//! a fused tensor), the matrix-multiply kernel chosen per weight at load, embedding rows
//! dequantised on demand. Input: weight tensors and f32 activation rows. Output: f32
//! rows. Never changes numerics between two calls with the same input and thread count,
//! and never holds more than two copies of one weight.
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

use super::gguf::GgufFile;
use super::kernels::{Kernels, Packed};
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
    kernel: Kernel,
    /// Output features.
    pub n: usize,
    /// Input features.
    pub k: usize,
}

/// The kernel that multiplies one weight, chosen once at load.
enum Kernel {
    /// This crate's int8 tiles, for every row count. Shared with the token embedding
    /// when the output projection is tied to it.
    Tiles(Arc<Packed>),
    /// candle's product for every row count: its repacked int8 kernel on a quantised
    /// weight, or f32 on a dequantised one. Rows are zero-padded to `k_pad` (a Q4_0 /
    /// Q5_0 weight requantised as Q8_0 with rows padded to a multiple of 256).
    Candle { q: QMatMul, k_pad: usize },
    /// candle's quantised row-by-row product for fewer than `DENSE_MIN_ROWS` rows, a
    /// dequantised f16 copy for prompts: weight types that can be neither packed nor
    /// requantised exactly.
    CandleDense { q: QMatMul, dense: Tensor },
    /// The AVX-512 VNNI Q8_0 row kernel of this module (an output projection whose
    /// width candle cannot pack).
    #[cfg(target_arch = "x86_64")]
    Q8Vnni(Arc<QTensor>),
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
        if let Some(kernels) = Kernels::active() {
            if let Some(p) = Packed::new(&qt, kernels)? {
                // The file's copy of the weight is dropped with `qt`.
                return Ok(Self::from_packed(Arc::new(p)));
            }
        }
        if packed_kernel(dtype, n, k) {
            return Ok(Self::candle(QMatMul::QTensor(qt), n, k));
        }
        if matches!(dtype, GgmlDType::Q4_0 | GgmlDType::Q5_0 | GgmlDType::Q8_0) && n % 16 == 0 {
            let (q8, k_pad) = requantise_q8_0(&qt, n, k)?;
            let q = QMatMul::QTensor(Arc::new(q8));
            return Ok(Linear {
                kernel: Kernel::Candle { q, k_pad },
                n,
                k,
            });
        }
        let dense = qt.dequantize_f16(&Device::Cpu)?;
        let q = QMatMul::QTensor(qt);
        Ok(Linear {
            kernel: Kernel::CandleDense { q, dense },
            n,
            k,
        })
    }

    /// candle's product on `q` at width `k`. The enum variants of `QMatMul` are built
    /// directly, not through `QMatMul::from_arc`, so that candle's
    /// `CANDLE_DEQUANTIZE_ALL` variables cannot change the kernels chosen here.
    fn candle(q: QMatMul, n: usize, k: usize) -> Self {
        Linear {
            kernel: Kernel::Candle { q, k_pad: k },
            n,
            k,
        }
    }

    /// f32 dequantised weights and f32 matrix products: the numerics of
    /// `MatmulPolicy::Reference`.
    fn dense_f32(qt: &QTensor) -> candle_core::Result<Self> {
        let (n, k) = qt.shape().dims2()?;
        let w = qt.dequantize(&Device::Cpu)?;
        Ok(Self::candle(QMatMul::Tensor(w), n, k))
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
        if let Some(kernels) = Kernels::active() {
            if let Some(p) = Packed::new(&qt, kernels)? {
                return Ok(Self::from_packed(Arc::new(p)));
            }
        }
        #[cfg(target_arch = "x86_64")]
        if qt.dtype() == GgmlDType::Q8_0
            && !packed_kernel(qt.dtype(), n, k)
            && q8_0_vnni::available()
        {
            return Ok(Linear {
                kernel: Kernel::Q8Vnni(qt),
                n,
                k,
            });
        }
        Ok(Self::candle(QMatMul::QTensor(qt), n, k))
    }

    /// A weight already in this crate's tiles.
    pub fn from_packed(p: Arc<Packed>) -> Self {
        Linear {
            n: p.n,
            k: p.k,
            kernel: Kernel::Tiles(p),
        }
    }

    /// The tiles of this weight, when it has them.
    pub fn packed(&self) -> Option<&Arc<Packed>> {
        match &self.kernel {
            Kernel::Tiles(p) => Some(p),
            _ => None,
        }
    }

    /// Multiply the same rows `x` by several weights of input width `k`: one pool call
    /// when all of them have tiles, separate calls otherwise. Bit-identical either way.
    pub fn forward_fused(
        weights: &[&Linear],
        x: &[f32],
        m: usize,
    ) -> Result<Vec<Vec<f32>>, EngineError> {
        let tiles: Option<Vec<&Packed>> =
            weights.iter().map(|w| w.packed().map(|p| &**p)).collect();
        match tiles {
            Some(t) if t.iter().all(|p| p.k == weights[0].k) && x.len() == m * weights[0].k => {
                Ok(Packed::forward_many(&t, x, m))
            }
            _ => weights.iter().map(|w| w.forward(x, m)).collect(),
        }
    }

    /// Bytes held by this weight's own copies (candle's packed tiles not counted).
    pub fn bytes(&self) -> usize {
        let tensor = |t: &Tensor| t.elem_count() * t.dtype().size_in_bytes();
        let qmatmul = |q: &QMatMul| match q {
            QMatMul::QTensor(t) => t.storage_size_in_bytes(),
            QMatMul::Tensor(t) | QMatMul::TensorF16(t) => tensor(t),
        };
        match &self.kernel {
            Kernel::Tiles(p) => p.bytes(),
            Kernel::Candle { q, .. } => qmatmul(q),
            Kernel::CandleDense { q, dense } => qmatmul(q) + tensor(dense),
            #[cfg(target_arch = "x86_64")]
            Kernel::Q8Vnni(t) => t.storage_size_in_bytes(),
        }
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
        let (q, k_pad) = match &self.kernel {
            Kernel::Tiles(p) => return Ok(p.forward(x, m)),
            #[cfg(target_arch = "x86_64")]
            Kernel::Q8Vnni(t) => {
                let data = t.data().map_err(EngineError::candle(ctx))?;
                let mut out = Vec::with_capacity(m * self.n);
                for row in x.chunks_exact(self.k) {
                    out.extend(q8_0_vnni::gemv(&data, self.n, self.k, row));
                }
                return Ok(out);
            }
            Kernel::CandleDense { dense, .. } if m >= DENSE_MIN_ROWS => {
                let xt = Tensor::from_slice(x, (m, self.k), &Device::Cpu)
                    .and_then(|t| t.to_dtype(dense.dtype()))
                    .map_err(EngineError::candle(ctx))?;
                let out = dense
                    .t()
                    .and_then(|wt| xt.matmul(&wt))
                    .and_then(|y| y.to_dtype(DType::F32))
                    .map_err(EngineError::candle(ctx))?;
                return to_rows(out);
            }
            Kernel::CandleDense { q, .. } => (q, self.k),
            Kernel::Candle { q, k_pad } => (q, *k_pad),
        };
        let xt = if k_pad == self.k {
            Tensor::from_slice(x, (m, self.k), &Device::Cpu)
        } else {
            let mut padded = vec![0f32; m * k_pad];
            for (dst, src) in padded.chunks_exact_mut(k_pad).zip(x.chunks_exact(self.k)) {
                dst[..self.k].copy_from_slice(src);
            }
            Tensor::from_vec(padded, (m, k_pad), &Device::Cpu)
        }
        .map_err(EngineError::candle(ctx))?;
        to_rows(q.forward(&xt).map_err(EngineError::candle(ctx))?)
    }
}

/// The values of a product, row after row.
fn to_rows(t: Tensor) -> Result<Vec<f32>, EngineError> {
    t.flatten_all()
        .and_then(|t| t.to_vec1::<f32>())
        .map_err(EngineError::candle("matrix multiply"))
}

/// Rows `rows` of the `n × k` quantised matrix `qt`, as a tensor of their own (a part of
/// a fused tensor: GGUF stores a matrix row after row, each row whole blocks).
fn row_slice(qt: &QTensor, rows: &std::ops::Range<usize>) -> candle_core::Result<QTensor> {
    let (n, k) = qt.shape().dims2()?;
    let dtype = qt.dtype();
    if rows.end > n || k % dtype.block_size() != 0 {
        candle_core::bail!("rows {rows:?} of a {n}x{k} tensor");
    }
    let row_bytes = k / dtype.block_size() * dtype.type_size();
    let data = qt.data()?;
    let part = data[rows.start * row_bytes..rows.end * row_bytes].to_vec();
    let storage = QStorage::from_data(Cow::Owned(part), &Device::Cpu, dtype)?;
    QTensor::new(storage, (rows.len(), k))
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
    /// The last fused tensor read, whose other parts are usually read next.
    fused: Option<(String, Arc<QTensor>)>,
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
            fused: None,
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

    /// Rows `rows` of the fused weight `name` as a weight of their own. A row's
    /// product does not depend on the other rows, so the parts multiply exactly as
    /// the whole would.
    pub(crate) fn linear_rows(
        &mut self,
        name: &str,
        rows: &std::ops::Range<usize>,
        policy: MatmulPolicy,
    ) -> Result<Linear, EngineError> {
        let whole = match self.fused.take() {
            Some((n, t)) if n == name => t,
            _ => self.qtensor(name)?,
        };
        let part = row_slice(&whole, rows).map_err(self.err(name))?;
        self.fused = Some((name.to_string(), whole));
        Linear::new(Arc::new(part), policy).map_err(self.err(name))
    }
}

/// Output buffer shared by attention workers; each work unit writes a disjoint slice.
pub(crate) struct SharedOut(pub(crate) *mut f32);
// SAFETY: workers write only to the disjoint `head_dim`-wide slice of their own unit.
unsafe impl Sync for SharedOut {}
impl SharedOut {
    pub(crate) fn ptr(&self) -> *mut f32 {
        self.0
    }
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
