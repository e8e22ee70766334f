//! Length probe: does the judge prefer longer answers? For each pair of systems,
//! the association between the debiased verdict and the answer-length difference
//! (in words), and a win rate at equal length from a logistic model whose length
//! term is set to zero at prediction (Dubois, Galambosi, Liang & Hashimoto 2024).
//! Input: `PairOutcome`s and answers. Output: `LengthProbe` rows. Never changes a
//! verdict.

use std::collections::{BTreeMap, HashMap};

use serde::Serialize;

use super::PairOutcome;
use crate::data::AnswerRecord;
use crate::stats::correlation::spearman;
use crate::stats::logistic::win_rate_at_equal_length;

/// L2 penalty of the length model's slope, so a perfectly separable sample (every
/// longer answer won) still gives a finite fit; the intercept is not penalised.
pub const LENGTH_L2: f64 = 0.01;

/// Length effect for one ordered pair of systems (A vs B).
#[derive(Debug, Clone, Serialize)]
pub struct LengthProbe {
    /// System A.
    pub a: String,
    /// System B.
    pub b: String,
    /// Pairs judged.
    pub n: usize,
    /// Mean words of A's answers minus B's.
    pub mean_length_difference: f64,
    /// Share of decisive pairs won by the longer answer (`None` without decisive pairs of unequal length).
    pub longer_wins: Option<f64>,
    /// Spearman correlation of length difference and A's outcome (1 win, 0.5 tie, 0 loss).
    pub spearman: Option<f64>,
    /// A's raw debiased win rate (ties count half).
    pub raw_win_rate: f64,
    /// A's win rate predicted at equal length (`None` when the fit failed).
    pub win_rate_at_equal_length: Option<f64>,
    /// Fitted length coefficient φ (> 0: longer answers favoured).
    pub length_coefficient: Option<f64>,
    /// Why the model could not be fitted, if it could not.
    pub note: Option<String>,
}

fn words(s: &str) -> f64 {
    s.split_whitespace().count() as f64
}

/// One row per pair of systems that met on at least two questions.
pub fn length_probe(outcomes: &[PairOutcome], answers: &[AnswerRecord]) -> Vec<LengthProbe> {
    let len: HashMap<(&str, &str), f64> = answers
        .iter()
        .map(|a| {
            (
                (a.question_id.as_str(), a.system.as_str()),
                words(&a.answer),
            )
        })
        .collect();
    let mut groups: BTreeMap<(String, String), Vec<(f64, f64)>> = BTreeMap::new();
    for o in outcomes {
        let (Some(la), Some(lb)) = (
            len.get(&(o.question_id.as_str(), o.a.as_str())),
            len.get(&(o.question_id.as_str(), o.b.as_str())),
        ) else {
            continue;
        };
        // Orient every pair the same way (A = alphabetically first system).
        let (a, b, d, y) = if o.a <= o.b {
            (o.a.clone(), o.b.clone(), la - lb, o.a_score())
        } else {
            (o.b.clone(), o.a.clone(), lb - la, 1.0 - o.a_score())
        };
        groups.entry((a, b)).or_default().push((d, y));
    }
    groups
        .into_iter()
        .filter(|(_, v)| v.len() >= 2)
        .map(|((a, b), v)| {
            let d: Vec<f64> = v.iter().map(|x| x.0).collect();
            let y: Vec<f64> = v.iter().map(|x| x.1).collect();
            let decisive: Vec<&(f64, f64)> =
                v.iter().filter(|x| x.1 != 0.5 && x.0 != 0.0).collect();
            let longer_wins = (!decisive.is_empty()).then(|| {
                decisive
                    .iter()
                    .filter(|x| (x.0 > 0.0) == (x.1 == 1.0))
                    .count() as f64
                    / decisive.len() as f64
            });
            let fit = win_rate_at_equal_length(&d, &y, LENGTH_L2);
            LengthProbe {
                n: v.len(),
                mean_length_difference: d.iter().sum::<f64>() / d.len() as f64,
                longer_wins,
                spearman: spearman(&d, &y)
                    .ok()
                    .map(|c| c.coefficient)
                    .filter(|c| c.is_finite()),
                raw_win_rate: y.iter().sum::<f64>() / y.len() as f64,
                win_rate_at_equal_length: fit.as_ref().ok().map(|f| f.at_equal_length),
                length_coefficient: fit.as_ref().ok().map(|f| f.phi),
                note: fit.err().map(|e| e.to_string()),
                a,
                b,
            }
        })
        .collect()
}
