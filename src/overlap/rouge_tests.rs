//! Tests for the ROUGE scores: reference values from METHODS.md section 12
//! (rouge-score 0.1.2, printed to 6 decimals) plus edge cases. No I/O.

use super::*;

/// rouge-score prints 6 decimals, so compare at half a unit of the last place.
fn close6(got: f64, want: f64) -> bool {
    (got - want).abs() <= 5e-7
}

fn opts(stem: bool) -> RougeOptions {
    RougeOptions {
        tokenizer: TokenizerMode::Compatible,
        stem,
    }
}

/// Checks R1/R2/RL F (and that P = R = F, as METHODS notes for these equal-length
/// pairs) against a METHODS.md section 12 row.
fn check_row(reference: &str, hypothesis: &str, stem: bool, want: [f64; 3]) {
    let s = rouge(hypothesis, reference, &opts(stem));
    for (got, want) in [
        (s.rouge1, want[0]),
        (s.rouge2, want[1]),
        (s.rouge_l, want[2]),
    ] {
        assert!(
            close6(got.f, want),
            "{hypothesis:?} stem={stem}: {got:?} vs {want}"
        );
        assert!(
            close6(got.precision, want) && close6(got.recall, want),
            "{got:?}"
        );
    }
    assert_eq!(s.rouge_lsum, s.rouge_l, "single-line text: Lsum equals L");
}

/// rouge-score 0.1.2 [lib], METHODS.md section 12 row 1 (either stemming setting):
/// R1 0.833333, R2 0.6, RL 0.833333.
#[test]
fn cat_pair_matches_rouge_score() {
    for stem in [false, true] {
        check_row(
            "the cat sat on the mat",
            "the cat is on the mat",
            stem,
            [0.833333, 0.6, 0.833333],
        );
    }
}

/// rouge-score 0.1.2 [lib], METHODS.md section 12 row 2 (either stemming setting):
/// R1 0.888889, R2 0.5, RL 0.666667.
#[test]
fn fox_pair_matches_rouge_score() {
    for stem in [false, true] {
        check_row(
            "The quick brown fox jumps over the lazy dog.",
            "A quick brown dog jumps over the lazy fox.",
            stem,
            [0.888889, 0.5, 0.666667],
        );
    }
}

/// rouge-score 0.1.2 [lib], METHODS.md section 12 rows 3-4: "killed" vs "kill" is a
/// miss without stemming (0.75 / 0.333333 / 0.75) and a match with it (1 / 1 / 1).
#[test]
fn stemming_turns_killed_into_a_match_as_rouge_score_does() {
    let (r, h) = ("police killed the gunman", "police kill the gunman");
    check_row(r, h, false, [0.75, 0.333333, 0.75]);
    check_row(r, h, true, [1.0, 1.0, 1.0]);
}

/// rouge-score 0.1.2 [lib], METHODS.md section 12 rows 5-6, Lin's (2004) S1/S3
/// illustration: word order lowers ROUGE-L to 0.5 whether or not words are stemmed.
#[test]
fn reordered_sentence_matches_rouge_score_and_lin_2004() {
    let (r, h) = ("police killed the gunman", "the gunman kill police");
    check_row(r, h, false, [0.75, 0.333333, 0.5]);
    check_row(r, h, true, [1.0, 0.333333, 0.5]);
    assert!(
        close6(rouge_l_pair(h, r, &opts(false)).f, 0.5),
        "ROUGE-L-only path agrees"
    );
}

/// Lin (2004) section 3.2 worked example of summary-level LCS (recalled from
/// memory, not in METHODS.md; the numbers also follow by hand): reference sentence
/// w1 w2 w3 w4 w5, candidate sentences w1 w2 w6 w7 w8 and w1 w3 w8 w9 w5; the union
/// LCS is w1 w2 w3 w5, so 4 hits: R = 4/5, P = 4/10.
#[test]
fn lsum_union_lcs_matches_lin_2004_example() {
    let s = rouge(
        "w1 w2 w6 w7 w8\nw1 w3 w8 w9 w5",
        "w1 w2 w3 w4 w5",
        &opts(false),
    );
    assert_eq!(s.rouge_lsum.recall, 4.0 / 5.0);
    assert_eq!(s.rouge_lsum.precision, 4.0 / 10.0);
    // Plain ROUGE-L sees one sequence: LCS(w1 w2 w3 w4 w5, all ten) = w1 w2 w3 w5.
    assert_eq!(s.rouge_l.recall, 4.0 / 5.0);
}

/// Empty hypothesis or reference scores 0 everywhere (rouge-score returns 0 for
/// empty token lists).
#[test]
fn empty_texts_score_zero() {
    for (h, r) in [
        ("", "the cat"),
        ("the cat", ""),
        ("", ""),
        ("?!", "the cat"),
    ] {
        let s = rouge(h, r, &opts(false));
        assert_eq!(s, RougeScores::default(), "{h:?} vs {r:?}");
    }
}

/// Single-word hypothesis: one unigram match in a 6-token reference gives
/// P = 1, R = 1/6, F = 2/7; no bigrams, so ROUGE-2 is 0 (Lin 2004 definitions).
#[test]
fn single_word_hypothesis_scores_by_definition() {
    let s = rouge("cat", "the cat sat on the mat", &opts(false));
    assert_eq!(s.rouge1.precision, 1.0);
    assert!((s.rouge1.f - 2.0 / 7.0).abs() < 1e-15);
    assert_eq!(s.rouge2, Prf::default());
    assert_eq!(s.rouge_l, s.rouge1);
}

/// METHODS.md section 12 [lib]: rouge-score drops non-ASCII letters, so two
/// different accented words can tie; Unicode mode tells them apart.
#[test]
fn compatible_mode_conflates_accented_words_unicode_mode_does_not() {
    let compat = rouge("né", "nü", &opts(false));
    assert_eq!(compat.rouge1.f, 1.0, "both become `n`");
    let uni = RougeOptions {
        tokenizer: TokenizerMode::Unicode,
        stem: false,
    };
    assert_eq!(rouge("né", "nü", &uni).rouge1.f, 0.0);
    assert_eq!(rouge("北京 欢迎你", "北京 欢迎你", &uni).rouge_l.f, 1.0);
    assert_eq!(
        rouge("北京 欢迎你", "北京 欢迎你", &opts(false)).rouge_l.f,
        0.0
    );
}

/// rouge-score 0.1.2 `score_multi` keeps the reference with the highest F per type:
/// here the exact reference (F = 1) beats the METHODS cat-row reference.
#[test]
fn multiple_references_keep_the_best_f() {
    let s = rouge_multi(
        "the cat is on the mat",
        &["the cat sat on the mat", "the cat is on the mat"],
        &opts(false),
    );
    assert_eq!(s.rouge1.f, 1.0);
    let one = rouge_multi(
        "the cat is on the mat",
        &["the cat sat on the mat"],
        &opts(false),
    );
    assert!(close6(one.rouge2.f, 0.6));
    assert_eq!(rouge_multi("x", &[], &opts(false)), RougeScores::default());
}

/// The rolling-row LCS agrees with the full table used for Lsum back-tracking.
#[test]
fn lcs_length_agrees_with_back_tracked_lcs() {
    let a = [1, 2, 3, 2, 4, 1, 2];
    let b = [2, 4, 3, 1, 2, 1];
    assert_eq!(lcs_len(&a, &b), lcs_indices(&a, &b).len());
    assert_eq!(lcs_len(&a, &b), 4);
}
