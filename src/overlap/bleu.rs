//! Overlap stage, BLEU with the 13a tokeniser, sentence and corpus level.
//!
//! Input: hypotheses and, per hypothesis, one or more references. Output: BLEU on the
//! 0..=100 scale with its n-gram precisions and brevity penalty. Must never do I/O
//! or panic; mismatched corpus sizes and missing references are errors.
//!
//! BLEU is from Papineni, Roukos, Ward & Zhu (2002), "BLEU: a Method for Automatic
//! Evaluation of Machine Translation", ACL. Defaults, smoothing and effective order
//! follow sacrebleu 2.6.0 (Post 2018) so scores are comparable with published ones.

use serde::Serialize;

use super::fasthash::FastMap;
use super::tokenize::py_split;
use super::OverlapError;

/// Highest n-gram order (Papineni et al. 2002 use 1..=4).
const MAX_ORDER: usize = 4;

/// What to do with an n-gram order that has no match.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Smoothing {
    /// No smoothing: one empty order makes BLEU 0.
    None,
    /// NIST "exp" smoothing (Chen & Cherry 2014, method 3): the k-th empty order
    /// gets precision 1 / (2^k * total); sacrebleu's default.
    #[default]
    Exp,
}

/// BLEU settings.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct BleuOptions {
    /// Lowercase hypothesis and references before tokenising.
    pub lowercase: bool,
    /// Smoothing of empty n-gram orders.
    pub smoothing: Smoothing,
    /// Average only over orders the hypothesis has n-grams for, so short texts are
    /// not zeroed; sacrebleu turns this on for sentence BLEU and off for corpus BLEU.
    pub effective_order: bool,
}

impl BleuOptions {
    /// sacrebleu 2.6.0 `sentence_bleu` defaults: mixed case, exp, effective order.
    pub fn sentence() -> Self {
        BleuOptions {
            lowercase: false,
            smoothing: Smoothing::Exp,
            effective_order: true,
        }
    }
    /// sacrebleu 2.6.0 `corpus_bleu` defaults: mixed case, exp, no effective order.
    pub fn corpus() -> Self {
        BleuOptions {
            lowercase: false,
            smoothing: Smoothing::Exp,
            effective_order: false,
        }
    }
}

/// A BLEU score with the statistics behind it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BleuScore {
    /// BLEU on the 0..=100 scale.
    pub score: f64,
    /// Matched (clipped) n-grams per order 1..=4.
    pub counts: [u64; MAX_ORDER],
    /// Hypothesis n-grams per order 1..=4.
    pub totals: [u64; MAX_ORDER],
    /// Per-order precisions in percent, after smoothing.
    pub precisions: [f64; MAX_ORDER],
    /// Brevity penalty exp(1 - r/c) when c < r, else 1.
    pub brevity_penalty: f64,
    /// Total hypothesis length in tokens (c).
    pub hyp_len: u64,
    /// Total closest-reference length in tokens (r).
    pub ref_len: u64,
}

/// The mteval-v13a tokeniser as sacrebleu 2.6.0 implements it: unescape four HTML
/// entities, split off ASCII punctuation and symbols, split periods and commas
/// except inside numbers, and split a dash that follows a digit.
pub fn tokenize_13a(line: &str) -> String {
    let mut s = line.to_string();
    // Each replacement only when needed: most answers contain none of these.
    if s.contains("<skipped>") {
        s = s.replace("<skipped>", "");
    }
    if s.contains('\n') {
        s = s.replace("-\n", "").replace('\n', " ");
    }
    if s.contains('&') {
        s = s
            .replace("&quot;", "\"")
            .replace("&amp;", "&")
            .replace("&lt;", "<")
            .replace("&gt;", ">");
    }
    let mut spaced = Vec::with_capacity(s.len() * 2 + 2);
    spaced.push(b' ');
    for &b in s.as_bytes() {
        // Space, !"#$%&, ()*+, /, :;<=>?@, [\]^_`, {|}~ : every ASCII symbol except
        // the apostrophe, dash, period and comma, which have rules of their own.
        if matches!(b, b' '..=b'&' | b'('..=b'+' | b'/' | b':'..=b'@' | b'['..=b'`' | b'{'..=b'~') {
            spaced.extend_from_slice(&[b' ', b, b' ']);
        } else {
            spaced.push(b);
        }
    }
    spaced.push(b' ');
    // The next three passes mirror non-overlapping left-to-right regex substitution
    // of a two-character pattern. Working on bytes is safe: every pattern character
    // is ASCII and a UTF-8 continuation byte is never a digit, period or comma.
    let is_digit = |b: u8| b.is_ascii_digit();
    let is_pc = |b: u8| b == b'.' || b == b',';
    let a = sub_pairs(
        &spaced,
        |x, y| !is_digit(x) && is_pc(y),
        |x, y, out| out.extend_from_slice(&[x, b' ', y, b' ']),
    );
    let b = sub_pairs(
        &a,
        |x, y| is_pc(x) && !is_digit(y),
        |x, y, out| out.extend_from_slice(&[b' ', x, b' ', y]),
    );
    let c = sub_pairs(
        &b,
        |x, y| is_digit(x) && y == b'-',
        |x, y, out| out.extend_from_slice(&[x, b' ', y, b' ']),
    );
    let text =
        String::from_utf8(c).expect("only ASCII bytes were inserted between whole UTF-8 sequences");
    py_split(&text).collect::<Vec<_>>().join(" ")
}

fn sub_pairs(
    input: &[u8],
    hit: impl Fn(u8, u8) -> bool,
    emit: impl Fn(u8, u8, &mut Vec<u8>),
) -> Vec<u8> {
    let mut out = Vec::with_capacity(input.len() + 16);
    let mut i = 0;
    while i < input.len() {
        if i + 1 < input.len() && hit(input[i], input[i + 1]) {
            emit(input[i], input[i + 1], &mut out);
            i += 2;
        } else {
            out.push(input[i]);
            i += 1;
        }
    }
    out
}

/// An n-gram of up to four token ids; unused slots hold `u32::MAX`.
type Gram = [u32; MAX_ORDER];

/// Sufficient statistics of one segment: lengths and per-order counts.
#[derive(Debug, Clone, Copy, Default)]
struct Stats {
    hyp_len: u64,
    ref_len: u64,
    correct: [u64; MAX_ORDER],
    total: [u64; MAX_ORDER],
}

fn preprocess(text: &str, lowercase: bool) -> String {
    // sacrebleu strips trailing whitespace before tokenising.
    let trimmed = text.trim_end_matches(super::tokenize::is_py_space);
    if lowercase {
        tokenize_13a(&trimmed.to_lowercase())
    } else {
        tokenize_13a(trimmed)
    }
}

fn grams<'a>(text: &'a str, vocab: &mut FastMap<&'a str, u32>) -> (FastMap<Gram, u64>, u64) {
    let ids: Vec<u32> = text
        .split(' ')
        .filter(|t| !t.is_empty())
        .map(|t| {
            let next = vocab.len() as u32;
            *vocab.entry(t).or_insert(next)
        })
        .collect();
    let mut map = FastMap::default();
    map.reserve(ids.len() * MAX_ORDER);
    for n in 1..=MAX_ORDER.min(ids.len()) {
        for w in ids.windows(n) {
            let mut g = [u32::MAX; MAX_ORDER];
            g[..n].copy_from_slice(w);
            *map.entry(g).or_insert(0) += 1;
        }
    }
    (map, ids.len() as u64)
}

fn segment_stats<S: AsRef<str>>(hyp: &str, refs: &[S], opts: &BleuOptions) -> Stats {
    let ref_texts: Vec<String> = refs
        .iter()
        .map(|r| preprocess(r.as_ref(), opts.lowercase))
        .collect();
    let hyp_text = preprocess(hyp, opts.lowercase);
    let mut vocab = FastMap::default();
    let mut ref_max: FastMap<Gram, u64> = FastMap::default();
    let mut ref_lens = Vec::with_capacity(refs.len());
    for text in &ref_texts {
        let (g, len) = grams(text, &mut vocab);
        ref_lens.push(len);
        // Multiple references: clip each n-gram by its largest count in any one.
        for (k, c) in g {
            let e = ref_max.entry(k).or_insert(0);
            *e = (*e).max(c);
        }
    }
    let (hyp_grams, hyp_len) = grams(&hyp_text, &mut vocab);
    // Closest reference length; ties go to the shorter reference.
    let ref_len = ref_lens
        .iter()
        .copied()
        .min_by_key(|&r| (r.abs_diff(hyp_len), r))
        .unwrap_or(0);
    let mut s = Stats {
        hyp_len,
        ref_len,
        ..Stats::default()
    };
    for (g, c) in hyp_grams {
        let n = g.iter().take_while(|&&id| id != u32::MAX).count() - 1;
        s.total[n] += c;
        s.correct[n] += c.min(ref_max.get(&g).copied().unwrap_or(0));
    }
    s
}

/// Log as sacrebleu takes it: log 0 becomes -9999999999 so BLEU underflows to 0.
fn floored_log(x: f64) -> f64 {
    if x == 0.0 {
        -9_999_999_999.0
    } else {
        x.ln()
    }
}

fn finish(s: Stats, opts: &BleuOptions) -> BleuScore {
    let bp = if s.hyp_len < s.ref_len {
        if s.hyp_len > 0 {
            (1.0 - s.ref_len as f64 / s.hyp_len as f64).exp()
        } else {
            0.0
        }
    } else {
        1.0
    };
    let mut precisions = [0.0; MAX_ORDER];
    let mut out = BleuScore {
        score: 0.0,
        counts: s.correct,
        totals: s.total,
        precisions,
        brevity_penalty: bp,
        hyp_len: s.hyp_len,
        ref_len: s.ref_len,
    };
    if s.correct.iter().all(|&c| c == 0) {
        return out;
    }
    let mut smooth = 1.0;
    let mut order = MAX_ORDER;
    for (n, precision) in precisions.iter_mut().enumerate() {
        let (correct, total) = (s.correct[n], s.total[n]);
        if total == 0 {
            break;
        }
        if opts.effective_order {
            order = n + 1;
        }
        if correct == 0 {
            if opts.smoothing == Smoothing::Exp {
                smooth *= 2.0;
                *precision = 100.0 / (smooth * total as f64);
            }
        } else {
            *precision = 100.0 * correct as f64 / total as f64;
        }
    }
    // Geometric mean of the precisions (Papineni et al. 2002, uniform weights),
    // summed left to right as sacrebleu does so the last digits agree.
    let log_sum = precisions[..order]
        .iter()
        .fold(0.0, |acc, &p| acc + floored_log(p));
    out.score = bp * (log_sum / order as f64).exp();
    out.precisions = precisions;
    out
}

/// Sentence BLEU of one hypothesis against its references.
pub fn sentence_bleu<S: AsRef<str>>(
    hyp: &str,
    refs: &[S],
    opts: &BleuOptions,
) -> Result<BleuScore, OverlapError> {
    if refs.is_empty() {
        return Err(OverlapError::NoReferences { index: 0 });
    }
    Ok(finish(segment_stats(hyp, refs, opts), opts))
}

/// Corpus BLEU: n-gram counts and lengths are pooled over all segments before the
/// precisions are taken (Papineni et al. 2002), not averaged per sentence.
pub fn corpus_bleu<H: AsRef<str>, S: AsRef<str>, R: AsRef<[S]>>(
    hyps: &[H],
    refs: &[R],
    opts: &BleuOptions,
) -> Result<BleuScore, OverlapError> {
    if hyps.len() != refs.len() {
        return Err(OverlapError::LengthMismatch {
            hyps: hyps.len(),
            refs: refs.len(),
        });
    }
    let mut total = Stats::default();
    for (index, (h, r)) in hyps.iter().zip(refs).enumerate() {
        if r.as_ref().is_empty() {
            return Err(OverlapError::NoReferences { index });
        }
        let s = segment_stats(h.as_ref(), r.as_ref(), opts);
        total.hyp_len += s.hyp_len;
        total.ref_len += s.ref_len;
        for n in 0..MAX_ORDER {
            total.correct[n] += s.correct[n];
            total.total[n] += s.total[n];
        }
    }
    Ok(finish(total, opts))
}

#[cfg(test)]
#[path = "bleu_tests.rs"]
mod tests;
