//! Calibration stage, input side: judges' records and overlap scores into one
//! feature row per item (question, system). Input: named sources of `GradeRecord`s
//! and named per-item overlap scores. Output: a `FeatureTable` with stable feature
//! names. Never invents a value: an item missing any feature is left out and listed.

use std::collections::{BTreeMap, BTreeSet};

use crate::judge::GradeRecord;

/// One judge run (or panel member) whose records feed the features.
#[derive(Debug, Clone)]
pub struct Source<'a> {
    /// Name used in feature names, e.g. `default` or `small`.
    pub name: String,
    /// Its records (all criteria it graded).
    pub records: &'a [GradeRecord],
}

/// Item key: (question id, system).
pub type ItemKey = (String, String);

/// Feature rows keyed by item; every row has one value per name.
#[derive(Debug, Clone, PartialEq)]
pub struct FeatureTable {
    /// Feature names, e.g. `default/correctness/p(3)`, `default/correctness/expected`.
    pub names: Vec<String>,
    /// One row per item that has every feature.
    pub rows: BTreeMap<ItemKey, Vec<f64>>,
    /// Items seen in some source but lacking a feature, with the first missing name.
    pub incomplete: Vec<(ItemKey, String)>,
}

impl FeatureTable {
    /// Builds rows from every source's records (per criterion: each label's
    /// probability, captured mass, expected score) and the overlap scores.
    pub fn build(sources: &[Source], overlap: &[(String, BTreeMap<ItemKey, f64>)]) -> FeatureTable {
        let mut names = Vec::new();
        let mut values: BTreeMap<ItemKey, BTreeMap<String, f64>> = BTreeMap::new();
        for s in sources {
            let criteria: BTreeSet<&str> = s.records.iter().map(|r| r.criterion.as_str()).collect();
            for c in criteria {
                let labels = &s
                    .records
                    .iter()
                    .find(|r| r.criterion == c)
                    .expect("c is graded")
                    .labels;
                let cols: Vec<String> = labels
                    .iter()
                    .map(|l| format!("{}/{c}/p({l})", s.name))
                    .chain([
                        format!("{}/{c}/mass", s.name),
                        format!("{}/{c}/expected", s.name),
                    ])
                    .collect();
                names.extend(cols.iter().cloned());
                for r in s.records.iter().filter(|r| r.criterion == c) {
                    let row = values
                        .entry((r.question_id.clone(), r.system.clone()))
                        .or_default();
                    let vals = r
                        .probabilities
                        .iter()
                        .copied()
                        .chain([r.captured_mass, r.expected]);
                    for (name, v) in cols.iter().zip(vals) {
                        row.insert(name.clone(), v);
                    }
                }
            }
        }
        for (name, scores) in overlap {
            names.push(format!("overlap/{name}"));
            for (k, v) in scores {
                values
                    .entry(k.clone())
                    .or_default()
                    .insert(format!("overlap/{name}"), *v);
            }
        }
        let mut rows = BTreeMap::new();
        let mut incomplete = Vec::new();
        for (key, row) in values {
            match names
                .iter()
                .find(|n| !row.get(*n).is_some_and(|v| v.is_finite()))
            {
                Some(missing) => incomplete.push((key, missing.clone())),
                None => {
                    rows.insert(key, names.iter().map(|n| row[n]).collect());
                }
            }
        }
        FeatureTable {
            names,
            rows,
            incomplete,
        }
    }

    /// Index of a feature by name.
    pub fn column(&self, name: &str) -> Option<usize> {
        self.names.iter().position(|n| n == name)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rec(q: &str, c: &str, p: [f64; 2]) -> GradeRecord {
        GradeRecord {
            question_id: q.into(),
            system: "s".into(),
            criterion: c.into(),
            labels: vec!["no".into(), "yes".into()],
            probabilities: p.to_vec(),
            captured_mass: 0.9,
            expected: p[1],
            argmax: String::new(),
            spread: 0.0,
            low_mass: false,
            rationale: None,
        }
    }

    #[test]
    fn rows_hold_every_source_and_criterion_and_incomplete_items_are_listed() {
        let a = [
            rec("q1", "c", [0.3, 0.7]),
            rec("q1", "d", [0.5, 0.5]),
            rec("q2", "c", [0.9, 0.1]),
        ];
        let b = [rec("q1", "c", [0.2, 0.8]), rec("q2", "c", [0.6, 0.4])];
        let t = FeatureTable::build(
            &[
                Source {
                    name: "a".into(),
                    records: &a,
                },
                Source {
                    name: "b".into(),
                    records: &b,
                },
            ],
            &[],
        );
        assert_eq!(t.names.len(), 12);
        assert_eq!(t.names[3], "a/c/expected");
        let row = &t.rows[&("q1".to_string(), "s".to_string())];
        assert_eq!(row[t.column("b/c/p(yes)").unwrap()], 0.8);
        assert_eq!(
            t.incomplete,
            vec![(("q2".into(), "s".into()), "a/d/p(no)".into())]
        );
    }
}
