//! A scripted judge for orchestration tests: returns fixed label log-probabilities
//! per criterion (or per pairwise order) and a fixed assessment text. Input: the
//! script. Output: what a `Backend` returns. Never loads a model; it stands in for
//! one only in tests, never in place of the real-model tests.

use std::cell::RefCell;
use std::collections::HashMap;

use super::Backend;
use crate::engine::EngineError;
use crate::rubric::forms::Form;

/// Fixed answers keyed by a substring of the form's user message.
#[derive(Debug, Default)]
pub struct ScriptedJudge {
    /// (substring of the form, log-probabilities per label) in priority order.
    pub rules: Vec<(String, Vec<f64>)>,
    /// Text returned by `continue_form`.
    pub assessment: String,
    /// Forms scored so far (for assertions about batching).
    pub calls: RefCell<Vec<usize>>,
    /// Items whose scoring fails (simulates a crash in flight).
    pub fail_on: RefCell<HashMap<String, String>>,
}

impl Backend for ScriptedJudge {
    fn model_path(&self) -> String {
        "scripted".into()
    }

    fn model_sha256(&self) -> String {
        "0".repeat(64)
    }

    fn score_forms(
        &self,
        item: &str,
        forms: &[Form],
        labels: &[Vec<String>],
    ) -> Result<Vec<Vec<f64>>, EngineError> {
        if let Some(msg) = self.fail_on.borrow().get(item) {
            return Err(EngineError::Invalid(msg.clone()));
        }
        self.calls.borrow_mut().push(forms.len());
        Ok(forms
            .iter()
            .zip(labels)
            .map(|(f, l)| {
                self.rules
                    .iter()
                    .find(|(needle, lp)| f.user.contains(needle.as_str()) && lp.len() == l.len())
                    .map(|(_, lp)| lp.clone())
                    .unwrap_or_else(|| vec![(1.0 / l.len() as f64).ln(); l.len()])
            })
            .collect())
    }

    fn continue_form(
        &self,
        _item: &str,
        _form: &Form,
        _max_tokens: usize,
        _stops: &[&str],
        _seed: u64,
    ) -> Result<String, EngineError> {
        Ok(self.assessment.clone())
    }
}
