//! Tests for chrF and chrF++: reference values from METHODS.md section 12
//! (sacrebleu 2.6.0, printed with full repr) plus edge cases. No I/O.

use super::*;

/// (hypothesis, reference) pairs in the order of the METHODS.md ROUGE table.
const PAIRS: [(&str, &str); 4] = [
    ("the cat is on the mat", "the cat sat on the mat"),
    (
        "A quick brown dog jumps over the lazy fox.",
        "The quick brown fox jumps over the lazy dog.",
    ),
    ("police kill the gunman", "police killed the gunman"),
    ("the gunman kill police", "police killed the gunman"),
];

fn assert_near(got: f64, want: f64) {
    assert!((got - want).abs() <= 1e-9, "got {got}, want {want}");
}

/// sacrebleu 2.6.0 [lib], METHODS.md section 12: sentence chrF 61.9251512899325,
/// 69.27500324114034, 76.24037649780017, 62.4670603683175 for the four pairs.
#[test]
fn sentence_chrf_matches_sacrebleu() {
    let want = [
        61.9251512899325,
        69.27500324114034,
        76.24037649780017,
        62.4670603683175,
    ];
    for ((h, r), w) in PAIRS.iter().zip(want) {
        assert_near(
            sentence_chrf(h, &[r], &ChrfOptions::chrf()).expect("ref"),
            w,
        );
    }
}

/// sacrebleu 2.6.0 [lib], METHODS.md section 12 sentence chrF values again, from
/// the one-pass chrF + chrF++ entry point; its chrF++ agrees with the general path.
#[test]
fn one_pass_chrf_and_plus_plus_agree_with_separate_calls() {
    let want = [
        61.9251512899325,
        69.27500324114034,
        76.24037649780017,
        62.4670603683175,
    ];
    for ((h, r), w) in PAIRS.iter().zip(want) {
        let (c, cpp) =
            sentence_chrf_and_plus_plus(h, &[r, "an unrelated line"], false).expect("refs");
        assert_near(c, w);
        let separate = sentence_chrf(h, &[r, "an unrelated line"], &ChrfOptions::chrf_plus_plus())
            .expect("refs");
        assert_eq!(cpp, separate);
    }
}

/// sacrebleu 2.6.0 [lib], METHODS.md section 12: corpus chrF over the four pairs
/// is 68.10098561132675 and corpus chrF++ is 67.13094250049252.
#[test]
fn corpus_chrf_and_chrf_plus_plus_match_sacrebleu() {
    let hyps: Vec<&str> = PAIRS.iter().map(|p| p.0).collect();
    let refs: Vec<Vec<&str>> = PAIRS.iter().map(|p| vec![p.1]).collect();
    assert_near(
        corpus_chrf(&hyps, &refs, &ChrfOptions::chrf()).expect("aligned"),
        68.10098561132675,
    );
    assert_near(
        corpus_chrf(&hyps, &refs, &ChrfOptions::chrf_plus_plus()).expect("aligned"),
        67.13094250049252,
    );
}

/// Popović (2015) definition: identical texts have P = R = 1 at every order, so
/// chrF is 100; whitespace is ignored, so spacing alone changes nothing.
#[test]
fn identical_text_scores_one_hundred_and_ignores_spacing() {
    let s = sentence_chrf("the cat sat", &["the cat sat"], &ChrfOptions::chrf()).expect("ref");
    assert_near(s, 100.0);
    let spaced = sentence_chrf("thecat  sat", &["the cat sat"], &ChrfOptions::chrf()).expect("ref");
    assert_near(spaced, 100.0);
}

/// sacrebleu 2.6.0 picks the reference with the best F per segment: adding the
/// exact text as a second reference lifts the cat pair to 100.
#[test]
fn multiple_references_use_the_best_one() {
    let (h, r) = PAIRS[0];
    let s = sentence_chrf(h, &[r, h], &ChrfOptions::chrf()).expect("refs");
    assert_near(s, 100.0);
}

/// Empty hypothesis or reference: no order has n-grams on both sides, so the
/// score is 0 (sacrebleu 2.6.0 effective-order rule); no references is an error.
#[test]
fn empty_texts_score_zero_and_missing_references_are_errors() {
    assert_eq!(
        sentence_chrf("", &["the cat"], &ChrfOptions::chrf()).expect("ref"),
        0.0
    );
    assert_eq!(
        sentence_chrf("the cat", &[""], &ChrfOptions::chrf_plus_plus()).expect("ref"),
        0.0
    );
    let none: [&str; 0] = [];
    assert!(sentence_chrf("x", &none, &ChrfOptions::chrf()).is_err());
    let refs = [vec!["a"]];
    assert!(matches!(
        corpus_chrf(&["a", "b"], &refs, &ChrfOptions::chrf()),
        Err(OverlapError::LengthMismatch { .. })
    ));
}

/// Characters are Unicode code points: "café" vs "cafe" shares 3 of 4 unigrams,
/// and lowercasing makes "Café" match "café" exactly.
#[test]
fn accented_characters_are_kept_and_lowercase_option_applies() {
    let s = sentence_chrf("café", &["cafe"], &ChrfOptions::chrf()).expect("ref");
    assert!(s > 0.0 && s < 100.0, "{s}");
    let lc = ChrfOptions {
        lowercase: true,
        ..ChrfOptions::chrf()
    };
    assert_near(sentence_chrf("Café", &["café"], &lc).expect("ref"), 100.0);
}

/// Single-word hypothesis "cat" vs "the cat sat": every hypothesis n-gram matches
/// (P = 1 at orders 1-3), recall averages 3/9, 2/8, 1/7 (Popović 2015 formula).
#[test]
fn single_word_hypothesis_follows_the_formula() {
    let p = 1.0;
    let r = (3.0 / 9.0 + 2.0 / 8.0 + 1.0 / 7.0) / 3.0;
    let want = 100.0 * (5.0 * p * r / (4.0 * p + r));
    assert_near(
        sentence_chrf("cat", &["the cat sat"], &ChrfOptions::chrf()).expect("ref"),
        want,
    );
}

/// chrF++ word splitting as in Popović's chrF++.py (kept by sacrebleu 2.6.0): one
/// trailing, else one leading, punctuation mark is split off.
#[test]
fn chrf_plus_plus_words_split_one_punctuation_mark() {
    assert_eq!(
        chrf_words("fox. (hi) \"x ! a"),
        ["fox", ".", "(hi", ")", "\"", "x", "!", "a"]
    );
}
