//! A loaded judge: tokenizer, chat format and decoder behind one handle, with the
//! operations the judge stage needs. Input: chat messages and candidate label texts.
//! Output: log-probabilities of each label at the slot, and generated text.
//!
//! Prefix reuse is canonical, so results never depend on what ran before: the chat
//! preamble (template text and system message up to the user's content) is computed
//! once per system message and forked; the part shared by all requests of one call
//! (an item's instructions, question, context and answer) is computed once from that
//! fork and forked again for each request. The same call therefore runs the same
//! chunks in any run, resumed or not, and gives bit-identical results. Never reads
//! files other than the model and never decides what a score means.

use std::path::{Path, PathBuf};
use std::sync::Mutex;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::chat::{ChatFormat, ChatMessage, Role, Segment};
use super::decoder::{log_softmax, Decoder, KvCache, LoadOptions};
use super::tokenizer::JudgeTokenizer;
use super::{gguf, EngineError, GgufFile};

/// A computed prefix: its tokens, its KV state and the logits at its last position.
#[derive(Clone)]
struct Checkpoint {
    tokens: Vec<u32>,
    cache: KvCache,
    logits: Vec<f32>,
}

/// Counters of decoder work, for benchmarks and the prefix-reuse report.
#[derive(Debug, Clone, Copy, Default, serde::Serialize)]
pub struct WorkCounters {
    /// Prompt tokens actually run through the decoder.
    pub computed_tokens: u64,
    /// Prompt tokens served from a cached prefix instead.
    pub reused_tokens: u64,
    /// Tokens generated.
    pub generated_tokens: u64,
}

/// A judge model ready to score and generate.
pub struct JudgeModel {
    /// Model file.
    pub path: PathBuf,
    /// SHA-256 of the model file.
    pub sha256: String,
    /// `general.architecture`.
    pub arch: String,
    /// Tokenizer from the file's metadata.
    pub tokenizer: JudgeTokenizer,
    /// Chat template (or the plain fallback).
    pub chat: ChatFormat,
    /// The decoder.
    pub decoder: Decoder,
    preambles: Mutex<Vec<Checkpoint>>,
    reuse: bool,
    counters: Mutex<WorkCounters>,
}

/// One scoring request: a prompt that ends right before the slot, and the token
/// sequence of each candidate label after it.
#[derive(Debug, Clone)]
pub struct SlotRequest {
    /// Tokens up to the slot.
    pub prefix: Vec<u32>,
    /// Tokens of each label after `prefix` (each non-empty).
    pub continuations: Vec<Vec<u32>>,
}

/// Text generated after a prompt.
#[derive(Debug, Clone)]
pub struct Generated {
    /// The text, cut before the stop string that ended it.
    pub text: String,
    /// Tokens generated.
    pub tokens: usize,
    /// Why generation ended: `stop`, `eos` or `limit`.
    pub ended_by: &'static str,
}

fn lcp(a: &[u32], b: &[u32]) -> usize {
    a.iter().zip(b).take_while(|(x, y)| x == y).count()
}

impl JudgeModel {
    /// Load a GGUF judge: header, tokenizer, template, weights.
    pub fn load(path: &Path, opts: &LoadOptions) -> Result<Self, EngineError> {
        let gguf = GgufFile::open(path)?;
        let arch = gguf.require_supported()?;
        let tokenizer = JudgeTokenizer::from_gguf(&gguf)?;
        let chat = ChatFormat::from_gguf(&gguf)?;
        let decoder = Decoder::load(&gguf, opts)?;
        Ok(JudgeModel {
            path: path.to_path_buf(),
            sha256: gguf::sha256_file(path)?,
            arch,
            tokenizer,
            chat,
            decoder,
            preambles: Mutex::new(Vec::new()),
            reuse: true,
            counters: Mutex::new(WorkCounters::default()),
        })
    }

    /// Turn prefix reuse on or off (off: every request is computed from scratch;
    /// used by the benchmark that measures what reuse buys).
    pub fn set_prefix_reuse(&mut self, on: bool) {
        self.reuse = on;
        self.preambles.lock().expect("preamble lock").clear();
    }

    /// Work done so far.
    pub fn counters(&self) -> WorkCounters {
        *self.counters.lock().expect("counter lock")
    }

    /// The token limit of one sequence.
    pub fn context_limit(&self) -> usize {
        self.decoder.config().context_limit
    }

    /// Tokens of a chat prompt: template text as trusted tokens, message contents
    /// and the assistant `prefill` as plain text (never control tokens).
    pub fn encode_chat(
        &self,
        system: &str,
        user: &str,
        prefill: &str,
    ) -> Result<Vec<u32>, EngineError> {
        let mut msgs = Vec::new();
        if !system.is_empty() {
            msgs.push(ChatMessage {
                role: Role::System,
                content: system.to_string(),
            });
        }
        msgs.push(ChatMessage {
            role: Role::User,
            content: user.to_string(),
        });
        let mut segs = self.chat.render_segments(&msgs, true)?;
        if !prefill.is_empty() {
            segs.push(Segment::Content(prefill.to_string()));
        }
        self.tokenizer.encode_segments(&segs, true)
    }

    /// The slot request for a chat prompt and a set of label texts: each label is
    /// appended to the prefill and tokenised whole, so the label tokens are exactly
    /// the ones the model would produce there.
    pub fn slot_request(
        &self,
        system: &str,
        user: &str,
        prefill: &str,
        labels: &[String],
    ) -> Result<SlotRequest, EngineError> {
        let full: Vec<Vec<u32>> = labels
            .iter()
            .map(|l| self.encode_chat(system, user, &format!("{prefill}{l}")))
            .collect::<Result<_, _>>()?;
        let shortest = full.iter().map(Vec::len).min().unwrap_or(0);
        let mut cut = full
            .iter()
            .skip(1)
            .fold(shortest, |acc, f| acc.min(lcp(&full[0], f)));
        // Every label keeps at least one token of its own.
        cut = cut.min(shortest.saturating_sub(1));
        Ok(SlotRequest {
            prefix: full[0][..cut].to_vec(),
            continuations: full.iter().map(|f| f[cut..].to_vec()).collect(),
        })
    }

    fn check_len(&self, item: &str, tokens: usize) -> Result<(), EngineError> {
        let limit = self.context_limit();
        if tokens > limit {
            return Err(EngineError::ContextOverflow {
                item: item.to_string(),
                tokens,
                limit,
            });
        }
        Ok(())
    }

    /// The chat preamble of a system message: the tokens every prompt with this
    /// system message starts with, up to the user's content.
    fn preamble_tokens(&self, system: &str) -> Result<Vec<u32>, EngineError> {
        let a = self.encode_chat(system, "a", "")?;
        let b = self.encode_chat(system, "b", "")?;
        Ok(a[..lcp(&a, &b)].to_vec())
    }

    /// Compute (or fetch) the preamble checkpoint of `system`.
    pub fn warm_preamble(&self, system: &str) -> Result<(), EngineError> {
        if !self.reuse {
            return Ok(());
        }
        let tokens = self.preamble_tokens(system)?;
        if tokens.is_empty() {
            return Ok(());
        }
        let mut pre = self.preambles.lock().expect("preamble lock");
        if pre.iter().any(|c| c.tokens == tokens) {
            return Ok(());
        }
        let mut cache = self.decoder.new_cache();
        let logits = self.decoder.forward_last(&mut cache, &tokens)?;
        self.count(tokens.len() as u64, 0, 0);
        pre.push(Checkpoint {
            tokens,
            cache,
            logits,
        });
        Ok(())
    }

    /// A cache holding exactly `tokens` and the logits at its last position: forked
    /// from the longest preamble checkpoint that prefixes `tokens` (when reuse is on),
    /// the rest computed in one chunk.
    fn prefill(&self, item: &str, tokens: &[u32]) -> Result<(KvCache, Vec<f32>), EngineError> {
        self.check_len(item, tokens.len())?;
        if tokens.is_empty() {
            return Err(EngineError::Invalid(format!("{item}: empty prompt")));
        }
        let start = if self.reuse {
            let pre = self.preambles.lock().expect("preamble lock");
            pre.iter()
                .filter(|c| c.tokens.len() <= tokens.len() && tokens.starts_with(&c.tokens))
                .max_by_key(|c| c.tokens.len())
                .cloned()
        } else {
            None
        };
        match start {
            Some(c) if c.tokens.len() == tokens.len() => {
                self.count(0, tokens.len() as u64, 0);
                Ok((c.cache, c.logits))
            }
            Some(c) => {
                let mut cache = c.cache;
                let logits = self
                    .decoder
                    .forward_last(&mut cache, &tokens[c.tokens.len()..])?;
                self.count(
                    (tokens.len() - c.tokens.len()) as u64,
                    c.tokens.len() as u64,
                    0,
                );
                Ok((cache, logits))
            }
            None => {
                let mut cache = self.decoder.new_cache();
                let logits = self.decoder.forward_last(&mut cache, tokens)?;
                self.count(tokens.len() as u64, 0, 0);
                Ok((cache, logits))
            }
        }
    }

    fn count(&self, computed: u64, reused: u64, generated: u64) {
        let mut c = self.counters.lock().expect("counter lock");
        c.computed_tokens += computed;
        c.reused_tokens += reused;
        c.generated_tokens += generated;
    }

    /// Log-probability of each label of each request. Requests of one item should be
    /// passed together: their common prefix is computed once and forked.
    ///
    /// A label of several tokens scores the product of its token probabilities. When
    /// one label's tokens are a prefix of another's (`1` and `10`), the shorter label
    /// also needs the sequence to stop there, so its probability is multiplied by
    /// one minus the probability of the tokens that would extend it into a longer
    /// label.
    pub fn label_logprobs(
        &self,
        item: &str,
        requests: &[SlotRequest],
    ) -> Result<Vec<Vec<f64>>, EngineError> {
        let Some(first) = requests.first() else {
            return Ok(Vec::new());
        };
        let longest = requests
            .iter()
            .map(|r| r.prefix.len() + r.continuations.iter().map(Vec::len).max().unwrap_or(0))
            .max()
            .unwrap_or(0);
        self.check_len(item, longest)?;
        let shared = requests.iter().skip(1).fold(first.prefix.len(), |acc, r| {
            acc.min(lcp(&first.prefix, &r.prefix))
        });
        let shared = shared.max(1).min(first.prefix.len());
        if !self.reuse {
            return requests
                .iter()
                .map(|r| {
                    let (cache, logits) = self.prefill(item, &r.prefix)?;
                    self.score_labels(&cache, &logits, &r.continuations)
                })
                .collect();
        }
        let (base, base_logits) = self.prefill(item, &first.prefix[..shared])?;
        let mut out = Vec::with_capacity(requests.len());
        for r in requests {
            let (cache, logits) = if r.prefix.len() == shared {
                (base.clone(), base_logits.clone())
            } else {
                let mut c = base.clone();
                let l = self.decoder.forward_last(&mut c, &r.prefix[shared..])?;
                self.count((r.prefix.len() - shared) as u64, shared as u64, 0);
                (c, l)
            };
            out.push(self.score_labels(&cache, &logits, &r.continuations)?);
        }
        Ok(out)
    }

    /// Log-probabilities of label continuations from one cache state.
    fn score_labels(
        &self,
        cache: &KvCache,
        logits: &[f32],
        conts: &[Vec<u32>],
    ) -> Result<Vec<f64>, EngineError> {
        let lp = log_softmax(logits);
        let mut scores = Vec::with_capacity(conts.len());
        for (i, c) in conts.iter().enumerate() {
            let first = *c.first().ok_or_else(|| {
                EngineError::Invalid("a label has no tokens after the slot".into())
            })?;
            let mut total = lp[first as usize] as f64;
            let mut state: Option<(KvCache, Vec<f32>)> = None;
            for k in 1..=c.len() {
                // Tokens of other labels that extend c[..k] at position k.
                let extenders: Vec<u32> = conts
                    .iter()
                    .enumerate()
                    .filter(|(j, o)| *j != i && o.len() > k && o[..k] == c[..k])
                    .map(|(_, o)| o[k])
                    .collect();
                if k == c.len() && extenders.is_empty() {
                    break;
                }
                let (mut sc, _) = state.take().unwrap_or_else(|| (cache.clone(), Vec::new()));
                let l = self.decoder.forward_last(&mut sc, &c[k - 1..k])?;
                let step = log_softmax(&l);
                if k == c.len() {
                    let mut ext: Vec<u32> = extenders;
                    ext.sort_unstable();
                    ext.dedup();
                    let p_ext: f64 = ext.iter().map(|&t| (step[t as usize] as f64).exp()).sum();
                    total += (1.0 - p_ext).max(1e-300).ln();
                    break;
                }
                total += step[c[k] as usize] as f64;
                state = Some((sc, l));
            }
            scores.push(total);
        }
        Ok(scores)
    }

    /// Generate after a prompt until a stop string, an end-of-turn token or
    /// `max_tokens`. Temperature 0 is greedy; otherwise sampling draws from a ChaCha8
    /// generator seeded with `seed`, so equal inputs give equal text.
    pub fn generate(
        &self,
        item: &str,
        prompt: &[u32],
        max_tokens: usize,
        stops: &[&str],
        temperature: f64,
        seed: u64,
    ) -> Result<Generated, EngineError> {
        self.check_len(item, prompt.len() + max_tokens)?;
        let (cache, logits) = self.prefill(item, prompt)?;
        self.generate_from(cache, logits, max_tokens, stops, temperature, seed)
    }

    /// Generate after each of several prompts that share a prefix (the forms of one
    /// item): the shared prefix is computed once and forked, each prompt's own part
    /// runs as one chunk from the fork. Results equal in any run, like `generate`'s.
    pub fn generate_batch(
        &self,
        item: &str,
        prompts: &[Vec<u32>],
        max_tokens: usize,
        stops: &[&str],
        temperature: f64,
        seed: u64,
    ) -> Result<Vec<Generated>, EngineError> {
        let Some(first) = prompts.first() else {
            return Ok(Vec::new());
        };
        if prompts.len() == 1 || !self.reuse {
            return prompts
                .iter()
                .map(|p| self.generate(item, p, max_tokens, stops, temperature, seed))
                .collect();
        }
        let longest = prompts.iter().map(Vec::len).max().unwrap_or(0);
        self.check_len(item, longest + max_tokens)?;
        // Every prompt keeps at least one token of its own after the shared part.
        let shortest = prompts.iter().map(Vec::len).min().unwrap_or(0);
        let shared = prompts
            .iter()
            .skip(1)
            .fold(first.len(), |acc, p| acc.min(lcp(first, p)))
            .min(shortest.saturating_sub(1))
            .max(1);
        let (base, _) = self.prefill(item, &first[..shared])?;
        prompts
            .iter()
            .map(|p| {
                let mut cache = base.clone();
                let logits = self.decoder.forward_last(&mut cache, &p[shared..])?;
                self.count((p.len() - shared) as u64, shared as u64, 0);
                self.generate_from(cache, logits, max_tokens, stops, temperature, seed)
            })
            .collect()
    }

    /// The generation loop from a cache and the logits at its last position.
    fn generate_from(
        &self,
        mut cache: KvCache,
        mut logits: Vec<f32>,
        max_tokens: usize,
        stops: &[&str],
        temperature: f64,
        seed: u64,
    ) -> Result<Generated, EngineError> {
        let eos = self.tokenizer.eos();
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut ids: Vec<u32> = Vec::new();
        let mut ended_by = "limit";
        let mut text = String::new();
        for _ in 0..max_tokens {
            let next = pick(&logits, temperature, &mut rng);
            if eos.contains(&next) {
                ended_by = "eos";
                break;
            }
            ids.push(next);
            text = self.tokenizer.decode(&ids)?;
            if let Some(pos) = stops.iter().filter_map(|s| text.find(s)).min() {
                text.truncate(pos);
                ended_by = "stop";
                break;
            }
            logits = self.decoder.forward_last(&mut cache, &[next])?;
        }
        self.count(0, 0, ids.len() as u64);
        Ok(Generated {
            text,
            tokens: ids.len(),
            ended_by,
        })
    }

    /// The `k` most likely next tokens after `tokens`: (id, piece, probability).
    pub fn top_next(
        &self,
        tokens: &[u32],
        k: usize,
    ) -> Result<Vec<(u32, String, f64)>, EngineError> {
        let (_, logits) = self.prefill("prompt", tokens)?;
        let lp = log_softmax(&logits);
        let mut idx: Vec<usize> = (0..lp.len()).collect();
        idx.sort_by(|&a, &b| lp[b].total_cmp(&lp[a]).then(a.cmp(&b)));
        Ok(idx
            .into_iter()
            .take(k)
            .map(|i| {
                (
                    i as u32,
                    self.tokenizer.piece(i as u32),
                    (lp[i] as f64).exp(),
                )
            })
            .collect())
    }
}

/// Greedy (first maximum) or seeded temperature sampling.
fn pick(logits: &[f32], temperature: f64, rng: &mut ChaCha8Rng) -> u32 {
    if temperature <= 0.0 {
        let mut best = 0usize;
        for (i, &v) in logits.iter().enumerate() {
            if v > logits[best] {
                best = i;
            }
        }
        return best as u32;
    }
    let max = logits.iter().cloned().fold(f32::NEG_INFINITY, f32::max) as f64;
    let weights: Vec<f64> = logits
        .iter()
        .map(|&l| ((l as f64 - max) / temperature).exp())
        .collect();
    let total: f64 = weights.iter().sum();
    let mut u = rng.random::<f64>() * total;
    for (i, w) in weights.iter().enumerate() {
        if u < *w {
            return i as u32;
        }
        u -= w;
    }
    (weights.len() - 1) as u32
}
