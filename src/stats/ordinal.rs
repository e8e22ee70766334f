//! Statistics stage: the proportional-odds (cumulative logit) model for ordered
//! outcomes (McCullagh 1980, "Regression models for ordinal data", JRSS B 42:109),
//! with an optional ridge penalty on the slopes. Input: predictor rows and outcome
//! positions on a scale of `k` ordered categories. Output: thresholds, slopes and the
//! predicted distribution over the scale for new rows. Never does I/O and never
//! reports a fit that did not converge.
//!
//! Model: P(Y ≤ j | x) = logistic(θ_j − x·β), j = 0..k−2, θ increasing. Same sign
//! convention as statsmodels' `OrderedModel` (logit). Categories of the scale that no
//! training row uses cannot be placed by the likelihood (their thresholds run off to
//! infinity), so the model is fitted on the categories present and gives the absent
//! ones probability 0.

use serde::{Deserialize, Serialize};

use crate::stats::logistic::{logistic, solve};
use crate::stats::StatsError;

/// A fitted proportional-odds model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OrdinalFit {
    /// Number of categories of the full scale.
    pub k: usize,
    /// Scale positions present in the training data, ascending; the model is over these.
    pub present: Vec<usize>,
    /// Cut points θ between consecutive present categories (increasing).
    pub thresholds: Vec<f64>,
    /// One slope per predictor column.
    pub slopes: Vec<f64>,
    /// Log-likelihood at the estimate (without the penalty).
    pub log_likelihood: f64,
    /// Newton iterations used.
    pub iterations: usize,
}

/// Settings of the fit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct OrdinalOptions {
    /// Ridge penalty λ on the slopes: objective −loglik + λ/2·Σβ², thresholds unpenalised.
    pub l2: f64,
    /// Stop when the largest Newton step is below this.
    pub tolerance: f64,
    /// Give up after this many iterations.
    pub max_iterations: usize,
}

impl Default for OrdinalOptions {
    fn default() -> Self {
        OrdinalOptions {
            l2: 0.0,
            tolerance: 1e-10,
            max_iterations: 200,
        }
    }
}

impl OrdinalFit {
    /// Probability of each of the `k` scale categories for one predictor row.
    pub fn predict(&self, x: &[f64]) -> Vec<f64> {
        let eta: f64 = x.iter().zip(&self.slopes).map(|(a, b)| a * b).sum();
        let mut out = vec![0.0; self.k];
        let mut below = 0.0;
        for (c, &pos) in self.present.iter().enumerate() {
            let cum = self.thresholds.get(c).map_or(1.0, |t| logistic(t - eta));
            out[pos] = (cum - below).max(0.0);
            below = cum;
        }
        out
    }
}

/// Fits the proportional-odds model by damped Newton–Raphson.
///
/// `rows[i]` holds the predictors of observation i and `y[i]` its scale position in
/// `0..k`. At least two categories must be present. Without a penalty, data that
/// separate the categories have no finite estimate: the fit then fails.
pub fn fit_ordinal(
    rows: &[Vec<f64>],
    y: &[usize],
    k: usize,
    options: OrdinalOptions,
) -> Result<OrdinalFit, StatsError> {
    check(rows, y, k, options)?;
    let present: Vec<usize> = (0..k).filter(|c| y.contains(c)).collect();
    if present.len() < 2 {
        return Err(StatsError::Undefined(
            "every training outcome is in one category".into(),
        ));
    }
    let compact: Vec<usize> = y
        .iter()
        .map(|v| present.iter().position(|p| p == v).expect("v is present"))
        .collect();
    let problem = Problem {
        rows,
        y: &compact,
        cuts: present.len() - 1,
        l2: options.l2,
    };
    let mut params = problem.start();
    let mut objective = problem.objective(&params).expect("the start is ordered");
    for iteration in 1..=options.max_iterations {
        let (gradient, hessian) = problem.derivatives(&params);
        let step = solve(&hessian, &gradient)
            .ok_or_else(|| StatsError::Undefined("the information matrix is singular".into()))?;
        let (next, value) = problem.damped(&params, &step, objective)?;
        let largest = step.iter().fold(0.0_f64, |m, s| m.max(s.abs()));
        params = next;
        objective = value;
        if largest < options.tolerance {
            return Ok(OrdinalFit {
                k,
                present,
                thresholds: params[..problem.cuts].to_vec(),
                slopes: params[problem.cuts..].to_vec(),
                log_likelihood: problem.log_likelihood(&params).expect("ordered"),
                iterations: iteration,
            });
        }
    }
    Err(StatsError::NoConvergence {
        iterations: options.max_iterations,
    })
}

fn check(rows: &[Vec<f64>], y: &[usize], k: usize, o: OrdinalOptions) -> Result<(), StatsError> {
    if rows.len() != y.len() {
        return Err(StatsError::LengthMismatch {
            left: rows.len(),
            right: y.len(),
        });
    }
    let p = rows.first().map_or(0, Vec::len);
    if let Some(r) = rows.iter().find(|r| r.len() != p) {
        return Err(StatsError::LengthMismatch {
            left: p,
            right: r.len(),
        });
    }
    if let Some(bad) = y.iter().find(|&&v| v >= k) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: format!("a scale position below {k}"),
        });
    }
    if let Some(bad) = rows.iter().flatten().find(|v| !v.is_finite()) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a finite predictor".into(),
        });
    }
    if !(o.l2 >= 0.0 && o.l2.is_finite()) {
        return Err(StatsError::OutOfRange {
            value: o.l2.to_string(),
            allowed: "a ridge penalty >= 0".into(),
        });
    }
    Ok(())
}

/// The penalised likelihood over parameters (θ_0..θ_{cuts−1}, β).
struct Problem<'a> {
    rows: &'a [Vec<f64>],
    y: &'a [usize],
    cuts: usize,
    l2: f64,
}

impl Problem<'_> {
    /// Thresholds at the logits of the cumulative shares, slopes 0.
    fn start(&self) -> Vec<f64> {
        let n = self.y.len() as f64;
        let mut params = Vec::new();
        let mut cum = 0.0;
        for c in 0..self.cuts {
            cum += self.y.iter().filter(|&&v| v == c).count() as f64;
            let share = (cum + 0.5) / (n + 1.0);
            params.push((share / (1.0 - share)).ln());
        }
        params.extend(std::iter::repeat(0.0).take(self.rows[0].len()));
        params
    }

    /// Log-likelihood; None when the thresholds are not strictly increasing.
    fn log_likelihood(&self, params: &[f64]) -> Option<f64> {
        let (theta, beta) = params.split_at(self.cuts);
        if theta.windows(2).any(|w| w[1] <= w[0]) {
            return None;
        }
        let mut total = 0.0;
        for (x, &y) in self.rows.iter().zip(self.y) {
            let eta: f64 = x.iter().zip(beta).map(|(a, b)| a * b).sum();
            let upper = theta.get(y).map_or(1.0, |t| logistic(t - eta));
            let lower = if y == 0 {
                0.0
            } else {
                logistic(theta[y - 1] - eta)
            };
            total += (upper - lower).max(f64::MIN_POSITIVE).ln();
        }
        Some(total)
    }

    /// Penalised log-likelihood (to be maximised).
    fn objective(&self, params: &[f64]) -> Option<f64> {
        let ridge: f64 = params[self.cuts..].iter().map(|b| b * b).sum::<f64>();
        self.log_likelihood(params)
            .map(|l| l - 0.5 * self.l2 * ridge)
    }

    /// Gradient of the penalised log-likelihood and the negative Hessian.
    fn derivatives(&self, params: &[f64]) -> (Vec<f64>, Vec<Vec<f64>>) {
        let d = params.len();
        let (theta, beta) = params.split_at(self.cuts);
        let mut g = vec![0.0; d];
        let mut h = vec![vec![0.0; d]; d];
        for (x, &y) in self.rows.iter().zip(self.y) {
            let eta: f64 = x.iter().zip(beta).map(|(a, b)| a * b).sum();
            // d(θ_j − x·β)/dparams = e_j − (0, x)
            let dir = |j: usize| -> Vec<f64> {
                let mut v = vec![0.0; d];
                v[j] = 1.0;
                v[self.cuts..].iter_mut().zip(x).for_each(|(a, b)| *a = -b);
                v
            };
            // (F, f, f') at the bounding cut, with its direction; ends contribute nothing.
            let side = |j: Option<usize>| {
                j.map(|j| {
                    let f_ = logistic(theta[j] - eta);
                    let dens = f_ * (1.0 - f_);
                    (f_, dens, dens * (1.0 - 2.0 * f_), dir(j))
                })
            };
            let up = side((y < self.cuts).then_some(y));
            let lo = side(y.checked_sub(1));
            let p = up.as_ref().map_or(1.0, |u| u.0) - lo.as_ref().map_or(0.0, |l| l.0);
            let p = p.max(f64::MIN_POSITIVE);
            let mut score = vec![0.0; d];
            for (sign, s) in [(1.0, &up), (-1.0, &lo)] {
                if let Some((_, dens, _, v)) = s {
                    score
                        .iter_mut()
                        .zip(v)
                        .for_each(|(a, b)| *a += sign * dens * b / p);
                }
            }
            for a in 0..d {
                g[a] += score[a];
                for b in 0..d {
                    let mut second = -score[a] * score[b];
                    for (sign, s) in [(1.0, &up), (-1.0, &lo)] {
                        if let Some((_, _, slope, v)) = s {
                            second += sign * slope * v[a] * v[b] / p;
                        }
                    }
                    h[a][b] -= second;
                }
            }
        }
        for j in self.cuts..d {
            g[j] -= self.l2 * params[j];
            h[j][j] += self.l2;
        }
        (g, h)
    }

    /// Newton step halved until the thresholds stay ordered and the objective does not fall.
    fn damped(
        &self,
        params: &[f64],
        step: &[f64],
        current: f64,
    ) -> Result<(Vec<f64>, f64), StatsError> {
        let mut t = 1.0;
        for _ in 0..60 {
            let next: Vec<f64> = params.iter().zip(step).map(|(p, s)| p + t * s).collect();
            if let Some(v) = self.objective(&next) {
                if v >= current - 1e-12 * current.abs().max(1.0) {
                    return Ok((next, v));
                }
            }
            t *= 0.5;
        }
        Err(StatsError::Undefined(
            "no step improves the likelihood".into(),
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Data made up for this check; 24 rows, two predictors, four categories.
    fn example() -> (Vec<Vec<f64>>, Vec<usize>) {
        let x1 = [
            0.5, 1.2, -0.3, 2.1, 0.8, -1.0, 1.5, 0.0, 2.5, -0.7, 1.1, 0.3, -1.5, 1.9, 0.6, 2.2,
            -0.2, 0.9, 1.4, -0.9, 0.1, 1.7, 2.8, -1.2,
        ];
        let x2 = [
            1., 0., 1., 1., 0., 0., 1., 0., 1., 1., 0., 1., 0., 0., 1., 1., 0., 0., 1., 0., 1., 0.,
            1., 1.,
        ];
        let y = [
            1, 2, 0, 3, 1, 0, 2, 1, 3, 0, 2, 1, 0, 2, 2, 3, 0, 1, 3, 1, 0, 2, 3, 1,
        ];
        let rows = x1.iter().zip(x2).map(|(a, b)| vec![*a, b]).collect();
        (rows, y.to_vec())
    }

    /// Reference: statsmodels 0.15.0 `OrderedModel(y, X, distr="logit").fit(method=
    /// "newton", tol=1e-12)` on `example()`: slopes [3.022486458670856,
    /// 0.9883785444480725], thresholds [-0.6218489927521907, 2.941463176155607,
    /// 6.2537861187116786], log-likelihood -16.97790673866046, predicted row 0
    /// [0.04223024390019901, 0.5664674685964015, 0.36841821920438844,
    /// 0.022884068299011018].
    #[test]
    fn unpenalised_fit_matches_statsmodels_ordered_model() {
        let (rows, y) = example();
        let fit = fit_ordinal(&rows, &y, 4, OrdinalOptions::default()).unwrap();
        let close = |a: &[f64], b: &[f64]| a.iter().zip(b).all(|(x, y)| (x - y).abs() < 1e-7);
        assert!(
            close(&fit.slopes, &[3.022486458670856, 0.9883785444480725]),
            "{fit:?}"
        );
        assert!(close(
            &fit.thresholds,
            &[-0.6218489927521907, 2.941463176155607, 6.2537861187116786]
        ));
        assert!((fit.log_likelihood - -16.97790673866046).abs() < 1e-9);
        let p = fit.predict(&rows[0]);
        assert!(close(
            &p,
            &[
                0.04223024390019901,
                0.5664674685964015,
                0.36841821920438844,
                0.022884068299011018
            ]
        ));
    }

    /// A ridge penalty shrinks the slopes toward 0 and keeps the distribution proper.
    #[test]
    fn ridge_shrinks_slopes() {
        let (rows, y) = example();
        let free = fit_ordinal(&rows, &y, 4, OrdinalOptions::default()).unwrap();
        let ridge = fit_ordinal(
            &rows,
            &y,
            4,
            OrdinalOptions {
                l2: 5.0,
                ..Default::default()
            },
        )
        .unwrap();
        assert!(ridge.slopes[0].abs() < free.slopes[0].abs());
        assert!(ridge.log_likelihood < free.log_likelihood);
        let p = ridge.predict(&[0.3, 1.0]);
        assert!((p.iter().sum::<f64>() - 1.0).abs() < 1e-12);
    }

    #[test]
    fn absent_category_gets_probability_zero() {
        let (rows, y) = example();
        // shift to positions 0, 2, 3, 4 on a five-point scale: position 1 unused
        let y: Vec<usize> = y.iter().map(|&v| if v == 0 { 0 } else { v + 1 }).collect();
        let fit = fit_ordinal(
            &rows,
            &y,
            5,
            OrdinalOptions {
                l2: 1.0,
                ..Default::default()
            },
        )
        .unwrap();
        let p = fit.predict(&rows[3]);
        assert_eq!(p.len(), 5);
        assert_eq!(p[1], 0.0);
        assert!((p.iter().sum::<f64>() - 1.0).abs() < 1e-12);
    }
}
