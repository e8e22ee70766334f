//! Calibration stage, saved mappings: a calibration fitted on all labelled items,
//! stored with what it was fitted on, and the check that refuses a run it does not
//! match. Input: the fitted calibrators per criterion and the fingerprints of the
//! judge runs (model, rubric, templates, options). Output: a serialisable
//! `MappingFile`, and calibrated `GradeRecord`s for a new run of the same setup.
//! Never applies a mapping to a run that differs in judge, rubric, templates,
//! options, criteria or features; every difference is named.

use serde::{Deserialize, Serialize};

use super::features::FeatureTable;
use super::model::{Calibrator, Prediction};
use crate::judge::GradeRecord;

/// Format version of the mapping file.
pub const MAPPING_FORMAT: u32 = 1;

/// What a judge run depends on, as recorded in its manifest.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SourceFingerprint {
    /// Source name used in feature names.
    pub name: String,
    /// SHA-256 of the judge model file.
    pub model_sha256: String,
    /// SHA-256 of the rubric file.
    pub rubric_sha256: String,
    /// SHA-256 of the form templates.
    pub templates_sha256: String,
    /// Result-changing options of the run (criteria, reasoning, anchors, ...).
    pub options: Vec<String>,
}

/// The mapping of one criterion.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SavedMapping {
    /// Criterion key.
    pub criterion: String,
    /// Scale labels, lowest first.
    pub scale: Vec<String>,
    /// Feature names, in the order the calibrator reads them.
    pub features: Vec<String>,
    /// Labelled items it was fitted on.
    pub labelled_items: usize,
    /// Out-of-sample quadratic kappa of the cross-fitted version, when defined.
    pub out_of_sample_kappa: Option<f64>,
    /// The fitted model.
    pub calibrator: Calibrator,
}

/// Every criterion's mapping and the setup they were fitted on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MappingFile {
    /// Format version.
    pub format: u32,
    /// Rubric name.
    pub rubric: String,
    /// Judge runs whose records are the features, in feature order.
    pub sources: Vec<SourceFingerprint>,
    /// Reference-overlap metrics used as features.
    pub overlap: Vec<String>,
    /// One mapping per calibrated criterion.
    pub mappings: Vec<SavedMapping>,
}

/// A run the mapping does not fit, with every difference.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error(
    "the calibration does not match this run:\n{}",
    crate::data::list(differences)
)]
pub struct MappingMismatch {
    /// Each difference in plain words.
    pub differences: Vec<String>,
}

fn short(h: &str) -> &str {
    &h[..h.len().min(12)]
}

impl MappingFile {
    /// Every difference between the setup the mapping was fitted on and this one.
    pub fn differences(
        &self,
        rubric: &str,
        sources: &[SourceFingerprint],
        overlap: &[String],
    ) -> Vec<String> {
        let mut out = Vec::new();
        if self.format != MAPPING_FORMAT {
            out.push(format!(
                "mapping format {} (this version reads {MAPPING_FORMAT})",
                self.format
            ));
        }
        if self.rubric != rubric {
            out.push(format!("rubric `{}` (fitted on `{}`)", rubric, self.rubric));
        }
        let names = |s: &[SourceFingerprint]| {
            s.iter()
                .map(|f| format!("`{}`", f.name))
                .collect::<Vec<_>>()
                .join(", ")
        };
        if self.sources.len() != sources.len()
            || self
                .sources
                .iter()
                .zip(sources)
                .any(|(a, b)| a.name != b.name)
        {
            out.push(format!(
                "judges [{}] (fitted on [{}])",
                names(sources),
                names(&self.sources)
            ));
        }
        for (a, b) in self
            .sources
            .iter()
            .zip(sources)
            .filter(|(a, b)| a.name == b.name)
        {
            let mut diff = |what: &str, fitted: &str, now: &str| {
                if fitted != now {
                    out.push(format!(
                        "judge `{}`: {what} `{}` (fitted on `{}`)",
                        a.name,
                        short(now),
                        short(fitted)
                    ));
                }
            };
            diff("model sha256", &a.model_sha256, &b.model_sha256);
            diff("rubric sha256", &a.rubric_sha256, &b.rubric_sha256);
            diff("templates sha256", &a.templates_sha256, &b.templates_sha256);
            for o in b.options.iter().filter(|o| !a.options.contains(o)) {
                let key = o.split('=').next().unwrap_or(o);
                let was = a.options.iter().find(|x| x.split('=').next() == Some(key));
                out.push(format!(
                    "judge `{}`: option `{o}` (fitted with `{}`)",
                    a.name,
                    was.map_or("none", |s| s.as_str())
                ));
            }
        }
        if self.overlap != overlap {
            out.push(format!(
                "overlap features [{}] (fitted with [{}])",
                overlap.join(", "),
                self.overlap.join(", ")
            ));
        }
        out
    }

    /// Calibrated records for every item of `table`, refusing a table whose features
    /// differ from a mapping's.
    pub fn apply(&self, table: &FeatureTable) -> Result<Vec<GradeRecord>, MappingMismatch> {
        let mut records = Vec::new();
        let mut differences = Vec::new();
        for m in &self.mappings {
            if m.features != table.names {
                let missing: Vec<&String> = m
                    .features
                    .iter()
                    .filter(|f| !table.names.contains(f))
                    .collect();
                differences.push(format!(
                    "criterion `{}`: features differ ({} of {} fitted features missing{})",
                    m.criterion,
                    missing.len(),
                    m.features.len(),
                    missing
                        .first()
                        .map_or(String::new(), |f| format!(", e.g. `{f}`"))
                ));
                continue;
            }
            for ((q, s), row) in &table.rows {
                records.push(calibrated_record(
                    q,
                    s,
                    &m.criterion,
                    &m.scale,
                    &m.calibrator.predict(row),
                ));
            }
        }
        if differences.is_empty() {
            Ok(records)
        } else {
            Err(MappingMismatch { differences })
        }
    }
}

/// A calibrated verdict as a grade record (captured mass 1: nothing was left off the scale).
pub fn calibrated_record(
    question_id: &str,
    system: &str,
    criterion: &str,
    scale: &[String],
    p: &Prediction,
) -> GradeRecord {
    let values: Vec<f64> = scale
        .iter()
        .map(|l| crate::judge::grade::label_value(l))
        .collect();
    let best = (0..p.probabilities.len()).fold(0, |b, k| {
        if p.probabilities[k] > p.probabilities[b] {
            k
        } else {
            b
        }
    });
    let variance: f64 = values
        .iter()
        .zip(&p.probabilities)
        .map(|(v, q)| q * (v - p.expected).powi(2))
        .sum();
    GradeRecord {
        question_id: question_id.into(),
        system: system.into(),
        criterion: criterion.into(),
        labels: scale.to_vec(),
        probabilities: p.probabilities.clone(),
        captured_mass: 1.0,
        expected: p.expected,
        argmax: scale[best].clone(),
        spread: variance.sqrt(),
        low_mass: false,
        rationale: None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fp(name: &str, model: &str) -> SourceFingerprint {
        SourceFingerprint {
            name: name.into(),
            model_sha256: model.into(),
            rubric_sha256: "r".into(),
            templates_sha256: "t".into(),
            options: vec!["criteria=correctness".into(), "reasoning=false".into()],
        }
    }

    fn file() -> MappingFile {
        MappingFile {
            format: MAPPING_FORMAT,
            rubric: "support".into(),
            sources: vec![fp("default", "aaa"), fp("small", "bbb")],
            overlap: vec!["ROUGE-L".into()],
            mappings: vec![],
        }
    }

    #[test]
    fn matching_run_has_no_differences() {
        let f = file();
        assert!(f.differences("support", &f.sources, &f.overlap).is_empty());
    }

    #[test]
    fn every_difference_is_named() {
        let f = file();
        let mut now = vec![fp("default", "ccc"), fp("small", "bbb")];
        now[1].options[1] = "reasoning=true".into();
        let d = f.differences("support", &now, &[]);
        assert_eq!(d.len(), 3, "{d:?}");
        assert!(d[0].contains("model sha256 `ccc`") && d[0].contains("`aaa`"));
        assert!(d[1].contains("option `reasoning=true`") && d[1].contains("reasoning=false"));
        assert!(d[2].contains("overlap features"));
        let d = f.differences("other", &now[..1], &f.overlap);
        assert!(d.iter().any(|x| x.contains("rubric `other`")));
        assert!(d.iter().any(|x| x.contains("judges [`default`]")));
    }
}
