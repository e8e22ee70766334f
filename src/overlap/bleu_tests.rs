//! Tests for BLEU and the 13a tokeniser: reference values from METHODS.md
//! section 12 (sacrebleu 2.6.0, printed with full repr) plus edge cases. No I/O.

use super::*;

const CAT: (&str, &str) = ("the cat is on the mat", "the cat sat on the mat");
const FOX: (&str, &str) = (
    "A quick brown dog jumps over the lazy fox.",
    "The quick brown fox jumps over the lazy dog.",
);
const KILL: (&str, &str) = ("police kill the gunman", "police killed the gunman");
const GUNMAN: (&str, &str) = ("the gunman kill police", "police killed the gunman");

fn sent(hyp: &str, r: &str) -> f64 {
    sentence_bleu(hyp, &[r], &BleuOptions::sentence())
        .expect("one reference")
        .score
}

fn assert_near(got: f64, want: f64, tol: f64) {
    assert!((got - want).abs() <= tol, "got {got}, want {want}");
}

/// sacrebleu 2.6.0 [lib] `sentence_bleu` defaults (exp smoothing, effective order),
/// METHODS.md section 12: 37.99178428257963, 34.57207846419411, and
/// 35.35533905932737 for both police/gunman hypotheses.
#[test]
fn sentence_bleu_matches_sacrebleu_defaults() {
    assert_near(sent(CAT.0, CAT.1), 37.99178428257963, 1e-9);
    assert_near(sent(FOX.0, FOX.1), 34.57207846419411, 1e-9);
    assert_near(sent(KILL.0, KILL.1), 35.35533905932737, 1e-9);
    assert_near(sent(GUNMAN.0, GUNMAN.1), 35.35533905932737, 1e-9);
}

/// sacrebleu 2.6.0 [lib], METHODS.md section 12: the cat pair shows precisions
/// 83.3/60.0/25.0/16.7; the police pair's 75.0/33.3/25.0/25.0 include exp
/// smoothing of the empty 3- and 4-gram orders: 100/(2*2) and 100/(4*1).
#[test]
fn sentence_bleu_precisions_match_sacrebleu_display() {
    let cat = sentence_bleu(CAT.0, &[CAT.1], &BleuOptions::sentence()).expect("ref");
    let shown: Vec<String> = cat.precisions.iter().map(|p| format!("{p:.1}")).collect();
    assert_eq!(shown, ["83.3", "60.0", "25.0", "16.7"]);
    let kill = sentence_bleu(KILL.0, &[KILL.1], &BleuOptions::sentence()).expect("ref");
    let shown: Vec<String> = kill.precisions.iter().map(|p| format!("{p:.1}")).collect();
    assert_eq!(shown, ["75.0", "33.3", "25.0", "25.0"]);
}

/// sacrebleu 2.6.0 [lib], METHODS.md section 12: corpus BLEU over the four pairs
/// is 27.667047992508042 with 83.3/45.0/18.8/8.3, BP 1.000 and lengths 24/24.
#[test]
fn corpus_bleu_matches_sacrebleu_over_four_pairs() {
    let pairs = [CAT, FOX, KILL, GUNMAN];
    let hyps: Vec<&str> = pairs.iter().map(|p| p.0).collect();
    let refs: Vec<[&str; 1]> = pairs.iter().map(|p| [p.1]).collect();
    let s = corpus_bleu(&hyps, &refs, &BleuOptions::corpus()).expect("aligned");
    assert_near(s.score, 27.667047992508042, 1e-9);
    let shown: Vec<String> = s.precisions.iter().map(|p| format!("{p:.1}")).collect();
    assert_eq!(shown, ["83.3", "45.0", "18.8", "8.3"]);
    assert_eq!((s.brevity_penalty, s.hyp_len, s.ref_len), (1.0, 24, 24));
}

/// sacrebleu 2.6.0 [lib], METHODS.md section 12: "the cat" against the 6-token cat
/// reference is BP e^-2 = 13.533528323661276 with effective order (orders 3 and 4
/// skipped) and 0.0 without it.
#[test]
fn two_word_hypothesis_uses_effective_order() {
    assert_near(sent("the cat", CAT.1), 13.533528323661276, 1e-9);
    let no_eff = BleuOptions {
        effective_order: false,
        ..BleuOptions::sentence()
    };
    assert_eq!(
        sentence_bleu("the cat", &[CAT.1], &no_eff)
            .expect("ref")
            .score,
        0.0
    );
}

/// sacrebleu 2.6.0 [lib], METHODS.md section 12: corpus BLEU of the cat hypothesis
/// against two references is 39.76 (printed to 2 d.p.), precisions
/// 100.0/60.0/25.0/16.7: every unigram is found in one reference or the other.
#[test]
fn multiple_references_clip_by_the_best_reference() {
    let refs = [["the cat sat on the mat", "there is a cat on the mat"]];
    let s = corpus_bleu(&[CAT.0], &refs, &BleuOptions::corpus()).expect("aligned");
    assert_near(s.score, 39.76, 0.005);
    let shown: Vec<String> = s.precisions.iter().map(|p| format!("{p:.1}")).collect();
    assert_eq!(shown, ["100.0", "60.0", "25.0", "16.7"]);
}

/// sacrebleu 2.6.0 [lib], METHODS.md section 12: case and a detached final period
/// give 61.47881529512643; with lowercase=True the pair is identical after 13a
/// tokenisation, 100.00000000000004 (the float noise of exp(ln 100)).
#[test]
fn lowercase_option_and_13a_period_split_match_sacrebleu() {
    let (h, r) = ("The Cat sat on the mat.", "the cat sat on the mat .");
    assert_near(sent(h, r), 61.47881529512643, 1e-9);
    let lc = BleuOptions {
        lowercase: true,
        ..BleuOptions::sentence()
    };
    assert_near(
        sentence_bleu(h, &[r], &lc).expect("ref").score,
        100.00000000000004,
        1e-9,
    );
}

/// sacrebleu 2.6.0 [lib], METHODS.md section 12: identical hypothesis and reference
/// give 100.00000000000004 at corpus level.
#[test]
fn identical_corpus_scores_one_hundred() {
    let s = corpus_bleu(&[FOX.1], &[[FOX.1]], &BleuOptions::corpus()).expect("aligned");
    assert_near(s.score, 100.00000000000004, 1e-9);
}

/// mteval-v13a rules as implemented in sacrebleu 2.6.0 `Tokenizer13a`: symbols split
/// off, periods and commas kept inside numbers, dash split after a digit, apostrophe
/// and hyphen between letters kept, HTML entities unescaped.
#[test]
fn tokenizer_13a_follows_mteval_rules() {
    assert_eq!(
        tokenize_13a("Hello, world! It's 3.14, ok."),
        "Hello , world ! It's 3.14 , ok ."
    );
    assert_eq!(
        tokenize_13a("1,000 well-known 2-3 a/b (x)"),
        "1,000 well-known 2 - 3 a / b ( x )"
    );
    assert_eq!(
        tokenize_13a("&quot;A&amp;B&quot; &lt;tag&gt;"),
        "\" A & B \" < tag >"
    );
    assert_eq!(tokenize_13a("café, naïve."), "café , naïve .");
    assert_eq!(tokenize_13a("line-\nbreak\nnext"), "linebreak next");
    assert_eq!(tokenize_13a(""), "");
}

/// Empty hypothesis: no n-grams, BP 0, score 0 (sacrebleu returns 0 when nothing
/// matches); an empty reference list is an error, not a panic.
#[test]
fn empty_inputs_score_zero_or_error() {
    assert_eq!(sent("", CAT.1), 0.0);
    assert_eq!(sent(CAT.0, ""), 0.0);
    let none: [&str; 0] = [];
    assert!(sentence_bleu(CAT.0, &none, &BleuOptions::sentence()).is_err());
    let err = corpus_bleu(&[CAT.0, FOX.0], &[[CAT.1]], &BleuOptions::corpus());
    assert!(matches!(
        err,
        Err(OverlapError::LengthMismatch { hyps: 2, refs: 1 })
    ));
}

/// A single-word hypothesis that occurs in the reference: p1 = 100 and effective
/// order 1, so BLEU is the brevity penalty exp(1 - 6/1) (Papineni et al. 2002).
#[test]
fn single_word_hypothesis_scores_brevity_penalty_only() {
    assert_near(sent("cat", CAT.1), 100.0 * (1.0f64 - 6.0).exp(), 1e-12);
}

/// Closest reference length, ties to the shorter one (sacrebleu 2.6.0 rule): a
/// 2-token hypothesis with references of 1 and 3 tokens takes r = 1, so BP = 1.
#[test]
fn closest_reference_length_breaks_ties_towards_shorter() {
    let s = sentence_bleu("a b", &["a", "a b c"], &BleuOptions::sentence()).expect("refs");
    assert_eq!((s.ref_len, s.brevity_penalty), (1, 1.0));
}
