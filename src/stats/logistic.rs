//! Statistics stage: logistic regression and the win rate at equal length.
//! Input: predictor columns and 0/1 (or fractional) outcomes. Output: coefficients,
//! standard errors and convergence details; the win rate with the length effect
//! removed. Never does I/O and never reports a fit that did not converge.

use serde::Serialize;

use crate::stats::StatsError;

/// A fitted logistic regression; coefficient 0 is the intercept.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LogisticFit {
    /// Intercept followed by one slope per predictor column.
    pub coefficients: Vec<f64>,
    /// Standard errors from the inverse of the (penalised) observed information.
    pub standard_errors: Vec<f64>,
    /// Log-likelihood at the estimate (without the penalty).
    pub log_likelihood: f64,
    /// Newton–Raphson iterations used.
    pub iterations: usize,
    /// Largest absolute coefficient change in the last iteration.
    pub last_step: f64,
}

/// Settings of the Newton–Raphson fit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct LogisticOptions {
    /// L2 penalty λ on the slopes (objective −loglik + λ/2·Σβ_j², intercept unpenalised).
    pub l2: f64,
    /// Stop when no coefficient moves more than this.
    pub tolerance: f64,
    /// Give up after this many iterations.
    pub max_iterations: usize,
}

impl Default for LogisticOptions {
    fn default() -> Self {
        Self {
            l2: 0.0,
            tolerance: 1e-12,
            max_iterations: 100,
        }
    }
}

/// The logistic function 1/(1 + e^(−x)).
pub fn logistic(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

/// Fits P(y = 1) = logistic(β0 + Σ β_j x_j) by Newton–Raphson (equivalently IRLS).
///
/// `columns` holds one slice per predictor; `y` may be fractional in [0, 1] (e.g. a
/// tie as 0.5), which maximises the same Bernoulli quasi-likelihood. Without a
/// penalty, perfectly separated data have no finite estimate: the fit then fails with
/// `NoConvergence` (or `Undefined` when the information matrix becomes singular).
pub fn fit_logistic(
    columns: &[&[f64]],
    y: &[f64],
    options: LogisticOptions,
) -> Result<LogisticFit, StatsError> {
    let n = y.len();
    let p = columns.len() + 1;
    for c in columns {
        if c.len() != n {
            return Err(StatsError::LengthMismatch {
                left: n,
                right: c.len(),
            });
        }
    }
    if n < p {
        return Err(StatsError::TooFew { needed: p, got: n });
    }
    if let Some(bad) = y.iter().find(|v| !(0.0..=1.0).contains(*v)) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "an outcome in [0, 1]".into(),
        });
    }
    if let Some(bad) = columns
        .iter()
        .flat_map(|c| c.iter())
        .find(|v| !v.is_finite())
    {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a finite predictor".into(),
        });
    }
    if !(options.l2 >= 0.0 && options.l2.is_finite()) {
        return Err(StatsError::OutOfRange {
            value: options.l2.to_string(),
            allowed: "an L2 penalty >= 0".into(),
        });
    }
    let row = |i: usize| -> Vec<f64> {
        std::iter::once(1.0)
            .chain(columns.iter().map(|c| c[i]))
            .collect()
    };
    let rows: Vec<Vec<f64>> = (0..n).map(row).collect();
    let mut beta = vec![0.0; p];
    for iteration in 1..=options.max_iterations {
        let (gradient, information) = score_and_information(&rows, y, &beta, options.l2);
        let step = solve(&information, &gradient).ok_or_else(|| {
            StatsError::Undefined(
                "the information matrix is singular (collinear or separated data)".into(),
            )
        })?;
        let last_step = step.iter().fold(0.0_f64, |m, s| m.max(s.abs()));
        beta.iter_mut().zip(&step).for_each(|(b, s)| *b += s);
        if !last_step.is_finite() {
            break;
        }
        if last_step < options.tolerance {
            let (_, information) = score_and_information(&rows, y, &beta, options.l2);
            let inverse = invert(&information).ok_or_else(|| {
                StatsError::Undefined("the information matrix is singular at the estimate".into())
            })?;
            let standard_errors = (0..p).map(|j| inverse[j][j].max(0.0).sqrt()).collect();
            let log_likelihood = rows
                .iter()
                .zip(y)
                .map(|(x, &yi)| {
                    let eta: f64 = x.iter().zip(&beta).map(|(a, b)| a * b).sum();
                    // log σ(η) = −ln(1 + e^(−η)), written stably for both signs.
                    yi * -softplus(-eta) + (1.0 - yi) * -softplus(eta)
                })
                .sum();
            return Ok(LogisticFit {
                coefficients: beta,
                standard_errors,
                log_likelihood,
                iterations: iteration,
                last_step,
            });
        }
    }
    Err(StatsError::NoConvergence {
        iterations: options.max_iterations,
    })
}

pub(crate) fn softplus(x: f64) -> f64 {
    x.max(0.0) + (-x.abs()).exp().ln_1p()
}

/// Gradient of the penalised log-likelihood and the penalised information X'WX + Λ.
fn score_and_information(
    rows: &[Vec<f64>],
    y: &[f64],
    beta: &[f64],
    l2: f64,
) -> (Vec<f64>, Vec<Vec<f64>>) {
    let p = beta.len();
    let mut gradient = vec![0.0; p];
    let mut information = vec![vec![0.0; p]; p];
    for (x, &yi) in rows.iter().zip(y) {
        let eta: f64 = x.iter().zip(beta).map(|(a, b)| a * b).sum();
        let mu = logistic(eta);
        let w = mu * (1.0 - mu);
        for a in 0..p {
            gradient[a] += (yi - mu) * x[a];
            for b in 0..p {
                information[a][b] += w * x[a] * x[b];
            }
        }
    }
    for j in 1..p {
        gradient[j] -= l2 * beta[j];
        information[j][j] += l2;
    }
    (gradient, information)
}

/// Solves A·x = b by Gaussian elimination with partial pivoting; None if singular.
pub(crate) fn solve(a: &[Vec<f64>], b: &[f64]) -> Option<Vec<f64>> {
    let n = b.len();
    let mut m: Vec<Vec<f64>> = a
        .iter()
        .zip(b)
        .map(|(r, v)| r.iter().copied().chain([*v]).collect())
        .collect();
    let scale = a
        .iter()
        .flat_map(|r| r.iter())
        .fold(0.0_f64, |s, v| s.max(v.abs()));
    for col in 0..n {
        let pivot = (col..n).max_by(|&i, &j| m[i][col].abs().total_cmp(&m[j][col].abs()))?;
        if m[pivot][col].abs() <= 1e-13 * scale.max(f64::MIN_POSITIVE) {
            return None;
        }
        m.swap(col, pivot);
        let pivot_row = m[col].clone();
        for (r, row) in m.iter_mut().enumerate() {
            if r != col {
                let f = row[col] / pivot_row[col];
                row.iter_mut()
                    .zip(&pivot_row)
                    .skip(col)
                    .for_each(|(v, p)| *v -= f * p);
            }
        }
    }
    Some((0..n).map(|i| m[i][n] / m[i][i]).collect())
}

/// Inverts a small matrix column by column; None if singular.
fn invert(a: &[Vec<f64>]) -> Option<Vec<Vec<f64>>> {
    let n = a.len();
    let columns: Option<Vec<Vec<f64>>> = (0..n)
        .map(|j| {
            solve(
                a,
                &(0..n)
                    .map(|i| if i == j { 1.0 } else { 0.0 })
                    .collect::<Vec<_>>(),
            )
        })
        .collect();
    let columns = columns?;
    Some(
        (0..n)
            .map(|i| (0..n).map(|j| columns[j][i]).collect())
            .collect(),
    )
}

/// Win rate at equal length of a model against a baseline.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct WinRateAtEqualLength {
    /// Number of judged pairs.
    pub n: usize,
    /// Raw win rate: mean of the outcomes (ties count as given, e.g. 0.5).
    pub raw_win_rate: f64,
    /// Win rate with the length term set to zero: logistic(θ).
    pub at_equal_length: f64,
    /// Intercept θ (model-versus-baseline strength at equal length).
    pub theta: f64,
    /// Slope φ on the squashed length difference.
    pub phi: f64,
    /// Standard error of θ from the fit.
    pub theta_se: f64,
    /// Sample standard deviation (ddof = 1) of the length differences used to scale them.
    pub length_sd: f64,
}

/// Win rate at equal length (Dubois, Galambosi, Liang & Hashimoto 2024).
///
/// Fits y ~ logistic(θ + φ·tanh(Δlen / sd(Δlen))) with sd the sample standard
/// deviation (ddof = 1); the win rate at equal length is logistic(θ), the predicted preference at
/// equal length. `len_diff[i]` = len(model answer) − len(baseline answer); `outcome[i]`
/// = 1 model preferred, 0 baseline preferred, 0.5 tie. This is the one-baseline form
/// without the instruction-difficulty term; when every length difference is equal the
/// length term is dropped (it cannot be told apart from θ).
pub fn win_rate_at_equal_length(
    len_diff: &[f64],
    outcome: &[f64],
    l2: f64,
) -> Result<WinRateAtEqualLength, StatsError> {
    let n = len_diff.len();
    if outcome.len() != n {
        return Err(StatsError::LengthMismatch {
            left: n,
            right: outcome.len(),
        });
    }
    if n < 2 {
        return Err(StatsError::TooFew { needed: 2, got: n });
    }
    let mean = len_diff.iter().sum::<f64>() / n as f64;
    let sd = (len_diff.iter().map(|d| (d - mean).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
    let options = LogisticOptions {
        l2,
        ..LogisticOptions::default()
    };
    let raw_win_rate = outcome.iter().sum::<f64>() / n as f64;
    let (theta, phi, theta_se) = if sd > 0.0 {
        let squashed: Vec<f64> = len_diff.iter().map(|d| (d / sd).tanh()).collect();
        let fit = fit_logistic(&[&squashed], outcome, options)?;
        (
            fit.coefficients[0],
            fit.coefficients[1],
            fit.standard_errors[0],
        )
    } else {
        let fit = fit_logistic(&[], outcome, options)?;
        (fit.coefficients[0], 0.0, fit.standard_errors[0])
    };
    Ok(WinRateAtEqualLength {
        n,
        raw_win_rate,
        at_equal_length: logistic(theta),
        theta,
        phi,
        theta_se,
        length_sd: sd,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    const DLEN: [f64; 16] = [
        300., 250., -50., 400., 120., -200., 350., 80., -100., 500., 220., -30., 150., -250., 60.,
        90.,
    ];
    const Y: [f64; 16] = [
        1., 1., 0., 1., 1., 0., 1., 0., 1., 1., 1., 0., 1., 0., 0., 1.,
    ];

    /// METHODS section 9 toy check (statsmodels 0.15.0 Logit MLE, [lib]; model form of
    /// Dubois et al. 2024 tagged from memory): sd = 213.07960171416377, θ =
    /// −0.4403542188429178, φ = 3.5104649871219187, LC 0.39165656923128134, raw 0.625.
    #[test]
    fn win_rate_at_equal_length_matches_statsmodels_toy_check() {
        let fit = win_rate_at_equal_length(&DLEN, &Y, 0.0).unwrap();
        assert!((fit.length_sd - 213.07960171416377).abs() < 1e-9);
        assert!((fit.theta - -0.4403542188429178).abs() < 1e-8);
        assert!((fit.phi - 3.5104649871219187).abs() < 1e-8);
        assert!((fit.at_equal_length - 0.39165656923128134).abs() < 1e-8);
        assert_eq!(fit.raw_win_rate, 0.625);
    }

    /// Dubois et al. (2024) identity property: a model against itself, each pair seen
    /// from both sides (Δ, y) and (−Δ, 1 − y), has LC win rate exactly 50%.
    #[test]
    fn win_rate_at_equal_length_of_model_against_itself_is_one_half() {
        let dlen: Vec<f64> = DLEN
            .iter()
            .chain(DLEN.iter().map(|d| -d).collect::<Vec<_>>().iter())
            .copied()
            .collect();
        let y: Vec<f64> = Y
            .iter()
            .chain(Y.iter().map(|v| 1.0 - v).collect::<Vec<_>>().iter())
            .copied()
            .collect();
        let fit = win_rate_at_equal_length(&dlen, &y, 0.0).unwrap();
        assert!((fit.at_equal_length - 0.5).abs() < 1e-12);
        // Identical answers: no length difference, every verdict a tie.
        let same = win_rate_at_equal_length(&[0.0; 6], &[0.5; 6], 0.0).unwrap();
        assert!((same.at_equal_length - 0.5).abs() < 1e-12 && same.phi == 0.0);
    }

    /// Dubois et al. (2024) symmetry property: swapping model and baseline (Δ → −Δ,
    /// y → 1 − y) turns the LC win rate w into 1 − w.
    #[test]
    fn win_rate_at_equal_length_is_symmetric_under_swapping_sides() {
        let a = win_rate_at_equal_length(&DLEN, &Y, 0.0).unwrap();
        let dneg: Vec<f64> = DLEN.iter().map(|d| -d).collect();
        let yneg: Vec<f64> = Y.iter().map(|v| 1.0 - v).collect();
        let b = win_rate_at_equal_length(&dneg, &yneg, 0.0).unwrap();
        assert!((a.at_equal_length + b.at_equal_length - 1.0).abs() < 1e-12);
    }

    /// Intercept-only fit is the logit of the mean (closed-form MLE), SE =
    /// 1/√(n·p(1−p)); 12 of 16 → θ = ln 3, SE = 1/√3.
    #[test]
    fn intercept_only_fit_matches_closed_form() {
        let y: Vec<f64> = (0..16).map(|i| if i < 12 { 1.0 } else { 0.0 }).collect();
        let fit = fit_logistic(&[], &y, LogisticOptions::default()).unwrap();
        assert!((fit.coefficients[0] - 3f64.ln()).abs() < 1e-12);
        assert!((fit.standard_errors[0] - (1.0 / 3.0f64).sqrt()).abs() < 1e-12);
        let ll = 12.0 * 0.75f64.ln() + 4.0 * 0.25f64.ln();
        assert!((fit.log_likelihood - ll).abs() < 1e-12);
    }

    /// The L2 penalty shrinks the slope toward 0 and leaves a separated data set fittable.
    #[test]
    fn l2_penalty_shrinks_slope_and_handles_separation() {
        let x = [-2.0, -1.0, 1.0, 2.0];
        let y = [0.0, 0.0, 1.0, 1.0];
        assert!(fit_logistic(&[&x], &y, LogisticOptions::default()).is_err());
        let fit = fit_logistic(
            &[&x],
            &y,
            LogisticOptions {
                l2: 1.0,
                ..Default::default()
            },
        )
        .unwrap();
        assert!(fit.coefficients[1] > 0.0 && fit.coefficients[1].is_finite());
        let free = win_rate_at_equal_length(&DLEN, &Y, 0.0).unwrap();
        let shrunk = win_rate_at_equal_length(&DLEN, &Y, 5.0).unwrap();
        assert!(shrunk.phi.abs() < free.phi.abs());
    }

    #[test]
    fn bad_inputs_are_errors() {
        assert!(fit_logistic(&[&[1.0]], &[1.0, 0.0], LogisticOptions::default()).is_err());
        assert!(fit_logistic(&[], &[2.0], LogisticOptions::default()).is_err());
        assert!(win_rate_at_equal_length(&[1.0], &[1.0], 0.0).is_err());
    }
}
