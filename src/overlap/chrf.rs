//! Overlap stage, chrF and chrF++ (character and word n-gram F-score).
//!
//! Input: hypotheses and, per hypothesis, one or more references. Output: chrF on
//! the 0..=100 scale. Must never do I/O or panic; mismatched corpus sizes and
//! missing references are errors.
//!
//! chrF is from Popović (2015), "chrF: character n-gram F-score for automatic MT
//! evaluation", WMT; chrF++ adds word unigrams and bigrams (Popović 2017, WMT).
//! Averaging and reference choice follow sacrebleu 2.6.0 defaults (effective
//! order, whitespace ignored, the best-scoring reference per segment).

use std::hash::Hash;

use super::fasthash::FastMap;

use super::tokenize::{is_py_space, py_split};
use super::OverlapError;

/// chrF settings.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ChrfOptions {
    /// Highest character n-gram order (6 in sacrebleu and Popović 2015).
    pub char_order: usize,
    /// Highest word n-gram order: 0 for chrF, 2 for chrF++.
    pub word_order: usize,
    /// Recall weight beta of the F-score (2: recall counts twice as much).
    pub beta: u32,
    /// Lowercase hypothesis and references first.
    pub lowercase: bool,
}

impl ChrfOptions {
    /// chrF with sacrebleu 2.6.0 defaults: 6 character orders, beta 2.
    pub fn chrf() -> Self {
        ChrfOptions {
            char_order: 6,
            word_order: 0,
            beta: 2,
            lowercase: false,
        }
    }
    /// chrF++ with sacrebleu 2.6.0 defaults: chrF plus word orders 1 and 2.
    pub fn chrf_plus_plus() -> Self {
        ChrfOptions {
            word_order: 2,
            ..Self::chrf()
        }
    }
}

/// Per order: hypothesis n-grams, reference n-grams, matches.
type Triple = [u64; 3];

fn count<K: Hash + Eq>(items: impl Iterator<Item = K>) -> FastMap<K, u64> {
    let mut m = FastMap::default();
    for k in items {
        *m.entry(k).or_insert(0) += 1;
    }
    m
}

/// Counts of one text: character n-grams per order, then word n-grams per order.
/// A character n-gram (n <= 6) is packed into a u128 key, 21 bits per character,
/// which is cheaper to hash than a string slice.
struct Grams<'a> {
    chars: Vec<FastMap<u128, u64>>,
    words: Vec<FastMap<&'a [&'a str], u64>>,
}

/// Splits words for chrF++ as sacrebleu does after Popović's chrF++.py: one ASCII
/// punctuation character is split off the end of a word, or else off its start.
pub fn chrf_words(text: &str) -> Vec<&str> {
    const PUNCT: &str = "!\"#$%&'()*+,-./:;<=>?@[\\]^_`{|}~";
    let mut out = Vec::new();
    for w in py_split(text) {
        let (first, last) = (w.chars().next(), w.chars().next_back());
        let one_char = w.chars().nth(1).is_none();
        match (first, last) {
            _ if one_char => out.push(w),
            (_, Some(l)) if PUNCT.contains(l) => out.extend([&w[..w.len() - 1], &w[w.len() - 1..]]),
            (Some(f), _) if PUNCT.contains(f) => out.extend([&w[..1], &w[1..]]),
            _ => out.push(w),
        }
    }
    out
}

fn grams<'a>(squeezed: &str, words: &'a [&'a str], opts: &ChrfOptions) -> Grams<'a> {
    let chars: Vec<u32> = squeezed.chars().map(u32::from).collect();
    let chars = (1..=opts.char_order)
        .map(|n| {
            count(chars.windows(n).map(|w| {
                // More than 6 characters would overflow the key; fold the excess
                // back in so any order still counts, at a tiny risk of collision.
                w.iter()
                    .fold(0u128, |key, &c| key.rotate_left(21) ^ u128::from(c))
            }))
        })
        .collect();
    let words = (1..=opts.word_order)
        .map(|n| count(words.windows(n)))
        .collect();
    Grams { chars, words }
}

fn triple<K: Hash + Eq>(hyp: &FastMap<K, u64>, refr: &FastMap<K, u64>) -> Triple {
    let hyp_total: u64 = hyp.values().sum();
    let matches: u64 = hyp
        .iter()
        .map(|(k, &c)| c.min(refr.get(k).copied().unwrap_or(0)))
        .sum();
    // sacrebleu does not count hypothesis n-grams of an order the reference lacks.
    [
        if refr.is_empty() { 0 } else { hyp_total },
        refr.values().sum(),
        matches,
    ]
}

fn stats(hyp: &Grams, refr: &Grams) -> Vec<Triple> {
    let c = hyp.chars.iter().zip(&refr.chars).map(|(h, r)| triple(h, r));
    let w = hyp.words.iter().zip(&refr.words).map(|(h, r)| triple(h, r));
    c.chain(w).collect()
}

/// F-score from pooled counts: precision and recall are averaged over the orders
/// that have both hypothesis and reference n-grams, then combined as
/// (1 + b^2) P R / (b^2 P + R) (Popović 2015), times 100.
fn f_score(stats: &[Triple], beta: u32) -> f64 {
    let factor = f64::from(beta * beta);
    let (mut p, mut r, mut orders) = (0.0, 0.0, 0u32);
    for &[n_hyp, n_ref, n_match] in stats {
        if n_hyp > 0 && n_ref > 0 {
            p += n_match as f64 / n_hyp as f64;
            r += n_match as f64 / n_ref as f64;
            orders += 1;
        }
    }
    if orders > 0 {
        p /= f64::from(orders);
        r /= f64::from(orders);
    }
    if p + r == 0.0 {
        return 0.0;
    }
    100.0 * ((1.0 + factor) * p * r / (factor * p + r))
}

/// Prepared text: lowercased if asked, with whitespace removed for the characters.
struct Prepared {
    squeezed: String,
    text: String,
}

fn prepare(text: &str, lowercase: bool) -> Prepared {
    let text = if lowercase {
        text.to_lowercase()
    } else {
        text.to_string()
    };
    Prepared {
        squeezed: text.chars().filter(|&c| !is_py_space(c)).collect(),
        text,
    }
}

/// Statistics of the reference with the best F for this hypothesis (the first on
/// ties), as sacrebleu 2.6.0 picks it.
fn segment<S: AsRef<str>>(hyp: &str, refs: &[S], opts: &ChrfOptions) -> Vec<Triple> {
    let h = prepare(hyp, opts.lowercase);
    let h_words = if opts.word_order > 0 {
        chrf_words(&h.text)
    } else {
        Vec::new()
    };
    let hg = grams(&h.squeezed, &h_words, opts);
    let mut best: (f64, Vec<Triple>) = (-1.0, Vec::new());
    for r in refs {
        let rp = prepare(r.as_ref(), opts.lowercase);
        let r_words = if opts.word_order > 0 {
            chrf_words(&rp.text)
        } else {
            Vec::new()
        };
        let s = stats(&hg, &grams(&rp.squeezed, &r_words, opts));
        let f = f_score(&s, opts.beta);
        if f > best.0 {
            best = (f, s);
        }
    }
    best.1
}

/// Sentence chrF and chrF++ (sacrebleu 2.6.0 defaults) from one pass over the
/// n-grams: chrF++'s first six orders are exactly chrF's, so only the choice of the
/// best reference is made separately for each. Errors with no references.
pub fn sentence_chrf_and_plus_plus<S: AsRef<str>>(
    hyp: &str,
    refs: &[S],
    lowercase: bool,
) -> Result<(f64, f64), OverlapError> {
    if refs.is_empty() {
        return Err(OverlapError::NoReferences { index: 0 });
    }
    let opts = ChrfOptions {
        lowercase,
        ..ChrfOptions::chrf_plus_plus()
    };
    let h = prepare(hyp, lowercase);
    let h_words = chrf_words(&h.text);
    let hg = grams(&h.squeezed, &h_words, &opts);
    let (mut chrf, mut chrfpp) = (0.0f64, 0.0f64);
    for r in refs {
        let rp = prepare(r.as_ref(), lowercase);
        let r_words = chrf_words(&rp.text);
        let s = stats(&hg, &grams(&rp.squeezed, &r_words, &opts));
        // The best reference's F is the largest F, so a running max suffices.
        chrf = chrf.max(f_score(&s[..opts.char_order], opts.beta));
        chrfpp = chrfpp.max(f_score(&s, opts.beta));
    }
    Ok((chrf, chrfpp))
}

/// Sentence chrF (or chrF++) of one hypothesis against its references, 0..=100.
pub fn sentence_chrf<S: AsRef<str>>(
    hyp: &str,
    refs: &[S],
    opts: &ChrfOptions,
) -> Result<f64, OverlapError> {
    if refs.is_empty() {
        return Err(OverlapError::NoReferences { index: 0 });
    }
    Ok(f_score(&segment(hyp, refs, opts), opts.beta))
}

/// Corpus chrF: n-gram counts pooled over all segments, then one F-score.
pub fn corpus_chrf<H: AsRef<str>, S: AsRef<str>, R: AsRef<[S]>>(
    hyps: &[H],
    refs: &[R],
    opts: &ChrfOptions,
) -> Result<f64, OverlapError> {
    if hyps.len() != refs.len() {
        return Err(OverlapError::LengthMismatch {
            hyps: hyps.len(),
            refs: refs.len(),
        });
    }
    let mut total = vec![[0u64; 3]; opts.char_order + opts.word_order];
    for (index, (h, r)) in hyps.iter().zip(refs).enumerate() {
        if r.as_ref().is_empty() {
            return Err(OverlapError::NoReferences { index });
        }
        for (acc, s) in total.iter_mut().zip(segment(h.as_ref(), r.as_ref(), opts)) {
            for k in 0..3 {
                acc[k] += s[k];
            }
        }
    }
    Ok(f_score(&total, opts.beta))
}

#[cfg(test)]
#[path = "chrf_tests.rs"]
mod tests;
