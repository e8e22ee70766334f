//! Calibration stage, models: one fitted mapping from a feature row to a
//! distribution over the scale. Input: feature rows, consensus scale positions and
//! the scale's values. Output: a `Calibrator` that predicts a distribution and an
//! expected score, chosen among candidate methods by cross-validation on the
//! training rows only. Never looks at rows outside the ones it is given.

use serde::{Deserialize, Serialize};

use super::crossfit::group_folds;
use crate::stats::isotonic::{fit_isotonic, IsotonicFit};
use crate::stats::ordinal::{fit_ordinal, OrdinalFit, OrdinalOptions};
use crate::stats::StatsError;

/// A way of mapping features to the scale.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub enum Method {
    /// Proportional-odds model on all standardised features with this ridge penalty.
    Ordinal { l2: f64 },
    /// Isotonic regression of the consensus value on one feature (a judge's expected score).
    Isotonic { feature: usize },
}

impl Method {
    /// Candidates tried by default: two ridge strengths and, when given, isotonic on `feature`.
    pub fn candidates(isotonic_feature: Option<usize>) -> Vec<Method> {
        let mut out = vec![Method::Ordinal { l2: 3.0 }, Method::Ordinal { l2: 30.0 }];
        out.extend(isotonic_feature.map(|feature| Method::Isotonic { feature }));
        out
    }

    /// Short description, e.g. `ordinal, ridge 3` or `isotonic`.
    pub fn describe(&self) -> String {
        match self {
            Method::Ordinal { l2 } => format!("ordinal, ridge {l2}"),
            Method::Isotonic { .. } => "isotonic".into(),
        }
    }
}

/// The scale being predicted.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Target {
    /// Numeric value of each scale position, ascending.
    pub values: Vec<f64>,
}

/// A calibrated verdict on one item.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Prediction {
    /// Probability of each scale position.
    pub probabilities: Vec<f64>,
    /// Expected score on the scale's values.
    pub expected: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
enum Fitted {
    Ordinal(OrdinalFit),
    Isotonic(IsotonicFit),
}

/// A fitted mapping with the standardisation it was fitted under.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Calibrator {
    /// Method used.
    pub method: Method,
    /// Training means of the features.
    pub means: Vec<f64>,
    /// Training standard deviations (1 where a feature was constant).
    pub scales: Vec<f64>,
    /// The scale predicted.
    pub target: Target,
    fitted: Fitted,
}

impl Calibrator {
    /// Fits `method` on the rows given (and only those).
    pub fn fit(
        method: Method,
        rows: &[&[f64]],
        y: &[usize],
        target: &Target,
    ) -> Result<Calibrator, StatsError> {
        let (means, scales) = standardisation(rows);
        let fitted = match method {
            Method::Ordinal { l2 } => {
                let z: Vec<Vec<f64>> = rows
                    .iter()
                    .map(|r| standardise(r, &means, &scales))
                    .collect();
                let opts = OrdinalOptions {
                    l2,
                    ..OrdinalOptions::default()
                };
                Fitted::Ordinal(fit_ordinal(&z, y, target.values.len(), opts)?)
            }
            Method::Isotonic { feature } => {
                let x: Vec<f64> = rows.iter().map(|r| r[feature]).collect();
                let v: Vec<f64> = y.iter().map(|&p| target.values[p]).collect();
                Fitted::Isotonic(fit_isotonic(&x, &v, None)?)
            }
        };
        Ok(Calibrator {
            method,
            means,
            scales,
            target: target.clone(),
            fitted,
        })
    }

    /// The calibrated distribution and expected score for one feature row.
    pub fn predict(&self, row: &[f64]) -> Prediction {
        match &self.fitted {
            Fitted::Ordinal(fit) => {
                let probabilities = fit.predict(&standardise(row, &self.means, &self.scales));
                let expected = probabilities
                    .iter()
                    .zip(&self.target.values)
                    .map(|(p, v)| p * v)
                    .sum();
                Prediction {
                    probabilities,
                    expected,
                }
            }
            Fitted::Isotonic(fit) => {
                let Method::Isotonic { feature } = self.method else {
                    unreachable!("fit matches method")
                };
                let expected = fit.predict(row[feature]);
                Prediction {
                    probabilities: two_point(&self.target.values, expected),
                    expected,
                }
            }
        }
    }

    /// Number of features the calibrator expects.
    pub fn width(&self) -> usize {
        self.means.len()
    }
}

/// The distribution on the two scale values around `e` whose mean is `e`
/// (isotonic regression predicts a value, not a distribution).
fn two_point(values: &[f64], e: f64) -> Vec<f64> {
    let mut p = vec![0.0; values.len()];
    let e = e.clamp(values[0], values[values.len() - 1]);
    let hi = values.partition_point(|&v| v < e).min(values.len() - 1);
    if hi == 0 || values[hi] == e {
        p[hi] = 1.0;
    } else {
        let t = (e - values[hi - 1]) / (values[hi] - values[hi - 1]);
        p[hi - 1] = 1.0 - t;
        p[hi] = t;
    }
    p
}

fn standardisation(rows: &[&[f64]]) -> (Vec<f64>, Vec<f64>) {
    let n = rows.len() as f64;
    let d = rows.first().map_or(0, |r| r.len());
    let means: Vec<f64> = (0..d)
        .map(|j| rows.iter().map(|r| r[j]).sum::<f64>() / n)
        .collect();
    let scales = (0..d)
        .map(|j| {
            let var = rows.iter().map(|r| (r[j] - means[j]).powi(2)).sum::<f64>() / n;
            if var > 1e-18 {
                var.sqrt()
            } else {
                1.0
            }
        })
        .collect();
    (means, scales)
}

fn standardise(row: &[f64], means: &[f64], scales: &[f64]) -> Vec<f64> {
    row.iter()
        .zip(means)
        .zip(scales)
        .map(|((v, m), s)| (v - m) / s)
        .collect()
}

/// Squared error of the expected score against the consensus value.
pub(crate) fn squared_error(p: &Prediction, y: usize, target: &Target) -> f64 {
    (p.expected - target.values[y]).powi(2)
}

/// Picks the candidate with the lowest cross-validated squared error on these rows
/// (up to 3 folds by `groups`, seeded), then fits it on all of them. With one
/// candidate or one group, the first candidate is fitted without cross-validation.
pub fn choose_and_fit(
    candidates: &[Method],
    rows: &[&[f64]],
    y: &[usize],
    groups: &[String],
    target: &Target,
    seed: u64,
) -> Result<Calibrator, StatsError> {
    let mut distinct: Vec<&String> = groups.iter().collect();
    distinct.sort();
    distinct.dedup();
    // With fewer than two questions there is nothing to cross-validate on.
    let best = if candidates.len() == 1 || distinct.len() < 2 {
        candidates[0]
    } else {
        let folds = group_folds(groups, distinct.len().min(3), seed)?;
        let mut best: Option<(f64, Method)> = None;
        for m in candidates {
            if let Some(err) = cv_error(*m, rows, y, &folds, target) {
                if best.is_none_or(|(b, _)| err < b) {
                    best = Some((err, *m));
                }
            }
        }
        best.ok_or_else(|| {
            StatsError::Undefined("no calibration method could be fitted on these folds".into())
        })?
        .1
    };
    Calibrator::fit(best, rows, y, target)
}

/// Mean squared error over held-out folds; None when some fold cannot be fitted.
fn cv_error(
    m: Method,
    rows: &[&[f64]],
    y: &[usize],
    folds: &[usize],
    target: &Target,
) -> Option<f64> {
    let k = folds.iter().max().map_or(0, |f| f + 1);
    let mut total = 0.0;
    for f in 0..k {
        let train: Vec<usize> = (0..rows.len()).filter(|&i| folds[i] != f).collect();
        let tr_rows: Vec<&[f64]> = train.iter().map(|&i| rows[i]).collect();
        let tr_y: Vec<usize> = train.iter().map(|&i| y[i]).collect();
        let c = Calibrator::fit(m, &tr_rows, &tr_y, target).ok()?;
        total += (0..rows.len())
            .filter(|&i| folds[i] == f)
            .map(|i| squared_error(&c.predict(rows[i]), y[i], target))
            .sum::<f64>();
    }
    Some(total / rows.len() as f64)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn isotonic_prediction_is_a_two_point_distribution_with_the_fitted_mean() {
        let v = [1.0, 2.0, 3.0, 4.0, 5.0];
        assert_eq!(two_point(&v, 3.25), vec![0.0, 0.0, 0.75, 0.25, 0.0]);
        assert_eq!(two_point(&v, 5.0), vec![0.0, 0.0, 0.0, 0.0, 1.0]);
        assert_eq!(two_point(&v, 0.2), vec![1.0, 0.0, 0.0, 0.0, 0.0]);
        assert_eq!(two_point(&v, 2.0), vec![0.0, 1.0, 0.0, 0.0, 0.0]);
    }
}
