//! Rubric stage: rubric files (TOML) into a checked `Rubric`, and grading forms
//! rendered from rubric + item through the minijinja templates in
//! `judge-templates/forms/`. Input: a rubric path and records. Output: `Rubric`,
//! `Form`s. Never runs the model and never reads human labels.

mod check;
pub mod forms;

use std::path::{Path, PathBuf};

use serde::Serialize;

/// A score scale a criterion can use.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scale {
    /// Integer labels `low`..=`high`, 2 to 11 points (`1-5`, `1-7`, `0-10`, ...).
    Points {
        /// Lowest label.
        low: u32,
        /// Highest label.
        high: u32,
    },
    /// Labels `yes` (value 1) and `no` (value 0).
    YesNo,
}

/// Fewest and most points an integer scale may have.
pub const SCALE_POINTS: std::ops::RangeInclusive<u32> = 2..=11;

impl Scale {
    /// Integer labels `low`..=`high`.
    pub const fn points(low: u32, high: u32) -> Scale {
        Scale::Points { low, high }
    }

    /// Parse the rubric spelling: `A-B` with whole numbers `A < B` and 2 to 11
    /// points, or `yes-no`.
    pub fn parse(s: &str) -> Option<Scale> {
        let s = s.trim();
        if s == "yes-no" {
            return Some(Scale::YesNo);
        }
        let (a, b) = s.split_once('-')?;
        let digits =
            |t: &str| !t.is_empty() && t.len() <= 3 && t.bytes().all(|c| c.is_ascii_digit());
        if !digits(a) || !digits(b) {
            return None;
        }
        let (low, high): (u32, u32) = (a.parse().ok()?, b.parse().ok()?);
        let points = high.checked_sub(low)? + 1;
        SCALE_POINTS
            .contains(&points)
            .then_some(Scale::Points { low, high })
    }

    /// The rubric spelling.
    pub fn name(&self) -> String {
        match self {
            Scale::Points { low, high } => format!("{low}-{high}"),
            Scale::YesNo => "yes-no".into(),
        }
    }

    /// Labels in scale order (lowest value first).
    pub fn labels(&self) -> Vec<String> {
        match self {
            Scale::Points { low, high } => (*low..=*high).map(|i| i.to_string()).collect(),
            Scale::YesNo => vec!["no".into(), "yes".into()],
        }
    }

    /// Numeric values of the labels, in the same order.
    pub fn values(&self) -> Vec<f64> {
        match self {
            Scale::Points { low, high } => (*low..=*high).map(f64::from).collect(),
            Scale::YesNo => vec![0.0, 1.0],
        }
    }

    /// Position of a label on the scale.
    pub fn index_of(&self, label: &str) -> Option<usize> {
        self.labels().iter().position(|l| l == label.trim())
    }
}

impl Serialize for Scale {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&self.name())
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

    /// Each criterion's key with its labels in scale order, for checking human labels.
    pub fn scales(&self) -> std::collections::HashMap<String, Vec<String>> {
        self.criteria
            .iter()
            .map(|c| (c.key.clone(), c.scale.labels()))
            .collect()
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
    /// A form template file cannot be read.
    #[error("cannot read form template `{path}`")]
    TemplateFile {
        path: PathBuf,
        #[source]
        source: std::io::Error,
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
        RubricError::Io { .. } => format!(
            "check the path, or name a bundled rubric: {}",
            bundled_names()
        ),
        RubricError::Invalid { .. } => {
            "fix the listed lines; the rubric format is described in the README (Formats)".into()
        }
        RubricError::UnknownCriterion { .. } => "use one of the listed criterion keys".into(),
        RubricError::TemplateFile { .. } => "a templates folder needs `system.j2`, `grade.j2` and `pair.j2`; copy the missing one from judge-templates/forms/".into(),
        RubricError::Template { source, .. } if source.kind() == minijinja::ErrorKind::OutOfFuel => {
            "the template runs too long (a loop over too many items?); simplify it".into()
        }
        RubricError::Template { .. } => "check the template syntax (minijinja, Jinja2-like)".into(),
        RubricError::MissingField { field, .. } => format!(
            "add `{field}` to the answers file, or leave that criterion out with `--criteria`"
        ),
    })
}

/// Rubrics built into the binary: (name, TOML text). Their sources are
/// `judge-templates/rubrics/NAME.toml`.
pub const BUNDLED: &[(&str, &str)] = &[
    (
        "support",
        include_str!("../../judge-templates/rubrics/support.toml"),
    ),
    (
        "quick",
        include_str!("../../judge-templates/rubrics/quick.toml"),
    ),
];

/// The bundled rubric names, as `support`, `quick` for messages.
pub fn bundled_names() -> String {
    BUNDLED
        .iter()
        .map(|(n, _)| format!("`{n}`"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The text of a bundled rubric when `spec` is one's bare name (no folder, no
/// extension). A file of that name in the current folder is not consulted: a bare
/// name always means the built-in rubric, so a command means the same in any folder.
pub fn bundled_text(spec: &Path) -> Option<&'static str> {
    let name = spec.to_str()?;
    BUNDLED.iter().find(|(n, _)| *n == name).map(|(_, t)| *t)
}

/// Read and check a rubric: a bundled one by name (`support`), else a TOML file.
/// Every problem is reported at once.
pub fn load_rubric(path: &Path) -> Result<Rubric, RubricError> {
    if let Some(text) = bundled_text(path) {
        return parse_rubric(path, text);
    }
    let bytes = std::fs::read(path).map_err(|source| RubricError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    parse_rubric_bytes(path, &bytes)
}

/// Check a rubric file's bytes: a UTF-8 byte-order mark is skipped, lines that are
/// not UTF-8 are problems with their line numbers.
pub fn parse_rubric_bytes(path: &Path, bytes: &[u8]) -> Result<Rubric, RubricError> {
    let (text, encoding) = crate::data::table::decode_text(bytes);
    if !encoding.is_empty() {
        return Err(RubricError::Invalid {
            path: path.to_path_buf(),
            problems: encoding
                .into_iter()
                .map(|p| RubricProblem {
                    line: p.line,
                    message: p.message,
                })
                .collect(),
        });
    }
    parse_rubric(path, &text)
}

/// Parse rubric text (the path is only used in messages); every problem is
/// reported at once, TOML syntax errors included (see `check`).
pub fn parse_rubric(path: &Path, text: &str) -> Result<Rubric, RubricError> {
    use sha2::Digest;
    let checked = check::check(text).map_err(|problems| RubricError::Invalid {
        path: path.to_path_buf(),
        problems,
    })?;
    Ok(Rubric {
        name: checked.name,
        description: checked.description,
        criteria: checked.criteria,
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
scale = "1-12"

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
        assert!(problems[0].message.contains("unknown scale `1-12`"));
        assert_eq!(problems[1].line, 7);
        assert!(problems[1]
            .message
            .contains("no description for scale point `3`"));
        assert_eq!(problems[2].line, 11);
        assert!(problems[2].message.contains("unknown need `sources`"));
    }

    fn problems_of(text: &str) -> Vec<(usize, String)> {
        match parse_rubric(Path::new("r.toml"), text) {
            Err(RubricError::Invalid { problems, .. }) => {
                problems.into_iter().map(|p| (p.line, p.message)).collect()
            }
            other => panic!("expected problems, got {other:?}"),
        }
    }

    /// Two TOML syntax errors (a key without `=` on line 4, an unclosed string on
    /// line 11) and one semantic error (scale `1-12` on line 14) are all reported, in
    /// line order; the text after each syntax error is still checked.
    #[test]
    fn syntax_errors_and_semantic_errors_are_reported_together() {
        let text = r#"name = "t"
[[criterion]]
key = "a"
question "Is it right?"
scale = "yes-no"
[criterion.points]
"yes" = "right"
"no" = "wrong"

[[criterion]]
key = "b
question = "Q"
title = "B"
scale = "1-12"
"#;
        let got = problems_of(text);
        let lines: Vec<usize> = got.iter().map(|p| p.0).collect();
        assert_eq!(lines, vec![4, 11, 14], "{got:?}");
        assert!(got[0].1.starts_with("TOML syntax"), "{got:?}");
        assert!(got[1].1.starts_with("TOML syntax"), "{got:?}");
        assert!(got[2].1.contains("unknown scale `1-12`"), "{got:?}");
    }

    /// What a strict reader stops at after the first problem (an unknown key, a
    /// missing field, a wrong type, a repeated key) is all listed in one pass.
    #[test]
    fn unknown_keys_missing_fields_and_repeats_are_listed_at_once() {
        let text = r#"name = "t"
colour = 3
[[criterion]]
key = "a"
scale = "yes-no"
points = { "yes" = "y", "no" = 0 }
[[criterion]]
key = "a"
question = "Q"
scale = "yes-no"
shade = "x"
points = { "yes" = "y", "no" = "n" }
"#;
        let got = problems_of(text);
        let lines: Vec<usize> = got.iter().map(|p| p.0).collect();
        assert_eq!(lines, vec![2, 3, 6, 8, 11], "{got:?}");
        assert!(got[0].1.contains("unknown key `colour`"), "{got:?}");
        assert!(got[1].1.contains("has no `question`"), "{got:?}");
        assert!(got[2].1.contains("point `no` must be text"), "{got:?}");
        assert!(got[3].1.contains("appears twice"), "{got:?}");
        assert!(got[4].1.contains("unknown key `shade`"), "{got:?}");
    }

    /// A broken table header leaves its whole table out of the check, so no field of
    /// it is called missing; a later syntax error is still found.
    #[test]
    fn a_broken_table_header_blanks_its_table_only() {
        let text = "name = \"t\"\n[[criterion]\nkey = \"a\"\nquestion = \"Q\"\n\n[[criterion]]\nkey = \"b\"\nquestion = = \"Q\"\nscale = \"yes-no\"\npoints = { \"yes\" = \"y\", \"no\" = \"n\" }\n";
        let got = problems_of(text);
        let lines: Vec<usize> = got.iter().map(|p| p.0).collect();
        assert_eq!(lines, vec![2, 8], "{got:?}");
    }

    /// Four- and seven-point scales are common practice in annotation guidelines (from
    /// memory); the bounds 2 and 11 points are this project's rule.
    #[test]
    fn integer_scales_of_two_to_eleven_points_parse() {
        assert_eq!(Scale::parse("1-7"), Some(Scale::points(1, 7)));
        assert_eq!(
            Scale::parse("1-4").map(|s| s.labels()),
            Some(vec!["1".into(), "2".into(), "3".into(), "4".into()])
        );
        assert_eq!(Scale::parse("0-10").map(|s| s.values().len()), Some(11));
        assert_eq!(Scale::parse("0-1"), Some(Scale::points(0, 1)));
        assert_eq!(Scale::parse("yes-no"), Some(Scale::YesNo));
        assert_eq!(Scale::points(1, 7).name(), "1-7");
        for bad in [
            "1-1", "5-1", "1-12", "0-11", "-1-5", "1-5.5", "a-b", "1-", "15",
        ] {
            assert_eq!(Scale::parse(bad), None, "{bad}");
        }
    }

    #[test]
    fn seven_point_rubric_needs_a_description_per_point() {
        let text = "name = \"t\"\n[[criterion]]\nkey = \"a\"\nquestion = \"Q\"\nscale = \"1-7\"\n[criterion.points]\n\"1\" = \"x\"\n\"7\" = \"y\"\n";
        let err = parse_rubric(Path::new("r.toml"), text).expect_err("five points lack text");
        let RubricError::Invalid { problems, .. } = &err else {
            panic!("{err}")
        };
        assert_eq!(problems.len(), 5, "{err}");
    }

    #[test]
    fn unknown_key_in_rubric_is_a_line_error() {
        let text = "name = \"t\"\ncolour = 3\n";
        let err = parse_rubric(Path::new("r.toml"), text).expect_err("invalid");
        assert!(err.to_string().contains("line 2"), "{err}");
    }

    #[test]
    fn bundled_rubrics_are_valid_and_match_their_files() {
        for (name, _) in BUNDLED {
            let p = Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("judge-templates/rubrics")
                .join(format!("{name}.toml"));
            let from_file = load_rubric(&p).unwrap_or_else(|e| panic!("{name}: {e}"));
            let built_in = load_rubric(Path::new(name)).unwrap_or_else(|e| panic!("{name}: {e}"));
            assert_eq!(from_file.sha256, built_in.sha256, "{name}");
        }
    }

    #[test]
    fn unknown_rubric_name_names_the_bundled_ones_in_its_fix() {
        let err = load_rubric(Path::new("suport")).expect_err("no such file or name");
        let fix = fix_for(&err).expect("rubric errors have a fix");
        assert!(
            fix.contains("`support`") && fix.contains("`quick`"),
            "{fix}"
        );
    }
}
