//! Statistics stage: agreement between a judge and human raters on a categorical
//! or ordinal scale. Input: category indices `0..k` over the full declared scale
//! (two raters as paired slices, many raters as per-item category counts). Output:
//! confusion matrices, Cohen's kappa (with asymptotic standard errors), Fleiss'
//! kappa, Gwet's AC1/AC2, exact and within-one agreement, error and bias.
//! Never does I/O and never drops an unused category from the scale: weights come
//! from category positions in the declared scale, so an unused middle value still
//! counts.

use serde::Serialize;

use crate::stats::StatsError;

/// How disagreements between categories are weighted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Weighting {
    /// Any disagreement counts fully (nominal scale).
    Unweighted,
    /// Agreement weight `1 - |i-j|/(k-1)` (Cohen 1968).
    Linear,
    /// Agreement weight `1 - (i-j)^2/(k-1)^2` (Cohen 1968; Fleiss & Cohen 1973).
    Quadratic,
}

/// Agreement weight of categories `i` and `j` on a `k`-point scale (1 on the diagonal).
pub fn agreement_weight(i: usize, j: usize, k: usize, weighting: Weighting) -> f64 {
    if i == j {
        return 1.0;
    }
    // k >= 2 whenever i != j both lie in 0..k, so the divisions are safe.
    let d = i.abs_diff(j) as f64;
    let span = k.saturating_sub(1).max(1) as f64;
    match weighting {
        Weighting::Unweighted => 0.0,
        Weighting::Linear => 1.0 - d / span,
        Weighting::Quadratic => 1.0 - (d * d) / (span * span),
    }
}

/// Cohen's kappa with its observed and chance agreement and asymptotic standard errors.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct KappaEstimate {
    /// The (weighted) kappa coefficient.
    pub kappa: f64,
    /// Observed (weighted) agreement `p_o`.
    pub p_observed: f64,
    /// Chance (weighted) agreement `p_e` from the two raters' marginals.
    pub p_expected: f64,
    /// Large-sample standard error (Fleiss, Cohen & Everitt 1969), for intervals.
    pub se: f64,
    /// Standard error under the null hypothesis kappa = 0, for a z test.
    pub se_null: f64,
    /// Number of rated items.
    pub n: usize,
}

/// Chance-corrected agreement with its two ingredients (Fleiss kappa, Gwet AC1/AC2).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ChanceCorrected {
    /// The coefficient `(p_o - p_e) / (1 - p_e)`.
    pub coefficient: f64,
    /// Observed agreement.
    pub p_observed: f64,
    /// Chance agreement.
    pub p_expected: f64,
    /// Large-sample standard error where one is implemented (two-rater AC1), else `None`.
    pub se: Option<f64>,
}

fn check_pairs(a: &[usize], b: &[usize], k: usize) -> Result<(), StatsError> {
    if a.len() != b.len() {
        return Err(StatsError::LengthMismatch {
            left: a.len(),
            right: b.len(),
        });
    }
    if a.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    check_scale(k)?;
    if let Some(&bad) = a.iter().chain(b).find(|&&c| c >= k) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: format!("category index 0..{k}"),
        });
    }
    Ok(())
}

fn check_scale(k: usize) -> Result<(), StatsError> {
    if k < 2 {
        return Err(StatsError::OutOfRange {
            value: k.to_string(),
            allowed: "a scale of at least 2 categories".to_string(),
        });
    }
    Ok(())
}

/// Counts `m[i][j]` of items rated `i` by rater `a` and `j` by rater `b`, over all `k` categories.
pub fn confusion_matrix(a: &[usize], b: &[usize], k: usize) -> Result<Vec<Vec<usize>>, StatsError> {
    check_pairs(a, b, k)?;
    let mut m = vec![vec![0usize; k]; k];
    for (&i, &j) in a.iter().zip(b) {
        m[i][j] += 1;
    }
    Ok(m)
}

/// Cohen's kappa (Cohen 1960; weighted: Cohen 1968) of two raters on a `k`-category scale.
pub fn cohen_kappa(
    a: &[usize],
    b: &[usize],
    k: usize,
    weighting: Weighting,
) -> Result<KappaEstimate, StatsError> {
    cohen_kappa_from_table(&confusion_matrix(a, b, k)?, weighting)
}

/// Cohen's kappa from a square table of counts (rows rater A, columns rater B).
///
/// Standard errors follow Fleiss, Cohen & Everitt (1969), the large-sample variance
/// printed by SAS PROC FREQ: with agreement weights `w`, `wbar_i = sum_j p_+j w_ij`,
/// `wbar_j = sum_i p_i+ w_ij`, `n var = [sum_ij p_ij (w_ij (1-pe) - (wbar_i + wbar_j)(1-po))^2
/// - (po pe - 2 pe + po)^2] / (1-pe)^4`.
pub fn cohen_kappa_from_table(
    table: &[Vec<usize>],
    weighting: Weighting,
) -> Result<KappaEstimate, StatsError> {
    let k = table.len();
    check_scale(k)?;
    if let Some(row) = table.iter().find(|r| r.len() != k) {
        return Err(StatsError::LengthMismatch {
            left: k,
            right: row.len(),
        });
    }
    let n: usize = table.iter().flatten().sum();
    if n == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    let nf = n as f64;
    let p: Vec<Vec<f64>> = table
        .iter()
        .map(|r| r.iter().map(|&c| c as f64 / nf).collect())
        .collect();
    let rows: Vec<f64> = p.iter().map(|r| r.iter().sum()).collect();
    let cols: Vec<f64> = (0..k).map(|j| p.iter().map(|r| r[j]).sum()).collect();
    let w = |i: usize, j: usize| agreement_weight(i, j, k, weighting);
    let (mut po, mut pe) = (0.0, 0.0);
    for i in 0..k {
        for j in 0..k {
            po += w(i, j) * p[i][j];
            pe += w(i, j) * rows[i] * cols[j];
        }
    }
    if (1.0 - pe).abs() < 1e-15 {
        return Err(StatsError::Undefined(
            "chance agreement is 1: both raters use one category".into(),
        ));
    }
    let kappa = (po - pe) / (1.0 - pe);
    let wbar_row: Vec<f64> = (0..k)
        .map(|i| (0..k).map(|j| cols[j] * w(i, j)).sum())
        .collect();
    let wbar_col: Vec<f64> = (0..k)
        .map(|j| (0..k).map(|i| rows[i] * w(i, j)).sum())
        .collect();
    let (mut s, mut s0) = (0.0, 0.0);
    for i in 0..k {
        for j in 0..k {
            let t = w(i, j) * (1.0 - pe) - (wbar_row[i] + wbar_col[j]) * (1.0 - po);
            s += p[i][j] * t * t;
            let t0 = w(i, j) - (wbar_row[i] + wbar_col[j]);
            s0 += rows[i] * cols[j] * t0 * t0;
        }
    }
    let c = po * pe - 2.0 * pe + po;
    let var = ((s - c * c) / (nf * (1.0 - pe).powi(4))).max(0.0);
    let var0 = ((s0 - pe * pe) / (nf * (1.0 - pe).powi(2))).max(0.0);
    Ok(KappaEstimate {
        kappa,
        p_observed: po,
        p_expected: pe,
        se: var.sqrt(),
        se_null: var0.sqrt(),
        n,
    })
}

/// Share of items on which the two raters give the same category.
pub fn exact_agreement(a: &[usize], b: &[usize]) -> Result<f64, StatsError> {
    share(a, b, |x, y| x == y)
}

/// Share of items on which the two ratings differ by at most one scale step.
pub fn within_one_agreement(a: &[usize], b: &[usize]) -> Result<f64, StatsError> {
    share(a, b, |x, y| x.abs_diff(y) <= 1)
}

fn share(a: &[usize], b: &[usize], hit: impl Fn(usize, usize) -> bool) -> Result<f64, StatsError> {
    if a.len() != b.len() {
        return Err(StatsError::LengthMismatch {
            left: a.len(),
            right: b.len(),
        });
    }
    if a.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    Ok(a.iter().zip(b).filter(|(&x, &y)| hit(x, y)).count() as f64 / a.len() as f64)
}

fn paired_differences(judge: &[f64], human: &[f64]) -> Result<Vec<f64>, StatsError> {
    if judge.len() != human.len() {
        return Err(StatsError::LengthMismatch {
            left: judge.len(),
            right: human.len(),
        });
    }
    if judge.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    if let Some(bad) = judge.iter().chain(human).find(|v| !v.is_finite()) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a finite score".into(),
        });
    }
    Ok(judge.iter().zip(human).map(|(j, h)| j - h).collect())
}

/// Mean absolute difference between judge and human scores.
pub fn mean_absolute_error(judge: &[f64], human: &[f64]) -> Result<f64, StatsError> {
    let d = paired_differences(judge, human)?;
    Ok(d.iter().map(|x| x.abs()).sum::<f64>() / d.len() as f64)
}

/// Mean of judge minus human score: positive means the judge is more lenient.
pub fn mean_signed_bias(judge: &[f64], human: &[f64]) -> Result<f64, StatsError> {
    let d = paired_differences(judge, human)?;
    Ok(d.iter().sum::<f64>() / d.len() as f64)
}

/// Per-item category counts `counts[item][category]` from an items x raters grid (`None` = not rated).
pub fn category_counts(
    ratings: &[Vec<Option<usize>>],
    k: usize,
) -> Result<Vec<Vec<usize>>, StatsError> {
    check_scale(k)?;
    ratings
        .iter()
        .map(|item| {
            let mut row = vec![0usize; k];
            for &c in item.iter().flatten() {
                if c >= k {
                    return Err(StatsError::OutOfRange {
                        value: c.to_string(),
                        allowed: format!("category index 0..{k}"),
                    });
                }
                row[c] += 1;
            }
            Ok(row)
        })
        .collect()
}

/// Fleiss' kappa (Fleiss 1971) from per-item category counts; every item needs the same number of raters.
pub fn fleiss_kappa(counts: &[Vec<usize>]) -> Result<ChanceCorrected, StatsError> {
    let k = check_counts(counts)?;
    let raters: usize = counts[0].iter().sum();
    if let Some(row) = counts.iter().find(|r| r.iter().sum::<usize>() != raters) {
        return Err(StatsError::LengthMismatch {
            left: raters,
            right: row.iter().sum(),
        });
    }
    if raters < 2 {
        return Err(StatsError::TooFew {
            needed: 2,
            got: raters,
        });
    }
    let (n_items, r) = (counts.len() as f64, raters as f64);
    let p_bar = counts
        .iter()
        .map(|row| (row.iter().map(|&c| (c * c) as f64).sum::<f64>() - r) / (r * (r - 1.0)))
        .sum::<f64>()
        / n_items;
    let p_e: f64 = (0..k)
        .map(|j| counts.iter().map(|row| row[j] as f64).sum::<f64>() / (n_items * r))
        .map(|pj| pj * pj)
        .sum();
    chance_corrected(p_bar, p_e)
}

fn check_counts(counts: &[Vec<usize>]) -> Result<usize, StatsError> {
    let first = counts
        .first()
        .ok_or(StatsError::TooFew { needed: 1, got: 0 })?;
    let k = first.len();
    check_scale(k)?;
    if let Some(row) = counts.iter().find(|r| r.len() != k) {
        return Err(StatsError::LengthMismatch {
            left: k,
            right: row.len(),
        });
    }
    Ok(k)
}

fn chance_corrected(p_observed: f64, p_expected: f64) -> Result<ChanceCorrected, StatsError> {
    if (1.0 - p_expected).abs() < 1e-15 {
        return Err(StatsError::Undefined("chance agreement is 1".into()));
    }
    Ok(ChanceCorrected {
        coefficient: (p_observed - p_expected) / (1.0 - p_expected),
        p_observed,
        p_expected,
        se: None,
    })
}

/// Gwet's AC1 (unweighted) or AC2 (weighted) for any number of raters (Gwet 2008; Handbook).
///
/// `counts[item][category]` may have unequal totals (missing ratings). Observed agreement
/// averages items with at least two ratings: `sum_k r_ik (r*_ik - 1) / (r_i (r_i - 1))` with
/// `r*_ik = sum_l w_kl r_il`; `pi_k` averages `r_ik / r_i` over items with a rating;
/// `p_e = T_w / (q (q-1)) sum_k pi_k (1 - pi_k)`, `T_w` the sum of all weights.
pub fn gwet_ac(counts: &[Vec<usize>], weighting: Weighting) -> Result<ChanceCorrected, StatsError> {
    let q = check_counts(counts)?;
    let w = |i: usize, j: usize| agreement_weight(i, j, q, weighting);
    let (mut pa_sum, mut pa_items, mut pi, mut rated) = (0.0, 0usize, vec![0.0; q], 0usize);
    for row in counts {
        let r: usize = row.iter().sum();
        if r == 0 {
            continue;
        }
        rated += 1;
        let rf = r as f64;
        for (pk, &c) in pi.iter_mut().zip(row) {
            *pk += c as f64 / rf;
        }
        if r >= 2 {
            let agree: f64 = (0..q)
                .map(|kk| {
                    let r_star: f64 = (0..q).map(|l| w(kk, l) * row[l] as f64).sum();
                    row[kk] as f64 * (r_star - 1.0)
                })
                .sum();
            pa_sum += agree / (rf * (rf - 1.0));
            pa_items += 1;
        }
    }
    if pa_items == 0 {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    let t_w: f64 = (0..q)
        .flat_map(|i| (0..q).map(move |j| (i, j)))
        .map(|(i, j)| w(i, j))
        .sum();
    let qf = q as f64;
    let p_e = t_w / (qf * (qf - 1.0))
        * pi.iter()
            .map(|s| s / rated as f64)
            .map(|p| p * (1.0 - p))
            .sum::<f64>();
    chance_corrected(pa_sum / pa_items as f64, p_e)
}

/// Gwet's AC1/AC2 for two raters on a `k`-category scale (the multi-rater formula with
/// two ratings per item); AC1 also gets its standard error.
///
/// AC1 variance (Gwet 2008, eq. for two raters, sampling fraction 0):
/// `[pa(1-pa) - 4(1-AC1)(T1 - pa pe) + 4(1-AC1)^2 (T2 - pe^2)] / (n (1-pe)^2)` with
/// `T1 = sum_k p_kk (1 - pi_k) / (q-1)`, `T2 = sum_kl p_kl (1 - (pi_k + pi_l)/2)^2 / (q-1)^2`.
pub fn gwet_ac_two_raters(
    a: &[usize],
    b: &[usize],
    k: usize,
    weighting: Weighting,
) -> Result<ChanceCorrected, StatsError> {
    check_pairs(a, b, k)?;
    let grid: Vec<Vec<Option<usize>>> = a
        .iter()
        .zip(b)
        .map(|(&x, &y)| vec![Some(x), Some(y)])
        .collect();
    let mut est = gwet_ac(&category_counts(&grid, k)?, weighting)?;
    if weighting == Weighting::Unweighted {
        let n = a.len() as f64;
        let qm1 = (k - 1) as f64;
        let mut p = vec![vec![0.0; k]; k];
        let mut pi = vec![0.0; k];
        for (&x, &y) in a.iter().zip(b) {
            p[x][y] += 1.0 / n;
            pi[x] += 0.5 / n;
            pi[y] += 0.5 / n;
        }
        let (pa, pe, ac1) = (est.p_observed, est.p_expected, est.coefficient);
        let t1: f64 = (0..k).map(|c| p[c][c] * (1.0 - pi[c])).sum::<f64>() / qm1;
        let mut t2 = 0.0;
        for c in 0..k {
            for l in 0..k {
                t2 += p[c][l] * (1.0 - (pi[c] + pi[l]) / 2.0).powi(2);
            }
        }
        t2 /= qm1 * qm1;
        let var = (pa * (1.0 - pa) - 4.0 * (1.0 - ac1) * (t1 - pa * pe)
            + 4.0 * (1.0 - ac1).powi(2) * (t2 - pe * pe))
            / (n * (1.0 - pe).powi(2));
        est.se = Some(var.max(0.0).sqrt());
    }
    Ok(est)
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

    /// Expands a table of counts into paired ratings (row category, column category).
    fn pairs(table: &[Vec<usize>]) -> (Vec<usize>, Vec<usize>) {
        let (mut a, mut b) = (Vec::new(), Vec::new());
        for (i, row) in table.iter().enumerate() {
            for (j, &c) in row.iter().enumerate() {
                a.extend(std::iter::repeat_n(i, c));
                b.extend(std::iter::repeat_n(j, c));
            }
        }
        (a, b)
    }

    /// 1-based scores to 0-based category indices.
    fn idx(v: &[usize]) -> Vec<usize> {
        v.iter().map(|x| x - 1).collect()
    }

    const SAS: [[usize; 3]; 3] = [[0, 4, 1], [0, 8, 0], [0, 1, 5]];

    fn sas() -> Vec<Vec<usize>> {
        SAS.iter().map(|r| r.to_vec()).collect()
    }

    /// Fleiss (1971) psychiatric diagnoses, 30 patients x 6 raters, 5 categories (R `irr::diagnoses`).
    #[rustfmt::skip]
    const DIAGNOSES: [[usize; 6]; 30] = [
        [4, 4, 4, 4, 4, 4], [2, 2, 2, 5, 5, 5], [2, 3, 3, 3, 3, 5], [5, 5, 5, 5, 5, 5], [2, 2, 2, 4, 4, 4],
        [1, 1, 3, 3, 3, 3], [3, 3, 3, 3, 5, 5], [1, 1, 3, 3, 3, 4], [1, 1, 4, 4, 4, 4], [5, 5, 5, 5, 5, 5],
        [1, 4, 4, 4, 4, 4], [1, 2, 4, 4, 4, 4], [2, 2, 2, 3, 3, 3], [1, 4, 4, 4, 4, 4], [2, 2, 4, 4, 4, 5],
        [3, 3, 3, 3, 3, 5], [1, 1, 1, 4, 5, 5], [1, 1, 1, 1, 1, 2], [2, 2, 4, 4, 4, 4], [1, 3, 3, 5, 5, 5],
        [5, 5, 5, 5, 5, 5], [2, 4, 4, 4, 4, 4], [2, 2, 4, 5, 5, 5], [1, 1, 4, 4, 4, 4], [1, 4, 4, 4, 4, 5],
        [2, 2, 2, 2, 2, 4], [1, 1, 1, 1, 5, 5], [2, 2, 4, 4, 4, 4], [1, 3, 3, 3, 3, 3], [5, 5, 5, 5, 5, 5],
    ];

    fn diagnoses_counts() -> Vec<Vec<usize>> {
        let grid: Vec<Vec<Option<usize>>> = DIAGNOSES
            .iter()
            .map(|r| r.iter().map(|&c| Some(c - 1)).collect())
            .collect();
        category_counts(&grid, 5).expect("valid categories")
    }

    const ORD_A: [usize; 12] = [1, 2, 3, 4, 2, 3, 4, 1, 2, 3, 3, 4];
    const ORD_B: [usize; 12] = [1, 2, 3, 3, 2, 4, 4, 2, 2, 3, 2, 4];

    /// METHODS 1: 2x2 counts [[20,5],[10,15]], p_o 0.7, p_e 0.5, kappa 0.3999999999999999
    /// [lib] statsmodels `cohens_kappa` (same numbers as the Wikipedia worked example [mem]).
    #[test]
    fn cohen_kappa_two_by_two_is_0_4() {
        let (a, b) = pairs(&[vec![20, 5], vec![10, 15]]);
        let k = cohen_kappa(&a, &b, 2, Weighting::Unweighted).expect("valid");
        close(k.kappa, 0.3999999999999999, 1e-12);
        close(k.p_observed, 0.7, 1e-12);
        close(k.p_expected, 0.5, 1e-12);
        close(exact_agreement(&a, &b).expect("valid"), 0.7, 1e-12);
    }

    /// METHODS 1: SAS example table [[0,4,1],[0,8,0],[0,1,5]]: kappa 0.4842, ASE 0.1380,
    /// ASE under H0 0.1484 [pub] SAS printout in the statsmodels test suite;
    /// [lib] 0.48416289592760176.
    #[test]
    fn cohen_kappa_matches_sas_table_with_standard_errors() {
        let k = cohen_kappa_from_table(&sas(), Weighting::Unweighted).expect("valid");
        close(k.kappa, 0.48416289592760176, 1e-12);
        close(k.se, 0.1380, 5e-5);
        close(k.se_null, 0.1484, 5e-5);
        close(k.kappa - 1.959963984540054 * k.se, 0.2137, 5e-5);
        close(k.kappa + 1.959963984540054 * k.se, 0.7547, 5e-5);
    }

    /// METHODS 1: SAS table, linear weights: 0.4701 (ASE 0.1457, H0 ASE 0.1426) [pub] SAS;
    /// [lib] statsmodels 0.4701195219123506, std 0.14574604514192566.
    #[test]
    fn linear_kappa_matches_sas_table() {
        let k = cohen_kappa_from_table(&sas(), Weighting::Linear).expect("valid");
        close(k.kappa, 0.4701195219123506, 1e-12);
        close(k.se, 0.14574604514192566, 1e-12);
        close(k.se_null, 0.1426, 5e-5);
    }

    /// METHODS 1: SAS table, quadratic weights 0.4501607717041801, std 0.19223266335726072
    /// [lib] statsmodels = sklearn.
    #[test]
    fn quadratic_kappa_matches_reference_library() {
        let k = cohen_kappa_from_table(&sas(), Weighting::Quadratic).expect("valid");
        close(k.kappa, 0.4501607717041801, 1e-12);
        close(k.se, 0.19223266335726072, 1e-12);
    }

    /// METHODS 1: 12-item ordinal example, confusion [[1,1,0,0],[0,3,0,0],[0,1,2,1],[0,0,1,2]];
    /// kappa 29/53, linear 55/79, quadratic 29/35 [lib] sklearn `cohen_kappa_score`.
    #[test]
    fn ordinal_example_matches_exact_fractions() {
        let (a, b) = (idx(&ORD_A), idx(&ORD_B));
        let m = confusion_matrix(&a, &b, 4).expect("valid");
        assert_eq!(
            m,
            vec![
                vec![1, 1, 0, 0],
                vec![0, 3, 0, 0],
                vec![0, 1, 2, 1],
                vec![0, 0, 1, 2]
            ]
        );
        close(
            cohen_kappa(&a, &b, 4, Weighting::Unweighted)
                .expect("valid")
                .kappa,
            29.0 / 53.0,
            1e-12,
        );
        close(
            cohen_kappa(&a, &b, 4, Weighting::Linear)
                .expect("valid")
                .kappa,
            55.0 / 79.0,
            1e-12,
        );
        close(
            cohen_kappa(&a, &b, 4, Weighting::Quadratic)
                .expect("valid")
                .kappa,
            29.0 / 35.0,
            1e-12,
        );
    }

    /// METHODS 1: an unused top category (labels 1..5) leaves linear kappa at
    /// 0.6962025316455696 [lib] sklearn with `labels=[1..5]`.
    #[test]
    fn unused_top_category_leaves_linear_kappa_unchanged() {
        let (a, b) = (idx(&ORD_A), idx(&ORD_B));
        close(
            cohen_kappa(&a, &b, 5, Weighting::Linear)
                .expect("valid")
                .kappa,
            0.6962025316455696,
            1e-12,
        );
    }

    /// METHODS 1: unused middle category, a=[1,2,3,5,5,1,2,3], b=[1,3,3,5,3,2,2,5]: full scale
    /// 1..5 gives linear 0.52, quadratic 0.6875, unweighted 0.33333333333333337; the reduced
    /// scale (4 dropped) gives 0.5789473684210527 / 0.7777777777777778 [lib] sklearn.
    #[test]
    fn unused_middle_category_counts_on_the_full_scale() {
        let (a, b) = (
            idx(&[1, 2, 3, 5, 5, 1, 2, 3]),
            idx(&[1, 3, 3, 5, 3, 2, 2, 5]),
        );
        close(
            cohen_kappa(&a, &b, 5, Weighting::Linear)
                .expect("valid")
                .kappa,
            0.52,
            1e-12,
        );
        close(
            cohen_kappa(&a, &b, 5, Weighting::Quadratic)
                .expect("valid")
                .kappa,
            0.6875,
            1e-12,
        );
        close(
            cohen_kappa(&a, &b, 5, Weighting::Unweighted)
                .expect("valid")
                .kappa,
            0.33333333333333337,
            1e-12,
        );
        let squeeze = |v: &[usize]| {
            v.iter()
                .map(|&c| if c == 4 { 3 } else { c })
                .collect::<Vec<_>>()
        };
        let (ra, rb) = (squeeze(&a), squeeze(&b));
        close(
            cohen_kappa(&ra, &rb, 4, Weighting::Linear)
                .expect("valid")
                .kappa,
            0.5789473684210527,
            1e-12,
        );
        close(
            cohen_kappa(&ra, &rb, 4, Weighting::Quadratic)
                .expect("valid")
                .kappa,
            0.7777777777777778,
            1e-12,
        );
    }

    /// METHODS 1 inputs, arithmetic by hand: the 12-item example's confusion matrix has every
    /// disagreement one step off the diagonal (4 of 12 items, two up and two down), so
    /// within-one agreement is 1, exact agreement 8/12, mean absolute error 4/12, bias 0.
    #[test]
    fn within_one_error_and_bias_follow_the_confusion_matrix() {
        let (a, b) = (idx(&ORD_A), idx(&ORD_B));
        close(exact_agreement(&a, &b).expect("valid"), 8.0 / 12.0, 1e-12);
        close(within_one_agreement(&a, &b).expect("valid"), 1.0, 0.0);
        let (fa, fb): (Vec<f64>, Vec<f64>) = (
            ORD_A.iter().map(|&x| x as f64).collect(),
            ORD_B.iter().map(|&x| x as f64).collect(),
        );
        close(
            mean_absolute_error(&fb, &fa).expect("valid"),
            4.0 / 12.0,
            1e-12,
        );
        // Off-diagonal cells: (1,2) +1, (3,2) -1, (3,4) +1, (4,3) -1 as b - a.
        close(mean_signed_bias(&fb, &fa).expect("valid"), 0.0, 1e-12);
        // METHODS 1 unused-middle example: b - a = [0,1,0,0,-2,1,0,2] by hand.
        let (ua, ub) = (
            [1.0, 2.0, 3.0, 5.0, 5.0, 1.0, 2.0, 3.0],
            [1.0, 3.0, 3.0, 5.0, 3.0, 2.0, 2.0, 5.0],
        );
        close(mean_signed_bias(&ub, &ua).expect("valid"), 0.25, 1e-12);
        close(mean_signed_bias(&ua, &ub).expect("valid"), -0.25, 1e-12);
        close(mean_absolute_error(&ub, &ua).expect("valid"), 0.75, 1e-12);
    }

    /// METHODS 2: Wikipedia worked example, 10 subjects x 14 raters: published 0.210 [pub];
    /// P-bar 0.378021978021978, P_e 0.21275510204081632, kappa 0.20993070442195522 [lib] statsmodels.
    #[test]
    fn fleiss_kappa_matches_wikipedia_example() {
        #[rustfmt::skip]
        let t = vec![
            vec![0, 0, 0, 0, 14], vec![0, 2, 6, 4, 2], vec![0, 0, 3, 5, 6], vec![0, 3, 9, 2, 0], vec![2, 2, 8, 1, 1],
            vec![7, 7, 0, 0, 0], vec![3, 2, 6, 3, 0], vec![2, 5, 3, 2, 2], vec![6, 5, 2, 1, 0], vec![0, 2, 2, 3, 7],
        ];
        let f = fleiss_kappa(&t).expect("valid");
        close(f.coefficient, 0.20993070442195522, 1e-12);
        close(f.p_observed, 0.378021978021978, 1e-12);
        close(f.p_expected, 0.21275510204081632, 1e-12);
    }

    /// METHODS 2: Fleiss (1971) diagnoses 30 x 6: 0.4302445 [pub] R irr `kappam.fleiss`;
    /// [lib] 0.43024452006014074.
    #[test]
    fn fleiss_kappa_matches_diagnoses_data() {
        close(
            fleiss_kappa(&diagnoses_counts())
                .expect("valid")
                .coefficient,
            0.43024452006014074,
            1e-12,
        );
    }

    /// METHODS 4: Gwet handbook `cont3x3abstractors` [[13,0,0],[0,20,7],[0,4,56]]: AC1 0.84933
    /// (p_e 0.26992, SE 0.04322), AC2 quadratic 0.94024 (p_a 0.9725, p_e 0.53985), Cohen 0.79641
    /// (p_e 0.4597) [pub] irrCAC 0.4.4 docstring, 5 d.p.
    #[test]
    fn gwet_ac1_and_ac2_match_handbook_table() {
        let t = vec![vec![13, 0, 0], vec![0, 20, 7], vec![0, 4, 56]];
        let (a, b) = pairs(&t);
        let ac1 = gwet_ac_two_raters(&a, &b, 3, Weighting::Unweighted).expect("valid");
        close(ac1.coefficient, 0.84933, 5e-6);
        close(ac1.p_observed, 0.89, 1e-12);
        close(ac1.p_expected, 0.26992, 5e-6);
        close(
            ac1.se.expect("two-rater AC1 has a standard error"),
            0.04322,
            5e-6,
        );
        let ac2 = gwet_ac_two_raters(&a, &b, 3, Weighting::Quadratic).expect("valid");
        close(ac2.coefficient, 0.94024, 5e-6);
        close(ac2.p_observed, 0.9725, 1e-12);
        close(ac2.p_expected, 0.53985, 5e-6);
        let k = cohen_kappa_from_table(&t, Weighting::Unweighted).expect("valid");
        close(k.kappa, 0.79641, 5e-6);
        close(k.p_expected, 0.4597, 5e-5);
    }

    /// METHODS 4: kappa paradox [[118,5],[2,0]]: kappa -0.02339181286549608, AC1
    /// 0.9407763376087177 [lib] statsmodels, irrCAC, hand.
    #[test]
    fn kappa_paradox_low_kappa_high_ac1() {
        let t = vec![vec![118, 5], vec![2, 0]];
        close(
            cohen_kappa_from_table(&t, Weighting::Unweighted)
                .expect("valid")
                .kappa,
            -0.02339181286549608,
            1e-12,
        );
        let (a, b) = pairs(&t);
        close(
            gwet_ac_two_raters(&a, &b, 2, Weighting::Unweighted)
                .expect("valid")
                .coefficient,
            0.9407763376087177,
            1e-12,
        );
    }

    /// METHODS 4: Fleiss diagnoses 30 x 6: AC1 0.447884515844564, p_e 0.19501543209876543
    /// [lib] irrCAC = hand.
    #[test]
    fn multi_rater_ac1_matches_diagnoses_data() {
        let g = gwet_ac(&diagnoses_counts(), Weighting::Unweighted).expect("valid");
        close(g.coefficient, 0.447884515844564, 1e-12);
        close(g.p_expected, 0.19501543209876543, 1e-12);
        close(g.p_observed, 5.0 / 9.0, 1e-12);
    }

    /// Property: identical ratings give 1 for every coefficient and weighting.
    #[test]
    fn perfect_agreement_gives_one() {
        let a = vec![0, 1, 2, 3, 1, 2, 0, 3, 3];
        for w in [
            Weighting::Unweighted,
            Weighting::Linear,
            Weighting::Quadratic,
        ] {
            close(cohen_kappa(&a, &a, 5, w).expect("valid").kappa, 1.0, 1e-12);
            close(
                gwet_ac_two_raters(&a, &a, 5, w).expect("valid").coefficient,
                1.0,
                1e-12,
            );
        }
        let grid: Vec<Vec<Option<usize>>> = a.iter().map(|&c| vec![Some(c); 3]).collect();
        close(
            fleiss_kappa(&category_counts(&grid, 5).expect("valid"))
                .expect("valid")
                .coefficient,
            1.0,
            1e-12,
        );
    }

    /// Property: swapping the two raters changes neither kappa nor its standard error.
    #[test]
    fn kappa_is_symmetric_in_raters() {
        let (a, b) = (idx(&ORD_A), idx(&ORD_B));
        for w in [
            Weighting::Unweighted,
            Weighting::Linear,
            Weighting::Quadratic,
        ] {
            let (x, y) = (
                cohen_kappa(&a, &b, 4, w).expect("valid"),
                cohen_kappa(&b, &a, 4, w).expect("valid"),
            );
            close(x.kappa, y.kappa, 1e-14);
            close(x.se, y.se, 1e-14);
            let (g, h) = (
                gwet_ac_two_raters(&a, &b, 4, w).expect("valid"),
                gwet_ac_two_raters(&b, &a, 4, w).expect("valid"),
            );
            close(g.coefficient, h.coefficient, 1e-14);
        }
    }

    /// Property: relabelling categories leaves nominal statistics unchanged.
    #[test]
    fn nominal_statistics_ignore_label_permutation() {
        let perm = [3, 0, 4, 1, 2];
        let counts = diagnoses_counts();
        let permuted: Vec<Vec<usize>> = counts
            .iter()
            .map(|row| {
                let mut out = vec![0; 5];
                for (c, &n) in row.iter().enumerate() {
                    out[perm[c]] = n;
                }
                out
            })
            .collect();
        close(
            fleiss_kappa(&permuted).expect("valid").coefficient,
            fleiss_kappa(&counts).expect("valid").coefficient,
            1e-14,
        );
        close(
            gwet_ac(&permuted, Weighting::Unweighted)
                .expect("valid")
                .coefficient,
            gwet_ac(&counts, Weighting::Unweighted)
                .expect("valid")
                .coefficient,
            1e-14,
        );
        let (a, b) = (
            idx(&[1, 2, 3, 5, 5, 1, 2, 3]),
            idx(&[1, 3, 3, 5, 3, 2, 2, 5]),
        );
        let p = |v: &[usize]| v.iter().map(|&c| perm[c]).collect::<Vec<_>>();
        close(
            cohen_kappa(&p(&a), &p(&b), 5, Weighting::Unweighted)
                .expect("valid")
                .kappa,
            0.33333333333333337,
            1e-12,
        );
    }

    #[test]
    fn out_of_scale_category_is_rejected() {
        assert!(matches!(
            cohen_kappa(&[0, 4], &[0, 1], 4, Weighting::Linear),
            Err(StatsError::OutOfRange { .. })
        ));
        assert!(matches!(
            cohen_kappa(&[0, 1], &[0], 4, Weighting::Linear),
            Err(StatsError::LengthMismatch { .. })
        ));
        assert!(matches!(
            cohen_kappa(&[], &[], 4, Weighting::Linear),
            Err(StatsError::TooFew { .. })
        ));
    }

    #[test]
    fn single_used_category_is_undefined_for_kappa() {
        assert!(matches!(
            cohen_kappa(&[1, 1, 1], &[1, 1, 1], 3, Weighting::Unweighted),
            Err(StatsError::Undefined(_))
        ));
    }

    #[test]
    fn fleiss_rejects_unequal_rater_counts() {
        assert!(matches!(
            fleiss_kappa(&[vec![2, 1], vec![1, 1]]),
            Err(StatsError::LengthMismatch { .. })
        ));
    }
}
