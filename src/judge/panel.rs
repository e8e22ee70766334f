//! Judge stage, panels: several judges' verdicts on the same items combined into one.
//! Input: each member's `GradeRecord`s (or `PairRecord`s) under a member name.
//! Output: one panel record per item graded by every member, plus the items left out
//! because a member is missing them. Never averages over a partial panel and never
//! reorders or changes a member's own records.
//!
//! Combination (Verga et al. 2024, "Replacing Judges with Juries"): the panel's
//! distribution is the equal-weight mixture of the members' distributions, so its
//! expected score is exactly the mean of the members' expected scores (average
//! pooling), and its captured mass is the mean of theirs. For pairwise verdicts the
//! three verdict probabilities are averaged the same way. A fitted combination of the
//! members' evidence lives in `calibrate`, not here.
//!
//! API, for reuse by other commands:
//! - [`combine_grades`] takes `&[PanelMember<GradeRecord>]` and returns
//!   [`Panel<GradeRecord>`]: records keyed `question_id/system/criterion`, sorted.
//! - [`combine_pairs`] takes `&[PanelMember<PairRecord>]` and returns
//!   [`Panel<PairRecord>`]: records keyed `question_id/criterion/first/second`.
//! - Both fail with [`PanelError`] when fewer than two members are given, a member
//!   graded an item twice, or members disagree on an item's scale.

use std::collections::BTreeMap;

use serde::Serialize;

use super::grade::label_value;
use super::{GradeRecord, PairRecord};

/// One judge of a panel: a display name and its records.
#[derive(Debug, Clone)]
pub struct PanelMember<'a, R> {
    /// Member name, e.g. the judge alias or model file.
    pub name: String,
    /// The member's records.
    pub records: &'a [R],
}

/// An item left out of the panel because some members did not judge it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct IncompleteItem {
    /// The record key.
    pub key: String,
    /// Members without a record for it.
    pub missing: Vec<String>,
}

/// Combined records and what could not be combined.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Panel<R> {
    /// Member names in the order given.
    pub members: Vec<String>,
    /// One combined record per item every member judged, sorted by key.
    pub records: Vec<R>,
    /// Items some member did not judge (left out, never averaged over fewer members).
    pub incomplete: Vec<IncompleteItem>,
}

/// Why records cannot be combined.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PanelError {
    /// A panel needs at least two members.
    #[error("a panel needs at least two judges, got {0}")]
    TooFewMembers(usize),
    /// Two members share a name.
    #[error("two panel members are both named `{0}`")]
    DuplicateMember(String),
    /// A member has two records for one item.
    #[error("member `{member}` judged `{key}` more than once")]
    Duplicate { member: String, key: String },
    /// Members graded one item on different scales.
    #[error("`{key}`: member `{member}` used scale [{got}], the first member [{expected}]")]
    ScaleMismatch {
        key: String,
        member: String,
        got: String,
        expected: String,
    },
}

/// Something a panel can average: a keyed record with a probability vector.
trait Combinable: Clone {
    fn key(&self) -> String;
    /// Checks the record can be averaged with `first` (same outcome space).
    fn compatible(&self, first: &Self) -> Result<(), (String, String)>;
    fn mean_of(items: &[&Self]) -> Self;
}

fn combine<R: Combinable>(members: &[PanelMember<R>]) -> Result<Panel<R>, PanelError> {
    if members.len() < 2 {
        return Err(PanelError::TooFewMembers(members.len()));
    }
    let mut by_key: BTreeMap<String, Vec<Option<&R>>> = BTreeMap::new();
    for (m, member) in members.iter().enumerate() {
        if members[..m].iter().any(|o| o.name == member.name) {
            return Err(PanelError::DuplicateMember(member.name.clone()));
        }
        for r in member.records {
            let slot = by_key
                .entry(r.key())
                .or_insert_with(|| vec![None; members.len()]);
            if slot[m].replace(r).is_some() {
                return Err(PanelError::Duplicate {
                    member: member.name.clone(),
                    key: r.key(),
                });
            }
        }
    }
    let mut records = Vec::new();
    let mut incomplete = Vec::new();
    for (key, slot) in by_key {
        let missing: Vec<String> = members
            .iter()
            .zip(&slot)
            .filter(|(_, r)| r.is_none())
            .map(|(m, _)| m.name.clone())
            .collect();
        if !missing.is_empty() {
            incomplete.push(IncompleteItem { key, missing });
            continue;
        }
        let present: Vec<&R> = slot.into_iter().flatten().collect();
        for (m, r) in members.iter().zip(&present).skip(1) {
            r.compatible(present[0])
                .map_err(|(got, expected)| PanelError::ScaleMismatch {
                    key: key.clone(),
                    member: m.name.clone(),
                    got,
                    expected,
                })?;
        }
        records.push(R::mean_of(&present));
    }
    Ok(Panel {
        members: members.iter().map(|m| m.name.clone()).collect(),
        records,
        incomplete,
    })
}

/// Combines members' grades: mixture distribution, mean expected score and mass.
pub fn combine_grades(
    members: &[PanelMember<GradeRecord>],
) -> Result<Panel<GradeRecord>, PanelError> {
    combine(members)
}

/// Combines members' pairwise verdicts: mean of each verdict probability and mass.
pub fn combine_pairs(members: &[PanelMember<PairRecord>]) -> Result<Panel<PairRecord>, PanelError> {
    combine(members)
}

fn mean(values: impl Iterator<Item = f64>, n: usize) -> f64 {
    values.sum::<f64>() / n as f64
}

impl Combinable for GradeRecord {
    fn key(&self) -> String {
        GradeRecord::key(self)
    }

    fn compatible(&self, first: &Self) -> Result<(), (String, String)> {
        if self.labels == first.labels && self.probabilities.len() == first.labels.len() {
            Ok(())
        } else {
            Err((self.labels.join(", "), first.labels.join(", ")))
        }
    }

    fn mean_of(items: &[&Self]) -> Self {
        let n = items.len();
        let first = items[0];
        let probabilities: Vec<f64> = (0..first.labels.len())
            .map(|k| mean(items.iter().map(|r| r.probabilities[k]), n))
            .collect();
        let values: Vec<f64> = first.labels.iter().map(|l| label_value(l)).collect();
        let expected: f64 = values.iter().zip(&probabilities).map(|(v, p)| v * p).sum();
        let variance: f64 = values
            .iter()
            .zip(&probabilities)
            .map(|(v, p)| p * (v - expected).powi(2))
            .sum();
        // First maximum wins, as for a single judge.
        let best = (0..probabilities.len()).fold(0, |b, k| {
            if probabilities[k] > probabilities[b] {
                k
            } else {
                b
            }
        });
        GradeRecord {
            question_id: first.question_id.clone(),
            system: first.system.clone(),
            criterion: first.criterion.clone(),
            labels: first.labels.clone(),
            probabilities,
            captured_mass: mean(items.iter().map(|r| r.captured_mass), n),
            expected,
            argmax: first.labels[best].clone(),
            spread: variance.sqrt(),
            low_mass: items.iter().any(|r| r.low_mass),
            rationale: None,
        }
    }
}

impl Combinable for PairRecord {
    fn key(&self) -> String {
        PairRecord::key(self)
    }

    fn compatible(&self, _first: &Self) -> Result<(), (String, String)> {
        Ok(())
    }

    fn mean_of(items: &[&Self]) -> Self {
        let n = items.len();
        PairRecord {
            p_first: mean(items.iter().map(|r| r.p_first), n),
            p_second: mean(items.iter().map(|r| r.p_second), n),
            p_tie: mean(items.iter().map(|r| r.p_tie), n),
            captured_mass: mean(items.iter().map(|r| r.captured_mass), n),
            ..items[0].clone()
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn grade(q: &str, probs: &[f64], mass: f64) -> GradeRecord {
        let labels: Vec<String> = (1..=probs.len()).map(|i| i.to_string()).collect();
        let expected = probs
            .iter()
            .enumerate()
            .map(|(i, p)| (i + 1) as f64 * p)
            .sum();
        GradeRecord {
            question_id: q.into(),
            system: "s".into(),
            criterion: "c".into(),
            labels,
            probabilities: probs.to_vec(),
            captured_mass: mass,
            expected,
            argmax: String::new(),
            spread: 0.0,
            low_mass: false,
            rationale: None,
        }
    }

    /// Average pooling (Verga et al. 2024): the panel's expected score is the mean of
    /// the members' expected scores. METHODS section 6 example rows: expected 3.08
    /// and 4.21 (scale 1..5) average to 3.645.
    #[test]
    fn panel_expected_score_is_mean_of_member_expected_scores() {
        let a = [grade("q1", &[0.05, 0.10, 0.62, 0.18, 0.05], 0.9)];
        let b = [grade("q1", &[0.0, 0.05, 0.17, 0.30, 0.48], 0.7)];
        let p = combine_grades(&[
            PanelMember {
                name: "a".into(),
                records: &a,
            },
            PanelMember {
                name: "b".into(),
                records: &b,
            },
        ])
        .unwrap();
        let r = &p.records[0];
        assert!((a[0].expected - 3.08).abs() < 1e-12 && (b[0].expected - 4.21).abs() < 1e-12);
        assert!((r.expected - 3.645).abs() < 1e-12, "{}", r.expected);
        assert!((r.captured_mass - 0.8).abs() < 1e-12);
        assert!((r.probabilities.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert_eq!(r.argmax, "3");
    }

    #[test]
    fn item_missing_from_a_member_is_left_out_and_named() {
        let a = [grade("q1", &[0.5, 0.5], 1.0), grade("q2", &[0.5, 0.5], 1.0)];
        let b = [grade("q1", &[0.1, 0.9], 1.0)];
        let p = combine_grades(&[
            PanelMember {
                name: "a".into(),
                records: &a,
            },
            PanelMember {
                name: "b".into(),
                records: &b,
            },
        ])
        .unwrap();
        assert_eq!(p.records.len(), 1);
        assert_eq!(
            p.incomplete,
            vec![IncompleteItem {
                key: "q2/s/c".into(),
                missing: vec!["b".into()]
            }]
        );
    }

    #[test]
    fn members_on_different_scales_are_refused() {
        let a = [grade("q1", &[0.5, 0.5], 1.0)];
        let b = [grade("q1", &[0.2, 0.3, 0.5], 1.0)];
        let e = combine_grades(&[
            PanelMember {
                name: "a".into(),
                records: &a,
            },
            PanelMember {
                name: "b".into(),
                records: &b,
            },
        ])
        .unwrap_err();
        assert!(matches!(e, PanelError::ScaleMismatch { .. }), "{e}");
        let one = combine_grades(&[PanelMember {
            name: "a".into(),
            records: &a,
        }]);
        assert_eq!(one.unwrap_err(), PanelError::TooFewMembers(1));
    }

    #[test]
    fn pair_verdicts_are_averaged() {
        let rec = |f: f64, s: f64| PairRecord {
            question_id: "q".into(),
            criterion: "overall".into(),
            first: "x".into(),
            second: "y".into(),
            p_first: f,
            p_second: s,
            p_tie: 1.0 - f - s,
            captured_mass: 1.0,
        };
        let (a, b) = ([rec(0.6, 0.3)], [rec(0.2, 0.7)]);
        let p = combine_pairs(&[
            PanelMember {
                name: "a".into(),
                records: &a,
            },
            PanelMember {
                name: "b".into(),
                records: &b,
            },
        ])
        .unwrap();
        let r = &p.records[0];
        assert!((r.p_first - 0.4).abs() < 1e-12 && (r.p_second - 0.5).abs() < 1e-12);
        assert!((r.p_tie - 0.1).abs() < 1e-12);
    }
}
