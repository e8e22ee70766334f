//! Calibration stage, cross-fitting: every labelled item gets a prediction from a
//! model fitted without it. Input: feature rows, consensus positions, a group per item
//! (the question id, so answers to one question never sit on both sides of a split)
//! and a fold per item. Output: one model per fold, the out-of-fold prediction of
//! every labelled item, and for new items the average of the fold models (Zrnic &
//! Candes 2024, cross-prediction-powered inference). Never scores a model on an item
//! it was fitted on.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::model::{choose_and_fit, Calibrator, Method, Prediction, Target};
use crate::stats::StatsError;

/// Assigns each item a fold in `0..folds`: distinct groups are shuffled (seeded) and
/// dealt round robin, so all items of a group share a fold.
pub fn group_folds(groups: &[String], folds: usize, seed: u64) -> Result<Vec<usize>, StatsError> {
    let mut distinct: Vec<&String> = groups.iter().collect();
    distinct.sort();
    distinct.dedup();
    if folds < 2 || distinct.len() < folds {
        return Err(StatsError::TooFew {
            needed: folds.max(2),
            got: distinct.len(),
        });
    }
    distinct.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    Ok(groups
        .iter()
        .map(|g| distinct.iter().position(|d| *d == g).expect("g is listed") % folds)
        .collect())
}

/// Models fitted fold by fold and their out-of-fold predictions.
#[derive(Debug, Clone)]
pub struct CrossFit {
    /// Fold of each labelled item.
    pub folds: Vec<usize>,
    /// Model of fold f, fitted on every item not in fold f.
    pub models: Vec<Calibrator>,
    /// Prediction for each labelled item from the model that did not see it.
    pub out_of_fold: Vec<Prediction>,
}

impl CrossFit {
    /// Prediction for an unlabelled item: the fold models' distributions averaged.
    pub fn predict_new(&self, row: &[f64]) -> Prediction {
        let preds: Vec<Prediction> = self.models.iter().map(|m| m.predict(row)).collect();
        let k = preds.len() as f64;
        let width = preds[0].probabilities.len();
        Prediction {
            probabilities: (0..width)
                .map(|j| preds.iter().map(|p| p.probabilities[j]).sum::<f64>() / k)
                .collect(),
            expected: preds.iter().map(|p| p.expected).sum::<f64>() / k,
        }
    }

    /// How often each method was chosen across the folds, e.g. `ordinal, ridge 3 (4 of 5)`.
    pub fn methods(&self) -> String {
        let mut counts: Vec<(String, usize)> = Vec::new();
        for m in &self.models {
            let d = m.method.describe();
            match counts.iter_mut().find(|c| c.0 == d) {
                Some(c) => c.1 += 1,
                None => counts.push((d, 1)),
            }
        }
        let k = self.models.len();
        counts
            .iter()
            .map(|(d, n)| format!("{d} ({n} of {k})"))
            .collect::<Vec<_>>()
            .join(", ")
    }
}

/// Fits one model per fold on the other folds (choosing among `candidates` inside the
/// training folds only) and predicts the held-out fold.
pub fn cross_fit(
    candidates: &[Method],
    rows: &[&[f64]],
    y: &[usize],
    groups: &[String],
    folds: &[usize],
    target: &Target,
    seed: u64,
) -> Result<CrossFit, StatsError> {
    let k = folds.iter().max().map_or(0, |f| f + 1);
    let mut models = Vec::new();
    let mut out: Vec<Option<Prediction>> = vec![None; rows.len()];
    for f in 0..k {
        let train: Vec<usize> = (0..rows.len()).filter(|&i| folds[i] != f).collect();
        let pick = |v: &[usize]| -> Vec<usize> { train.iter().map(|&i| v[i]).collect() };
        let tr_rows: Vec<&[f64]> = train.iter().map(|&i| rows[i]).collect();
        let tr_groups: Vec<String> = train.iter().map(|&i| groups[i].clone()).collect();
        let model = choose_and_fit(
            candidates,
            &tr_rows,
            &pick(y),
            &tr_groups,
            target,
            seed.wrapping_add(f as u64),
        )?;
        for i in (0..rows.len()).filter(|&i| folds[i] == f) {
            out[i] = Some(model.predict(rows[i]));
        }
        models.push(model);
    }
    Ok(CrossFit {
        folds: folds.to_vec(),
        models,
        out_of_fold: out
            .into_iter()
            .map(|p| p.expect("every item is in some fold"))
            .collect(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::agreement::{cohen_kappa, Weighting};
    use crate::stats::ppi::cross_ppi_mean;
    use crate::vet::nearest_position;
    use rand::Rng;

    fn values() -> Target {
        Target {
            values: vec![1.0, 2.0, 3.0, 4.0, 5.0],
        }
    }

    /// Synthetic data: 40 questions x 3 answers, 12 noise features; `signal` adds the
    /// consensus (plus noise) to feature 0.
    fn data(signal: bool, seed: u64) -> (Vec<Vec<f64>>, Vec<usize>, Vec<String>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let (mut rows, mut y, mut groups) = (Vec::new(), Vec::new(), Vec::new());
        for q in 0..40 {
            for _ in 0..3 {
                let label: usize = rng.random_range(0..5);
                let mut row: Vec<f64> = (0..12).map(|_| rng.random::<f64>() * 2.0 - 1.0).collect();
                if signal {
                    row[0] = label as f64 + rng.random::<f64>() * 1.5;
                }
                rows.push(row);
                y.push(label);
                groups.push(format!("q{q}"));
            }
        }
        (rows, y, groups)
    }

    fn kappa(preds: &[Prediction], y: &[usize]) -> f64 {
        let t = values();
        let cats: Vec<usize> = preds
            .iter()
            .map(|p| nearest_position(&t.values, p.expected))
            .collect();
        cohen_kappa(&cats, y, 5, Weighting::Quadratic)
            .unwrap()
            .kappa
    }

    /// Nothing is scored on the items it was fitted on: a calibration fitted on pure
    /// noise must show agreement near zero out of sample, while the same model scored
    /// in sample looks better than it is.
    #[test]
    fn calibration_fitted_on_noise_shows_no_agreement_out_of_sample() {
        let (rows, y, groups) = data(false, 11);
        let refs: Vec<&[f64]> = rows.iter().map(|r| r.as_slice()).collect();
        let folds = group_folds(&groups, 5, 3).unwrap();
        let cands = [Method::Ordinal { l2: 0.3 }];
        let cf = cross_fit(&cands, &refs, &y, &groups, &folds, &values(), 3).unwrap();
        let oos = kappa(&cf.out_of_fold, &y);
        assert!(oos.abs() < 0.2, "out-of-sample kappa on noise {oos}");
        let all = Calibrator::fit(cands[0], &refs, &y, &values()).unwrap();
        let in_sample: Vec<Prediction> = refs.iter().map(|r| all.predict(r)).collect();
        assert!(
            kappa(&in_sample, &y) > oos + 0.1,
            "in-sample fit should flatter itself"
        );
    }

    #[test]
    fn calibration_with_signal_agrees_out_of_sample_and_method_is_chosen_inside_folds() {
        let (rows, y, groups) = data(true, 12);
        let refs: Vec<&[f64]> = rows.iter().map(|r| r.as_slice()).collect();
        let folds = group_folds(&groups, 5, 3).unwrap();
        let cf = cross_fit(
            &Method::candidates(Some(0)),
            &refs,
            &y,
            &groups,
            &folds,
            &values(),
            3,
        )
        .unwrap();
        assert!(kappa(&cf.out_of_fold, &y) > 0.6);
        assert_eq!(cf.models.len(), 5);
        assert!(!cf.methods().is_empty());
    }

    #[test]
    fn items_of_one_question_share_a_fold() {
        let groups: Vec<String> = ["a", "b", "a", "c", "b", "d"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        let f = group_folds(&groups, 2, 1).unwrap();
        assert_eq!(f[0], f[2]);
        assert_eq!(f[1], f[4]);
        assert!(group_folds(&groups, 5, 1).is_err());
    }

    /// Hand-checked cross-prediction-powered mean (Zrnic & Candes 2024): isotonic on one
    /// feature, two folds. Fold 0 = (x 1, y 1), (x 2, y 2); fold 1 = (x 3, y 2), (x 4, y 3).
    /// Model 1 (fitted on fold 0) maps 1->1, 2->2 and clips; model 0 (fold 1) maps 3->2,
    /// 4->3. Out-of-fold predictions 2, 2, 2, 2, residuals Y - f = -1, 0, 0, 1 (mean 0).
    /// Unlabelled x = 1.5, 3.5: models give (2, 1.5) and (2.5, 2), averages 1.75 and 2.25
    /// (mean 2). Estimate 2 + 0 = 2; SE^2 = var0(1.75, 2.25)/2 + var0(-1, 0, 0, 1)/4 =
    /// 0.03125 + 0.125 = 0.15625.
    #[test]
    fn cross_fitted_estimate_reproduces_hand_computed_case() {
        let rows = [vec![1.0], vec![2.0], vec![3.0], vec![4.0]];
        let refs: Vec<&[f64]> = rows.iter().map(|r| r.as_slice()).collect();
        let y = [0, 1, 1, 2];
        let groups: Vec<String> = ["a", "b", "c", "d"].iter().map(|s| s.to_string()).collect();
        let cf = cross_fit(
            &[Method::Isotonic { feature: 0 }],
            &refs,
            &y,
            &groups,
            &[0, 0, 1, 1],
            &values(),
            0,
        )
        .unwrap();
        let oof: Vec<f64> = cf.out_of_fold.iter().map(|p| p.expected).collect();
        assert_eq!(oof, vec![2.0, 2.0, 2.0, 2.0]);
        let new: Vec<f64> = [1.5, 3.5]
            .iter()
            .map(|x| cf.predict_new(&[*x]).expected)
            .collect();
        assert_eq!(new, vec![1.75, 2.25]);
        let labels = [1.0, 2.0, 2.0, 3.0];
        let e = cross_ppi_mean(&labels, &oof, &new, 0.05).unwrap();
        assert!((e.estimate - 2.0).abs() < 1e-12);
        assert!((e.standard_error - 0.15625f64.sqrt()).abs() < 1e-12);
    }
}
