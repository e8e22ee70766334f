//! Vetting on the real demo labels (`demo-data/labels.csv`, `preferences.csv`) with
//! synthetic judges derived from them: rater-a's scores turned into peaked
//! distributions, rater-c's scores rescaled as a baseline, and pair verdicts that
//! follow rater-a with a first-slot lean. Checks completeness and seed stability.

use std::path::PathBuf;

use super::tests::{peaked, record};
use super::*;
use crate::data::{read_labels, read_preferences};
use crate::judge::PairRecord;
use crate::rubric::load_rubric;

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn judges(labels: &[LabelRow], rubric: &Rubric) -> (Vec<GradeRecord>, Vec<GradeRecord>) {
    let mut judge = Vec::new();
    let mut base = Vec::new();
    for l in labels {
        let c = rubric
            .criterion(&l.criterion)
            .expect("demo criteria are in the rubric");
        let pos = c
            .scale
            .index_of(&l.score)
            .expect("demo scores are on the scale");
        let mut r = record(
            &l.question_id,
            &l.criterion,
            c.scale,
            &peaked(c.scale.labels().len(), pos, 0.7),
        );
        r.system = l.system.clone();
        if l.rater == "rater-a" {
            judge.push(r);
        } else if l.rater == "rater-c" {
            base.push(GradeRecord {
                expected: c.scale.values()[pos] / 5.0,
                ..r
            });
        }
    }
    (judge, base)
}

fn run(seed: u64) -> (VetReport, PairVetReport, usize) {
    let labels = read_labels(&root().join("demo-data/labels.csv")).expect("demo labels");
    let rubric =
        load_rubric(&root().join("judge-templates/rubrics/support.toml")).expect("support rubric");
    let (judge, base) = judges(&labels, &rubric);
    let opts = VetOptions {
        resamples: 500,
        seed,
        ..VetOptions::default()
    };
    let vs = [
        Variant {
            name: "expected score".into(),
            records: &judge,
            kind: VariantKind::ExpectedScore,
        },
        Variant {
            name: "argmax".into(),
            records: &judge,
            kind: VariantKind::Argmax,
        },
        Variant {
            name: "rater-c rescaled".into(),
            records: &base,
            kind: VariantKind::Baseline,
        },
    ];
    let report = vet(&vs, &labels, &rubric, &opts).expect("vet the demo labels");
    let prefs =
        read_preferences(&root().join("demo-data/preferences.csv")).expect("demo preferences");
    let mut pairs = Vec::new();
    for (i, p) in prefs.iter().filter(|p| p.rater == "rater-a").enumerate() {
        let verdict = |first: &str| -> (f64, f64, f64) {
            match p.preferred.as_deref() {
                None => (0.2, 0.2, 0.6),
                Some(w) if w == first => (0.7, 0.2, 0.1),
                Some(_) => (0.2, 0.7, 0.1),
            }
        };
        for (first, second) in [(&p.system_a, &p.system_b), (&p.system_b, &p.system_a)] {
            // every fifth pair the judge simply prefers whichever answer it saw first
            let (p_first, p_second, p_tie) = if i % 5 == 0 {
                (0.6, 0.3, 0.1)
            } else {
                verdict(first)
            };
            pairs.push(PairRecord {
                question_id: p.question_id.clone(),
                criterion: "overall".into(),
                first: first.clone(),
                second: second.clone(),
                p_first,
                p_second,
                p_tie,
                captured_mass: 1.0,
            });
        }
    }
    let pair_report = vet_pairs(&pairs, &prefs, &opts).expect("vet the demo preferences");
    let judged = judge.len();
    (report, pair_report, judged)
}

/// Demo data (README: 3 raters, 4 labelled criteria, rater-b left 11 blanks). A judge that
/// copies rater-a has quadratic kappa 1 against rater-a by definition (Cohen 1960); every
/// section is filled; the same seed gives byte-identical JSON and another seed moves only
/// the intervals, not the point estimates.
#[test]
fn demo_labels_give_a_complete_report_that_is_stable_for_a_seed() {
    let (r, p, judged) = run(11);
    let keys: Vec<&str> = r.criteria.iter().map(|c| c.criterion.as_str()).collect();
    assert_eq!(
        keys,
        ["correctness", "faithfulness", "helpfulness", "clarity"]
    );
    assert!(r.skipped.is_empty(), "{:?}", r.skipped);
    let mut graded = 0;
    for c in &r.criteria {
        assert_eq!(c.raters, ["rater-a", "rater-b", "rater-c"]);
        assert_eq!(c.variants.len(), 3);
        graded += c.variants[1].n_items;
        let k = c.variants[1]
            .categorical
            .as_ref()
            .expect("argmax is a judge variant");
        let ra = k
            .per_rater
            .iter()
            .find(|x| x.rater == "rater-a")
            .expect("rater-a listed");
        assert!((ra.kappa_quadratic.expect("defined") - 1.0).abs() < 1e-12);
        assert!(k.kappa_quadratic_ci.percentile.is_some() && k.kappa_quadratic_ci.bca.is_some());
        assert!(
            c.variants[2].categorical.is_none() && c.variants[2].correlation.spearman.is_some()
        );
        assert_eq!(c.ceiling.per_rater.len(), 3);
        assert!(c.ceiling.mean_kappa_quadratic.is_some() && c.ceiling.alpha_ordinal.is_some());
        assert!(c.trust.difference.percentile.is_some() && c.trust.advice.is_some());
        assert_eq!(c.calibration.len(), 2);
        assert!(c.calibration.iter().all(|k| k.temperature.is_some()));
    }
    assert_eq!(
        graded, judged,
        "every rater-a label is a labelled item the judge graded"
    );
    // Every question of the demo has all three system pairs judged by the raters.
    let questions = prefs_questions();
    assert_eq!(p.human_pairs, 3 * questions);
    assert_eq!(p.criteria[0].n_pairs, 3 * questions);
    // raw readings, calibrated and calibrated with a tie band; no grades, no panel
    assert_eq!(p.criteria[0].methods.len(), 5);
    assert!(p.criteria[0].chosen.is_some());

    let text = report_text(&r, Some(&p));
    for key in keys {
        assert!(text.contains(&format!("trust card for `{key}`")), "{text}");
    }
    let json = |r: &VetReport, p: &PairVetReport| {
        (
            serde_json::to_string(r).expect("report serialises"),
            serde_json::to_string(p).expect("pairs serialise"),
        )
    };
    let (again, p_again, _) = run(11);
    assert_eq!(json(&r, &p), json(&again, &p_again));
    let (other, _, _) = run(12);
    let (a, b) = (&r.criteria[0].variants[0], &other.criteria[0].variants[0]);
    assert_eq!(
        a.categorical.as_ref().map(|c| c.kappa_quadratic),
        b.categorical.as_ref().map(|c| c.kappa_quadratic)
    );
    assert_ne!(json(&r, &p).0, json(&other, &p).0);
}

/// Distinct questions in the demo preferences file.
fn prefs_questions() -> usize {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/preferences.csv");
    let prefs = crate::data::read_preferences(&path).expect("demo preferences");
    prefs
        .iter()
        .map(|p| p.question_id.clone())
        .collect::<std::collections::HashSet<_>>()
        .len()
}
