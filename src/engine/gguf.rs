//! GGUF model files: open, validate and describe. Input: a path. Output: the parsed
//! header (`GgufFile`) with typed metadata accessors, and a `ModelInfo` summary.
//! Never loads tensor data here and never panics on a damaged file: a truncated or
//! foreign file becomes an `EngineError` naming the path.

use std::collections::BTreeMap;
use std::fs::File;
use std::io::{BufReader, Read};
use std::path::{Path, PathBuf};

use candle_core::quantized::gguf_file::{Content, Value};
use serde::Serialize;
use sha2::{Digest, Sha256};

use super::EngineError;

/// A GGUF file whose header has been read and whose tensor table fits the file.
#[derive(Debug)]
pub struct GgufFile {
    /// Where the file lies.
    pub path: PathBuf,
    /// Parsed header: metadata and tensor table.
    pub content: Content,
    /// File size in bytes.
    pub file_size: u64,
}

impl GgufFile {
    /// Read the header of `path` and check that every tensor lies inside the file.
    pub fn open(path: &Path) -> Result<Self, EngineError> {
        let io = |source| EngineError::Io {
            path: path.to_path_buf(),
            source,
        };
        let file = File::open(path).map_err(io)?;
        let file_size = file.metadata().map_err(io)?.len();
        let mut reader = BufReader::new(file);
        let mut magic = [0u8; 4];
        if reader.read_exact(&mut magic).is_err() || &magic != b"GGUF" {
            return Err(EngineError::NotGguf {
                path: path.to_path_buf(),
                reason: "the file does not start with the GGUF magic bytes".into(),
            });
        }
        super::gguf_check::check_file(path, file_size)?;
        let mut reader = BufReader::new(File::open(path).map_err(io)?);
        let content = Content::read(&mut reader).map_err(|e| EngineError::NotGguf {
            path: path.to_path_buf(),
            reason: format!("damaged or truncated header ({e})"),
        })?;
        let gguf = GgufFile {
            path: path.to_path_buf(),
            content,
            file_size,
        };
        gguf.check_tensor_extents()?;
        Ok(gguf)
    }

    /// A truncated download keeps a valid header but loses tensor data at the end.
    fn check_tensor_extents(&self) -> Result<(), EngineError> {
        for (name, info) in &self.content.tensor_infos {
            let elems = info.shape.elem_count();
            let block = info.ggml_dtype.block_size();
            let bytes = (elems / block * info.ggml_dtype.type_size()) as u64;
            let end = self
                .content
                .tensor_data_offset
                .saturating_add(info.offset)
                .saturating_add(bytes);
            if end > self.file_size {
                return Err(EngineError::Truncated {
                    path: self.path.clone(),
                    tensor: name.clone(),
                    needed: end,
                    actual: self.file_size,
                });
            }
        }
        Ok(())
    }

    /// The raw metadata value under `key`, if present.
    pub fn value(&self, key: &str) -> Option<&Value> {
        self.content.metadata.get(key)
    }

    fn missing(&self, key: &str, expected: &str) -> EngineError {
        EngineError::Metadata {
            path: self.path.clone(),
            key: key.to_string(),
            expected: expected.to_string(),
        }
    }

    /// `general.architecture`.
    pub fn arch(&self) -> Result<String, EngineError> {
        self.string("general.architecture")
    }

    /// A string value.
    pub fn string(&self, key: &str) -> Result<String, EngineError> {
        match self.value(key) {
            Some(Value::String(s)) => Ok(s.clone()),
            _ => Err(self.missing(key, "a string")),
        }
    }

    /// An unsigned integer value of any width.
    pub fn uint(&self, key: &str) -> Result<u64, EngineError> {
        match self.value(key) {
            Some(Value::U8(v)) => Ok(*v as u64),
            Some(Value::U16(v)) => Ok(*v as u64),
            Some(Value::U32(v)) => Ok(*v as u64),
            Some(Value::U64(v)) => Ok(*v),
            Some(Value::I8(v)) if *v >= 0 => Ok(*v as u64),
            Some(Value::I16(v)) if *v >= 0 => Ok(*v as u64),
            Some(Value::I32(v)) if *v >= 0 => Ok(*v as u64),
            Some(Value::I64(v)) if *v >= 0 => Ok(*v as u64),
            _ => Err(self.missing(key, "an unsigned integer")),
        }
    }

    /// A float value (f32 or f64 in the file).
    pub fn float(&self, key: &str) -> Result<f64, EngineError> {
        match self.value(key) {
            Some(Value::F32(v)) => Ok(*v as f64),
            Some(Value::F64(v)) => Ok(*v),
            _ => Err(self.missing(key, "a float")),
        }
    }

    /// A boolean value.
    pub fn boolean(&self, key: &str) -> Result<bool, EngineError> {
        match self.value(key) {
            Some(Value::Bool(v)) => Ok(*v),
            _ => Err(self.missing(key, "a boolean")),
        }
    }

    /// `{arch}.{suffix}` as an unsigned integer.
    pub fn arch_uint(&self, suffix: &str) -> Result<u64, EngineError> {
        self.uint(&format!("{}.{suffix}", self.arch()?))
    }

    /// Length of an array value, if the key holds an array.
    pub fn array_len(&self, key: &str) -> Option<usize> {
        match self.value(key) {
            Some(Value::Array(v)) => Some(v.len()),
            _ => None,
        }
    }

    /// Fail unless the architecture is a family the decoder runs (`arch::FAMILIES`).
    pub fn require_supported(&self) -> Result<String, EngineError> {
        super::arch::family_of(self).map(|f| f.name.to_string())
    }
}

/// What `assize model info` reports about a model file.
#[derive(Debug, Clone, Serialize)]
pub struct ModelInfo {
    /// File path as given.
    pub path: String,
    /// `general.name`, when the file has one.
    pub name: Option<String>,
    /// `general.architecture`.
    pub architecture: String,
    /// Whether assize's decoder runs this architecture.
    pub supported: bool,
    /// What sets the family's blocks apart (`arch::Family::layout`), when supported.
    pub layout: Option<String>,
    /// Total number of weights over all tensors.
    pub parameters: u64,
    /// Transformer blocks (`{arch}.block_count`).
    pub layers: Option<u64>,
    /// Hidden size (`{arch}.embedding_length`).
    pub hidden_size: Option<u64>,
    /// Feed-forward width (`{arch}.feed_forward_length`).
    pub feed_forward: Option<u64>,
    /// Attention heads (`{arch}.attention.head_count`).
    pub heads: Option<u64>,
    /// Key/value heads (`{arch}.attention.head_count_kv`).
    pub kv_heads: Option<u64>,
    /// Trained context length (`{arch}.context_length`).
    pub context_length: Option<u64>,
    /// Vocabulary size (entries of `tokenizer.ggml.tokens`).
    pub vocab_size: Option<usize>,
    /// `tokenizer.ggml.model` (`gpt2` = byte-level BPE, `llama` = SentencePiece).
    pub tokenizer: Option<String>,
    /// `tokenizer.ggml.pre`, the pre-tokenizer variant for byte-level BPE.
    pub tokenizer_pre: Option<String>,
    /// Whether `tokenizer.chat_template` is present.
    pub chat_template: bool,
    /// Number of tensors per storage type (e.g. `Q4K`: 168).
    pub tensor_types: BTreeMap<String, usize>,
    /// Number of tensors.
    pub tensor_count: usize,
    /// File size in bytes.
    pub file_size: u64,
    /// SHA-256 of the whole file, lowercase hex.
    pub sha256: String,
}

impl ModelInfo {
    /// Summarise an opened file; `sha256` is computed by streaming the whole file.
    pub fn from_file(gguf: &GgufFile) -> Result<Self, EngineError> {
        let arch = gguf.arch()?;
        let family = super::arch::find(&arch);
        let opt = |suffix: &str| gguf.arch_uint(suffix).ok();
        let mut tensor_types = BTreeMap::new();
        let mut parameters = 0u64;
        for info in gguf.content.tensor_infos.values() {
            *tensor_types
                .entry(format!("{:?}", info.ggml_dtype))
                .or_insert(0) += 1;
            parameters += info.shape.elem_count() as u64;
        }
        Ok(ModelInfo {
            path: gguf.path.display().to_string(),
            name: gguf.string("general.name").ok(),
            supported: family.is_some(),
            layout: family.map(|f| f.layout.to_string()),
            architecture: arch,
            parameters,
            layers: opt("block_count"),
            hidden_size: opt("embedding_length"),
            feed_forward: opt("feed_forward_length"),
            heads: opt("attention.head_count"),
            kv_heads: opt("attention.head_count_kv"),
            context_length: opt("context_length"),
            vocab_size: gguf.array_len("tokenizer.ggml.tokens"),
            tokenizer: gguf.string("tokenizer.ggml.model").ok(),
            tokenizer_pre: gguf.string("tokenizer.ggml.pre").ok(),
            chat_template: gguf.string("tokenizer.chat_template").is_ok(),
            tensor_count: gguf.content.tensor_infos.len(),
            tensor_types,
            file_size: gguf.file_size,
            sha256: sha256_file(&gguf.path)?,
        })
    }
}

/// SHA-256 of a file, lowercase hex, read in 1 MiB chunks.
pub fn sha256_file(path: &Path) -> Result<String, EngineError> {
    let io = |source| EngineError::Io {
        path: path.to_path_buf(),
        source,
    };
    let mut file = File::open(path).map_err(io)?;
    let mut hasher = Sha256::new();
    let mut buf = vec![0u8; 1 << 20];
    loop {
        let n = file.read(&mut buf).map_err(io)?;
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
    }
    Ok(format!("{:x}", hasher.finalize()))
}
