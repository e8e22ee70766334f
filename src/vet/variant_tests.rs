//! Tests of the out-of-sample variant comparison on invented data built in code.

use std::collections::BTreeMap;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::tests::{label, record, rubric};
use super::variants::{choose_variant, cross_fitted_records, Candidate, CandidateSource};
use super::*;
use crate::calibrate::FeatureTable;
use crate::rubric::Scale;

/// 30 questions on a 1..5 scale: a judge that mostly agrees with the one rater, and a
/// feature table of pure noise.
fn setup() -> (Vec<LabelRow>, Vec<GradeRecord>, FeatureTable) {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let (mut labels, mut good) = (Vec::new(), Vec::new());
    let mut rows = BTreeMap::new();
    for q in 0..30 {
        let qid = format!("q{q:02}");
        let y: usize = rng.random_range(0..5);
        labels.push(label(&qid, "c", "r1", &(y + 1).to_string()));
        let mut probs = vec![0.05; 5];
        let seen = if rng.random::<f64>() < 0.8 {
            y
        } else {
            rng.random_range(0..5)
        };
        probs[seen] = 0.8;
        good.push(record(&qid, "c", Scale::points(1, 5), &probs));
        let noise: Vec<f64> = (0..6).map(|_| rng.random::<f64>()).collect();
        rows.insert((qid, "sys".to_string()), noise);
    }
    let table = FeatureTable {
        names: (0..6).map(|i| format!("noise/{i}")).collect(),
        rows,
        incomplete: vec![],
    };
    (labels, good, table)
}

fn opts() -> VetOptions {
    VetOptions {
        resamples: 200,
        ..VetOptions::default()
    }
}

#[test]
fn real_signal_is_chosen_over_calibrated_noise_and_noise_scores_near_zero() {
    let (labels, good, table) = setup();
    let r = rubric(&[("c", Scale::points(1, 5))]);
    let cands = [
        Candidate {
            name: "judge".into(),
            source: CandidateSource::Fixed(&good, VariantKind::ExpectedScore),
        },
        Candidate {
            name: "calibrated noise".into(),
            source: CandidateSource::Calibrated {
                table: &table,
                isotonic_source: None,
            },
        },
    ];
    let choice = choose_variant(&cands, &labels, &r, &opts()).unwrap();
    let c = &choice.criteria[0];
    assert_eq!(c.items, 30);
    assert_eq!(c.best.as_deref(), Some("judge"));
    let noise = &c.variants[1];
    assert!(noise.calibrated && noise.methods.is_some());
    assert!(
        noise.kappa_quadratic.unwrap_or(0.0).abs() < 0.3,
        "{noise:?}"
    );
    assert!(c.variants[0].kappa_quadratic.unwrap() > 0.5);
    assert_eq!(c.chosen_per_fold.len(), 5);
    assert!(c.nested_kappa_quadratic.unwrap() > 0.4);
}

#[test]
fn cross_fitted_records_cover_the_labelled_items_once() {
    let (labels, _, table) = setup();
    let r = rubric(&[("c", Scale::points(1, 5))]);
    let (recs, notes) = cross_fitted_records(&table, None, &labels, &r, &opts()).unwrap();
    assert_eq!(recs.len(), 30);
    assert_eq!(notes.len(), 1);
    assert!(recs
        .iter()
        .all(|g| (g.probabilities.iter().sum::<f64>() - 1.0).abs() < 1e-9));
}
