//! Tests of the vetting stage on small invented data built in code; expected values
//! are the METHODS.md references (named in each test's doc comment) or hand
//! computations shown in the comment.

use std::path::PathBuf;

use super::*;
use crate::rubric::{Criterion, Scale};

pub(super) fn rubric(criteria: &[(&str, Scale)]) -> Rubric {
    Rubric {
        name: "toy".into(),
        description: String::new(),
        criteria: criteria
            .iter()
            .map(|(k, s)| Criterion {
                key: k.to_string(),
                title: k.to_string(),
                question: String::new(),
                scale: *s,
                needs: vec![],
                steps: vec![],
                points: vec![],
            })
            .collect(),
        path: PathBuf::new(),
        sha256: String::new(),
        text: String::new(),
    }
}

pub(super) fn label(q: &str, crit: &str, rater: &str, score: &str) -> LabelRow {
    LabelRow {
        question_id: q.into(),
        system: "sys".into(),
        criterion: crit.into(),
        rater: rater.into(),
        score: score.into(),
        line: 0,
    }
}

pub(super) fn record(q: &str, crit: &str, scale: Scale, probs: &[f64]) -> GradeRecord {
    let labels = scale.labels();
    let expected = probs.iter().zip(scale.values()).map(|(p, v)| p * v).sum();
    let mut top = 0;
    for (i, p) in probs.iter().enumerate() {
        if *p > probs[top] {
            top = i;
        }
    }
    GradeRecord {
        question_id: q.into(),
        system: "sys".into(),
        criterion: crit.into(),
        argmax: labels[top].clone(),
        labels,
        probabilities: probs.to_vec(),
        captured_mass: 1.0,
        expected,
        spread: 0.0,
        low_mass: false,
        rationale: None,
    }
}

/// A distribution with `peak` on position `pos` and the rest spread evenly.
pub(super) fn peaked(k: usize, pos: usize, peak: f64) -> Vec<f64> {
    (0..k)
        .map(|i| {
            if i == pos {
                peak
            } else {
                (1.0 - peak) / (k - 1) as f64
            }
        })
        .collect()
}

pub(super) fn quick() -> VetOptions {
    VetOptions {
        resamples: 400,
        ..VetOptions::default()
    }
}

pub(super) fn variant<'a>(
    name: &str,
    records: &'a [GradeRecord],
    kind: VariantKind,
) -> Variant<'a> {
    Variant {
        name: name.into(),
        records,
        kind,
    }
}

pub(super) fn close(got: f64, want: f64, tol: f64) {
    assert!((got - want).abs() <= tol, "got {got}, want {want}");
}

/// Judge scores `judge` against a single rater's `human` scores on one criterion.
fn one_rater(scale: Scale, judge: &[usize], human: &[usize]) -> (Vec<GradeRecord>, Vec<LabelRow>) {
    let labels = scale.labels();
    let k = labels.len();
    let recs = judge
        .iter()
        .enumerate()
        .map(|(i, &j)| record(&format!("q{i:03}"), "c", scale, &peaked(k, j, 0.6)))
        .collect();
    let rows = human
        .iter()
        .enumerate()
        .map(|(i, &h)| label(&format!("q{i:03}"), "c", "r1", &labels[h]))
        .collect();
    (recs, rows)
}

pub(super) fn categorical(r: &VetReport) -> &CategoricalAgreement {
    r.criteria[0].variants[0]
        .categorical
        .as_ref()
        .expect("judge variant")
}

/// METHODS.md section 1, 12-item ordinal example (sklearn `cohen_kappa_score` [lib]):
/// unweighted 29/53, linear 55/79, quadratic 29/35. The 1-5 scale adds an unused top
/// category, which METHODS notes changes nothing (an all-zero last row and column).
/// Confusion and exact/within-one agreement by hand from the published confusion.
#[test]
fn ordinal_example_gives_the_reference_kappas() {
    let a = [1, 2, 3, 4, 2, 3, 4, 1, 2, 3, 3, 4].map(|x| x - 1);
    let b = [1, 2, 3, 3, 2, 4, 4, 2, 2, 3, 2, 4].map(|x| x - 1);
    let (recs, rows) = one_rater(Scale::points(1, 5), &a, &b);
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let r = vet(
        &[variant("argmax", &recs, VariantKind::Argmax)],
        &rows,
        &rb,
        &quick(),
    )
    .expect("vet");
    let c = categorical(&r);
    close(c.kappa_unweighted.expect("defined"), 29.0 / 53.0, 1e-12);
    close(c.kappa_linear.expect("defined"), 55.0 / 79.0, 1e-12);
    close(c.kappa_quadratic.expect("defined"), 29.0 / 35.0, 1e-12);
    // rows human (b), columns judge (a): the transpose of the published table
    let want = [[1, 0, 0, 0], [1, 3, 1, 0], [0, 0, 2, 1], [0, 0, 1, 2]];
    for (i, row) in want.iter().enumerate() {
        assert_eq!(&c.confusion[i][..4], row);
    }
    close(c.exact, 8.0 / 12.0, 1e-12);
    close(c.within_one, 1.0, 1e-12);
    let ci = c.kappa_quadratic_ci.percentile.as_ref().expect("interval");
    assert!(ci.lower <= 29.0 / 35.0 && 29.0 / 35.0 <= ci.upper);
    assert_eq!(ci.replicates + ci.skipped, 400);
    assert!(c.kappa_quadratic_ci.bca.is_some());
}

/// METHODS.md section 1, unused middle category (sklearn with `labels=[1..5]` [lib]):
/// linear 0.52, quadratic 0.6875, unweighted 0.33333333333333337; the tool must use the
/// full declared scale, so value 4 (never used) still counts.
#[test]
fn unused_middle_label_still_counts_in_weighted_kappa() {
    let a = [1, 2, 3, 5, 5, 1, 2, 3].map(|x| x - 1);
    let b = [1, 3, 3, 5, 3, 2, 2, 5].map(|x| x - 1);
    let (recs, rows) = one_rater(Scale::points(1, 5), &a, &b);
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let r = vet(
        &[variant("argmax", &recs, VariantKind::Argmax)],
        &rows,
        &rb,
        &quick(),
    )
    .expect("vet");
    let c = categorical(&r);
    close(c.kappa_linear.expect("defined"), 0.52, 1e-12);
    close(c.kappa_quadratic.expect("defined"), 0.6875, 1e-12);
    close(
        c.kappa_unweighted.expect("defined"),
        0.33333333333333337,
        1e-12,
    );
}

/// METHODS.md section 5 (scipy 1.12.0 [lib]): x = [1,2,2,3,4,4,4,5] as the judge's expected
/// score, y = [2,1,3,3,4,5,4,5] as the human: Pearson 0.8697668414213696, Spearman
/// 0.9063208090792971, Kendall tau-b 0.816496580927726. MAE 4/8 and bias -2/8 by hand.
#[test]
fn correlations_and_errors_match_the_scipy_example() {
    let x = [1, 2, 2, 3, 4, 4, 4, 5].map(|v| v - 1);
    let y = [2, 1, 3, 3, 4, 5, 4, 5].map(|v| v - 1);
    let (mut recs, rows) = one_rater(Scale::points(1, 5), &x, &y);
    for (r, &v) in recs.iter_mut().zip(&x) {
        r.expected = (v + 1) as f64; // the continuous score the correlations use
    }
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let r = vet(
        &[variant("expected", &recs, VariantKind::ExpectedScore)],
        &rows,
        &rb,
        &quick(),
    )
    .expect("vet");
    let v = &r.criteria[0].variants[0];
    close(
        v.correlation.pearson.expect("defined"),
        0.8697668414213696,
        1e-12,
    );
    close(
        v.correlation.spearman.expect("defined"),
        0.9063208090792971,
        1e-12,
    );
    close(
        v.correlation.kendall_tau_b.expect("defined"),
        0.816496580927726,
        1e-12,
    );
    let e = v.error.as_ref().expect("judge variant");
    close(e.mae, 0.5, 1e-12);
    close(e.mean_signed_bias, -0.25, 1e-12);
}

/// METHODS.md section 4, Gwet handbook `cont3x3abstractors` [[13,0,0],[0,20,7],[0,4,56]]
/// (irrCAC 0.4.4 docstring [pub], 5 d.p.): AC1 0.84933, AC2 quadratic 0.94024, Cohen
/// kappa 0.79641, on a 1-3 scale.
#[test]
fn gwet_coefficients_match_the_handbook_table() {
    let table = [[13, 0, 0], [0, 20, 7], [0, 4, 56]];
    let (mut h, mut j) = (Vec::new(), Vec::new());
    for (i, row) in table.iter().enumerate() {
        for (jj, &n) in row.iter().enumerate() {
            h.extend(std::iter::repeat_n(i, n));
            j.extend(std::iter::repeat_n(jj, n));
        }
    }
    let (recs, rows) = one_rater(Scale::points(1, 3), &j, &h);
    let rb = rubric(&[("c", Scale::points(1, 3))]);
    let r = vet(
        &[variant("argmax", &recs, VariantKind::Argmax)],
        &rows,
        &rb,
        &quick(),
    )
    .expect("vet");
    let c = categorical(&r);
    close(c.gwet_ac1.expect("defined"), 0.84933, 5e-6);
    close(c.gwet_ac2_quadratic.expect("defined"), 0.94024, 5e-6);
    close(c.kappa_unweighted.expect("defined"), 0.79641, 5e-6);
}

/// METHODS.md section 3, binary two coders A `0 1 0 0 0 0 0 0 1 0`, B `1 1 1 0 0 1 0 0 0 0`:
/// krippendorff 0.9.0 nominal 0.09523809523809534 [lib]. With two values every level's
/// difference function is constant on the one unequal pair, so ordinal and interval agree.
#[test]
fn alpha_of_judge_and_consensus_matches_the_binary_reference() {
    let a = [0, 1, 0, 0, 0, 0, 0, 0, 1, 0];
    let b = [1, 1, 1, 0, 0, 1, 0, 0, 0, 0];
    let (recs, rows) = one_rater(Scale::YesNo, &a, &b);
    let rb = rubric(&[("c", Scale::YesNo)]);
    let r = vet(
        &[variant("argmax", &recs, VariantKind::Argmax)],
        &rows,
        &rb,
        &quick(),
    )
    .expect("vet");
    let c = categorical(&r);
    for alpha in [c.alpha_nominal, c.alpha_ordinal, c.alpha_interval] {
        close(alpha.expect("defined"), 0.09523809523809534, 1e-12);
    }
}

/// METHODS.md section 6 multi-class example (sklearn [lib]): ECE (10 bins) 0.39249999999999996,
/// Brier (sum form) 0.41114999999999996, log loss 0.7480207351193543, accuracy 2/4; its
/// expected scores [3.08, 4.21, 1.44, 2.53] round to the labels [3, 4, 1, 3] exactly.
#[test]
fn calibration_matches_the_multiclass_example() {
    let p = [
        [0.05, 0.10, 0.62, 0.18, 0.05],
        [0.0, 0.05, 0.17, 0.30, 0.48],
        [0.71, 0.19, 0.05, 0.05, 0.0],
        [0.10, 0.42, 0.38, 0.05, 0.05],
    ];
    let y = ["3", "4", "1", "3"];
    let recs: Vec<GradeRecord> = p
        .iter()
        .enumerate()
        .map(|(i, row)| record(&format!("q{i}"), "c", Scale::points(1, 5), row))
        .collect();
    let rows: Vec<LabelRow> = y
        .iter()
        .enumerate()
        .map(|(i, s)| label(&format!("q{i}"), "c", "r1", s))
        .collect();
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let r = vet(
        &[variant("expected", &recs, VariantKind::ExpectedScore)],
        &rows,
        &rb,
        &quick(),
    )
    .expect("vet");
    let cal = &r.criteria[0].calibration[0];
    close(cal.ece_equal_width, 0.39249999999999996, 1e-12);
    close(cal.brier, 0.41114999999999996, 1e-12);
    close(cal.log_loss, 0.7480207351193543, 1e-12);
    close(cal.accuracy, 0.5, 1e-12);
    assert!(
        cal.temperature.is_none() && cal.note.is_some(),
        "4 items < 5 folds"
    );
    close(categorical(&r).exact, 1.0, 1e-12);
}

/// Hand computation (Cohen 1960 kappa; phi = Pearson on binary = Spearman), yes-no scale,
/// raters a b c on 6 items (1,1,1) (0,0,0) (1,1,0) (0,0,1) (1,1,1) (0,1,0). With two
/// others the leave-one-out consensus is the lower of them. a: p_o 5/6, p_e 1/2 -> 2/3;
/// b: p_o 2/3, p_e 4/9 -> 2/5; c: p_o 2/3, p_e 1/2 -> 1/3; mean 7/15. Spearman: a 1/sqrt 2,
/// b 1/2, c 1/3.
#[test]
fn leave_one_rater_out_ceiling_matches_hand_computation() {
    let grid = [
        [1, 1, 1],
        [0, 0, 0],
        [1, 1, 0],
        [0, 0, 1],
        [1, 1, 1],
        [0, 1, 0],
    ];
    let mut rows = Vec::new();
    for (i, item) in grid.iter().enumerate() {
        for (r, &v) in item.iter().enumerate() {
            rows.push(label(
                &format!("q{i}"),
                "c",
                ["a", "b", "c"][r],
                ["no", "yes"][v],
            ));
        }
    }
    let rb = rubric(&[("c", Scale::YesNo)]);
    let lab = items::group_labels(&rows, &rb).expect("labels");
    let h = ceiling::ceiling(&lab[0]);
    let k: Vec<f64> = h
        .per_rater
        .iter()
        .map(|r| r.kappa_quadratic.expect("defined"))
        .collect();
    close(k[0], 2.0 / 3.0, 1e-12);
    close(k[1], 2.0 / 5.0, 1e-12);
    close(k[2], 1.0 / 3.0, 1e-12);
    close(h.mean_kappa_quadratic.expect("defined"), 7.0 / 15.0, 1e-12);
    let s: Vec<f64> = h
        .per_rater
        .iter()
        .map(|r| r.spearman.expect("defined"))
        .collect();
    close(s[0], 0.5f64.sqrt(), 1e-12);
    close(s[1], 0.5, 1e-12);
    close(s[2], 1.0 / 3.0, 1e-12);
    assert!(h.per_rater.iter().all(|r| r.n_items == 6));
}

/// Krippendorff (2011) 4 observers x 12 units with missing values, published ordinal
/// alpha 0.815 (krippendorff 0.9.0: 0.8153875037548814 [lib]); METHODS.md section 3.
#[test]
fn ceiling_alpha_matches_krippendorffs_published_example() {
    let data = [
        "1 2 3 3 2 1 4 1 2 . . .",
        "1 2 3 3 2 2 4 1 2 5 . 3",
        ". 3 3 3 2 3 4 2 2 5 1 .",
        "1 2 3 3 2 4 4 1 2 5 1 .",
    ];
    let mut rows = Vec::new();
    for (r, line) in data.iter().enumerate() {
        for (u, v) in line.split(' ').enumerate() {
            if v != "." {
                rows.push(label(&format!("u{u:02}"), "c", &format!("r{r}"), v));
            }
        }
    }
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let lab = items::group_labels(&rows, &rb).expect("labels");
    let h = ceiling::ceiling(&lab[0]);
    close(h.alpha_ordinal.expect("defined"), 0.8153875037548814, 1e-12);
    assert_eq!(h.n_raters, 4);
}
