//! Overlap stage, exact match and token F1 for short factual answers.
//!
//! Input: a predicted answer and one or more gold answers. Output: exact match (0
//! or 1) and token F1 (0..=1), each the maximum over the gold answers. Must never
//! do I/O or panic; empty answers follow the rule of the v2.0 evaluation script.
//!
//! From Rajpurkar, Zhang, Lopyrev & Liang (2016), "100,000+ Questions for
//! Machine Comprehension of Text", EMNLP, and the authors' v2.0 evaluation script
//! (Rajpurkar, Jia & Liang 2018).

use super::fasthash::FastMap;

use super::tokenize::py_split;

/// Normalises an answer: lowercase, drop ASCII punctuation, drop the articles
/// a/an/the as whole words, collapse whitespace (Rajpurkar et al. 2016).
pub fn normalize_answer(text: &str) -> String {
    let lower = text.to_lowercase();
    // Python's `string.punctuation`: ASCII only, so curly quotes or "¿" survive.
    let no_punct: String = lower
        .chars()
        .filter(|c| !c.is_ascii_punctuation())
        .collect();
    // `\b(a|an|the)\b` replaced by a space: an article only counts as a whole run
    // of word characters (letters, digits, underscore), as in a regex word boundary.
    let mut out = String::with_capacity(no_punct.len());
    let mut word = String::new();
    let flush = |word: &mut String, out: &mut String| {
        if matches!(word.as_str(), "a" | "an" | "the") {
            out.push(' ');
        } else {
            out.push_str(word);
        }
        word.clear();
    };
    for c in no_punct.chars() {
        if c.is_alphanumeric() || c == '_' {
            word.push(c);
        } else {
            flush(&mut word, &mut out);
            out.push(c);
        }
    }
    flush(&mut word, &mut out);
    py_split(&out).collect::<Vec<_>>().join(" ")
}

/// Exact match: 1 when the normalised answers are equal, else 0.
pub fn exact_match_one(prediction: &str, gold: &str) -> f64 {
    if normalize_answer(prediction) == normalize_answer(gold) {
        1.0
    } else {
        0.0
    }
}

/// Token F1 on normalised whitespace tokens with multiset overlap; if either side
/// has no tokens, 1 when both are empty and 0 otherwise (v2.0 script rule).
pub fn token_f1_one(prediction: &str, gold: &str) -> f64 {
    let (p_norm, g_norm) = (normalize_answer(prediction), normalize_answer(gold));
    let pred: Vec<&str> = py_split(&p_norm).collect();
    let gold: Vec<&str> = py_split(&g_norm).collect();
    if pred.is_empty() || gold.is_empty() {
        return if pred.is_empty() && gold.is_empty() {
            1.0
        } else {
            0.0
        };
    }
    let mut left: FastMap<&str, usize> = FastMap::default();
    gold.iter().for_each(|t| *left.entry(t).or_insert(0) += 1);
    let mut common = 0usize;
    for t in &pred {
        if let Some(n) = left.get_mut(t).filter(|n| **n > 0) {
            *n -= 1;
            common += 1;
        }
    }
    if common == 0 {
        return 0.0;
    }
    let precision = common as f64 / pred.len() as f64;
    let recall = common as f64 / gold.len() as f64;
    2.0 * precision * recall / (precision + recall)
}

/// Exact match against several gold answers: the best one; 0 with no gold answers.
pub fn exact_match(prediction: &str, golds: &[&str]) -> f64 {
    golds
        .iter()
        .map(|g| exact_match_one(prediction, g))
        .fold(0.0, f64::max)
}

/// Token F1 against several gold answers: the best one; 0 with no gold answers.
pub fn token_f1(prediction: &str, golds: &[&str]) -> f64 {
    golds
        .iter()
        .map(|g| token_f1_one(prediction, g))
        .fold(0.0, f64::max)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Question-answering evaluation script (v2.0, Rajpurkar et al. 2018) values [lib], METHODS.md section 12 table:
    /// (gold, prediction, EM, F1) for six pairs including the empty-answer rule and
    /// the multiset count ("cat cat" vs "cat").
    #[test]
    fn matches_qa_v2_script_table() {
        let rows = [
            ("The Eiffel Tower", "eiffel tower", 1.0, 1.0),
            ("Denver Broncos", "The Denver Broncos!", 1.0, 1.0),
            ("Denver Broncos", "Broncos", 0.0, 0.6666666666666666),
            ("in the late 1990s", "late 1990s and early 2000s", 0.0, 0.5),
            ("a cat", "the the cat cat", 0.0, 0.6666666666666666),
            ("", "", 1.0, 1.0),
        ];
        for (gold, pred, em, f1) in rows {
            assert_eq!(exact_match_one(pred, gold), em, "{gold:?} / {pred:?}");
            assert!(
                (token_f1_one(pred, gold) - f1).abs() <= 1e-12,
                "{gold:?} / {pred:?}"
            );
        }
    }

    /// Rajpurkar et al. (2016) take the maximum over gold answers: "Broncos" scores
    /// 0.6666666666666666 against "Denver Broncos" (METHODS.md) but 1 against "Broncos".
    #[test]
    fn several_gold_answers_take_the_maximum() {
        let golds = ["Denver Broncos", "Broncos"];
        assert_eq!(token_f1("Broncos", &golds), 1.0);
        assert_eq!(exact_match("Broncos", &golds), 1.0);
        assert!((token_f1("Broncos", &golds[..1]) - 0.6666666666666666).abs() <= 1e-12);
        assert_eq!(token_f1("Broncos", &[]), 0.0);
    }

    /// v2.0 script rule: an empty prediction against a non-empty gold scores 0, and
    /// a prediction of only articles and punctuation normalises to empty.
    #[test]
    fn empty_side_scores_zero_unless_both_empty() {
        assert_eq!(token_f1_one("", "Denver"), 0.0);
        assert_eq!(token_f1_one("The!", ""), 1.0);
        assert_eq!(exact_match_one("a, an; the.", ""), 1.0);
    }

    /// Normalisation per the v2.0 script: articles only as whole words ("another",
    /// "theater" keep theirs), ASCII punctuation only, Unicode letters kept.
    #[test]
    fn normalisation_removes_only_whole_articles_and_ascii_punctuation() {
        assert_eq!(
            normalize_answer("The theater, another   Act!"),
            "theater another act"
        );
        assert_eq!(
            normalize_answer("¿Qué tal? «Très» bien"),
            "¿qué tal «très» bien"
        );
        // `_` is in `string.punctuation`, so it is dropped before articles are found.
        assert_eq!(normalize_answer("a_b an"), "ab");
    }

    /// Single-word prediction (Rajpurkar et al. 2016 F1): against "the eiffel tower"
    /// (two tokens once "the" goes) P = 1, R = 1/2, F1 = 2/3; against three tokens
    /// R = 1/3, F1 = 0.5.
    #[test]
    fn single_word_prediction_scores_by_definition() {
        assert!((token_f1_one("tower", "the eiffel tower") - 0.6666666666666666).abs() <= 1e-12);
        assert!((token_f1_one("tower", "eiffel tower paris") - 0.5).abs() <= 1e-12);
    }
}
