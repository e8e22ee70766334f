//! Vetting stage, input side: human label rows and judge records into aligned tables.
//! Input: `LabelRow`s, one variant's `GradeRecord`s and the `Rubric`. Output: per
//! criterion, the labelled items with each rater's scale position and the consensus,
//! and per variant the judge's category, score and distribution per item. Never
//! guesses: a label off the scale, an unknown criterion, a duplicate rating or a
//! malformed record is an error listing every such row at once.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use super::{Variant, VariantKind, VetError};
use crate::data::LabelRow;
use crate::judge::anchors::consensus_index;
use crate::rubric::Rubric;

/// Probability rows may drift from 1 by rounding; beyond this they are rejected.
const SUM_TOLERANCE: f64 = 1e-3;

/// Human ratings of one criterion, item by item.
#[derive(Debug, Clone)]
pub(crate) struct CriterionLabels {
    /// Criterion key.
    pub key: String,
    /// Scale labels, lowest first.
    pub labels: Vec<String>,
    /// Numeric value of each label.
    pub values: Vec<f64>,
    /// Raters, sorted; `LabelledItem::ratings` is indexed the same way.
    pub raters: Vec<String>,
    /// Items sorted by (question, system).
    pub items: Vec<LabelledItem>,
}

impl CriterionLabels {
    /// Number of scale categories.
    pub fn k(&self) -> usize {
        self.labels.len()
    }
}

/// One (question, system) with its ratings on one criterion.
#[derive(Debug, Clone)]
pub(crate) struct LabelledItem {
    pub question_id: String,
    pub system: String,
    /// Scale position given by each rater (`None` = not rated).
    pub ratings: Vec<Option<usize>>,
    /// Lower-median position of the ratings.
    pub consensus: usize,
}

/// Groups label rows by criterion (rubric order) and item, checking every row.
pub(crate) fn group_labels(
    labels: &[LabelRow],
    rubric: &Rubric,
) -> Result<Vec<CriterionLabels>, VetError> {
    if labels.is_empty() {
        return Err(VetError::NoLabels);
    }
    let mut problems = Vec::new();
    type Grid<'a> = BTreeMap<(&'a str, &'a str), BTreeMap<&'a str, (usize, usize)>>;
    let mut by_criterion: HashMap<&str, Grid> = HashMap::new();
    for l in labels {
        let Some(c) = rubric.criterion(&l.criterion) else {
            let known: Vec<String> = rubric
                .criteria
                .iter()
                .map(|c| format!("`{}`", c.key))
                .collect();
            problems.push(format!(
                "line {}: criterion `{}` is not in the rubric (it has: {})",
                l.line,
                l.criterion,
                known.join(", ")
            ));
            continue;
        };
        let Some(pos) = c.scale.index_of(&l.score) else {
            problems.push(format!(
                "line {}: score `{}` is not on the scale of `{}` ({})",
                l.line,
                l.score,
                c.key,
                c.scale.labels().join(", ")
            ));
            continue;
        };
        let item = by_criterion
            .entry(c.key.as_str())
            .or_default()
            .entry((l.question_id.as_str(), l.system.as_str()))
            .or_default();
        if let Some((_, first)) = item.insert(l.rater.as_str(), (pos, l.line)) {
            problems.push(format!(
                "line {}: rater `{}` already scored `{}` of `{}` on `{}` (line {first})",
                l.line, l.rater, l.question_id, l.system, l.criterion
            ));
        }
    }
    if !problems.is_empty() {
        return Err(VetError::BadLabels { problems });
    }
    let mut out = Vec::new();
    for c in &rubric.criteria {
        let Some(grid) = by_criterion.get(c.key.as_str()) else {
            continue;
        };
        let raters: Vec<String> = grid
            .values()
            .flat_map(|r| r.keys().map(|s| s.to_string()))
            .collect::<BTreeSet<_>>()
            .into_iter()
            .collect();
        let items = grid
            .iter()
            .map(|((q, s), by_rater)| {
                let ratings: Vec<Option<usize>> = raters
                    .iter()
                    .map(|r| by_rater.get(r.as_str()).map(|&(p, _)| p))
                    .collect();
                let given: Vec<usize> = ratings.iter().flatten().copied().collect();
                LabelledItem {
                    question_id: q.to_string(),
                    system: s.to_string(),
                    consensus: consensus_index(&given)
                        .expect("every grouped item has at least one rating"),
                    ratings,
                }
            })
            .collect();
        out.push(CriterionLabels {
            key: c.key.clone(),
            labels: c.scale.labels(),
            values: c.scale.values(),
            raters,
            items,
        });
    }
    Ok(out)
}

/// What the judge said about one item on one criterion.
#[derive(Debug, Clone)]
pub(crate) struct JudgeValue {
    /// Scale position (none for baselines).
    pub category: Option<usize>,
    /// Continuous score used for correlations, MAE and bias.
    pub score: f64,
    /// Distribution over the scale, summing to 1 (none for baselines).
    pub probs: Option<Vec<f64>>,
}

/// One labelled item the judge also graded.
#[derive(Debug, Clone)]
pub(crate) struct Paired {
    /// Index into `CriterionLabels::items`.
    pub item: usize,
    /// The judge's verdict.
    pub judge: JudgeValue,
}

/// One variant's verdicts keyed by (criterion, question, system).
#[derive(Debug, Clone, Default)]
pub(crate) struct JudgeTable {
    values: BTreeMap<(String, String, String), JudgeValue>,
}

impl JudgeTable {
    /// Records graded on a criterion.
    pub fn count(&self, criterion: &str) -> usize {
        self.values.keys().filter(|k| k.0 == criterion).count()
    }

    /// Criteria with at least one record, sorted.
    pub fn criteria(&self) -> Vec<String> {
        let set: BTreeSet<&String> = self.values.keys().map(|k| &k.0).collect();
        set.into_iter().cloned().collect()
    }

    /// The labelled items of a criterion that this variant graded, in item order.
    pub fn pair_with(&self, lab: &CriterionLabels) -> Vec<Paired> {
        lab.items
            .iter()
            .enumerate()
            .filter_map(|(i, it)| {
                let key = (lab.key.clone(), it.question_id.clone(), it.system.clone());
                self.values.get(&key).map(|j| Paired {
                    item: i,
                    judge: j.clone(),
                })
            })
            .collect()
    }
}

/// Reads one variant's records against the rubric; every bad record is listed.
pub(crate) fn judge_table(v: &Variant, rubric: &Rubric) -> Result<JudgeTable, VetError> {
    let mut table = JudgeTable::default();
    let mut problems = Vec::new();
    for r in v.records {
        match judge_value(r, v.kind, rubric) {
            Ok(value) => {
                let key = (r.criterion.clone(), r.question_id.clone(), r.system.clone());
                if table.values.insert(key, value).is_some() {
                    problems.push(format!("`{}`: graded more than once", r.key()));
                }
            }
            Err(msg) => problems.push(format!("`{}`: {msg}", r.key())),
        }
    }
    if problems.is_empty() {
        Ok(table)
    } else {
        Err(VetError::BadRecords {
            variant: v.name.clone(),
            problems,
        })
    }
}

fn judge_value(
    r: &crate::judge::GradeRecord,
    kind: VariantKind,
    rubric: &Rubric,
) -> Result<JudgeValue, String> {
    let c = rubric
        .criterion(&r.criterion)
        .ok_or_else(|| format!("criterion `{}` is not in the rubric", r.criterion))?;
    if !r.expected.is_finite() {
        return Err(format!("score `{}` is not a finite number", r.expected));
    }
    if kind == VariantKind::Baseline {
        return Ok(JudgeValue {
            category: None,
            score: r.expected,
            probs: None,
        });
    }
    let labels = c.scale.labels();
    let values = c.scale.values();
    if r.labels != labels {
        return Err(format!(
            "labels [{}] differ from the rubric scale [{}]",
            r.labels.join(", "),
            labels.join(", ")
        ));
    }
    if r.probabilities.len() != labels.len()
        || r.probabilities
            .iter()
            .any(|p| !(p.is_finite() && *p >= 0.0))
    {
        return Err("probabilities must be one finite value >= 0 per scale label".into());
    }
    let total: f64 = r.probabilities.iter().sum();
    if (total - 1.0).abs() > SUM_TOLERANCE {
        return Err(format!("probabilities sum to {total}, not 1"));
    }
    // Rescale only real drift: dividing by a sum that is 1 up to rounding would move
    // equal confidences into different calibration bins.
    let probs: Vec<f64> = if (total - 1.0).abs() <= 1e-9 {
        r.probabilities.clone()
    } else {
        r.probabilities.iter().map(|p| p / total).collect()
    };
    let (category, score) = match kind {
        VariantKind::Argmax => {
            let i = c
                .scale
                .index_of(&r.argmax)
                .ok_or_else(|| format!("argmax `{}` is not on the scale", r.argmax))?;
            (i, values[i])
        }
        _ => (nearest_position(&values, r.expected), r.expected),
    };
    Ok(JudgeValue {
        category: Some(category),
        score,
        probs: Some(probs),
    })
}

/// Position of the scale value nearest to `x`; a value halfway between two goes down.
pub(crate) fn nearest_position(values: &[f64], x: f64) -> usize {
    let mut best = 0;
    for (i, v) in values.iter().enumerate() {
        // strict `<` keeps the lower position on an exact half
        if (v - x).abs() < (values[best] - x).abs() {
            best = i;
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Rounding rule stated in the module doc of `vet`: nearest scale value, halves down.
    #[test]
    fn expected_score_rounds_to_nearest_value_with_halves_going_down() {
        let v = [1.0, 2.0, 3.0, 4.0, 5.0];
        assert_eq!(nearest_position(&v, 3.08), 2);
        assert_eq!(nearest_position(&v, 4.21), 3);
        assert_eq!(nearest_position(&v, 2.5), 1);
        assert_eq!(nearest_position(&v, 2.51), 2);
        assert_eq!(nearest_position(&v, 0.2), 0);
        assert_eq!(nearest_position(&[0.0, 1.0], 0.7), 1);
    }
}
