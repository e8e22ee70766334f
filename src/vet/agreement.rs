//! Vetting stage: one variant against the human consensus on one criterion. Input:
//! the criterion's labelled items and the judge verdicts paired with them. Output:
//! agreement (exact, within one, Cohen kappa three ways, Krippendorff alpha three
//! ways, Gwet AC1/AC2), correlation (Spearman, Kendall tau-b, Pearson), error (MAE,
//! bias), the confusion matrix, kappa against each rater, and seeded bootstrap
//! intervals. Never does I/O; a statistic that is undefined on the data (e.g. kappa
//! when both sides use one label) is reported as missing, never as a made-up number.

use serde::Serialize;

use super::items::{CriterionLabels, Paired};
use super::{Variant, VariantKind, VetError, VetOptions};
use crate::stats::agreement::{
    cohen_kappa, confusion_matrix, exact_agreement, gwet_ac_two_raters, mean_absolute_error,
    mean_signed_bias, within_one_agreement, Weighting,
};
use crate::stats::bootstrap::{
    bca_interval, bootstrap_replicates, jackknife, percentile_interval, BiasCorrection,
    BootstrapInterval,
};
use crate::stats::correlation::{kendall_tau_b, pearson, spearman};
use crate::stats::krippendorff::{krippendorff_alpha, Level};

/// Percentile and BCa bootstrap intervals of one statistic.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct IntervalPair {
    /// Percentile interval (Efron & Tibshirani 1993, ch. 13), type-7 quantiles.
    pub percentile: Option<BootstrapInterval>,
    /// BCa interval (Efron 1987) with the mid-rank bias correction.
    pub bca: Option<BootstrapInterval>,
    /// Why an interval is missing, when one is.
    pub note: Option<String>,
}

/// Seeded percentile and BCa intervals of `stat` over `n` items (same resamples for both).
pub(crate) fn interval_pair<F>(n: usize, opts: &VetOptions, stat: F) -> IntervalPair
where
    F: Fn(&[usize]) -> Option<f64>,
{
    let all: Vec<usize> = (0..n).collect();
    let Some(estimate) = stat(&all).filter(|v| v.is_finite()) else {
        return IntervalPair {
            percentile: None,
            bca: None,
            note: Some("undefined on the full data".into()),
        };
    };
    let reps = match bootstrap_replicates(n, opts.resamples, opts.seed, &stat) {
        Ok(r) => r,
        Err(e) => return missing(format!("no bootstrap: {e}")),
    };
    let percentile = percentile_interval(&reps, estimate, opts.level);
    let bca = jackknife(n, &stat)
        .and_then(|jack| bca_interval(&reps, estimate, &jack, opts.level, BiasCorrection::MidRank));
    let note = match (&percentile, &bca) {
        (Err(e), _) => Some(format!("no interval: {e}")),
        (Ok(_), Err(e)) => Some(format!("no BCa interval: {e}")),
        _ => None,
    };
    IntervalPair {
        percentile: percentile.ok(),
        bca: bca.ok(),
        note,
    }
}

fn missing(note: String) -> IntervalPair {
    IntervalPair {
        percentile: None,
        bca: None,
        note: Some(note),
    }
}

/// Quadratic kappa of one rater against the judge.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RaterKappa {
    /// Rater name.
    pub rater: String,
    /// Items this rater scored that the judge also graded.
    pub n_items: usize,
    /// Quadratic-weighted kappa, rater against judge (missing when undefined).
    pub kappa_quadratic: Option<f64>,
}

/// Agreement on the scale's categories (judge variants only).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CategoricalAgreement {
    /// Share of items where judge and consensus give the same label.
    pub exact: f64,
    /// Share of items where they differ by at most one scale step.
    pub within_one: f64,
    /// Cohen's kappa, unweighted (Cohen 1960), over the full declared scale.
    pub kappa_unweighted: Option<f64>,
    /// Linear-weighted kappa (Cohen 1968).
    pub kappa_linear: Option<f64>,
    /// Quadratic-weighted kappa (Cohen 1968; Fleiss & Cohen 1973).
    pub kappa_quadratic: Option<f64>,
    /// Krippendorff's alpha, nominal, judge and consensus as two coders (Krippendorff 2011).
    pub alpha_nominal: Option<f64>,
    /// Krippendorff's alpha, ordinal (scale values as the domain).
    pub alpha_ordinal: Option<f64>,
    /// Krippendorff's alpha, interval.
    pub alpha_interval: Option<f64>,
    /// Gwet's AC1 (Gwet 2008).
    pub gwet_ac1: Option<f64>,
    /// Gwet's AC2 with quadratic weights.
    pub gwet_ac2_quadratic: Option<f64>,
    /// Counts with rows = human consensus label, columns = judge label, in scale order.
    pub confusion: Vec<Vec<usize>>,
    /// Bootstrap intervals of the quadratic kappa.
    pub kappa_quadratic_ci: IntervalPair,
    /// Bootstrap intervals of the unweighted kappa.
    pub kappa_unweighted_ci: IntervalPair,
    /// Quadratic kappa of the judge against each rater separately.
    pub per_rater: Vec<RaterKappa>,
}

/// Correlation of the judge's continuous score with the consensus label's value.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CorrelationSummary {
    /// Spearman's rho (average ranks for ties).
    pub spearman: Option<f64>,
    /// Kendall's tau-b.
    pub kendall_tau_b: Option<f64>,
    /// Pearson's r.
    pub pearson: Option<f64>,
    /// Bootstrap intervals of Spearman's rho.
    pub spearman_ci: IntervalPair,
}

/// Size and direction of score errors, in scale units (judge variants only).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ScoreError {
    /// Mean absolute difference between judge score and consensus value.
    pub mae: f64,
    /// Mean of judge minus consensus: positive means the judge is more lenient.
    pub mean_signed_bias: f64,
    /// Bootstrap intervals of the MAE.
    pub mae_ci: IntervalPair,
}

/// One variant against the human consensus on one criterion.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VariantAgreement {
    /// Variant name.
    pub variant: String,
    /// How its records were read.
    pub kind: VariantKind,
    /// Items with both a judge verdict and at least one human rating.
    pub n_items: usize,
    /// Bootstrap resamples behind every interval.
    pub resamples: usize,
    /// Category agreement; missing for baselines.
    pub categorical: Option<CategoricalAgreement>,
    /// Correlations.
    pub correlation: CorrelationSummary,
    /// Error and bias; missing for baselines (their scores are not on the rubric scale).
    pub error: Option<ScoreError>,
    /// Statistics that could not be computed, and why.
    pub notes: Vec<String>,
}

/// Cohen's kappa of two index lists over `k` categories, `None` when undefined.
pub(crate) fn kappa(a: &[usize], b: &[usize], k: usize, w: Weighting) -> Option<f64> {
    cohen_kappa(a, b, k, w)
        .ok()
        .map(|e| e.kappa)
        .filter(|v| v.is_finite())
}

fn pick<T: Copy>(v: &[T], idx: &[usize]) -> Vec<T> {
    idx.iter().map(|&i| v[i]).collect()
}

/// Computes every statistic of one variant on the paired items.
pub(crate) fn agreement(
    lab: &CriterionLabels,
    paired: &[Paired],
    variant: &Variant,
    opts: &VetOptions,
) -> Result<VariantAgreement, VetError> {
    let n = paired.len();
    let human: Vec<usize> = paired.iter().map(|p| lab.items[p.item].consensus).collect();
    let human_v: Vec<f64> = human.iter().map(|&h| lab.values[h]).collect();
    let judge_v: Vec<f64> = paired.iter().map(|p| p.judge.score).collect();
    let mut notes = Vec::new();
    let mut opt = |name: &str, r: Result<f64, crate::stats::StatsError>| match r {
        Ok(v) if v.is_finite() => Some(v),
        Ok(_) => {
            notes.push(format!("{name} is not finite"));
            None
        }
        Err(e) => {
            notes.push(format!("{name}: {e}"));
            None
        }
    };
    let spearman_v = opt(
        "spearman",
        spearman(&judge_v, &human_v).map(|c| c.coefficient),
    );
    let kendall_v = opt(
        "kendall tau-b",
        kendall_tau_b(&judge_v, &human_v).map(|c| c.coefficient),
    );
    let pearson_v = opt(
        "pearson",
        pearson(&judge_v, &human_v).map(|c| c.coefficient),
    );
    let correlation = CorrelationSummary {
        spearman: spearman_v,
        kendall_tau_b: kendall_v,
        pearson: pearson_v,
        spearman_ci: interval_pair(n, opts, |idx| {
            spearman(&pick(&judge_v, idx), &pick(&human_v, idx))
                .ok()
                .map(|c| c.coefficient)
        }),
    };
    let (categorical, error) = if variant.kind == VariantKind::Baseline {
        (None, None)
    } else {
        let judge: Vec<usize> = paired
            .iter()
            .map(|p| {
                p.judge
                    .category
                    .expect("judge variants always carry a category")
            })
            .collect();
        let stat = |what: &str, source| VetError::Stats {
            what: format!("{what} of `{}` on `{}`", variant.name, lab.key),
            source,
        };
        let k = lab.k();
        let mut alpha = |level: Level, name: &str| {
            let units: Vec<Vec<Option<f64>>> = judge
                .iter()
                .zip(&human)
                .map(|(&j, &h)| vec![Some(lab.values[j]), Some(lab.values[h])])
                .collect();
            opt(
                name,
                krippendorff_alpha(&units, &lab.values, level).map(|a| a.alpha),
            )
        };
        let alpha_nominal = alpha(Level::Nominal, "alpha nominal");
        let alpha_ordinal = alpha(Level::Ordinal, "alpha ordinal");
        let alpha_interval = alpha(Level::Interval, "alpha interval");
        let gwet = |w| {
            gwet_ac_two_raters(&human, &judge, k, w)
                .ok()
                .map(|g| g.coefficient)
                .filter(|v| v.is_finite())
        };
        let per_rater = lab
            .raters
            .iter()
            .enumerate()
            .map(|(r, name)| {
                let (a, b): (Vec<usize>, Vec<usize>) = paired
                    .iter()
                    .zip(&judge)
                    .filter_map(|(p, &j)| lab.items[p.item].ratings[r].map(|h| (h, j)))
                    .unzip();
                RaterKappa {
                    rater: name.clone(),
                    n_items: a.len(),
                    kappa_quadratic: if a.is_empty() {
                        None
                    } else {
                        kappa(&a, &b, k, Weighting::Quadratic)
                    },
                }
            })
            .collect();
        let boot_kappa = |w| {
            interval_pair(n, opts, |idx| {
                kappa(&pick(&human, idx), &pick(&judge, idx), k, w)
            })
        };
        let cat = CategoricalAgreement {
            exact: exact_agreement(&human, &judge).map_err(|e| stat("exact agreement", e))?,
            within_one: within_one_agreement(&human, &judge)
                .map_err(|e| stat("within-one agreement", e))?,
            kappa_unweighted: kappa(&human, &judge, k, Weighting::Unweighted),
            kappa_linear: kappa(&human, &judge, k, Weighting::Linear),
            kappa_quadratic: kappa(&human, &judge, k, Weighting::Quadratic),
            alpha_nominal,
            alpha_ordinal,
            alpha_interval,
            gwet_ac1: gwet(Weighting::Unweighted),
            gwet_ac2_quadratic: gwet(Weighting::Quadratic),
            confusion: confusion_matrix(&human, &judge, k)
                .map_err(|e| stat("confusion matrix", e))?,
            kappa_quadratic_ci: boot_kappa(Weighting::Quadratic),
            kappa_unweighted_ci: boot_kappa(Weighting::Unweighted),
            per_rater,
        };
        let err = ScoreError {
            mae: mean_absolute_error(&judge_v, &human_v).map_err(|e| stat("MAE", e))?,
            mean_signed_bias: mean_signed_bias(&judge_v, &human_v).map_err(|e| stat("bias", e))?,
            mae_ci: interval_pair(n, opts, |idx| {
                mean_absolute_error(&pick(&judge_v, idx), &pick(&human_v, idx)).ok()
            }),
        };
        (Some(cat), Some(err))
    };
    if let Some(c) = &categorical {
        if c.kappa_quadratic.is_none() {
            notes.push(
                "quadratic kappa is undefined: judge and humans both use a single label".into(),
            );
        }
    }
    Ok(VariantAgreement {
        variant: variant.name.clone(),
        kind: variant.kind,
        n_items: n,
        resamples: opts.resamples,
        categorical,
        correlation,
        error,
        notes,
    })
}
