//! Rubric stage: rubric files (TOML) into a checked `Rubric`, and grading forms
//! rendered from rubric + item through the minijinja templates in
//! `judge-templates/forms/`. Input: a rubric path and records. Output: `Rubric`,
//! `Form`s. Never runs the model and never reads human labels.

pub mod forms;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// A score scale a criterion can use.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Scale {
    /// Labels `1`..`5`.
    OneToFive,
    /// Labels `1`..`3`.
    OneToThree,
    /// Labels `0`..`10`.
    ZeroToTen,
    /// Labels `yes` (value 1) and `no` (value 0).
    YesNo,
}

impl Scale {
    /// Parse the rubric spelling (`1-5`, `1-3`, `0-10`, `yes-no`).
    pub fn parse(s: &str) -> Option<Scale> {
        match s.trim() {
            "1-5" => Some(Scale::OneToFive),
            "1-3" => Some(Scale::OneToThree),
            "0-10" => Some(Scale::ZeroToTen),
            "yes-no" => Some(Scale::YesNo),
            _ => None,
        }
    }

    /// The rubric spelling.
    pub fn name(&self) -> &'static str {
        match self {
            Scale::OneToFive => "1-5",
            Scale::OneToThree => "1-3",
            Scale::ZeroToTen => "0-10",
            Scale::YesNo => "yes-no",
        }
    }

    /// Labels in scale order (lowest value first).
    pub fn labels(&self) -> Vec<String> {
        match self {
            Scale::OneToFive => (1..=5).map(|i| i.to_string()).collect(),
            Scale::OneToThree => (1..=3).map(|i| i.to_string()).collect(),
            Scale::ZeroToTen => (0..=10).map(|i| i.to_string()).collect(),
            Scale::YesNo => vec!["no".into(), "yes".into()],
        }
    }

    /// Numeric values of the labels, in the same order.
    pub fn values(&self) -> Vec<f64> {
        match self {
            Scale::YesNo => vec![0.0, 1.0],
            _ => self
                .labels()
                .iter()
                .map(|l| l.parse::<f64>().expect("numeric scale labels are integers"))
                .collect(),
        }
    }

    /// Position of a label on the scale.
    pub fn index_of(&self, label: &str) -> Option<usize> {
        self.labels().iter().position(|l| l == label.trim())
    }
}

/// Item fields a criterion's form needs.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
pub enum Need {
    /// The reference answer.
    Reference,
    /// The source text.
    Context,
}

/// One criterion of a rubric.
#[derive(Debug, Clone, Serialize)]
pub struct Criterion {
    /// Short key used in files and output (e.g. `correctness`).
    pub key: String,
    /// Human title.
    pub title: String,
    /// The question put to the judge.
    pub question: String,
    /// The score scale.
    pub scale: Scale,
    /// Item fields the form needs.
    pub needs: Vec<Need>,
    /// Evaluation steps shown in reasoning mode.
    pub steps: Vec<String>,
    /// Description of each scale point, in scale order: (label, text).
    pub points: Vec<(String, String)>,
}

/// A checked rubric.
#[derive(Debug, Clone, Serialize)]
pub struct Rubric {
    /// Rubric name.
    pub name: String,
    /// One-line description.
    pub description: String,
    /// Criteria in file order.
    pub criteria: Vec<Criterion>,
    /// Where it was read from.
    pub path: PathBuf,
    /// SHA-256 of the file text, for run manifests.
    pub sha256: String,
    /// The file text, recorded in run manifests.
    #[serde(skip)]
    pub text: String,
}

impl Rubric {
    /// The criterion with this key.
    pub fn criterion(&self, key: &str) -> Option<&Criterion> {
        self.criteria.iter().find(|c| c.key == key)
    }

    /// Keep only the named criteria (in the given order); unknown keys are an error.
    pub fn select(&mut self, keys: &[String]) -> Result<(), RubricError> {
        let mut picked = Vec::new();
        for k in keys {
            match self.criterion(k) {
                Some(c) => picked.push(c.clone()),
                None => {
                    return Err(RubricError::UnknownCriterion {
                        path: self.path.clone(),
                        key: k.clone(),
                        known: self.criteria.iter().map(|c| c.key.clone()).collect(),
                    })
                }
            }
        }
        self.criteria = picked;
        Ok(())
    }

    /// Every need of any criterion: the shared part of a form shows these fields.
    pub fn all_needs(&self) -> Vec<Need> {
        let mut v: Vec<Need> = self.criteria.iter().flat_map(|c| c.needs.clone()).collect();
        v.sort();
        v.dedup();
        v
    }
}

/// One problem in a rubric file, at a line.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RubricProblem {
    /// 1-based line (0 when unknown).
    pub line: usize,
    /// What is wrong.
    pub message: String,
}

/// Why a rubric could not be used.
#[derive(Debug, thiserror::Error)]
pub enum RubricError {
    /// The file could not be read.
    #[error("cannot read rubric `{path}`")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// The file has problems; all are listed.
    #[error("rubric `{path}` has {} problem(s):\n{}", problems.len(), problems.iter().map(|p| format!("    line {}: {}", p.line, p.message)).collect::<Vec<_>>().join("\n"))]
    Invalid {
        path: PathBuf,
        problems: Vec<RubricProblem>,
    },
    /// A criterion key asked for is not in the rubric.
    #[error("rubric `{path}` has no criterion `{key}` (it has: {})", known.join(", "))]
    UnknownCriterion {
        path: PathBuf,
        key: String,
        known: Vec<String>,
    },
    /// A form template failed to parse or render.
    #[error("form template `{name}` failed")]
    Template {
        name: String,
        #[source]
        source: minijinja::Error,
    },
    /// An item lacks a field a criterion needs.
    #[error("{item}: criterion `{criterion}` needs the `{field}` field, which this answer lacks")]
    MissingField {
        item: String,
        criterion: String,
        field: &'static str,
    },
}

/// The fix line for a rubric error, when one is known.
pub fn fix_for(err: &(dyn std::error::Error + 'static)) -> Option<String> {
    let e = err.downcast_ref::<RubricError>()?;
    Some(match e {
        RubricError::Io { .. } => {
            "check the path; bundled rubrics are in judge-templates/rubrics/".into()
        }
        RubricError::Invalid { .. } => {
            "fix the listed lines; the rubric format is described in the README (Formats)".into()
        }
        RubricError::UnknownCriterion { .. } => "use one of the listed criterion keys".into(),
        RubricError::Template { .. } => "check the template syntax (minijinja, Jinja2-like)".into(),
        RubricError::MissingField { field, .. } => format!(
            "add `{field}` to the answers file, or leave that criterion out with `--criteria`"
        ),
    })
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRubric {
    name: String,
    #[serde(default)]
    description: String,
    #[serde(default)]
    criterion: Vec<toml::Spanned<RawCriterion>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCriterion {
    key: String,
    title: Option<String>,
    question: String,
    scale: toml::Spanned<String>,
    #[serde(default)]
    needs: Vec<toml::Spanned<String>>,
    #[serde(default)]
    steps: Vec<String>,
    #[serde(default)]
    points: BTreeMap<String, String>,
}

fn line_of(text: &str, offset: usize) -> usize {
    text[..offset.min(text.len())].matches('\n').count() + 1
}

/// Read and check a rubric file; every problem is reported at once.
pub fn load_rubric(path: &Path) -> Result<Rubric, RubricError> {
    let text = std::fs::read_to_string(path).map_err(|source| RubricError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    parse_rubric(path, &text)
}

/// Parse rubric text (the path is only used in messages).
pub fn parse_rubric(path: &Path, text: &str) -> Result<Rubric, RubricError> {
    use sha2::Digest;
    let invalid = |problems| RubricError::Invalid {
        path: path.to_path_buf(),
        problems,
    };
    let raw: RawRubric = toml::from_str(text).map_err(|e| {
        let line = e.span().map_or(0, |s| line_of(text, s.start));
        invalid(vec![RubricProblem {
            line,
            message: e.message().trim().to_string(),
        }])
    })?;
    let mut problems = Vec::new();
    let mut criteria = Vec::new();
    let mut keys = std::collections::HashSet::new();
    if raw.criterion.is_empty() {
        problems.push(RubricProblem {
            line: 1,
            message: "no `[[criterion]]` tables".into(),
        });
    }
    for spanned in raw.criterion {
        let line = line_of(text, spanned.span().start);
        let c = spanned.into_inner();
        let mut bad =
            |message: String, at: usize| problems.push(RubricProblem { line: at, message });
        if c.key.trim().is_empty()
            || !c
                .key
                .chars()
                .all(|ch| ch.is_ascii_alphanumeric() || ch == '-' || ch == '_')
        {
            bad(
                format!(
                    "criterion key `{}` must be letters, digits, `-` or `_`",
                    c.key
                ),
                line,
            );
        }
        if !keys.insert(c.key.clone()) {
            bad(format!("criterion key `{}` appears twice", c.key), line);
        }
        let scale_line = line_of(text, c.scale.span().start);
        let Some(scale) = Scale::parse(c.scale.get_ref()) else {
            bad(
                format!(
                    "criterion `{}`: unknown scale `{}` (use `1-5`, `1-3`, `0-10` or `yes-no`)",
                    c.key,
                    c.scale.get_ref()
                ),
                scale_line,
            );
            continue;
        };
        let mut needs = Vec::new();
        for n in &c.needs {
            match n.get_ref().as_str() {
                "reference" => needs.push(Need::Reference),
                "context" => needs.push(Need::Context),
                other => bad(
                    format!(
                        "criterion `{}`: unknown need `{other}` (use `reference` or `context`)",
                        c.key
                    ),
                    line_of(text, n.span().start),
                ),
            }
        }
        let labels = scale.labels();
        let mut points = Vec::new();
        for l in &labels {
            match c.points.get(l) {
                Some(t) => points.push((l.clone(), t.clone())),
                None => bad(
                    format!(
                        "criterion `{}`: no description for scale point `{l}`",
                        c.key
                    ),
                    line,
                ),
            }
        }
        for k in c.points.keys() {
            if !labels.contains(k) {
                bad(
                    format!(
                        "criterion `{}`: point `{k}` is not on scale `{}`",
                        c.key,
                        scale.name()
                    ),
                    line,
                );
            }
        }
        if c.question.trim().is_empty() {
            bad(format!("criterion `{}`: empty `question`", c.key), line);
        }
        criteria.push(Criterion {
            title: c.title.unwrap_or_else(|| c.key.clone()),
            key: c.key,
            question: c.question,
            scale,
            needs,
            steps: c.steps,
            points,
        });
    }
    if !problems.is_empty() {
        return Err(invalid(problems));
    }
    Ok(Rubric {
        name: raw.name,
        description: raw.description,
        criteria,
        path: path.to_path_buf(),
        sha256: format!("{:x}", sha2::Sha256::digest(text.as_bytes())),
        text: text.to_string(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
name = "t"
[[criterion]]
key = "ok"
question = "Is it ok?"
scale = "yes-no"
[criterion.points]
"yes" = "fine"
"no" = "not fine"
"#;

    #[test]
    fn valid_rubric_parses_with_points_in_scale_order() {
        let r = parse_rubric(Path::new("r.toml"), GOOD).expect("valid");
        assert_eq!(r.criteria[0].points[0].0, "no");
        assert_eq!(r.criteria[0].scale.values(), vec![0.0, 1.0]);
    }

    #[test]
    fn bad_scale_and_missing_points_are_all_reported_with_lines() {
        let text = r#"name = "t"
[[criterion]]
key = "a"
question = "Q"
scale = "1-7"

[[criterion]]
key = "b"
question = "Q"
scale = "1-3"
needs = ["sources"]
[criterion.points]
"1" = "x"
"2" = "y"
"#;
        let err = parse_rubric(Path::new("r.toml"), text).expect_err("invalid");
        let RubricError::Invalid { problems, .. } = &err else {
            panic!("{err}")
        };
        assert_eq!(problems.len(), 3, "{err}");
        assert_eq!(problems[0].line, 5);
        assert!(problems[0].message.contains("unknown scale `1-7`"));
        assert_eq!(problems[1].line, 11);
        assert!(problems[2]
            .message
            .contains("no description for scale point `3`"));
    }

    #[test]
    fn unknown_key_in_rubric_is_a_line_error() {
        let text = "name = \"t\"\ncolour = 3\n";
        let err = parse_rubric(Path::new("r.toml"), text).expect_err("invalid");
        assert!(err.to_string().contains("line 2"), "{err}");
    }

    #[test]
    fn bundled_rubrics_are_valid() {
        for name in ["support", "quick"] {
            let p = Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("judge-templates/rubrics")
                .join(format!("{name}.toml"));
            load_rubric(&p).unwrap_or_else(|e| panic!("{name}: {e}"));
        }
    }
}
