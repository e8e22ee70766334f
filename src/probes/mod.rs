//! Probes stage: what pairwise verdicts reveal about the judge and the systems.
//! Input: `PairRecord`s (every pair judged in both orders), answers, optional human
//! preferences and labels. Output: position-bias, self-preference and length reports,
//! the judge's slot prior and a Bradley-Terry ranking. Never runs the model and never reads files.

pub mod injection;
pub mod length;
pub mod ranking;
pub mod selfpref;
pub mod slot_prior;

use std::collections::BTreeMap;

use serde::Serialize;

use crate::judge::PairRecord;
use crate::stats::pairwise::{debias_pair, IdentityProbs, JudgedPair, SlotProbs, Winner};
use crate::stats::StatsError;

/// Probability margin under which two outcomes count as equal (a tie).
const EQUAL: f64 = 1e-9;

/// One pair of answers (A, B) judged in both orders, by identity.
#[derive(Debug, Clone, Serialize)]
pub struct PairOutcome {
    /// Question id.
    pub question_id: String,
    /// Criterion key, or `overall`.
    pub criterion: String,
    /// System A (shown first in the original order).
    pub a: String,
    /// System B.
    pub b: String,
    /// Slot probabilities with A shown first.
    pub original: SlotProbs,
    /// Slot probabilities with B shown first.
    pub swapped: SlotProbs,
    /// Identity verdict with A first.
    pub original_winner: Winner,
    /// Identity verdict with B first.
    pub swapped_winner: Winner,
    /// Probabilities averaged over both orders (balanced position calibration, Wang et al. 2023).
    pub debiased: IdentityProbs,
    /// Winner of the debiased probabilities.
    pub debiased_winner: Winner,
    /// Winner only if both orders agree, else tie (Zheng et al. 2023).
    pub conservative_winner: Winner,
    /// Winner under the verdict rule the ranking uses: the debiased winner unless
    /// [`set_verdicts`] applied another rule.
    pub verdict: Winner,
}

impl PairOutcome {
    /// The stats-stage view of this pair.
    pub fn judged(&self) -> JudgedPair {
        JudgedPair {
            original: self.original_winner,
            swapped: self.swapped_winner,
            original_probs: Some(self.original),
            swapped_probs: Some(self.swapped),
        }
    }

    /// Debiased outcome for A: 1 win, 0.5 tie, 0 loss.
    pub fn a_score(&self) -> f64 {
        match self.debiased_winner {
            Winner::A => 1.0,
            Winner::Tie => 0.5,
            Winner::B => 0.0,
        }
    }
}

/// Identity verdict of one order: the largest of (first, second, tie); equal first
/// and second count as a tie.
pub(crate) fn slot_winner(p: SlotProbs, a_first: bool) -> Winner {
    if p.tie + EQUAL >= p.first.max(p.second) || (p.first - p.second).abs() <= EQUAL {
        return Winner::Tie;
    }
    let first_wins = p.first > p.second;
    match (first_wins, a_first) {
        (true, true) | (false, false) => Winner::A,
        _ => Winner::B,
    }
}

fn identity_winner(p: IdentityProbs) -> Winner {
    if p.tie + EQUAL >= p.a.max(p.b) || (p.a - p.b).abs() <= EQUAL {
        Winner::Tie
    } else if p.a > p.b {
        Winner::A
    } else {
        Winner::B
    }
}

/// Join the two orders of every pair. A pair whose second order is missing (the run
/// was interrupted between them) is left out until the run is resumed.
pub fn pair_outcomes(records: &[PairRecord]) -> Result<Vec<PairOutcome>, StatsError> {
    /// Criterion, question and the two systems in sorted order.
    type PairKey = (String, String, String, String);
    let mut by_key: BTreeMap<PairKey, (&PairRecord, Option<&PairRecord>)> = BTreeMap::new();
    for r in records {
        let (lo, hi) = if r.first <= r.second {
            (&r.first, &r.second)
        } else {
            (&r.second, &r.first)
        };
        let key = (
            r.question_id.clone(),
            r.criterion.clone(),
            lo.clone(),
            hi.clone(),
        );
        match by_key.get_mut(&key) {
            Some(entry) if entry.0.first != r.first => entry.1 = Some(r),
            Some(_) => {}
            None => {
                by_key.insert(key, (r, None));
            }
        }
    }
    let mut out = Vec::new();
    for ((question_id, criterion, _, _), (x, y)) in by_key {
        let Some(y) = y else { continue };
        // A is whoever was shown first in the stored original order.
        let (orig, swap) = if x.first <= y.first { (x, y) } else { (y, x) };
        let sp = |r: &PairRecord| SlotProbs {
            first: r.p_first,
            second: r.p_second,
            tie: r.p_tie,
        };
        let debiased = debias_pair(sp(orig), sp(swap))?;
        let ow = slot_winner(sp(orig), true);
        let sw = slot_winner(sp(swap), false);
        out.push(PairOutcome {
            question_id,
            criterion,
            a: orig.first.clone(),
            b: orig.second.clone(),
            original: sp(orig),
            swapped: sp(swap),
            original_winner: ow,
            swapped_winner: sw,
            debiased,
            debiased_winner: identity_winner(debiased),
            verdict: identity_winner(debiased),
            conservative_winner: if ow == sw { ow } else { Winner::Tie },
        });
    }
    Ok(out)
}

/// Sets each outcome's ranking verdict from verdicts keyed by (question, alphabetically
/// first system, second) and oriented to the first; outcomes without one keep theirs.
pub fn set_verdicts(
    outcomes: &mut [PairOutcome],
    verdicts: &BTreeMap<(String, String, String), Winner>,
) {
    for o in outcomes {
        let flipped = o.a > o.b;
        let (lo, hi) = if flipped { (&o.b, &o.a) } else { (&o.a, &o.b) };
        if let Some(&w) = verdicts.get(&(o.question_id.clone(), lo.clone(), hi.clone())) {
            o.verdict = match (w, flipped) {
                (Winner::A, true) => Winner::B,
                (Winner::B, true) => Winner::A,
                (w, _) => w,
            };
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rec(q: &str, first: &str, second: &str, p: [f64; 3]) -> PairRecord {
        PairRecord {
            question_id: q.into(),
            criterion: "overall".into(),
            first: first.into(),
            second: second.into(),
            p_first: p[0],
            p_second: p[1],
            p_tie: p[2],
            captured_mass: 1.0,
        }
    }

    /// METHODS.md section 8 (Zheng et al. 2023 conservative rule): a pair preferred
    /// by slot 1 in both orders is inconsistent and becomes a tie; a pair preferred
    /// by identity in both orders keeps its winner.
    #[test]
    fn orders_are_joined_by_identity_not_slot() {
        let recs = vec![
            rec("q1", "a", "b", [0.8, 0.1, 0.1]),
            rec("q1", "b", "a", [0.7, 0.2, 0.1]),
            rec("q2", "a", "b", [0.6, 0.3, 0.1]),
            rec("q2", "b", "a", [0.2, 0.7, 0.1]),
        ];
        let out = pair_outcomes(&recs).expect("outcomes");
        assert_eq!(out.len(), 2);
        assert_eq!(out[0].original_winner, Winner::A);
        assert_eq!(out[0].swapped_winner, Winner::B);
        assert_eq!(out[0].conservative_winner, Winner::Tie);
        assert_eq!(out[1].conservative_winner, Winner::A);
        assert_eq!(out[1].debiased_winner, Winner::A);
        assert!((out[1].debiased.a - 0.65).abs() < 1e-12);
    }

    #[test]
    fn a_pair_missing_its_second_order_is_left_out() {
        let recs = vec![rec("q1", "a", "b", [0.8, 0.1, 0.1])];
        assert!(pair_outcomes(&recs).expect("outcomes").is_empty());
    }
}
