//! Vetting stage, pairwise: does the judge pick the answer humans prefer? Input:
//! `PairRecord`s of one judge or a panel (each pair judged in both orders), optional
//! slot probes and pointwise grades, and human `PreferenceRow`s. Output: per judged
//! criterion, the raw judge's position bias, its slot prior with consistency and
//! first-slot rate before and after dividing it out, the agreement of every verdict
//! rule (`pair_rules`) with the human majority, and the chosen rule with a nested
//! out-of-sample estimate of its agreement. Never reads a verdict as a slot: winners
//! are compared by system identity; never scores a fitted rule on the pairs it was
//! fitted on.
//!
//! Human majority per (question, unordered pair): the option (either system or tie)
//! with strictly more votes than each other option; no such option means tie. Human
//! preferences carry no criterion, so every judged criterion (usually `overall`) is
//! compared with the same majority. Pairs judged in only one order are left out of all
//! rules (and counted), so the rules are compared on the same pairs. A is the
//! alphabetically first system; categories for kappa: A wins, B wins, tie. The slot
//! prior and the scales of the combined strengths come from every judged pair, human
//! preference or not (they use no label). Intervals are percentile bootstraps over
//! pairs of the (out-of-sample) verdicts; they leave out the variation of refitting.

use std::collections::BTreeMap;

use serde::Serialize;

use super::agreement::kappa;
use super::pair_rules::{choose, nested_choice, out_of_sample, PairEvidence, PairRule, Prepared};
use super::{VetError, VetOptions};
use crate::data::PreferenceRow;
use crate::judge::{GradeRecord, PairRecord, ProbeKind, ProbeRecord};
use crate::probes::slot_prior::{calibrate, order_effect, OrderEffect, SlotCalibration};
use crate::rubric::Rubric;
use crate::stats::agreement::{confusion_matrix, Weighting};
use crate::stats::bootstrap::{bootstrap_interval, BootstrapInterval, IntervalMethod};
use crate::stats::pairwise::{position_bias, JudgedPair, PositionBias, SlotProbs, Winner};

/// One verdict rule against the human majority.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MethodAgreement {
    /// Display name of the rule (see `pair_rules::PairRule::name`).
    pub method: String,
    /// The rule.
    pub rule: Option<PairRule>,
    /// True when the rule has a tie band fitted to human labels: its verdicts were
    /// cross-fitted over question folds, each fold's band fitted on the other folds.
    pub out_of_sample: bool,
    /// The rule's tie band fitted on all compared pairs (what it would use on new pairs).
    pub tie_band: Option<f64>,
    /// Consistency and first-slot rate of the rule read from one order at a time;
    /// missing for the pointwise rule (order cannot enter).
    pub order: Option<OrderEffect>,
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
    /// Pairs left out because a panel member did not judge them in both orders.
    pub panel_incomplete: usize,
    /// Position bias of the raw primary judge on the compared pairs.
    pub position_bias: PositionBias,
    /// The primary judge's slot prior, with consistency and first-slot rate over all
    /// judged pairs before and after dividing it out.
    pub calibration: SlotCalibration,
    /// Every applicable rule against the human majority, in display order.
    pub methods: Vec<MethodAgreement>,
    /// The rule chosen against the human majority (one-standard-error rule).
    pub chosen: Option<ChosenRule>,
    /// Rules left out and why.
    pub notes: Vec<String>,
}

/// The rule chosen against human preferences, and how well choosing does out of sample.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ChosenRule {
    /// The rule.
    pub rule: PairRule,
    /// Its display name.
    pub name: String,
    /// Its tie band fitted on all compared pairs, if it has one.
    pub tie_band: Option<f64>,
    /// Agreement of the whole choice (rule and band picked on the other question folds)
    /// on held-out folds: what to expect on new pairs. Missing with one question only.
    pub nested_accuracy: Option<f64>,
    /// Bootstrap percentile interval of `nested_accuracy`.
    pub nested_ci: Option<BootstrapInterval>,
    /// How often each rule was chosen across the outer folds.
    pub picks: Vec<(String, usize)>,
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
    /// Judges whose pair records were given (more than one: a panel).
    pub judges: usize,
    /// One report per judged criterion, sorted by key.
    pub criteria: Vec<PairCriterionReport>,
}

/// (question, first system alphabetically, second).
pub type PairKey = (String, String, String);

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

fn slot_probs(r: &PairRecord) -> SlotProbs {
    SlotProbs {
        first: r.p_first,
        second: r.p_second,
        tie: r.p_tie,
    }
}

/// What `vet_pair_inputs` reads besides human preferences.
#[derive(Debug, Clone, Default)]
pub struct PairInputs<'a> {
    /// Each judge's pair records; the first is the primary judge, more make a panel.
    pub judges: Vec<&'a [PairRecord]>,
    /// Each judge's slot probes, in the order of `judges` (missing: none).
    pub probes: Vec<&'a [ProbeRecord]>,
    /// Pointwise grades of the same answers and their rubric, for the pointwise rules.
    pub grades: Option<(&'a [GradeRecord], &'a Rubric)>,
}

/// Every pair of one criterion judged in both orders by every judge, ready for the rules.
#[derive(Debug, Clone)]
pub struct JudgedPairs {
    /// Criterion key.
    pub criterion: String,
    /// (question, A, B) of each pair, A the alphabetically first system.
    pub keys: Vec<PairKey>,
    /// The evidence and everything estimated from it without labels.
    pub prepared: Prepared,
    /// Pairs the primary judge judged in one order only.
    pub one_order_only: usize,
    /// Pairs left out because a panel member did not judge them in both orders.
    pub panel_incomplete: usize,
}

/// Vets pairwise verdicts of one judge against the human majority preference.
pub fn vet_pairs(
    pairs: &[PairRecord],
    prefs: &[PreferenceRow],
    opts: &VetOptions,
) -> Result<PairVetReport, VetError> {
    let inputs = PairInputs {
        judges: vec![pairs],
        ..PairInputs::default()
    };
    vet_pair_inputs(&inputs, prefs, opts)
}

/// Records of one judge grouped by (criterion, pair), each list in stored order.
fn group(pairs: &[PairRecord]) -> Result<BTreeMap<(String, PairKey), Vec<&PairRecord>>, VetError> {
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
    Ok(grouped)
}

/// Both orders of a pair as (A shown first, B shown first), when both were judged.
fn both_orders(recs: &[&PairRecord], k: &PairKey) -> Option<(SlotProbs, SlotProbs)> {
    let a_first = recs.iter().find(|r| r.first == k.1)?;
    let b_first = recs.iter().find(|r| r.first == k.2)?;
    Some((slot_probs(a_first), slot_probs(b_first)))
}

/// Each answer's pointwise score on `criterion`, rescaled to 0..1 by its scale; for
/// `overall`, the mean over the rubric criteria the answer was graded on.
fn pointwise_scores(
    grades: &[GradeRecord],
    rubric: &Rubric,
    criterion: &str,
) -> BTreeMap<(String, String), f64> {
    let mut sums: BTreeMap<(String, String), (f64, usize)> = BTreeMap::new();
    for g in grades {
        if criterion != "overall" && g.criterion != criterion {
            continue;
        }
        let Some(c) = rubric.criterion(&g.criterion) else {
            continue;
        };
        let v = c.scale.values();
        let (lo, hi) = (v[0], v[v.len() - 1]);
        if !g.expected.is_finite() || hi <= lo {
            continue;
        }
        let e = sums
            .entry((g.question_id.clone(), g.system.clone()))
            .or_default();
        e.0 += (g.expected - lo) / (hi - lo);
        e.1 += 1;
    }
    sums.into_iter()
        .map(|(k, (s, n))| (k, s / n as f64))
        .collect()
}

/// Joins every judge's records (and grades) into evidence per criterion. Pairs the
/// primary judge saw in one order only are counted and left out.
pub fn judged_pairs(inputs: &PairInputs) -> Result<Vec<JudgedPairs>, VetError> {
    let groups = inputs
        .judges
        .iter()
        .map(|j| group(j))
        .collect::<Result<Vec<_>, _>>()?;
    let Some(primary) = groups.first() else {
        return Ok(Vec::new());
    };
    let mut by_criterion: BTreeMap<String, (Vec<PairKey>, Vec<PairEvidence>, usize, usize)> =
        BTreeMap::new();
    for ((criterion, k), recs) in primary {
        let entry = by_criterion.entry(criterion.clone()).or_default();
        let Some(first) = both_orders(recs, k) else {
            entry.2 += 1;
            continue;
        };
        let mut judges = vec![first];
        for g in &groups[1..] {
            match g
                .get(&(criterion.clone(), k.clone()))
                .and_then(|r| both_orders(r, k))
            {
                Some(o) => judges.push(o),
                None => break,
            }
        }
        if judges.len() < groups.len() {
            entry.3 += 1;
            continue;
        }
        entry.0.push(k.clone());
        entry.1.push(PairEvidence {
            question_id: k.0.clone(),
            judges,
            points: None,
        });
    }
    let mut out = Vec::new();
    for (criterion, (keys, mut evidence, one_order_only, panel_incomplete)) in by_criterion {
        if keys.is_empty() {
            continue;
        }
        if let Some((grades, rubric)) = inputs.grades {
            let scores = pointwise_scores(grades, rubric, &criterion);
            for (e, k) in evidence.iter_mut().zip(&keys) {
                let a = scores.get(&(k.0.clone(), k.1.clone()));
                let b = scores.get(&(k.0.clone(), k.2.clone()));
                e.points = a.zip(b).map(|(a, b)| (*a, *b));
            }
        }
        let probes: Vec<Vec<(ProbeKind, SlotProbs)>> = inputs
            .probes
            .iter()
            .map(|ps| {
                ps.iter()
                    .filter(|p| p.criterion == criterion)
                    .map(|p| {
                        let sp = SlotProbs {
                            first: p.p_first,
                            second: p.p_second,
                            tie: p.p_tie,
                        };
                        (p.kind, sp)
                    })
                    .collect()
            })
            .collect();
        let prepared = Prepared::new(evidence, &probes).map_err(|source| VetError::Stats {
            what: format!("the slot prior on `{criterion}`"),
            source,
        })?;
        out.push(JudgedPairs {
            criterion,
            keys,
            prepared,
            one_order_only,
            panel_incomplete,
        });
    }
    Ok(out)
}

/// Vets pairwise verdicts (one judge or a panel, optionally with pointwise grades)
/// against the human majority preference: every rule, the chosen one, the slot prior.
pub fn vet_pair_inputs(
    inputs: &PairInputs,
    prefs: &[PreferenceRow],
    opts: &VetOptions,
) -> Result<PairVetReport, VetError> {
    super::check_options(opts)?;
    let majority = human_majority(prefs)?;
    let judged = judged_pairs(inputs)?;
    let mut criteria = Vec::new();
    for jp in &judged {
        let labelled: Vec<usize> = (0..jp.keys.len())
            .filter(|&i| majority.contains_key(&jp.keys[i]))
            .collect();
        if labelled.is_empty() {
            continue;
        }
        criteria.push(criterion_report(jp, &labelled, &majority, opts)?);
    }
    if criteria.is_empty() {
        let pairs: usize = judged.iter().map(|j| j.keys.len()).sum();
        return Err(VetError::NoPairOverlap {
            judged: pairs,
            preferred: majority.len(),
        });
    }
    Ok(PairVetReport {
        resamples: opts.resamples,
        level: opts.level,
        human_pairs: majority.len(),
        judges: inputs.judges.len(),
        criteria,
    })
}

/// The raw judge's position bias on the labelled pairs (A = the alphabetically first system).
fn raw_position_bias(
    p: &Prepared,
    labelled: &[usize],
    criterion: &str,
) -> Result<PositionBias, VetError> {
    let judged: Vec<JudgedPair> = labelled
        .iter()
        .map(|&i| {
            let (o, s) = p.evidence[i].judges[0];
            JudgedPair {
                original: p.verdict(PairRule::SingleOrder, i, 0.0, Some(0)),
                swapped: p.verdict(PairRule::SingleOrder, i, 0.0, Some(1)),
                original_probs: Some(o),
                swapped_probs: Some(s),
            }
        })
        .collect();
    position_bias(&judged).map_err(|source| VetError::Stats {
        what: format!("position bias on `{criterion}`"),
        source,
    })
}

fn criterion_report(
    jp: &JudgedPairs,
    labelled: &[usize],
    majority: &BTreeMap<PairKey, usize>,
    opts: &VetOptions,
) -> Result<PairCriterionReport, VetError> {
    let p = &jp.prepared;
    let criterion = &jp.criterion;
    // Human category per evidence index (2 = tie where unlabelled; never read there).
    let human: Vec<usize> = jp
        .keys
        .iter()
        .map(|k| majority.get(k).copied().unwrap_or(2))
        .collect();
    let calibration = primary_calibration(p, criterion)?;
    let rules: Vec<PairRule> = PairRule::DISPLAY
        .into_iter()
        .filter(|r| p.supports(*r))
        .collect();
    let mut notes = Vec::new();
    let graded = p.evidence.iter().filter(|e| e.points.is_some()).count();
    if graded < p.evidence.len() {
        notes.push(format!(
            "pointwise rules left out: {graded} of {} judged pairs have pointwise grades of both answers; grade every compared answer with `--grades`",
            p.evidence.len()
        ));
    }
    let mut methods = Vec::new();
    for &rule in &rules {
        let Some(v) = out_of_sample(p, rule, labelled, &human, opts.seed) else {
            notes.push(format!(
                "`{}` left out: its tie band needs pairs on at least two questions to be scored out of sample",
                rule.name()
            ));
            continue;
        };
        let band = rule.fitted().then(|| p.fit_band(rule, labelled, &human));
        let judge: Vec<usize> = labelled.iter().map(|i| v[i]).collect();
        let truth: Vec<usize> = labelled.iter().map(|&i| human[i]).collect();
        let mut m = method_agreement(rule.name(), &truth, &judge, opts)?;
        m.rule = Some(rule);
        m.out_of_sample = rule.fitted();
        m.tie_band = band;
        m.order = rule_order_effect(p, rule, band.unwrap_or(0.0), labelled);
        methods.push(m);
    }
    let chosen = choose(p, &rules, labelled, &human, opts.seed).map(|rule| {
        let nested = nested_choice(p, &rules, labelled, &human, opts.seed);
        let (nested_accuracy, nested_ci, picks) = match nested {
            Some((held, picks)) => {
                let truth: Vec<usize> = held.keys().map(|&i| human[i]).collect();
                let judge: Vec<usize> = held.values().copied().collect();
                let m = method_agreement("chosen", &truth, &judge, opts).ok();
                (
                    m.as_ref().map(|m| m.accuracy),
                    m.and_then(|m| m.accuracy_ci),
                    picks
                        .into_iter()
                        .map(|(r, n)| (r.name().to_string(), n))
                        .collect(),
                )
            }
            None => (None, None, Vec::new()),
        };
        ChosenRule {
            rule,
            name: rule.name().to_string(),
            tie_band: rule.fitted().then(|| p.fit_band(rule, labelled, &human)),
            nested_accuracy,
            nested_ci,
            picks,
        }
    });
    Ok(PairCriterionReport {
        criterion: criterion.clone(),
        n_pairs: labelled.len(),
        human_ties: labelled.iter().filter(|&&i| human[i] == 2).count(),
        one_order_only: jp.one_order_only,
        without_human: jp.keys.len() - labelled.len(),
        panel_incomplete: jp.panel_incomplete,
        position_bias: raw_position_bias(p, labelled, criterion)?,
        calibration,
        methods,
        chosen,
        notes,
    })
}

/// The primary judge's prior with its order effect before and after, over all judged pairs.
fn primary_calibration(p: &Prepared, criterion: &str) -> Result<SlotCalibration, VetError> {
    let pairs: Vec<(SlotProbs, SlotProbs)> = p.evidence.iter().map(|e| e.judges[0]).collect();
    let stats = |what: &str| {
        let what = format!("{what} on `{criterion}`");
        move |source| VetError::Stats { what, source }
    };
    Ok(SlotCalibration {
        prior: p.priors[0],
        before: order_effect(&pairs, |x| x).map_err(stats("the raw order effect"))?,
        after: order_effect(&pairs, |x| calibrate(x, &p.priors[0]))
            .map_err(stats("the calibrated order effect"))?,
    })
}

/// Consistency and first-slot rate of a rule's verdicts read from one order at a time;
/// `None` for the pointwise rule, where order cannot enter.
fn rule_order_effect(
    p: &Prepared,
    rule: PairRule,
    band: f64,
    idx: &[usize],
) -> Option<OrderEffect> {
    if rule == PairRule::Pointwise {
        return None;
    }
    let judged: Vec<JudgedPair> = idx
        .iter()
        .map(|&i| JudgedPair {
            original: p.verdict(rule, i, band, Some(0)),
            swapped: p.verdict(rule, i, band, Some(1)),
            original_probs: None,
            swapped_probs: None,
        })
        .collect();
    let b = position_bias(&judged).ok()?;
    Some(OrderEffect {
        consistency: b.positional_consistency,
        first_slot_rate: b.first_slot_win_rate,
    })
}

/// Verdicts of `rule` (tie band `band`) on every judged pair, by identity of A and B.
pub fn rule_verdicts(jp: &JudgedPairs, rule: PairRule, band: f64) -> Vec<(PairKey, Winner)> {
    jp.keys
        .iter()
        .enumerate()
        .map(|(i, k)| (k.clone(), jp.prepared.verdict(rule, i, band, None)))
        .collect()
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
        rule: None,
        out_of_sample: false,
        tie_band: None,
        order: None,
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

/// The verdict rule a ranking uses and its verdicts on every judged pair of a criterion.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RankingRule {
    /// The rule.
    pub rule: PairRule,
    /// Its display name.
    pub name: String,
    /// Its tie band, if it has one.
    pub tie_band: Option<f64>,
    /// True when chosen against human preferences; false: the label-free default
    /// (calibrated), because no human preferences were given or none overlapped.
    pub chosen_against_humans: bool,
    /// The primary judge's slot prior with consistency and first-slot rate before and
    /// after dividing it out, over all judged pairs.
    pub calibration: SlotCalibration,
    /// Consistency and first-slot rate of the rule itself read one order at a time,
    /// over all judged pairs; missing for the pointwise rule (order cannot enter).
    pub order: Option<OrderEffect>,
    /// Verdict per pair (question, alphabetically first system, second), oriented to the first.
    #[serde(skip)]
    pub verdicts: BTreeMap<PairKey, Winner>,
}

/// The rule chosen in `vetted` for `criterion`, or the calibrated rule when there is no
/// choice, applied to every pair of `inputs` judged in both orders. `None` when no
/// pair of the criterion was judged in both orders.
pub fn ranking_rule(
    inputs: &PairInputs,
    criterion: &str,
    vetted: Option<&PairVetReport>,
) -> Result<Option<RankingRule>, VetError> {
    let Some(jp) = judged_pairs(inputs)?
        .into_iter()
        .find(|j| j.criterion == criterion)
    else {
        return Ok(None);
    };
    let chosen = vetted
        .and_then(|v| v.criteria.iter().find(|c| c.criterion == criterion))
        .and_then(|c| c.chosen.as_ref());
    let (rule, band) = chosen.map_or((PairRule::Calibrated, None), |c| (c.rule, c.tie_band));
    let calibration = primary_calibration(&jp.prepared, criterion)?;
    let all: Vec<usize> = (0..jp.keys.len()).collect();
    Ok(Some(RankingRule {
        order: rule_order_effect(&jp.prepared, rule, band.unwrap_or(0.0), &all),
        rule,
        name: rule.name().to_string(),
        tie_band: band,
        chosen_against_humans: chosen.is_some(),
        calibration,
        verdicts: rule_verdicts(&jp, rule, band.unwrap_or(0.0))
            .into_iter()
            .collect(),
    }))
}
