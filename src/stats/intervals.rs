//! Statistics stage: intervals and tests for a single proportion. Input: counts of
//! successes and trials, a target level. Output: the normal quantile, the Wilson
//! score interval and the exact two-sided binomial p-value. Never does I/O and
//! never approximates the binomial test with a normal curve.

use statrs::distribution::{Binomial, Discrete};

use crate::stats::StatsError;

/// Relative tolerance scipy's `binomtest` (scipy ≥ 1.7) uses when deciding which
/// outcomes are "as extreme as" the observed one, so rounding noise in equal
/// probabilities (e.g. k and n − k when p = 0.5) does not drop a tail.
const BINOM_RELATIVE_TOLERANCE: f64 = 1e-7;

/// Standard normal quantile Φ⁻¹(p) for p in (0, 1), checked; the value comes from
/// [`crate::stats::bootstrap::normal_quantile`] (statrs polished by Newton steps).
pub fn normal_quantile(p: f64) -> Result<f64, StatsError> {
    if !(p > 0.0 && p < 1.0) {
        return Err(StatsError::OutOfRange {
            value: p.to_string(),
            allowed: "a probability in (0, 1)".into(),
        });
    }
    Ok(crate::stats::bootstrap::normal_quantile(p))
}

/// Two-sided critical value z_{1−α/2} for a (1 − α) interval.
pub fn z_two_sided(alpha: f64) -> Result<f64, StatsError> {
    if !(alpha > 0.0 && alpha < 1.0) {
        return Err(StatsError::OutOfRange {
            value: alpha.to_string(),
            allowed: "alpha in (0, 1)".into(),
        });
    }
    normal_quantile(1.0 - alpha / 2.0)
}

/// Wilson (1927) score interval for `successes` out of `trials` at level 1 − `alpha`.
///
/// centre = (x + z²/2)/(n + z²), half-width = z·√n/(n + z²)·√(p̂(1 − p̂) + z²/(4n));
/// the ends are clamped to [0, 1] to remove rounding noise at x = 0 or x = n.
pub fn wilson_interval(successes: u64, trials: u64, alpha: f64) -> Result<(f64, f64), StatsError> {
    if trials == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    if successes > trials {
        return Err(StatsError::OutOfRange {
            value: successes.to_string(),
            allowed: format!("at most {trials} successes"),
        });
    }
    let z = z_two_sided(alpha)?;
    let (x, n) = (successes as f64, trials as f64);
    let p_hat = x / n;
    let z2 = z * z;
    let centre = (x + z2 / 2.0) / (n + z2);
    let half = z * n.sqrt() / (n + z2) * (p_hat * (1.0 - p_hat) + z2 / (4.0 * n)).sqrt();
    Ok((
        (centre - half).clamp(0.0, 1.0),
        (centre + half).clamp(0.0, 1.0),
    ))
}

/// Wilson (1927) 95% score interval.
pub fn wilson_95(successes: u64, trials: u64) -> Result<(f64, f64), StatsError> {
    wilson_interval(successes, trials, 0.05)
}

/// Exact two-sided binomial test p-value of `successes` out of `trials` against `p`.
///
/// Follows scipy.stats.binomtest: sums the probabilities of every outcome whose
/// probability is at most the observed one times (1 + 1e-7); returns 1 when the
/// observed count equals n·p; capped at 1.
pub fn binomial_test_two_sided(successes: u64, trials: u64, p: f64) -> Result<f64, StatsError> {
    if trials == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    if successes > trials {
        return Err(StatsError::OutOfRange {
            value: successes.to_string(),
            allowed: format!("at most {trials} successes"),
        });
    }
    if !(0.0..=1.0).contains(&p) {
        return Err(StatsError::OutOfRange {
            value: p.to_string(),
            allowed: "p in [0, 1]".into(),
        });
    }
    if successes as f64 == p * trials as f64 {
        return Ok(1.0);
    }
    let dist = Binomial::new(p, trials).expect("p was checked to lie in [0, 1]");
    let observed = dist.pmf(successes);
    let bound = observed * (1.0 + BINOM_RELATIVE_TOLERANCE);
    let p_value: f64 = (0..=trials)
        .map(|i| dist.pmf(i))
        .filter(|&q| q <= bound)
        .sum();
    Ok(p_value.min(1.0))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// METHODS section 10 ([lib] scipy via ppi-python): z_{0.975} = 1.959963984540054;
    /// z_{0.95} = 1.6448536269514715 and z_{0.995} = 2.5758293035489 from Python's
    /// statistics.NormalDist.inv_cdf (Wichura 1988, AS241) evaluated here.
    #[test]
    fn normal_quantile_matches_reference_values() {
        assert!((z_two_sided(0.05).unwrap() - 1.959963984540054).abs() < 1e-12);
        assert!((z_two_sided(0.1).unwrap() - 1.6448536269514715).abs() < 1e-12);
        assert!((z_two_sided(0.01).unwrap() - 2.5758293035489).abs() < 1e-12);
        assert!((normal_quantile(0.5).unwrap()).abs() < 1e-15);
        assert!(normal_quantile(1.0).is_err());
        assert!(z_two_sided(0.0).is_err());
    }

    /// Newcombe (1998, Stat. Med. 17:857) Table I, Wilson score method, from memory:
    /// 81/263 → (0.2553, 0.3662), 15/148 → (0.0624, 0.1605), 0/20 → (0, 0.1611),
    /// 1/29 → (0.0061, 0.1718); 4 d.p. display, so tolerance 5e-5.
    #[test]
    fn wilson_matches_newcombe_table_from_memory() {
        let cases = [
            (81, 263, 0.2553, 0.3662),
            (15, 148, 0.0624, 0.1605),
            (0, 20, 0.0, 0.1611),
            (1, 29, 0.0061, 0.1718),
        ];
        for (x, n, lo, hi) in cases {
            let (l, h) = wilson_95(x, n).unwrap();
            assert!(
                (l - lo).abs() < 5e-5 && (h - hi).abs() < 5e-5,
                "{x}/{n}: ({l}, {h})"
            );
        }
    }

    /// Wilson (1927) formula evaluated here in Python with z = 1.9599639845400536:
    /// 9/16 → (0.33178556398811904, 0.7690134759450764); at x = 0 the lower end is
    /// exactly 0 and the upper z²/(n + z²).
    #[test]
    fn wilson_matches_formula_and_is_clamped() {
        let (l, h) = wilson_95(9, 16).unwrap();
        assert!((l - 0.33178556398811904).abs() < 1e-12 && (h - 0.7690134759450764).abs() < 1e-12);
        let (l0, h0) = wilson_95(0, 20).unwrap();
        let z2 = 1.959963984540054_f64.powi(2);
        assert_eq!(l0, 0.0);
        assert!((h0 - z2 / (20.0 + z2)).abs() < 1e-12);
        let (_, h10) = wilson_95(10, 10).unwrap();
        assert!(h10 <= 1.0);
        assert!(wilson_95(3, 2).is_err());
        assert!(wilson_95(0, 0).is_err());
    }

    /// A wider level gives a wider interval (90% inside 95% inside 99%).
    #[test]
    fn wilson_intervals_nest_by_level() {
        let i90 = wilson_interval(9, 16, 0.10).unwrap();
        let i95 = wilson_95(9, 16).unwrap();
        let i99 = wilson_interval(9, 16, 0.01).unwrap();
        assert!(i99.0 < i95.0 && i95.0 < i90.0 && i90.1 < i95.1 && i95.1 < i99.1);
    }

    /// Exact binomial test from its definition, summed in exact fractions in Python:
    /// 9/16 at 0.5 → 26333/32768 = 0.803619384765625; 3/10 → 11/32; 0/5 → 1/16;
    /// 6/10 at 0.3 → 0.0755965123; 1/10 at 0.3 → 0.2995766785; 2/12 at 0.25 →
    /// 3111739/4194304 = 0.741896390914917 (scipy.stats.binomtest convention).
    #[test]
    fn binomial_test_matches_exact_sums() {
        let cases = [
            (9, 16, 0.5, 0.803619384765625),
            (3, 10, 0.5, 0.34375),
            (0, 5, 0.5, 0.0625),
            (6, 10, 0.3, 0.0755965123),
            (1, 10, 0.3, 0.2995766785),
            (2, 12, 0.25, 0.741896390914917),
        ];
        for (k, n, p, want) in cases {
            let got = binomial_test_two_sided(k, n, p).unwrap();
            assert!(
                (got - want).abs() < 1e-12,
                "{k}/{n} at {p}: {got} vs {want}"
            );
        }
    }

    /// At p = 0.5 the two tails mirror: k and n − k give the same p-value, and the
    /// centre gives exactly 1 (scipy returns 1 when k = n·p).
    #[test]
    fn binomial_test_is_symmetric_at_one_half() {
        for k in 0..=15u64 {
            let a = binomial_test_two_sided(k, 15, 0.5).unwrap();
            let b = binomial_test_two_sided(15 - k, 15, 0.5).unwrap();
            assert!((a - b).abs() < 1e-14);
        }
        assert_eq!(binomial_test_two_sided(8, 16, 0.5).unwrap(), 1.0);
        assert!(binomial_test_two_sided(1, 0, 0.5).is_err());
        assert!(binomial_test_two_sided(1, 2, 1.5).is_err());
    }
}
