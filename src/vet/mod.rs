//! Vetting stage: does the judge agree with humans as well as humans agree with each
//! other, per criterion, with what uncertainty, and is its confidence calibrated.
//! Input: judge `GradeRecord`s (one slice per variant: expected score, argmax, a
//! reasoning-first run, an overlap baseline...), human `LabelRow`s and the `Rubric`;
//! for pairwise judging, `PairRecord`s and human `PreferenceRow`s. Output: a
//! `VetReport` / `PairVetReport` (the JSON output format) and a plain-text rendering.
//! Never does I/O, never panics on data, and draws every random number from
//! `VetOptions::seed` through the seeded helpers of `stats`.
//!
//! Conventions, in one place:
//! - Human consensus of an item (question, system) on a criterion is the lower median
//!   scale position of its ratings (`judge::anchors::consensus_index`), so it is always
//!   a label on the scale; with two ratings it is the lower one.
//! - The judge's category is its argmax label (`Argmax`) or its expected score rounded
//!   to the nearest scale value, halves going down (`ExpectedScore`). Correlations,
//!   MAE and bias use the continuous judge value (expected score, or the argmax
//!   label's value) against the consensus label's value.
//! - `Baseline` variants (e.g. an overlap metric rescaled into `expected`) carry no
//!   distribution and no category: only Spearman, Kendall tau-b and Pearson, with a
//!   bootstrap interval for Spearman, are computed; no kappa, alpha, MAE, bias or
//!   calibration, because the baseline's numbers are not on the rubric scale.
//! - Kappa uses the full declared scale (weights from scale positions), so an unused
//!   middle label still counts (METHODS gotcha 1).
//! - Intervals: seeded bootstrap over items, percentile (type 7 quantiles) and BCa
//!   with the mid-rank bias correction (scipy's rule), because kappa replicates often
//!   tie with the estimate, where Efron's strict z0 is undefined. Replicates on which a
//!   statistic is undefined are counted (`skipped`) and left out.
//!
//! Trust rule (per criterion, primary variant = the first one): on the items with
//! both a judge verdict and human labels, `d = kappa_q(judge, consensus) - mean over
//! raters of kappa_q(rater, consensus of the other raters)`, with a paired percentile
//! bootstrap over items (the same resample feeds both terms). Verdict "yes" when the
//! interval's lower end exceeds `-margin` (non-inferior to a typical human), "no" when
//! its upper end is below 0 and it is not "yes", otherwise "cannot tell yet". The
//! judge's reference pools all raters while each human's pools one fewer, which
//! favours the judge a little; the card also shows the judge against the same
//! leave-one-out references the humans got, so a reader can see the size of that.

mod agreement;
mod calibration;
mod card;
mod ceiling;
mod items;
pub mod pair_rules;
mod pairwise;
mod text;
mod variants;

pub use agreement::{
    CategoricalAgreement, CorrelationSummary, IntervalPair, RaterKappa, ScoreError,
    VariantAgreement,
};
pub use calibration::{TemperatureSummary, VariantCalibration};
pub use card::{TrustCard, Verdict};
pub use ceiling::{HumanCeiling, RaterCeiling};
#[cfg(test)]
pub(crate) use items::nearest_position;
pub use pairwise::{
    judged_pairs, ranking_rule, rule_verdicts, vet_pair_inputs, vet_pairs, ChosenRule, JudgedPairs,
    MethodAgreement, PairCriterionReport, PairInputs, PairKey, PairVetReport, RankingRule,
};
pub use text::{choice_text, report_text};
pub use variants::{
    choose_variant, cross_fitted_records, fit_mappings, Candidate, CandidateSource,
    CriterionChoice, VariantChoice, VariantScore,
};

use serde::Serialize;

use crate::data::LabelRow;
use crate::judge::GradeRecord;
use crate::rubric::Rubric;
use crate::stats::StatsError;

/// Settings of a vetting run.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VetOptions {
    /// Bootstrap resamples per interval.
    pub resamples: usize,
    /// Seed of every random draw (bootstrap resamples, cross-validation folds).
    pub seed: u64,
    /// Interval coverage, e.g. 0.95.
    pub level: f64,
    /// Non-inferiority margin on quadratic kappa for the trust verdict.
    pub margin: f64,
    /// Cross-validation folds for temperature scaling.
    pub folds: usize,
}

impl Default for VetOptions {
    fn default() -> Self {
        VetOptions {
            resamples: 2000,
            seed: 0,
            level: 0.95,
            margin: 0.1,
            folds: 5,
        }
    }
}

/// How a variant's records are read.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum VariantKind {
    /// Category = expected score rounded to the nearest scale value; correlations use the expected score.
    ExpectedScore,
    /// Category = the most likely label; correlations use that label's value.
    Argmax,
    /// Continuous score in `expected` only (no distribution): rank and linear correlations only.
    Baseline,
}

/// One set of judge records to vet, under a display name.
#[derive(Debug, Clone)]
pub struct Variant<'a> {
    /// Display name, e.g. "expected score", "argmax", "reasoning-first", "rouge-l".
    pub name: String,
    /// The judge records.
    pub records: &'a [GradeRecord],
    /// How to read them.
    pub kind: VariantKind,
}

/// A variant as listed in the report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VariantInfo {
    /// Display name.
    pub name: String,
    /// How its records were read.
    pub kind: VariantKind,
    /// Number of judge records given.
    pub records: usize,
}

/// A criterion that was not vetted, and why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SkippedCriterion {
    /// Criterion key.
    pub criterion: String,
    /// Why it was left out, in plain words.
    pub reason: String,
}

/// Everything vetting found, per criterion.
#[derive(Debug, Clone, Serialize)]
pub struct VetReport {
    /// Rubric name.
    pub rubric: String,
    /// Settings used.
    pub options: VetOptions,
    /// Variants in the order given; the first is the primary one (trust cards, gates).
    pub variants: Vec<VariantInfo>,
    /// One report per vetted criterion, in rubric order.
    pub criteria: Vec<CriterionReport>,
    /// Rubric criteria with labels or judge records that could not be vetted.
    pub skipped: Vec<SkippedCriterion>,
}

/// Vetting results for one criterion.
#[derive(Debug, Clone, Serialize)]
pub struct CriterionReport {
    /// Criterion key.
    pub criterion: String,
    /// Scale labels, lowest first.
    pub scale: Vec<String>,
    /// Items (question, system) with at least one human rating.
    pub labelled_items: usize,
    /// Raters who scored this criterion, sorted.
    pub raters: Vec<String>,
    /// Judge against the human consensus, one entry per variant with overlapping items.
    pub variants: Vec<VariantAgreement>,
    /// How well humans agree with each other (leave-one-rater-out), over all labelled items.
    pub ceiling: HumanCeiling,
    /// Whether the primary variant can stand in for a human rater here.
    pub trust: TrustCard,
    /// Calibration of each variant that has score distributions.
    pub calibration: Vec<VariantCalibration>,
    /// Notes on variants left out or statistics that could not be computed.
    pub notes: Vec<String>,
}

/// Why vetting could not run.
#[derive(Debug, thiserror::Error)]
pub enum VetError {
    /// No judge variant was given.
    #[error("no judge records to vet")]
    NoVariants,
    /// The primary (first) variant has no categories, so no kappa or trust card.
    #[error(
        "the first variant `{name}` is a baseline without categories; put a judge variant first"
    )]
    PrimaryIsBaseline { name: String },
    /// A setting is out of range.
    #[error("invalid vetting option: {0}")]
    BadOptions(String),
    /// The label file has no rows.
    #[error("no human labels")]
    NoLabels,
    /// Label rows that cannot be used; all are listed.
    #[error("{} human label row(s) cannot be used:\n{}", problems.len(), crate::data::list(problems))]
    BadLabels { problems: Vec<String> },
    /// Human preference rows that cannot be used; all are listed.
    #[error("{} human preference row(s) cannot be used:\n{}", problems.len(), crate::data::list(problems))]
    BadPreferences { problems: Vec<String> },
    /// Judge records that cannot be used; all are listed.
    #[error("{} record(s) of variant `{variant}` cannot be used:\n{}", problems.len(), crate::data::list(problems))]
    BadRecords {
        variant: String,
        problems: Vec<String>,
    },
    /// The primary variant graded a labelled criterion but on none of the labelled items.
    #[error("criterion `{criterion}`: none of the {judged} items variant `{variant}` graded is among the {labelled} labelled items")]
    NoOverlap {
        criterion: String,
        variant: String,
        judged: usize,
        labelled: usize,
    },
    /// No criterion has both human labels and primary judge records.
    #[error("no criterion has both human labels ({}) and judge records ({})", labelled.join(", "), judged.join(", "))]
    NothingToVet {
        labelled: Vec<String>,
        judged: Vec<String>,
    },
    /// Pair records and human preferences share no (question, pair).
    #[error("none of the {judged} judged pairs is among the {preferred} pairs humans compared")]
    NoPairOverlap { judged: usize, preferred: usize },
    /// Pair records that cannot be used; all are listed.
    #[error("{} pair record(s) cannot be used:\n{}", problems.len(), crate::data::list(problems))]
    BadPairs { problems: Vec<String> },
    /// A statistic failed on input that passed the checks above.
    #[error("cannot compute {what}")]
    Stats {
        what: String,
        #[source]
        source: StatsError,
    },
}

/// The fix line for a vetting error, when one is known.
pub fn fix_for(err: &(dyn std::error::Error + 'static)) -> Option<String> {
    let e = err.downcast_ref::<VetError>()?;
    Some(match e {
        VetError::NoVariants => "pass the results of a grading run".into(),
        VetError::PrimaryIsBaseline { .. } => "list a judge variant before any baseline".into(),
        VetError::BadOptions(_) => {
            "use resamples >= 1, a level in (0, 1), a margin >= 0 and at least 2 folds".into()
        }
        VetError::NoLabels => "the labels file needs at least one row".into(),
        VetError::BadLabels { .. } => {
            "use criterion keys and scale labels of the rubric, one score per rater and item".into()
        }
        VetError::BadPreferences { .. } => {
            "give each rater one preference per pair, naming one of its two systems or `tie`".into()
        }
        VetError::BadRecords { .. } => {
            "grade again with the same rubric, or check the run folder".into()
        }
        VetError::NoOverlap { .. } | VetError::NoPairOverlap { .. } => {
            "grade the labelled items: question ids and system names must match the labels".into()
        }
        VetError::NothingToVet { .. } => {
            "grade at least one criterion that has human labels".into()
        }
        VetError::BadPairs { .. } => {
            "judge each pair in both orders with a valid verdict distribution".into()
        }
        VetError::Stats { .. } => return None,
    })
}

fn check_options(o: &VetOptions) -> Result<(), VetError> {
    let bad = |s: &str| Err(VetError::BadOptions(s.into()));
    if o.resamples == 0 {
        return bad("resamples must be at least 1");
    }
    if !(o.level > 0.0 && o.level < 1.0) {
        return bad("level must lie in (0, 1)");
    }
    if !(o.margin >= 0.0 && o.margin.is_finite()) {
        return bad("margin must be a finite number >= 0");
    }
    if o.folds < 2 {
        return bad("folds must be at least 2");
    }
    Ok(())
}

/// Vets every variant against the human labels, per rubric criterion.
pub fn vet(
    variants: &[Variant],
    labels: &[LabelRow],
    rubric: &Rubric,
    opts: &VetOptions,
) -> Result<VetReport, VetError> {
    check_options(opts)?;
    let primary = variants.first().ok_or(VetError::NoVariants)?;
    if primary.kind == VariantKind::Baseline {
        return Err(VetError::PrimaryIsBaseline {
            name: primary.name.clone(),
        });
    }
    let grouped = items::group_labels(labels, rubric)?;
    let judged: Vec<items::JudgeTable> = variants
        .iter()
        .map(|v| items::judge_table(v, rubric))
        .collect::<Result<_, _>>()?;
    let mut criteria = Vec::new();
    let mut skipped = Vec::new();
    for c in &rubric.criteria {
        let lab = grouped.iter().find(|g| g.key == c.key);
        let primary_count = judged[0].count(&c.key);
        let lab = match (lab, primary_count) {
            (Some(l), n) if n > 0 => l,
            (Some(_), _) => {
                skipped.push(skip(&c.key, "human labels but no judge records"));
                continue;
            }
            (None, n) if n > 0 => {
                skipped.push(skip(&c.key, "judge records but no human labels"));
                continue;
            }
            (None, _) => continue,
        };
        criteria.push(vet_criterion(lab, variants, &judged, opts)?);
    }
    if criteria.is_empty() {
        return Err(VetError::NothingToVet {
            labelled: grouped.iter().map(|g| format!("`{}`", g.key)).collect(),
            judged: judged[0]
                .criteria()
                .iter()
                .map(|k| format!("`{k}`"))
                .collect(),
        });
    }
    Ok(VetReport {
        rubric: rubric.name.clone(),
        options: opts.clone(),
        variants: variants
            .iter()
            .map(|v| VariantInfo {
                name: v.name.clone(),
                kind: v.kind,
                records: v.records.len(),
            })
            .collect(),
        criteria,
        skipped,
    })
}

fn skip(criterion: &str, reason: &str) -> SkippedCriterion {
    SkippedCriterion {
        criterion: criterion.to_string(),
        reason: reason.to_string(),
    }
}

fn vet_criterion(
    lab: &items::CriterionLabels,
    variants: &[Variant],
    judged: &[items::JudgeTable],
    opts: &VetOptions,
) -> Result<CriterionReport, VetError> {
    let mut notes = Vec::new();
    let mut agreements = Vec::new();
    let mut calibrations = Vec::new();
    let mut primary_pairs = Vec::new();
    for (i, (v, table)) in variants.iter().zip(judged).enumerate() {
        let paired = table.pair_with(lab);
        if paired.is_empty() {
            if i == 0 {
                return Err(VetError::NoOverlap {
                    criterion: lab.key.clone(),
                    variant: v.name.clone(),
                    judged: table.count(&lab.key),
                    labelled: lab.items.len(),
                });
            }
            notes.push(format!(
                "variant `{}` graded none of the labelled items on `{}`",
                v.name, lab.key
            ));
            continue;
        }
        agreements.push(agreement::agreement(lab, &paired, v, opts)?);
        if v.kind != VariantKind::Baseline {
            calibrations.push(calibration::calibration(lab, &paired, &v.name, opts)?);
        }
        if i == 0 {
            primary_pairs = paired;
        }
    }
    let ceiling = ceiling::ceiling(lab);
    let trust = card::trust_card(lab, &primary_pairs, &agreements[0], &ceiling, opts)?;
    Ok(CriterionReport {
        criterion: lab.key.clone(),
        scale: lab.labels.clone(),
        labelled_items: lab.items.len(),
        raters: lab.raters.clone(),
        variants: agreements,
        ceiling,
        trust,
        calibration: calibrations,
        notes,
    })
}

/// Criteria whose primary-variant quadratic kappa interval reaches below `min_kappa`
/// (percentile interval; a missing interval fails too), one plain line each.
pub fn gate_failures(r: &VetReport, min_kappa: f64) -> Vec<String> {
    let mut out = Vec::new();
    for c in &r.criteria {
        let ci = c
            .variants
            .first()
            .and_then(|v| v.categorical.as_ref())
            .and_then(|k| k.kappa_quadratic_ci.percentile.as_ref());
        match ci {
            Some(ci) if ci.lower >= min_kappa => {}
            Some(ci) => out.push(format!(
                "`{}`: quadratic kappa {:.3}, {:.0}% interval down to {:.3}, below the required {min_kappa:.3}",
                c.criterion,
                ci.estimate,
                ci.level * 100.0,
                ci.lower
            )),
            None => out.push(format!(
                "`{}`: no quadratic kappa interval could be computed, so it cannot be shown to reach {min_kappa:.3}",
                c.criterion
            )),
        }
    }
    out
}

#[cfg(test)]
mod demo_tests;
#[cfg(test)]
mod pair_tests;
#[cfg(test)]
mod tests;
#[cfg(test)]
mod trust_tests;
#[cfg(test)]
mod variant_tests;
