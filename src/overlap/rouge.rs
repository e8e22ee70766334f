//! Overlap stage, ROUGE-1, ROUGE-2, ROUGE-L and summary-level ROUGE-Lsum.
//!
//! Input: a hypothesis (the answer) and one or more reference texts. Output:
//! precision, recall and F per ROUGE type, all in 0..=1. Must never do I/O or panic;
//! empty texts score 0.
//!
//! Formulas from Lin (2004), "ROUGE: A Package for Automatic Evaluation of
//! Summaries", ACL workshop; counting and tie-breaking follow rouge-score 0.1.2 so
//! that `TokenizerMode::Compatible` reproduces its numbers.

use std::borrow::Cow;

use serde::Serialize;

use super::edit::lcs_bit_parallel;
use super::fasthash::FastMap;
use super::tokenize::{rouge_words, summary_sentences, TokenizerMode};

/// Precision, recall and their balanced F (beta = 1), each in 0..=1.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize)]
pub struct Prf {
    /// Matches divided by the hypothesis size.
    pub precision: f64,
    /// Matches divided by the reference size.
    pub recall: f64,
    /// 2PR/(P+R), or 0 when P+R = 0.
    pub f: f64,
}

impl Prf {
    fn new(precision: f64, recall: f64) -> Self {
        let f = if precision + recall > 0.0 {
            2.0 * precision * recall / (precision + recall)
        } else {
            0.0
        };
        Prf {
            precision,
            recall,
            f,
        }
    }
}

/// The four ROUGE variants for one hypothesis.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize)]
pub struct RougeScores {
    /// Unigram overlap with clipped counts (ROUGE-1).
    pub rouge1: Prf,
    /// Bigram overlap with clipped counts (ROUGE-2).
    pub rouge2: Prf,
    /// Longest common subsequence over the whole text (ROUGE-L).
    pub rouge_l: Prf,
    /// Summary-level LCS: union LCS of each reference line against all hypothesis
    /// lines (ROUGE-Lsum); equals ROUGE-L for single-line texts.
    pub rouge_lsum: Prf,
}

/// Tokeniser and stemming choices for ROUGE.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct RougeOptions {
    /// How words are split; `Compatible` reproduces rouge-score 0.1.2.
    pub tokenizer: TokenizerMode,
    /// Porter-stem words longer than 3 characters before matching.
    pub stem: bool,
}

/// A text as per-line token ids; ids are shared between hypothesis and reference.
struct Lines {
    lines: Vec<Vec<u32>>,
    all: Vec<u32>,
}

/// Token ids of already lowercased text, per line and in total.
fn encode<'a>(
    lower: &'a str,
    opts: &RougeOptions,
    vocab: &mut FastMap<Cow<'a, str>, u32>,
) -> Lines {
    let mut lines = Vec::new();
    let mut all = Vec::new();
    // Newlines separate words in both tokeniser modes, so the whole-text tokens are
    // the concatenation of the per-line tokens and one pass serves every type.
    for sentence in summary_sentences(lower) {
        let start = all.len();
        for tok in rouge_words(sentence, opts.tokenizer, opts.stem) {
            let next = vocab.len() as u32;
            all.push(*vocab.entry(tok).or_insert(next));
        }
        lines.push(all[start..].to_vec());
    }
    Lines { lines, all }
}

/// Scores one hypothesis against one reference.
pub fn rouge(hypothesis: &str, reference: &str, opts: &RougeOptions) -> RougeScores {
    let (hyp_lower, ref_lower) = (hypothesis.to_lowercase(), reference.to_lowercase());
    let mut vocab = FastMap::default();
    let hyp = encode(&hyp_lower, opts, &mut vocab);
    let refr = encode(&ref_lower, opts, &mut vocab);
    RougeScores {
        rouge1: rouge_n(&hyp.all, &refr.all, 1),
        rouge2: rouge_n(&hyp.all, &refr.all, 2),
        rouge_l: rouge_l(&hyp.all, &refr.all),
        rouge_lsum: rouge_lsum(&hyp.lines, &refr.lines),
    }
}

/// ROUGE-L alone for one pair, skipping the n-gram and summary-level work.
pub fn rouge_l_pair(hypothesis: &str, reference: &str, opts: &RougeOptions) -> Prf {
    let (hyp_lower, ref_lower) = (hypothesis.to_lowercase(), reference.to_lowercase());
    let mut vocab = FastMap::default();
    let hyp = encode(&hyp_lower, opts, &mut vocab);
    let refr = encode(&ref_lower, opts, &mut vocab);
    rouge_l(&hyp.all, &refr.all)
}

/// Scores against several references, keeping for each type the reference with the
/// highest F (the first on ties), as rouge-score 0.1.2 `score_multi` does. No
/// references give all zeros.
pub fn rouge_multi(hypothesis: &str, references: &[&str], opts: &RougeOptions) -> RougeScores {
    let mut best: Option<RougeScores> = None;
    for reference in references {
        let s = rouge(hypothesis, reference, opts);
        best = Some(match best {
            None => s,
            Some(b) => RougeScores {
                rouge1: if s.rouge1.f > b.rouge1.f {
                    s.rouge1
                } else {
                    b.rouge1
                },
                rouge2: if s.rouge2.f > b.rouge2.f {
                    s.rouge2
                } else {
                    b.rouge2
                },
                rouge_l: if s.rouge_l.f > b.rouge_l.f {
                    s.rouge_l
                } else {
                    b.rouge_l
                },
                rouge_lsum: if s.rouge_lsum.f > b.rouge_lsum.f {
                    s.rouge_lsum
                } else {
                    b.rouge_lsum
                },
            },
        });
    }
    best.unwrap_or_default()
}

/// ROUGE-N (Lin 2004): clipped n-gram matches over hypothesis and reference counts;
/// an empty side divides by 1, as rouge-score does, so it scores 0.
pub fn rouge_n(hyp: &[u32], refr: &[u32], n: usize) -> Prf {
    let (h, r) = (count_ngrams(hyp, n), count_ngrams(refr, n));
    let matches: u32 = r
        .iter()
        .map(|(g, &c)| c.min(h.get(g).copied().unwrap_or(0)))
        .sum();
    let h_total: u32 = h.values().sum();
    let r_total: u32 = r.values().sum();
    Prf::new(
        matches as f64 / h_total.max(1) as f64,
        matches as f64 / r_total.max(1) as f64,
    )
}

fn count_ngrams(toks: &[u32], n: usize) -> FastMap<&[u32], u32> {
    let mut map = FastMap::default();
    if n > 0 && toks.len() >= n {
        for gram in toks.windows(n) {
            *map.entry(gram).or_insert(0) += 1;
        }
    }
    map
}

/// Length of the longest common subsequence, one DP row at a time (the textbook
/// table, kept as the plain reference the bit-parallel version is tested against).
#[cfg(test)]
pub(crate) fn lcs_len<T: PartialEq>(a: &[T], b: &[T]) -> usize {
    let mut row = vec![0usize; b.len() + 1];
    for x in a {
        let mut diag = 0;
        for (j, y) in b.iter().enumerate() {
            let up = row[j + 1];
            row[j + 1] = if x == y { diag + 1 } else { up.max(row[j]) };
            diag = up;
        }
    }
    row[b.len()]
}

/// ROUGE-L (Lin 2004): P = LCS/|hyp|, R = LCS/|ref|; 0 if either side is empty.
pub fn rouge_l(hyp: &[u32], refr: &[u32]) -> Prf {
    if hyp.is_empty() || refr.is_empty() {
        return Prf::default();
    }
    let lcs = lcs_bit_parallel(refr, hyp) as f64;
    Prf::new(lcs / hyp.len() as f64, lcs / refr.len() as f64)
}

/// Indices into `refr` of one LCS with `can`, read back from the full table with
/// rouge-score's tie-break (move left only when strictly better), since the union
/// in ROUGE-Lsum depends on which LCS is picked.
fn lcs_indices(refr: &[u32], can: &[u32]) -> Vec<usize> {
    let cols = can.len() + 1;
    let mut t = vec![0u32; (refr.len() + 1) * cols];
    for i in 1..=refr.len() {
        for j in 1..=can.len() {
            t[i * cols + j] = if refr[i - 1] == can[j - 1] {
                t[(i - 1) * cols + j - 1] + 1
            } else {
                t[(i - 1) * cols + j].max(t[i * cols + j - 1])
            };
        }
    }
    let (mut i, mut j, mut out) = (refr.len(), can.len(), Vec::new());
    while i > 0 && j > 0 {
        if refr[i - 1] == can[j - 1] {
            out.push(i - 1);
            i -= 1;
            j -= 1;
        } else if t[i * cols + j - 1] > t[(i - 1) * cols + j] {
            j -= 1;
        } else {
            i -= 1;
        }
    }
    out
}

/// ROUGE-Lsum (Lin 2004, section 3.2): for each reference line, the union of its
/// LCS with every hypothesis line; each token counts at most as often as it occurs
/// on both sides (the double-counting guard of ROUGE 1.5.5 kept by rouge-score).
pub fn rouge_lsum(hyp_lines: &[Vec<u32>], ref_lines: &[Vec<u32>]) -> Prf {
    let m: usize = ref_lines.iter().map(Vec::len).sum();
    let n: usize = hyp_lines.iter().map(Vec::len).sum();
    if m == 0 || n == 0 {
        return Prf::default();
    }
    let mut left_r: FastMap<u32, usize> = FastMap::default();
    let mut left_h: FastMap<u32, usize> = FastMap::default();
    ref_lines
        .iter()
        .flatten()
        .for_each(|&t| *left_r.entry(t).or_insert(0) += 1);
    hyp_lines
        .iter()
        .flatten()
        .for_each(|&t| *left_h.entry(t).or_insert(0) += 1);
    let mut hits = 0usize;
    for r in ref_lines {
        let mut union: Vec<usize> = hyp_lines.iter().flat_map(|c| lcs_indices(r, c)).collect();
        union.sort_unstable();
        union.dedup();
        for tok in union.into_iter().map(|i| r[i]) {
            let (cr, ch) = (
                left_r.entry(tok).or_insert(0),
                left_h.entry(tok).or_insert(0),
            );
            if *cr > 0 && *ch > 0 {
                hits += 1;
                *cr -= 1;
                *ch -= 1;
            }
        }
    }
    Prf::new(hits as f64 / n as f64, hits as f64 / m as f64)
}

#[cfg(test)]
#[path = "rouge_tests.rs"]
mod tests;
