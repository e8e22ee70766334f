//! Judge stage: plans the forward passes for grading forms and turns the judge's
//! label probabilities into verdicts. Input: forms from `rubric`, a `Backend` (the
//! local model, or a scripted judge in tests). Output: `GradeRecord`s and
//! `PairRecord`s. Never reads files and never touches tensors.

pub mod anchors;
pub mod grade;
pub mod pairwise;
pub mod panel;
pub mod records;
pub mod scripted;
pub mod screen;
pub mod steps;

pub use records::{GradeRecord, PairRecord, ProbeKind, ProbeRecord};

use crate::engine::{EngineError, JudgeModel};
use crate::rubric::forms::Form;

/// What the judge stage needs from a model.
pub trait Backend {
    /// Model file as given (for manifests and reports).
    fn model_path(&self) -> String;
    /// SHA-256 of the model file.
    fn model_sha256(&self) -> String;
    /// Decoder work so far, for cost records; `None` for a judge that runs no model.
    fn counters(&self) -> Option<crate::engine::WorkCounters> {
        None
    }
    /// Unnormalised log-probability of each label at the slot after each form's
    /// prefill. Forms of one item are passed together so their shared prefix is
    /// computed once.
    fn score_forms(
        &self,
        item: &str,
        forms: &[Form],
        labels: &[Vec<String>],
    ) -> Result<Vec<Vec<f64>>, EngineError>;
    /// Text the judge writes after each form's prefill; forms of one item share
    /// their prefix. The default runs `continue_form` on each.
    fn continue_forms(
        &self,
        item: &str,
        forms: &[Form],
        max_tokens: usize,
        stops: &[&str],
        seed: u64,
    ) -> Result<Vec<String>, EngineError> {
        forms
            .iter()
            .map(|f| self.continue_form(item, f, max_tokens, stops, seed))
            .collect()
    }

    /// Text the judge writes after a form's prefill (reasoning-first mode).
    fn continue_form(
        &self,
        item: &str,
        form: &Form,
        max_tokens: usize,
        stops: &[&str],
        seed: u64,
    ) -> Result<String, EngineError>;
}

impl Backend for JudgeModel {
    fn model_path(&self) -> String {
        self.path.display().to_string()
    }

    fn model_sha256(&self) -> String {
        self.sha256.clone()
    }

    fn counters(&self) -> Option<crate::engine::WorkCounters> {
        Some(JudgeModel::counters(self))
    }

    fn score_forms(
        &self,
        item: &str,
        forms: &[Form],
        labels: &[Vec<String>],
    ) -> Result<Vec<Vec<f64>>, EngineError> {
        if let Some(f) = forms.first() {
            self.warm_preamble(&f.system)?;
        }
        let requests = forms
            .iter()
            .zip(labels)
            .map(|(f, l)| self.slot_request(&f.system, &f.user, &f.prefill, l))
            .collect::<Result<Vec<_>, _>>()?;
        self.label_logprobs(item, &requests)
    }

    fn continue_forms(
        &self,
        item: &str,
        forms: &[Form],
        max_tokens: usize,
        stops: &[&str],
        seed: u64,
    ) -> Result<Vec<String>, EngineError> {
        if let Some(f) = forms.first() {
            self.warm_preamble(&f.system)?;
        }
        let prompts = forms
            .iter()
            .map(|f| self.encode_chat(&f.system, &f.user, &f.prefill))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(self
            .generate_batch(item, &prompts, max_tokens, stops, 0.0, seed)?
            .into_iter()
            .map(|g| g.text)
            .collect())
    }

    fn continue_form(
        &self,
        item: &str,
        form: &Form,
        max_tokens: usize,
        stops: &[&str],
        seed: u64,
    ) -> Result<String, EngineError> {
        let mut texts =
            self.continue_forms(item, std::slice::from_ref(form), max_tokens, stops, seed)?;
        Ok(texts.pop().expect("one form gives one text"))
    }
}
