//! Overlap stage, edit-distance similarities on Unicode characters.
//!
//! Input: two strings, compared as-is (case-sensitive, no preprocessing). Output:
//! similarities in 0..=1, where 1 means identical. Must never do I/O or panic;
//! two empty strings are identical (similarity 1).
//!
//! Two different definitions that are often confused, both named explicitly:
//! Levenshtein (1966) allows substitutions at cost 1; the Indel distance allows only
//! insertions and deletions, so a substitution costs 2 and the distance is
//! |a| + |b| - 2 LCS(a, b). The popular "fuzzy ratio" is 100 x the Indel
//! similarity, not the Levenshtein one (rapidfuzz 3.14.6 definitions).

use std::hash::Hash;

use super::fasthash::FastMap;
#[cfg(test)]
use super::rouge::lcs_len;

/// Normalised Levenshtein similarity 1 - lev(a, b) / max(|a|, |b|), lengths in
/// Unicode scalar values; 1 when both are empty.
///
/// Uses the `strsim` crate, whose `normalized_levenshtein` is exactly this formula
/// (same operation order as rapidfuzz, so values agree to the last bit).
pub fn levenshtein_similarity(a: &str, b: &str) -> f64 {
    strsim::normalized_levenshtein(a, b)
}

/// Levenshtein distance: fewest single-character insertions, deletions and
/// substitutions turning `a` into `b`.
pub fn levenshtein_distance(a: &str, b: &str) -> usize {
    strsim::levenshtein(a, b)
}

/// Indel distance |a| + |b| - 2 LCS(a, b): insertions and deletions only.
///
/// Written here because `strsim` has no Indel/LCS distance.
pub fn indel_distance(a: &str, b: &str) -> usize {
    let (ca, cb): (Vec<char>, Vec<char>) = (a.chars().collect(), b.chars().collect());
    ca.len() + cb.len() - 2 * lcs_bit_parallel(&ca, &cb)
}

/// LCS length with the bit-parallel recurrence of Allison & Dix (1986) in the form
/// of Hyyrö (2004): V' = (V + (V & M)) | (V & !M) over 64-character blocks, where M
/// marks the positions of the current character of `b` in `a`; the LCS is the
/// number of zero bits left in V. About 64 times fewer steps than the table;
/// ROUGE-L uses it on token ids, the Indel distance on characters.
pub(crate) fn lcs_bit_parallel<T: Copy + Eq + Hash>(a: &[T], b: &[T]) -> usize {
    if a.is_empty() || b.is_empty() {
        return 0;
    }
    let blocks = a.len().div_ceil(64);
    // One flat mask table, `blocks` words per distinct symbol of `a`.
    let mut slot_of: FastMap<T, usize> = FastMap::default();
    let mut masks: Vec<u64> = Vec::new();
    for (i, &c) in a.iter().enumerate() {
        let next = slot_of.len();
        let slot = *slot_of.entry(c).or_insert(next);
        if slot == next {
            masks.resize((next + 1) * blocks, 0);
        }
        masks[slot * blocks + i / 64] |= 1 << (i % 64);
    }
    let none = vec![0u64; blocks];
    let mut v = vec![u64::MAX; blocks];
    for c in b {
        let m = match slot_of.get(c) {
            Some(&slot) => &masks[slot * blocks..(slot + 1) * blocks],
            None => &none[..],
        };
        let mut carry = false;
        for (vk, &mk) in v.iter_mut().zip(m) {
            let u = *vk & mk;
            let (sum, c1) = vk.overflowing_add(u);
            let (sum, c2) = sum.overflowing_add(u64::from(carry));
            carry = c1 || c2;
            *vk = sum | (*vk & !mk);
        }
    }
    let tail = a.len() % 64;
    v.iter()
        .enumerate()
        .map(|(k, &vk)| {
            let valid = if k + 1 == blocks && tail != 0 {
                (1u64 << tail) - 1
            } else {
                u64::MAX
            };
            (!vk & valid).count_ones() as usize
        })
        .sum()
}

/// Normalised Indel similarity 1 - indel(a, b) / (|a| + |b|) = 2 LCS / (|a| + |b|);
/// 1 when both are empty.
pub fn indel_similarity(a: &str, b: &str) -> f64 {
    let total = a.chars().count() + b.chars().count();
    if total == 0 {
        return 1.0;
    }
    1.0 - indel_distance(a, b) as f64 / total as f64
}

#[cfg(test)]
mod tests {
    use super::*;

    fn near(got: f64, want: f64) -> bool {
        (got - want).abs() <= 1e-12
    }

    /// rapidfuzz 3.14.6 [lib], METHODS.md section 12 table: distances and normalised
    /// similarities for Levenshtein and Indel, and fuzz.ratio = 100 x Indel.
    #[test]
    fn distances_and_similarities_match_rapidfuzz_table() {
        let rows = [
            (
                "kitten",
                "sitting",
                3,
                0.5714285714285714,
                5,
                0.6153846153846154,
                61.53846153846154,
            ),
            ("flaw", "lawn", 2, 0.5, 2, 0.75, 75.0),
            (
                "the cat sat on the mat",
                "the cat is on the mat",
                3,
                0.8636363636363636,
                3,
                0.9302325581395349,
                93.02325581395348,
            ),
            ("", "", 0, 1.0, 0, 1.0, 100.0),
            ("abc", "", 3, 0.0, 3, 0.0, 0.0),
        ];
        for (a, b, lev, lev_sim, indel, indel_sim, ratio) in rows {
            assert_eq!(levenshtein_distance(a, b), lev, "{a:?} {b:?}");
            assert!(near(levenshtein_similarity(a, b), lev_sim), "{a:?} {b:?}");
            assert_eq!(indel_distance(a, b), indel, "{a:?} {b:?}");
            assert!(near(indel_similarity(a, b), indel_sim), "{a:?} {b:?}");
            assert!(
                (100.0 * indel_similarity(a, b) - ratio).abs() <= 1e-12 * 100.0,
                "{a:?} {b:?}"
            );
        }
    }

    /// rapidfuzz 3.14.6 [lib], METHODS.md section 12: no preprocessing by default, so
    /// fuzz.ratio("Kitten", "kitten") = 83.33333333333334.
    #[test]
    fn comparison_is_case_sensitive_like_rapidfuzz() {
        assert!(
            (100.0 * indel_similarity("Kitten", "kitten") - 83.33333333333334).abs()
                <= 1e-12 * 100.0
        );
    }

    /// The bit-parallel LCS (Hyyrö 2004) equals the textbook table on strings longer
    /// than one 64-bit block, with repeats and multi-byte characters.
    #[test]
    fn bit_parallel_lcs_agrees_with_dynamic_programme() {
        let a: Vec<char> = "the seedlings sprout after the last frost; water gently, élan 北京 "
            .repeat(3)
            .chars()
            .collect();
        let b: Vec<char> = "seedlings want warm soil and gentle water, not frost 北 élan"
            .repeat(2)
            .chars()
            .collect();
        for (x, y) in [(&a, &b), (&b, &a), (&a, &a)] {
            assert_eq!(lcs_bit_parallel(x, y), lcs_len(x, y));
        }
        assert_eq!(lcs_bit_parallel(&a[..64], &b), lcs_len(&a[..64], &b));
    }

    /// Lengths are counted in Unicode characters, not bytes: "café" vs "cafe" is one
    /// substitution in four characters (Levenshtein 1966 definition).
    #[test]
    fn lengths_count_unicode_characters() {
        assert_eq!(levenshtein_distance("café", "cafe"), 1);
        assert!(near(levenshtein_similarity("café", "cafe"), 0.75));
        assert_eq!(indel_distance("café", "cafe"), 2);
        assert!(near(indel_similarity("北京", "北"), 2.0 / 3.0));
    }
}
