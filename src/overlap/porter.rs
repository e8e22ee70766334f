//! Overlap stage, Porter stemmer for ROUGE's optional stemming.
//!
//! Input: one lowercase word. Output: its stem. Must never panic: any string is
//! accepted; words with non-ASCII characters are returned unchanged.
//!
//! Written here rather than taken from a crate: the maintained stemming crates
//! implement Snowball "Porter2", a later revision with different rules (for -ly
//! endings and a list of exceptions among others), and reproducing rouge-score 0.1.2 needs the original
//! algorithm of Porter (1980), "An algorithm for suffix stripping", Program
//! 14(3):130-137, with the small set of changes that NLTK's `PorterStemmer` applies
//! by default (rouge-score calls it with default settings). Both variants are here.

/// Which form of the Porter algorithm to run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PorterVariant {
    /// Exactly the rules of Porter (1980).
    Original,
    /// Porter (1980) with the changes NLTK 3.x makes in its default mode: a few
    /// irregular words (`dying` -> `die`), words of one or two letters left alone,
    /// `ies`/`ied` on four-letter words -> `ie`, `y` -> `i` only after a consonant
    /// that is not the first letter, `bli` -> `ble`, extra `fulli`/`logi` rules and a
    /// two-letter `*o` condition. This is what rouge-score 0.1.2 uses.
    NltkDefault,
}

/// Stems one word with the chosen Porter variant.
pub fn stem(word: &str, variant: PorterVariant) -> String {
    let nltk = variant == PorterVariant::NltkDefault;
    if nltk {
        if let Some(irregular) = irregular_form(word) {
            return irregular.to_string();
        }
        if word.chars().count() <= 2 {
            return word.to_string();
        }
    }
    if !word.is_ascii() {
        // The rules are defined on the 26 letters; leave anything else untouched.
        return word.to_string();
    }
    let mut w = word.as_bytes().to_vec();
    step1a(&mut w, nltk);
    step1b(&mut w, nltk);
    step1c(&mut w, nltk);
    step2(&mut w, nltk);
    step3(&mut w);
    step4(&mut w);
    step5(&mut w, nltk);
    String::from_utf8(w).expect("only ASCII bytes are ever written")
}

/// NLTK's short list of irregular forms, checked before any rule.
fn irregular_form(word: &str) -> Option<&'static str> {
    Some(match word {
        "sky" | "skies" => "sky",
        "dying" => "die",
        "lying" => "lie",
        "tying" => "tie",
        "news" => "news",
        "inning" | "innings" => "inning",
        "outing" | "outings" => "outing",
        "canning" | "cannings" => "canning",
        "howe" => "howe",
        "proceed" => "proceed",
        "exceed" => "exceed",
        "succeed" => "succeed",
        _ => return None,
    })
}

/// Porter's consonant: not a, e, i, o, u, and not a `y` that follows a consonant.
fn is_consonant(w: &[u8], i: usize) -> bool {
    match w[i] {
        b'a' | b'e' | b'i' | b'o' | b'u' => false,
        b'y' => i == 0 || !is_consonant(w, i - 1),
        _ => true,
    }
}

/// Porter's measure m: the number of vowel-consonant sequences in [C](VC)^m[V].
fn measure(w: &[u8]) -> usize {
    (1..w.len())
        .filter(|&i| is_consonant(w, i) && !is_consonant(w, i - 1))
        .count()
}

/// Condition *v*: the stem contains a vowel.
fn has_vowel(w: &[u8]) -> bool {
    (0..w.len()).any(|i| !is_consonant(w, i))
}

/// Condition *d: the stem ends with a double consonant.
fn ends_double_consonant(w: &[u8]) -> bool {
    let n = w.len();
    n >= 2 && w[n - 1] == w[n - 2] && is_consonant(w, n - 1)
}

/// Condition *o: the stem ends consonant-vowel-consonant, the last not w, x or y.
fn ends_cvc(w: &[u8], nltk: bool) -> bool {
    let n = w.len();
    let classic = n >= 3
        && is_consonant(w, n - 3)
        && !is_consonant(w, n - 2)
        && is_consonant(w, n - 1)
        && !matches!(w[n - 1], b'w' | b'x' | b'y');
    classic || (nltk && n == 2 && !is_consonant(w, 0) && is_consonant(w, 1))
}

/// A suffix rule's condition on the stem left after removing the suffix.
#[derive(Clone, Copy)]
enum Cond {
    Always,
    MeasureAbove0,
    MeasureAbove1,
    /// Step 4's ION rule: m > 1 and the stem ends in s or t.
    MeasureAbove1EndsST,
    /// NLTK's LOGI rule tests the measure of the stem plus the letter `l`.
    MeasureAbove0WithL,
}

fn holds(cond: Cond, stem: &[u8]) -> bool {
    match cond {
        Cond::Always => true,
        Cond::MeasureAbove0 => measure(stem) > 0,
        Cond::MeasureAbove1 => measure(stem) > 1,
        Cond::MeasureAbove1EndsST => {
            measure(stem) > 1 && matches!(stem.last(), Some(b's') | Some(b't'))
        }
        Cond::MeasureAbove0WithL => {
            let mut with_l = stem.to_vec();
            with_l.push(b'l');
            measure(&with_l) > 0
        }
    }
}

/// Applies the first rule whose suffix matches; if its condition fails the word is
/// left unchanged and no later rule is tried (Porter 1980, "longest match" lists).
/// Returns whether a suffix matched at all.
fn apply_first(w: &mut Vec<u8>, rules: &[(&str, &str, Cond)]) -> bool {
    for &(suffix, replacement, cond) in rules {
        if w.ends_with(suffix.as_bytes()) {
            let stem_len = w.len() - suffix.len();
            if holds(cond, &w[..stem_len]) {
                w.truncate(stem_len);
                w.extend_from_slice(replacement.as_bytes());
            }
            return true;
        }
    }
    false
}

/// Step 1a: plurals (SSES -> SS, IES -> I, SS -> SS, S -> ).
fn step1a(w: &mut Vec<u8>, nltk: bool) {
    if nltk && w.len() == 4 && w.ends_with(b"ies") {
        w.truncate(1);
        w.extend_from_slice(b"ie");
        return;
    }
    apply_first(
        w,
        &[
            ("sses", "ss", Cond::Always),
            ("ies", "i", Cond::Always),
            ("ss", "ss", Cond::Always),
            ("s", "", Cond::Always),
        ],
    );
}

/// Step 1b: past tense and gerunds (EED, ED, ING) and the tidy-up after them.
fn step1b(w: &mut Vec<u8>, nltk: bool) {
    if nltk && w.ends_with(b"ied") {
        let keep_e = w.len() == 4;
        w.truncate(w.len() - 3);
        w.extend_from_slice(if keep_e { b"ie" } else { b"i" });
        return;
    }
    if w.ends_with(b"eed") {
        if measure(&w[..w.len() - 3]) > 0 {
            w.pop();
        }
        return;
    }
    let cut = if w.ends_with(b"ed") && has_vowel(&w[..w.len() - 2]) {
        2
    } else if w.ends_with(b"ing") && has_vowel(&w[..w.len() - 3]) {
        3
    } else {
        return;
    };
    w.truncate(w.len() - cut);
    if w.ends_with(b"at") || w.ends_with(b"bl") || w.ends_with(b"iz") {
        w.push(b'e');
    } else if ends_double_consonant(w) {
        if !matches!(w.last(), Some(b'l') | Some(b's') | Some(b'z')) {
            w.pop();
        }
    } else if measure(w) == 1 && ends_cvc(w, nltk) {
        w.push(b'e');
    }
}

/// Step 1c: Y -> I; the original requires a vowel in the stem, NLTK a consonant
/// just before the `y` that is not the first letter.
fn step1c(w: &mut [u8], nltk: bool) {
    if w.last() != Some(&b'y') {
        return;
    }
    let stem = &w[..w.len() - 1];
    let ok = if nltk {
        stem.len() > 1 && is_consonant(stem, stem.len() - 1)
    } else {
        has_vowel(stem)
    };
    if ok {
        let last = w.len() - 1;
        w[last] = b'i';
    }
}

/// Step 2: double suffixes to single ones, each when m > 0.
fn step2(w: &mut Vec<u8>, nltk: bool) {
    use Cond::MeasureAbove0 as M0;
    if nltk && w.ends_with(b"alli") && measure(&w[..w.len() - 4]) > 0 {
        w.truncate(w.len() - 2);
        return step2(w, nltk);
    }
    let bli = if nltk {
        ("bli", "ble", M0)
    } else {
        ("abli", "able", M0)
    };
    let rules = [
        ("ational", "ate", M0),
        ("tional", "tion", M0),
        ("enci", "ence", M0),
        ("anci", "ance", M0),
        ("izer", "ize", M0),
        bli,
        ("alli", "al", M0),
        ("entli", "ent", M0),
        ("eli", "e", M0),
        ("ousli", "ous", M0),
        ("ization", "ize", M0),
        ("ation", "ate", M0),
        ("ator", "ate", M0),
        ("alism", "al", M0),
        ("iveness", "ive", M0),
        ("fulness", "ful", M0),
        ("ousness", "ous", M0),
        ("aliti", "al", M0),
        ("iviti", "ive", M0),
        ("biliti", "ble", M0),
    ];
    if apply_first(w, &rules) || !nltk {
        return;
    }
    apply_first(
        w,
        &[
            ("fulli", "ful", M0),
            ("logi", "log", Cond::MeasureAbove0WithL),
        ],
    );
}

/// Step 3: -ic-, -full, -ness and similar endings, each when m > 0.
fn step3(w: &mut Vec<u8>) {
    use Cond::MeasureAbove0 as M0;
    apply_first(
        w,
        &[
            ("icate", "ic", M0),
            ("ative", "", M0),
            ("alize", "al", M0),
            ("iciti", "ic", M0),
            ("ical", "ic", M0),
            ("ful", "", M0),
            ("ness", "", M0),
        ],
    );
}

/// Step 4: remove the remaining suffixes when m > 1.
fn step4(w: &mut Vec<u8>) {
    use Cond::MeasureAbove1 as M1;
    apply_first(
        w,
        &[
            ("al", "", M1),
            ("ance", "", M1),
            ("ence", "", M1),
            ("er", "", M1),
            ("ic", "", M1),
            ("able", "", M1),
            ("ible", "", M1),
            ("ant", "", M1),
            ("ement", "", M1),
            ("ment", "", M1),
            ("ent", "", M1),
            ("ion", "", Cond::MeasureAbove1EndsST),
            ("ou", "", M1),
            ("ism", "", M1),
            ("ate", "", M1),
            ("iti", "", M1),
            ("ous", "", M1),
            ("ive", "", M1),
            ("ize", "", M1),
        ],
    );
}

/// Step 5: drop a final E (m > 1, or m = 1 and not *o) and a final double L (m > 1).
fn step5(w: &mut Vec<u8>, nltk: bool) {
    if w.last() == Some(&b'e') {
        let stem = &w[..w.len() - 1];
        let m = measure(stem);
        if m > 1 || (m == 1 && !ends_cvc(stem, nltk)) {
            w.pop();
        }
    }
    if w.ends_with(b"ll") && measure(&w[..w.len() - 1]) > 1 {
        w.pop();
    }
}

#[cfg(test)]
#[path = "porter_tests.rs"]
mod tests;
