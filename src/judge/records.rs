//! Result records of the judge stage, as stored in run folders (one JSON object per
//! line). Plain data: no model, no I/O.

use serde::{Deserialize, Serialize};

/// One graded (item, criterion): the judge's whole distribution over the scale.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GradeRecord {
    /// Question id.
    pub question_id: String,
    /// System that wrote the answer.
    pub system: String,
    /// Criterion key.
    pub criterion: String,
    /// Scale labels, lowest first.
    pub labels: Vec<String>,
    /// Probability of each label, renormalised over the scale.
    pub probabilities: Vec<f64>,
    /// Probability mass the judge put on valid labels before renormalising.
    pub captured_mass: f64,
    /// Expected score: sum of probability times label value (Liu et al. 2023).
    pub expected: f64,
    /// Most likely label (first maximum).
    pub argmax: String,
    /// Standard deviation of the score distribution.
    pub spread: f64,
    /// Captured mass below the run's threshold: the judge did not follow the form.
    pub low_mass: bool,
    /// The judge's written assessment (reasoning-first mode only).
    pub rationale: Option<String>,
}

impl GradeRecord {
    /// Key used for resuming: `question_id/system/criterion`.
    pub fn key(&self) -> String {
        format!("{}/{}/{}", self.question_id, self.system, self.criterion)
    }
}

/// One pair judged in one order.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PairRecord {
    /// Question id.
    pub question_id: String,
    /// Criterion key, or `overall`.
    pub criterion: String,
    /// System shown as Answer 1.
    pub first: String,
    /// System shown as Answer 2.
    pub second: String,
    /// Probabilities of: Answer 1 better, Answer 2 better, tie (renormalised).
    pub p_first: f64,
    /// Probability that Answer 2 is better.
    pub p_second: f64,
    /// Probability of a tie.
    pub p_tie: f64,
    /// Mass on the three verdict labels before renormalising.
    pub captured_mass: f64,
}

impl PairRecord {
    /// Key used for resuming.
    pub fn key(&self) -> String {
        format!(
            "{}/{}/{}/{}",
            self.question_id, self.criterion, self.first, self.second
        )
    }
}

/// What a slot probe showed the judge in place of two different answers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ProbeKind {
    /// Both answers blank (a content-free input in Zhao et al. 2021's sense).
    ContentFree,
    /// One real answer shown in both slots.
    IdenticalAnswers,
}

/// One slot probe: a pair form whose two answers carry no difference, judged once.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ProbeRecord {
    /// Question id whose form the probe used.
    pub question_id: String,
    /// Criterion key, or `overall`.
    pub criterion: String,
    /// What stood in both answer slots.
    pub kind: ProbeKind,
    /// The system whose answer was shown twice (identical-answer probes only).
    pub system: Option<String>,
    /// Probability that Answer 1 is better (renormalised).
    pub p_first: f64,
    /// Probability that Answer 2 is better.
    pub p_second: f64,
    /// Probability of a tie.
    pub p_tie: f64,
    /// Mass on the three verdict labels before renormalising.
    pub captured_mass: f64,
}

impl ProbeRecord {
    /// Key used for resuming: `question_id/criterion/kind/system`.
    pub fn key(&self) -> String {
        format!(
            "{}/{}/{:?}/{}",
            self.question_id,
            self.criterion,
            self.kind,
            self.system.as_deref().unwrap_or("-")
        )
    }
}
