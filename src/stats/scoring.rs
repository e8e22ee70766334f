//! Statistics stage: probability-weighted judge scores. Input: the log-probabilities
//! the judge gave each valid score label at the score slot (multi-token labels
//! already summed into one log-probability by the caller). Output: the renormalised
//! distribution, captured mass, expected score, argmax label and spread. Never does
//! I/O and never looks at tokens: labels arrive as plain numbers.

use serde::Serialize;

use crate::stats::StatsError;

/// A judge's distribution over the valid score labels of one form.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ScoreDistribution {
    /// The numeric score labels, in the order they were given.
    pub labels: Vec<f64>,
    /// Probability of each label after renormalising over the valid labels (sums to 1).
    pub probabilities: Vec<f64>,
    /// Probability mass the judge put on valid labels before renormalising, Σ exp(ℓ);
    /// a low value means the judge did not follow the form.
    pub captured_mass: f64,
    /// Expected score Σ p̃(s)·s (Liu et al. 2023).
    pub expected_score: f64,
    /// The most probable label; on equal probabilities the first such label.
    pub argmax_label: f64,
    /// Standard deviation of the score under the renormalised distribution.
    pub std_dev: f64,
}

/// Builds the renormalised score distribution from per-label log-probabilities.
///
/// Liu et al. (2023, form-filling evaluation with chain-of-thought): score =
/// Σ p(s)·s over the valid score labels, p renormalised over those labels only.
/// `-inf` log-probabilities are allowed (probability 0); NaN or positive values are not.
pub fn score_distribution(
    labels: &[f64],
    log_probs: &[f64],
) -> Result<ScoreDistribution, StatsError> {
    if labels.len() != log_probs.len() {
        return Err(StatsError::LengthMismatch {
            left: labels.len(),
            right: log_probs.len(),
        });
    }
    if labels.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    if let Some(bad) = labels.iter().find(|l| !l.is_finite()) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a finite score label".into(),
        });
    }
    // A log-probability may exceed 0 only by rounding noise from summing token pieces.
    const LOG_PROB_SLACK: f64 = 1e-9;
    if let Some(bad) = log_probs
        .iter()
        .find(|l| l.is_nan() || **l > LOG_PROB_SLACK)
    {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a log-probability <= 0".into(),
        });
    }
    // Log-sum-exp with the maximum pulled out, so tiny probabilities do not underflow.
    let max = log_probs.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if max == f64::NEG_INFINITY {
        return Err(StatsError::Undefined(
            "the judge put zero probability on every valid label".into(),
        ));
    }
    let weights: Vec<f64> = log_probs.iter().map(|l| (l - max).exp()).collect();
    let total: f64 = weights.iter().sum();
    let probabilities: Vec<f64> = weights.iter().map(|w| w / total).collect();
    let captured_mass = (max + total.ln()).exp();
    Ok(summarise(labels, probabilities, captured_mass))
}

/// Builds the score distribution from plain probabilities (e.g. a stored distribution).
///
/// Same as [`score_distribution`] with ℓ = ln p; probabilities must lie in [0, 1].
pub fn score_distribution_from_probs(
    labels: &[f64],
    probs: &[f64],
) -> Result<ScoreDistribution, StatsError> {
    if let Some(bad) = probs.iter().find(|p| !(0.0..=1.0 + 1e-9).contains(*p)) {
        return Err(StatsError::OutOfRange {
            value: bad.to_string(),
            allowed: "a probability in [0, 1]".into(),
        });
    }
    let log_probs: Vec<f64> = probs.iter().map(|p| p.ln()).collect();
    score_distribution(labels, &log_probs)
}

fn summarise(labels: &[f64], probabilities: Vec<f64>, captured_mass: f64) -> ScoreDistribution {
    let expected_score: f64 = labels.iter().zip(&probabilities).map(|(s, p)| s * p).sum();
    let variance: f64 = labels
        .iter()
        .zip(&probabilities)
        .map(|(s, p)| p * (s - expected_score).powi(2))
        .sum();
    // First maximum wins, so the tie-break does not depend on float sorting.
    let mut best = 0;
    for (i, p) in probabilities.iter().enumerate() {
        if *p > probabilities[best] {
            best = i;
        }
    }
    ScoreDistribution {
        labels: labels.to_vec(),
        argmax_label: labels[best],
        probabilities,
        captured_mass,
        expected_score,
        std_dev: variance.max(0.0).sqrt(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const LABELS: [f64; 5] = [1.0, 2.0, 3.0, 4.0, 5.0];

    /// METHODS section 7 example (numpy reference, [lib]): log-probs {−4, −2.5, −1.2,
    /// −0.7, −3} on labels 1..5 → mass 0.9479672215841085, weighted score
    /// 3.5036494440471637, argmax 4, p̃ ≈ {0.019321, 0.086591, 0.317726, 0.523842, 0.05252}.
    #[test]
    fn weighted_score_matches_methods_example() {
        let d = score_distribution(&LABELS, &[-4.0, -2.5, -1.2, -0.7, -3.0]).unwrap();
        assert!((d.expected_score - 3.5036494440471637).abs() < 1e-12);
        assert!((d.captured_mass - 0.9479672215841085).abs() < 1e-12);
        assert_eq!(d.argmax_label, 4.0);
        let want = [0.019321, 0.086591, 0.317726, 0.523842, 0.05252];
        for (p, w) in d.probabilities.iter().zip(want) {
            assert!((p - w).abs() < 1e-6, "{p} vs {w}");
        }
        // Standard deviation from its definition on the published p̃ (6 d.p. inputs).
        let var: f64 = LABELS
            .iter()
            .zip(want)
            .map(|(s, p)| p * (s - 3.5036494440471637_f64).powi(2))
            .sum();
        assert!((d.std_dev - var.sqrt()).abs() < 1e-5);
    }

    /// METHODS section 6 multi-class example ([lib]): expected scores Σ k·p_k =
    /// [3.08, 4.21, 1.44, 2.53]; argmax labels are the predictions [3, 5, 1, 2].
    #[test]
    fn expected_scores_match_methods_multiclass_example() {
        let rows = [
            [0.05, 0.10, 0.62, 0.18, 0.05],
            [0.0, 0.05, 0.17, 0.30, 0.48],
            [0.71, 0.19, 0.05, 0.05, 0.0],
            [0.10, 0.42, 0.38, 0.05, 0.05],
        ];
        let want = [(3.08, 3.0), (4.21, 5.0), (1.44, 1.0), (2.53, 2.0)];
        for (row, (score, pred)) in rows.iter().zip(want) {
            let d = score_distribution_from_probs(&LABELS, row).unwrap();
            assert!(
                (d.expected_score - score).abs() < 1e-12,
                "{} vs {score}",
                d.expected_score
            );
            assert_eq!(d.argmax_label, pred);
            assert!((d.captured_mass - 1.0).abs() < 1e-12);
        }
    }

    /// Tie-break rule (METHODS section 6: "first max"): equal probabilities pick the first label.
    #[test]
    fn argmax_picks_first_of_equal_labels() {
        let d = score_distribution(&LABELS, &[-1.0, -3.0, -1.0, -5.0, -5.0]).unwrap();
        assert_eq!(d.argmax_label, 1.0);
    }

    /// Renormalisation does not depend on the scale of the log-probabilities: very
    /// negative values (mass ≈ 1e-300) give the same p̃ as their shifted copies.
    #[test]
    fn tiny_mass_is_renormalised_without_underflow() {
        let shift = -700.0;
        let base = [-4.0, -2.5, -1.2, -0.7, -3.0];
        let shifted: Vec<f64> = base.iter().map(|l| l + shift).collect();
        let a = score_distribution(&LABELS, &base).unwrap();
        let b = score_distribution(&LABELS, &shifted).unwrap();
        assert!((a.expected_score - b.expected_score).abs() < 1e-12);
        assert!(b.captured_mass < 1e-300);
    }

    #[test]
    fn mismatched_or_invalid_inputs_are_errors() {
        assert!(matches!(
            score_distribution(&LABELS, &[-1.0]),
            Err(StatsError::LengthMismatch { .. })
        ));
        assert!(matches!(
            score_distribution(&[1.0], &[0.5]),
            Err(StatsError::OutOfRange { .. })
        ));
        assert!(matches!(
            score_distribution(&[1.0], &[f64::NAN]),
            Err(StatsError::OutOfRange { .. })
        ));
        assert!(matches!(
            score_distribution(&[1.0, 2.0], &[f64::NEG_INFINITY, f64::NEG_INFINITY]),
            Err(StatsError::Undefined(_))
        ));
        assert!(matches!(
            score_distribution(&[], &[]),
            Err(StatsError::TooFew { .. })
        ));
    }
}
