//! Tests of the trust card, baselines and input errors of the vetting stage, on
//! invented three-rater data built in code.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::pair_tests::{pair, pref};
use super::tests::{categorical, close, label, peaked, quick, record, rubric, variant};
use super::*;
use crate::rubric::Scale;
use crate::stats::pairwise::Winner;

/// Three raters with small disagreements on `n` items of a 1-5 scale (invented); returns
/// the label rows and each item's consensus (lower median) position.
pub(super) fn three_raters(n: usize, crit: &str) -> (Vec<LabelRow>, Vec<usize>) {
    let mut rows = Vec::new();
    let mut consensus = Vec::new();
    for i in 0..n {
        let base = (i * 7 + i / 5) % 5;
        let b = if i % 4 == 0 { (base + 1).min(4) } else { base };
        let c = if i % 3 == 0 {
            base.saturating_sub(1)
        } else {
            base
        };
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
        .map(|(i, &h)| {
            record(
                &format!("q{i:03}"),
                "c",
                Scale::points(1, 5),
                &peaked(5, h, 0.9),
            )
        })
        .collect();
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let r = vet(
        &[variant("argmax", &recs, VariantKind::Argmax)],
        &rows,
        &rb,
        &VetOptions::default(),
    )
    .expect("vet");
    let c = &r.criteria[0];
    close(
        categorical(&r).kappa_quadratic.expect("defined"),
        1.0,
        1e-12,
    );
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
        .map(|i| {
            record(
                &format!("q{i:03}"),
                "c",
                Scale::points(1, 5),
                &peaked(5, rng.random_range(0..5), 0.5),
            )
        })
        .collect();
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let r = vet(
        &[variant("argmax", &recs, VariantKind::Argmax)],
        &rows,
        &rb,
        &quick(),
    )
    .expect("vet");
    let t = &r.criteria[0].trust;
    assert_ne!(t.verdict, Verdict::Yes, "{}", t.reason);
    assert_eq!(gate_failures(&r, 0.5).len(), 1);
}

/// Sample-size rule (precision form, METHODS.md section 13): 10 items cannot pin a kappa
/// to +-0.15, so a perfect judge's "yes" (here its kappa 1 beats every rater, and the
/// interval of the gap cannot reach below 0) is flagged thin and the text says so.
#[test]
fn a_yes_on_few_items_is_called_thin_in_words() {
    let (rows, cons) = three_raters(10, "c");
    let recs: Vec<GradeRecord> = cons
        .iter()
        .enumerate()
        .map(|(i, &h)| {
            record(
                &format!("q{i:03}"),
                "c",
                Scale::points(1, 5),
                &peaked(5, h, 0.9),
            )
        })
        .collect();
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let r = vet(
        &[variant("argmax", &recs, VariantKind::Argmax)],
        &rows,
        &rb,
        &quick(),
    )
    .expect("vet");
    let t = &r.criteria[0].trust;
    assert_eq!(t.verdict, Verdict::Yes, "{}", t.reason);
    assert!(t.thin_evidence);
    assert!(t.advice.as_ref().is_some_and(|a| !a.enough));
    let text = report_text(&r, None);
    assert!(text.contains("this yes rests on thin evidence"), "{text}");
    assert!(text.contains("warning: only 10 labelled items"), "{text}");
    assert!(text.contains("yes (thin evidence)"), "{text}");
}

/// Documented baseline behaviour (module doc): correlations only; no kappa, error or calibration.
#[test]
fn baseline_variant_gets_correlations_only() {
    let (rows, cons) = three_raters(30, "c");
    let judge: Vec<GradeRecord> = cons
        .iter()
        .enumerate()
        .map(|(i, &h)| {
            record(
                &format!("q{i:03}"),
                "c",
                Scale::points(1, 5),
                &peaked(5, h, 0.9),
            )
        })
        .collect();
    let base: Vec<GradeRecord> = judge
        .iter()
        .map(|r| GradeRecord {
            expected: r.expected / 10.0,
            labels: vec![],
            probabilities: vec![],
            ..r.clone()
        })
        .collect();
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let vs = [
        variant("judge", &judge, VariantKind::Argmax),
        variant("overlap", &base, VariantKind::Baseline),
    ];
    let r = vet(&vs, &rows, &rb, &quick()).expect("vet");
    let b = &r.criteria[0].variants[1];
    assert!(b.categorical.is_none() && b.error.is_none());
    // a rescaled copy of a peaked judge ranks items exactly as the judge does
    close(
        b.correlation.spearman.expect("defined"),
        r.criteria[0].variants[0]
            .correlation
            .spearman
            .expect("defined"),
        1e-12,
    );
    assert_eq!(r.criteria[0].calibration.len(), 1);
    assert!(report_text(&r, None).contains("(baseline)"));
}

/// Input checks (module doc "never guesses"): unknown criteria, off-scale labels,
/// a baseline listed first and labels the judge never graded are errors naming the problem.
#[test]
fn bad_inputs_are_errors_that_name_the_problem() {
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let recs = vec![record("q1", "c", Scale::points(1, 5), &peaked(5, 2, 0.8))];
    let v = [variant("judge", &recs, VariantKind::Argmax)];
    let e =
        vet(&v, &[label("q1", "tone", "r", "3")], &rb, &quick()).expect_err("unknown criterion");
    assert!(e.to_string().contains("`tone` is not in the rubric"), "{e}");
    let e = vet(&v, &[label("q1", "c", "r", "7")], &rb, &quick()).expect_err("off scale");
    assert!(
        e.to_string().contains("score `7` is not on the scale"),
        "{e}"
    );
    let e = vet(
        &v,
        &[label("q9", "c", "r", "3"), label("q8", "c", "r", "3")],
        &rb,
        &quick(),
    )
    .expect_err("no overlap");
    assert!(
        matches!(
            e,
            VetError::NoOverlap {
                judged: 1,
                labelled: 2,
                ..
            }
        ),
        "{e}"
    );
    assert!(e.to_string().contains("criterion `c`"));
    let base = [variant("rouge", &recs, VariantKind::Baseline)];
    assert!(matches!(
        vet(&base, &[label("q1", "c", "r", "3")], &rb, &quick()),
        Err(VetError::PrimaryIsBaseline { .. })
    ));
    assert!(fix_for(&e).is_some());
    let other = vec![record("q1", "d", Scale::points(1, 5), &peaked(5, 2, 0.8))];
    let rb2 = rubric(&[("c", Scale::points(1, 5)), ("d", Scale::points(1, 5))]);
    let e = vet(
        &[variant("judge", &other, VariantKind::Argmax)],
        &[label("q1", "c", "r", "3")],
        &rb2,
        &quick(),
    )
    .expect_err("nothing to vet");
    assert!(matches!(e, VetError::NothingToVet { .. }), "{e}");
    let recs = vec![
        pair("q1", "x", "y", Winner::A),
        pair("q1", "y", "x", Winner::B),
    ];
    let e = vet_pairs(&recs, &[pref("q2", "r1", None)], &quick()).expect_err("no pair overlap");
    assert!(
        matches!(
            e,
            VetError::NoPairOverlap {
                judged: 1,
                preferred: 1
            }
        ),
        "{e}"
    );
    let dup = [pref("q1", "r1", None), pref("q1", "r1", Some("x"))];
    assert!(matches!(
        vet_pairs(&recs, &dup, &quick()),
        Err(VetError::BadPreferences { .. })
    ));
}
