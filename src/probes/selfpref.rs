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

/// Below this many human-preferred pairs on either side, the equal-opportunity
/// difference is reported as thin evidence (each verdict moves a recall by 10% or more).
pub const THIN_EVIDENCE: usize = 10;

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
    /// Own minus other residual within the same criterion and human consensus score,
    /// weighted by own grades (> 0: the judge is more generous to its own answers than
    /// to others humans rated the same). Unlike the two raw means, not confounded with
    /// a judge that squeezes its scores toward the middle of the scale.
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
        if let Some(e) = &eo {
            let thin = e.n_human_own.min(e.n_human_other);
            if thin < THIN_EVIDENCE {
                let pairs = |n: usize| format!("{n} pair{}", if n == 1 { "" } else { "s" });
                s.push_str(&format!(
                    "; thin evidence: the difference rests on {} humans gave to the judge's own answers and {} to the others, so one verdict more or less can reverse it",
                    pairs(e.n_human_own),
                    pairs(e.n_human_other)
                ));
            }
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
    let mut rows: Vec<(f64, bool, (&str, usize))> = Vec::new();
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
            (g.criterion.as_str(), ci),
        ));
    }
    // Own minus other within each stratum (criterion, human consensus score), averaged
    // with the own grades as weights: a judge that pulls every score toward the middle
    // has positive residuals on answers humans rate low, and must not read as
    // self-preferring just because its own model's answers are rated low.
    let gap = |idx: &[usize]| -> Option<f64> {
        let mut strata: std::collections::BTreeMap<(&str, usize), [(f64, usize); 2]> =
            std::collections::BTreeMap::new();
        for &i in idx {
            let (res, is_own, key) = rows[i];
            let side = &mut strata.entry(key).or_default()[usize::from(is_own)];
            side.0 += res;
            side.1 += 1;
        }
        let (mut sum, mut weight) = (0.0, 0usize);
        for [other, own] in strata.values() {
            if own.1 > 0 && other.1 > 0 {
                sum += own.1 as f64 * (own.0 / own.1 as f64 - other.0 / other.1 as f64);
                weight += own.1;
            }
        }
        (weight > 0).then(|| sum / weight as f64)
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::pairwise::{IdentityProbs, SlotProbs};

    fn outcome(q: usize, winner: Winner) -> PairOutcome {
        let slots = SlotProbs {
            first: 0.4,
            second: 0.4,
            tie: 0.2,
        };
        PairOutcome {
            question_id: format!("q{q:02}"),
            criterion: "overall".into(),
            a: "mine".into(),
            b: "theirs".into(),
            original: slots,
            swapped: slots,
            original_winner: winner,
            swapped_winner: winner,
            debiased: IdentityProbs {
                a: 0.4,
                b: 0.4,
                tie: 0.2,
            },
            debiased_winner: winner,
            conservative_winner: winner,
            verdict: winner,
        }
    }

    fn answer(q: usize, system: &str, by: &str) -> AnswerRecord {
        AnswerRecord {
            question_id: format!("q{q:02}"),
            system: system.into(),
            question: "?".into(),
            answer: "!".into(),
            context: None,
            reference: None,
            written_by: Some(by.into()),
            line: q + 1,
        }
    }

    fn preference(q: usize, preferred: &str) -> PreferenceRow {
        PreferenceRow {
            question_id: format!("q{q:02}"),
            system_a: "mine".into(),
            system_b: "theirs".into(),
            rater: "r1".into(),
            preferred: Some(preferred.into()),
            line: q + 1,
        }
    }

    /// `n` questions; humans prefer `mine` on the first half. The judge agrees with the
    /// humans except on `flips` of the human-`theirs` pairs, where it picks `mine`.
    fn scenario(n: usize, flips: usize) -> SelfPreference {
        let half = n / 2;
        let outcomes: Vec<PairOutcome> = (0..n)
            .map(|q| {
                let own = q < half || q < half + flips;
                outcome(q, if own { Winner::A } else { Winner::B })
            })
            .collect();
        let answers: Vec<AnswerRecord> = (0..n)
            .flat_map(|q| [answer(q, "mine", "judge-x"), answer(q, "theirs", "human")])
            .collect();
        let prefs: Vec<PreferenceRow> = (0..n)
            .map(|q| preference(q, if q < half { "mine" } else { "theirs" }))
            .collect();
        self_preference("judge-x", &outcomes, &answers, Some(&prefs), None, 7)
    }

    /// Equal-opportunity difference (Wataoka, Takahashi & Ri 2024) worked by hand:
    /// 12 pairs, humans prefer the judge's own answer in 6. The judge picks its own in
    /// all 6 of those (recall 1) and in 3 of the 6 others (recall of "other" 3/6), so
    /// the difference is 1 − 0.5 = +0.5 and its own win rate is 9/12.
    #[test]
    fn equal_opportunity_matches_a_hand_count_and_flags_thin_evidence() {
        let sp = scenario(12, 3);
        assert_eq!(sp.own_answers, 12);
        assert_eq!(sp.pairs, 12);
        assert!((sp.own_win_rate.expect("rate") - 0.75).abs() < 1e-12);
        assert!((sp.human_own_win_rate.expect("human rate") - 0.5).abs() < 1e-12);
        let eo = sp.equal_opportunity.as_ref().expect("eo");
        assert!((eo.recall_own - 1.0).abs() < 1e-12);
        assert!((eo.recall_other - 0.5).abs() < 1e-12);
        assert!((eo.difference - 0.5).abs() < 1e-12);
        assert!(
            sp.summary.contains("favours its own answers"),
            "{}",
            sp.summary
        );
        assert!(sp.summary.contains("thin evidence"), "{}", sp.summary);
    }

    /// With at least `THIN_EVIDENCE` human verdicts on each side and a judge that
    /// agrees with every one, the difference is 0 and no caveat is printed.
    #[test]
    fn agreement_on_enough_pairs_reads_as_no_self_preference() {
        let sp = scenario(2 * THIN_EVIDENCE, 0);
        let eo = sp.equal_opportunity.as_ref().expect("eo");
        assert_eq!(eo.n_human_own, THIN_EVIDENCE);
        assert!(eo.difference.abs() < 1e-12);
        assert!(
            sp.summary.contains("no clear self-preference"),
            "{}",
            sp.summary
        );
        assert!(!sp.summary.contains("thin evidence"), "{}", sp.summary);
    }

    fn support_rubric() -> Rubric {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("judge-templates/rubrics/support.toml");
        crate::rubric::load_rubric(&path).expect("bundled rubric")
    }

    /// `n` questions answered by `mine` (the judge's model) and `theirs`; humans give
    /// each answer `human(q, own)`, the judge `judge(human, own)`. Returns the
    /// pointwise gap.
    fn pointwise_case(
        n: usize,
        human: impl Fn(usize, bool) -> f64,
        judge: impl Fn(f64, bool) -> f64,
    ) -> PointwiseSelf {
        let rubric = support_rubric();
        let (mut grades, mut labels, mut answers) = (Vec::new(), Vec::new(), Vec::new());
        for q in 0..n {
            for (system, own) in [("mine", true), ("theirs", false)] {
                let h = human(q, own);
                answers.push(answer(q, system, if own { "judge-x" } else { "human" }));
                labels.push(LabelRow {
                    question_id: format!("q{q:02}"),
                    system: system.into(),
                    criterion: "correctness".into(),
                    rater: "r1".into(),
                    score: format!("{h}"),
                    line: 1,
                });
                grades.push(GradeRecord {
                    question_id: format!("q{q:02}"),
                    system: system.into(),
                    criterion: "correctness".into(),
                    labels: vec![],
                    probabilities: vec![],
                    captured_mass: 1.0,
                    expected: judge(h, own),
                    argmax: String::new(),
                    spread: 0.0,
                    low_mass: false,
                    rationale: None,
                });
            }
        }
        let outcomes = vec![outcome(0, Winner::Tie)];
        let grades_labels = Some((grades.as_slice(), labels.as_slice(), &rubric));
        self_preference("judge-x", &outcomes, &answers, None, grades_labels, 7)
            .pointwise
            .expect("pointwise gap")
    }

    /// A judge that squeezes every score halfway toward 3.
    fn squeeze(h: f64) -> f64 {
        3.0 + (h - 3.0) / 2.0
    }

    /// 20 questions; humans rate `mine` 2 and `theirs` 4 on half, the other way round
    /// on the rest. The squeezing judge that ignores authorship has residuals +0.5 at
    /// human 2 and -0.5 at human 4: compared at equal human scores the gap is exactly
    /// 0. A judge that adds 0.5 to its own answers on top shows a gap of exactly 0.5
    /// (hand count: every stratum differs by 0.5).
    #[test]
    fn pointwise_gap_compares_answers_humans_scored_the_same() {
        let human = |q: usize, own: bool| if (q < 10) == own { 2.0 } else { 4.0 };
        let fair = pointwise_case(20, human, |h, _| squeeze(h));
        assert!(fair.difference.abs() < 1e-12, "{}", fair.difference);
        let partial = pointwise_case(20, human, |h, own| squeeze(h) + if own { 0.5 } else { 0.0 });
        assert!(
            (partial.difference - 0.5).abs() < 1e-12,
            "{}",
            partial.difference
        );
        assert!(partial.ci.0 > 0.0, "{:?}", partial.ci);
        assert_eq!((partial.n_own, partial.n_other), (20, 20));
    }

    /// The confound the matching removes: own answers rated 2 and others 4, except
    /// one question where the ratings are swapped (so the strata overlap). The
    /// squeezing judge's raw residual means differ by more than half a point; the
    /// matched gap stays 0.
    #[test]
    fn squeezing_judge_is_not_read_as_self_preferring() {
        let human = |q: usize, own: bool| if (q == 0) != own { 2.0 } else { 4.0 };
        let p = pointwise_case(12, human, |h, _| squeeze(h));
        assert!(p.own_mean_residual - p.other_mean_residual > 0.6);
        assert!(p.difference.abs() < 1e-12, "{}", p.difference);
    }

    /// Without any answer by the judge's model, nothing is claimed.
    #[test]
    fn no_own_answers_means_no_probe() {
        let outcomes = vec![outcome(0, Winner::A)];
        let answers = vec![answer(0, "mine", "someone"), answer(0, "theirs", "human")];
        let sp = self_preference("judge-x", &outcomes, &answers, None, None, 7);
        assert_eq!(sp.pairs, 0);
        assert!(sp.own_win_rate.is_none());
        assert!(sp.summary.contains("not probed"), "{}", sp.summary);
    }
}
