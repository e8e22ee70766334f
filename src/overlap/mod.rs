//! Overlap stage: reference-based text metrics as cheap baselines beside the judge.
//!
//! Input: an answer (hypothesis) and one or more reference answers, or whole lists
//! of them for corpus scores. Output: `OverlapScores` per answer and corpus BLEU /
//! chrF. Pure code: must never do I/O, use randomness or panic on any input text.
//!
//! Each metric lives in its own file, with its source and the reference library it
//! reproduces: `rouge` (Lin 2004; rouge-score 0.1.2), `bleu` (Papineni et al. 2002;
//! sacrebleu 2.6.0), `chrf` (Popović 2015/2017; sacrebleu 2.6.0), `edit`
//! (Levenshtein and Indel similarity; rapidfuzz 3.14.6), `qa` (exact match and
//! token F1; Rajpurkar et al. 2016), plus the `tokenize` and `porter` helpers.

mod bleu;
mod chrf;
mod edit;
mod fasthash;
mod porter;
mod qa;
mod rouge;
mod tokenize;

use serde::{Deserialize, Serialize};

pub use bleu::{corpus_bleu, sentence_bleu, tokenize_13a, BleuOptions, BleuScore, Smoothing};
pub use chrf::{chrf_words, corpus_chrf, sentence_chrf, sentence_chrf_and_plus_plus, ChrfOptions};
pub use edit::{indel_distance, indel_similarity, levenshtein_distance, levenshtein_similarity};
pub use porter::{stem, PorterVariant};
pub use qa::{exact_match, normalize_answer, token_f1};
pub use rouge::{rouge, rouge_l_pair, rouge_multi, Prf, RougeOptions, RougeScores};
pub use tokenize::{rouge_tokens, TokenizerMode};

/// Why an overlap score could not be computed.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum OverlapError {
    /// Corpus scoring got a different number of hypotheses and reference lists.
    #[error("`{hyps}` answers but `{refs}` reference lists; give each answer its own list")]
    LengthMismatch {
        /// Number of hypotheses given.
        hyps: usize,
        /// Number of reference lists given.
        refs: usize,
    },
    /// An answer came with an empty list of references.
    #[error("answer `{index}` has no reference text to compare with")]
    NoReferences {
        /// Zero-based position of the answer (0 for single-answer calls).
        index: usize,
    },
}

/// Choices shared by the overlap metrics; the default reproduces the reference
/// libraries named in each field.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
pub struct OverlapOptions {
    /// ROUGE word splitting: `compatible` (rouge-score 0.1.2, ASCII only) or
    /// `unicode` (keeps accented and CJK letters).
    pub tokenizer: TokenizerMode,
    /// Porter-stem ROUGE words longer than 3 characters.
    pub stem: bool,
    /// Lowercase texts before BLEU and chrF (sacrebleu default: case-sensitive).
    pub lowercase: bool,
}

/// All overlap scores of one answer against its references; with several
/// references each score takes its best reference (BLEU pools them instead).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct OverlapScores {
    /// ROUGE-1 F (unigram overlap), 0..=1 (Lin 2004).
    pub rouge1_f: f64,
    /// ROUGE-2 F (bigram overlap), 0..=1 (Lin 2004).
    pub rouge2_f: f64,
    /// ROUGE-L F (longest common subsequence), 0..=1 (Lin 2004).
    pub rougel_f: f64,
    /// ROUGE-Lsum F (summary-level union LCS over lines), 0..=1 (Lin 2004).
    pub rougelsum_f: f64,
    /// Sentence BLEU with exp smoothing and effective order, 0..=100 (Papineni et
    /// al. 2002; sacrebleu 2.6.0 `sentence_bleu` defaults); all references pooled.
    pub bleu: f64,
    /// Sentence chrF, 0..=100 (Popović 2015; sacrebleu 2.6.0 defaults).
    pub chrf: f64,
    /// Sentence chrF++ (chrF plus word 1- and 2-grams), 0..=100 (Popović 2017).
    pub chrfpp: f64,
    /// Normalised Levenshtein similarity 1 - lev/max(len) on characters, 0..=1.
    pub levenshtein_sim: f64,
    /// Normalised Indel (LCS) similarity 1 - indel/(len a + len b), 0..=1; equals
    /// the common "fuzzy ratio" divided by 100.
    pub indel_sim: f64,
    /// Token F1 after answer normalisation, 0..=1 (Rajpurkar et al. 2016).
    pub token_f1: f64,
    /// 1.0 if the normalised answer equals a normalised reference, else 0.0.
    pub exact_match: f64,
}

/// Scores one answer against its references with every overlap metric.
pub fn score_pair(
    hyp: &str,
    refs: &[&str],
    opts: &OverlapOptions,
) -> Result<OverlapScores, OverlapError> {
    if refs.is_empty() {
        return Err(OverlapError::NoReferences { index: 0 });
    }
    let rouge = rouge_multi(
        hyp,
        refs,
        &RougeOptions {
            tokenizer: opts.tokenizer,
            stem: opts.stem,
        },
    );
    let bleu_opts = BleuOptions {
        lowercase: opts.lowercase,
        ..BleuOptions::sentence()
    };
    let (chrf, chrfpp) = sentence_chrf_and_plus_plus(hyp, refs, opts.lowercase)?;
    let best = |f: fn(&str, &str) -> f64| refs.iter().map(|r| f(hyp, r)).fold(0.0, f64::max);
    Ok(OverlapScores {
        rouge1_f: rouge.rouge1.f,
        rouge2_f: rouge.rouge2.f,
        rougel_f: rouge.rouge_l.f,
        rougelsum_f: rouge.rouge_lsum.f,
        bleu: sentence_bleu(hyp, refs, &bleu_opts)?.score,
        chrf,
        chrfpp,
        levenshtein_sim: best(levenshtein_similarity),
        indel_sim: best(indel_similarity),
        token_f1: token_f1(hyp, refs),
        exact_match: exact_match(hyp, refs),
    })
}

/// Corpus-level scores, where n-gram counts are pooled over all answers.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct CorpusOverlap {
    /// Corpus BLEU, 0..=100 (sacrebleu 2.6.0 `corpus_bleu` defaults: exp smoothing,
    /// no effective order).
    pub bleu: f64,
    /// Corpus chrF, 0..=100.
    pub chrf: f64,
    /// Corpus chrF++, 0..=100.
    pub chrfpp: f64,
}

/// Corpus BLEU, chrF and chrF++ of aligned answers and reference lists.
pub fn score_corpus<H: AsRef<str>, S: AsRef<str>, R: AsRef<[S]>>(
    hyps: &[H],
    refs: &[R],
    opts: &OverlapOptions,
) -> Result<CorpusOverlap, OverlapError> {
    let bleu_opts = BleuOptions {
        lowercase: opts.lowercase,
        ..BleuOptions::corpus()
    };
    let chrf_opts = ChrfOptions {
        lowercase: opts.lowercase,
        ..ChrfOptions::chrf()
    };
    let chrfpp_opts = ChrfOptions {
        lowercase: opts.lowercase,
        ..ChrfOptions::chrf_plus_plus()
    };
    Ok(CorpusOverlap {
        bleu: corpus_bleu(hyps, refs, &bleu_opts)?.score,
        chrf: corpus_chrf(hyps, refs, &chrf_opts)?,
        chrfpp: corpus_chrf(hyps, refs, &chrfpp_opts)?,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// METHODS.md section 12 values for the cat pair from three libraries at once:
    /// rouge-score 0.1.2 (R1 0.833333, R2 0.6, RL 0.833333), sacrebleu 2.6.0 (BLEU
    /// 37.99178428257963, chrF 61.9251512899325), rapidfuzz 3.14.6 (Levenshtein
    /// 0.8636363636363636, Indel 0.9302325581395349); token F1 by the Rajpurkar et
    /// al. (2016) formula: "cat is on mat" vs "cat sat on mat" share 3 of 4 tokens.
    #[test]
    fn score_pair_combines_reference_library_values() {
        let s = score_pair(
            "the cat is on the mat",
            &["the cat sat on the mat"],
            &OverlapOptions::default(),
        )
        .expect("one reference");
        assert!((s.rouge1_f - 0.833333).abs() <= 5e-7);
        assert!((s.rouge2_f - 0.6).abs() <= 5e-7);
        assert!((s.rougel_f - 0.833333).abs() <= 5e-7);
        assert_eq!(s.rougelsum_f, s.rougel_f);
        assert!((s.bleu - 37.99178428257963).abs() <= 1e-9);
        assert!((s.chrf - 61.9251512899325).abs() <= 1e-9);
        assert!((s.levenshtein_sim - 0.8636363636363636).abs() <= 1e-12);
        assert!((s.indel_sim - 0.9302325581395349).abs() <= 1e-12);
        assert!((s.token_f1 - 0.75).abs() <= 1e-12);
        assert_eq!(s.exact_match, 0.0);
    }

    /// sacrebleu 2.6.0 [lib], METHODS.md section 12: the corpus entry point gives
    /// corpus BLEU 27.667047992508042, chrF 68.10098561132675 and chrF++
    /// 67.13094250049252 over the four ROUGE-table pairs.
    #[test]
    fn score_corpus_matches_sacrebleu() {
        let hyps = [
            "the cat is on the mat",
            "A quick brown dog jumps over the lazy fox.",
            "police kill the gunman",
            "the gunman kill police",
        ];
        let refs = [
            ["the cat sat on the mat"],
            ["The quick brown fox jumps over the lazy dog."],
            ["police killed the gunman"],
            ["police killed the gunman"],
        ];
        let c = score_corpus(&hyps, &refs, &OverlapOptions::default()).expect("aligned");
        assert!((c.bleu - 27.667047992508042).abs() <= 1e-9);
        assert!((c.chrf - 68.10098561132675).abs() <= 1e-9);
        assert!((c.chrfpp - 67.13094250049252).abs() <= 1e-9);
    }

    /// An answer with no references is an input error, never a panic or a silent 0.
    #[test]
    fn missing_references_are_reported() {
        let err = score_pair("x", &[], &OverlapOptions::default()).expect_err("no refs");
        assert_eq!(err, OverlapError::NoReferences { index: 0 });
        assert_eq!(
            err.to_string(),
            "answer `0` has no reference text to compare with"
        );
    }

    /// Empty answer and reference: every definition's empty case (rouge-score 0,
    /// sacrebleu 0, rapidfuzz 1.0 for two empty strings, v2.0 script F1 = EM = 1).
    #[test]
    fn empty_answer_and_reference_follow_each_metric_rule() {
        let s = score_pair("", &[""], &OverlapOptions::default()).expect("one reference");
        assert_eq!(
            (s.rouge1_f, s.rougel_f, s.bleu, s.chrf),
            (0.0, 0.0, 0.0, 0.0)
        );
        assert_eq!(
            (s.levenshtein_sim, s.indel_sim, s.token_f1, s.exact_match),
            (1.0, 1.0, 1.0, 1.0)
        );
    }

    /// The serialised field names are the report format, so they must stay stable.
    #[test]
    fn scores_serialise_with_documented_field_names() {
        let s = score_pair("a", &["a"], &OverlapOptions::default()).expect("one reference");
        let json = serde_json::to_value(s).expect("plain struct");
        let mut keys: Vec<&str> = json
            .as_object()
            .expect("object")
            .keys()
            .map(String::as_str)
            .collect();
        keys.sort_unstable();
        assert_eq!(
            keys,
            [
                "bleu",
                "chrf",
                "chrfpp",
                "exact_match",
                "indel_sim",
                "levenshtein_sim",
                "rouge1_f",
                "rouge2_f",
                "rougel_f",
                "rougelsum_f",
                "token_f1"
            ]
        );
    }
}
