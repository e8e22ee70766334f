//! Vetting stage, pairwise: does the judge pick the answer humans prefer? Input:
//! `PairRecord`s (each pair judged in both orders) and human `PreferenceRow`s.
//! Output: per judged criterion, position bias and the agreement of three verdict
//! rules with the human majority: single order (the order stored first), debiased
//! (probabilities averaged over both orders; Wang et al. 2023, balanced position
//! calibration) and conservative (a win only when both orders agree; Zheng et al.
//! 2023). Never reads a verdict as a slot: winners are compared by system identity.
//!
//! Human majority per (question, unordered pair): the option (either system or tie)
//! with strictly more votes than each other option; no such option means tie. Human
//! preferences carry no criterion, so every judged criterion (usually `overall`) is
//! compared with the same majority. Pairs judged in only one order are left out of all
//! three rules (and counted), so the rules are compared on the same pairs. Categories
//! for kappa: the alphabetically first system wins, the other wins, tie.

use std::collections::BTreeMap;

use serde::Serialize;

use super::agreement::kappa;
use super::{VetError, VetOptions};
use crate::data::PreferenceRow;
use crate::judge::PairRecord;
use crate::stats::agreement::{confusion_matrix, Weighting};
use crate::stats::bootstrap::{bootstrap_interval, BootstrapInterval, IntervalMethod};
use crate::stats::pairwise::{position_bias, JudgedPair, PositionBias, SlotProbs, Winner};

/// Slot probabilities closer than this count as equal (as in `stats::pairwise`).
const PROB_TIE: f64 = 1e-12;

/// One verdict rule against the human majority.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MethodAgreement {
    /// "single order", "debiased" or "conservative".
    pub method: String,
    /// Share of pairs where the rule's verdict equals the human majority (ties included).
    pub accuracy: f64,
    /// Bootstrap percentile interval of the accuracy.
    pub accuracy_ci: Option<BootstrapInterval>,
    /// Cohen's kappa over (first system wins, second system wins, tie); missing when undefined.
    pub kappa: Option<f64>,
    /// Bootstrap percentile interval of the kappa.
    pub kappa_ci: Option<BootstrapInterval>,
    /// Counts, rows = human majority, columns = rule, order (first wins, second wins, tie).
    pub confusion: Vec<Vec<usize>>,
}

/// Pairwise vetting of one judged criterion.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PairCriterionReport {
    /// Criterion key of the pair records (e.g. `overall`).
    pub criterion: String,
    /// Pairs judged in both orders that humans also compared (the units of every figure).
    pub n_pairs: usize,
    /// Of those, pairs whose human majority is a tie.
    pub human_ties: usize,
    /// Judged pairs left out because only one order was judged.
    pub one_order_only: usize,
    /// Judged pairs (both orders) that no human compared.
    pub without_human: usize,
    /// Position bias of the judge on the compared pairs.
    pub position_bias: PositionBias,
    /// Single-order, debiased and conservative verdicts against the human majority.
    pub methods: Vec<MethodAgreement>,
}

/// Pairwise vetting results.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PairVetReport {
    /// Bootstrap resamples behind every interval.
    pub resamples: usize,
    /// Interval coverage.
    pub level: f64,
    /// Pairs (question, unordered systems) that humans compared.
    pub human_pairs: usize,
    /// One report per judged criterion, sorted by key.
    pub criteria: Vec<PairCriterionReport>,
}

type PairKey = (String, String, String); // (question, first system alphabetically, second)

fn key(q: &str, x: &str, y: &str) -> PairKey {
    let (a, b) = if x <= y { (x, y) } else { (y, x) };
    (q.to_string(), a.to_string(), b.to_string())
}

/// Human majority per pair, as a category 0 (first system alphabetically), 1 (second), 2 (tie).
fn human_majority(prefs: &[PreferenceRow]) -> Result<BTreeMap<PairKey, usize>, VetError> {
    let mut votes: BTreeMap<PairKey, BTreeMap<&str, (usize, usize)>> = BTreeMap::new();
    let mut problems = Vec::new();
    for p in prefs {
        let k = key(&p.question_id, &p.system_a, &p.system_b);
        let vote = match p.preferred.as_deref() {
            None => 2,
            Some(s) if s == k.1 => 0,
            Some(s) if s == k.2 => 1,
            Some(s) => {
                problems.push(format!(
                    "line {}: preferred `{s}` is neither system",
                    p.line
                ));
                continue;
            }
        };
        if let Some((_, first)) = votes.entry(k).or_default().insert(&p.rater, (vote, p.line)) {
            problems.push(format!(
                "line {}: rater `{}` already compared this pair (line {first})",
                p.line, p.rater
            ));
        }
    }
    if !problems.is_empty() {
        return Err(VetError::BadPreferences { problems });
    }
    Ok(votes
        .into_iter()
        .map(|(k, by_rater)| {
            let mut count = [0usize; 3];
            for (v, _) in by_rater.values() {
                count[*v] += 1;
            }
            let top = *count.iter().max().expect("three options");
            let leaders: Vec<usize> = (0..3).filter(|&i| count[i] == top).collect();
            (k, if leaders.len() == 1 { leaders[0] } else { 2 })
        })
        .collect())
}

/// The identity winner of one record (A = the record's first-shown system).
fn slot_winner(r: &PairRecord) -> Winner {
    if r.p_tie + PROB_TIE >= r.p_first.max(r.p_second) || (r.p_first - r.p_second).abs() <= PROB_TIE
    {
        Winner::Tie
    } else if r.p_first > r.p_second {
        Winner::A
    } else {
        Winner::B
    }
}

fn slot_probs(r: &PairRecord) -> SlotProbs {
    SlotProbs {
        first: r.p_first,
        second: r.p_second,
        tie: r.p_tie,
    }
}

/// Category of an A-oriented winner when A is (or is not) the alphabetically first system.
fn category(w: Winner, a_is_first: bool) -> usize {
    match (w, a_is_first) {
        (Winner::Tie, _) => 2,
        (Winner::A, true) | (Winner::B, false) => 0,
        _ => 1,
    }
}

/// Vets pairwise verdicts against the human majority preference.
pub fn vet_pairs(
    pairs: &[PairRecord],
    prefs: &[PreferenceRow],
    opts: &VetOptions,
) -> Result<PairVetReport, VetError> {
    super::check_options(opts)?;
    let majority = human_majority(prefs)?;
    // (criterion, pair) -> records in stored order
    let mut grouped: BTreeMap<(String, PairKey), Vec<&PairRecord>> = BTreeMap::new();
    let mut problems = Vec::new();
    for r in pairs {
        if r.first == r.second {
            problems.push(format!("`{}`: a system compared with itself", r.key()));
            continue;
        }
        let probs = [r.p_first, r.p_second, r.p_tie];
        if probs.iter().any(|p| !(p.is_finite() && *p >= 0.0)) || probs.iter().sum::<f64>() <= 0.0 {
            problems.push(format!(
                "`{}`: verdict probabilities must be finite, >= 0 and not all 0",
                r.key()
            ));
            continue;
        }
        let list = grouped
            .entry((
                r.criterion.clone(),
                key(&r.question_id, &r.first, &r.second),
            ))
            .or_default();
        if list.iter().any(|o| o.first == r.first) {
            problems.push(format!(
                "`{}`: judged more than once in this order",
                r.key()
            ));
            continue;
        }
        list.push(r);
    }
    if !problems.is_empty() {
        return Err(VetError::BadPairs { problems });
    }
    let mut by_criterion: BTreeMap<String, PairCriterionReport> = BTreeMap::new();
    let mut units: BTreeMap<String, Vec<(JudgedPair, bool, usize)>> = BTreeMap::new();
    let mut counts: BTreeMap<String, (usize, usize)> = BTreeMap::new();
    for ((criterion, k), recs) in &grouped {
        let c = counts.entry(criterion.clone()).or_default();
        if recs.len() < 2 {
            c.0 += 1;
            continue;
        }
        let Some(&human) = majority.get(k) else {
            c.1 += 1;
            continue;
        };
        let (orig, swap) = (recs[0], recs[1]);
        // In the swapped record A (orig.first) is shown second, so its slot winner flips.
        let swapped = match slot_winner(swap) {
            Winner::A => Winner::B,
            Winner::B => Winner::A,
            Winner::Tie => Winner::Tie,
        };
        let jp = JudgedPair {
            original: slot_winner(orig),
            swapped,
            original_probs: Some(slot_probs(orig)),
            swapped_probs: Some(slot_probs(swap)),
        };
        units
            .entry(criterion.clone())
            .or_default()
            .push((jp, orig.first == k.1, human));
    }
    for (criterion, list) in units {
        let judged: Vec<JudgedPair> = list.iter().map(|u| u.0).collect();
        let bias = position_bias(&judged).map_err(|source| VetError::Stats {
            what: format!("position bias on `{criterion}`"),
            source,
        })?;
        let human: Vec<usize> = list.iter().map(|u| u.2).collect();
        let orient = |ws: &[Winner]| -> Vec<usize> {
            ws.iter()
                .zip(&list)
                .map(|(&w, u)| category(w, u.1))
                .collect()
        };
        let single = orient(&judged.iter().map(|j| j.original).collect::<Vec<_>>());
        let conservative = orient(&bias.conservative);
        let debiased = orient(bias.debiased.as_deref().unwrap_or(&bias.conservative));
        let methods = [
            ("single order", single),
            ("debiased", debiased),
            ("conservative", conservative),
        ]
        .into_iter()
        .map(|(m, v)| method_agreement(m, &human, &v, opts))
        .collect::<Result<_, _>>()?;
        let (one_order_only, without_human) = counts.get(&criterion).copied().unwrap_or_default();
        by_criterion.insert(
            criterion.clone(),
            PairCriterionReport {
                criterion,
                n_pairs: list.len(),
                human_ties: human.iter().filter(|&&h| h == 2).count(),
                one_order_only,
                without_human,
                position_bias: bias,
                methods,
            },
        );
    }
    if by_criterion.is_empty() {
        return Err(VetError::NoPairOverlap {
            judged: grouped.len(),
            preferred: majority.len(),
        });
    }
    Ok(PairVetReport {
        resamples: opts.resamples,
        level: opts.level,
        human_pairs: majority.len(),
        criteria: by_criterion.into_values().collect(),
    })
}

fn method_agreement(
    method: &str,
    human: &[usize],
    judge: &[usize],
    opts: &VetOptions,
) -> Result<MethodAgreement, VetError> {
    let n = human.len();
    let acc = |idx: &[usize]| {
        Some(idx.iter().filter(|&&i| human[i] == judge[i]).count() as f64 / idx.len() as f64)
    };
    let kap = |idx: &[usize]| {
        let h: Vec<usize> = idx.iter().map(|&i| human[i]).collect();
        let j: Vec<usize> = idx.iter().map(|&i| judge[i]).collect();
        kappa(&h, &j, 3, Weighting::Unweighted)
    };
    let ci = |f: &dyn Fn(&[usize]) -> Option<f64>| {
        bootstrap_interval(
            n,
            opts.resamples,
            opts.seed,
            opts.level,
            IntervalMethod::Percentile,
            f,
        )
        .ok()
    };
    let all: Vec<usize> = (0..n).collect();
    Ok(MethodAgreement {
        method: method.to_string(),
        accuracy: acc(&all).unwrap_or(0.0),
        accuracy_ci: ci(&acc),
        kappa: kap(&all),
        kappa_ci: ci(&kap),
        confusion: confusion_matrix(human, judge, 3).map_err(|source| VetError::Stats {
            what: format!("confusion matrix of the {method} verdicts"),
            source,
        })?,
    })
}
