//! Tests of the vetting stage on small invented data built in code; expected values
//! are the METHODS.md references (named in each test's doc comment) or hand
//! computations shown in the comment.

use std::path::PathBuf;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::*;
use crate::data::PreferenceRow;
use crate::judge::PairRecord;
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
    (0..k).map(|i| if i == pos { peak } else { (1.0 - peak) / (k - 1) as f64 }).collect()
}

fn quick() -> VetOptions {
    VetOptions { resamples: 400, ..VetOptions::default() }
}

fn variant<'a>(name: &str, records: &'a [GradeRecord], kind: VariantKind) -> Variant<'a> {
    Variant { name: name.into(), records, kind }
}

fn close(got: f64, want: f64, tol: f64) {
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

fn categorical(r: &VetReport) -> &CategoricalAgreement {
    r.criteria[0].variants[0].categorical.as_ref().expect("judge variant")
}

/// METHODS.md section 1, 12-item ordinal example (sklearn `cohen_kappa_score` [lib]):
/// unweighted 29/53, linear 55/79, quadratic 29/35. The 1-5 scale adds an unused top
/// category, which METHODS notes changes nothing (an all-zero last row and column).
/// Confusion and exact/within-one agreement by hand from the published confusion.
#[test]
fn ordinal_example_gives_the_reference_kappas() {
    let a = [1, 2, 3, 4, 2, 3, 4, 1, 2, 3, 3, 4].map(|x| x - 1);
    let b = [1, 2, 3, 3, 2, 4, 4, 2, 2, 3, 2, 4].map(|x| x - 1);
    let (recs, rows) = one_rater(Scale::OneToFive, &a, &b);
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let r = vet(&[variant("argmax", &recs, VariantKind::Argmax)], &rows, &rb, &quick()).expect("vet");
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
    let (recs, rows) = one_rater(Scale::OneToFive, &a, &b);
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let r = vet(&[variant("argmax", &recs, VariantKind::Argmax)], &rows, &rb, &quick()).expect("vet");
    let c = categorical(&r);
    close(c.kappa_linear.expect("defined"), 0.52, 1e-12);
    close(c.kappa_quadratic.expect("defined"), 0.6875, 1e-12);
    close(c.kappa_unweighted.expect("defined"), 0.33333333333333337, 1e-12);
}

/// METHODS.md section 5 (scipy 1.12.0 [lib]): x = [1,2,2,3,4,4,4,5] as the judge's expected
/// score, y = [2,1,3,3,4,5,4,5] as the human: Pearson 0.8697668414213696, Spearman
/// 0.9063208090792971, Kendall tau-b 0.816496580927726. MAE 4/8 and bias -2/8 by hand.
#[test]
fn correlations_and_errors_match_the_scipy_example() {
    let x = [1, 2, 2, 3, 4, 4, 4, 5].map(|v| v - 1);
    let y = [2, 1, 3, 3, 4, 5, 4, 5].map(|v| v - 1);
    let (mut recs, rows) = one_rater(Scale::OneToFive, &x, &y);
    for (r, &v) in recs.iter_mut().zip(&x) {
        r.expected = (v + 1) as f64; // the continuous score the correlations use
    }
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let r = vet(&[variant("expected", &recs, VariantKind::ExpectedScore)], &rows, &rb, &quick()).expect("vet");
    let v = &r.criteria[0].variants[0];
    close(v.correlation.pearson.expect("defined"), 0.8697668414213696, 1e-12);
    close(v.correlation.spearman.expect("defined"), 0.9063208090792971, 1e-12);
    close(v.correlation.kendall_tau_b.expect("defined"), 0.816496580927726, 1e-12);
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
    let (recs, rows) = one_rater(Scale::OneToThree, &j, &h);
    let rb = rubric(&[("c", Scale::OneToThree)]);
    let r = vet(&[variant("argmax", &recs, VariantKind::Argmax)], &rows, &rb, &quick()).expect("vet");
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
    let r = vet(&[variant("argmax", &recs, VariantKind::Argmax)], &rows, &rb, &quick()).expect("vet");
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
        .map(|(i, row)| record(&format!("q{i}"), "c", Scale::OneToFive, row))
        .collect();
    let rows: Vec<LabelRow> = y.iter().enumerate().map(|(i, s)| label(&format!("q{i}"), "c", "r1", s)).collect();
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let r = vet(&[variant("expected", &recs, VariantKind::ExpectedScore)], &rows, &rb, &quick()).expect("vet");
    let cal = &r.criteria[0].calibration[0];
    close(cal.ece_equal_width, 0.39249999999999996, 1e-12);
    close(cal.brier, 0.41114999999999996, 1e-12);
    close(cal.log_loss, 0.7480207351193543, 1e-12);
    close(cal.accuracy, 0.5, 1e-12);
    assert!(cal.temperature.is_none() && cal.note.is_some(), "4 items < 5 folds");
    close(categorical(&r).exact, 1.0, 1e-12);
}

/// Hand computation (Cohen 1960 kappa; phi = Pearson on binary = Spearman), yes-no scale,
/// raters a b c on 6 items (1,1,1) (0,0,0) (1,1,0) (0,0,1) (1,1,1) (0,1,0). With two
/// others the leave-one-out consensus is the lower of them. a: p_o 5/6, p_e 1/2 -> 2/3;
/// b: p_o 2/3, p_e 4/9 -> 2/5; c: p_o 2/3, p_e 1/2 -> 1/3; mean 7/15. Spearman: a 1/sqrt 2,
/// b 1/2, c 1/3.
#[test]
fn leave_one_rater_out_ceiling_matches_hand_computation() {
    let grid = [[1, 1, 1], [0, 0, 0], [1, 1, 0], [0, 0, 1], [1, 1, 1], [0, 1, 0]];
    let mut rows = Vec::new();
    for (i, item) in grid.iter().enumerate() {
        for (r, &v) in item.iter().enumerate() {
            rows.push(label(&format!("q{i}"), "c", ["a", "b", "c"][r], ["no", "yes"][v]));
        }
    }
    let rb = rubric(&[("c", Scale::YesNo)]);
    let lab = items::group_labels(&rows, &rb).expect("labels");
    let h = ceiling::ceiling(&lab[0]);
    let k: Vec<f64> = h.per_rater.iter().map(|r| r.kappa_quadratic.expect("defined")).collect();
    close(k[0], 2.0 / 3.0, 1e-12);
    close(k[1], 2.0 / 5.0, 1e-12);
    close(k[2], 1.0 / 3.0, 1e-12);
    close(h.mean_kappa_quadratic.expect("defined"), 7.0 / 15.0, 1e-12);
    let s: Vec<f64> = h.per_rater.iter().map(|r| r.spearman.expect("defined")).collect();
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
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let lab = items::group_labels(&rows, &rb).expect("labels");
    let h = ceiling::ceiling(&lab[0]);
    close(h.alpha_ordinal.expect("defined"), 0.8153875037548814, 1e-12);
    assert_eq!(h.n_raters, 4);
}

/// Three raters with small disagreements on `n` items of a 1-5 scale (invented); returns
/// the label rows and each item's consensus (lower median) position.
pub(super) fn three_raters(n: usize, crit: &str) -> (Vec<LabelRow>, Vec<usize>) {
    let mut rows = Vec::new();
    let mut consensus = Vec::new();
    for i in 0..n {
        let base = (i * 7 + i / 5) % 5;
        let b = if i % 4 == 0 { (base + 1).min(4) } else { base };
        let c = if i % 3 == 0 { base.saturating_sub(1) } else { base };
        let mut v = [base, b, c];
        v.sort_unstable();
        consensus.push(v[1]);
        for (r, s) in ["ra", "rb", "rc"].iter().zip([base, b, c]) {
            rows.push(label(&format!("q{i:03}"), crit, r, &(s + 1).to_string()));
        }
    }
    (rows, consensus)
}

/// Definition of kappa (Cohen 1960): a judge that always gives the consensus label has
/// kappa 1, above every rater's leave-one-out kappa, so the non-inferiority rule says yes.
#[test]
fn perfect_judge_has_kappa_one_and_is_trusted() {
    let (rows, cons) = three_raters(150, "c");
    let recs: Vec<GradeRecord> = cons
        .iter()
        .enumerate()
        .map(|(i, &h)| record(&format!("q{i:03}"), "c", Scale::OneToFive, &peaked(5, h, 0.9)))
        .collect();
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let r = vet(&[variant("argmax", &recs, VariantKind::Argmax)], &rows, &rb, &VetOptions::default()).expect("vet");
    let c = &r.criteria[0];
    close(categorical(&r).kappa_quadratic.expect("defined"), 1.0, 1e-12);
    assert!(c.ceiling.mean_kappa_quadratic.expect("defined") < 1.0);
    assert_eq!(c.trust.verdict, Verdict::Yes, "{}", c.trust.reason);
    assert!(!c.trust.thin_evidence, "{:?}", c.trust.warnings);
    assert!(gate_failures(&r, 0.9).is_empty());
}

/// Definition of chance agreement: a judge drawing labels at random agrees with humans
/// at chance (kappa near 0), far below the raters, so it must not be trusted.
#[test]
fn random_judge_is_not_trusted() {
    let (rows, cons) = three_raters(150, "c");
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let recs: Vec<GradeRecord> = (0..cons.len())
        .map(|i| record(&format!("q{i:03}"), "c", Scale::OneToFive, &peaked(5, rng.random_range(0..5), 0.5)))
        .collect();
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let r = vet(&[variant("argmax", &recs, VariantKind::Argmax)], &rows, &rb, &quick()).expect("vet");
    let t = &r.criteria[0].trust;
    assert_ne!(t.verdict, Verdict::Yes, "{}", t.reason);
    assert_eq!(gate_failures(&r, 0.5).len(), 1);
}

/// Sample-size rule (precision form, METHODS.md section 13): 10 items cannot pin a kappa
/// to +-0.15, so even a perfect judge's card is flagged thin and the text says so.
#[test]
fn a_yes_on_few_items_is_called_thin_in_words() {
    let (rows, cons) = three_raters(10, "c");
    let recs: Vec<GradeRecord> = cons
        .iter()
        .enumerate()
        .map(|(i, &h)| record(&format!("q{i:03}"), "c", Scale::OneToFive, &peaked(5, h, 0.9)))
        .collect();
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let r = vet(&[variant("argmax", &recs, VariantKind::Argmax)], &rows, &rb, &quick()).expect("vet");
    let t = &r.criteria[0].trust;
    assert!(t.thin_evidence);
    assert!(t.advice.as_ref().is_some_and(|a| !a.enough));
    let text = report_text(&r, None);
    if t.verdict == Verdict::Yes {
        assert!(text.contains("rests on thin evidence"), "{text}");
    }
    assert!(text.contains("warning: only 10 labelled items"), "{text}");
}

/// Documented baseline behaviour (module doc): correlations only; no kappa, error or calibration.
#[test]
fn baseline_variant_gets_correlations_only() {
    let (rows, cons) = three_raters(30, "c");
    let judge: Vec<GradeRecord> = cons
        .iter()
        .enumerate()
        .map(|(i, &h)| record(&format!("q{i:03}"), "c", Scale::OneToFive, &peaked(5, h, 0.9)))
        .collect();
    let base: Vec<GradeRecord> = judge
        .iter()
        .map(|r| GradeRecord { expected: r.expected / 10.0, labels: vec![], probabilities: vec![], ..r.clone() })
        .collect();
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let vs = [variant("judge", &judge, VariantKind::Argmax), variant("overlap", &base, VariantKind::Baseline)];
    let r = vet(&vs, &rows, &rb, &quick()).expect("vet");
    let b = &r.criteria[0].variants[1];
    assert!(b.categorical.is_none() && b.error.is_none());
    // a rescaled copy of a peaked judge ranks items exactly as the judge does
    close(b.correlation.spearman.expect("defined"), r.criteria[0].variants[0].correlation.spearman.expect("defined"), 1e-12);
    assert_eq!(r.criteria[0].calibration.len(), 1);
    assert!(report_text(&r, None).contains("(baseline)"));
}

/// Input checks (module doc "never guesses"): unknown criteria, off-scale labels,
/// a baseline listed first and labels the judge never graded are errors naming the problem.
#[test]
fn bad_inputs_are_errors_that_name_the_problem() {
    let rb = rubric(&[("c", Scale::OneToFive)]);
    let recs = vec![record("q1", "c", Scale::OneToFive, &peaked(5, 2, 0.8))];
    let v = [variant("judge", &recs, VariantKind::Argmax)];
    let e = vet(&v, &[label("q1", "tone", "r", "3")], &rb, &quick()).expect_err("unknown criterion");
    assert!(e.to_string().contains("`tone` is not in the rubric"), "{e}");
    let e = vet(&v, &[label("q1", "c", "r", "7")], &rb, &quick()).expect_err("off scale");
    assert!(e.to_string().contains("score `7` is not on the scale"), "{e}");
    let e = vet(&v, &[label("q9", "c", "r", "3"), label("q8", "c", "r", "3")], &rb, &quick()).expect_err("no overlap");
    assert!(matches!(e, VetError::NoOverlap { judged: 1, labelled: 2, .. }), "{e}");
    assert!(e.to_string().contains("criterion `c`"));
    let base = [variant("rouge", &recs, VariantKind::Baseline)];
    assert!(matches!(vet(&base, &[label("q1", "c", "r", "3")], &rb, &quick()), Err(VetError::PrimaryIsBaseline { .. })));
    assert!(fix_for(&e).is_some());
}

fn pair(q: &str, first: &str, second: &str, w: Winner) -> PairRecord {
    let (p_first, p_second, p_tie) = match w {
        Winner::A => (0.8, 0.1, 0.1),
        Winner::B => (0.1, 0.8, 0.1),
        Winner::Tie => (0.1, 0.1, 0.8),
    };
    PairRecord { question_id: q.into(), criterion: "overall".into(), first: first.into(), second: second.into(), p_first, p_second, p_tie, captured_mass: 1.0 }
}

fn pref(q: &str, rater: &str, preferred: Option<&str>) -> PreferenceRow {
    PreferenceRow { question_id: q.into(), system_a: "x".into(), system_b: "y".into(), rater: rater.into(), preferred: preferred.map(str::to_string), line: 0 }
}

use crate::stats::pairwise::Winner;

/// METHODS.md section 8 worked example: orig [A,A,B,A,tie,A,B,A], swapped
/// [A,B,B,B,tie,A,A,B] (identity winners) give conservative [A,tie,B,tie,tie,A,tie,tie]
/// and consistency 4/8. Human majorities (invented) [A,A,B,B,tie,A,B,B]; by hand the
/// single-order rule matches 6/8 and the conservative rule 4/8. The peaked
/// probabilities average to a tie whenever the orders disagree, so debiased = conservative.
#[test]
fn pairwise_rules_match_the_position_bias_example() {
    use Winner::{Tie, A, B};
    let orig = [A, A, B, A, Tie, A, B, A];
    let swapped = [A, B, B, B, Tie, A, A, B];
    let human = [Some("x"), Some("x"), Some("y"), Some("y"), None, Some("x"), Some("y"), Some("y")];
    let mut recs = Vec::new();
    let mut prefs = Vec::new();
    for i in 0..8 {
        let q = format!("q{i}");
        recs.push(pair(&q, "x", "y", orig[i]));
        // swapped order shows y first: an identity win for x is a second-slot win
        let slot = match swapped[i] { A => B, B => A, Tie => Tie };
        recs.push(pair(&q, "y", "x", slot));
        // two raters agree, a third says tie: the majority is the agreed choice
        prefs.push(pref(&q, "r1", human[i]));
        prefs.push(pref(&q, "r2", human[i]));
        prefs.push(pref(&q, "r3", None));
    }
    let r = vet_pairs(&recs, &prefs, &quick()).expect("pairs");
    let c = &r.criteria[0];
    assert_eq!(c.n_pairs, 8);
    assert_eq!(c.human_ties, 1);
    close(c.position_bias.positional_consistency, 0.5, 1e-12);
    assert_eq!(c.position_bias.conservative, vec![A, Tie, B, Tie, Tie, A, Tie, Tie]);
    let acc: Vec<f64> = c.methods.iter().map(|m| m.accuracy).collect();
    close(acc[0], 6.0 / 8.0, 1e-12);
    close(acc[1], 4.0 / 8.0, 1e-12);
    close(acc[2], 4.0 / 8.0, 1e-12);
    assert!(c.methods.iter().all(|m| m.accuracy_ci.is_some()));
    assert!(report_text(&dummy_report(), Some(&r)).contains("single order"));
}

/// Majority rule (module doc of `pairwise`): a unique plurality wins, otherwise tie.
/// One vote each, or two ties and one win, give a tie; two wins and one tie give the win.
#[test]
fn human_majority_needs_a_unique_plurality() {
    let recs = vec![
        pair("q1", "x", "y", Winner::A), pair("q1", "y", "x", Winner::B),
        pair("q2", "x", "y", Winner::A), pair("q2", "y", "x", Winner::B),
        pair("q3", "x", "y", Winner::A), pair("q3", "y", "x", Winner::B),
    ];
    let prefs = vec![
        pref("q1", "r1", Some("x")), pref("q1", "r2", Some("y")), pref("q1", "r3", None),
        pref("q2", "r1", None), pref("q2", "r2", None), pref("q2", "r3", Some("x")),
        pref("q3", "r1", Some("x")), pref("q3", "r2", Some("x")), pref("q3", "r3", None),
    ];
    let r = vet_pairs(&recs, &prefs, &quick()).expect("pairs");
    let m = &r.criteria[0].methods[0];
    assert_eq!(r.criteria[0].human_ties, 2);
    // judge says x every time: right only on q3
    close(m.accuracy, 1.0 / 3.0, 1e-12);
    assert_eq!(m.confusion, vec![vec![1, 0, 0], vec![0, 0, 0], vec![2, 0, 0]]);
}

fn dummy_report() -> VetReport {
    let (rows, cons) = three_raters(20, "c");
    let recs: Vec<GradeRecord> = cons
        .iter()
        .enumerate()
        .map(|(i, &h)| record(&format!("q{i:03}"), "c", Scale::OneToFive, &peaked(5, h, 0.7)))
        .collect();
    let rb = rubric(&[("c", Scale::OneToFive)]);
    vet(&[variant("judge", &recs, VariantKind::Argmax)], &rows, &rb, &quick()).expect("vet")
}

