//! Vetting stage: the human ceiling, i.e. how well raters agree with each other.
//! Input: one criterion's labelled items (raters x items, missing allowed). Output:
//! each rater against the consensus of the other raters (leave-one-rater-out) as
//! quadratic kappa and Spearman, their means (the typical human), and Krippendorff's
//! ordinal alpha among all raters. Never does I/O and never compares a rater with a
//! consensus that includes that rater's own score.

use serde::Serialize;

use super::agreement::kappa;
use super::items::CriterionLabels;
use crate::judge::anchors::consensus_index;
use crate::stats::agreement::Weighting;
use crate::stats::correlation::spearman;
use crate::stats::krippendorff::{krippendorff_alpha, Level};

/// One rater against the consensus of the others.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RaterCeiling {
    /// Rater name.
    pub rater: String,
    /// Items this rater scored that at least one other rater also scored.
    pub n_items: usize,
    /// Quadratic kappa of the rater against the others' consensus (missing when undefined).
    pub kappa_quadratic: Option<f64>,
    /// Spearman's rho of the rater against the others' consensus.
    pub spearman: Option<f64>,
}

/// How well humans agree with each other on one criterion.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct HumanCeiling {
    /// Raters with at least one rating.
    pub n_raters: usize,
    /// Leave-one-rater-out agreement per rater.
    pub per_rater: Vec<RaterCeiling>,
    /// Mean over raters of the defined leave-one-out quadratic kappas: the typical human.
    pub mean_kappa_quadratic: Option<f64>,
    /// Mean over raters of the defined leave-one-out Spearman values.
    pub mean_spearman: Option<f64>,
    /// Krippendorff's ordinal alpha among all raters, missing ratings allowed.
    pub alpha_ordinal: Option<f64>,
    /// Why the ceiling is missing or partial, when it is.
    pub note: Option<String>,
}

/// `loo[item][rater]`: consensus of the other raters of the item, where this rater
/// rated it and at least one other did.
pub(crate) fn leave_one_out(lab: &CriterionLabels) -> Vec<Vec<Option<usize>>> {
    lab.items
        .iter()
        .map(|it| {
            (0..lab.raters.len())
                .map(|r| {
                    it.ratings[r]?;
                    let others: Vec<usize> = it
                        .ratings
                        .iter()
                        .enumerate()
                        .filter(|&(o, _)| o != r)
                        .filter_map(|(_, x)| *x)
                        .collect();
                    consensus_index(&others)
                })
                .collect()
        })
        .collect()
}

/// (rating, leave-one-out consensus) pairs of rater `r` over the listed items (repeats allowed).
pub(crate) fn rater_pairs(
    lab: &CriterionLabels,
    loo: &[Vec<Option<usize>>],
    r: usize,
    items: impl Iterator<Item = usize>,
) -> (Vec<usize>, Vec<usize>) {
    items
        .filter_map(|i| Some((lab.items[i].ratings[r]?, loo[i][r]?)))
        .unzip()
}

/// Mean over raters of the defined leave-one-out quadratic kappas on the listed items.
pub(crate) fn mean_loo_kappa(
    lab: &CriterionLabels,
    loo: &[Vec<Option<usize>>],
    items: &[usize],
) -> Option<f64> {
    let ks: Vec<f64> = (0..lab.raters.len())
        .filter_map(|r| {
            let (a, b) = rater_pairs(lab, loo, r, items.iter().copied());
            if a.is_empty() {
                return None;
            }
            kappa(&a, &b, lab.k(), Weighting::Quadratic)
        })
        .collect();
    mean(&ks)
}

fn mean(v: &[f64]) -> Option<f64> {
    if v.is_empty() {
        None
    } else {
        Some(v.iter().sum::<f64>() / v.len() as f64)
    }
}

/// The human ceiling over all labelled items of a criterion.
pub(crate) fn ceiling(lab: &CriterionLabels) -> HumanCeiling {
    let loo = leave_one_out(lab);
    let per_rater: Vec<RaterCeiling> = (0..lab.raters.len())
        .map(|r| {
            let (a, b) = rater_pairs(lab, &loo, r, 0..lab.items.len());
            let (av, bv): (Vec<f64>, Vec<f64>) = a
                .iter()
                .zip(&b)
                .map(|(&x, &y)| (lab.values[x], lab.values[y]))
                .unzip();
            RaterCeiling {
                rater: lab.raters[r].clone(),
                n_items: a.len(),
                kappa_quadratic: if a.is_empty() {
                    None
                } else {
                    kappa(&a, &b, lab.k(), Weighting::Quadratic)
                },
                spearman: spearman(&av, &bv)
                    .ok()
                    .map(|c| c.coefficient)
                    .filter(|v| v.is_finite()),
            }
        })
        .collect();
    let ks: Vec<f64> = per_rater.iter().filter_map(|r| r.kappa_quadratic).collect();
    let ss: Vec<f64> = per_rater.iter().filter_map(|r| r.spearman).collect();
    let units: Vec<Vec<Option<f64>>> = lab
        .items
        .iter()
        .map(|it| {
            it.ratings
                .iter()
                .map(|x| x.map(|p| lab.values[p]))
                .collect()
        })
        .collect();
    let alpha = krippendorff_alpha(&units, &lab.values, Level::Ordinal)
        .ok()
        .map(|a| a.alpha)
        .filter(|v| v.is_finite());
    let note = if lab.raters.len() < 2 {
        Some("only one rater: there is no human agreement to compare with".to_string())
    } else if ks.len() < per_rater.len() {
        Some(format!(
            "leave-one-out kappa is defined for {} of {} raters",
            ks.len(),
            per_rater.len()
        ))
    } else {
        None
    };
    HumanCeiling {
        n_raters: lab.raters.len(),
        per_rater,
        mean_kappa_quadratic: mean(&ks),
        mean_spearman: mean(&ss),
        alpha_ordinal: alpha,
        note,
    }
}
