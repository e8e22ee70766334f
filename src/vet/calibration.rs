//! Vetting stage: is the judge's confidence calibrated against the human consensus?
//! Input: one criterion's labelled items and a judge variant's probability rows
//! paired with them. Output: ECE (10 equal-width right-closed bins, and 10 equal-mass
//! bins), MCE, multi-class Brier (sum form), log loss, the reliability table, and
//! temperature scaling fitted with k-fold cross-validation (ECE and NLL before and
//! after). Never does I/O; the confidence is the top probability (first maximum) and
//! "correct" means the argmax label equals the consensus label (Guo et al. 2017).

use serde::Serialize;

use super::items::{CriterionLabels, Paired};
use super::{VetError, VetOptions};
use crate::stats::calibration::{
    brier_multiclass, calibration_error, confidence_and_correct, cross_validated_temperature,
    fit_temperature, log_loss, BinEdge, Binning, CrossValidatedCalibration, ReliabilityBin,
};

/// Bins for every calibration figure here (Naeini et al. 2015 used 10 equal-mass bins).
pub const BINS: usize = 10;

/// Temperature scaling (Guo et al. 2017) on the human sample.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TemperatureSummary {
    /// Temperature fitted on all labelled items (what one would apply going forward).
    pub fitted_on_all: f64,
    /// Held-out ECE/NLL before and after, each fold rescaled by a temperature fitted on the others.
    pub cross_validated: CrossValidatedCalibration,
}

/// Calibration of one variant's distributions on one criterion.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VariantCalibration {
    /// Variant name.
    pub variant: String,
    /// Items with both a distribution and a consensus label.
    pub n_items: usize,
    /// Share of items whose argmax label equals the consensus.
    pub accuracy: f64,
    /// Mean top probability.
    pub mean_confidence: f64,
    /// ECE with 10 equal-width bins ((m-1)/10, m/10] (Guo et al. 2017, eq. 3).
    pub ece_equal_width: f64,
    /// MCE over the equal-width bins.
    pub mce_equal_width: f64,
    /// ECE with 10 equal-mass bins (sorted by confidence, numpy `array_split` sizes).
    pub ece_equal_mass: f64,
    /// MCE over the equal-mass bins.
    pub mce_equal_mass: f64,
    /// Multi-class Brier score, sum form, range [0, 2] (Brier 1950).
    pub brier: f64,
    /// Mean negative log-probability of the consensus label (natural log).
    pub log_loss: f64,
    /// Reliability table of the equal-width bins (non-empty bins only).
    pub reliability: Vec<ReliabilityBin>,
    /// Temperature scaling; missing when there are fewer items than folds.
    pub temperature: Option<TemperatureSummary>,
    /// Why something is missing, when it is.
    pub note: Option<String>,
}

/// Equal-width binning used for the headline ECE.
pub const EQUAL_WIDTH: Binning = Binning::EqualWidth {
    bins: BINS,
    edge: BinEdge::RightClosed,
};

/// Calibration figures of one variant on the paired items.
pub(crate) fn calibration(
    lab: &CriterionLabels,
    paired: &[Paired],
    variant: &str,
    opts: &VetOptions,
) -> Result<VariantCalibration, VetError> {
    let stat = |what: &str, source| VetError::Stats {
        what: format!("{what} of `{variant}` on `{}`", lab.key),
        source,
    };
    let probs: Vec<Vec<f64>> = paired
        .iter()
        .map(|p| {
            p.judge
                .probs
                .clone()
                .expect("judge variants carry distributions")
        })
        .collect();
    let labels: Vec<usize> = paired.iter().map(|p| lab.items[p.item].consensus).collect();
    let (conf, correct) =
        confidence_and_correct(&probs, &labels).map_err(|e| stat("confidences", e))?;
    let n = conf.len() as f64;
    let width = calibration_error(&conf, &correct, EQUAL_WIDTH).map_err(|e| stat("ECE", e))?;
    let mass = calibration_error(&conf, &correct, Binning::EqualMass { bins: BINS })
        .map_err(|e| stat("equal-mass ECE", e))?;
    let (temperature, note) = if paired.len() < opts.folds {
        (
            None,
            Some(format!(
                "{} items are fewer than the {} cross-validation folds: no temperature scaling",
                paired.len(),
                opts.folds
            )),
        )
    } else {
        let fit = fit_temperature(&probs, &labels).map_err(|e| stat("temperature", e))?;
        let cv = cross_validated_temperature(&probs, &labels, opts.folds, EQUAL_WIDTH, opts.seed)
            .map_err(|e| stat("cross-validated temperature", e))?;
        (
            Some(TemperatureSummary {
                fitted_on_all: fit.temperature,
                cross_validated: cv,
            }),
            None,
        )
    };
    Ok(VariantCalibration {
        variant: variant.to_string(),
        n_items: paired.len(),
        accuracy: correct.iter().filter(|&&c| c).count() as f64 / n,
        mean_confidence: conf.iter().sum::<f64>() / n,
        ece_equal_width: width.ece,
        mce_equal_width: width.mce,
        ece_equal_mass: mass.ece,
        mce_equal_mass: mass.mce,
        brier: brier_multiclass(&probs, &labels).map_err(|e| stat("Brier score", e))?,
        log_loss: log_loss(&probs, &labels).map_err(|e| stat("log loss", e))?,
        reliability: width.bins,
        temperature,
        note,
    })
}
