//! Synthetic tiny GGUF models with random weights, written with candle's own GGUF
//! writer, in the tensor layouts of Llama, Qwen2, Gemma 3, Qwen3 (per-head q/k norms,
//! head width from `attention.key_length`) and Phi-3 (fused qkv and gate-up tensors). Input: a layout and a
//! directory. Output: a model file small enough to load in milliseconds. Never
//! reads a real model; weights come from a fixed seed so every run writes the same file.

use std::path::{Path, PathBuf};

use candle_core::quantized::gguf_file::{self, Value};
use candle_core::quantized::{GgmlDType, QTensor};
use candle_core::{Device, Tensor};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// What to write; `Tiny::new(arch)` gives the default layout of that architecture.
#[derive(Debug, Clone)]
pub struct Tiny {
    /// `general.architecture` (any string; unknown ones test the rejection path).
    pub arch: String,
    /// `{arch}.context_length`.
    pub context_length: u32,
    /// Gemma 3: `attention.sliding_window`.
    pub sliding_window: u32,
    /// Gemma 3: every n-th layer is global (`attention.sliding_window_type`, candle's
    /// spelling); 0 writes no such key (to give the pattern in `extra` instead).
    pub sliding_window_type: u32,
    /// Transformer blocks.
    pub layers: usize,
    /// Seed of the random weights.
    pub seed: u64,
    /// More metadata entries (RoPE scaling keys, say); an entry replaces a default one
    /// of the same key.
    pub extra: Vec<(String, Value)>,
    /// A `rope_freqs.weight` tensor of per-frequency divisors (`head_dim / 2` values).
    pub rope_freqs: Option<Vec<f32>>,
    /// More f32 vector tensors, by name.
    pub extra_tensors: Vec<(String, Vec<f32>)>,
}

/// Vocabulary of every tiny model.
pub const VOCAB: usize = 320;

impl Tiny {
    /// Default tiny layout for `arch`.
    pub fn new(arch: &str) -> Self {
        Tiny {
            arch: arch.to_string(),
            context_length: 64,
            sliding_window: 8,
            sliding_window_type: 2,
            layers: 2,
            seed: 7,
            extra: Vec::new(),
            rope_freqs: None,
            extra_tensors: Vec::new(),
        }
    }

    /// Write the model to `dir/{arch}-tiny.gguf` and return the path.
    pub fn write(&self, dir: &Path) -> PathBuf {
        let added = self.extra.len() + self.extra_tensors.len();
        let tag = if added == 0 && self.rope_freqs.is_none() {
            String::new()
        } else {
            format!("-x{}", added + 2 * self.rope_freqs.is_some() as usize)
        };
        let path = dir.join(format!("{}-{}{tag}-tiny.gguf", self.arch, self.seed));
        let mut rng = ChaCha8Rng::seed_from_u64(self.seed);
        let gemma = self.arch == "gemma3";
        let qwen = self.arch == "qwen2";
        let qwen3 = self.arch == "qwen3";
        let phi3 = self.arch == "phi3";
        // Gemma's width 320 is not a multiple of 256, like the 640 of Gemma 3 270M, so
        // its weights take candle's slow paths; the others use k-quants on width 256.
        // Qwen3's heads are wider than hidden / heads, as in the published models.
        let (hidden, heads, kv_heads, head_dim, ffn) = match self.arch.as_str() {
            "gemma3" => (320, 2, 1, 128, 512),
            "qwen3" => (256, 4, 2, 128, 512),
            _ => (256, 4, 2, 64, 512),
        };
        let (q_dim, kv_dim) = (heads * head_dim, kv_heads * head_dim);
        let a = &self.arch;
        let mut meta: Vec<(String, Value)> = vec![
            ("general.architecture".into(), Value::String(a.clone())),
            (
                format!("{a}.context_length"),
                Value::U32(self.context_length),
            ),
            (format!("{a}.embedding_length"), Value::U32(hidden as u32)),
            (format!("{a}.feed_forward_length"), Value::U32(ffn as u32)),
            (format!("{a}.block_count"), Value::U32(self.layers as u32)),
            (
                format!("{a}.attention.head_count"),
                Value::U32(heads as u32),
            ),
            (
                format!("{a}.attention.head_count_kv"),
                Value::U32(kv_heads as u32),
            ),
            (
                format!("{a}.attention.layer_norm_rms_epsilon"),
                Value::F32(1e-6),
            ),
            (
                format!("{a}.rope.freq_base"),
                Value::F32(if gemma { 1e6 } else { 1e4 }),
            ),
            (
                format!("{a}.rope.dimension_count"),
                Value::U32(head_dim as u32),
            ),
        ];
        meta.retain(|(k, _)| !self.extra.iter().any(|(e, _)| e == k));
        meta.extend(self.extra.iter().cloned());
        if gemma || qwen3 {
            meta.extend([
                (
                    format!("{a}.attention.key_length"),
                    Value::U32(head_dim as u32),
                ),
                (
                    format!("{a}.attention.value_length"),
                    Value::U32(head_dim as u32),
                ),
            ]);
        }
        if gemma {
            meta.push((
                format!("{a}.attention.sliding_window"),
                Value::U32(self.sliding_window),
            ));
            if self.sliding_window_type > 0 {
                meta.push((
                    format!("{a}.attention.sliding_window_type"),
                    Value::U32(self.sliding_window_type),
                ));
            }
        }
        if qwen3 {
            // candle-transformers' quantized_qwen3 computes RoPE in f16 unless the file
            // says f32 (0); the reference must run in f32.
            meta.push(("general.dtype".into(), Value::U32(0)));
        }
        use GgmlDType as D;
        let mut tensors: Vec<(String, QTensor)> = Vec::new();
        let mut add = |name: String, n: usize, k: usize, dtype: D, rng: &mut ChaCha8Rng| {
            let amp = 1.0 / (k as f32).sqrt();
            let data: Vec<f32> = (0..n * k)
                .map(|_| rng.random_range(-amp..amp) * 1.7)
                .collect();
            let t = Tensor::from_vec(data, (n, k), &Device::Cpu).expect("tensor");
            let q = QTensor::quantize(&t, dtype).expect("quantize");
            tensors.push((name, q));
        };
        let norm = |n: usize, rng: &mut ChaCha8Rng| -> QTensor {
            let data: Vec<f32> = (0..n)
                .map(|_| 1.0 + rng.random_range(-0.2..0.2f32))
                .collect();
            let t = Tensor::from_vec(data, n, &Device::Cpu).expect("tensor");
            QTensor::quantize(&t, D::F32).expect("f32")
        };
        let emb = if qwen { D::Q4K } else { D::Q8_0 };
        add("token_embd.weight".into(), VOCAB, hidden, emb, &mut rng);
        if qwen || phi3 {
            add("output.weight".into(), VOCAB, hidden, D::Q6K, &mut rng);
        }
        let mut norms: Vec<(String, QTensor)> =
            vec![("output_norm.weight".into(), norm(hidden, &mut rng))];
        for i in 0..self.layers {
            let p = |s: &str| format!("blk.{i}.{s}");
            let (tq, tk, tv, to, tg, tu, td) = match self.arch.as_str() {
                "gemma3" => (D::Q5_0, D::Q5_0, D::Q8_0, D::Q4K, D::Q5_0, D::Q4_0, D::Q6K),
                "qwen2" => (D::Q5_0, D::Q4K, D::Q8_0, D::Q5_0, D::Q4K, D::Q5_0, D::Q6K),
                "qwen3" => (D::Q4K, D::Q5_0, D::Q8_0, D::Q4K, D::Q6K, D::Q4K, D::Q5_0),
                "phi3" => (D::Q4K, D::Q4K, D::Q4K, D::Q8_0, D::Q5_0, D::Q5_0, D::Q4K),
                _ => (D::Q4K, D::Q8_0, D::Q5_0, D::Q4K, D::Q4K, D::Q4_0, D::Q6K),
            };
            if phi3 {
                // Fused: rows q, k, v in one tensor, rows gate, up in another.
                add(
                    p("attn_qkv.weight"),
                    q_dim + 2 * kv_dim,
                    hidden,
                    tq,
                    &mut rng,
                );
                add(p("attn_output.weight"), hidden, q_dim, to, &mut rng);
                add(p("ffn_up.weight"), 2 * ffn, hidden, tu, &mut rng);
            } else {
                add(p("attn_q.weight"), q_dim, hidden, tq, &mut rng);
                add(p("attn_k.weight"), kv_dim, hidden, tk, &mut rng);
                add(p("attn_v.weight"), kv_dim, hidden, tv, &mut rng);
                add(p("attn_output.weight"), hidden, q_dim, to, &mut rng);
                add(p("ffn_gate.weight"), ffn, hidden, tg, &mut rng);
                add(p("ffn_up.weight"), ffn, hidden, tu, &mut rng);
            }
            add(p("ffn_down.weight"), hidden, ffn, td, &mut rng);
            norms.push((p("attn_norm.weight"), norm(hidden, &mut rng)));
            norms.push((p("ffn_norm.weight"), norm(hidden, &mut rng)));
            if qwen {
                for (name, n) in [
                    ("attn_q.bias", q_dim),
                    ("attn_k.bias", kv_dim),
                    ("attn_v.bias", kv_dim),
                ] {
                    let data: Vec<f32> = (0..n).map(|_| rng.random_range(-0.5..0.5f32)).collect();
                    let t = Tensor::from_vec(data, n, &Device::Cpu).expect("tensor");
                    norms.push((p(name), QTensor::quantize(&t, D::F32).expect("f32")));
                }
            }
            if gemma || qwen3 {
                norms.push((p("attn_q_norm.weight"), norm(head_dim, &mut rng)));
                norms.push((p("attn_k_norm.weight"), norm(head_dim, &mut rng)));
            }
            if gemma {
                norms.push((p("post_attention_norm.weight"), norm(hidden, &mut rng)));
                norms.push((p("post_ffw_norm.weight"), norm(hidden, &mut rng)));
            }
        }
        for (name, v) in &self.extra_tensors {
            let t = Tensor::from_vec(v.clone(), v.len(), &Device::Cpu).expect("tensor");
            norms.push((name.clone(), QTensor::quantize(&t, D::F32).expect("f32")));
        }
        if let Some(f) = &self.rope_freqs {
            let t = Tensor::from_vec(f.clone(), f.len(), &Device::Cpu).expect("tensor");
            norms.push((
                "rope_freqs.weight".into(),
                QTensor::quantize(&t, D::F32).expect("f32"),
            ));
        }
        tensors.extend(norms);
        let meta_refs: Vec<(&str, &Value)> = meta.iter().map(|(k, v)| (k.as_str(), v)).collect();
        let tensor_refs: Vec<(&str, &QTensor)> =
            tensors.iter().map(|(k, t)| (k.as_str(), t)).collect();
        let mut file = std::fs::File::create(&path).expect("create tiny gguf");
        gguf_file::write(&mut file, &meta_refs, &tensor_refs).expect("write tiny gguf");
        path
    }
}
