//! Statistics stage: rankings from pairwise outcomes. Input: comparisons as
//! (item, item, outcome) or a win matrix. Output: Bradley–Terry strengths, their
//! logarithms, and each item's modelled chance of beating an item of average strength.
//! Never does I/O and never returns a ranking when the comparisons admit no finite
//! estimate.

use serde::Serialize;

use crate::stats::StatsError;

/// Outcome of one comparison, from the point of view of the first item.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Outcome {
    /// The first item won.
    Win,
    /// Neither item was preferred.
    Tie,
    /// The second item won.
    Loss,
}

/// Win, tie and loss counts between every ordered pair of items.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutcomeMatrix {
    /// wins[i][j]: times item i beat item j.
    pub wins: Vec<Vec<f64>>,
    /// ties[i][j]: ties between i and j (symmetric).
    pub ties: Vec<Vec<f64>>,
}

impl OutcomeMatrix {
    /// Win matrix with each tie counted as half a win for both sides.
    pub fn wins_with_half_ties(&self) -> Vec<Vec<f64>> {
        self.wins
            .iter()
            .zip(&self.ties)
            .map(|(w, t)| w.iter().zip(t).map(|(w, t)| w + 0.5 * t).collect())
            .collect()
    }
}

/// Counts wins, ties and losses of `n_items` items from a list of comparisons.
pub fn outcome_matrix(
    n_items: usize,
    comparisons: &[(usize, usize, Outcome)],
) -> Result<OutcomeMatrix, StatsError> {
    let mut wins = vec![vec![0.0; n_items]; n_items];
    let mut ties = vec![vec![0.0; n_items]; n_items];
    for &(i, j, outcome) in comparisons {
        if i >= n_items || j >= n_items || i == j {
            return Err(StatsError::OutOfRange {
                value: format!("({i}, {j})"),
                allowed: format!("two different item indices below {n_items}"),
            });
        }
        match outcome {
            Outcome::Win => wins[i][j] += 1.0,
            Outcome::Loss => wins[j][i] += 1.0,
            Outcome::Tie => {
                ties[i][j] += 1.0;
                ties[j][i] += 1.0;
            }
        }
    }
    Ok(OutcomeMatrix { wins, ties })
}

/// A fitted Bradley–Terry model.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BradleyTerry {
    /// Strengths π_i, normalised to sum to 1.
    pub pi: Vec<f64>,
    /// Log-strengths θ_i = ln π_i.
    pub theta: Vec<f64>,
    /// MM iterations used.
    pub iterations: usize,
}

impl BradleyTerry {
    /// Model probability that item `i` beats item `j`: π_i/(π_i + π_j).
    pub fn win_probability(&self, i: usize, j: usize) -> Result<f64, StatsError> {
        match (self.pi.get(i), self.pi.get(j)) {
            (Some(a), Some(b)) => Ok(a / (a + b)),
            _ => Err(StatsError::OutOfRange {
                value: format!("({i}, {j})"),
                allowed: format!("item indices below {}", self.pi.len()),
            }),
        }
    }

    /// Each item's modelled chance of beating an item of average strength: the item
    /// whose log-strength is the mean θ̄, so P_i = 1 / (1 + exp(θ̄ − θ_i)). Unlike a
    /// rating scale this needs no arbitrary offset and reads as a probability; 0.5 is
    /// exactly average.
    pub fn beats_average(&self) -> Vec<f64> {
        let mean = self.theta.iter().sum::<f64>() / self.theta.len().max(1) as f64;
        self.theta
            .iter()
            .map(|t| 1.0 / (1.0 + (mean - t).exp()))
            .collect()
    }
}

/// Fits Bradley–Terry strengths by Hunter's (2004, Ann. Stat. 32:384) MM algorithm.
///
/// `wins[i][j]` = times i beat j (count ties as half a win each, see
/// [`OutcomeMatrix::wins_with_half_ties`]). Update π_i ← W_i / Σ_{j≠i} N_ij/(π_i + π_j),
/// renormalised to sum 1, until the largest change in π is below `tolerance`.
/// A finite maximum-likelihood estimate exists only when every partition of the items
/// has a win in each direction (Ford 1957; Hunter 2004, Assumption 1); otherwise the
/// error names the items involved.
pub fn bradley_terry(
    wins: &[Vec<f64>],
    tolerance: f64,
    max_iterations: usize,
) -> Result<BradleyTerry, StatsError> {
    let n = wins.len();
    if n < 2 {
        return Err(StatsError::TooFew { needed: 2, got: n });
    }
    for row in wins {
        if row.len() != n {
            return Err(StatsError::LengthMismatch {
                left: n,
                right: row.len(),
            });
        }
        if let Some(bad) = row.iter().find(|w| !(w.is_finite() && **w >= 0.0)) {
            return Err(StatsError::OutOfRange {
                value: bad.to_string(),
                allowed: "a count >= 0".into(),
            });
        }
    }
    check_estimable(wins)?;
    let total_wins: Vec<f64> = (0..n)
        .map(|i| (0..n).filter(|&j| j != i).map(|j| wins[i][j]).sum())
        .collect();
    let mut pi = vec![1.0 / n as f64; n];
    for iteration in 1..=max_iterations {
        let mut next: Vec<f64> = (0..n)
            .map(|i| {
                let denom: f64 = (0..n)
                    .filter(|&j| j != i)
                    .map(|j| (wins[i][j] + wins[j][i]) / (pi[i] + pi[j]))
                    .sum();
                total_wins[i] / denom
            })
            .collect();
        let sum: f64 = next.iter().sum();
        next.iter_mut().for_each(|p| *p /= sum);
        let change = next
            .iter()
            .zip(&pi)
            .map(|(a, b)| (a - b).abs())
            .fold(0.0, f64::max);
        pi = next;
        if change < tolerance {
            let theta: Vec<f64> = pi.iter().map(|p| p.ln()).collect();
            return Ok(BradleyTerry {
                pi,
                theta,
                iterations: iteration,
            });
        }
    }
    Err(StatsError::NoConvergence {
        iterations: max_iterations,
    })
}

/// Checks that the win graph is strongly connected, naming the items when it is not.
fn check_estimable(wins: &[Vec<f64>]) -> Result<(), StatsError> {
    let n = wins.len();
    // Undirected comparison graph first: separate groups never met at all.
    let met = |i: usize, j: usize| wins[i][j] + wins[j][i] > 0.0;
    let groups = components(n, |i, j| met(i, j) || met(j, i));
    if groups.len() > 1 {
        return Err(StatsError::Undefined(format!(
            "the comparison graph is disconnected; groups never compared with each other: {}",
            describe(&groups)
        )));
    }
    // Connected, but some group may never beat (or never lose to) the rest.
    let reach = |from: usize| {
        let mut seen = vec![false; n];
        let mut stack = vec![from];
        seen[from] = true;
        while let Some(i) = stack.pop() {
            for j in 0..n {
                if !seen[j] && wins[i][j] > 0.0 {
                    seen[j] = true;
                    stack.push(j);
                }
            }
        }
        seen
    };
    // Strongly connected components: i and j together when each reaches the other.
    let reached: Vec<Vec<bool>> = (0..n).map(reach).collect();
    let strong = components(n, |i, j| reached[i][j] && reached[j][i]);
    if strong.len() > 1 {
        return Err(StatsError::Undefined(format!(
            "no finite Bradley–Terry estimate: some items never beat, or never lose to, the others; \
             groups by win direction: {}",
            describe(&strong)
        )));
    }
    Ok(())
}

/// Groups items by an equivalence-closing relation (union of linked pairs).
fn components(n: usize, linked: impl Fn(usize, usize) -> bool) -> Vec<Vec<usize>> {
    let mut label = vec![usize::MAX; n];
    let mut groups = Vec::new();
    for start in 0..n {
        if label[start] != usize::MAX {
            continue;
        }
        let id = groups.len();
        let mut members = vec![start];
        label[start] = id;
        let mut k = 0;
        while k < members.len() {
            let i = members[k];
            for (j, slot) in label.iter_mut().enumerate() {
                if *slot == usize::MAX && linked(i, j) {
                    *slot = id;
                    members.push(j);
                }
            }
            k += 1;
        }
        members.sort_unstable();
        groups.push(members);
    }
    groups
}

fn describe(groups: &[Vec<usize>]) -> String {
    groups
        .iter()
        .map(|g| {
            format!(
                "{{{}}}",
                g.iter()
                    .map(|i| i.to_string())
                    .collect::<Vec<_>>()
                    .join(", ")
            )
        })
        .collect::<Vec<_>>()
        .join(" ")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn example() -> Vec<Vec<f64>> {
        vec![
            vec![0.0, 3.0, 2.0],
            vec![1.0, 0.0, 3.0],
            vec![2.0, 1.0, 0.0],
        ]
    }

    /// METHODS section 11 ([lib] choix 0.4.1, 8 d.p. display): W = [[0,3,2],[1,0,3],[2,1,0]]
    /// → π = [0.45183167, 0.32063496, 0.22753337], P(0 beats 1) = 0.58492063,
    /// θ differences 0.343006406 (equal steps, so item 1 sits at the mean log-strength).
    /// Hence the chance of beating an average item is P(0 beats 1) for item 0, 0.5 for
    /// item 1 and 1 − P(0 beats 1) = 0.41507937 for item 2.
    #[test]
    fn bradley_terry_matches_choix_example() {
        let bt = bradley_terry(&example(), 1e-13, 10_000).unwrap();
        for (p, w) in bt.pi.iter().zip([0.45183167, 0.32063496, 0.22753337]) {
            assert!((p - w).abs() < 5e-9, "{p} vs {w}");
        }
        assert!((bt.win_probability(0, 1).unwrap() - 0.58492063).abs() < 5e-9);
        for (r, w) in bt.beats_average().iter().zip([0.58492063, 0.5, 0.41507937]) {
            assert!((r - w).abs() < 5e-8, "{r} vs {w}");
        }
        assert!((bt.theta[0] - bt.theta[1] - 0.343006406).abs() < 5e-9);
        assert!((bt.pi.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!(bt.iterations > 1);
        assert!(bt.win_probability(0, 3).is_err());
    }

    /// Relabelling the items permutes the strengths the same way (BT is label-free).
    #[test]
    fn bradley_terry_is_symmetric_under_relabelling() {
        let w = example();
        let perm = [2, 0, 1]; // new index k holds old item perm[k]
        let permuted: Vec<Vec<f64>> = perm
            .iter()
            .map(|&a| perm.iter().map(|&b| w[a][b]).collect())
            .collect();
        let base = bradley_terry(&w, 1e-13, 10_000).unwrap();
        let moved = bradley_terry(&permuted, 1e-13, 10_000).unwrap();
        for (k, &old) in perm.iter().enumerate() {
            assert!((moved.pi[k] - base.pi[old]).abs() < 1e-10);
        }
    }

    /// Outcomes built from a list with ties as half wins: two evenly matched items that
    /// only tie (and beat each other once) get equal strength 0.5 each.
    #[test]
    fn matrix_builder_counts_ties_as_half_wins() {
        let m = outcome_matrix(
            2,
            &[
                (0, 1, Outcome::Tie),
                (0, 1, Outcome::Win),
                (1, 0, Outcome::Win),
            ],
        )
        .unwrap();
        assert_eq!(m.wins, vec![vec![0.0, 1.0], vec![1.0, 0.0]]);
        assert_eq!(m.ties[0][1], 1.0);
        let w = m.wins_with_half_ties();
        assert_eq!(w[0][1], 1.5);
        let bt = bradley_terry(&w, 1e-14, 1000).unwrap();
        assert!((bt.pi[0] - 0.5).abs() < 1e-12);
        assert!(outcome_matrix(2, &[(0, 0, Outcome::Win)]).is_err());
    }

    /// Hunter (2004) Assumption 1: groups never compared have no joint MLE; the error
    /// names both groups.
    #[test]
    fn disconnected_graph_is_an_error_naming_groups() {
        let w = vec![
            vec![0.0, 1.0, 0.0, 0.0],
            vec![1.0, 0.0, 0.0, 0.0],
            vec![0.0, 0.0, 0.0, 2.0],
            vec![0.0, 0.0, 1.0, 0.0],
        ];
        match bradley_terry(&w, 1e-12, 1000) {
            Err(StatsError::Undefined(msg)) => {
                assert!(msg.contains("{0, 1}") && msg.contains("{2, 3}"), "{msg}")
            }
            other => panic!("expected an error, got {other:?}"),
        }
    }

    /// An item that never loses has an infinite MLE strength (Ford 1957); reported, not fitted.
    #[test]
    fn item_that_never_loses_is_an_error() {
        let w = vec![
            vec![0.0, 2.0, 1.0],
            vec![0.0, 0.0, 1.0],
            vec![0.0, 1.0, 0.0],
        ];
        match bradley_terry(&w, 1e-12, 1000) {
            Err(StatsError::Undefined(msg)) => assert!(msg.contains("{0}"), "{msg}"),
            other => panic!("expected an error, got {other:?}"),
        }
    }
}
