//! Human gold labels: pointwise scores in long form (`question_id`, `system`,
//! `criterion`, `rater`, `score`) and pairwise preferences (`question_id`,
//! `system_a`, `system_b`, `rater`, `preferred` = a system name or `tie`).
//! Input: JSONL or CSV. Output: rows, checked for shape here and against the answers
//! and rubric by `check_labels`. Never guesses a missing value.

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

/// Check labels against the answers and the declared criteria and scales: unknown
/// items, unknown criteria and values off the scale are all reported in one error.
/// `scales` maps a criterion key to its allowed labels.
pub fn check_labels(
    path: &Path,
    labels: &[LabelRow],
    answers: &[AnswerRecord],
    scales: &HashMap<String, Vec<String>>,
) -> Result<(), DataError> {
    let items: HashSet<(&str, &str)> = answers
        .iter()
        .map(|a| (a.question_id.as_str(), a.system.as_str()))
        .collect();
    let mut seen: HashMap<(&str, &str, &str, &str), usize> = HashMap::new();
    let mut problems = Vec::new();
    for l in labels {
        let mut msgs = Vec::new();
        if !items.contains(&(l.question_id.as_str(), l.system.as_str())) {
            msgs.push(format!(
                "no answer of system `{}` to question `{}` in the answers file",
                l.system, l.question_id
            ));
        }
        match scales.get(&l.criterion) {
            None => {
                let mut known: Vec<&String> = scales.keys().collect();
                known.sort();
                msgs.push(format!(
                    "unknown criterion `{}` (the rubric has: {})",
                    l.criterion,
                    known
                        .iter()
                        .map(|k| format!("`{k}`"))
                        .collect::<Vec<_>>()
                        .join(", ")
                ));
            }
            Some(allowed) if !allowed.contains(&l.score) => msgs.push(format!(
                "score `{}` is not on the scale of `{}` ({})",
                l.score,
                l.criterion,
                allowed.join(", ")
            )),
            Some(_) => {}
        }
        let key = (
            l.question_id.as_str(),
            l.system.as_str(),
            l.criterion.as_str(),
            l.rater.as_str(),
        );
        if let Some(first) = seen.insert(key, l.line) {
            msgs.push(format!(
                "the same rater already scored this on line {first}"
            ));
        }
        if !msgs.is_empty() {
            problems.push(LineProblem {
                line: l.line,
                message: msgs.join("; "),
            });
        }
    }
    if problems.is_empty() {
        Ok(())
    } else {
        Err(DataError::BadLines {
            kind: "human labels",
            path: path.to_path_buf(),
            problems,
        })
    }
}
