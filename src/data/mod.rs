//! Data stage: answers, human labels and human preferences from JSONL or CSV files
//! into typed, validated records. Input: file paths. Output: `Vec`s of records, or a
//! `DataError` listing every bad line of the file in one pass. Never looks at the
//! rubric or the model; cross-checks against a rubric live in `labels`.

pub mod answers;
pub mod labels;
pub mod table;

pub use answers::{parse_answers, read_answers, AnswerRecord};
pub use labels::{
    parse_labels, read_labels, read_labels_checked, read_preferences, LabelRow, OtherCriteria,
    PreferenceRow,
};

use std::fmt;
use std::path::PathBuf;

/// One problem on one line (1-based; the CSV header is line 1).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LineProblem {
    /// Line number, 1-based.
    pub line: usize,
    /// What is wrong on that line.
    pub message: String,
}

impl fmt::Display for LineProblem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "line {}: {}", self.line, self.message)
    }
}

/// Why an input file could not be used.
#[derive(Debug, thiserror::Error)]
pub enum DataError {
    /// The file could not be read.
    #[error("cannot read {kind} `{path}`")]
    Io {
        kind: &'static str,
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// The extension does not say whether it is JSONL or CSV.
    #[error("cannot tell the format of {kind} `{path}` from its extension")]
    UnknownFormat { kind: &'static str, path: PathBuf },
    /// One or more lines are malformed; all of them are listed.
    #[error("{kind} `{path}` has {} bad line(s):\n{}", problems.len(), list(problems))]
    BadLines {
        kind: &'static str,
        path: PathBuf,
        problems: Vec<LineProblem>,
    },
    /// The file holds no records.
    #[error("{kind} `{path}` holds no records")]
    Empty { kind: &'static str, path: PathBuf },
}

/// Problems as an indented list for an error message: the first 25, then a count.
pub fn list<T: fmt::Display>(problems: &[T]) -> String {
    const SHOWN: usize = 25;
    let mut s: Vec<String> = problems
        .iter()
        .take(SHOWN)
        .map(|p| format!("    {p}"))
        .collect();
    if problems.len() > SHOWN {
        s.push(format!("    ... and {} more", problems.len() - SHOWN));
    }
    s.join("\n")
}

/// The fix line for a data error, when one is known.
pub fn fix_for(err: &(dyn std::error::Error + 'static)) -> Option<String> {
    let e = err.downcast_ref::<DataError>()?;
    Some(match e {
        DataError::Io { .. } => "check the path and permissions".into(),
        DataError::UnknownFormat { .. } => "name the file `*.jsonl` or `*.csv`".into(),
        DataError::Empty { .. } => "the file needs at least one record".into(),
        DataError::BadLines { kind, .. } => format!(
            "fix the listed lines; the fields of {kind} are described in demo-data/README.md and the README's Formats section"
        ),
    })
}
