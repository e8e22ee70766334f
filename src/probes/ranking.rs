//! Rankings of systems from pairwise verdicts under a named rule (each outcome's
//! `verdict`): Bradley-Terry maximum
//! likelihood (Hunter 2004, MM algorithm; ties as half wins) presented as each
//! system's modelled chance of beating a system of average strength, with seeded
//! bootstrap intervals over questions, and the head-to-head verdict counts. Input:
//! `PairOutcome`s. Output: `Ranking`. Never hides a disconnected comparison graph:
//! it says which systems cannot be placed. When a system won (or lost) every
//! comparison the plain estimate is infinite; then one virtual tie per compared pair
//! is added as a weak prior, and the ranking says so.

use std::collections::BTreeSet;

use serde::Serialize;

use super::PairOutcome;
use crate::stats::bootstrap::{bootstrap_replicates, percentile_interval};
use crate::stats::pairwise::Winner;
use crate::stats::ranking::bradley_terry;
use crate::stats::StatsError;

/// One system's place.
#[derive(Debug, Clone, Serialize)]
pub struct RankingRow {
    /// System name.
    pub system: String,
    /// Wins against any other system under the ranking's rule.
    pub wins: usize,
    /// Ties under the ranking's rule.
    pub ties: usize,
    /// Losses under the ranking's rule.
    pub losses: usize,
    /// Bradley-Terry strength (all strengths sum to 1).
    pub strength: f64,
    /// Modelled chance of beating a system of average strength (mean log-strength);
    /// 0.5 is exactly average.
    pub beats_average: f64,
    /// Lower end of the 95% bootstrap percentile interval of `beats_average`.
    pub beats_average_low: f64,
    /// Upper end of that interval.
    pub beats_average_high: f64,
}

impl RankingRow {
    /// Verdicts (under the ranking's rule) this system took part in.
    pub fn comparisons(&self) -> usize {
        self.wins + self.ties + self.losses
    }

    /// Share of its comparisons won, a tie counting half.
    pub fn won_share(&self) -> f64 {
        (self.wins as f64 + 0.5 * self.ties as f64) / self.comparisons().max(1) as f64
    }
}

/// The ranking of all systems.
#[derive(Debug, Clone, Serialize)]
pub struct Ranking {
    /// The verdict rule behind the wins, ties and losses.
    pub rule: String,
    /// Systems, strongest first.
    pub rows: Vec<RankingRow>,
    /// `matrix[i][j]` = [wins, ties, losses] of system i against j (order of `systems`).
    pub matrix: Vec<Vec<[usize; 3]>>,
    /// System names in matrix order.
    pub systems: Vec<String>,
    /// Bootstrap resamples, and how many had no finite estimate.
    pub resamples: usize,
    /// Resamples skipped because the resampled graph had no finite estimate.
    pub skipped: usize,
    /// Set when the plain maximum-likelihood estimate does not exist (a system won or
    /// lost every comparison) and one virtual tie was added to every pair of systems
    /// that met, as a weak prior that keeps the estimate finite; says why.
    pub prior: Option<String>,
}

/// One virtual tie (half a win each way) between every pair of systems that met.
#[allow(clippy::needless_range_loop)] // updates w[i][j] and w[j][i] together
fn with_virtual_ties(mut w: Vec<Vec<f64>>) -> Vec<Vec<f64>> {
    let n = w.len();
    for i in 0..n {
        for j in i + 1..n {
            if w[i][j] + w[j][i] > 0.0 {
                w[i][j] += 0.5;
                w[j][i] += 0.5;
            }
        }
    }
    w
}

fn wins_matrix(outcomes: &[&PairOutcome], systems: &[String]) -> Vec<Vec<f64>> {
    let idx = |s: &str| systems.iter().position(|x| x == s).expect("system listed");
    let mut w = vec![vec![0.0; systems.len()]; systems.len()];
    for o in outcomes {
        let (a, b) = (idx(&o.a), idx(&o.b));
        match o.verdict {
            Winner::A => w[a][b] += 1.0,
            Winner::B => w[b][a] += 1.0,
            Winner::Tie => {
                w[a][b] += 0.5;
                w[b][a] += 0.5;
            }
        }
    }
    w
}

/// Rank systems; `Err` names the systems when no finite estimate exists.
pub fn rank(
    outcomes: &[PairOutcome],
    rule: &str,
    resamples: usize,
    seed: u64,
) -> Result<Ranking, StatsError> {
    let systems: Vec<String> = outcomes
        .iter()
        .flat_map(|o| [o.a.clone(), o.b.clone()])
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    let all: Vec<&PairOutcome> = outcomes.iter().collect();
    let (bt, prior) = match bradley_terry(&wins_matrix(&all, &systems), 1e-10, 10_000) {
        Ok(bt) => (bt, None),
        Err(_) => {
            // A disconnected graph stays an error: virtual ties only join systems that met.
            let bt = bradley_terry(
                &with_virtual_ties(wins_matrix(&all, &systems)),
                1e-10,
                10_000,
            )?;
            let note = "a system won or lost every comparison, so the plain Bradley-Terry estimate is infinite; one virtual tie per compared pair of systems keeps it finite and pulls the systems' chances slightly toward even";
            (bt, Some(note.to_string()))
        }
    };
    let smooth = prior.is_some();
    let n = systems.len();
    let mut matrix = vec![vec![[0usize; 3]; n]; n];
    for o in outcomes {
        let a = systems.iter().position(|x| *x == o.a).expect("listed");
        let b = systems.iter().position(|x| *x == o.b).expect("listed");
        let (ra, rb) = match o.verdict {
            Winner::A => (0, 2),
            Winner::B => (2, 0),
            Winner::Tie => (1, 1),
        };
        matrix[a][b][ra] += 1;
        matrix[b][a][rb] += 1;
    }
    // Resample questions, keeping all pairs of a question together.
    let questions: Vec<String> = outcomes
        .iter()
        .map(|o| o.question_id.clone())
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    let questions = &questions;
    let mut rows = Vec::new();
    let mut skipped = 0;
    for (i, system) in systems.iter().enumerate() {
        let reps = bootstrap_replicates(questions.len(), resamples, seed, |idx| {
            let chosen: Vec<&PairOutcome> = idx
                .iter()
                .flat_map(|&q| {
                    outcomes
                        .iter()
                        .filter(move |o| o.question_id == questions[q])
                })
                .collect();
            let w = wins_matrix(&chosen, &systems);
            let w = if smooth { with_virtual_ties(w) } else { w };
            bradley_terry(&w, 1e-8, 10_000)
                .ok()
                .map(|b| b.beats_average()[i])
        })?;
        skipped = skipped.max(reps.skipped);
        let (lo, hi) = if reps.values.len() >= 2 {
            let ci = percentile_interval(&reps, bt.beats_average()[i], 0.95)?;
            (ci.lower, ci.upper)
        } else {
            (f64::NAN, f64::NAN)
        };
        let sum = |k: usize| matrix[i].iter().map(|c| c[k]).sum::<usize>();
        rows.push(RankingRow {
            system: system.clone(),
            wins: sum(0),
            ties: sum(1),
            losses: sum(2),
            strength: bt.pi[i],
            beats_average: bt.beats_average()[i],
            beats_average_low: lo,
            beats_average_high: hi,
        });
    }
    rows.sort_by(|x, y| y.strength.total_cmp(&x.strength));
    Ok(Ranking {
        rule: rule.to_string(),
        rows,
        matrix,
        systems,
        resamples,
        skipped,
        prior,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::pairwise::{IdentityProbs, SlotProbs};

    fn outcome(q: &str, a: &str, b: &str, w: Winner) -> PairOutcome {
        let p = SlotProbs {
            first: 0.4,
            second: 0.4,
            tie: 0.2,
        };
        PairOutcome {
            question_id: q.into(),
            criterion: "overall".into(),
            a: a.into(),
            b: b.into(),
            original: p,
            swapped: p,
            original_winner: w,
            swapped_winner: w,
            debiased: IdentityProbs {
                a: 0.4,
                b: 0.4,
                tie: 0.2,
            },
            debiased_winner: w,
            conservative_winner: w,
            verdict: w,
        }
    }

    /// A system that wins every comparison has no finite Bradley-Terry estimate
    /// (Hunter 2004, Assumption 1); the virtual-tie prior keeps it first and says so.
    #[test]
    fn undefeated_system_ranks_first_under_the_stated_prior() {
        let o = vec![
            outcome("q1", "best", "mid", Winner::A),
            outcome("q2", "best", "low", Winner::A),
            outcome("q3", "mid", "low", Winner::A),
            outcome("q4", "mid", "low", Winner::B),
        ];
        let r = rank(&o, "debiased", 50, 1).expect("ranking");
        assert!(r.prior.is_some());
        assert_eq!(r.rows[0].system, "best");
        assert_eq!(r.rows[0].wins, 2);
        assert!(r.rows[0].beats_average > r.rows[1].beats_average);
        assert!(r.rows[0].beats_average > 0.5 && r.rows[2].beats_average < 0.5);
    }

    /// Systems that never met cannot be placed: an error, not a guess.
    #[test]
    fn disconnected_systems_are_an_error() {
        let o = vec![
            outcome("q1", "a", "b", Winner::A),
            outcome("q2", "a", "b", Winner::B),
            outcome("q3", "c", "d", Winner::A),
            outcome("q4", "c", "d", Winner::B),
        ];
        assert!(rank(&o, "debiased", 10, 1).is_err());
    }
}
