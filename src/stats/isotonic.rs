//! Statistics stage: isotonic (monotone non-decreasing) regression by the pool
//! adjacent violators algorithm (Ayer et al. 1955; Barlow et al. 1972). Input: one
//! predictor, outcomes and optional weights. Output: the fitted step points and
//! predictions for new values. Never does I/O.
//!
//! Conventions follow scikit-learn 1.9.1 `IsotonicRegression(out_of_bounds="clip")`:
//! rows with equal x are first pooled into their weighted mean; predictions between
//! fitted points interpolate linearly; predictions outside the training range take
//! the nearest end value.

use serde::{Deserialize, Serialize};

use crate::stats::StatsError;

/// A fitted isotonic regression: increasing x with non-decreasing fitted values.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct IsotonicFit {
    /// Distinct training x values, ascending.
    pub x: Vec<f64>,
    /// Fitted value at each x (non-decreasing).
    pub y: Vec<f64>,
}

impl IsotonicFit {
    /// Prediction at `v`: linear between fitted points, clipped to the end values.
    pub fn predict(&self, v: f64) -> f64 {
        let n = self.x.len();
        if v <= self.x[0] {
            return self.y[0];
        }
        if v >= self.x[n - 1] {
            return self.y[n - 1];
        }
        let hi = self.x.partition_point(|&a| a <= v);
        let lo = hi - 1;
        let t = (v - self.x[lo]) / (self.x[hi] - self.x[lo]);
        self.y[lo] + t * (self.y[hi] - self.y[lo])
    }
}

/// Fits a non-decreasing function of `x` to `y` (weights default to 1).
pub fn fit_isotonic(
    x: &[f64],
    y: &[f64],
    weights: Option<&[f64]>,
) -> Result<IsotonicFit, StatsError> {
    if x.len() != y.len() {
        return Err(StatsError::LengthMismatch {
            left: x.len(),
            right: y.len(),
        });
    }
    if x.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    let ones = vec![1.0; x.len()];
    let w = weights.unwrap_or(&ones);
    if w.len() != x.len() {
        return Err(StatsError::LengthMismatch {
            left: x.len(),
            right: w.len(),
        });
    }
    if let Some(bad) = x.iter().chain(y).find(|v| !v.is_finite()) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a finite value".into(),
        });
    }
    if let Some(bad) = w.iter().find(|v| !(v.is_finite() && **v > 0.0)) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a weight > 0".into(),
        });
    }
    let mut order: Vec<usize> = (0..x.len()).collect();
    order.sort_by(|&a, &b| x[a].total_cmp(&x[b]));
    // Pool equal x into (x, weighted mean of y, total weight).
    let mut xs: Vec<f64> = Vec::new();
    let mut blocks: Vec<(f64, f64, usize)> = Vec::new(); // (mean, weight, points covered)
    for i in order {
        if xs.last() == Some(&x[i]) {
            let b = blocks.last_mut().expect("one block per distinct x");
            let total = b.1 + w[i];
            b.0 = (b.0 * b.1 + y[i] * w[i]) / total;
            b.1 = total;
        } else {
            xs.push(x[i]);
            blocks.push((y[i], w[i], 1));
        }
    }
    Ok(IsotonicFit {
        x: xs,
        y: pool_adjacent_violators(blocks),
    })
}

/// PAVA over (value, weight, count) blocks; returns one fitted value per input block.
fn pool_adjacent_violators(points: Vec<(f64, f64, usize)>) -> Vec<f64> {
    let mut stack: Vec<(f64, f64, usize)> = Vec::new();
    for p in points {
        stack.push(p);
        while stack.len() >= 2 && stack[stack.len() - 2].0 > stack[stack.len() - 1].0 {
            let b = stack.pop().expect("len >= 2");
            let a = stack.pop().expect("len >= 2");
            let weight = a.1 + b.1;
            stack.push(((a.0 * a.1 + b.0 * b.1) / weight, weight, a.2 + b.2));
        }
    }
    stack
        .into_iter()
        .flat_map(|(v, _, n)| std::iter::repeat(v).take(n))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    const X: [f64; 10] = [1., 2., 2., 3., 4., 5., 6., 6., 7., 8.];
    const Y: [f64; 10] = [1., 3., 2., 2., 5., 4., 4., 6., 5., 7.];
    const W: [f64; 10] = [1., 1., 2., 1., 1., 3., 1., 1., 1., 1.];
    const Q: [f64; 9] = [0.0, 1.0, 1.5, 2.0, 3.5, 4.5, 6.0, 7.5, 9.0];

    fn check(fit: &IsotonicFit, expected: &[f64]) {
        for (q, e) in Q.iter().zip(expected) {
            assert!(
                (fit.predict(*q) - e).abs() < 1e-12,
                "at {q}: {} vs {e}",
                fit.predict(*q)
            );
        }
    }

    /// Reference: scikit-learn 1.9.1 `IsotonicRegression(out_of_bounds="clip")` fitted
    /// on X, Y (made up for this check, with tied x), predicted at Q: [1.0, 1.0,
    /// 1.6666666666666667, 2.3333333333333335, 3.416666666666667, 4.5, 5.0, 6.0, 7.0].
    #[test]
    fn unweighted_fit_matches_scikit_learn() {
        let fit = fit_isotonic(&X, &Y, None).unwrap();
        check(
            &fit,
            &[
                1.0,
                1.0,
                1.6666666666666667,
                2.3333333333333335,
                3.416666666666667,
                4.5,
                5.0,
                6.0,
                7.0,
            ],
        );
    }

    /// Reference: the same call with `sample_weight=W`: [1.0, 1.0, 1.625, 2.25, 3.25,
    /// 4.25, 5.0, 6.0, 7.0].
    #[test]
    fn weighted_fit_matches_scikit_learn() {
        let fit = fit_isotonic(&X, &Y, Some(&W)).unwrap();
        check(&fit, &[1.0, 1.0, 1.625, 2.25, 3.25, 4.25, 5.0, 6.0, 7.0]);
        assert!(fit.y.windows(2).all(|p| p[0] <= p[1]));
    }
}
