//! Vetting stage: the trust card, a per-criterion answer to "can this judge stand in
//! for a human rater here?". Input: the labelled items, the primary variant's paired
//! verdicts, its agreement and the human ceiling. Output: a verdict ("yes", "no",
//! "cannot tell yet") from a paired bootstrap of the kappa gap between judge and a
//! typical rater, with sample-size advice and plain warnings. Never turns a wide
//! interval into a firm answer: thin evidence is flagged, whatever the verdict.
//!
//! Rule (see the `vet` module doc): `d = kappa_q(judge, consensus) - mean_r
//! kappa_q(rater r, consensus of the others)` on the items the judge graded; "yes" when
//! the percentile interval's lower end is above `-margin`, "no" when its upper end is
//! below 0 (and not "yes"), else "cannot tell yet". Evidence counts as thin when the
//! sample-size advice (Fleiss, Cohen & Everitt 1969 precision form, pass/fail
//! approximation) asks for more items than there are, or the interval is wider than
//! [`MAX_CI_WIDTH`].
//!
//! The rule is close to the alternative annotator test of Calderon, Reichart & Dror
//! (2025), which holds out each annotator in turn, tests per annotator whether the judge
//! matches the remaining annotators at least as well as the held-out one did (within a
//! margin ε), corrects for the many tests and passes the judge when it wins for at
//! least half the annotators. Here the raters are pooled instead: one gap between the
//! judge's kappa and the mean leave-one-rater-out kappa, one paired bootstrap interval,
//! and a third answer, "cannot tell yet", when the interval straddles the margin.

use serde::Serialize;

use super::agreement::{interval_pair, kappa, IntervalPair, VariantAgreement};
use super::ceiling::{leave_one_out, mean_loo_kappa, HumanCeiling};
use super::items::{CriterionLabels, Paired};
use super::{VetError, VetOptions};
use crate::stats::agreement::Weighting;
use crate::stats::sample_size::{labelled_sample_advice, SampleAdvice};

/// An interval of the kappa gap wider than this cannot support a firm reading.
pub const MAX_CI_WIDTH: f64 = 0.3;
/// Target half-width for the sample-size advice (half of [`MAX_CI_WIDTH`]).
pub const TARGET_HALF_WIDTH: f64 = 0.15;

/// The answer of a trust card.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Verdict {
    /// The judge is not worse than a typical rater by more than the margin.
    #[serde(rename = "yes")]
    Yes,
    /// The judge agrees with humans clearly less than they agree with each other.
    #[serde(rename = "no")]
    No,
    /// The data cannot tell yet.
    #[serde(rename = "cannot tell yet")]
    CannotTell,
}

impl Verdict {
    /// The verdict as printed.
    pub fn as_str(&self) -> &'static str {
        match self {
            Verdict::Yes => "yes",
            Verdict::No => "no",
            Verdict::CannotTell => "cannot tell yet",
        }
    }
}

/// Whether the primary judge variant can replace a human rater on one criterion.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TrustCard {
    /// The variant judged (the first one given).
    pub variant: String,
    /// Items with both a judge verdict and human labels (the bootstrap units).
    pub n_items: usize,
    /// Judge against the all-rater consensus, quadratic kappa.
    pub judge_kappa_quadratic: Option<f64>,
    /// Mean over raters of each rater against the others' consensus, on the same items.
    pub human_kappa_quadratic: Option<f64>,
    /// Mean over raters r of the judge against the consensus without r: the judge
    /// measured against exactly the references each human got (shown, not used for the verdict).
    pub judge_kappa_matched: Option<f64>,
    /// `d` = judge minus typical human, with paired bootstrap intervals (verdict uses the percentile one).
    pub difference: IntervalPair,
    /// Non-inferiority margin on kappa.
    pub margin: f64,
    /// The answer.
    pub verdict: Verdict,
    /// The answer's grounds in one sentence.
    pub reason: String,
    /// How many labelled items a kappa of this size needs (pass/fail approximation).
    pub advice: Option<SampleAdvice>,
    /// True when the verdict rests on too few items or too wide an interval.
    pub thin_evidence: bool,
    /// Plain-words warnings, each with what to do.
    pub warnings: Vec<String>,
}

/// Share of consensus labels in the upper half of the scale, kept inside [0.05, 0.95]
/// so the pass/fail variance formula stays defined.
fn prevalence(lab: &CriterionLabels, paired: &[Paired]) -> f64 {
    let k = lab.k();
    let upper = paired
        .iter()
        .filter(|p| 2 * lab.items[p.item].consensus >= k)
        .count();
    (upper as f64 / paired.len().max(1) as f64).clamp(0.05, 0.95)
}

/// Builds the trust card of the primary variant.
pub(crate) fn trust_card(
    lab: &CriterionLabels,
    paired: &[Paired],
    primary: &VariantAgreement,
    ceiling: &HumanCeiling,
    opts: &VetOptions,
) -> Result<TrustCard, VetError> {
    let k = lab.k();
    let loo = leave_one_out(lab);
    let human: Vec<usize> = paired.iter().map(|p| lab.items[p.item].consensus).collect();
    let judge: Vec<usize> = paired
        .iter()
        .map(|p| {
            p.judge
                .category
                .expect("the primary variant carries categories")
        })
        .collect();
    let all: Vec<usize> = paired.iter().map(|p| p.item).collect();
    let judge_k = kappa(&human, &judge, k, Weighting::Quadratic);
    let human_k = mean_loo_kappa(lab, &loo, &all);
    let matched: Vec<f64> = (0..lab.raters.len())
        .filter_map(|r| {
            let (a, b): (Vec<usize>, Vec<usize>) = paired
                .iter()
                .zip(&judge)
                .filter_map(|(p, &j)| Some((loo[p.item][r]?, j)))
                .unzip();
            if a.is_empty() {
                None
            } else {
                kappa(&a, &b, k, Weighting::Quadratic)
            }
        })
        .collect();
    let judge_matched =
        (!matched.is_empty()).then(|| matched.iter().sum::<f64>() / matched.len() as f64);
    let difference = if human_k.is_none() {
        IntervalPair {
            percentile: None,
            bca: None,
            note: Some("no human ceiling on these items".into()),
        }
    } else {
        interval_pair(paired.len(), opts, |idx| {
            let h: Vec<usize> = idx.iter().map(|&i| human[i]).collect();
            let j: Vec<usize> = idx.iter().map(|&i| judge[i]).collect();
            let items: Vec<usize> = idx.iter().map(|&i| all[i]).collect();
            Some(kappa(&h, &j, k, Weighting::Quadratic)? - mean_loo_kappa(lab, &loo, &items)?)
        })
    };
    let margin = opts.margin;
    let (verdict, reason) = match &difference.percentile {
        Some(ci) if ci.lower > -margin => (
            Verdict::Yes,
            format!(
                "the judge's kappa is {:+.2} against a typical rater's; the interval ({:.2} to {:.2}) stays above -{margin:.2}, so it is not worse by more than the margin",
                ci.estimate, ci.lower, ci.upper
            ),
        ),
        Some(ci) if ci.upper < 0.0 => (
            Verdict::No,
            format!(
                "the judge's kappa is {:+.2} against a typical rater's and the whole interval ({:.2} to {:.2}) lies below 0: humans agree with each other more than with the judge",
                ci.estimate, ci.lower, ci.upper
            ),
        ),
        Some(ci) => (
            Verdict::CannotTell,
            format!(
                "the judge's kappa is {:+.2} against a typical rater's, but the interval ({:.2} to {:.2}) reaches below -{margin:.2} and above 0",
                ci.estimate, ci.lower, ci.upper
            ),
        ),
        None => (
            Verdict::CannotTell,
            match (&ceiling.note, &difference.note) {
                (Some(n), _) => n.clone(),
                (None, Some(n)) => format!("the kappa gap has no interval: {n}"),
                (None, None) => "the kappa gap has no interval".into(),
            },
        ),
    };
    let mut warnings = Vec::new();
    let expected_kappa = primary
        .categorical
        .as_ref()
        .and_then(|c| c.kappa_quadratic)
        .unwrap_or(0.0)
        .clamp(0.0, 0.95);
    let advice = labelled_sample_advice(
        paired.len(),
        expected_kappa,
        prevalence(lab, paired),
        TARGET_HALF_WIDTH,
        opts.level,
    )
    .ok();
    if let Some(a) = advice.as_ref().filter(|a| !a.enough) {
        warnings.push(format!(
            "only {} labelled items on `{}`; label about {} for a kappa interval of ±{:.2}",
            paired.len(),
            lab.key,
            a.recommended,
            a.target_half_width
        ));
    }
    if let Some(ci) = &difference.percentile {
        let width = ci.upper - ci.lower;
        if width > MAX_CI_WIDTH {
            warnings.push(format!(
                "the kappa-gap interval on `{}` is {width:.2} wide (more than {MAX_CI_WIDTH}); label more items to narrow it",
                lab.key
            ));
        }
    }
    if lab.raters.len() < 2 {
        warnings.push(format!(
            "`{}` has a single rater; have a second rater score the same items to measure human agreement",
            lab.key
        ));
    }
    Ok(TrustCard {
        variant: primary.variant.clone(),
        n_items: paired.len(),
        judge_kappa_quadratic: judge_k,
        human_kappa_quadratic: human_k,
        judge_kappa_matched: judge_matched,
        difference,
        margin,
        verdict,
        reason,
        advice,
        thin_evidence: !warnings.is_empty(),
        warnings,
    })
}
