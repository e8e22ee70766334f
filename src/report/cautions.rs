//! Report stage, cautions: where the numbers of a report could mislead, said in plain
//! words for the top of every format. Input: an assembled `Report`. Output: the
//! `Caution` list, most serious kinds first. Never softens a finding: every "no" and
//! "cannot tell yet" verdict, every thin "yes" and every low-mass grade is named.

use super::{Caution, CautionKind, Report, RunSection};
use crate::probes::selfpref::THIN_EVIDENCE;

/// Judge-minus-human generosity gap (score points) beyond which self-preference is a
/// caution, when its 95% interval also excludes 0: a quarter of a point on a 1–5
/// scale moves a mean grade visibly.
const SELF_PREFERENCE_POINTS: f64 = 0.25;

fn list(keys: &[String]) -> String {
    keys.iter()
        .map(|k| format!("`{k}`"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// Per-run cautions with equal wording are merged into one line naming the runs.
fn merge(r: &Report, per_run: Vec<(CautionKind, String, String)>) -> Vec<Caution> {
    let mut merged: Vec<(CautionKind, String, Vec<String>)> = Vec::new();
    for (kind, body, run) in per_run {
        match merged.iter_mut().find(|m| m.0 == kind && m.1 == body) {
            Some(m) => m.2.push(run),
            None => merged.push((kind, body, vec![run])),
        }
    }
    merged
        .into_iter()
        .map(|(kind, body, runs)| Caution {
            kind,
            message: match (r.runs.len(), runs.len()) {
                (1, _) => body,
                (_, 1) => format!("run {}: {body}", list(&runs)),
                _ => format!("runs {}: {body}", list(&runs)),
            },
        })
        .collect()
}

fn criteria_where(run: &RunSection, pick: impl Fn(&super::TrustRow) -> bool) -> Vec<String> {
    run.trust
        .iter()
        .filter(|t| pick(t))
        .map(|t| t.criterion.clone())
        .collect()
}

/// Every caution that applies to the report.
pub fn collect(r: &Report, have_labels: bool) -> Vec<Caution> {
    let mut out = Vec::new();
    let mut add = |kind, message: String| out.push(Caution { kind, message });
    if !have_labels {
        add(
            CautionKind::NoLabels,
            "no human labels were given, so nothing here shows that the judge agrees with people; its scores are unvetted (pass `--labels` to vet it)".into(),
        );
    }
    let mut per_run = Vec::new();
    for run in &r.runs {
        let mut add = |kind, message: String| per_run.push((kind, message, run.name.clone()));
        let no = criteria_where(run, |t| t.verdict == "no");
        if !no.is_empty() {
            add(
                CautionKind::BelowHumanCeiling,
                format!("the judge agrees with humans clearly less than humans agree with each other on {}; do not use its scores there in place of human ratings", list(&no)),
            );
        }
        let unsure = criteria_where(run, |t| t.verdict == "cannot tell yet");
        if !unsure.is_empty() {
            add(
                CautionKind::CannotTellYet,
                format!("the labelled sample cannot tell yet whether the judge is as good as a typical rater on {}; treat those scores as unconfirmed", list(&unsure)),
            );
        }
        let thin = criteria_where(run, |t| t.verdict == "yes" && t.thin_evidence);
        if !thin.is_empty() {
            add(
                CautionKind::ThinEvidence,
                format!("the judge is deemed trustworthy on {} on thin evidence (few labelled items or a wide interval); the \"yes\" could change with more labels", list(&thin)),
            );
        }
        let small: Vec<String> = run
            .trust
            .iter()
            .filter(|t| t.recommended_items.is_some_and(|n| n > t.n_items))
            .map(|t| {
                format!(
                    "`{}` ({} of about {})",
                    t.criterion,
                    t.n_items,
                    t.recommended_items.unwrap_or(0)
                )
            })
            .collect();
        if !small.is_empty() {
            add(
                CautionKind::SmallLabelledSample,
                format!("small labelled sample: {} labelled items against what a kappa interval of ±0.15 needs; every trust verdict here is provisional", small.join(", ")),
            );
        }
        if run.low_mass > 0 {
            add(
                CautionKind::LowCapturedMass,
                format!(
                    "{} of {} grades had low captured mass: the judge put most of its probability outside the scale labels, so those scores mean little (they are kept in the means and listed under flagged items)",
                    run.low_mass, run.records
                ),
            );
        }
        if let Some(note) = &run.vet_note {
            add(CautionKind::NoLabels, format!("not vetted: {note}"));
        }
        let unvetted: Vec<String> = run
            .unvetted
            .iter()
            .filter(|u| u.reason.contains("no human labels"))
            .map(|u| u.criterion.clone())
            .collect();
        if !unvetted.is_empty() {
            add(
                CautionKind::Unvetted,
                format!(
                    "{} {} no human labels, so {} scores are unvetted",
                    list(&unvetted),
                    if unvetted.len() == 1 { "has" } else { "have" },
                    if unvetted.len() == 1 { "its" } else { "their" }
                ),
            );
        }
    }
    out.extend(merge(r, per_run));
    let mut add = |kind, message: String| out.push(Caution { kind, message });
    if let Some(pw) = &r.pairwise {
        if pw.low_mass > 0 {
            add(
                CautionKind::LowCapturedMass,
                format!("in {} of {} pairwise verdicts the judge put under half its probability on the verdict labels; those verdicts are unreliable", pw.low_mass, 2 * pw.pairs),
            );
        }
        if let Some(p) = pw.position.as_ref().filter(|p| p.caution) {
            add(
                CautionKind::PositionBias,
                format!(
                    "strong position bias: {}; a verdict from one answer order would mislead, so the ranking uses the `{}` rule",
                    p.verdict_line,
                    pw.rule.as_ref().map_or("debiased", |r| r.name.as_str())
                ),
            );
        }
        if let Some(sp) = &pw.self_preference {
            let pointwise = sp
                .pointwise
                .as_ref()
                .filter(|p| p.difference > SELF_PREFERENCE_POINTS && p.ci.0 > 0.0);
            let pairwise = sp.equal_opportunity.as_ref().filter(|e| {
                e.difference > 0.1 && e.n_human_own.min(e.n_human_other) >= THIN_EVIDENCE
            });
            if let Some(p) = pointwise {
                add(
                    CautionKind::SelfPreference,
                    format!("self-preference: the judge is {:.2} points more generous to answers written by its own model (`{}`) than to others that humans scored the same [95% CI {:.2} to {:.2}]; do not let it grade its own model's answers", p.difference, sp.judge_name, p.ci.0, p.ci.1),
                );
            } else if let Some(e) = pairwise {
                add(
                    CautionKind::SelfPreference,
                    format!("self-preference: the judge prefers its own model's answers (`{}`) more often than humans do (equal-opportunity difference {:+.2}); do not let it compare its own model against others", sp.judge_name, e.difference),
                );
            }
        }
        if let Some(k) = &pw.ranking {
            let overlaps: Vec<String> = k
                .rows
                .windows(2)
                .filter(|w| w[1].beats_average_high >= w[0].beats_average_low)
                .map(|w| format!("`{}` and `{}`", w[0].system, w[1].system))
                .collect();
            if !overlaps.is_empty() {
                add(
                    CautionKind::RankingOverlap,
                    format!("the ranking intervals of {} overlap: their order is not settled by this sample", overlaps.join("; ")),
                );
            }
        }
    }
    if r.runs.len() > 1 {
        for run in &r.runs[1..] {
            let base = &r.runs[0];
            let shared: usize = r
                .deltas
                .iter()
                .filter(|d| d.run == run.name)
                .map(|d| d.n_items)
                .sum();
            let (a, b) = (graded_items(base), graded_items(run));
            if shared < a.max(b) {
                add(
                    CautionKind::BeforeAfter,
                    format!("run `{}` and the baseline `{}` share {shared} graded items of {} and {}; differences use only the shared ones", run.name, base.name, b, a),
                );
            }
            let rows: Vec<_> = r.deltas.iter().filter(|d| d.run == run.name).collect();
            if !rows.is_empty() && rows.iter().all(|d| !d.beyond_ci) {
                add(
                    CautionKind::BeforeAfter,
                    format!("no difference between `{}` and `{}` exceeds its 95% interval: read the changes as noise", base.name, run.name),
                );
            }
        }
    }
    out.sort_by_key(|c| c.kind as u8);
    out
}

/// Graded (system, criterion, item) triples of a run, from its summary counts.
fn graded_items(run: &RunSection) -> usize {
    run.summary.iter().map(|s| s.n).sum()
}
