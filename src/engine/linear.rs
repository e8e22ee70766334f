//! Matrix-multiply paths of the decoder. Input: a GGUF weight tensor, chosen once at
//! load, and activation rows (`m × k`, f32). Output: `m × n` f32 rows, and embedding
//! rows dequantised on demand. Never changes numerics between two calls with the same
//! input and thread count, and never holds more than two copies of one weight.
//!
//! Why several paths: candle's repacked int8 kernels only take Q4_K, Q6_K (several rows)
//! and Q8_0 weights whose inner dimension is a multiple of 256. Every other weight
//! (Q5_0, Q4_0, inner dimension 640 or 896) falls back to a row-by-row dot product that
//! is slow for prompts of many rows; those weights also get a dequantised copy for
//! prompts, while single-row generation keeps the quantised dot product, which reads
//! fewer bytes.

use std::borrow::Cow;
use std::sync::Arc;

use candle_core::quantized::{GgmlDType, QMatMul, QStorage, QTensor};
use candle_core::{DType, Device, Module, Tensor};

use super::EngineError;

/// How weights are multiplied.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MatmulPolicy {
    /// Per-tensor choice of the fastest kernel (the default).
    Fast,
    /// Exactly the kernels candle-transformers' stock models use (`QMatMul` on every
    /// weight); slower, for parity checks against those models.
    Reference,
}

/// Rows at or above which a weight with a dense copy uses it.
const DENSE_MIN_ROWS: usize = 4;

/// One weight matrix `n × k` (GGUF stores it as out-features by in-features).
pub struct Linear {
    /// Quantised kernel; `None` when the dense copy serves every row count.
    quant: Option<QMatMul>,
    /// Dequantised copy (f16 or f32) used for prompts of `DENSE_MIN_ROWS` rows or more.
    dense: Option<Tensor>,
    /// Output features.
    pub n: usize,
    /// Input features.
    pub k: usize,
}

/// Whether candle's repacked int8 kernel takes this weight for `m` rows.
fn packed_kernel(dtype: GgmlDType, n: usize, k: usize, many_rows: bool) -> bool {
    let shape_ok = k % 256 == 0 && n % 16 == 0;
    shape_ok
        && match dtype {
            GgmlDType::Q4K | GgmlDType::Q8_0 => true,
            GgmlDType::Q6K => many_rows,
            _ => false,
        }
}

impl Linear {
    /// Choose the kernels for `qt` under `policy`; `dense_dtype` is the dtype of the
    /// dequantised prompt copy (f16 halves its memory, f32 is exact).
    pub fn new(
        qt: Arc<QTensor>,
        policy: MatmulPolicy,
        dense_dtype: DType,
        keep_quant: bool,
    ) -> candle_core::Result<Self> {
        let (n, k) = qt.shape().dims2()?;
        let dtype = qt.dtype();
        let float = matches!(dtype, GgmlDType::F32 | GgmlDType::F16 | GgmlDType::BF16);
        if policy == MatmulPolicy::Reference || float || packed_kernel(dtype, n, k, true) {
            let quant = QMatMul::from_arc(qt)?;
            return Ok(Linear { quant: Some(quant), dense: None, n, k });
        }
        let dense = match dense_dtype {
            DType::F16 => qt.dequantize_f16(&Device::Cpu)?,
            _ => qt.dequantize(&Device::Cpu)?,
        };
        let quant = if keep_quant {
            Some(QMatMul::from_arc(qt)?)
        } else {
            None
        };
        Ok(Linear { quant, dense: Some(dense), n, k })
    }

    /// Bytes held by this weight's copies (quantised plus dense).
    pub fn bytes(&self) -> usize {
        let q = match &self.quant {
            Some(QMatMul::QTensor(t)) => t.storage_size_in_bytes(),
            Some(QMatMul::Tensor(t)) | Some(QMatMul::TensorF16(t)) => {
                t.elem_count() * t.dtype().size_in_bytes()
            }
            None => 0,
        };
        let d = self.dense.as_ref().map_or(0, |t| t.elem_count() * t.dtype().size_in_bytes());
        q + d
    }

    /// Multiply `m` rows of `x` (`m × k`, row-major) by the weight: `m × n`.
    pub fn forward(&self, x: &[f32], m: usize) -> Result<Vec<f32>, EngineError> {
        let ctx = "matrix multiply";
        let xt = Tensor::from_slice(x, (m, self.k), &Device::Cpu)
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
            (None, None) => return Err(EngineError::Invalid("weight without a kernel".into())),
        };
        out.flatten_all()
            .and_then(|t| t.to_vec1::<f32>())
            .map_err(EngineError::candle(ctx))
    }
}

/// Token embedding table kept quantised; rows are dequantised when looked up.
pub struct Embedding {
    table: Arc<QTensor>,
    /// Embedding width.
    pub hidden: usize,
    /// Rows (vocabulary entries).
    pub rows: usize,
}

impl Embedding {
    /// Wrap a `rows × hidden` table.
    pub fn new(table: Arc<QTensor>) -> candle_core::Result<Self> {
        let (rows, hidden) = table.shape().dims2()?;
        Ok(Embedding { table, hidden, rows })
    }

    /// Bytes of the quantised table.
    pub fn bytes(&self) -> usize {
        self.table.storage_size_in_bytes()
    }

    /// The shared table, for a tied output projection.
    pub fn table(&self) -> Arc<QTensor> {
        self.table.clone()
    }

    /// Dequantised rows for `tokens`, concatenated (`tokens.len() × hidden`).
    pub fn lookup(&self, tokens: &[u32]) -> Result<Vec<f32>, EngineError> {
        let ctx = "embedding lookup";
        let dtype = self.table.dtype();
        let row_bytes = self.hidden / dtype.block_size() * dtype.type_size();
        let data = self.table.data().map_err(EngineError::candle(ctx))?;
        let mut out = Vec::with_capacity(tokens.len() * self.hidden);
        for &t in tokens {
            let t = t as usize;
            if t >= self.rows {
                return Err(EngineError::Invalid(format!(
                    "token id {t} is outside the vocabulary of {} entries",
                    self.rows
                )));
            }
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
