//! Self-preference probe: does the judge favour answers its own model wrote?
//! Pairwise: the judge's own-versus-other win rate and, with human preferences, the
//! equal-opportunity difference (Wataoka, Takahashi & Ri 2024). Pointwise, with human
//! labels: the judge-minus-human residual on its own answers versus others', with a
//! bootstrap interval. Input: pair outcomes, answers (`written_by`), optional human
//! preferences and grade records with labels. Output: `SelfPreference`. Never
//! reports a raw win rate without saying it is confounded with quality.

use std::collections::{HashMap, HashSet};

use serde::Serialize;

use super::PairOutcome;
use crate::data::{AnswerRecord, LabelRow, PreferenceRow};
use crate::judge::anchors::consensus_index;
use crate::judge::GradeRecord;
use crate::rubric::Rubric;
use crate::stats::bootstrap::{bootstrap_interval, IntervalMethod};
use crate::stats::pairwise::{
    equal_opportunity_difference, own_win_rate, EqualOpportunity, Preference, Winner,
};

/// Pointwise residual gap with its interval.
#[derive(Debug, Clone, Serialize)]
pub struct PointwiseSelf {
    /// Graded records of the judge's own answers with human labels.
    pub n_own: usize,
    /// Graded records of other answers with human labels.
    pub n_other: usize,
    /// Mean judge-minus-human score on own answers.
    pub own_mean_residual: f64,
    /// Mean judge-minus-human score on other answers.
    pub other_mean_residual: f64,
    /// Own minus other (> 0: the judge is more generous to its own answers).
    pub difference: f64,
    /// 95% bootstrap percentile interval of the difference (seeded, 2000 resamples).
    pub ci: (f64, f64),
}

/// The self-preference report.
#[derive(Debug, Clone, Serialize)]
pub struct SelfPreference {
    /// The `written_by` value that marks the judge's own answers.
    pub judge_name: String,
    /// Answers the judge's model wrote.
    pub own_answers: usize,
    /// Pairs with exactly one own answer.
    pub pairs: usize,
    /// Judge's debiased own-versus-other win rate (ties half); confounded with quality.
    pub own_win_rate: Option<f64>,
    /// Human own-versus-other win rate on the same pairs, when preferences are given.
    pub human_own_win_rate: Option<f64>,
    /// Equal-opportunity difference against human preferences.
    pub equal_opportunity: Option<EqualOpportunity>,
    /// Pointwise residual gap against human labels.
    pub pointwise: Option<PointwiseSelf>,
    /// Plain-words reading of the numbers.
    pub summary: String,
}

/// Majority human preference per (question, system, system): the system with more
/// votes than the other and than ties; otherwise a tie.
pub fn human_majority(
    prefs: &[PreferenceRow],
) -> HashMap<(String, String, String), Option<String>> {
    let mut votes: HashMap<(String, String, String), HashMap<Option<String>, usize>> =
        HashMap::new();
    for p in prefs {
        let (lo, hi) = if p.system_a <= p.system_b {
            (&p.system_a, &p.system_b)
        } else {
            (&p.system_b, &p.system_a)
        };
        *votes
            .entry((p.question_id.clone(), lo.clone(), hi.clone()))
            .or_default()
            .entry(p.preferred.clone())
            .or_default() += 1;
    }
    votes
        .into_iter()
        .map(|(k, v)| {
            let mut best: Vec<(&Option<String>, &usize)> = v.iter().collect();
            best.sort_by(|x, y| y.1.cmp(x.1));
            let winner = match best.as_slice() {
                [(w, n), rest @ ..] if rest.iter().all(|(_, m)| *m < *n) => (*w).clone(),
                _ => None,
            };
            (k, winner)
        })
        .collect()
}

/// Probe self-preference of the judge named `judge_name`.
#[allow(clippy::too_many_arguments)]
pub fn self_preference(
    judge_name: &str,
    outcomes: &[PairOutcome],
    answers: &[AnswerRecord],
    prefs: Option<&[PreferenceRow]>,
    grades: Option<(&[GradeRecord], &[LabelRow], &Rubric)>,
    seed: u64,
) -> SelfPreference {
    let own: HashSet<(&str, &str)> = answers
        .iter()
        .filter(|a| a.written_by.as_deref() == Some(judge_name))
        .map(|a| (a.question_id.as_str(), a.system.as_str()))
        .collect();
    let majority = prefs.map(human_majority);
    let mut judge_v = Vec::new();
    let mut human_v = Vec::new();
    let mut judge_all = Vec::new();
    for o in outcomes {
        let a_own = own.contains(&(o.question_id.as_str(), o.a.as_str()));
        let b_own = own.contains(&(o.question_id.as_str(), o.b.as_str()));
        if a_own == b_own {
            continue;
        }
        let own_sys = if a_own { &o.a } else { &o.b };
        let pref = match (o.debiased_winner, a_own) {
            (Winner::Tie, _) => Preference::Tie,
            (Winner::A, true) | (Winner::B, false) => Preference::Own,
            _ => Preference::Other,
        };
        judge_all.push(pref);
        if let Some(m) = &majority {
            let (lo, hi) = if o.a <= o.b {
                (&o.a, &o.b)
            } else {
                (&o.b, &o.a)
            };
            if let Some(h) = m.get(&(o.question_id.clone(), lo.clone(), hi.clone())) {
                judge_v.push(pref);
                human_v.push(match h {
                    None => Preference::Tie,
                    Some(s) if s == own_sys => Preference::Own,
                    Some(_) => Preference::Other,
                });
            }
        }
    }
    let pointwise = grades.and_then(|(g, l, r)| pointwise_gap(&own, g, l, r, seed));
    let own_rate = own_win_rate(&judge_all).ok();
    let human_rate = own_win_rate(&human_v).ok();
    let eo = equal_opportunity_difference(&judge_v, &human_v).ok();
    let summary = if own.is_empty() {
        format!("no answer is marked `written_by: {judge_name}`, so self-preference was not probed")
    } else if judge_all.is_empty() {
        "no pair puts one of the judge's own answers against another answer".into()
    } else {
        let mut s = format!(
            "the judge preferred its own answers in {:.0}% of {} pairs",
            own_rate.unwrap_or(f64::NAN) * 100.0,
            judge_all.len()
        );
        match (&eo, human_rate) {
            (Some(e), Some(h)) => s.push_str(&format!(
                "; humans did in {:.0}%; equal-opportunity difference {:+.2} ({})",
                h * 100.0,
                e.difference,
                if e.difference > 0.1 {
                    "the judge favours its own answers more than humans do"
                } else if e.difference < -0.1 {
                    "the judge is harder on its own answers than humans are"
                } else {
                    "no clear self-preference"
                }
            )),
            _ => s.push_str(
                "; without human preferences this rate is confounded with answer quality and says nothing about bias on its own",
            ),
        }
        s
    };
    SelfPreference {
        judge_name: judge_name.to_string(),
        own_answers: own.len(),
        pairs: judge_all.len(),
        own_win_rate: own_rate,
        human_own_win_rate: human_rate,
        equal_opportunity: eo,
        pointwise,
        summary,
    }
}

fn pointwise_gap(
    own: &HashSet<(&str, &str)>,
    grades: &[GradeRecord],
    labels: &[LabelRow],
    rubric: &Rubric,
    seed: u64,
) -> Option<PointwiseSelf> {
    let mut ratings: HashMap<(&str, &str, &str), Vec<usize>> = HashMap::new();
    for l in labels {
        if let Some(c) = rubric.criterion(&l.criterion) {
            if let Some(i) = c.scale.index_of(&l.score) {
                ratings
                    .entry((
                        l.question_id.as_str(),
                        l.system.as_str(),
                        l.criterion.as_str(),
                    ))
                    .or_default()
                    .push(i);
            }
        }
    }
    let mut rows: Vec<(f64, bool)> = Vec::new();
    for g in grades {
        let Some(c) = rubric.criterion(&g.criterion) else {
            continue;
        };
        let Some(r) = ratings.get(&(
            g.question_id.as_str(),
            g.system.as_str(),
            g.criterion.as_str(),
        )) else {
            continue;
        };
        let Some(ci) = consensus_index(r) else {
            continue;
        };
        let human = c.scale.values()[ci];
        rows.push((
            g.expected - human,
            own.contains(&(g.question_id.as_str(), g.system.as_str())),
        ));
    }
    let gap = |idx: &[usize]| -> Option<f64> {
        let (mut so, mut no, mut st, mut nt) = (0.0, 0usize, 0.0, 0usize);
        for &i in idx {
            if rows[i].1 {
                so += rows[i].0;
                no += 1;
            } else {
                st += rows[i].0;
                nt += 1;
            }
        }
        (no > 0 && nt > 0).then(|| so / no as f64 - st / nt as f64)
    };
    let all: Vec<usize> = (0..rows.len()).collect();
    let difference = gap(&all)?;
    let mean = |own_side: bool| {
        let v: Vec<f64> = rows
            .iter()
            .filter(|r| r.1 == own_side)
            .map(|r| r.0)
            .collect();
        v.iter().sum::<f64>() / v.len() as f64
    };
    let ci = bootstrap_interval(
        rows.len(),
        2000,
        seed,
        0.95,
        IntervalMethod::Percentile,
        gap,
    )
    .map(|b| (b.lower, b.upper))
    .unwrap_or((f64::NAN, f64::NAN));
    Some(PointwiseSelf {
        n_own: rows.iter().filter(|r| r.1).count(),
        n_other: rows.iter().filter(|r| !r.1).count(),
        own_mean_residual: mean(true),
        other_mean_residual: mean(false),
        difference,
        ci,
    })
}
