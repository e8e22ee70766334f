//! Statistics stage: how well the judge's stated confidence matches how often it is
//! right. Input: per-item confidences with correctness, or per-item probability rows
//! over the score scale with the human label. Output: ECE, MCE, reliability rows,
//! Brier score, log loss, and a fitted softmax temperature with its cross-validated
//! effect. Never does I/O, and every random draw (fold assignment) comes from the seed
//! it is handed.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::stats::StatsError;

/// Probabilities below this are raised to it before a logarithm, so a zero on the true
/// label gives a large finite loss rather than infinity (machine epsilon, as scikit-learn).
pub const PROB_FLOOR: f64 = f64::EPSILON;

/// Which end of an equal-width bin is closed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum BinEdge {
    /// Bins `((m-1)/M, m/M]`, as Guo et al. (2017) define them; confidence 0 joins the first bin.
    RightClosed,
    /// Bins `[(m-1)/M, m/M)`; confidence 1 joins the last bin.
    LeftClosed,
}

/// How confidences are grouped into bins.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Binning {
    /// `bins` equal-width intervals on [0, 1].
    EqualWidth { bins: usize, edge: BinEdge },
    /// `bins` groups of (nearly) equal size after sorting by confidence: the first
    /// `n % bins` groups hold one extra item, as numpy `array_split` does (Naeini et al. 2015).
    EqualMass { bins: usize },
}

/// One row of a reliability table (only non-empty bins are listed).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReliabilityBin {
    /// Lower bin edge (equal-mass: smallest confidence in the bin).
    pub lo: f64,
    /// Upper bin edge (equal-mass: largest confidence in the bin).
    pub hi: f64,
    /// Items in the bin.
    pub count: usize,
    /// Share of items in the bin that were correct.
    pub accuracy: f64,
    /// Mean stated confidence of items in the bin.
    pub mean_confidence: f64,
}

/// Expected and maximum calibration error with the table they come from.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CalibrationError {
    /// ECE = sum_m |B_m|/n |acc(B_m) - conf(B_m)| (Guo et al. 2017, eq. 3).
    pub ece: f64,
    /// MCE = max_m |acc(B_m) - conf(B_m)| over non-empty bins.
    pub mce: f64,
    /// Reliability rows, in increasing confidence.
    pub bins: Vec<ReliabilityBin>,
}

/// ECE, MCE and the reliability table of confidences against correctness.
pub fn calibration_error(
    confidence: &[f64],
    correct: &[bool],
    binning: Binning,
) -> Result<CalibrationError, StatsError> {
    if confidence.len() != correct.len() {
        return Err(StatsError::LengthMismatch {
            left: confidence.len(),
            right: correct.len(),
        });
    }
    if confidence.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    if let Some(bad) = confidence.iter().find(|c| !(0.0..=1.0).contains(*c)) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a confidence in [0, 1]".into(),
        });
    }
    let groups: Vec<(f64, f64, Vec<usize>)> = match binning {
        Binning::EqualWidth { bins, edge } => equal_width_groups(confidence, bins, edge)?,
        Binning::EqualMass { bins } => equal_mass_groups(confidence, bins)?,
    };
    let n = confidence.len() as f64;
    let (mut ece, mut mce, mut rows) = (0.0, 0.0f64, Vec::new());
    for (lo, hi, members) in groups.into_iter().filter(|g| !g.2.is_empty()) {
        let count = members.len();
        let accuracy = members.iter().filter(|&&i| correct[i]).count() as f64 / count as f64;
        let mean_confidence = members.iter().map(|&i| confidence[i]).sum::<f64>() / count as f64;
        let gap = (accuracy - mean_confidence).abs();
        ece += count as f64 / n * gap;
        mce = mce.max(gap);
        rows.push(ReliabilityBin {
            lo,
            hi,
            count,
            accuracy,
            mean_confidence,
        });
    }
    Ok(CalibrationError {
        ece,
        mce,
        bins: rows,
    })
}

/// Expected calibration error alone.
pub fn expected_calibration_error(
    confidence: &[f64],
    correct: &[bool],
    binning: Binning,
) -> Result<f64, StatsError> {
    Ok(calibration_error(confidence, correct, binning)?.ece)
}

fn check_bins(bins: usize) -> Result<(), StatsError> {
    if bins == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    Ok(())
}

fn equal_width_groups(
    conf: &[f64],
    bins: usize,
    edge: BinEdge,
) -> Result<Vec<(f64, f64, Vec<usize>)>, StatsError> {
    check_bins(bins)?;
    // Edges m/M are correctly rounded, so a confidence written as 0.7 sits exactly on edge 7/10.
    let edges: Vec<f64> = (0..=bins).map(|m| m as f64 / bins as f64).collect();
    let mut groups: Vec<(f64, f64, Vec<usize>)> = (0..bins)
        .map(|m| (edges[m], edges[m + 1], Vec::new()))
        .collect();
    for (i, &c) in conf.iter().enumerate() {
        let m = match edge {
            BinEdge::RightClosed => edges.partition_point(|&e| e < c).saturating_sub(1),
            BinEdge::LeftClosed => edges
                .partition_point(|&e| e <= c)
                .saturating_sub(1)
                .min(bins - 1),
        };
        groups[m].2.push(i);
    }
    Ok(groups)
}

fn equal_mass_groups(conf: &[f64], bins: usize) -> Result<Vec<(f64, f64, Vec<usize>)>, StatsError> {
    check_bins(bins)?;
    let mut order: Vec<usize> = (0..conf.len()).collect();
    order.sort_by(|&a, &b| conf[a].total_cmp(&conf[b])); // stable: ties keep input order
    let (base, extra) = (conf.len() / bins, conf.len() % bins);
    let mut groups = Vec::with_capacity(bins);
    let mut start = 0;
    for m in 0..bins {
        let size = base + usize::from(m < extra);
        let members: Vec<usize> = order[start..start + size].to_vec();
        let lo = members.first().map_or(f64::NAN, |&i| conf[i]);
        let hi = members.last().map_or(f64::NAN, |&i| conf[i]);
        groups.push((lo, hi, members));
        start += size;
    }
    Ok(groups)
}

/// Binary Brier score `mean (p - y)^2` (Brier 1950), range [0, 1]: half the two-class sum form.
pub fn brier_binary(prob: &[f64], outcome: &[bool]) -> Result<f64, StatsError> {
    if prob.len() != outcome.len() {
        return Err(StatsError::LengthMismatch {
            left: prob.len(),
            right: outcome.len(),
        });
    }
    if prob.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    if let Some(bad) = prob.iter().find(|p| !(0.0..=1.0).contains(*p)) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a probability in [0, 1]".into(),
        });
    }
    let sum: f64 = prob
        .iter()
        .zip(outcome)
        .map(|(p, &y)| (p - if y { 1.0 } else { 0.0 }).powi(2))
        .sum();
    Ok(sum / prob.len() as f64)
}

/// Checks probability rows against labels; returns the number of classes.
fn check_rows(probs: &[Vec<f64>], labels: &[usize]) -> Result<usize, StatsError> {
    if probs.len() != labels.len() {
        return Err(StatsError::LengthMismatch {
            left: probs.len(),
            right: labels.len(),
        });
    }
    let k = probs
        .first()
        .ok_or(StatsError::TooFew { needed: 1, got: 0 })?
        .len();
    for row in probs {
        check_row(row)?;
        if row.len() != k {
            return Err(StatsError::LengthMismatch {
                left: k,
                right: row.len(),
            });
        }
    }
    if let Some(bad) = labels.iter().find(|&&y| y >= k) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: format!("class index 0..{k}"),
        });
    }
    Ok(k)
}

fn check_row(row: &[f64]) -> Result<(), StatsError> {
    if row.len() < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: row.len(),
        });
    }
    if let Some(bad) = row.iter().find(|p| !(0.0..=1.0).contains(*p)) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a probability in [0, 1]".into(),
        });
    }
    let sum: f64 = row.iter().sum();
    if (sum - 1.0).abs() > 1e-6 {
        return Err(StatsError::OutOfRange {
            value: sum.to_string(),
            allowed: "a row summing to 1".into(),
        });
    }
    Ok(())
}

/// Multi-class Brier score in the sum form `(1/N) sum_i sum_k (p_ik - y_ik)^2` (Brier 1950), range [0, 2].
pub fn brier_multiclass(probs: &[Vec<f64>], labels: &[usize]) -> Result<f64, StatsError> {
    check_rows(probs, labels)?;
    let sum: f64 = probs
        .iter()
        .zip(labels)
        .map(|(row, &y)| {
            row.iter()
                .enumerate()
                .map(|(k, p)| (p - if k == y { 1.0 } else { 0.0 }).powi(2))
                .sum::<f64>()
        })
        .sum();
    Ok(sum / probs.len() as f64)
}

/// Mean negative log-probability of the true label (natural log), floored at [`PROB_FLOOR`].
pub fn log_loss(probs: &[Vec<f64>], labels: &[usize]) -> Result<f64, StatsError> {
    check_rows(probs, labels)?;
    let sum: f64 = probs
        .iter()
        .zip(labels)
        .map(|(row, &y)| -row[y].max(PROB_FLOOR).ln())
        .sum();
    Ok(sum / probs.len() as f64)
}

/// The predicted class of a distribution and its probability.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TopPrediction {
    /// Index of the most probable class; ties go to the first (lowest) index.
    pub class: usize,
    /// Probability of that class, used as the confidence.
    pub confidence: f64,
}

/// Prediction and confidence of one distribution: argmax with first-max tie-break.
pub fn top_prediction(row: &[f64]) -> Result<TopPrediction, StatsError> {
    check_row(row)?;
    let mut best = 0;
    for (k, &p) in row.iter().enumerate() {
        if p > row[best] {
            best = k; // strict `>` keeps the first of tied maxima
        }
    }
    Ok(TopPrediction {
        class: best,
        confidence: row[best],
    })
}

/// Confidence and correctness per item, ready for [`calibration_error`].
pub fn confidence_and_correct(
    probs: &[Vec<f64>],
    labels: &[usize],
) -> Result<(Vec<f64>, Vec<bool>), StatsError> {
    check_rows(probs, labels)?;
    let mut conf = Vec::with_capacity(probs.len());
    let mut correct = Vec::with_capacity(probs.len());
    for (row, &y) in probs.iter().zip(labels) {
        let top = top_prediction(row)?;
        conf.push(top.confidence);
        correct.push(top.class == y);
    }
    Ok((conf, correct))
}

/// `softmax(ln p / T)` of one row, computed stably in log space.
fn scaled_log_probs(row: &[f64], t: f64) -> Vec<f64> {
    let z: Vec<f64> = row.iter().map(|p| p.max(PROB_FLOOR).ln() / t).collect();
    let max = z.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let lse = max + z.iter().map(|v| (v - max).exp()).sum::<f64>().ln();
    z.iter().map(|v| v - lse).collect()
}

fn check_temperature(t: f64) -> Result<(), StatsError> {
    if !(t.is_finite() && t > 0.0) {
        return Err(StatsError::OutOfRange {
            value: t.to_string(),
            allowed: "a temperature > 0".into(),
        });
    }
    Ok(())
}

/// Rescales every row to `softmax(ln p / T)` (temperature scaling, Guo et al. 2017).
pub fn apply_temperature(
    probs: &[Vec<f64>],
    temperature: f64,
) -> Result<Vec<Vec<f64>>, StatsError> {
    check_temperature(temperature)?;
    probs
        .iter()
        .map(|row| {
            check_row(row)?;
            Ok(scaled_log_probs(row, temperature)
                .into_iter()
                .map(f64::exp)
                .collect())
        })
        .collect()
}

fn nll_at(probs: &[Vec<f64>], labels: &[usize], items: &[usize], t: f64) -> f64 {
    items
        .iter()
        .map(|&i| -scaled_log_probs(&probs[i], t)[labels[i]])
        .sum::<f64>()
        / items.len() as f64
}

/// A fitted temperature and the negative log-likelihood before and after it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TemperatureFit {
    /// Fitted temperature T > 0 (above 1 softens an overconfident judge).
    pub temperature: f64,
    /// Mean NLL at T = 1.
    pub nll_before: f64,
    /// Mean NLL at the fitted T (never above `nll_before`).
    pub nll_after: f64,
}

/// Search range for ln T: T in [0.01, 100] covers any plausible judge.
const LOG_T_RANGE: (f64, f64) = (-4.605170185988091, 4.605170185988092);

/// Fits T minimising mean NLL of `softmax(ln p / T)` by golden-section search on ln T.
///
/// NLL is convex in 1/T (a log-sum-exp of linear functions), hence unimodal in ln T, so
/// golden-section search (Kiefer 1953) finds the minimum; T = 1 is kept if it is better.
pub fn fit_temperature(probs: &[Vec<f64>], labels: &[usize]) -> Result<TemperatureFit, StatsError> {
    check_rows(probs, labels)?;
    let items: Vec<usize> = (0..probs.len()).collect();
    Ok(fit_on(probs, labels, &items))
}

fn fit_on(probs: &[Vec<f64>], labels: &[usize], items: &[usize]) -> TemperatureFit {
    let f = |u: f64| nll_at(probs, labels, items, u.exp());
    let inv_phi = (5f64.sqrt() - 1.0) / 2.0;
    let (mut a, mut b) = LOG_T_RANGE;
    let (mut c, mut d) = (b - inv_phi * (b - a), a + inv_phi * (b - a));
    let (mut fc, mut fd) = (f(c), f(d));
    while b - a > 1e-9 {
        if fc <= fd {
            (b, d, fd) = (d, c, fc);
            c = b - inv_phi * (b - a);
            fc = f(c);
        } else {
            (a, c, fc) = (c, d, fd);
            d = a + inv_phi * (b - a);
            fd = f(d);
        }
    }
    let u = (a + b) / 2.0;
    let (nll_before, nll_fit) = (f(0.0), f(u));
    if nll_fit <= nll_before {
        TemperatureFit {
            temperature: u.exp(),
            nll_before,
            nll_after: nll_fit,
        }
    } else {
        TemperatureFit {
            temperature: 1.0,
            nll_before,
            nll_after: nll_before,
        }
    }
}

/// Held-out effect of temperature scaling under k-fold cross-validation.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CrossValidatedCalibration {
    /// Number of folds.
    pub folds: usize,
    /// Temperature fitted on the other folds, one per held-out fold.
    pub temperatures: Vec<f64>,
    /// ECE of the raw distributions over all items.
    pub ece_before: f64,
    /// ECE with each item rescaled by the temperature fitted without its fold.
    pub ece_after: f64,
    /// Mean NLL of the raw distributions.
    pub nll_before: f64,
    /// Mean held-out NLL after rescaling.
    pub nll_after: f64,
}

/// K-fold cross-validated ECE and NLL before and after temperature scaling.
///
/// Folds: the items are shuffled by a ChaCha8 generator seeded with `seed`, and the
/// item at shuffled position `i` goes to fold `i % folds`, so the split is reproducible.
pub fn cross_validated_temperature(
    probs: &[Vec<f64>],
    labels: &[usize],
    folds: usize,
    binning: Binning,
    seed: u64,
) -> Result<CrossValidatedCalibration, StatsError> {
    check_rows(probs, labels)?;
    if folds < 2 || probs.len() < folds {
        return Err(StatsError::TooFew {
            needed: folds.max(2),
            got: probs.len().min(folds),
        });
    }
    let mut order: Vec<usize> = (0..probs.len()).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    let mut fold_of = vec![0usize; probs.len()];
    for (pos, &item) in order.iter().enumerate() {
        fold_of[item] = pos % folds;
    }
    let mut calibrated = probs.to_vec();
    let mut temperatures = Vec::with_capacity(folds);
    for f in 0..folds {
        let train: Vec<usize> = (0..probs.len()).filter(|&i| fold_of[i] != f).collect();
        let t = fit_on(probs, labels, &train).temperature;
        temperatures.push(t);
        for i in (0..probs.len()).filter(|&i| fold_of[i] == f) {
            calibrated[i] = scaled_log_probs(&probs[i], t)
                .into_iter()
                .map(f64::exp)
                .collect();
        }
    }
    let (conf0, ok0) = confidence_and_correct(probs, labels)?;
    let (conf1, ok1) = confidence_and_correct(&calibrated, labels)?;
    Ok(CrossValidatedCalibration {
        folds,
        temperatures,
        ece_before: expected_calibration_error(&conf0, &ok0, binning)?,
        ece_after: expected_calibration_error(&conf1, &ok1, binning)?,
        nll_before: log_loss(probs, labels)?,
        nll_after: log_loss(&calibrated, labels)?,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::Rng;

    fn close(got: f64, want: f64, tol: f64) {
        assert!(
            (got - want).abs() <= tol,
            "got {got}, want {want} (tol {tol})"
        );
    }

    const CONF: [f64; 10] = [0.95, 0.85, 0.75, 0.65, 0.55, 0.92, 0.81, 0.63, 0.58, 0.99];
    const CORRECT: [u8; 10] = [1, 1, 0, 1, 0, 1, 0, 1, 1, 1];

    fn correct() -> Vec<bool> {
        CORRECT.iter().map(|&c| c == 1).collect()
    }

    const RIGHT10: Binning = Binning::EqualWidth {
        bins: 10,
        edge: BinEdge::RightClosed,
    };

    fn multi() -> (Vec<Vec<f64>>, Vec<usize>) {
        let p = vec![
            vec![0.05, 0.10, 0.62, 0.18, 0.05],
            vec![0.0, 0.05, 0.17, 0.30, 0.48],
            vec![0.71, 0.19, 0.05, 0.05, 0.0],
            vec![0.10, 0.42, 0.38, 0.05, 0.05],
        ];
        (p, vec![2, 3, 0, 2]) // labels 3,4,1,3 on the 1..5 scale
    }

    /// METHODS 6: binary example, M=10 right-closed: ECE 0.24 with bins 6:(2,0.5,0.565)
    /// 7:(2,1.0,0.64) 8:(1,0,0.75) 9:(2,0.5,0.83) 10:(3,1.0,0.9533) [lib].
    #[test]
    fn ece_ten_right_closed_bins_matches_reference() {
        let c = calibration_error(&CONF, &correct(), RIGHT10).expect("valid");
        close(c.ece, 0.24, 1e-12);
        let counts: Vec<usize> = c.bins.iter().map(|b| b.count).collect();
        assert_eq!(counts, vec![2, 2, 1, 2, 3]);
        close(c.bins[0].lo, 0.5, 1e-15);
        close(c.bins[0].hi, 0.6, 1e-15);
        close(c.bins[0].accuracy, 0.5, 1e-12);
        close(c.bins[0].mean_confidence, 0.565, 1e-12);
        close(c.bins[1].mean_confidence, 0.64, 1e-12);
        close(c.bins[3].mean_confidence, 0.83, 1e-12);
        close(c.bins[4].mean_confidence, 0.9533333333333333, 1e-12);
        // MCE: the largest gap is bin 8, |0 - 0.75|.
        close(c.mce, 0.75, 1e-12);
    }

    /// METHODS 6: binary example, M=5: ECE 0.06799999999999992 [lib].
    #[test]
    fn ece_five_bins_matches_reference() {
        let b = Binning::EqualWidth {
            bins: 5,
            edge: BinEdge::RightClosed,
        };
        close(
            expected_calibration_error(&CONF, &correct(), b).expect("valid"),
            0.06799999999999992,
            1e-12,
        );
    }

    /// METHODS 6: binary example, 5 equal-mass bins (sorted, numpy `array_split`): ECE 0.27 [lib].
    #[test]
    fn ece_equal_mass_bins_matches_reference() {
        let b = Binning::EqualMass { bins: 5 };
        close(
            expected_calibration_error(&CONF, &correct(), b).expect("valid"),
            0.27,
            1e-12,
        );
    }

    /// METHODS 6: conf [0.65,0.70,0.75], correct [1,0,0], M=10: right-closed
    /// 0.3666666666666667, left-closed [lo,hi) 0.6 [lib].
    #[test]
    fn bin_edge_convention_decides_where_0_7_falls() {
        let (c, ok) = ([0.65, 0.70, 0.75], [true, false, false]);
        close(
            expected_calibration_error(&c, &ok, RIGHT10).expect("valid"),
            0.3666666666666667,
            1e-12,
        );
        let left = Binning::EqualWidth {
            bins: 10,
            edge: BinEdge::LeftClosed,
        };
        close(
            expected_calibration_error(&c, &ok, left).expect("valid"),
            0.6,
            1e-12,
        );
    }

    /// METHODS 6: Brier of conf vs correct 0.19884000000000002 [lib] sklearn = hand; and
    /// y=[1,0,1,1], p=[.9,.2,.6,.4]: binary 0.14250000000000002, two-class sum form
    /// 0.28500000000000003 [lib].
    #[test]
    fn brier_binary_and_sum_forms_match_reference() {
        close(
            brier_binary(&CONF, &correct()).expect("valid"),
            0.19884000000000002,
            1e-12,
        );
        let (p, y) = ([0.9, 0.2, 0.6, 0.4], [true, false, true, true]);
        close(
            brier_binary(&p, &y).expect("valid"),
            0.14250000000000002,
            1e-12,
        );
        let rows: Vec<Vec<f64>> = p.iter().map(|&q| vec![1.0 - q, q]).collect();
        let labels: Vec<usize> = y.iter().map(|&b| usize::from(b)).collect();
        close(
            brier_multiclass(&rows, &labels).expect("valid"),
            0.28500000000000003,
            1e-12,
        );
    }

    /// METHODS 6: multi-class example: pred [3,5,1,2], conf [.62,.48,.71,.42], correct
    /// [1,0,1,0]; ECE(M=10) 0.39249999999999996; Brier (sum) 0.41114999999999996; log loss
    /// 0.7480207351193543 [lib].
    #[test]
    fn multiclass_calibration_matches_reference() {
        let (p, y) = multi();
        let preds: Vec<usize> = p
            .iter()
            .map(|r| top_prediction(r).expect("valid").class)
            .collect();
        assert_eq!(preds, vec![2, 4, 0, 1]);
        let (conf, ok) = confidence_and_correct(&p, &y).expect("valid");
        assert_eq!(conf, vec![0.62, 0.48, 0.71, 0.42]);
        assert_eq!(ok, vec![true, false, true, false]);
        close(
            expected_calibration_error(&conf, &ok, RIGHT10).expect("valid"),
            0.39249999999999996,
            1e-12,
        );
        close(
            brier_multiclass(&p, &y).expect("valid"),
            0.41114999999999996,
            1e-12,
        );
        close(log_loss(&p, &y).expect("valid"), 0.7480207351193543, 1e-12);
    }

    /// METHODS 6 tie-break rule: the first of tied maxima is the prediction.
    #[test]
    fn tied_maxima_predict_the_first_class() {
        let t = top_prediction(&[0.1, 0.4, 0.4, 0.1]).expect("valid");
        assert_eq!(t.class, 1);
        close(t.confidence, 0.4, 0.0);
    }

    /// Random distributions over 5 classes with labels drawn from a `true` distribution;
    /// the judge reports the true distribution raised to `sharpen` and renormalised.
    fn synthetic(n: usize, sharpen: f64, seed: u64) -> (Vec<Vec<f64>>, Vec<usize>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let (mut probs, mut labels) = (Vec::new(), Vec::new());
        for _ in 0..n {
            let raw: Vec<f64> = (0..5).map(|_| rng.random::<f64>() + 0.05).collect();
            let s: f64 = raw.iter().sum();
            let truth: Vec<f64> = raw.iter().map(|r| r / s).collect();
            let u: f64 = rng.random();
            let (mut acc, mut y) = (0.0, 4);
            for (k, p) in truth.iter().enumerate() {
                acc += p;
                if u < acc {
                    y = k;
                    break;
                }
            }
            let sharp: Vec<f64> = truth.iter().map(|p| p.powf(sharpen)).collect();
            let s2: f64 = sharp.iter().sum();
            probs.push(sharp.iter().map(|p| p / s2).collect());
            labels.push(y);
        }
        (probs, labels)
    }

    /// Property: temperature scaling never increases NLL on the data it was fitted to.
    #[test]
    fn temperature_scaling_never_increases_fitting_nll() {
        for seed in 0..20 {
            let sharpen = 0.5 + seed as f64 * 0.2;
            let (p, y) = synthetic(60, sharpen, seed);
            let fit = fit_temperature(&p, &y).expect("valid");
            assert!(fit.temperature > 0.0);
            assert!(fit.nll_after <= fit.nll_before, "seed {seed}: {fit:?}");
        }
        let (p, y) = multi();
        let fit = fit_temperature(&p, &y).expect("valid");
        assert!(fit.nll_after <= fit.nll_before);
    }

    /// Guo et al. (2017): a judge whose probabilities are the truth sharpened by power 3 is
    /// undone by T close to 3 (ln p / T with T = 3 restores the true log-odds).
    #[test]
    fn temperature_recovers_known_sharpening() {
        let (p, y) = synthetic(4000, 3.0, 7);
        let fit = fit_temperature(&p, &y).expect("valid");
        assert!((2.5..3.6).contains(&fit.temperature), "{fit:?}");
        let soft = apply_temperature(&p, fit.temperature).expect("valid");
        close(log_loss(&soft, &y).expect("valid"), fit.nll_after, 1e-9);
    }

    /// Cross-validation is reproducible from its seed and improves a sharpened judge held out.
    #[test]
    fn cross_validated_temperature_is_seeded_and_helps_an_overconfident_judge() {
        let (p, y) = synthetic(600, 3.0, 11);
        let b = Binning::EqualWidth {
            bins: 10,
            edge: BinEdge::RightClosed,
        };
        let a = cross_validated_temperature(&p, &y, 5, b, 42).expect("valid");
        let again = cross_validated_temperature(&p, &y, 5, b, 42).expect("valid");
        assert_eq!(a, again);
        assert_eq!(a.temperatures.len(), 5);
        assert!(a.nll_after < a.nll_before, "{a:?}");
        assert!(a.ece_after < a.ece_before, "{a:?}");
        let other = cross_validated_temperature(&p, &y, 5, b, 43).expect("valid");
        assert_ne!(a.temperatures, other.temperatures);
    }

    #[test]
    fn bad_inputs_are_rejected() {
        assert!(matches!(
            expected_calibration_error(&[1.2], &[true], RIGHT10),
            Err(StatsError::OutOfRange { .. })
        ));
        assert!(matches!(
            log_loss(&[vec![0.5, 0.6]], &[0]),
            Err(StatsError::OutOfRange { .. })
        ));
        assert!(matches!(
            log_loss(&[vec![0.5, 0.5]], &[2]),
            Err(StatsError::OutOfRange { .. })
        ));
        assert!(matches!(
            apply_temperature(&[vec![0.5, 0.5]], 0.0),
            Err(StatsError::OutOfRange { .. })
        ));
        assert!(matches!(
            brier_binary(&[0.5], &[]),
            Err(StatsError::LengthMismatch { .. })
        ));
    }
}
