//! Vetting stage, variants compared out of sample: judges, a panel, calibrated
//! mappings, reasoning-first or anchored runs, each scored against the human
//! consensus on the same items, and the best one per criterion chosen by nested
//! cross-validation. Input: candidate variants (fixed judge records, or a feature
//! table to calibrate), human `LabelRow`s and the `Rubric`. Output: per criterion,
//! every candidate's out-of-sample quadratic kappa with a bootstrap interval, the
//! best one on all items, and the honest figure for "pick the best, then use it":
//! the variant picked on the other folds, scored on the held-out fold, pooled.
//! Never scores a calibrated variant on an item its model was fitted on, and never
//! uses the held-out fold to pick. Does no I/O.

use std::collections::BTreeMap;

use serde::Serialize;

use super::agreement::{interval_pair, kappa, IntervalPair};
use super::items::{group_labels, judge_table, nearest_position, CriterionLabels, LabelledItem};
use super::{Variant, VariantKind, VetError, VetOptions};
use crate::calibrate::{
    calibrated_record, choose_and_fit, cross_fit, group_folds, FeatureTable, Method, SavedMapping,
    Target,
};
use crate::data::LabelRow;
use crate::judge::GradeRecord;
use crate::rubric::Rubric;
use crate::stats::agreement::Weighting;
use crate::stats::correlation::spearman;
use crate::stats::StatsError;

/// Where a candidate's scores come from.
#[derive(Debug, Clone)]
pub enum CandidateSource<'a> {
    /// Judge records read as their expected score or argmax label.
    Fixed(&'a [GradeRecord], VariantKind),
    /// A calibration fitted on these features; isotonic regression may use the
    /// expected score of the named source (`SOURCE/CRITERION/expected`).
    Calibrated {
        table: &'a FeatureTable,
        isotonic_source: Option<String>,
    },
}

/// One variant in the comparison.
#[derive(Debug, Clone)]
pub struct Candidate<'a> {
    /// Display name.
    pub name: String,
    /// Its scores.
    pub source: CandidateSource<'a>,
}

/// One candidate's out-of-sample agreement on one criterion.
#[derive(Debug, Clone, Serialize)]
pub struct VariantScore {
    /// Variant name.
    pub variant: String,
    /// Whether its scores come from a model fitted on human labels (cross-fitted here).
    pub calibrated: bool,
    /// Methods the folds chose, for calibrated variants.
    pub methods: Option<String>,
    /// Quadratic kappa against the consensus (out of sample for calibrated variants).
    pub kappa_quadratic: Option<f64>,
    /// Bootstrap intervals of that kappa over items (the fitted models held fixed).
    pub kappa_quadratic_ci: IntervalPair,
    /// Spearman's rho of the score with the consensus value.
    pub spearman: Option<f64>,
    /// Mean absolute error in scale points.
    pub mae: f64,
}

/// The best variant of one criterion, picked without looking at the items it is scored on.
#[derive(Debug, Clone, Serialize)]
pub struct CriterionChoice {
    /// Criterion key.
    pub criterion: String,
    /// Labelled items every candidate covers (the items compared).
    pub items: usize,
    /// Outer folds (grouped by question).
    pub folds: usize,
    /// Every candidate, in the order given.
    pub variants: Vec<VariantScore>,
    /// Highest quadratic kappa on all items; its figure is optimistic (picked and scored on the same items).
    pub best: Option<String>,
    /// Variant picked on the other folds, for each held-out fold.
    pub chosen_per_fold: Vec<String>,
    /// Quadratic kappa of the fold-wise picks on their held-out folds, pooled: the
    /// figure to expect from "choose the best, then use it".
    pub nested_kappa_quadratic: Option<f64>,
    /// Bootstrap intervals of the nested kappa.
    pub nested_kappa_ci: IntervalPair,
}

/// Criteria compared, and criteria that could not be.
#[derive(Debug, Clone, Serialize)]
pub struct VariantChoice {
    /// One entry per criterion with labels and enough items.
    pub criteria: Vec<CriterionChoice>,
    /// Criteria left out, with why.
    pub skipped: Vec<String>,
}

/// Scores of every candidate on the labelled items it covers, keyed by item index.
enum Scores<'a> {
    Fixed(BTreeMap<usize, f64>),
    Fitted {
        rows: BTreeMap<usize, &'a [f64]>,
        isotonic: Option<usize>,
    },
}

fn scores<'a>(
    c: &'a Candidate,
    lab: &CriterionLabels,
    rubric: &Rubric,
) -> Result<Scores<'a>, VetError> {
    Ok(match &c.source {
        CandidateSource::Fixed(records, kind) => {
            let v = Variant {
                name: c.name.clone(),
                records,
                kind: *kind,
            };
            let paired = judge_table(&v, rubric)?.pair_with(lab);
            Scores::Fixed(paired.iter().map(|p| (p.item, p.judge.score)).collect())
        }
        CandidateSource::Calibrated {
            table,
            isotonic_source,
        } => Scores::Fitted {
            rows: lab
                .items
                .iter()
                .enumerate()
                .filter_map(|(i, it)| {
                    let key = (it.question_id.clone(), it.system.clone());
                    table.rows.get(&key).map(|r| (i, r.as_slice()))
                })
                .collect(),
            isotonic: isotonic_source
                .as_ref()
                .and_then(|s| table.column(&format!("{s}/{}/expected", lab.key))),
        },
    })
}

impl Scores<'_> {
    fn covers(&self, i: usize) -> bool {
        match self {
            Scores::Fixed(m) => m.contains_key(&i),
            Scores::Fitted { rows, .. } => rows.contains_key(&i),
        }
    }
}

/// The compared items of one criterion: label positions, question groups, target.
struct Items<'a> {
    idx: Vec<usize>,
    y: Vec<usize>,
    groups: Vec<String>,
    target: Target,
    lab: &'a CriterionLabels,
}

impl Items<'_> {
    fn kappa(&self, pos: &[usize], preds: &[f64]) -> Option<f64> {
        let cats: Vec<usize> = preds
            .iter()
            .map(|p| nearest_position(&self.target.values, *p))
            .collect();
        let y: Vec<usize> = pos.iter().map(|&i| self.y[i]).collect();
        kappa(&cats, &y, self.lab.k(), Weighting::Quadratic)
    }
}

/// Predictions of one candidate for `test` positions, fitted (when calibrated) on `train` only.
fn predict(
    s: &Scores,
    it: &Items,
    train: &[usize],
    test: &[usize],
    seed: u64,
) -> Result<Vec<f64>, StatsError> {
    match s {
        Scores::Fixed(m) => Ok(test.iter().map(|&p| m[&it.idx[p]]).collect()),
        Scores::Fitted { rows, isotonic } => {
            let r: Vec<&[f64]> = train.iter().map(|&p| rows[&it.idx[p]]).collect();
            let y: Vec<usize> = train.iter().map(|&p| it.y[p]).collect();
            let g: Vec<String> = train.iter().map(|&p| it.groups[p].clone()).collect();
            let model =
                choose_and_fit(&Method::candidates(*isotonic), &r, &y, &g, &it.target, seed)?;
            Ok(test
                .iter()
                .map(|&p| model.predict(rows[&it.idx[p]]).expected)
                .collect())
        }
    }
}

/// Out-of-sample predictions on `pos` (cross-fitted within `pos` for calibrated
/// candidates) and, for those, the methods chosen.
fn out_of_sample(
    s: &Scores,
    it: &Items,
    pos: &[usize],
    folds: usize,
    seed: u64,
) -> Result<(Vec<f64>, Option<String>), StatsError> {
    match s {
        Scores::Fixed(_) => Ok((predict(s, it, &[], pos, seed)?, None)),
        Scores::Fitted { rows, isotonic } => {
            let r: Vec<&[f64]> = pos.iter().map(|&p| rows[&it.idx[p]]).collect();
            let y: Vec<usize> = pos.iter().map(|&p| it.y[p]).collect();
            let g: Vec<String> = pos.iter().map(|&p| it.groups[p].clone()).collect();
            let f = group_folds(&g, folds, seed)?;
            let cf = cross_fit(
                &Method::candidates(*isotonic),
                &r,
                &y,
                &g,
                &f,
                &it.target,
                seed,
            )?;
            let preds = cf.out_of_fold.iter().map(|p| p.expected).collect();
            Ok((preds, Some(cf.methods())))
        }
    }
}

fn stat_err(what: &str) -> impl FnOnce(StatsError) -> VetError + '_ {
    move |source| VetError::Stats {
        what: what.to_string(),
        source,
    }
}

/// Compares the candidates per criterion and picks the best by nested cross-validation.
pub fn choose_variant(
    candidates: &[Candidate],
    labels: &[LabelRow],
    rubric: &Rubric,
    opts: &VetOptions,
) -> Result<VariantChoice, VetError> {
    let grouped = group_labels(labels, rubric)?;
    let mut criteria = Vec::new();
    let mut skipped = Vec::new();
    for lab in &grouped {
        let s: Vec<Scores> = candidates
            .iter()
            .map(|c| scores(c, lab, rubric))
            .collect::<Result<_, _>>()?;
        let idx: Vec<usize> = (0..lab.items.len())
            .filter(|&i| s.iter().all(|x| x.covers(i)))
            .collect();
        if idx.is_empty() {
            skipped.push(format!(
                "`{}`: no labelled item is graded by every variant",
                lab.key
            ));
            continue;
        }
        let it = Items {
            y: idx.iter().map(|&i| lab.items[i].consensus).collect(),
            groups: idx
                .iter()
                .map(|&i| lab.items[i].question_id.clone())
                .collect(),
            idx,
            target: Target {
                values: lab.values.clone(),
            },
            lab,
        };
        match choose_criterion(candidates, &s, &it, opts) {
            Ok(c) => criteria.push(c),
            Err(e) => skipped.push(format!("`{}`: {e}", lab.key)),
        }
    }
    Ok(VariantChoice { criteria, skipped })
}

fn choose_criterion(
    candidates: &[Candidate],
    s: &[Scores],
    it: &Items,
    opts: &VetOptions,
) -> Result<CriterionChoice, VetError> {
    let all: Vec<usize> = (0..it.idx.len()).collect();
    let folds = group_folds(&it.groups, opts.folds, opts.seed).map_err(stat_err("folds"))?;
    let mut variants = Vec::new();
    for (c, sc) in candidates.iter().zip(s) {
        let (preds, methods) = out_of_sample(sc, it, &all, opts.folds, opts.seed)
            .map_err(stat_err(&format!("out-of-sample scores of `{}`", c.name)))?;
        variants.push(score_row(c, sc, it, &preds, methods, opts));
    }
    let best =
        argmax(variants.iter().map(|v| v.kappa_quadratic)).map(|i| variants[i].variant.clone());
    let mut chosen_per_fold = Vec::new();
    let mut nested = vec![f64::NAN; all.len()];
    for f in 0..opts.folds {
        let train: Vec<usize> = all.iter().copied().filter(|&p| folds[p] != f).collect();
        let test: Vec<usize> = all.iter().copied().filter(|&p| folds[p] == f).collect();
        let mut inner = Vec::new();
        for sc in s {
            let k = out_of_sample(sc, it, &train, (opts.folds - 1).max(2), opts.seed)
                .ok()
                .and_then(|(p, _)| it.kappa(&train, &p));
            inner.push(k);
        }
        let pick = argmax(inner.into_iter()).unwrap_or(0);
        chosen_per_fold.push(candidates[pick].name.clone());
        let preds = predict(&s[pick], it, &train, &test, opts.seed)
            .map_err(stat_err("nested cross-validation"))?;
        test.iter().zip(preds).for_each(|(&p, v)| nested[p] = v);
    }
    let nested_kappa = it.kappa(&all, &nested);
    let nested_ci = interval_pair(all.len(), opts, |idx| {
        it.kappa(idx, &pick_values(&nested, idx))
    });
    Ok(CriterionChoice {
        criterion: it.lab.key.clone(),
        items: all.len(),
        folds: opts.folds,
        variants,
        best,
        chosen_per_fold,
        nested_kappa_quadratic: nested_kappa,
        nested_kappa_ci: nested_ci,
    })
}

fn pick_values(v: &[f64], idx: &[usize]) -> Vec<f64> {
    idx.iter().map(|&i| v[i]).collect()
}

fn score_row(
    c: &Candidate,
    sc: &Scores,
    it: &Items,
    preds: &[f64],
    methods: Option<String>,
    opts: &VetOptions,
) -> VariantScore {
    let all: Vec<usize> = (0..preds.len()).collect();
    let human: Vec<f64> = it.y.iter().map(|&y| it.target.values[y]).collect();
    VariantScore {
        variant: c.name.clone(),
        calibrated: matches!(sc, Scores::Fitted { .. }),
        methods,
        kappa_quadratic: it.kappa(&all, preds),
        kappa_quadratic_ci: interval_pair(all.len(), opts, |idx| {
            it.kappa(idx, &pick_values(preds, idx))
        }),
        spearman: spearman(preds, &human)
            .ok()
            .map(|c| c.coefficient)
            .filter(|v| v.is_finite()),
        mae: preds
            .iter()
            .zip(&human)
            .map(|(p, h)| (p - h).abs())
            .sum::<f64>()
            / preds.len() as f64,
    }
}

/// Index of the largest defined value (first on ties).
fn argmax(values: impl Iterator<Item = Option<f64>>) -> Option<usize> {
    let mut best: Option<(usize, f64)> = None;
    for (i, v) in values.enumerate() {
        if let Some(v) = v {
            if best.is_none_or(|(_, b)| v > b) {
                best = Some((i, v));
            }
        }
    }
    best.map(|b| b.0)
}

/// A calibrated variant's records on the labelled items, each from the fold model
/// that did not see it, for the detailed vetting tables; plus the methods per
/// criterion. With `isotonic_source`, only criteria that source graded are calibrated.
pub fn cross_fitted_records(
    table: &FeatureTable,
    isotonic_source: Option<&str>,
    labels: &[LabelRow],
    rubric: &Rubric,
    opts: &VetOptions,
) -> Result<(Vec<GradeRecord>, Vec<String>), VetError> {
    let mut records = Vec::new();
    let mut notes = Vec::new();
    for lab in &group_labels(labels, rubric)? {
        let keyed: Vec<(usize, &[f64])> = lab
            .items
            .iter()
            .enumerate()
            .filter_map(|(i, it)| {
                table
                    .rows
                    .get(&(it.question_id.clone(), it.system.clone()))
                    .map(|r| (i, r.as_slice()))
            })
            .collect();
        let rows: Vec<&[f64]> = keyed.iter().map(|k| k.1).collect();
        let y: Vec<usize> = keyed.iter().map(|k| lab.items[k.0].consensus).collect();
        let g: Vec<String> = keyed
            .iter()
            .map(|k| lab.items[k.0].question_id.clone())
            .collect();
        let iso = isotonic_source.and_then(|s| table.column(&format!("{s}/{}/expected", lab.key)));
        if isotonic_source.is_some() && iso.is_none() {
            continue;
        }
        let target = Target {
            values: lab.values.clone(),
        };
        let fitted = group_folds(&g, opts.folds, opts.seed).and_then(|f| {
            cross_fit(
                &Method::candidates(iso),
                &rows,
                &y,
                &g,
                &f,
                &target,
                opts.seed,
            )
        });
        match fitted {
            Ok(cf) => {
                notes.push(format!("`{}`: {}", lab.key, cf.methods()));
                for (k, p) in keyed.iter().zip(&cf.out_of_fold) {
                    let item = &lab.items[k.0];
                    records.push(calibrated_record(
                        &item.question_id,
                        &item.system,
                        &lab.key,
                        &lab.labels,
                        p,
                    ));
                }
            }
            Err(e) => notes.push(format!("`{}`: not calibrated ({e})", lab.key)),
        }
    }
    Ok((records, notes))
}

/// The calibration fitted on every labelled item, one mapping per criterion, to save
/// and apply to new runs; each carries the out-of-sample kappa that `choice` measured
/// for the variant named `variant`.
pub fn fit_mappings(
    table: &FeatureTable,
    isotonic_source: Option<&str>,
    labels: &[LabelRow],
    rubric: &Rubric,
    opts: &VetOptions,
    choice: &VariantChoice,
    variant: &str,
) -> Result<Vec<SavedMapping>, VetError> {
    let mut out = Vec::new();
    for lab in &group_labels(labels, rubric)? {
        let keyed: Vec<(&[f64], &LabelledItem)> = lab
            .items
            .iter()
            .filter_map(|it| {
                table
                    .rows
                    .get(&(it.question_id.clone(), it.system.clone()))
                    .map(|r| (r.as_slice(), it))
            })
            .collect();
        let rows: Vec<&[f64]> = keyed.iter().map(|k| k.0).collect();
        let y: Vec<usize> = keyed.iter().map(|k| k.1.consensus).collect();
        let g: Vec<String> = keyed.iter().map(|k| k.1.question_id.clone()).collect();
        let iso = isotonic_source.and_then(|s| table.column(&format!("{s}/{}/expected", lab.key)));
        if isotonic_source.is_some() && iso.is_none() {
            continue;
        }
        let target = Target {
            values: lab.values.clone(),
        };
        let calibrator =
            choose_and_fit(&Method::candidates(iso), &rows, &y, &g, &target, opts.seed)
                .map_err(stat_err(&format!("the calibration of `{}`", lab.key)))?;
        let oos = choice
            .criteria
            .iter()
            .find(|c| c.criterion == lab.key)
            .and_then(|c| c.variants.iter().find(|v| v.variant == variant))
            .and_then(|v| v.kappa_quadratic);
        out.push(SavedMapping {
            criterion: lab.key.clone(),
            scale: lab.labels.clone(),
            features: table.names.clone(),
            labelled_items: rows.len(),
            out_of_sample_kappa: oos,
            calibrator,
        });
    }
    Ok(out)
}
