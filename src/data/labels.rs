//! Human gold labels: pointwise scores in long form (`question_id`, `system`,
//! `criterion`, `rater`, `score`) and pairwise preferences (`question_id`,
//! `system_a`, `system_b`, `rater`, `preferred` = a system name or `tie`).
//! Input: JSONL or CSV. Output: rows, checked for shape here and against the answers
//! and rubric by `read_labels_checked`, in one pass. Never guesses a missing value.

use std::collections::{HashMap, HashSet};
use std::path::Path;

use serde::Serialize;

use super::table::{finish, parse_rows, read_rows, Row};
use super::{AnswerRecord, DataError, LineProblem};

/// One human score.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LabelRow {
    /// Question id.
    pub question_id: String,
    /// System whose answer was rated.
    pub system: String,
    /// Criterion key of the rubric.
    pub criterion: String,
    /// Who rated.
    pub rater: String,
    /// The score label as written (e.g. `4`, `yes`).
    pub score: String,
    /// 1-based line in the file.
    #[serde(skip)]
    pub line: usize,
}

/// One human pairwise preference.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PreferenceRow {
    /// Question id.
    pub question_id: String,
    /// First system as listed.
    pub system_a: String,
    /// Second system as listed.
    pub system_b: String,
    /// Who judged.
    pub rater: String,
    /// The preferred system's name, or `None` for a tie.
    pub preferred: Option<String>,
    /// 1-based line in the file.
    #[serde(skip)]
    pub line: usize,
}

fn collect<T>(
    kind: &'static str,
    path: &Path,
    (rows, mut problems): (Vec<Row>, Vec<LineProblem>),
    mut make: impl FnMut(&Row) -> Result<T, String>,
) -> Result<Vec<T>, DataError> {
    let mut out = Vec::with_capacity(rows.len());
    for row in &rows {
        match make(row) {
            Ok(v) => out.push(v),
            Err(message) => problems.push(LineProblem {
                line: row.line,
                message,
            }),
        }
    }
    finish(kind, path, out, problems)
}

fn fields<const N: usize>(row: &Row, names: [&str; N]) -> Result<[String; N], String> {
    let mut errs = Vec::new();
    let vals = names.map(|n| {
        row.required(n).unwrap_or_else(|e| {
            errs.push(e);
            String::new()
        })
    });
    if errs.is_empty() {
        Ok(vals)
    } else {
        Err(errs.join("; "))
    }
}

const LABELS: &str = "human labels";

/// Read human scores in long form.
pub fn read_labels(path: &Path) -> Result<Vec<LabelRow>, DataError> {
    labels_from(path, read_rows(LABELS, path)?)
}

/// Human scores from a labels file's bytes (the path gives the format).
pub fn parse_labels(path: &Path, bytes: &[u8]) -> Result<Vec<LabelRow>, DataError> {
    labels_from(path, parse_rows(LABELS, path, bytes)?)
}

fn labels_from(
    path: &Path,
    rows: (Vec<Row>, Vec<LineProblem>),
) -> Result<Vec<LabelRow>, DataError> {
    collect(LABELS, path, rows, |row| {
        let [question_id, system, criterion, rater, score] = fields(
            row,
            ["question_id", "system", "criterion", "rater", "score"],
        )?;
        Ok(LabelRow {
            question_id,
            system,
            criterion,
            rater,
            score: score.trim().to_string(),
            line: row.line,
        })
    })
}

/// Read human pairwise preferences.
pub fn read_preferences(path: &Path) -> Result<Vec<PreferenceRow>, DataError> {
    const KIND: &str = "human preferences";
    let rows = read_rows(KIND, path)?;
    collect(KIND, path, rows, |row| {
        let [question_id, system_a, system_b, rater, preferred] = fields(
            row,
            ["question_id", "system_a", "system_b", "rater", "preferred"],
        )?;
        if system_a == system_b {
            return Err(format!("`system_a` and `system_b` are both `{system_a}`"));
        }
        let preferred = match preferred.trim() {
            "tie" => None,
            p if p == system_a || p == system_b => Some(p.to_string()),
            p => {
                return Err(format!(
                    "`preferred` is `{p}`; expected `{system_a}`, `{system_b}` or `tie`"
                ))
            }
        };
        Ok(PreferenceRow {
            question_id,
            system_a,
            system_b,
            rater,
            preferred,
            line: row.line,
        })
    })
}

/// What to do with a label whose criterion the rubric lacks.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OtherCriteria {
    /// Report it as a bad line (vetting: every label should belong to the rubric).
    Refuse,
    /// Leave it out unchecked (few-shot anchors drawn from a file made for another rubric).
    Skip,
}

/// Read human scores and check them against the rubric's scales, and against the
/// answers when given, in one pass: a line's missing fields, unknown item, unknown
/// criterion, off-scale score and repeated rating are reported together, and every
/// bad line of the file in the same error.
pub fn read_labels_checked(
    path: &Path,
    scales: &HashMap<String, Vec<String>>,
    answers: Option<&[AnswerRecord]>,
    other: OtherCriteria,
) -> Result<Vec<LabelRow>, DataError> {
    const KIND: &str = "human labels";
    let (rows, mut problems) = read_rows(KIND, path)?;
    let mut checker = LabelChecker::new(answers, scales);
    let mut out = Vec::with_capacity(rows.len());
    for row in &rows {
        let mut msgs = Vec::new();
        let mut get = |name: &str| {
            row.required(name).unwrap_or_else(|m| {
                msgs.push(m);
                String::new()
            })
        };
        let label = LabelRow {
            question_id: get("question_id"),
            system: get("system"),
            criterion: get("criterion"),
            rater: get("rater"),
            score: get("score").trim().to_string(),
            line: row.line,
        };
        let foreign = !label.criterion.is_empty() && !scales.contains_key(&label.criterion);
        if foreign && other == OtherCriteria::Skip {
            continue;
        }
        msgs.extend(checker.messages(&label));
        if msgs.is_empty() {
            out.push(label);
        } else {
            problems.push(LineProblem {
                line: row.line,
                message: msgs.join("; "),
            });
        }
    }
    finish(KIND, path, out, problems)
}

/// The checks of one label against answers and scales; fields left empty by a
/// shape error are not checked again.
struct LabelChecker<'a> {
    items: Option<HashSet<(&'a str, &'a str)>>,
    scales: &'a HashMap<String, Vec<String>>,
    seen: HashMap<[String; 4], usize>,
}

impl<'a> LabelChecker<'a> {
    fn new(answers: Option<&'a [AnswerRecord]>, scales: &'a HashMap<String, Vec<String>>) -> Self {
        LabelChecker {
            items: answers.map(|a| {
                a.iter()
                    .map(|a| (a.question_id.as_str(), a.system.as_str()))
                    .collect()
            }),
            scales,
            seen: HashMap::new(),
        }
    }

    fn messages(&mut self, l: &LabelRow) -> Vec<String> {
        let mut msgs = Vec::new();
        let both = !l.question_id.is_empty() && !l.system.is_empty();
        if let Some(items) = &self.items {
            if both && !items.contains(&(l.question_id.as_str(), l.system.as_str())) {
                msgs.push(format!(
                    "no answer of system `{}` to question `{}` in the answers file",
                    l.system, l.question_id
                ));
            }
        }
        match self.scales.get(&l.criterion) {
            None if !l.criterion.is_empty() => {
                let mut known: Vec<&String> = self.scales.keys().collect();
                known.sort();
                let known: Vec<String> = known.iter().map(|k| format!("`{k}`")).collect();
                msgs.push(format!(
                    "unknown criterion `{}` (the rubric has: {})",
                    l.criterion,
                    known.join(", ")
                ));
            }
            Some(allowed) if !l.score.is_empty() && !allowed.contains(&l.score) => {
                msgs.push(format!(
                    "score `{}` is not on the scale of `{}` ({})",
                    l.score,
                    l.criterion,
                    allowed.join(", ")
                ))
            }
            _ => {}
        }
        let key = [
            l.question_id.clone(),
            l.system.clone(),
            l.criterion.clone(),
            l.rater.clone(),
        ];
        if key.iter().all(|k| !k.is_empty()) {
            if let Some(first) = self.seen.insert(key, l.line) {
                msgs.push(format!(
                    "the same rater already scored this on line {first}"
                ));
            }
        }
        msgs
    }
}
