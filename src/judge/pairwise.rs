//! Pairwise judging: two answers to one question, judged in both orders, with the
//! verdict read as a distribution over Answer 1 / Answer 2 / tie at the verdict slot.
//! Input: two answer records and the criterion question. Output: two `PairRecord`s
//! (one per order), recorded by system identity; slot probes (blank or identical
//! answers, one order) as `ProbeRecord`s. Never aggregates: `probes` does.

use super::{Backend, PairRecord, ProbeKind, ProbeRecord};
use crate::data::AnswerRecord;
use crate::judge::grade::JudgeError;
use crate::rubric::forms::{Forms, VERDICT_LABELS};

/// The question asked when no rubric criterion is named.
pub const OVERALL_QUESTION: &str =
    "Which answer serves the person who asked better overall: correct, grounded in the source text, helpful and clear?";

/// Judge `a` and `b` in both orders (a first, then b first).
#[allow(clippy::too_many_arguments)]
pub fn judge_both_orders(
    backend: &dyn Backend,
    forms: &Forms,
    a: &AnswerRecord,
    b: &AnswerRecord,
    criterion: &str,
    question: &str,
    show_reference: bool,
    show_context: bool,
) -> Result<[PairRecord; 2], JudgeError> {
    let ab = forms.pair(a, b, question, show_reference, show_context)?;
    let ba = forms.pair(b, a, question, show_reference, show_context)?;
    let labels: Vec<String> = VERDICT_LABELS.iter().map(|s| s.to_string()).collect();
    let item = format!("{} ({} vs {})", a.question_id, a.system, b.system);
    let lp = backend.score_forms(&item, &[ab, ba], &[labels.clone(), labels])?;
    let make = |first: &AnswerRecord, second: &AnswerRecord, lp: &[f64]| {
        let p: Vec<f64> = lp.iter().map(|l| l.exp()).collect();
        let mass: f64 = p.iter().sum();
        let norm = if mass > 0.0 { mass } else { 1.0 };
        PairRecord {
            question_id: first.question_id.clone(),
            criterion: criterion.to_string(),
            first: first.system.clone(),
            second: second.system.clone(),
            p_first: p[0] / norm,
            p_second: p[1] / norm,
            p_tie: p[2] / norm,
            captured_mass: mass,
        }
    };
    Ok([make(a, b, &lp[0]), make(b, a, &lp[1])])
}

/// What a content-free probe shows in both answer slots (Zhao et al. 2021 use "N/A"
/// among their content-free inputs).
pub const CONTENT_FREE_ANSWER: &str = "N/A";

/// Judge one slot probe of `answer`'s question: both slots blank (`ContentFree`) or
/// `answer` shown twice (`IdenticalAnswers`), one order, read like a pair.
#[allow(clippy::too_many_arguments)]
pub fn judge_probe(
    backend: &dyn Backend,
    forms: &Forms,
    answer: &AnswerRecord,
    kind: ProbeKind,
    criterion: &str,
    question: &str,
    show_reference: bool,
    show_context: bool,
) -> Result<ProbeRecord, JudgeError> {
    let shown = match kind {
        ProbeKind::ContentFree => AnswerRecord {
            answer: CONTENT_FREE_ANSWER.to_string(),
            ..answer.clone()
        },
        ProbeKind::IdenticalAnswers => answer.clone(),
    };
    let form = forms.pair(&shown, &shown, question, show_reference, show_context)?;
    let labels: Vec<String> = VERDICT_LABELS.iter().map(|s| s.to_string()).collect();
    let item = format!("{} (slot probe, {kind:?})", answer.question_id);
    let lp = backend.score_forms(&item, &[form], &[labels])?;
    let p: Vec<f64> = lp[0].iter().map(|l| l.exp()).collect();
    let mass: f64 = p.iter().sum();
    let norm = if mass > 0.0 { mass } else { 1.0 };
    Ok(ProbeRecord {
        question_id: answer.question_id.clone(),
        criterion: criterion.to_string(),
        kind,
        system: (kind == ProbeKind::IdenticalAnswers).then(|| answer.system.clone()),
        p_first: p[0] / norm,
        p_second: p[1] / norm,
        p_tie: p[2] / norm,
        captured_mass: mass,
    })
}
