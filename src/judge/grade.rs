//! Pointwise grading: every criterion of an item is its own form ending at its own
//! score slot; the forms of one item go to the backend together so the shared part
//! (instructions, question, context, answer) is computed once. Input: a rubric, an
//! answer record, a backend. Output: one `GradeRecord` per criterion, and summaries
//! per system and criterion. Never drops an item with low captured mass: it flags it.

use serde::Serialize;

use super::anchors::AnchorPool;
use super::{Backend, GradeRecord};
use crate::data::AnswerRecord;
use crate::engine::EngineError;
use crate::rubric::forms::{Form, Forms, SCORE_PREFILL};
use crate::rubric::{Rubric, RubricError};
use crate::stats::bootstrap::{bootstrap_interval, IntervalMethod};
use crate::stats::scoring::score_distribution;
use crate::stats::StatsError;

/// Why grading an item failed.
#[derive(Debug, thiserror::Error)]
pub enum JudgeError {
    /// The model failed.
    #[error(transparent)]
    Engine(#[from] EngineError),
    /// The form could not be built.
    #[error(transparent)]
    Rubric(#[from] RubricError),
    /// A statistic could not be computed.
    #[error("{context}")]
    Stats {
        context: String,
        #[source]
        source: StatsError,
    },
}

/// How to grade.
#[derive(Debug, Clone)]
pub struct GradeOptions {
    /// Let the judge write an assessment before the score slot.
    pub reasoning: bool,
    /// Token limit of the assessment.
    pub reasoning_tokens: usize,
    /// Captured mass below this flags the record.
    pub low_mass: f64,
    /// Seed of every random draw.
    pub seed: u64,
}

impl Default for GradeOptions {
    fn default() -> Self {
        GradeOptions {
            reasoning: false,
            reasoning_tokens: 160,
            low_mass: 0.5,
            seed: 0,
        }
    }
}

/// Grade one answer on every criterion of the rubric.
pub fn grade_item(
    backend: &dyn Backend,
    forms: &Forms,
    rubric: &Rubric,
    item: &AnswerRecord,
    anchors: Option<&AnchorPool>,
    opts: &GradeOptions,
) -> Result<Vec<GradeRecord>, JudgeError> {
    let id = item.item_id();
    let mut built: Vec<Form> = Vec::with_capacity(rubric.criteria.len());
    for c in &rubric.criteria {
        let shown = anchors
            .map(|a| a.for_item(&c.key, &item.question_id))
            .unwrap_or_default();
        built.push(forms.grade(rubric, item, c, opts.reasoning, &shown)?);
    }
    let mut rationales = vec![None; built.len()];
    if opts.reasoning {
        let texts = backend.continue_forms(
            &id,
            &built,
            opts.reasoning_tokens,
            &["Score:", "score:"],
            opts.seed,
        )?;
        for ((i, f), text) in built.iter_mut().enumerate().zip(texts) {
            let text = text.trim().to_string();
            f.prefill = format!(
                "{}{}{}\n{}",
                f.prefill,
                if text.is_empty() { "" } else { " " },
                text,
                SCORE_PREFILL
            );
            rationales[i] = Some(text);
        }
    }
    let labels: Vec<Vec<String>> = rubric.criteria.iter().map(|c| c.scale.labels()).collect();
    let logprobs = backend.score_forms(&id, &built, &labels)?;
    let mut out = Vec::with_capacity(built.len());
    for ((c, lp), rationale) in rubric.criteria.iter().zip(logprobs).zip(rationales) {
        let values = c.scale.values();
        let d = score_distribution(&values, &lp).map_err(|source| JudgeError::Stats {
            context: format!("{id}: criterion `{}`", c.key),
            source,
        })?;
        let labels = c.scale.labels();
        let argmax = values
            .iter()
            .position(|v| *v == d.argmax_label)
            .map(|i| labels[i].clone())
            .expect("argmax is one of the scale values");
        out.push(GradeRecord {
            question_id: item.question_id.clone(),
            system: item.system.clone(),
            criterion: c.key.clone(),
            labels,
            probabilities: d.probabilities,
            captured_mass: d.captured_mass,
            expected: d.expected_score,
            argmax,
            spread: d.std_dev,
            low_mass: d.captured_mass < opts.low_mass,
            rationale,
        });
    }
    Ok(out)
}

/// Mean expected score of one system on one criterion.
#[derive(Debug, Clone, Serialize)]
pub struct SummaryRow {
    /// System.
    pub system: String,
    /// Criterion key.
    pub criterion: String,
    /// Items graded.
    pub n: usize,
    /// Mean expected score.
    pub mean: f64,
    /// Lower end of the 95% bootstrap percentile interval over items.
    pub ci_low: f64,
    /// Upper end of that interval.
    pub ci_high: f64,
    /// Mean of the argmax labels' values, for comparison.
    pub mean_argmax: f64,
    /// Records flagged for low captured mass (kept in the mean).
    pub low_mass: usize,
}

/// Per system and criterion: mean expected score with a seeded bootstrap 95% CI
/// (percentile, 2000 resamples over items; Efron & Tibshirani 1993, ch. 13).
pub fn summarize(records: &[GradeRecord], seed: u64) -> Result<Vec<SummaryRow>, JudgeError> {
    let mut keys: Vec<(String, String)> = records
        .iter()
        .map(|r| (r.system.clone(), r.criterion.clone()))
        .collect();
    keys.sort();
    keys.dedup();
    let mut rows = Vec::new();
    for (system, criterion) in keys {
        let sel: Vec<&GradeRecord> = records
            .iter()
            .filter(|r| r.system == system && r.criterion == criterion)
            .collect();
        let x: Vec<f64> = sel.iter().map(|r| r.expected).collect();
        let argmax: Vec<f64> = sel.iter().map(|r| label_value(&r.argmax)).collect();
        let n = x.len();
        let mean = x.iter().sum::<f64>() / n as f64;
        let (ci_low, ci_high) = if n >= 2 {
            let ci = bootstrap_interval(n, 2000, seed, 0.95, IntervalMethod::Percentile, |idx| {
                Some(idx.iter().map(|&i| x[i]).sum::<f64>() / idx.len() as f64)
            })
            .map_err(|source| JudgeError::Stats {
                context: format!("bootstrap of `{system}` on `{criterion}`"),
                source,
            })?;
            (ci.lower, ci.upper)
        } else {
            (f64::NAN, f64::NAN)
        };
        rows.push(SummaryRow {
            n,
            mean,
            ci_low,
            ci_high,
            mean_argmax: argmax.iter().sum::<f64>() / n as f64,
            low_mass: sel.iter().filter(|r| r.low_mass).count(),
            system,
            criterion,
        });
    }
    Ok(rows)
}

/// Numeric value of a scale label (`yes` = 1, `no` = 0).
pub fn label_value(label: &str) -> f64 {
    match label {
        "yes" => 1.0,
        "no" => 0.0,
        l => l.parse().unwrap_or(f64::NAN),
    }
}
