//! Statistics stage: bootstrap confidence intervals by resampling items. Input: the
//! number of items, a seed, and a statistic that maps resampled item indices to a
//! value (or `None` where it is undefined, e.g. kappa on a one-category resample).
//! Output: replicates and percentile or BCa intervals. Never does I/O and never draws
//! a random number from anything but a ChaCha8 generator seeded with the given seed.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal};

use crate::stats::StatsError;

/// Bootstrap replicates of a statistic, with the resamples on which it was undefined.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Replicates {
    /// Values of the statistic on the resamples where it was defined, in draw order.
    pub values: Vec<f64>,
    /// Resamples on which the statistic returned `None` (left out of every interval).
    pub skipped: usize,
}

fn collect(values: impl Iterator<Item = Option<f64>>) -> Replicates {
    let (mut kept, mut skipped) = (Vec::new(), 0);
    for v in values {
        match v {
            Some(x) if x.is_finite() => kept.push(x),
            _ => skipped += 1,
        }
    }
    Replicates {
        values: kept,
        skipped,
    }
}

/// Draws `resamples` bootstrap resamples of `n_items` items (with replacement) and
/// evaluates `statistic` on each list of drawn item indices.
pub fn bootstrap_replicates<F>(
    n_items: usize,
    resamples: usize,
    seed: u64,
    statistic: F,
) -> Result<Replicates, StatsError>
where
    F: Fn(&[usize]) -> Option<f64>,
{
    if n_items == 0 || resamples == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut idx = vec![0usize; n_items];
    Ok(collect((0..resamples).map(|_| {
        for slot in idx.iter_mut() {
            *slot = rng.random_range(0..n_items);
        }
        statistic(&idx)
    })))
}

/// Largest item count for [`exhaustive_replicates`]: 7^7 = 823,543 resamples.
pub const MAX_EXHAUSTIVE_ITEMS: usize = 7;

/// The "ideal" bootstrap: the statistic on all `n^n` ordered resamples (for tests and tiny data).
pub fn exhaustive_replicates<F>(n_items: usize, statistic: F) -> Result<Replicates, StatsError>
where
    F: Fn(&[usize]) -> Option<f64>,
{
    if n_items == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    if n_items > MAX_EXHAUSTIVE_ITEMS {
        return Err(StatsError::OutOfRange {
            value: n_items.to_string(),
            allowed: format!("at most {MAX_EXHAUSTIVE_ITEMS} items for exhaustive resampling"),
        });
    }
    let total = n_items.pow(n_items as u32);
    let mut idx = vec![0usize; n_items];
    Ok(collect((0..total).map(|code| {
        // Write `code` in base n: every ordered resample appears exactly once.
        let mut c = code;
        for slot in idx.iter_mut() {
            *slot = c % n_items;
            c /= n_items;
        }
        statistic(&idx)
    })))
}

/// Leave-one-out values `theta_(i)`; `None` where the statistic is undefined.
pub fn jackknife<F>(n_items: usize, statistic: F) -> Result<Vec<Option<f64>>, StatsError>
where
    F: Fn(&[usize]) -> Option<f64>,
{
    if n_items < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: n_items,
        });
    }
    Ok((0..n_items)
        .map(|leave| {
            let idx: Vec<usize> = (0..n_items).filter(|&i| i != leave).collect();
            statistic(&idx).filter(|v| v.is_finite())
        })
        .collect())
}

/// Quantile `q` of sorted values with linear interpolation (Hyndman & Fan 1996 type 7, numpy default).
pub fn quantile_linear(sorted: &[f64], q: f64) -> Result<f64, StatsError> {
    if sorted.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    if !(0.0..=1.0).contains(&q) {
        return Err(StatsError::OutOfRange {
            value: q.to_string(),
            allowed: "a probability in [0, 1]".into(),
        });
    }
    let h = (sorted.len() - 1) as f64 * q;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    let (a, b, t) = (sorted[lo], sorted[hi], h - lo as f64);
    // numpy's lerp: interpolate from the nearer end, so exact neighbours stay exact.
    Ok(if t >= 0.5 {
        b - (b - a) * (1.0 - t)
    } else {
        a + (b - a) * t
    })
}

/// How BCa estimates the bias correction z0 when replicates tie with the estimate.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum BiasCorrection {
    /// `z0 = Phi^-1(#{theta* < theta} / B)` (Efron 1987).
    Strict,
    /// `z0 = Phi^-1((#{theta* < theta} + #{theta* <= theta}) / 2B)` (scipy's rule).
    MidRank,
}

/// Which interval to build from the replicates.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum IntervalMethod {
    /// Percentile interval (Efron & Tibshirani 1993, ch. 13).
    Percentile,
    /// Bias-corrected and accelerated interval (Efron 1987; Efron & Tibshirani 1993, ch. 14).
    Bca(BiasCorrection),
}

/// A bootstrap confidence interval and how it was obtained.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BootstrapInterval {
    /// The statistic on the original items.
    pub estimate: f64,
    /// Lower end.
    pub lower: f64,
    /// Upper end.
    pub upper: f64,
    /// Coverage, e.g. 0.95.
    pub level: f64,
    /// Interval method.
    pub method: IntervalMethod,
    /// Replicate quantile levels used for the ends (alpha/2 and 1 - alpha/2 for percentile).
    pub quantiles: (f64, f64),
    /// BCa bias correction z0 (`None` for percentile).
    pub z0: Option<f64>,
    /// BCa acceleration a (`None` for percentile).
    pub acceleration: Option<f64>,
    /// Replicates used.
    pub replicates: usize,
    /// Resamples on which the statistic was undefined.
    pub skipped: usize,
}

/// ln sqrt(2 pi), for the normal density.
const LN_SQRT_2PI: f64 = 0.918_938_533_204_672_7;

/// Standard normal distribution function, accurate to about 1e-16 absolute.
///
/// statrs 0.18's `erfc` is off by about 1e-12 near the 2.5% point, too coarse to
/// reproduce published BCa levels, so: Marsaglia (2004, J. Stat. Softw. 11(4)) Taylor
/// series `Phi(x) = 1/2 + phi(x) (x + x^3/3 + x^5/(3*5) + ...)` for |x| < 3, and the
/// Laplace continued fraction `Q(x) = phi(x) / (x + 1/(x + 2/(x + ...)))` for the tails.
pub fn normal_cdf(x: f64) -> f64 {
    if x.is_nan() {
        return f64::NAN;
    }
    if x.abs() < 3.0 {
        let q = x * x;
        let (mut sum, mut prev, mut term, mut i) = (x, 0.0, x, 1.0);
        while sum != prev {
            prev = sum;
            i += 2.0;
            term *= q / i;
            sum = prev + term;
        }
        return 0.5 + sum * (-0.5 * q - LN_SQRT_2PI).exp();
    }
    let z = x.abs();
    let mut d = z;
    for k in (1..=100).rev() {
        d = z + k as f64 / d;
    }
    let tail = (-0.5 * z * z - LN_SQRT_2PI).exp() / d;
    if x > 0.0 {
        1.0 - tail
    } else {
        tail
    }
}

/// Standard normal quantile `Phi^-1(p)`: statrs' value polished by Newton steps on
/// [`normal_cdf`]; `-inf`/`+inf` at 0/1 and NaN outside [0, 1].
pub fn normal_quantile(p: f64) -> f64 {
    if !(0.0..=1.0).contains(&p) {
        return f64::NAN;
    }
    if p == 0.0 || p == 1.0 {
        return if p == 0.0 {
            f64::NEG_INFINITY
        } else {
            f64::INFINITY
        };
    }
    if p > 0.5 {
        return -normal_quantile(1.0 - p); // exact: 1 - p has no rounding for p >= 0.5
    }
    let start = Normal::new(0.0, 1.0)
        .expect("standard normal parameters are valid")
        .inverse_cdf(p);
    let mut x = start;
    for _ in 0..3 {
        let density = (-0.5 * x * x - LN_SQRT_2PI).exp();
        if density == 0.0 {
            break;
        }
        x -= (normal_cdf(x) - p) / density;
    }
    if x.is_finite() {
        x
    } else {
        start
    }
}

fn check_level(level: f64) -> Result<(), StatsError> {
    if !(level > 0.0 && level < 1.0) {
        return Err(StatsError::OutOfRange {
            value: level.to_string(),
            allowed: "a level in (0, 1)".into(),
        });
    }
    Ok(())
}

fn sorted_values(reps: &Replicates) -> Result<Vec<f64>, StatsError> {
    if reps.values.len() < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: reps.values.len(),
        });
    }
    let mut s = reps.values.clone();
    s.sort_by(f64::total_cmp);
    Ok(s)
}

/// Percentile interval: replicate quantiles at alpha/2 and 1 - alpha/2 (type 7).
pub fn percentile_interval(
    reps: &Replicates,
    estimate: f64,
    level: f64,
) -> Result<BootstrapInterval, StatsError> {
    check_level(level)?;
    let s = sorted_values(reps)?;
    let q = ((1.0 - level) / 2.0, (1.0 + level) / 2.0);
    Ok(BootstrapInterval {
        estimate,
        lower: quantile_linear(&s, q.0)?,
        upper: quantile_linear(&s, q.1)?,
        level,
        method: IntervalMethod::Percentile,
        quantiles: q,
        z0: None,
        acceleration: None,
        replicates: s.len(),
        skipped: reps.skipped,
    })
}

/// Jackknife acceleration `a = sum (m - t_i)^3 / (6 [sum (m - t_i)^2]^1.5)` (Efron 1987),
/// over the defined leave-one-out values; 0 when they are all equal.
pub fn acceleration(jack: &[Option<f64>]) -> Result<f64, StatsError> {
    let vals: Vec<f64> = jack.iter().flatten().copied().collect();
    if vals.len() < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: vals.len(),
        });
    }
    let mean = vals.iter().sum::<f64>() / vals.len() as f64;
    let (s2, s3) = vals.iter().fold((0.0, 0.0), |(s2, s3), t| {
        let d = mean - t;
        (s2 + d * d, s3 + d * d * d)
    });
    Ok(if s2 == 0.0 {
        0.0
    } else {
        s3 / (6.0 * s2.powf(1.5))
    })
}

/// BCa interval from replicates, the estimate and jackknife values (Efron 1987).
pub fn bca_interval(
    reps: &Replicates,
    estimate: f64,
    jack: &[Option<f64>],
    level: f64,
    bias: BiasCorrection,
) -> Result<BootstrapInterval, StatsError> {
    check_level(level)?;
    let s = sorted_values(reps)?;
    let b = s.len() as f64;
    let below = s.iter().filter(|&&v| v < estimate).count() as f64;
    let share = match bias {
        BiasCorrection::Strict => below / b,
        BiasCorrection::MidRank => {
            (below + s.iter().filter(|&&v| v <= estimate).count() as f64) / (2.0 * b)
        }
    };
    if share <= 0.0 || share >= 1.0 {
        return Err(StatsError::Undefined(
            "the estimate lies outside the bootstrap distribution".into(),
        ));
    }
    let z0 = normal_quantile(share);
    let a = acceleration(jack)?;
    let adjust = |alpha: f64| {
        let z = normal_quantile(alpha);
        normal_cdf(z0 + (z0 + z) / (1.0 - a * (z0 + z)))
    };
    let q = (adjust((1.0 - level) / 2.0), adjust((1.0 + level) / 2.0));
    Ok(BootstrapInterval {
        estimate,
        lower: quantile_linear(&s, q.0)?,
        upper: quantile_linear(&s, q.1)?,
        level,
        method: IntervalMethod::Bca(bias),
        quantiles: q,
        z0: Some(z0),
        acceleration: Some(a),
        replicates: s.len(),
        skipped: reps.skipped,
    })
}

/// Seeded bootstrap interval of a statistic over `n_items` items, in one call.
pub fn bootstrap_interval<F>(
    n_items: usize,
    resamples: usize,
    seed: u64,
    level: f64,
    method: IntervalMethod,
    statistic: F,
) -> Result<BootstrapInterval, StatsError>
where
    F: Fn(&[usize]) -> Option<f64>,
{
    let all: Vec<usize> = (0..n_items).collect();
    let estimate = statistic(&all).filter(|v| v.is_finite()).ok_or_else(|| {
        StatsError::Undefined("the statistic is undefined on the full data".into())
    })?;
    let reps = bootstrap_replicates(n_items, resamples, seed, &statistic)?;
    match method {
        IntervalMethod::Percentile => percentile_interval(&reps, estimate, level),
        IntervalMethod::Bca(bias) => bca_interval(
            &reps,
            estimate,
            &jackknife(n_items, &statistic)?,
            level,
            bias,
        ),
    }
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

    const X: [f64; 5] = [1.0, 2.0, 4.0, 7.0, 11.0];

    fn mean_of(idx: &[usize]) -> Option<f64> {
        Some(idx.iter().map(|&i| X[i]).sum::<f64>() / idx.len() as f64)
    }

    /// METHODS 13: exhaustive bootstrap of the mean of x=[1,2,4,7,11] (all 3125 resamples):
    /// replicate SD (ddof 0) 1.624807680927192, 95% percentile CI (2.0, 8.4) [lib numpy/scipy].
    #[test]
    fn exhaustive_percentile_interval_matches_reference() {
        let reps = exhaustive_replicates(5, mean_of).expect("valid");
        assert_eq!((reps.values.len(), reps.skipped), (3125, 0));
        let m = reps.values.iter().sum::<f64>() / 3125.0;
        let sd = (reps.values.iter().map(|v| (v - m).powi(2)).sum::<f64>() / 3125.0).sqrt();
        close(sd, 1.624807680927192, 1e-12);
        let ci = percentile_interval(&reps, 5.0, 0.95).expect("valid");
        close(ci.lower, 2.0, 1e-12);
        close(ci.upper, 8.4, 1e-12);
    }

    /// METHODS 13: jackknife [6, 5.75, 5.25, 4.5, 3.5], a = 0.04103049699311091; strict z0
    /// -0.019653230774836956, alpha1 0.03211673013441205, alpha2 0.9816232129428711, BCa
    /// (2.2, 8.6) [lib numpy/scipy].
    #[test]
    fn exhaustive_bca_strict_matches_reference() {
        let reps = exhaustive_replicates(5, mean_of).expect("valid");
        let jack = jackknife(5, mean_of).expect("valid");
        assert_eq!(
            jack,
            vec![Some(6.0), Some(5.75), Some(5.25), Some(4.5), Some(3.5)]
        );
        let ci = bca_interval(&reps, 5.0, &jack, 0.95, BiasCorrection::Strict).expect("valid");
        close(ci.acceleration.expect("bca"), 0.04103049699311091, 1e-12);
        close(ci.z0.expect("bca"), -0.019653230774836956, 1e-12);
        close(ci.quantiles.0, 0.03211673013441205, 1e-12);
        close(ci.quantiles.1, 0.9816232129428711, 1e-12);
        close(ci.lower, 2.2, 1e-12);
        close(ci.upper, 8.6, 1e-12);
    }

    /// METHODS 13: scipy 1.12.0 mid-rank z0 0.04453243277008601, alpha1 0.041696286510188585,
    /// alpha2 0.9870818584204715, BCa (2.4, 8.8) [lib scipy `_bca_interval`].
    #[test]
    fn exhaustive_bca_mid_rank_matches_scipy() {
        let reps = exhaustive_replicates(5, mean_of).expect("valid");
        let jack = jackknife(5, mean_of).expect("valid");
        let ci = bca_interval(&reps, 5.0, &jack, 0.95, BiasCorrection::MidRank).expect("valid");
        close(ci.z0.expect("bca"), 0.04453243277008601, 1e-12);
        close(ci.quantiles.0, 0.041696286510188585, 1e-12);
        close(ci.quantiles.1, 0.9870818584204715, 1e-12);
        close(ci.lower, 2.4, 1e-12);
        close(ci.upper, 8.8, 1e-12);
    }

    /// Standard normal points from Python 3.11 `statistics.NormalDist` (Wichura 1988 AS241):
    /// Phi^-1(0.975) = 1.9599639845400536, Phi^-1(0.95) = 1.6448536269514715, and
    /// Phi(-1.959963984540054) = 0.02500000000000002 (`0.5 * math.erfc`); quantiles agree
    /// to the last two units of the 16th digit.
    #[test]
    fn normal_cdf_and_quantile_are_accurate() {
        close(normal_quantile(0.975), 1.9599639845400536, 2e-15);
        close(normal_quantile(0.025), -1.9599639845400536, 2e-15);
        close(normal_quantile(0.95), 1.6448536269514715, 2e-15);
        close(normal_cdf(-1.959963984540054), 0.02500000000000002, 1e-16);
        for p in [1e-12, 1e-5, 0.001, 0.2, 0.5, 0.7, 0.99] {
            close(normal_cdf(normal_quantile(p)), p, p.min(1.0 - p) * 1e-13);
        }
    }

    /// Hyndman & Fan (1996) type 7 on 1..=5: the 0.1 quantile is 1.4, the median 3.
    #[test]
    fn linear_quantile_interpolates_between_order_statistics() {
        let s = [1.0, 2.0, 3.0, 4.0, 5.0];
        close(quantile_linear(&s, 0.1).expect("valid"), 1.4, 1e-15);
        close(quantile_linear(&s, 0.5).expect("valid"), 3.0, 0.0);
        close(quantile_linear(&s, 1.0).expect("valid"), 5.0, 0.0);
    }

    /// The same seed gives the same replicates; another seed gives others; the seeded
    /// percentile interval of the mean brackets the estimate.
    #[test]
    fn seeded_bootstrap_is_reproducible() {
        let a = bootstrap_replicates(5, 500, 9, mean_of).expect("valid");
        assert_eq!(a, bootstrap_replicates(5, 500, 9, mean_of).expect("valid"));
        assert_ne!(a, bootstrap_replicates(5, 500, 10, mean_of).expect("valid"));
        let ci = bootstrap_interval(
            5,
            2000,
            9,
            0.95,
            IntervalMethod::Bca(BiasCorrection::Strict),
            mean_of,
        )
        .expect("valid");
        assert!(ci.lower < 5.0 && 5.0 < ci.upper, "{ci:?}");
    }

    /// Undefined replicates are skipped and counted, not turned into numbers.
    #[test]
    fn undefined_replicates_are_skipped_and_counted() {
        // Undefined when the resample holds item 0 three or more times.
        let stat = |idx: &[usize]| {
            (idx.iter().filter(|&&i| i == 0).count() < 3)
                .then(|| mean_of(idx))
                .flatten()
        };
        let reps = exhaustive_replicates(5, stat).expect("valid");
        // Resamples with item 0 at least 3 times: sum_{j>=3} C(5,j) 4^(5-j) = 160 + 20 + 1.
        assert_eq!(reps.skipped, 181);
        assert_eq!(reps.values.len(), 3125 - 181);
        let ci = percentile_interval(&reps, 5.0, 0.95).expect("valid");
        assert_eq!(ci.skipped, 181);
    }

    #[test]
    fn bad_inputs_are_rejected() {
        assert!(matches!(
            exhaustive_replicates(8, mean_of),
            Err(StatsError::OutOfRange { .. })
        ));
        let reps = exhaustive_replicates(3, mean_of).expect("valid");
        assert!(matches!(
            percentile_interval(&reps, 5.0, 1.5),
            Err(StatsError::OutOfRange { .. })
        ));
        // An estimate below every replicate leaves z0 undefined.
        let jack = jackknife(3, mean_of).expect("valid");
        assert!(matches!(
            bca_interval(&reps, -1.0, &jack, 0.95, BiasCorrection::Strict),
            Err(StatsError::Undefined(_))
        ));
    }
}
