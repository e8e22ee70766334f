//! Tests of pairwise vetting: human majority, the three verdict rules and their
//! agreement with humans, on invented pairs built in code.

use super::tests::{close, peaked, quick, record, rubric, variant};
use super::trust_tests::three_raters;
use super::*;
use crate::data::PreferenceRow;
use crate::judge::PairRecord;
use crate::rubric::Scale;
use crate::stats::pairwise::Winner;

pub(super) fn pair(q: &str, first: &str, second: &str, w: Winner) -> PairRecord {
    let (p_first, p_second, p_tie) = match w {
        Winner::A => (0.8, 0.1, 0.1),
        Winner::B => (0.1, 0.8, 0.1),
        Winner::Tie => (0.1, 0.1, 0.8),
    };
    PairRecord {
        question_id: q.into(),
        criterion: "overall".into(),
        first: first.into(),
        second: second.into(),
        p_first,
        p_second,
        p_tie,
        captured_mass: 1.0,
    }
}

pub(super) fn pref(q: &str, rater: &str, preferred: Option<&str>) -> PreferenceRow {
    PreferenceRow {
        question_id: q.into(),
        system_a: "x".into(),
        system_b: "y".into(),
        rater: rater.into(),
        preferred: preferred.map(str::to_string),
        line: 0,
    }
}

/// METHODS.md section 8 worked example: orig [A,A,B,A,tie,A,B,A], swapped
/// [A,B,B,B,tie,A,A,B] (identity winners) give conservative [A,tie,B,tie,tie,A,tie,tie]
/// and consistency 4/8. Human majorities (invented) [A,A,B,B,tie,A,B,B]; by hand the
/// single-order rule matches 6/8 and the conservative rule 4/8. The peaked
/// probabilities average to a tie whenever the orders disagree, so debiased = conservative.
#[test]
fn pairwise_rules_match_the_position_bias_example() {
    use Winner::{Tie, A, B};
    let orig = [A, A, B, A, Tie, A, B, A];
    let swapped = [A, B, B, B, Tie, A, A, B];
    let human = [
        Some("x"),
        Some("x"),
        Some("y"),
        Some("y"),
        None,
        Some("x"),
        Some("y"),
        Some("y"),
    ];
    let mut recs = Vec::new();
    let mut prefs = Vec::new();
    for i in 0..8 {
        let q = format!("q{i}");
        recs.push(pair(&q, "x", "y", orig[i]));
        // swapped order shows y first: an identity win for x is a second-slot win
        let slot = match swapped[i] {
            A => B,
            B => A,
            Tie => Tie,
        };
        recs.push(pair(&q, "y", "x", slot));
        // two raters agree, a third says tie: the majority is the agreed choice
        prefs.push(pref(&q, "r1", human[i]));
        prefs.push(pref(&q, "r2", human[i]));
        prefs.push(pref(&q, "r3", None));
    }
    let r = vet_pairs(&recs, &prefs, &quick()).expect("pairs");
    let c = &r.criteria[0];
    assert_eq!(c.n_pairs, 8);
    assert_eq!(c.human_ties, 1);
    close(c.position_bias.positional_consistency, 0.5, 1e-12);
    assert_eq!(
        c.position_bias.conservative,
        vec![A, Tie, B, Tie, Tie, A, Tie, Tie]
    );
    let acc: Vec<f64> = c.methods.iter().map(|m| m.accuracy).collect();
    close(acc[0], 6.0 / 8.0, 1e-12);
    close(acc[1], 4.0 / 8.0, 1e-12);
    close(acc[2], 4.0 / 8.0, 1e-12);
    assert!(c.methods.iter().all(|m| m.accuracy_ci.is_some()));
    assert!(report_text(&dummy_report(), Some(&r)).contains("single order"));
}

/// Majority rule (module doc of `pairwise`): a unique plurality wins, otherwise tie.
/// One vote each, or two ties and one win, give a tie; two wins and one tie give the win.
#[test]
fn human_majority_needs_a_unique_plurality() {
    let recs = vec![
        pair("q1", "x", "y", Winner::A),
        pair("q1", "y", "x", Winner::B),
        pair("q2", "x", "y", Winner::A),
        pair("q2", "y", "x", Winner::B),
        pair("q3", "x", "y", Winner::A),
        pair("q3", "y", "x", Winner::B),
    ];
    let prefs = vec![
        pref("q1", "r1", Some("x")),
        pref("q1", "r2", Some("y")),
        pref("q1", "r3", None),
        pref("q2", "r1", None),
        pref("q2", "r2", None),
        pref("q2", "r3", Some("x")),
        pref("q3", "r1", Some("x")),
        pref("q3", "r2", Some("x")),
        pref("q3", "r3", None),
    ];
    let r = vet_pairs(&recs, &prefs, &quick()).expect("pairs");
    let m = &r.criteria[0].methods[0];
    assert_eq!(r.criteria[0].human_ties, 2);
    // judge says x every time: right only on q3
    close(m.accuracy, 1.0 / 3.0, 1e-12);
    assert_eq!(
        m.confusion,
        vec![vec![1, 0, 0], vec![0, 0, 0], vec![2, 0, 0]]
    );
}

fn dummy_report() -> VetReport {
    let (rows, cons) = three_raters(20, "c");
    let recs: Vec<GradeRecord> = cons
        .iter()
        .enumerate()
        .map(|(i, &h)| {
            record(
                &format!("q{i:03}"),
                "c",
                Scale::points(1, 5),
                &peaked(5, h, 0.7),
            )
        })
        .collect();
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    vet(
        &[variant("judge", &recs, VariantKind::Argmax)],
        &rows,
        &rb,
        &quick(),
    )
    .expect("vet")
}

/// A judge that always prefers the first-shown answer, grades that carry the truth,
/// and a second judge (panel) that copies the first: pointwise and panel rules join
/// the list, fitted rules are marked out of sample, the raw judge keeps its winner in
/// no pair, and the choice lands on a rule that reads the grades. Pointwise scores
/// are rescaled by the scale (1..5): expected 5 and 1 give 1.0 and 0.0.
#[test]
fn grades_and_a_panel_add_rules_and_the_choice_reads_the_grades() {
    let rb = rubric(&[("c", Scale::points(1, 5))]);
    let (mut recs, mut grades, mut prefs) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..12 {
        let q = format!("q{i:02}");
        recs.push(pair(&q, "x", "y", Winner::A));
        recs.push(pair(&q, "y", "x", Winner::A));
        let x_better = i % 3 != 0;
        for (sys, good) in [("x", x_better), ("y", !x_better)] {
            let probs = if good {
                [0.0, 0.0, 0.0, 0.0, 1.0]
            } else {
                [1.0, 0.0, 0.0, 0.0, 0.0]
            };
            let mut g = record(&q, "c", Scale::points(1, 5), &probs);
            g.system = sys.into();
            grades.push(g);
        }
        let winner = if x_better { "x" } else { "y" };
        prefs.push(pref(&q, "r1", Some(winner)));
        prefs.push(pref(&q, "r2", Some(winner)));
    }
    let inputs = PairInputs {
        judges: vec![&recs, &recs],
        probes: vec![],
        grades: Some((&grades, &rb)),
    };
    let r = vet_pair_inputs(&inputs, &prefs, &quick()).expect("pairs");
    let c = &r.criteria[0];
    let names: Vec<&str> = c.methods.iter().map(|m| m.method.as_str()).collect();
    assert_eq!(
        names,
        [
            "single order",
            "debiased",
            "conservative",
            "calibrated",
            "calibrated, tie band",
            "pointwise",
            "calibrated + pointwise",
            "panel",
            "panel + pointwise"
        ]
    );
    assert!(c
        .methods
        .iter()
        .all(|m| m.out_of_sample == m.rule.is_some_and(|r| r.fitted())));
    close(c.calibration.before.consistency, 0.0, 1e-12);
    close(c.calibration.before.first_slot_rate, 1.0, 1e-12);
    let point = &c.methods[5];
    close(point.accuracy, 1.0, 1e-12);
    assert!(
        point.order.is_none(),
        "order cannot enter pointwise verdicts"
    );
    let chosen = c.chosen.as_ref().expect("a rule is chosen");
    assert!(chosen.name.contains("pointwise"), "{}", chosen.name);
    assert!(chosen.nested_accuracy.expect("several questions") > 0.9);
    let text = report_text(&dummy_report(), Some(&r));
    assert!(
        text.contains("chosen rule") && text.contains("slot prior"),
        "{text}"
    );
}
