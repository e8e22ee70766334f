//! Statistics stage: prediction-powered estimates of a mean. Input: a gold set of
//! human labels with the judge's outputs on the same items, and judge outputs on
//! unlabelled items. Output: the corrected mean with a normal confidence interval,
//! and the classical (labels-only) mean for comparison. Never does I/O and never
//! clips the interval to the label range (matching the reference library).
//!
//! Conventions follow ppi-python 0.2.3 so results match it digit for digit:
//! standard deviations inside the interval use ddof = 0 (numpy `.std()`); the
//! power-tuning λ̂ uses a 1/n covariance and a ddof = 1 variance of all judge outputs.

use serde::Serialize;

use crate::stats::intervals::z_two_sided;
use crate::stats::StatsError;

/// A mean estimate with its normal confidence interval.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MeanEstimate {
    /// Point estimate of the mean.
    pub estimate: f64,
    /// Lower end of the (1 − alpha) interval.
    pub ci_low: f64,
    /// Upper end of the (1 − alpha) interval.
    pub ci_high: f64,
    /// Standard error used for the interval.
    pub standard_error: f64,
    /// Weight λ on the judge outputs: 1 plain PPI, 0 classical, in between PPI++.
    pub lambda: f64,
    /// Number of gold (human-labelled) items.
    pub n_labelled: usize,
    /// Number of unlabelled items scored only by the judge.
    pub n_unlabelled: usize,
}

fn mean(x: &[f64]) -> f64 {
    x.iter().sum::<f64>() / x.len() as f64
}

/// Population variance (ddof = 0), as numpy's default `.var()`.
fn variance_ddof0(x: &[f64]) -> f64 {
    let m = mean(x);
    x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / x.len() as f64
}

fn check_inputs(
    labels: &[f64],
    judged: &[f64],
    unlabelled: &[f64],
    alpha: f64,
) -> Result<(), StatsError> {
    if labels.len() != judged.len() {
        return Err(StatsError::LengthMismatch {
            left: labels.len(),
            right: judged.len(),
        });
    }
    if labels.len() < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: labels.len(),
        });
    }
    if unlabelled.len() < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: unlabelled.len(),
        });
    }
    if let Some(bad) = labels
        .iter()
        .chain(judged)
        .chain(unlabelled)
        .find(|v| !v.is_finite())
    {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a finite value".into(),
        });
    }
    if !(alpha > 0.0 && alpha < 1.0) {
        return Err(StatsError::OutOfRange {
            value: alpha.to_string(),
            allowed: "alpha in (0, 1)".into(),
        });
    }
    Ok(())
}

/// Power-tuned weight λ̂ of PPI++ (Angelopoulos, Duchi & Zrnic 2023) for a mean.
///
/// λ̂ = Cov_n(Y, f) / ((1 + n/N)·Var(f over all n + N items)), clipped to [0, 1];
/// Cov with 1/n, Var with ddof = 1 (ppi-python 0.2.3 `_calc_lam_glm`).
pub fn ppi_power_tuned_lambda(
    labels: &[f64],
    judged: &[f64],
    unlabelled: &[f64],
) -> Result<f64, StatsError> {
    check_inputs(labels, judged, unlabelled, 0.5)?;
    let (n, big_n) = (labels.len() as f64, unlabelled.len() as f64);
    let (my, mf) = (mean(labels), mean(judged));
    let cov = labels
        .iter()
        .zip(judged)
        .map(|(y, f)| (y - my) * (f - mf))
        .sum::<f64>()
        / n;
    let all: Vec<f64> = judged.iter().chain(unlabelled).copied().collect();
    let m_all = mean(&all);
    let var_all = all.iter().map(|v| (v - m_all).powi(2)).sum::<f64>() / (all.len() - 1) as f64;
    if var_all == 0.0 {
        // Constant judge outputs carry no information; fall back to the labels alone.
        return Ok(0.0);
    }
    Ok((cov / ((1.0 + n / big_n) * var_all)).clamp(0.0, 1.0))
}

/// PPI++ mean θ̂_λ = λ·mean(f̃) + mean(Y − λf) with its (1 − alpha) normal interval.
///
/// SE² = Var(λf̃)/N + Var(Y − λf)/n with ddof = 0 (Angelopoulos, Duchi & Zrnic 2023;
/// ppi-python 0.2.3 `ppi_mean_ci`). `lambda = None` uses [`ppi_power_tuned_lambda`].
pub fn ppi_mean_with_lambda(
    labels: &[f64],
    judged: &[f64],
    unlabelled: &[f64],
    lambda: Option<f64>,
    alpha: f64,
) -> Result<MeanEstimate, StatsError> {
    check_inputs(labels, judged, unlabelled, alpha)?;
    let lambda = match lambda {
        Some(l) if l.is_finite() => l,
        Some(l) => {
            return Err(StatsError::OutOfRange {
                value: l.to_string(),
                allowed: "a finite lambda".into(),
            })
        }
        None => ppi_power_tuned_lambda(labels, judged, unlabelled)?,
    };
    let (n, big_n) = (labels.len(), unlabelled.len());
    let imputed: Vec<f64> = unlabelled.iter().map(|f| lambda * f).collect();
    let rectifier: Vec<f64> = labels
        .iter()
        .zip(judged)
        .map(|(y, f)| y - lambda * f)
        .collect();
    let estimate = mean(&imputed) + mean(&rectifier);
    let standard_error =
        (variance_ddof0(&imputed) / big_n as f64 + variance_ddof0(&rectifier) / n as f64).sqrt();
    let z = z_two_sided(alpha)?;
    Ok(MeanEstimate {
        estimate,
        ci_low: estimate - z * standard_error,
        ci_high: estimate + z * standard_error,
        standard_error,
        lambda,
        n_labelled: n,
        n_unlabelled: big_n,
    })
}

/// Prediction-powered mean (Angelopoulos, Bates, Fannjiang, Jordan & Zrnic 2023):
/// θ̂ = mean(f̃) − mean(f − Y), the λ = 1 case of [`ppi_mean_with_lambda`].
pub fn ppi_mean(
    labels: &[f64],
    judged: &[f64],
    unlabelled: &[f64],
    alpha: f64,
) -> Result<MeanEstimate, StatsError> {
    ppi_mean_with_lambda(labels, judged, unlabelled, Some(1.0), alpha)
}

/// Cross-prediction-powered mean (Zrnic & Candes 2024, "Cross-prediction-powered
/// inference", PNAS 121): the predictor is fitted K-fold on the labelled items, so
/// `out_of_fold[i]` comes from the model that did not see item i and
/// `unlabelled_mean[j]` is the fold models' average on unlabelled item j. Then
/// θ̂ = mean(f̄(X̃)) + mean(Y − f_oof(X)) with SE² = Var(f̄(X̃))/N + Var(Y − f_oof)/n
/// (ddof = 0): the PPI formula on these inputs, which is why it delegates to it.
pub fn cross_ppi_mean(
    labels: &[f64],
    out_of_fold: &[f64],
    unlabelled_mean: &[f64],
    alpha: f64,
) -> Result<MeanEstimate, StatsError> {
    ppi_mean_with_lambda(labels, out_of_fold, unlabelled_mean, Some(1.0), alpha)
}

/// Classical mean of the human labels with a normal interval, SE = sd(ddof = 0)/√n
/// (ppi-python 0.2.3 `classical_mean_ci`).
pub fn classical_mean(labels: &[f64], alpha: f64) -> Result<MeanEstimate, StatsError> {
    if labels.len() < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: labels.len(),
        });
    }
    if let Some(bad) = labels.iter().find(|v| !v.is_finite()) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a finite value".into(),
        });
    }
    let n = labels.len();
    let estimate = mean(labels);
    let standard_error = (variance_ddof0(labels) / n as f64).sqrt();
    let z = z_two_sided(alpha)?;
    Ok(MeanEstimate {
        estimate,
        ci_low: estimate - z * standard_error,
        ci_high: estimate + z * standard_error,
        standard_error,
        lambda: 0.0,
        n_labelled: n,
        n_unlabelled: 0,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn example() -> (Vec<f64>, Vec<f64>, Vec<f64>) {
        let y = vec![1., 1., 0., 1., 0., 1., 1., 0., 1., 1.];
        let f = vec![1., 1., 0., 1., 1., 1., 1., 1., 0., 1.];
        let u: Vec<f64> = (0..40).map(|i| if i < 30 { 1.0 } else { 0.0 }).collect();
        (y, f, u)
    }

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() < 1e-12
    }

    /// METHODS section 10 worked example ([lib] ppi-python 0.2.3, alpha = 0.05):
    /// PPI 0.65, CI (0.29026517541092395, 1.009734824589076), SE 0.18354154842977655.
    #[test]
    fn ppi_mean_matches_ppi_python() {
        let (y, f, u) = example();
        let e = ppi_mean(&y, &f, &u, 0.05).unwrap();
        assert!(close(e.estimate, 0.65));
        assert!(
            close(e.ci_low, 0.29026517541092395) && close(e.ci_high, 1.009734824589076),
            "{e:?}"
        );
        assert!(close(e.standard_error, 0.18354154842977655));
    }

    /// METHODS section 10 ([lib] ppi-python 0.2.3 `classical_mean_ci`, ddof = 0):
    /// 0.7, CI (0.41597423491067465, 0.9840257650893253).
    #[test]
    fn classical_mean_matches_ppi_python() {
        let (y, _, _) = example();
        let e = classical_mean(&y, 0.05).unwrap();
        assert!(close(e.estimate, 0.7));
        assert!(
            close(e.ci_low, 0.41597423491067465) && close(e.ci_high, 0.9840257650893253),
            "{e:?}"
        );
    }

    /// METHODS section 10 ([lib] ppi-python 0.2.3, lam = None): λ̂ =
    /// 0.17192982456140346, estimate 0.6914035087719298, CI (0.4125916147553922,
    /// 0.9702154027884674).
    #[test]
    fn ppi_plus_plus_matches_ppi_python() {
        let (y, f, u) = example();
        let e = ppi_mean_with_lambda(&y, &f, &u, None, 0.05).unwrap();
        assert!(close(e.lambda, 0.17192982456140346));
        assert!(close(e.estimate, 0.6914035087719298));
        assert!(
            close(e.ci_low, 0.4125916147553922) && close(e.ci_high, 0.9702154027884674),
            "{e:?}"
        );
    }

    /// λ = 0 reduces PPI++ to the classical mean (Angelopoulos, Duchi & Zrnic 2023).
    #[test]
    fn lambda_zero_equals_classical_mean() {
        let (y, f, u) = example();
        let a = ppi_mean_with_lambda(&y, &f, &u, Some(0.0), 0.05).unwrap();
        let b = classical_mean(&y, 0.05).unwrap();
        assert!(
            close(a.estimate, b.estimate)
                && close(a.ci_low, b.ci_low)
                && close(a.ci_high, b.ci_high)
        );
    }

    /// A judge that reproduces the labels exactly gets λ̂ clipped at most to 1 and a
    /// constant judge gets λ̂ = 0.
    #[test]
    fn lambda_is_clipped_and_constant_judge_falls_back() {
        let (y, _, _) = example();
        let u = vec![1.0, 0.0, 1.0, 1.0];
        let l = ppi_power_tuned_lambda(&y, &y, &u).unwrap();
        assert!((0.0..=1.0).contains(&l));
        assert_eq!(
            ppi_power_tuned_lambda(&y, &[1.0; 10], &[1.0; 4]).unwrap(),
            0.0
        );
    }

    #[test]
    fn mismatched_or_short_inputs_are_errors() {
        let (y, f, u) = example();
        assert!(ppi_mean(&y, &f[..9], &u, 0.05).is_err());
        assert!(ppi_mean(&y, &f, &u[..1], 0.05).is_err());
        assert!(ppi_mean(&y, &f, &u, 1.5).is_err());
        assert!(classical_mean(&[1.0], 0.05).is_err());
    }
}
