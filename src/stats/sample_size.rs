//! Statistics stage: how many human-labelled items a judge check needs. Input: the
//! kappa one expects, the raters' positive rates, error rates or a target interval
//! half-width. Output: item counts (unrounded; round up to use) and plain-words advice
//! for trust cards. Never does I/O. The formulas treat ratings as binary (pass/fail);
//! for longer scales they are a rough guide, and the advice says so.

use serde::Serialize;

use crate::stats::bootstrap::normal_quantile;
use crate::stats::StatsError;

fn check_unit(name: &str, v: f64) -> Result<(), StatsError> {
    if !(v > 0.0 && v < 1.0) {
        return Err(StatsError::OutOfRange {
            value: v.to_string(),
            allowed: format!("{name} in (0, 1)"),
        });
    }
    Ok(())
}

/// `Q(kappa) = n Var(kappa_hat)` for binary ratings whose raters say "yes" at rates
/// `rate1` and `rate2` (Fleiss, Cohen & Everitt 1969 large-sample variance).
///
/// The 2x2 cells follow from kappa and the margins: `p11 = r1 r2 + kappa (1 - pe) / 2`,
/// `p22 = (1-r1)(1-r2) + kappa (1 - pe) / 2`, off-diagonals by subtraction. Then
/// `Q = [sum_i p_ii ((1-pe) - (p_i+ + p_+i)(1-po))^2 + (1-po)^2 sum_{i!=j} p_ij (p_+i + p_j+)^2
/// - (po pe - 2 pe + po)^2] / (1-pe)^4`.
pub fn binary_kappa_variance_factor(kappa: f64, rate1: f64, rate2: f64) -> Result<f64, StatsError> {
    check_unit("a positive rate", rate1)?;
    check_unit("a positive rate", rate2)?;
    let (q1, q2) = (1.0 - rate1, 1.0 - rate2);
    let pe = rate1 * rate2 + q1 * q2;
    let po = pe + kappa * (1.0 - pe);
    let p11 = rate1 * rate2 + kappa * (1.0 - pe) / 2.0;
    let p22 = q1 * q2 + kappa * (1.0 - pe) / 2.0;
    let cells = [[p11, rate1 - p11], [rate2 - p11, p22]];
    if !kappa.is_finite()
        || cells
            .iter()
            .flatten()
            .any(|&p| !(-1e-12..=1.0 + 1e-12).contains(&p))
    {
        return Err(StatsError::OutOfRange {
            value: kappa.to_string(),
            allowed: "a kappa these positive rates can reach".into(),
        });
    }
    let (rows, cols) = ([rate1, q1], [rate2, q2]);
    let mut s = 0.0;
    for i in 0..2 {
        for j in 0..2 {
            let t = if i == j {
                (1.0 - pe) - (rows[i] + cols[i]) * (1.0 - po)
            } else {
                (cols[i] + rows[j]) * (1.0 - po)
            };
            s += cells[i][j] * t * t;
        }
    }
    let c = po * pe - 2.0 * pe + po;
    Ok(((s - c * c) / (1.0 - pe).powi(4)).max(0.0))
}

/// Items needed to tell a true kappa `kappa_true` from a null `kappa_null` with binary
/// ratings (Cantor 1996, Psychol. Methods 1:150):
/// `N = [(z_{1-alpha/d} sqrt Q(kappa_null) + z_power sqrt Q(kappa_true)) / (kappa_true - kappa_null)]^2`,
/// `d` = 2 when two-sided. Unrounded; round up.
pub fn kappa_test_sample_size(
    kappa_true: f64,
    kappa_null: f64,
    rate1: f64,
    rate2: f64,
    alpha: f64,
    power: f64,
    two_sided: bool,
) -> Result<f64, StatsError> {
    check_unit("alpha", alpha)?;
    check_unit("power", power)?;
    if kappa_true == kappa_null {
        return Err(StatsError::Undefined(
            "the true and null kappa are equal".into(),
        ));
    }
    let sides = if two_sided { 2.0 } else { 1.0 };
    let q0 = binary_kappa_variance_factor(kappa_null, rate1, rate2)?;
    let q1 = binary_kappa_variance_factor(kappa_true, rate1, rate2)?;
    let num = normal_quantile(1.0 - alpha / sides) * q0.sqrt() + normal_quantile(power) * q1.sqrt();
    Ok((num / (kappa_true - kappa_null)).powi(2))
}

/// `n Var(kappa_hat)` with both raters at prevalence `p` (from memory, as noted in the
/// methods file): `(1-kappa)[(1-kappa)(1-2 kappa) + kappa (2-kappa) / (2 p (1-p))]`. It equals
/// [`binary_kappa_variance_factor`] with equal rates, which the tests confirm.
pub fn equal_margin_variance_factor(kappa: f64, prevalence: f64) -> Result<f64, StatsError> {
    check_unit("a prevalence", prevalence)?;
    if !(kappa > -1.0 && kappa <= 1.0) {
        return Err(StatsError::OutOfRange {
            value: kappa.to_string(),
            allowed: "a kappa in (-1, 1]".into(),
        });
    }
    let v = (1.0 - kappa)
        * ((1.0 - kappa) * (1.0 - 2.0 * kappa)
            + kappa * (2.0 - kappa) / (2.0 * prevalence * (1.0 - prevalence)));
    Ok(v.max(0.0))
}

fn two_sided_z(level: f64) -> Result<f64, StatsError> {
    check_unit("a confidence level", level)?;
    Ok(normal_quantile((1.0 + level) / 2.0))
}

/// Items for a kappa interval of half-width `half_width` at `level` (precision form,
/// equal margins): `n = z^2_{1-alpha/2} V / d^2`. Unrounded; round up.
pub fn kappa_precision_sample_size(
    kappa: f64,
    prevalence: f64,
    half_width: f64,
    level: f64,
) -> Result<f64, StatsError> {
    if !(half_width > 0.0 && half_width.is_finite()) {
        return Err(StatsError::OutOfRange {
            value: half_width.to_string(),
            allowed: "a half-width > 0".into(),
        });
    }
    let z = two_sided_z(level)?;
    Ok(z * z * equal_margin_variance_factor(kappa, prevalence)? / (half_width * half_width))
}

/// Expected half-width of a kappa interval from `n_items` labelled items (precision form).
pub fn kappa_half_width(
    kappa: f64,
    prevalence: f64,
    n_items: usize,
    level: f64,
) -> Result<f64, StatsError> {
    if n_items == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    let z = two_sided_z(level)?;
    Ok(z * (equal_margin_variance_factor(kappa, prevalence)? / n_items as f64).sqrt())
}

/// Whether a labelled set is big enough, in numbers and in words.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SampleAdvice {
    /// Labelled items available.
    pub n_items: usize,
    /// Items needed for the target half-width (rounded up).
    pub recommended: usize,
    /// Expected half-width of the kappa interval with `n_items`.
    pub half_width: f64,
    /// The half-width asked for.
    pub target_half_width: f64,
    /// Whether `n_items` reaches `recommended`.
    pub enough: bool,
    /// One plain sentence for a trust card.
    pub message: String,
}

/// Plain-words advice on the labelled sample behind a judge's kappa (precision form).
pub fn labelled_sample_advice(
    n_items: usize,
    expected_kappa: f64,
    prevalence: f64,
    target_half_width: f64,
    level: f64,
) -> Result<SampleAdvice, StatsError> {
    let needed = kappa_precision_sample_size(expected_kappa, prevalence, target_half_width, level)?;
    let recommended = needed.ceil().max(1.0) as usize;
    let half_width = kappa_half_width(expected_kappa, prevalence, n_items.max(1), level)?;
    let enough = n_items >= recommended;
    let pct = (level * 100.0).round();
    let message = if enough {
        format!(
            "{n_items} labelled items pin a kappa near {expected_kappa:.2} to about ±{half_width:.2} \
             ({pct}% interval), within the ±{target_half_width:.2} target"
        )
    } else {
        format!(
            "{n_items} labelled items pin a kappa near {expected_kappa:.2} only to about ±{half_width:.2} \
             ({pct}% interval); label about {recommended} items for ±{target_half_width:.2} \
             (pass/fail approximation)"
        )
    };
    Ok(SampleAdvice {
        n_items,
        recommended,
        half_width,
        target_half_width,
        enough,
        message,
    })
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

    /// METHODS 13: Cantor (1996) / R `irr::N.cohen.kappa(rate1=.5, rate2=.5, kappa=.7,
    /// hypokappa=.85)` = 95.71598452786145 by the R source formula re-evaluated [lib scipy]
    /// (package example prints 96); swapped, 116.35389511190583.
    #[test]
    fn cantor_sample_size_matches_reference() {
        let n = kappa_test_sample_size(0.7, 0.85, 0.5, 0.5, 0.05, 0.8, false).expect("valid");
        close(n, 95.71598452786145, 1e-9);
        assert_eq!(n.ceil(), 96.0);
        let swapped = kappa_test_sample_size(0.85, 0.7, 0.5, 0.5, 0.05, 0.8, false).expect("valid");
        close(swapped, 116.35389511190583, 1e-9);
    }

    /// METHODS 13 precision form [mem formula, lib arithmetic]: 295.0240 (kappa .6, p .3,
    /// d .1), 245.8534 (.6, .5, .1), 138.2925 (.8, .5, .1), 1180.0961 (.6, .3, .05).
    #[test]
    fn precision_sample_size_matches_reference_arithmetic() {
        let cases = [
            (0.6, 0.3, 0.1, 295.0240),
            (0.6, 0.5, 0.1, 245.8534),
            (0.8, 0.5, 0.1, 138.2925),
            (0.6, 0.3, 0.05, 1180.0961),
        ];
        for (k, p, d, want) in cases {
            close(
                kappa_precision_sample_size(k, p, d, 0.95).expect("valid"),
                want,
                5e-5,
            );
        }
    }

    /// The from-memory equal-margin variance agrees with the Fleiss, Cohen & Everitt (1969)
    /// variance derived from the 2x2 cells, so the precision form rests on the derivation.
    #[test]
    fn equal_margin_variance_matches_fleiss_cohen_everitt() {
        for (k, p) in [(0.6, 0.3), (0.6, 0.5), (0.8, 0.5), (0.3, 0.1), (0.0, 0.4)] {
            close(
                equal_margin_variance_factor(k, p).expect("valid"),
                binary_kappa_variance_factor(k, p, p).expect("valid"),
                1e-12,
            );
        }
    }

    /// METHODS 13: at kappa .6, prevalence .5, ±0.1 the precision form needs 245.8534 items,
    /// so 245 are too few and 246 enough; the message names the count to label.
    #[test]
    fn advice_switches_at_the_required_count() {
        let short = labelled_sample_advice(245, 0.6, 0.5, 0.1, 0.95).expect("valid");
        assert_eq!(short.recommended, 246);
        assert!(!short.enough);
        assert!(short.half_width > 0.1);
        assert!(
            short.message.contains("label about 246 items"),
            "{}",
            short.message
        );
        let ok = labelled_sample_advice(246, 0.6, 0.5, 0.1, 0.95).expect("valid");
        assert!(ok.enough && ok.half_width <= 0.1, "{ok:?}");
    }

    #[test]
    fn impossible_inputs_are_rejected() {
        // With positive rates .1 and .9 the raters cannot reach kappa .9.
        assert!(matches!(
            binary_kappa_variance_factor(0.9, 0.1, 0.9),
            Err(StatsError::OutOfRange { .. })
        ));
        assert!(matches!(
            kappa_test_sample_size(0.5, 0.5, 0.5, 0.5, 0.05, 0.8, false),
            Err(StatsError::Undefined(_))
        ));
        assert!(matches!(
            kappa_precision_sample_size(0.6, 0.5, 0.0, 0.95),
            Err(StatsError::OutOfRange { .. })
        ));
        assert!(matches!(
            kappa_precision_sample_size(0.6, 1.0, 0.1, 0.95),
            Err(StatsError::OutOfRange { .. })
        ));
    }
}
