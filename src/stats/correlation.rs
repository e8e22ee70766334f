//! Statistics stage: correlation between judge and human scores. Input: two paired
//! slices of finite numbers. Output: Pearson r, Spearman rho (average ranks for ties),
//! Kendall tau-b and tau-c, with two-sided p-values where a standard test exists.
//! Never does I/O and never drops or reorders pairs.

use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal, StudentsT};

use crate::stats::StatsError;

/// A correlation coefficient with its two-sided p-value for "no association".
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Correlation {
    /// The coefficient, in [-1, 1].
    pub coefficient: f64,
    /// Two-sided p-value; `None` when the test is undefined (fewer than 3 pairs).
    pub p_value: Option<f64>,
    /// Number of pairs.
    pub n: usize,
}

fn check(x: &[f64], y: &[f64]) -> Result<(), StatsError> {
    if x.len() != y.len() {
        return Err(StatsError::LengthMismatch {
            left: x.len(),
            right: y.len(),
        });
    }
    if x.len() < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: x.len(),
        });
    }
    if let Some(bad) = x.iter().chain(y).find(|v| !v.is_finite()) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a finite number".into(),
        });
    }
    Ok(())
}

fn pearson_r(x: &[f64], y: &[f64]) -> Result<f64, StatsError> {
    let n = x.len() as f64;
    let (mx, my) = (x.iter().sum::<f64>() / n, y.iter().sum::<f64>() / n);
    let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
    for (a, b) in x.iter().zip(y) {
        let (dx, dy) = (a - mx, b - my);
        sxy += dx * dy;
        sxx += dx * dx;
        syy += dy * dy;
    }
    if sxx == 0.0 || syy == 0.0 {
        return Err(StatsError::Undefined(
            "one of the inputs is constant".into(),
        ));
    }
    Ok((sxy / (sxx.sqrt() * syy.sqrt())).clamp(-1.0, 1.0))
}

/// Two-sided p-value of r under H0 rho = 0: t = r sqrt((n-2)/(1-r^2)) on n-2 degrees of freedom.
fn t_test_p(r: f64, n: usize) -> Option<f64> {
    if n < 3 {
        return None;
    }
    if (1.0 - r.abs()) <= 0.0 {
        return Some(0.0);
    }
    let df = (n - 2) as f64;
    let t = r * (df / (1.0 - r * r)).sqrt();
    let dist = StudentsT::new(0.0, 1.0, df).ok()?;
    Some((2.0 * dist.sf(t.abs())).min(1.0))
}

/// Pearson's product-moment correlation (Pearson 1896) with its Student-t p-value.
pub fn pearson(x: &[f64], y: &[f64]) -> Result<Correlation, StatsError> {
    check(x, y)?;
    let r = pearson_r(x, y)?;
    Ok(Correlation {
        coefficient: r,
        p_value: t_test_p(r, x.len()),
        n: x.len(),
    })
}

/// Ranks 1..n with ties given their average rank.
pub fn average_ranks(v: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..v.len()).collect();
    order.sort_by(|&a, &b| v[a].total_cmp(&v[b]));
    let mut ranks = vec![0.0; v.len()];
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && v[order[end]] == v[order[start]] {
            end += 1;
        }
        // positions start..end (0-based) share the mean of ranks start+1..=end
        let rank = (start + 1 + end) as f64 / 2.0;
        for &i in &order[start..end] {
            ranks[i] = rank;
        }
        start = end;
    }
    ranks
}

/// Spearman's rho (Spearman 1904): Pearson on average ranks, with the Student-t p-value.
pub fn spearman(x: &[f64], y: &[f64]) -> Result<Correlation, StatsError> {
    check(x, y)?;
    let r = pearson_r(&average_ranks(x), &average_ranks(y))?;
    Ok(Correlation {
        coefficient: r,
        p_value: t_test_p(r, x.len()),
        n: x.len(),
    })
}

/// Pair counts behind Kendall's tau.
struct PairCounts {
    concordant: f64,
    discordant: f64,
}

fn pair_counts(x: &[f64], y: &[f64]) -> PairCounts {
    let (mut concordant, mut discordant) = (0.0, 0.0);
    for i in 0..x.len() {
        for j in i + 1..x.len() {
            let s = (x[i] - x[j]) * (y[i] - y[j]);
            if s > 0.0 {
                concordant += 1.0;
            } else if s < 0.0 {
                discordant += 1.0;
            }
        }
    }
    PairCounts {
        concordant,
        discordant,
    }
}

/// Sizes of the groups of tied values.
fn tie_groups(v: &[f64]) -> Vec<f64> {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let mut groups = Vec::new();
    let mut start = 0;
    for i in 1..=s.len() {
        if i == s.len() || s[i] != s[start] {
            groups.push((i - start) as f64);
            start = i;
        }
    }
    groups
}

/// Kendall's tau-b (Kendall 1945): `(C - D) / sqrt((n0 - n1)(n0 - n2))`, ties corrected.
///
/// The p-value is the normal approximation with the tie-corrected variance of `C - D`
/// (Kendall 1970, "Rank Correlation Methods", ch. 4), as scipy computes it when ties are present;
/// for small tie-free samples scipy uses the exact distribution instead.
pub fn kendall_tau_b(x: &[f64], y: &[f64]) -> Result<Correlation, StatsError> {
    check(x, y)?;
    let n = x.len() as f64;
    let pc = pair_counts(x, y);
    let (tx, ty) = (tie_groups(x), tie_groups(y));
    let pairs = |g: &[f64]| g.iter().map(|t| t * (t - 1.0) / 2.0).sum::<f64>();
    let n0 = n * (n - 1.0) / 2.0;
    let (n1, n2) = (pairs(&tx), pairs(&ty));
    if n1 == n0 || n2 == n0 {
        return Err(StatsError::Undefined(
            "one of the inputs is constant".into(),
        ));
    }
    let s = pc.concordant - pc.discordant;
    let tau = (s / ((n0 - n1).sqrt() * (n0 - n2).sqrt())).clamp(-1.0, 1.0);
    let p_value = if x.len() < 3 {
        None
    } else {
        let m = n * (n - 1.0);
        let v0 = |g: &[f64]| {
            g.iter()
                .map(|t| t * (t - 1.0) * (2.0 * t + 5.0))
                .sum::<f64>()
        };
        let v2 = |g: &[f64]| g.iter().map(|t| t * (t - 1.0) * (t - 2.0)).sum::<f64>();
        let var = (m * (2.0 * n + 5.0) - v0(&tx) - v0(&ty)) / 18.0
            + 2.0 * n1 * n2 / m
            + v2(&tx) * v2(&ty) / (9.0 * m * (n - 2.0));
        let normal = Normal::new(0.0, 1.0).expect("standard normal parameters are valid");
        Some((2.0 * normal.sf(s.abs() / var.sqrt())).min(1.0))
    };
    Ok(Correlation {
        coefficient: tau,
        p_value,
        n: x.len(),
    })
}

/// Kendall's tau-c (Stuart 1953): `2 (C - D) / (n^2 (m - 1) / m)`, `m` = fewer distinct values of the two.
pub fn kendall_tau_c(x: &[f64], y: &[f64]) -> Result<f64, StatsError> {
    check(x, y)?;
    let m = tie_groups(x).len().min(tie_groups(y).len()) as f64;
    if m < 2.0 {
        return Err(StatsError::Undefined(
            "one of the inputs is constant".into(),
        ));
    }
    let n = x.len() as f64;
    let pc = pair_counts(x, y);
    Ok(2.0 * (pc.concordant - pc.discordant) / (n * n * (m - 1.0) / m))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(got: f64, want: f64, tol: f64) {
        assert!(
            (got - want).abs() <= tol,
            "got {got}, want {want} (tol {tol})"
        );
    }

    const X: [f64; 8] = [1.0, 2.0, 2.0, 3.0, 4.0, 4.0, 4.0, 5.0];
    const Y: [f64; 8] = [2.0, 1.0, 3.0, 3.0, 4.0, 5.0, 4.0, 5.0];

    /// METHODS 5: example with ties, Pearson r 0.8697668414213696, p 0.004996783713762261
    /// [lib] scipy 1.12.0 `pearsonr`.
    #[test]
    fn pearson_matches_scipy_with_ties() {
        let c = pearson(&X, &Y).expect("valid");
        close(c.coefficient, 0.8697668414213696, 1e-12);
        close(c.p_value.expect("n >= 3"), 0.004996783713762261, 1e-12);
    }

    /// METHODS 5: Spearman rho 0.9063208090792971, p 0.0019135757577715949, average ranks
    /// x 1,2.5,2.5,4,6,6,6,8 and y 2,1,3.5,3.5,5.5,7.5,5.5,7.5 [lib] scipy 1.12.0 `spearmanr`.
    #[test]
    fn spearman_matches_scipy_with_average_ranks() {
        assert_eq!(
            average_ranks(&X),
            vec![1.0, 2.5, 2.5, 4.0, 6.0, 6.0, 6.0, 8.0]
        );
        assert_eq!(
            average_ranks(&Y),
            vec![2.0, 1.0, 3.5, 3.5, 5.5, 7.5, 5.5, 7.5]
        );
        let c = spearman(&X, &Y).expect("valid");
        close(c.coefficient, 0.9063208090792971, 1e-12);
        close(c.p_value.expect("n >= 3"), 0.0019135757577715949, 1e-12);
    }

    /// METHODS 5: Kendall tau-b 0.816496580927726 (= sqrt(2/3), C 21, D 1), p
    /// 0.008691011063697428 [lib] scipy 1.12.0 `kendalltau` default.
    #[test]
    fn kendall_tau_b_matches_scipy_with_ties() {
        let c = kendall_tau_b(&X, &Y).expect("valid");
        close(c.coefficient, 0.816496580927726, 1e-12);
        close(c.coefficient, (2.0f64 / 3.0).sqrt(), 1e-12);
        close(c.p_value.expect("n >= 3"), 0.008691011063697428, 1e-12);
    }

    /// METHODS 5: Kendall tau-c 0.78125 [lib] scipy 1.12.0 `kendalltau(variant='c')`.
    #[test]
    fn kendall_tau_c_matches_scipy() {
        close(kendall_tau_c(&X, &Y).expect("valid"), 0.78125, 1e-12);
    }

    /// Property: a variable correlates perfectly with itself under every coefficient.
    #[test]
    fn perfect_association_gives_one() {
        close(pearson(&X, &X).expect("valid").coefficient, 1.0, 1e-12);
        close(spearman(&X, &X).expect("valid").coefficient, 1.0, 1e-12);
        close(
            kendall_tau_b(&X, &X).expect("valid").coefficient,
            1.0,
            1e-12,
        );
    }

    /// Property: every coefficient is symmetric in its two arguments.
    #[test]
    fn correlations_are_symmetric() {
        close(
            pearson(&Y, &X).expect("valid").coefficient,
            pearson(&X, &Y).expect("valid").coefficient,
            1e-14,
        );
        close(
            spearman(&Y, &X).expect("valid").coefficient,
            spearman(&X, &Y).expect("valid").coefficient,
            1e-14,
        );
        close(
            kendall_tau_b(&Y, &X).expect("valid").coefficient,
            kendall_tau_b(&X, &Y).expect("valid").coefficient,
            1e-14,
        );
        close(
            kendall_tau_c(&Y, &X).expect("valid"),
            kendall_tau_c(&X, &Y).expect("valid"),
            1e-14,
        );
    }

    #[test]
    fn constant_input_is_undefined() {
        let c = [3.0; 8];
        assert!(matches!(pearson(&X, &c), Err(StatsError::Undefined(_))));
        assert!(matches!(
            kendall_tau_b(&X, &c),
            Err(StatsError::Undefined(_))
        ));
        assert!(matches!(
            kendall_tau_c(&c, &Y),
            Err(StatsError::Undefined(_))
        ));
    }

    #[test]
    fn mismatched_or_non_finite_input_is_rejected() {
        assert!(matches!(
            pearson(&X, &Y[..7]),
            Err(StatsError::LengthMismatch { .. })
        ));
        assert!(matches!(
            spearman(&[1.0, f64::NAN], &[1.0, 2.0]),
            Err(StatsError::OutOfRange { .. })
        ));
    }
}
