//! Answers to grade: one record per (question, system). Input: a JSONL or CSV file
//! with fields `question_id`, `system`, `question`, `answer`, and optional `context`,
//! `reference`, `written_by`. Output: validated records in file order. Never
//! reorders or drops a record silently.

use std::collections::HashMap;
use std::path::Path;

use serde::{Deserialize, Serialize};

use super::table::{finish, parse_rows, read_rows, Row};
use super::{DataError, LineProblem};

/// One answer to grade.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AnswerRecord {
    /// Identifier of the question; answers of different systems share it.
    pub question_id: String,
    /// The system (prompt version, model, pipeline) that produced the answer.
    pub system: String,
    /// The question or task as the system saw it.
    pub question: String,
    /// The answer to grade.
    pub answer: String,
    /// Source text the answer should rely on (for faithfulness).
    pub context: Option<String>,
    /// A known-good reference answer (for correctness).
    pub reference: Option<String>,
    /// The model that wrote the answer (for self-preference probes).
    pub written_by: Option<String>,
    /// 1-based line in the input file.
    #[serde(skip)]
    pub line: usize,
}

impl AnswerRecord {
    /// The item id used in runs and messages: `question_id/system`.
    pub fn item_id(&self) -> String {
        format!("{}/{}", self.question_id, self.system)
    }
}

const KIND: &str = "answers";

/// Read and validate an answers file; every bad line is reported at once.
pub fn read_answers(path: &Path) -> Result<Vec<AnswerRecord>, DataError> {
    answers_from(path, read_rows(KIND, path)?)
}

/// Validate an answers file's bytes (the path gives the format and names the file).
pub fn parse_answers(path: &Path, bytes: &[u8]) -> Result<Vec<AnswerRecord>, DataError> {
    answers_from(path, parse_rows(KIND, path, bytes)?)
}

fn answers_from(
    path: &Path,
    (rows, mut problems): (Vec<Row>, Vec<LineProblem>),
) -> Result<Vec<AnswerRecord>, DataError> {
    let mut records = Vec::with_capacity(rows.len());
    let mut seen: HashMap<(String, String), usize> = HashMap::new();
    for row in rows {
        let mut missing = Vec::new();
        let mut get = |name: &str| match row.required(name) {
            Ok(v) => v,
            Err(m) => {
                missing.push(m);
                String::new()
            }
        };
        let rec = AnswerRecord {
            question_id: get("question_id"),
            system: get("system"),
            question: get("question"),
            answer: get("answer"),
            context: row.optional("context"),
            reference: row.optional("reference"),
            written_by: row.optional("written_by"),
            line: row.line,
        };
        if !missing.is_empty() {
            problems.push(LineProblem {
                line: row.line,
                message: missing.join("; "),
            });
            continue;
        }
        let key = (rec.question_id.clone(), rec.system.clone());
        if let Some(first) = seen.get(&key) {
            problems.push(LineProblem {
                line: row.line,
                message: format!(
                    "question `{}` of system `{}` already appears on line {first}",
                    rec.question_id, rec.system
                ),
            });
            continue;
        }
        seen.insert(key, row.line);
        records.push(rec);
    }
    finish(KIND, path, records, problems)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Write;

    fn write(name: &str, text: &str) -> (tempfile::TempDir, std::path::PathBuf) {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join(name);
        std::fs::File::create(&path)
            .and_then(|mut f| f.write_all(text.as_bytes()))
            .expect("write");
        (dir, path)
    }

    #[test]
    fn every_malformed_jsonl_line_is_reported_with_its_number() {
        let (_d, p) = write(
            "a.jsonl",
            concat!(
                r#"{"question_id":"q1","system":"s","question":"Q","answer":"A"}"#,
                "\n",
                r#"{"question_id":"q2","system":"s","question":"Q"}"#,
                "\n",
                "not json\n",
                r#"{"question_id":"q1","system":"s","question":"Q","answer":"B"}"#,
                "\n"
            ),
        );
        let err = read_answers(&p).expect_err("bad file");
        let DataError::BadLines { problems, .. } = &err else {
            panic!("wrong error {err}")
        };
        let lines: Vec<usize> = problems.iter().map(|p| p.line).collect();
        assert_eq!(lines, vec![2, 3, 4]);
        assert!(problems[0].message.contains("missing field `answer`"));
        assert!(problems[2].message.contains("already appears on line 1"));
    }

    #[test]
    fn csv_answers_read_with_optional_fields() {
        let (_d, p) = write(
            "a.csv",
            "question_id,system,question,answer,reference\nq1,s,\"Q, with comma\",A,R\nq2,s,Q2,A2,\n",
        );
        let recs = read_answers(&p).expect("valid");
        assert_eq!(recs.len(), 2);
        assert_eq!(recs[0].question, "Q, with comma");
        assert_eq!(recs[0].reference.as_deref(), Some("R"));
        assert_eq!(recs[1].reference, None);
        assert_eq!(recs[1].line, 3);
    }

    #[test]
    fn csv_row_with_wrong_field_count_names_its_line() {
        let (_d, p) = write("a.csv", "question_id,system,question,answer\nq1,s,Q\n");
        let err = read_answers(&p).expect_err("bad");
        assert!(
            err.to_string()
                .contains("line 2: has 3 fields, the header has 4"),
            "{err}"
        );
    }
}
