//! Overlap stage, word tokenisers for ROUGE and the question-answering scores.
//!
//! Input: raw answer or reference text. Output: lists of lowercase word tokens.
//! Must never touch files or panic on odd text: every string, including an empty
//! one or one with no letters at all, yields a (possibly empty) token list.

use std::borrow::Cow;

use serde::{Deserialize, Serialize};

use super::porter::{stem, PorterVariant};

/// How ROUGE splits text into words.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum TokenizerMode {
    /// Lowercase, then every run of characters outside `[a-z0-9]` separates words.
    ///
    /// This is the rule of the widely used rouge-score 0.1.2 package, so scores match
    /// it exactly; the price is that every non-ASCII letter is dropped, so `café`
    /// becomes `caf` and Greek, Cyrillic or CJK text becomes no tokens at all.
    #[default]
    Compatible,
    /// Lowercase, then every run of characters that are not Unicode letters or digits
    /// separates words.
    ///
    /// Accented, Greek, Cyrillic and CJK letters are kept. It differs from
    /// `Compatible` only on text with non-ASCII letters or digits. Two limits: scripts
    /// written without spaces (Chinese, Japanese, Thai) are not segmented, so a whole
    /// run of such characters is one token; and combining accents of the Combining
    /// Diacritical Marks block (U+0300..U+036F) are kept inside words so that
    /// decomposed (NFD) text is not cut at every accent.
    Unicode,
}

/// Python's `str.split()` whitespace: Unicode White_Space plus the ASCII
/// information separators U+001C..U+001F, which Python also treats as spaces.
pub(crate) fn is_py_space(c: char) -> bool {
    c.is_whitespace() || ('\u{1c}'..='\u{1f}').contains(&c)
}

/// Splits on Python-style whitespace, dropping empty pieces (Python `str.split()`).
pub(crate) fn py_split(text: &str) -> impl Iterator<Item = &str> {
    text.split(is_py_space).filter(|piece| !piece.is_empty())
}

/// Tokenises one text for ROUGE; with `use_stem`, words longer than 3 characters
/// are Porter-stemmed (rouge-score 0.1.2 leaves shorter words alone).
pub fn rouge_tokens(text: &str, mode: TokenizerMode, use_stem: bool) -> Vec<String> {
    rouge_words(&text.to_lowercase(), mode, use_stem)
        .map(Cow::into_owned)
        .collect()
}

/// The ROUGE tokens of already lowercased text, borrowed from it unless stemmed,
/// so scoring allocates no string per token.
pub(crate) fn rouge_words(
    lower: &str,
    mode: TokenizerMode,
    use_stem: bool,
) -> impl Iterator<Item = Cow<'_, str>> {
    let keep: fn(char) -> bool = match mode {
        TokenizerMode::Compatible => |c| c.is_ascii_lowercase() || c.is_ascii_digit(),
        TokenizerMode::Unicode => |c| c.is_alphanumeric() || ('\u{300}'..='\u{36f}').contains(&c),
    };
    lower
        .split(move |c: char| !keep(c))
        .filter(|word| !word.is_empty())
        .map(move |word| {
            // The stemmer knows English suffixes only, so in Unicode mode a word with
            // any non-ASCII letter is left as it is rather than cut wrongly.
            if use_stem && word.len() > 3 && word.bytes().all(|b| b.is_ascii_alphanumeric()) {
                Cow::Owned(stem(word, PorterVariant::NltkDefault))
            } else {
                Cow::Borrowed(word)
            }
        })
}

/// Splits a text into sentences for ROUGE-Lsum: one sentence per line, empty
/// lines dropped (rouge-score 0.1.2 without its optional sentence splitter).
pub fn summary_sentences(text: &str) -> impl Iterator<Item = &str> {
    text.split('\n').filter(|line| !line.is_empty())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// rouge-score 0.1.2 tokeniser rule as described in METHODS.md section 12 [lib]:
    /// lowercase and replace `[^a-z0-9]+` with a space.
    #[test]
    fn compatible_mode_lowercases_and_splits_on_non_ascii_alphanumerics() {
        let tokens = rouge_tokens(
            "The quick-brown fox's 2nd jump!",
            TokenizerMode::Compatible,
            false,
        );
        assert_eq!(tokens, ["the", "quick", "brown", "fox", "s", "2nd", "jump"]);
    }

    /// METHODS.md section 12 [lib]: rouge-score drops all non-ASCII letters, so
    /// accented letters split words and CJK text vanishes.
    #[test]
    fn compatible_mode_drops_accents_and_cjk() {
        let tokens = rouge_tokens("Café naïve 北京", TokenizerMode::Compatible, false);
        assert_eq!(tokens, ["caf", "na", "ve"]);
    }

    /// Unicode mode keeps accented and CJK letters (the documented difference from
    /// rouge-score 0.1.2, METHODS.md section 12).
    #[test]
    fn unicode_mode_keeps_accents_and_cjk() {
        let tokens = rouge_tokens("Café naïve 北京!", TokenizerMode::Unicode, false);
        assert_eq!(tokens, ["café", "naïve", "北京"]);
        // Decomposed "é" (e + U+0301) stays one word.
        let nfd = rouge_tokens("cafe\u{301} au lait", TokenizerMode::Unicode, false);
        assert_eq!(nfd, ["cafe\u{301}", "au", "lait"]);
    }

    /// rouge-score 0.1.2 stems only tokens longer than 3 characters (METHODS.md
    /// section 12 [lib]); "kills" has 5, "was" has 3 and is left as is.
    #[test]
    fn stemming_skips_words_of_three_characters_or_fewer() {
        let tokens = rouge_tokens("Police killed was dies", TokenizerMode::Compatible, true);
        assert_eq!(tokens, ["polic", "kill", "was", "die"]);
    }

    /// Unicode mode does not feed non-ASCII words to the English stemmer.
    #[test]
    fn unicode_mode_leaves_non_ascii_words_unstemmed() {
        let tokens = rouge_tokens("réactions reactions", TokenizerMode::Unicode, true);
        assert_eq!(tokens, ["réactions", "reaction"]);
    }

    /// Empty and punctuation-only text gives no tokens in both modes.
    #[test]
    fn empty_and_punctuation_only_text_give_no_tokens() {
        for mode in [TokenizerMode::Compatible, TokenizerMode::Unicode] {
            assert!(rouge_tokens("", mode, true).is_empty());
            assert!(rouge_tokens(" ?! -- ", mode, false).is_empty());
        }
    }

    /// Python `str.split()` also splits on U+001C..U+001F and drops empty pieces.
    #[test]
    fn python_split_matches_python_whitespace_rules() {
        let pieces: Vec<&str> = py_split(" a\u{1f}b\u{3000}c\n\n").collect();
        assert_eq!(pieces, ["a", "b", "c"]);
    }

    /// rouge-score 0.1.2 splits summaries on "\n" and drops empty lines.
    #[test]
    fn summary_sentences_split_on_newlines_and_drop_empty_lines() {
        let sents: Vec<&str> = summary_sentences("one two\n\nthree\n").collect();
        assert_eq!(sents, ["one two", "three"]);
    }
}
