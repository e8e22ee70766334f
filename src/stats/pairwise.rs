//! Statistics stage: position bias and self-preference in pairwise judging. Input:
//! verdicts on pairs judged in both orders (as the identity of the winner), optional
//! slot probabilities, and own/other preference labels. Output: consistency, slot win
//! rates with interval and test, corrected verdicts, self-preference gaps and a
//! plain-words verdict line. Never does I/O and never reads a verdict as a slot.

use serde::Serialize;

use crate::stats::intervals::{binomial_test_two_sided, wilson_95};
use crate::stats::StatsError;

/// Verdicts flipping on more than this share of pairs earn a caution: beyond a third
/// the order decides too many outcomes for a single-order run to be trusted.
pub const MAX_CONFLICT_RATE: f64 = 1.0 / 3.0;
/// Sign-test level below which a first/second-slot lean counts as real.
pub const SLOT_SIGNIFICANCE: f64 = 0.05;
/// Smallest lean (distance of the decisive first-slot share from 0.5) worth a caution.
pub const SLOT_LEAN: f64 = 0.1;
/// Probabilities closer than this count as equal when picking a debiased verdict.
const PROB_TIE: f64 = 1e-12;

/// Which answer of a pair won, by identity (A, B), not by slot.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Winner {
    /// Answer A was preferred.
    A,
    /// Answer B was preferred.
    B,
    /// Neither was preferred.
    Tie,
}

impl Winner {
    /// +1 for A, −1 for B, 0 for a tie.
    fn a_sign(self) -> i32 {
        match self {
            Winner::A => 1,
            Winner::B => -1,
            Winner::Tie => 0,
        }
    }
}

/// The judge's probabilities for one order, by slot.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SlotProbs {
    /// Probability that the first-shown answer is better.
    pub first: f64,
    /// Probability that the second-shown answer is better.
    pub second: f64,
    /// Probability of a tie (0 when the form offers none).
    pub tie: f64,
}

/// Probabilities by identity after averaging over both orders.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct IdentityProbs {
    /// Probability that A is better.
    pub a: f64,
    /// Probability that B is better.
    pub b: f64,
    /// Probability of a tie.
    pub tie: f64,
}

/// One pair judged twice: original order (A shown first) and swapped (B shown first).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct JudgedPair {
    /// Winner by identity when A was shown first.
    pub original: Winner,
    /// Winner by identity when B was shown first.
    pub swapped: Winner,
    /// Slot probabilities in the original order, if the judge exposed them.
    pub original_probs: Option<SlotProbs>,
    /// Slot probabilities in the swapped order, if the judge exposed them.
    pub swapped_probs: Option<SlotProbs>,
}

/// Position-bias summary of pairs judged in both orders.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PositionBias {
    /// Number of pairs.
    pub n_pairs: usize,
    /// Share of pairs with the same winner in both orders (Zheng et al. 2023).
    pub positional_consistency: f64,
    /// Share of pairs whose winner changes with the order, 1 − consistency (Wang et al. 2023).
    pub conflict_rate: f64,
    /// Inconsistent pairs where A fared better when shown first than when shown second
    /// (win over tie or loss, tie over loss): the first slot helped.
    pub inconsistent_favour_first: usize,
    /// Inconsistent pairs where A fared better when shown second: the second slot helped.
    pub inconsistent_favour_second: usize,
    /// Verdicts (of 2n) won by the first-shown answer.
    pub first_slot_wins: usize,
    /// Verdicts (of 2n) won by the second-shown answer.
    pub second_slot_wins: usize,
    /// Verdicts (of 2n) that were ties.
    pub tie_verdicts: usize,
    /// First-slot wins / 2n: ties stay in the denominator as "not won by the first slot".
    pub first_slot_win_rate: f64,
    /// Wilson (1927) 95% interval of `first_slot_win_rate`; it treats the 2n verdicts as
    /// independent, so it runs a little narrow when a pair's two verdicts move together.
    pub first_slot_win_rate_ci: (f64, f64),
    /// (first-slot wins + ties/2) / 2n: ties count half, so 0.5 means no slot preference.
    pub first_slot_score: f64,
    /// First-slot wins / decisive verdicts (ties dropped); none when every verdict tied.
    pub first_slot_share_of_decisive: Option<f64>,
    /// Exact two-sided sign test of the decisive verdicts against 0.5 (ties dropped).
    pub first_slot_p_value: Option<f64>,
    /// Mean gain in probability an answer gets from being shown first, averaged over
    /// both answers of a pair; 0 = no shift. None without probabilities.
    pub mean_first_slot_probability_shift: Option<f64>,
    /// Conservative verdicts (Zheng et al. 2023): a win only if preferred in both orders.
    pub conservative: Vec<Winner>,
    /// (A wins + ties/2) / n over the conservative verdicts.
    pub conservative_a_win_rate: f64,
    /// Verdicts from probabilities averaged over both orders (Wang et al. 2023,
    /// balanced position calibration); None without probabilities.
    pub debiased: Option<Vec<Winner>>,
    /// (A wins + ties/2) / n over the debiased verdicts.
    pub debiased_a_win_rate: Option<f64>,
    /// True when the bias is strong enough that single-order verdicts should not be used.
    pub caution: bool,
    /// The finding in plain words, with the caution when it applies.
    pub verdict_line: String,
}

/// Averages one pair's slot probabilities over both orders, by identity.
///
/// Each order is first renormalised over (first, second, tie), so a judge that put
/// mass outside the offered labels in one order does not dominate the average.
pub fn debias_pair(original: SlotProbs, swapped: SlotProbs) -> Result<IdentityProbs, StatsError> {
    let o = normalised(original)?;
    let s = normalised(swapped)?;
    Ok(IdentityProbs {
        a: (o.first + s.second) / 2.0,
        b: (o.second + s.first) / 2.0,
        tie: (o.tie + s.tie) / 2.0,
    })
}

fn normalised(p: SlotProbs) -> Result<SlotProbs, StatsError> {
    let parts = [p.first, p.second, p.tie];
    if let Some(bad) = parts.iter().find(|v| !(v.is_finite() && **v >= 0.0)) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a probability >= 0".into(),
        });
    }
    let total: f64 = parts.iter().sum();
    if total <= 0.0 {
        return Err(StatsError::Undefined(
            "slot probabilities sum to zero".into(),
        ));
    }
    Ok(SlotProbs {
        first: p.first / total,
        second: p.second / total,
        tie: p.tie / total,
    })
}

/// The identity verdict with the highest probability; equal A and B give a tie.
pub fn verdict_of(p: IdentityProbs) -> Winner {
    if p.tie + PROB_TIE >= p.a.max(p.b) || (p.a - p.b).abs() <= PROB_TIE {
        Winner::Tie
    } else if p.a > p.b {
        Winner::A
    } else {
        Winner::B
    }
}

fn a_win_rate(verdicts: &[Winner]) -> f64 {
    let points: f64 = verdicts
        .iter()
        .map(|w| match w {
            Winner::A => 1.0,
            Winner::Tie => 0.5,
            Winner::B => 0.0,
        })
        .sum();
    points / verdicts.len() as f64
}

/// Measures position bias over pairs judged in both orders.
///
/// Ties: the first-slot win rate divides by all 2n verdicts, ties included as "not won
/// by the first slot" (this gives 9/16 on the METHODS section 8 example); the sign
/// test and decisive share drop ties (Dixon & Mood 1946 sign-test convention); the
/// first-slot score counts a tie as half, so identical answers score 0.5. A caution is
/// raised when the conflict rate exceeds [`MAX_CONFLICT_RATE`], or when the sign test
/// is below [`SLOT_SIGNIFICANCE`] and the decisive share is at least [`SLOT_LEAN`] from 0.5.
pub fn position_bias(pairs: &[JudgedPair]) -> Result<PositionBias, StatsError> {
    let n = pairs.len();
    if n == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    let (mut consistent, mut fav_first, mut fav_second) = (0, 0, 0);
    let (mut first_wins, mut second_wins, mut ties) = (0, 0, 0);
    let mut conservative = Vec::with_capacity(n);
    for p in pairs {
        let (a1, a2) = (p.original.a_sign(), p.swapped.a_sign());
        // Slot score: A is first in the original, B is first in the swapped order.
        for slot in [a1, -a2] {
            match slot {
                1 => first_wins += 1,
                -1 => second_wins += 1,
                _ => ties += 1,
            }
        }
        // a1 − a2 > 0 means A fared better when shown first: the first slot helped.
        match (a1 - a2).signum() {
            0 => consistent += 1,
            1 => fav_first += 1,
            _ => fav_second += 1,
        }
        conservative.push(if p.original == p.swapped {
            p.original
        } else {
            Winner::Tie
        });
    }
    let verdicts = 2 * n;
    let decisive = first_wins + second_wins;
    let (share, p_value) = if decisive > 0 {
        let p = binomial_test_two_sided(first_wins as u64, decisive as u64, 0.5)?;
        (Some(first_wins as f64 / decisive as f64), Some(p))
    } else {
        (None, None)
    };

    let with_probs = pairs
        .iter()
        .filter(|p| p.original_probs.is_some() && p.swapped_probs.is_some())
        .count();
    let any_probs = pairs
        .iter()
        .any(|p| p.original_probs.is_some() || p.swapped_probs.is_some());
    let (shift, debiased) = if with_probs == n {
        let mut shift = 0.0;
        let mut debiased = Vec::with_capacity(n);
        for p in pairs {
            let o = normalised(
                p.original_probs
                    .expect("every pair was checked to carry probabilities"),
            )?;
            let s = normalised(
                p.swapped_probs
                    .expect("every pair was checked to carry probabilities"),
            )?;
            // A's gain from going first plus B's gain from going first, averaged.
            shift += ((o.first - s.second) + (s.first - o.second)) / 2.0;
            debiased.push(verdict_of(debias_pair(o, s)?));
        }
        (Some(shift / n as f64), Some(debiased))
    } else if any_probs {
        return Err(StatsError::Undefined(format!(
            "slot probabilities are given for {with_probs} of {n} pairs; give them for every pair in both orders or for none"
        )));
    } else {
        (None, None)
    };

    let consistency = consistent as f64 / n as f64;
    let conflict_rate = 1.0 - consistency;
    let strong_lean = matches!((share, p_value), (Some(s), Some(p)) if p < SLOT_SIGNIFICANCE && (s - 0.5).abs() >= SLOT_LEAN);
    let caution = conflict_rate > MAX_CONFLICT_RATE || strong_lean;
    let ci = wilson_95(first_wins as u64, verdicts as u64)?;
    let debiased_a_win_rate = debiased.as_deref().map(a_win_rate);
    let mut report = PositionBias {
        n_pairs: n,
        positional_consistency: consistency,
        conflict_rate,
        inconsistent_favour_first: fav_first,
        inconsistent_favour_second: fav_second,
        first_slot_wins: first_wins,
        second_slot_wins: second_wins,
        tie_verdicts: ties,
        first_slot_win_rate: first_wins as f64 / verdicts as f64,
        first_slot_win_rate_ci: ci,
        first_slot_score: (first_wins as f64 + 0.5 * ties as f64) / verdicts as f64,
        first_slot_share_of_decisive: share,
        first_slot_p_value: p_value,
        mean_first_slot_probability_shift: shift,
        conservative_a_win_rate: a_win_rate(&conservative),
        conservative,
        debiased,
        debiased_a_win_rate,
        caution,
        verdict_line: String::new(),
    };
    report.verdict_line = verdict_line(&report, strong_lean);
    Ok(report)
}

fn percent(x: f64) -> String {
    format!("{:.0}%", 100.0 * x)
}

fn verdict_line(r: &PositionBias, strong_lean: bool) -> String {
    let consistent = r.n_pairs - r.inconsistent_favour_first - r.inconsistent_favour_second;
    let mut line = format!(
        "the judge kept its verdict on {consistent} of {} pairs ({}) when the order was swapped; \
         the first-shown answer won {} of {} verdicts ({}, 95% CI {} to {})",
        r.n_pairs,
        percent(r.positional_consistency),
        r.first_slot_wins,
        2 * r.n_pairs,
        percent(r.first_slot_win_rate),
        percent(r.first_slot_win_rate_ci.0),
        percent(r.first_slot_win_rate_ci.1),
    );
    let mut reasons = Vec::new();
    if r.conflict_rate > MAX_CONFLICT_RATE {
        reasons.push(format!(
            "verdicts flip on {} of pairs (more than {})",
            percent(r.conflict_rate),
            percent(MAX_CONFLICT_RATE)
        ));
    }
    if strong_lean {
        let side = if r.first_slot_wins > r.second_slot_wins {
            "first"
        } else {
            "second"
        };
        reasons.push(format!(
            "the {side}-shown answer wins more often than chance (sign test p = {:.3})",
            r.first_slot_p_value.unwrap_or(1.0)
        ));
    }
    if reasons.is_empty() {
        line.push_str("; no strong position bias");
    } else {
        line.push_str(&format!(
            "; caution: {}; use the conservative or debiased verdicts, not single-order ones",
            reasons.join(" and ")
        ));
    }
    line
}

/// Balanced position calibration of scores (Wang et al. 2023) for k = 1 sample per order.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BalancedScores {
    /// A's score averaged over both orders.
    pub calibrated_a: Vec<f64>,
    /// B's score averaged over both orders.
    pub calibrated_b: Vec<f64>,
    /// Higher calibrated score wins; equal scores tie.
    pub verdicts: Vec<Winner>,
}

/// Averages each answer's score over the two orders: CR = (S + S')/2 (Wang et al. 2023).
///
/// `a_first[i]` and `b_first[i]` hold (score of A, score of B) by identity. With k
/// samples per order, pass the per-order means: (1/2k)Σ(S_i + S'_i) equals the
/// average of the two means.
pub fn balanced_position_scores(
    a_first: &[(f64, f64)],
    b_first: &[(f64, f64)],
) -> Result<BalancedScores, StatsError> {
    if a_first.len() != b_first.len() {
        return Err(StatsError::LengthMismatch {
            left: a_first.len(),
            right: b_first.len(),
        });
    }
    let mut out = BalancedScores {
        calibrated_a: vec![],
        calibrated_b: vec![],
        verdicts: vec![],
    };
    for (&(a1, b1), &(a2, b2)) in a_first.iter().zip(b_first) {
        if let Some(bad) = [a1, b1, a2, b2].iter().find(|v| !v.is_finite()) {
            return Err(StatsError::OutOfRange {
                value: bad.to_string(),
                allowed: "a finite score".into(),
            });
        }
        let (a, b) = ((a1 + a2) / 2.0, (b1 + b2) / 2.0);
        out.verdicts.push(verdict_of(IdentityProbs {
            a,
            b,
            tie: f64::NEG_INFINITY,
        }));
        out.calibrated_a.push(a);
        out.calibrated_b.push(b);
    }
    Ok(out)
}

/// A preference between a judge's own answer and another source's answer.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Preference {
    /// The judge model's own answer is better.
    Own,
    /// The other answer is better.
    Other,
    /// Neither is better.
    Tie,
}

/// (own wins + ties/2) / n: the raw own-versus-other win rate (Zheng et al. 2023 compare
/// it with the human rate on the same pairs).
pub fn own_win_rate(verdicts: &[Preference]) -> Result<f64, StatsError> {
    if verdicts.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    let points: f64 = verdicts
        .iter()
        .map(|p| match p {
            Preference::Own => 1.0,
            Preference::Tie => 0.5,
            Preference::Other => 0.0,
        })
        .sum();
    Ok(points / verdicts.len() as f64)
}

/// Equal-opportunity gap of self-preference (Wataoka, Takahashi & Ri 2024, shape from memory).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EqualOpportunity {
    /// P(judge prefers own | human prefers own).
    pub recall_own: f64,
    /// P(judge prefers other | human prefers other).
    pub recall_other: f64,
    /// recall_own − recall_other: 0 unbiased, > 0 the judge favours its own answers.
    pub difference: f64,
    /// Pairs where the human preferred the judge's own answer.
    pub n_human_own: usize,
    /// Pairs where the human preferred the other answer.
    pub n_human_other: usize,
}

/// Equal-opportunity difference between judge and human preferences on the same pairs.
///
/// Pairs the human called a tie are left out; a judge tie counts as a miss in both
/// recalls (it neither confirms the own nor the other preference).
pub fn equal_opportunity_difference(
    judge: &[Preference],
    human: &[Preference],
) -> Result<EqualOpportunity, StatsError> {
    if judge.len() != human.len() {
        return Err(StatsError::LengthMismatch {
            left: judge.len(),
            right: human.len(),
        });
    }
    let recall = |class: Preference| -> (f64, usize) {
        let rows: Vec<&Preference> = judge
            .iter()
            .zip(human)
            .filter(|(_, h)| **h == class)
            .map(|(j, _)| j)
            .collect();
        let hits = rows.iter().filter(|j| ***j == class).count();
        (hits as f64 / rows.len() as f64, rows.len())
    };
    let (recall_own, n_own) = recall(Preference::Own);
    let (recall_other, n_other) = recall(Preference::Other);
    if n_own == 0 || n_other == 0 {
        return Err(StatsError::Undefined(format!(
            "need human preferences for both sides; got {n_own} for own and {n_other} for other answers"
        )));
    }
    Ok(EqualOpportunity {
        recall_own,
        recall_other,
        difference: recall_own - recall_other,
        n_human_own: n_own,
        n_human_other: n_other,
    })
}

/// Pointwise self-preference: how much more the judge over-scores its own answers.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ResidualGap {
    /// Mean (judge − human) score over the judge's own answers.
    pub own_mean_residual: f64,
    /// Mean (judge − human) score over other answers.
    pub other_mean_residual: f64,
    /// own − other: > 0 means the judge is more generous to its own answers than humans are.
    pub difference: f64,
}

/// Residual gap mean(judge − human | own) − mean(judge − human | other) over index sets.
pub fn self_residual_gap(
    judge: &[f64],
    human: &[f64],
    own: &[usize],
    other: &[usize],
) -> Result<ResidualGap, StatsError> {
    if judge.len() != human.len() {
        return Err(StatsError::LengthMismatch {
            left: judge.len(),
            right: human.len(),
        });
    }
    let mean_residual = |idx: &[usize]| -> Result<f64, StatsError> {
        if idx.is_empty() {
            return Err(StatsError::TooFew { needed: 1, got: 0 });
        }
        let mut sum = 0.0;
        for &i in idx {
            let (j, h) = match (judge.get(i), human.get(i)) {
                (Some(j), Some(h)) if j.is_finite() && h.is_finite() => (j, h),
                _ => {
                    return Err(StatsError::OutOfRange {
                        value: i.to_string(),
                        allowed: format!("an index below {} with finite scores", judge.len()),
                    })
                }
            };
            sum += j - h;
        }
        Ok(sum / idx.len() as f64)
    };
    let own_mean_residual = mean_residual(own)?;
    let other_mean_residual = mean_residual(other)?;
    Ok(ResidualGap {
        own_mean_residual,
        other_mean_residual,
        difference: own_mean_residual - other_mean_residual,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use Winner::{Tie as T, A, B};

    fn pairs(original: &[Winner], swapped: &[Winner]) -> Vec<JudgedPair> {
        original
            .iter()
            .zip(swapped)
            .map(|(&o, &s)| JudgedPair {
                original: o,
                swapped: s,
                original_probs: None,
                swapped_probs: None,
            })
            .collect()
    }

    /// METHODS section 8 worked example (hand, made up): consistency 0.5, conflict 0.5,
    /// 3 inconsistent pairs favour the first slot and 1 the second, first-position win
    /// rate 9/16 = 0.5625 (ties in the denominator), conservative
    /// [A,tie,B,tie,tie,A,tie,tie] (Zheng et al. 2023 rule, tagged from memory). Sign test of 9 first-slot wins among 14 decisive
    /// verdicts: 2·3473/16384 = 0.42395... from the binomial definition.
    #[test]
    fn position_bias_matches_methods_worked_example() {
        let r =
            position_bias(&pairs(&[A, A, B, A, T, A, B, A], &[A, B, B, B, T, A, A, B])).unwrap();
        assert_eq!(r.n_pairs, 8);
        assert_eq!(r.positional_consistency, 0.5);
        assert_eq!(r.conflict_rate, 0.5);
        assert_eq!(
            (r.inconsistent_favour_first, r.inconsistent_favour_second),
            (3, 1)
        );
        assert_eq!(
            (r.first_slot_wins, r.second_slot_wins, r.tie_verdicts),
            (9, 5, 2)
        );
        assert_eq!(r.first_slot_win_rate, 0.5625);
        assert_eq!(r.conservative, vec![A, T, B, T, T, A, T, T]);
        assert_eq!(r.conservative_a_win_rate, (2.0 + 0.5 * 5.0) / 8.0);
        assert_eq!(r.first_slot_share_of_decisive, Some(9.0 / 14.0));
        assert!((r.first_slot_p_value.unwrap() - 2.0 * 3473.0 / 16384.0).abs() < 1e-12);
        let (lo, hi) = r.first_slot_win_rate_ci;
        assert!(
            (lo - 0.33178556398811904).abs() < 1e-12 && (hi - 0.7690134759450764).abs() < 1e-12
        );
        assert!(r.caution, "conflict rate 0.5 exceeds the threshold");
        assert!(
            r.verdict_line.contains("4 of 8 pairs") && r.verdict_line.contains("caution"),
            "{}",
            r.verdict_line
        );
        assert!(r.debiased.is_none() && r.mean_first_slot_probability_shift.is_none());
    }

    /// Identical answers: every verdict a tie in both orders gives full consistency and
    /// 0.5 for every tie-neutral rate (first-slot score, conservative A win rate).
    #[test]
    fn all_ties_give_one_half_rates_and_no_caution() {
        let r = position_bias(&pairs(&[T; 5], &[T; 5])).unwrap();
        assert_eq!(r.positional_consistency, 1.0);
        assert_eq!(r.first_slot_score, 0.5);
        assert_eq!(r.conservative_a_win_rate, 0.5);
        assert_eq!(r.first_slot_share_of_decisive, None);
        assert!(
            !r.caution && r.verdict_line.contains("no strong position bias"),
            "{}",
            r.verdict_line
        );
    }

    /// A judge that always picks the first-shown answer flips every verdict; the sign
    /// test p-value is 2/2^40 (all 40 decisive verdicts on one side) and a caution follows.
    #[test]
    fn always_first_judge_gets_caution() {
        let r = position_bias(&pairs(&[A; 20], &[B; 20])).unwrap();
        assert_eq!(r.conflict_rate, 1.0);
        assert_eq!(r.inconsistent_favour_first, 20);
        assert!((r.first_slot_p_value.unwrap() - 2.0 / 2f64.powi(40)).abs() < 1e-20);
        assert!(
            r.caution
                && r.verdict_line
                    .contains("first-shown answer wins more often"),
            "{}",
            r.verdict_line
        );
    }

    /// Balanced position calibration on probabilities (Wang et al. 2023, method from
    /// memory), checked by hand: pair 1 (0.7,0.2,0.1)/(0.6,0.3,0.1) → A 0.5, B 0.4 → A,
    /// shift 0.4; pair 2 (0.5,0.4,0.1)/(0.6,0.3,0.1) → A 0.4, B 0.5 → B, shift 0.2;
    /// mean shift 0.3. Scaling one order's probabilities (mass 0.8) changes nothing.
    #[test]
    fn debiased_verdicts_average_probabilities_over_orders() {
        let sp = |first, second, tie| Some(SlotProbs { first, second, tie });
        let mut ps = pairs(&[A, A], &[B, B]);
        ps[0].original_probs = sp(0.56, 0.16, 0.08);
        ps[0].swapped_probs = sp(0.6, 0.3, 0.1);
        ps[1].original_probs = sp(0.5, 0.4, 0.1);
        ps[1].swapped_probs = sp(0.6, 0.3, 0.1);
        let r = position_bias(&ps).unwrap();
        assert_eq!(r.debiased, Some(vec![A, B]));
        assert!((r.mean_first_slot_probability_shift.unwrap() - 0.3).abs() < 1e-12);
        assert_eq!(r.debiased_a_win_rate, Some(0.5));
        let d = debias_pair(ps[0].original_probs.unwrap(), ps[0].swapped_probs.unwrap()).unwrap();
        assert!(
            (d.a - 0.5).abs() < 1e-12 && (d.b - 0.4).abs() < 1e-12 && (d.tie - 0.1).abs() < 1e-12
        );
    }

    /// Probabilities for only some pairs would silently mix two methods; it is an error.
    #[test]
    fn probabilities_on_some_pairs_only_are_an_error() {
        let mut ps = pairs(&[A, A], &[B, B]);
        ps[0].original_probs = Some(SlotProbs {
            first: 0.6,
            second: 0.4,
            tie: 0.0,
        });
        ps[0].swapped_probs = ps[0].original_probs;
        assert!(matches!(position_bias(&ps), Err(StatsError::Undefined(_))));
        assert!(position_bias(&[]).is_err());
    }

    /// METHODS section 8 BPC example (hand, made up; Wang et al. 2023 method from
    /// memory): calibrated A [7.5,6.5,5.5,7,6.5], B [6.5,7.5,7.5,6,7] → A,B,B,A,B.
    #[test]
    fn balanced_scores_match_methods_bpc_example() {
        let a_first = [(8.0, 6.0), (7.0, 7.0), (6.0, 7.0), (8.0, 5.0), (7.0, 7.0)];
        let b_first = [(7.0, 7.0), (6.0, 8.0), (5.0, 8.0), (6.0, 7.0), (6.0, 7.0)];
        let r = balanced_position_scores(&a_first, &b_first).unwrap();
        assert_eq!(r.calibrated_a, vec![7.5, 6.5, 5.5, 7.0, 6.5]);
        assert_eq!(r.calibrated_b, vec![6.5, 7.5, 7.5, 6.0, 7.0]);
        assert_eq!(r.verdicts, vec![A, B, B, A, B]);
        let tie = balanced_position_scores(&[(6.0, 7.0)], &[(7.0, 6.0)]).unwrap();
        assert_eq!(tie.verdicts, vec![T]);
        assert!(balanced_position_scores(&a_first, &b_first[..4]).is_err());
    }

    /// Raw own-versus-other win rate by hand: [own, own, other, tie] → 2.5/4; a judge
    /// that calls every pair of identical answers a tie scores 0.5.
    #[test]
    fn own_win_rate_counts_ties_as_half() {
        use Preference::*;
        assert_eq!(own_win_rate(&[Own, Own, Other, Tie]).unwrap(), 0.625);
        assert_eq!(own_win_rate(&[Tie; 7]).unwrap(), 0.5);
        assert!(own_win_rate(&[]).is_err());
    }

    /// Equal-opportunity difference (Wataoka, Takahashi & Ri 2024; shape from memory),
    /// by hand: human own on 4 pairs, judge agrees on 3 (one judge tie) → 0.75; human
    /// other on 3, judge agrees on 1 → 1/3; human tie dropped; gap 5/12. A judge that
    /// copies the human has gap 0.
    #[test]
    fn equal_opportunity_difference_matches_hand_count() {
        use Preference::*;
        let human = [Own, Own, Own, Own, Other, Other, Other, Tie];
        let judge = [Own, Own, Own, Tie, Own, Other, Own, Own];
        let eo = equal_opportunity_difference(&judge, &human).unwrap();
        assert_eq!((eo.n_human_own, eo.n_human_other), (4, 3));
        assert!((eo.difference - 5.0 / 12.0).abs() < 1e-12);
        assert_eq!(
            equal_opportunity_difference(&human, &human)
                .unwrap()
                .difference,
            0.0
        );
        assert!(equal_opportunity_difference(&[Own], &[Own]).is_err());
    }

    /// Pointwise residual gap by hand: judge [4,5,3,2], human [3,3,3,3], own {0,1},
    /// other {2,3} → 1.5 − (−0.5) = 2.
    #[test]
    fn residual_gap_matches_hand_arithmetic() {
        let g = self_residual_gap(&[4.0, 5.0, 3.0, 2.0], &[3.0; 4], &[0, 1], &[2, 3]).unwrap();
        assert_eq!(
            (g.own_mean_residual, g.other_mean_residual, g.difference),
            (1.5, -0.5, 2.0)
        );
        assert!(self_residual_gap(&[1.0], &[1.0], &[0], &[5]).is_err());
        assert!(self_residual_gap(&[1.0], &[1.0], &[0], &[]).is_err());
    }
}
