//! Throughput benchmark of the decoder. Input: a GGUF model path, token counts and a
//! thread count. Output: a `BenchReport` (load time, prompt and generation tokens per
//! second, peak memory, machine). Never asserts on speed and never needs a tokenizer:
//! the token ids are a fixed pseudo-random sequence of ordinary ids.

use std::path::Path;
use std::time::Instant;

use serde::Serialize;

use super::decoder::{Decoder, LoadOptions};
use super::gguf::{sha256_file, GgufFile};
use super::EngineError;

/// One benchmark run of one model.
#[derive(Debug, Clone, Serialize)]
pub struct BenchReport {
    /// Model file as given.
    pub model: String,
    /// SHA-256 of the model file, lowercase hex.
    pub sha256: String,
    /// `general.architecture`.
    pub arch: String,
    /// Tensor storage types and counts, e.g. `Q4K:169 Q6K:29 F32:141`.
    pub quantisation: String,
    /// Worker threads in effect.
    pub threads: usize,
    /// Tokens in the timed prompt pass.
    pub prompt_tokens: usize,
    /// Tokens generated one at a time after the prompt.
    pub gen_tokens: usize,
    /// Seconds to load the model (reading, dequantising, packing, one warm-up pass).
    pub load_seconds: f64,
    /// Prompt tokens per second (one forward pass over the whole prompt).
    pub prompt_tokens_per_second: f64,
    /// Generated tokens per second (greedy, one token per forward pass).
    pub gen_tokens_per_second: f64,
    /// Peak resident memory of the process in bytes (`VmHWM` of /proc/self/status).
    pub peak_rss_bytes: Option<u64>,
    /// Processor model (`model name` of /proc/cpuinfo).
    pub cpu: Option<String>,
}

/// A fixed sequence of `n` ids in `[1000, vocab)`: past the special and byte tokens.
fn synthetic_tokens(n: usize, vocab: usize) -> Vec<u32> {
    // Knuth's multiplicative LCG constants (MMIX); fixed seed so runs are comparable.
    let mut state: u64 = 0x2545_f491_4f6c_dd1d;
    let span = vocab.saturating_sub(1000).max(1) as u64;
    (0..n)
        .map(|_| {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (1000 + (state >> 33) % span).min(vocab as u64 - 1) as u32
        })
        .collect()
}

fn proc_field(file: &str, key: &str) -> Option<String> {
    let text = std::fs::read_to_string(file).ok()?;
    let line = text.lines().find(|l| l.starts_with(key))?;
    Some(line.split_once(':')?.1.trim().to_string())
}

/// Load `path`, time one prompt pass of `prompt_tokens` and `gen_tokens` greedy steps.
pub fn run_bench(
    path: &Path,
    prompt_tokens: usize,
    gen_tokens: usize,
    threads: usize,
) -> Result<BenchReport, EngineError> {
    if prompt_tokens == 0 {
        return Err(EngineError::Invalid(
            "the benchmark needs at least one prompt token".into(),
        ));
    }
    let gguf = GgufFile::open(path)?;
    let mut types = std::collections::BTreeMap::new();
    for info in gguf.content.tensor_infos.values() {
        *types
            .entry(format!("{:?}", info.ggml_dtype))
            .or_insert(0usize) += 1;
    }
    let quantisation = types
        .iter()
        .map(|(t, n)| format!("{t}:{n}"))
        .collect::<Vec<_>>()
        .join(" ");
    let start = Instant::now();
    let opts = LoadOptions {
        threads,
        context_cap: Some(prompt_tokens + gen_tokens + 1),
    };
    let decoder = Decoder::load(&gguf, &opts)?;
    let load_seconds = start.elapsed().as_secs_f64();
    let cfg = decoder.config();

    let prompt = synthetic_tokens(prompt_tokens, cfg.vocab);
    let mut cache = decoder.new_cache();
    let t0 = Instant::now();
    let mut logits = decoder.forward_last(&mut cache, &prompt)?;
    let prompt_secs = t0.elapsed().as_secs_f64();

    let t1 = Instant::now();
    for _ in 0..gen_tokens {
        let next = logits
            .iter()
            .enumerate()
            .fold((0usize, f32::NEG_INFINITY), |b, (i, &v)| {
                if v > b.1 {
                    (i, v)
                } else {
                    b
                }
            })
            .0 as u32;
        logits = decoder.forward_last(&mut cache, &[next])?;
    }
    let gen_secs = t1.elapsed().as_secs_f64();

    let peak_rss_bytes = proc_field("/proc/self/status", "VmHWM")
        .and_then(|v| v.trim_end_matches("kB").trim().parse::<u64>().ok())
        .map(|kb| kb * 1024);
    Ok(BenchReport {
        model: path.display().to_string(),
        sha256: sha256_file(path)?,
        arch: cfg.arch.clone(),
        quantisation,
        threads: cfg.threads,
        prompt_tokens,
        gen_tokens,
        load_seconds,
        prompt_tokens_per_second: prompt_tokens as f64 / prompt_secs,
        gen_tokens_per_second: if gen_tokens == 0 {
            0.0
        } else {
            gen_tokens as f64 / gen_secs
        },
        peak_rss_bytes,
        cpu: proc_field("/proc/cpuinfo", "model name"),
    })
}
