//! Vetting stage, pairwise verdict rules and the choice among them against human
//! preferences. Input: per pair (A = the alphabetically first system) each judge's slot
//! probabilities in both orders, optionally A's and B's pointwise expected scores, the
//! human majority, and probes of each judge's slot prior. Output: every rule's verdicts
//! scored out of sample where anything was fitted to the human majority, the chosen
//! rule, and the order effect of each rule. Never scores a fitted figure on the pairs it
//! was fitted on, and never does I/O.
//!
//! Rules: single order, debiased (Wang et al. 2023) and conservative (Zheng et al.
//! 2023) read the raw judge; calibrated divides each judge's slot prior out of each
//! order first (`probes::slot_prior`, Zhao et al. 2021); pointwise compares the two
//! answers' expected scores, each graded alone, so position cannot enter; panels
//! average the members' calibrated probabilities. Rules with a tie band call a tie
//! when their signed strength for A is within the band of 0; the band is the only
//! thing fitted to human labels. The calibrated + pointwise strength adds the two
//! signals, each divided by its root mean square over all judged pairs (no label used),
//! so neither dominates by its units.
//!
//! Out of sample: pairs are split into folds by question (pairs of one question share
//! content), seeded by `seed`. A band is fitted on the other folds and applied to the
//! held-out one. The rule is chosen by the one-standard-error rule (Breiman et al.
//! 1984): among rules whose agreement is within one standard error of the paired
//! difference from the best, the first in `PairRule::ALL` (label-free rules first).
//! The choice itself is scored by nested cross-validation: in each outer fold the rule
//! is chosen (and its band fitted) on the other folds only.

use std::collections::BTreeMap;

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::probes::slot_prior::{calibrate, estimate_slot_prior, ProbeKind, SlotPrior};
use crate::stats::pairwise::{verdict_of, IdentityProbs, SlotProbs, Winner};
use crate::stats::StatsError;

/// Cross-validation folds (fewer when there are fewer questions).
pub const FOLDS: usize = 5;
/// Tie bands tried: 0 and the |strength| quantiles of the training pairs at these shares.
const BAND_SHARES: [f64; 12] = [
    0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.35, 0.4, 0.45, 0.5, 0.55, 0.6,
];

/// A way of turning judge outputs into one verdict per pair.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum PairRule {
    /// Each judge's slot prior divided out of both orders, then the orders averaged.
    Calibrated,
    /// The panel's calibrated probabilities averaged over members.
    Panel,
    /// Raw probabilities averaged over both orders.
    Debiased,
    /// Calibrated pairwise strength plus pointwise score difference, with a tie band.
    CalibratedPointwise,
    /// The panel's calibrated strength plus pointwise score difference, with a tie band.
    PanelPointwise,
    /// Difference of the two answers' pointwise expected scores, with a tie band.
    Pointwise,
    /// Calibrated probability difference with a tie band.
    CalibratedTieBand,
    /// A win only when both raw orders agree.
    Conservative,
    /// The raw verdict with A shown first.
    SingleOrder,
}

impl PairRule {
    /// Every rule, in order of preference when agreements are within noise.
    pub const ALL: [PairRule; 9] = [
        PairRule::Calibrated,
        PairRule::Panel,
        PairRule::Debiased,
        PairRule::CalibratedPointwise,
        PairRule::PanelPointwise,
        PairRule::Pointwise,
        PairRule::CalibratedTieBand,
        PairRule::Conservative,
        PairRule::SingleOrder,
    ];

    /// Every rule, in the order reports list them (the raw readings first).
    pub const DISPLAY: [PairRule; 9] = [
        PairRule::SingleOrder,
        PairRule::Debiased,
        PairRule::Conservative,
        PairRule::Calibrated,
        PairRule::CalibratedTieBand,
        PairRule::Pointwise,
        PairRule::CalibratedPointwise,
        PairRule::Panel,
        PairRule::PanelPointwise,
    ];

    /// Display name.
    pub fn name(self) -> &'static str {
        match self {
            PairRule::Calibrated => "calibrated",
            PairRule::Panel => "panel",
            PairRule::Debiased => "debiased",
            PairRule::CalibratedPointwise => "calibrated + pointwise",
            PairRule::PanelPointwise => "panel + pointwise",
            PairRule::Pointwise => "pointwise",
            PairRule::CalibratedTieBand => "calibrated, tie band",
            PairRule::Conservative => "conservative",
            PairRule::SingleOrder => "single order",
        }
    }

    /// Whether the rule has a tie band fitted to human labels.
    pub fn fitted(self) -> bool {
        matches!(
            self,
            PairRule::CalibratedPointwise
                | PairRule::PanelPointwise
                | PairRule::Pointwise
                | PairRule::CalibratedTieBand
        )
    }

    fn needs_points(self) -> bool {
        matches!(
            self,
            PairRule::CalibratedPointwise | PairRule::PanelPointwise | PairRule::Pointwise
        )
    }

    fn needs_panel(self) -> bool {
        matches!(self, PairRule::Panel | PairRule::PanelPointwise)
    }
}

/// What is known about one pair (A = the alphabetically first system).
#[derive(Debug, Clone, PartialEq)]
pub struct PairEvidence {
    /// Question id (folds keep a question's pairs together).
    pub question_id: String,
    /// Per judge (the first is the primary judge, more make a panel): slot
    /// probabilities with A shown first, and with B shown first.
    pub judges: Vec<(SlotProbs, SlotProbs)>,
    /// A's and B's pointwise expected scores rescaled to 0..1, when both were graded.
    pub points: Option<(f64, f64)>,
}

/// Everything computed from the judged pairs without human labels.
#[derive(Debug, Clone, PartialEq)]
pub struct Prepared {
    /// The judged pairs.
    pub evidence: Vec<PairEvidence>,
    /// Each judge's slot prior.
    pub priors: Vec<SlotPrior>,
    /// Root mean squares of the calibrated strength (primary, panel) and of the score difference.
    scales: [f64; 3],
}

/// Which probabilities a rule reads: raw or calibrated, of one order or both averaged.
#[derive(Clone, Copy)]
enum Read {
    Raw,
    Calibrated,
}

fn identity(p: SlotProbs, a_first: bool) -> IdentityProbs {
    let z = (p.first + p.second + p.tie).max(f64::MIN_POSITIVE);
    let (a, b) = if a_first {
        (p.first, p.second)
    } else {
        (p.second, p.first)
    };
    IdentityProbs {
        a: a / z,
        b: b / z,
        tie: p.tie / z,
    }
}

fn mean(ps: &[IdentityProbs]) -> IdentityProbs {
    let n = ps.len() as f64;
    IdentityProbs {
        a: ps.iter().map(|p| p.a).sum::<f64>() / n,
        b: ps.iter().map(|p| p.b).sum::<f64>() / n,
        tie: ps.iter().map(|p| p.tie).sum::<f64>() / n,
    }
}

fn rms(v: impl Iterator<Item = f64>) -> f64 {
    let (s, n) = v.fold((0.0, 0usize), |(s, n), x| (s + x * x, n + 1));
    if n == 0 || s <= 0.0 {
        1.0
    } else {
        (s / n as f64).sqrt()
    }
}

impl Prepared {
    /// Estimates each judge's slot prior from all pairs plus that judge's probes.
    pub fn new(
        evidence: Vec<PairEvidence>,
        probes: &[Vec<(ProbeKind, SlotProbs)>],
    ) -> Result<Prepared, StatsError> {
        let judges = evidence.first().map_or(0, |e| e.judges.len());
        if judges == 0 || evidence.iter().any(|e| e.judges.len() != judges) {
            return Err(StatsError::Undefined(
                "every pair needs both orders from every judge".into(),
            ));
        }
        let priors = (0..judges)
            .map(|j| {
                let pairs: Vec<_> = evidence.iter().map(|e| e.judges[j]).collect();
                estimate_slot_prior(&pairs, probes.get(j).map_or(&[], Vec::as_slice))
            })
            .collect::<Result<Vec<_>, _>>()?;
        let mut p = Prepared {
            evidence,
            priors,
            scales: [1.0; 3],
        };
        p.scales = [
            rms((0..p.evidence.len()).map(|i| p.strength(i, None, false))),
            rms((0..p.evidence.len()).map(|i| p.strength(i, None, true))),
            rms(p
                .evidence
                .iter()
                .filter_map(|e| e.points.map(|(a, b)| a - b))),
        ];
        Ok(p)
    }

    /// Whether a rule can be applied to every pair.
    pub fn supports(&self, rule: PairRule) -> bool {
        (!rule.needs_points() || self.evidence.iter().all(|e| e.points.is_some()))
            && (!rule.needs_panel() || self.priors.len() > 1)
    }

    /// Judge `j`'s identity probabilities of pair `i`: one order (0: A first) or both averaged.
    fn probs(&self, i: usize, j: usize, read: Read, order: Option<usize>) -> IdentityProbs {
        let (o, s) = self.evidence[i].judges[j];
        let (o, s) = match read {
            Read::Raw => (o, s),
            Read::Calibrated => (calibrate(o, &self.priors[j]), calibrate(s, &self.priors[j])),
        };
        match order {
            Some(0) => identity(o, true),
            Some(_) => identity(s, false),
            None => mean(&[identity(o, true), identity(s, false)]),
        }
    }

    fn panel(&self, i: usize, order: Option<usize>) -> IdentityProbs {
        let members: Vec<_> = (0..self.priors.len())
            .map(|j| self.probs(i, j, Read::Calibrated, order))
            .collect();
        mean(&members)
    }

    /// Calibrated strength for A (P(A) - P(B)) of the primary judge or the panel.
    fn strength(&self, i: usize, order: Option<usize>, panel: bool) -> f64 {
        let p = if panel {
            self.panel(i, order)
        } else {
            self.probs(i, 0, Read::Calibrated, order)
        };
        p.a - p.b
    }

    /// Signed strength for A of a tie-band rule.
    fn band_strength(&self, rule: PairRule, i: usize, order: Option<usize>) -> f64 {
        let points = || {
            let (a, b) = self.evidence[i].points.expect("rule supported");
            (a - b) / self.scales[2]
        };
        match rule {
            PairRule::Pointwise => points(),
            PairRule::CalibratedTieBand => self.strength(i, order, false),
            PairRule::CalibratedPointwise => {
                self.strength(i, order, false) / self.scales[0] + points()
            }
            PairRule::PanelPointwise => self.strength(i, order, true) / self.scales[1] + points(),
            _ => unreachable!("only tie-band rules have a strength"),
        }
    }

    /// Verdict of `rule` on pair `i` (from one order, or both), with tie band `band`.
    pub fn verdict(&self, rule: PairRule, i: usize, band: f64, order: Option<usize>) -> Winner {
        let raw = |o| verdict_of(self.probs(i, 0, Read::Raw, o));
        match rule {
            PairRule::SingleOrder => raw(Some(order.unwrap_or(0))),
            PairRule::Debiased => raw(order),
            PairRule::Conservative => match order {
                Some(_) => raw(order),
                None if raw(Some(0)) == raw(Some(1)) => raw(Some(0)),
                None => Winner::Tie,
            },
            PairRule::Calibrated => verdict_of(self.probs(i, 0, Read::Calibrated, order)),
            PairRule::Panel => verdict_of(self.panel(i, order)),
            _ => {
                let s = self.band_strength(rule, i, order);
                if s.abs() <= band {
                    Winner::Tie
                } else if s > 0.0 {
                    Winner::A
                } else {
                    Winner::B
                }
            }
        }
    }

    /// The band that agrees best with `human` on `train` (ties: the smaller band).
    pub fn fit_band(&self, rule: PairRule, train: &[usize], human: &[usize]) -> f64 {
        if !rule.fitted() || train.is_empty() {
            return 0.0;
        }
        let mut mags: Vec<f64> = train
            .iter()
            .map(|&i| self.band_strength(rule, i, None).abs())
            .collect();
        mags.sort_by(f64::total_cmp);
        let mut candidates = vec![0.0];
        for q in BAND_SHARES {
            candidates
                .push(mags[((q * mags.len() as f64).ceil() as usize).clamp(1, mags.len()) - 1]);
        }
        let hits = |band: f64| {
            train
                .iter()
                .filter(|&&i| category(self.verdict(rule, i, band, None)) == human[i])
                .count()
        };
        let mut best = (0.0, hits(0.0));
        for c in candidates {
            let h = hits(c);
            if h > best.1 {
                best = (c, h);
            }
        }
        best.0
    }

    /// Verdicts of `rule` on `test`, its band (if any) fitted on `train` only.
    fn held_out(
        &self,
        rule: PairRule,
        train: &[usize],
        test: &[usize],
        human: &[usize],
    ) -> Vec<(usize, usize)> {
        let band = self.fit_band(rule, train, human);
        test.iter()
            .map(|&i| (i, category(self.verdict(rule, i, band, None))))
            .collect()
    }
}

/// Category of a verdict: 0 A wins, 1 B wins, 2 tie.
pub fn category(w: Winner) -> usize {
    match w {
        Winner::A => 0,
        Winner::B => 1,
        Winner::Tie => 2,
    }
}

/// Fold of each listed pair: questions shuffled with `seed`, dealt round-robin into
/// `min(FOLDS, questions)` folds. Returns one list of pair indices per fold.
pub fn question_folds(p: &Prepared, pairs: &[usize], seed: u64) -> Vec<Vec<usize>> {
    let mut by_q: BTreeMap<&str, Vec<usize>> = BTreeMap::new();
    for &i in pairs {
        by_q.entry(&p.evidence[i].question_id).or_default().push(i);
    }
    let mut groups: Vec<Vec<usize>> = by_q.into_values().collect();
    groups.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    let k = FOLDS.min(groups.len());
    let mut folds = vec![Vec::new(); k];
    for (g, idx) in groups.into_iter().enumerate() {
        folds[g % k].extend(idx);
    }
    folds
}

/// Out-of-sample categories of `rule` on `pairs`: unfitted rules directly, fitted
/// ones cross-fitted over question folds. `None` when a fitted rule has fewer than
/// two questions to fold over.
pub fn out_of_sample(
    p: &Prepared,
    rule: PairRule,
    pairs: &[usize],
    human: &[usize],
    seed: u64,
) -> Option<BTreeMap<usize, usize>> {
    if !rule.fitted() {
        return Some(
            pairs
                .iter()
                .map(|&i| (i, category(p.verdict(rule, i, 0.0, None))))
                .collect(),
        );
    }
    let folds = question_folds(p, pairs, seed);
    if folds.len() < 2 {
        return None;
    }
    let mut out = BTreeMap::new();
    for (k, test) in folds.iter().enumerate() {
        let train: Vec<usize> = folds
            .iter()
            .enumerate()
            .filter(|(j, _)| *j != k)
            .flat_map(|(_, f)| f.iter().copied())
            .collect();
        out.extend(p.held_out(rule, &train, test, human));
    }
    Some(out)
}

/// Chooses among `rules` on `pairs` by the one-standard-error rule on out-of-sample agreement.
pub fn choose(
    p: &Prepared,
    rules: &[PairRule],
    pairs: &[usize],
    human: &[usize],
    seed: u64,
) -> Option<PairRule> {
    let hits: Vec<(PairRule, Vec<f64>)> = rules
        .iter()
        .filter_map(|&r| {
            let v = out_of_sample(p, r, pairs, human, seed)?;
            Some((
                r,
                pairs
                    .iter()
                    .map(|i| f64::from(u8::from(v[i] == human[*i])))
                    .collect(),
            ))
        })
        .collect();
    let n = pairs.len() as f64;
    let acc = |h: &[f64]| h.iter().sum::<f64>() / n;
    let best = hits.iter().max_by(|x, y| acc(&x.1).total_cmp(&acc(&y.1)))?;
    let within = |h: &[f64]| {
        let d: Vec<f64> = best.1.iter().zip(h).map(|(b, x)| b - x).collect();
        let m = d.iter().sum::<f64>() / n;
        let sd = (d.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0).max(1.0)).sqrt();
        m <= sd / n.sqrt()
    };
    let mut ordered: Vec<&(PairRule, Vec<f64>)> = hits.iter().collect();
    ordered.sort_by_key(|(r, _)| *r);
    ordered
        .into_iter()
        .find(|(_, h)| within(h))
        .map(|(r, _)| *r)
}

/// The choice procedure scored by nested cross-validation: per outer question fold,
/// the rule chosen and its band fitted on the other folds, applied to the held-out one.
/// Returns the held-out categories and how often each rule was chosen.
pub fn nested_choice(
    p: &Prepared,
    rules: &[PairRule],
    pairs: &[usize],
    human: &[usize],
    seed: u64,
) -> Option<(BTreeMap<usize, usize>, BTreeMap<PairRule, usize>)> {
    let folds = question_folds(p, pairs, seed);
    if folds.len() < 2 {
        return None;
    }
    let (mut out, mut picks) = (BTreeMap::new(), BTreeMap::new());
    for (k, test) in folds.iter().enumerate() {
        let train: Vec<usize> = folds
            .iter()
            .enumerate()
            .filter(|(j, _)| *j != k)
            .flat_map(|(_, f)| f.iter().copied())
            .collect();
        let rule = choose(p, rules, &train, human, seed.wrapping_add(1 + k as u64))?;
        *picks.entry(rule).or_insert(0) += 1;
        out.extend(p.held_out(rule, &train, test, human));
    }
    Some((out, picks))
}

#[cfg(test)]
#[path = "pair_rules_tests.rs"]
mod tests;
