//! Statistics stage: Krippendorff's alpha reliability for any number of coders with
//! missing values. Input: one row per unit holding each coder's value (`None` =
//! not coded) and the declared value domain. Output: alpha at the nominal, ordinal,
//! interval or ratio level. Never does I/O and never infers the domain from the data:
//! the declared domain fixes the order of values and rejects values outside it (an
//! unused in-range value enters the ordinal metric with frequency 0).

use serde::Serialize;

use crate::stats::StatsError;

/// Level of measurement, which fixes the difference function delta^2.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Level {
    /// Values are unordered labels: delta^2 = 1 when they differ.
    Nominal,
    /// Values are ranked: delta^2 uses the marginal frequencies between them.
    Ordinal,
    /// Differences are meaningful: delta^2 = (c - k)^2.
    Interval,
    /// Ratios are meaningful: delta^2 = ((c - k)/(c + k))^2; values must be >= 0.
    Ratio,
}

/// Krippendorff's alpha and how much data it rests on.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AlphaEstimate {
    /// The alpha coefficient `1 - D_o / D_e`.
    pub alpha: f64,
    /// Number of pairable values `n` (values in units with at least two codes).
    pub pairable_values: usize,
    /// Number of units with at least two codes (the others are dropped).
    pub units_used: usize,
}

/// Krippendorff's alpha (Krippendorff 2011, "Computing Krippendorff's Alpha-Reliability";
/// Hayes & Krippendorff 2007).
///
/// `units[u]` holds the values the coders gave unit `u`; `domain` lists every admissible
/// value in increasing order. Coincidences: `o_ck = sum_u pairs_u(c,k) / (m_u - 1)`;
/// `alpha = 1 - (n - 1) sum o_ck delta^2_ck / sum n_c n_k delta^2_ck`.
pub fn krippendorff_alpha(
    units: &[Vec<Option<f64>>],
    domain: &[f64],
    level: Level,
) -> Result<AlphaEstimate, StatsError> {
    check_domain(domain, level)?;
    let v = domain.len();
    let mut o = vec![vec![0.0f64; v]; v];
    let mut units_used = 0usize;
    for unit in units {
        let mut counts = vec![0usize; v];
        let mut m = 0usize;
        for &x in unit.iter().flatten() {
            counts[position(domain, x)?] += 1;
            m += 1;
        }
        if m < 2 {
            continue; // a lone value has no partner to agree or disagree with
        }
        units_used += 1;
        let w = 1.0 / (m - 1) as f64;
        for c in 0..v {
            if counts[c] == 0 {
                continue;
            }
            for k in 0..v {
                let pairs = counts[c] * if c == k { counts[k] - 1 } else { counts[k] };
                o[c][k] += pairs as f64 * w;
            }
        }
    }
    if units_used == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    let marg: Vec<f64> = o.iter().map(|row| row.iter().sum()).collect();
    let n: f64 = marg.iter().sum();
    let delta = difference_matrix(domain, &marg, level);
    let (mut observed, mut expected) = (0.0, 0.0);
    for c in 0..v {
        for k in 0..v {
            observed += o[c][k] * delta[c][k];
            expected += marg[c] * marg[k] * delta[c][k];
        }
    }
    if expected <= 0.0 {
        return Err(StatsError::Undefined(
            "all pairable values are equal, so no disagreement is expected".into(),
        ));
    }
    Ok(AlphaEstimate {
        alpha: 1.0 - (n - 1.0) * observed / expected,
        pairable_values: n.round() as usize,
        units_used,
    })
}

fn check_domain(domain: &[f64], level: Level) -> Result<(), StatsError> {
    if domain.len() < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: domain.len(),
        });
    }
    if let Some(bad) = domain
        .iter()
        .find(|x| !x.is_finite() || (level == Level::Ratio && **x < 0.0))
    {
        let allowed = if level == Level::Ratio {
            "a finite value >= 0"
        } else {
            "a finite value"
        };
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: allowed.into(),
        });
    }
    if let Some(pair) = domain.windows(2).find(|p| p[0] >= p[1]) {
        return Err(StatsError::OutOfRange {
            value: pair[1].to_string(),
            allowed: "a domain listed in strictly increasing order".into(),
        });
    }
    Ok(())
}

fn position(domain: &[f64], x: f64) -> Result<usize, StatsError> {
    domain
        .iter()
        .position(|&d| d == x)
        .ok_or_else(|| StatsError::OutOfRange {
            value: x.to_string(),
            allowed: format!("one of the declared values {domain:?}"),
        })
}

/// delta^2 for every pair of domain values (Krippendorff 2011, section on metrics).
fn difference_matrix(domain: &[f64], marg: &[f64], level: Level) -> Vec<Vec<f64>> {
    let v = domain.len();
    let mut d = vec![vec![0.0; v]; v];
    for c in 0..v {
        for k in 0..v {
            if c == k {
                continue;
            }
            let (x, y) = (domain[c], domain[k]);
            d[c][k] = match level {
                Level::Nominal => 1.0,
                Level::Interval => (x - y).powi(2),
                Level::Ratio => ((x - y) / (x + y)).powi(2),
                Level::Ordinal => {
                    let (lo, hi) = (c.min(k), c.max(k));
                    let between: f64 = marg[lo..=hi].iter().sum();
                    (between - (marg[c] + marg[k]) / 2.0).powi(2)
                }
            };
        }
    }
    d
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

    /// Coder-major rows (one string per coder, `.` missing) turned into unit rows.
    fn units(coders: &[&str]) -> Vec<Vec<Option<f64>>> {
        let rows: Vec<Vec<Option<f64>>> = coders
            .iter()
            .map(|r| {
                r.split_whitespace()
                    .map(|t| t.parse::<f64>().ok())
                    .collect()
            })
            .collect();
        (0..rows[0].len())
            .map(|u| rows.iter().map(|r| r[u]).collect())
            .collect()
    }

    fn k2011() -> Vec<Vec<Option<f64>>> {
        units(&[
            "1 2 3 3 2 1 4 1 2 . . .",
            "1 2 3 3 2 2 4 1 2 5 . 3",
            ". 3 3 3 2 3 4 2 2 5 1 .",
            "1 2 3 3 2 4 4 1 2 5 1 .",
        ])
    }

    const D5: [f64; 5] = [1.0, 2.0, 3.0, 4.0, 5.0];

    /// METHODS 3: Krippendorff (2011) 4 observers x 12 units with missing values; published
    /// 0.743 / 0.815 / 0.849 / 0.797 [pub]; `krippendorff.alpha` 0.9.0 values [lib].
    #[test]
    fn alpha_matches_krippendorff_2011_at_all_levels() {
        let data = k2011();
        let cases = [
            (Level::Nominal, 0.743421052631579),
            (Level::Ordinal, 0.8153875037548814),
            (Level::Interval, 0.8491071428571428),
            (Level::Ratio, 0.7974027747116121),
        ];
        for (level, want) in cases {
            let a = krippendorff_alpha(&data, &D5, level).expect("valid");
            close(a.alpha, want, 1e-12);
            assert_eq!(a.units_used, 11, "unit 12 has one value and is dropped");
        }
        close(
            krippendorff_alpha(&data, &D5, Level::Nominal)
                .expect("valid")
                .alpha,
            113.0 / 152.0,
            1e-12,
        );
    }

    /// METHODS 3: Wikipedia computational example (3 coders x 15 units): nominal
    /// 0.691358024691358 (published 0.691 [pub]); ordinal 0.8067214199413153, interval
    /// 0.8108448928121059, ratio 0.8089436707842471 [lib].
    #[test]
    fn alpha_matches_wikipedia_example() {
        let data = units(&[
            "* * * * * 3 4 1 2 1 1 3 3 * 3",
            "1 * 2 1 3 3 4 3 * * * * * * *",
            "* * 2 1 3 4 4 * 2 1 1 3 3 * 4",
        ]);
        let d = [1.0, 2.0, 3.0, 4.0];
        let cases = [
            (Level::Nominal, 0.691358024691358),
            (Level::Ordinal, 0.8067214199413153),
            (Level::Interval, 0.8108448928121059),
            (Level::Ratio, 0.8089436707842471),
        ];
        for (level, want) in cases {
            close(
                krippendorff_alpha(&data, &d, level).expect("valid").alpha,
                want,
                1e-12,
            );
        }
    }

    /// METHODS 3: binary, 2 coders, no missing: 0.09523809523809534 [lib]; the 2011 paper's
    /// binary example gives 0.095 (from memory).
    #[test]
    fn alpha_matches_binary_example() {
        let data = units(&["0 1 0 0 0 0 0 0 1 0", "1 1 1 0 0 1 0 0 0 0"]);
        close(
            krippendorff_alpha(&data, &[0.0, 1.0], Level::Nominal)
                .expect("valid")
                .alpha,
            0.09523809523809534,
            1e-12,
        );
    }

    /// METHODS 3: Fleiss diagnoses 30 x 6, nominal alpha 0.4334098282820289 [lib] (irrCAC 0.43341).
    #[test]
    fn alpha_matches_diagnoses_data() {
        #[rustfmt::skip]
        let rows = [
            "4 4 4 4 4 4", "2 2 2 5 5 5", "2 3 3 3 3 5", "5 5 5 5 5 5", "2 2 2 4 4 4", "1 1 3 3 3 3",
            "3 3 3 3 5 5", "1 1 3 3 3 4", "1 1 4 4 4 4", "5 5 5 5 5 5", "1 4 4 4 4 4", "1 2 4 4 4 4",
            "2 2 2 3 3 3", "1 4 4 4 4 4", "2 2 4 4 4 5", "3 3 3 3 3 5", "1 1 1 4 5 5", "1 1 1 1 1 2",
            "2 2 4 4 4 4", "1 3 3 5 5 5", "5 5 5 5 5 5", "2 4 4 4 4 4", "2 2 4 5 5 5", "1 1 4 4 4 4",
            "1 4 4 4 4 5", "2 2 2 2 2 4", "1 1 1 1 5 5", "2 2 4 4 4 4", "1 3 3 3 3 3", "5 5 5 5 5 5",
        ];
        let data: Vec<Vec<Option<f64>>> = rows
            .iter()
            .map(|r| {
                r.split_whitespace()
                    .map(|t| t.parse::<f64>().ok())
                    .collect()
            })
            .collect();
        close(
            krippendorff_alpha(&data, &D5, Level::Nominal)
                .expect("valid")
                .alpha,
            0.4334098282820289,
            1e-12,
        );
    }

    /// Property (Krippendorff 2011 ordinal metric): an unused in-range value has n_g = 0,
    /// so declaring it adds nothing to any rank distance; alpha is unchanged at every level.
    #[test]
    fn unused_domain_value_leaves_alpha_unchanged() {
        let data = units(&["1 2 3 3 1 5", "1 3 3 5 2 5"]);
        let (full, used) = ([1.0, 2.0, 3.0, 4.0, 5.0], [1.0, 2.0, 3.0, 5.0]);
        for level in [
            Level::Nominal,
            Level::Ordinal,
            Level::Interval,
            Level::Ratio,
        ] {
            close(
                krippendorff_alpha(&data, &full, level)
                    .expect("valid")
                    .alpha,
                krippendorff_alpha(&data, &used, level)
                    .expect("valid")
                    .alpha,
                1e-14,
            );
        }
    }

    /// Property: perfect agreement gives alpha 1 at every level.
    #[test]
    fn perfect_agreement_gives_one() {
        let data = units(&["1 2 3 4 5 2", "1 2 3 4 5 2", "1 . 3 4 5 2"]);
        for level in [
            Level::Nominal,
            Level::Ordinal,
            Level::Interval,
            Level::Ratio,
        ] {
            close(
                krippendorff_alpha(&data, &D5, level).expect("valid").alpha,
                1.0,
                1e-12,
            );
        }
    }

    /// Property: relabelling the nominal categories leaves nominal alpha unchanged.
    #[test]
    fn nominal_alpha_ignores_label_permutation() {
        let data = k2011();
        let perm = |x: f64| [0.0, 4.0, 1.0, 5.0, 3.0, 2.0][x as usize];
        let permuted: Vec<Vec<Option<f64>>> = data
            .iter()
            .map(|u| u.iter().map(|v| v.map(perm)).collect())
            .collect();
        close(
            krippendorff_alpha(&permuted, &D5, Level::Nominal)
                .expect("valid")
                .alpha,
            113.0 / 152.0,
            1e-12,
        );
    }

    #[test]
    fn value_outside_domain_is_rejected() {
        let data = units(&["1 2", "1 7"]);
        assert!(matches!(
            krippendorff_alpha(&data, &D5, Level::Nominal),
            Err(StatsError::OutOfRange { .. })
        ));
    }

    #[test]
    fn no_variation_is_undefined() {
        let data = units(&["2 2 2", "2 2 ."]);
        assert!(matches!(
            krippendorff_alpha(&data, &D5, Level::Interval),
            Err(StatsError::Undefined(_))
        ));
    }
}
