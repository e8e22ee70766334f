//! Report stage, assembly: turns loaded runs, labels and preferences into a `Report`.
//! Input: `Inputs`. Output: `Report` with `generated_at` left empty for the caller.
//! Never re-implements a statistic: summaries come from `judge::grade::summarize`,
//! trust and calibration from `vet`, pairwise figures from `probes` and
//! `stats::pairwise`, intervals from `stats::bootstrap`.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use super::*;
use crate::guard::screen;
use crate::judge::anchors::consensus_index;
use crate::judge::grade::summarize;
use crate::probes::length::length_probe;
use crate::probes::ranking::rank;
use crate::probes::selfpref::self_preference;
use crate::probes::{pair_outcomes, set_verdicts};
use crate::stats::bootstrap::{bootstrap_interval, IntervalMethod};
use crate::stats::pairwise::position_bias;
use crate::vet::{
    ranking_rule, vet, vet_pair_inputs, CriterionReport, PairInputs, PairVetReport, RankingRule,
    Variant, VariantKind, VetError, VetOptions,
};

fn stats_err<E: std::error::Error + Send + Sync + 'static>(
    what: impl Into<String>,
) -> impl FnOnce(E) -> ReportError {
    let what = what.into();
    move |e| ReportError::Stats {
        what,
        source: Box::new(e),
    }
}

/// Assemble the report (everything but `generated_at`).
pub fn build(inp: &Inputs) -> Result<Report, ReportError> {
    if inp.runs.is_empty() {
        return Err(ReportError::NoRuns);
    }
    let mut graded: BTreeSet<&str> = BTreeSet::new();
    for run in inp.runs {
        if run.records.is_empty() {
            return Err(ReportError::EmptyRun {
                run: run.name.clone(),
            });
        }
        for r in &run.records {
            if inp.rubric.criterion(&r.criterion).is_none() {
                return Err(ReportError::UnknownCriterion {
                    run: run.name.clone(),
                    criterion: r.criterion.clone(),
                    rubric: inp.rubric.name.clone(),
                });
            }
            graded.insert(&r.criterion);
        }
    }
    let criteria: Vec<CriterionInfo> = inp
        .rubric
        .criteria
        .iter()
        .filter(|c| graded.contains(c.key.as_str()))
        .map(|c| CriterionInfo {
            key: c.key.clone(),
            title: c.title.clone(),
            labels: c.scale.labels(),
            values: c.scale.values(),
        })
        .collect();
    let opts = VetOptions {
        resamples: inp.resamples,
        seed: inp.seed,
        ..VetOptions::default()
    };
    let mut runs = Vec::new();
    for (i, run) in inp.runs.iter().enumerate() {
        runs.push(run_section(inp, run, i, &criteria, &opts)?);
    }
    let deltas = deltas(inp)?;
    let pairwise = match inp.compare {
        Some(c) => Some(pairwise(inp, c, &opts)?),
        None => None,
    };
    let flagged = flagged(inp);
    let items = items(inp, &criteria);
    let mut report = Report {
        schema: SCHEMA.to_string(),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        generated_at: String::new(),
        rubric: inp.rubric.name.clone(),
        seed: inp.seed,
        resamples: inp.resamples,
        criteria,
        cautions: Vec::new(),
        runs,
        deltas,
        pairwise,
        flagged,
        items,
        variants: None,
    };
    report.cautions = super::cautions::collect(&report, inp.labels.is_some());
    Ok(report)
}

fn run_section(
    inp: &Inputs,
    run: &RunInput,
    index: usize,
    criteria: &[CriterionInfo],
    opts: &VetOptions,
) -> Result<RunSection, ReportError> {
    let summary = summarize(&run.records, inp.seed)
        .map_err(stats_err(format!("the summary of run `{}`", run.name)))?;
    let mut distributions = Vec::new();
    for row in &summary {
        let k = criteria
            .iter()
            .find(|c| c.key == row.criterion)
            .map_or(0, |c| c.labels.len());
        let rows: Vec<&Vec<f64>> = run
            .records
            .iter()
            .filter(|r| {
                r.system == row.system && r.criterion == row.criterion && r.probabilities.len() == k
            })
            .map(|r| &r.probabilities)
            .collect();
        let mut mean = vec![0.0; k];
        for p in &rows {
            for (m, v) in mean.iter_mut().zip(p.iter()) {
                *m += v / rows.len() as f64;
            }
        }
        distributions.push(Distribution {
            system: row.system.clone(),
            criterion: row.criterion.clone(),
            n: rows.len(),
            mean_probabilities: mean,
        });
    }
    let (mut trust, mut unvetted, mut vet_note) = (Vec::new(), Vec::new(), None);
    if let Some(labels) = inp.labels {
        let variants = [Variant {
            name: "expected score".into(),
            records: &run.records,
            kind: VariantKind::ExpectedScore,
        }];
        match vet(&variants, labels, inp.rubric, opts) {
            Ok(v) => {
                trust = v.criteria.iter().map(trust_row).collect();
                let own: BTreeSet<&str> =
                    run.records.iter().map(|r| r.criterion.as_str()).collect();
                unvetted = v
                    .skipped
                    .iter()
                    .filter(|s| own.contains(s.criterion.as_str()))
                    .map(|s| Unvetted {
                        criterion: s.criterion.clone(),
                        reason: s.reason.clone(),
                    })
                    .collect();
            }
            Err(e @ (VetError::NothingToVet { .. } | VetError::NoOverlap { .. })) => {
                vet_note = Some(e.to_string())
            }
            Err(e) => return Err(stats_err(format!("the vetting of run `{}`", run.name))(e)),
        }
    }
    Ok(RunSection {
        name: run.name.clone(),
        role: match (index, inp.runs.len()) {
            (_, 1) => "only",
            (0, _) => "baseline",
            _ => "after",
        }
        .to_string(),
        dir: run.dir.clone(),
        model: run.model.clone(),
        records: run.records.len(),
        low_mass: run.records.iter().filter(|r| r.low_mass).count(),
        summary,
        distributions,
        trust,
        unvetted,
        vet_note,
    })
}

fn trust_row(c: &CriterionReport) -> TrustRow {
    let t = &c.trust;
    let cat = c.variants.first().and_then(|v| v.categorical.as_ref());
    TrustRow {
        criterion: c.criterion.clone(),
        verdict: t.verdict.as_str().to_string(),
        reason: t.reason.clone(),
        thin_evidence: t.thin_evidence,
        n_items: t.n_items,
        raters: c.raters.len(),
        judge_kappa: t.judge_kappa_quadratic,
        human_kappa: t.human_kappa_quadratic,
        gap: t.difference.percentile.as_ref().map(|i| Gap {
            estimate: i.estimate,
            low: i.lower,
            high: i.upper,
        }),
        recommended_items: t.advice.as_ref().map(|a| a.recommended),
        exact: cat.map(|k| k.exact),
        confusion: cat.map(|k| k.confusion.clone()).unwrap_or_default(),
        calibration: c.calibration.first().map(|k| Calibration {
            n_items: k.n_items,
            accuracy: k.accuracy,
            mean_confidence: k.mean_confidence,
            ece: k.ece_equal_width,
            bins: k.reliability.clone(),
        }),
        warnings: t.warnings.clone(),
    }
}

/// Expected score per (system, criterion) and question.
fn by_item(records: &[GradeRecord]) -> BTreeMap<(String, String), BTreeMap<String, f64>> {
    let mut m: BTreeMap<(String, String), BTreeMap<String, f64>> = BTreeMap::new();
    for r in records {
        m.entry((r.system.clone(), r.criterion.clone()))
            .or_default()
            .insert(r.question_id.clone(), r.expected);
    }
    m
}

/// Each later run against the baseline: paired percentile bootstrap over shared
/// items of the mean difference (Efron & Tibshirani 1993, ch. 13).
fn deltas(inp: &Inputs) -> Result<Vec<DeltaRow>, ReportError> {
    let base = &inp.runs[0];
    let before = by_item(&base.records);
    let mut out = Vec::new();
    for run in &inp.runs[1..] {
        for ((system, criterion), after) in by_item(&run.records) {
            let Some(b) = before.get(&(system.clone(), criterion.clone())) else {
                continue;
            };
            let pairs: Vec<(f64, f64)> = after
                .iter()
                .filter_map(|(q, a)| Some((b.get(q).copied()?, *a)))
                .collect();
            if pairs.is_empty() {
                continue;
            }
            let n = pairs.len();
            let diffs: Vec<f64> = pairs.iter().map(|(b, a)| a - b).collect();
            let mean =
                |idx: &[usize]| Some(idx.iter().map(|&i| diffs[i]).sum::<f64>() / idx.len() as f64);
            let ci = if n >= 2 {
                let i = bootstrap_interval(
                    n,
                    inp.resamples,
                    inp.seed,
                    0.95,
                    IntervalMethod::Percentile,
                    mean,
                )
                .map_err(stats_err(format!(
                    "the difference of `{system}` on `{criterion}`"
                )))?;
                Some((i.lower, i.upper))
            } else {
                None
            };
            let difference = diffs.iter().sum::<f64>() / n as f64;
            let beyond_ci = ci.is_some_and(|(lo, hi)| lo > 0.0 || hi < 0.0);
            let reading = match ci {
                None => "too few shared items for an interval".to_string(),
                Some(_) if beyond_ci && difference > 0.0 => {
                    "higher; the 95% interval excludes 0".to_string()
                }
                Some(_) if beyond_ci => "lower; the 95% interval excludes 0".to_string(),
                Some(_) => "no clear change; the 95% interval includes 0".to_string(),
            };
            out.push(DeltaRow {
                before: pairs.iter().map(|p| p.0).sum::<f64>() / n as f64,
                after: pairs.iter().map(|p| p.1).sum::<f64>() / n as f64,
                system,
                criterion,
                baseline: base.name.clone(),
                run: run.name.clone(),
                n_items: n,
                difference,
                ci,
                beyond_ci,
                reading,
            });
        }
    }
    Ok(out)
}

fn pairwise(
    inp: &Inputs,
    c: &CompareInput,
    opts: &VetOptions,
) -> Result<PairwiseSection, ReportError> {
    let criteria: BTreeSet<&str> = c.records.iter().map(|r| r.criterion.as_str()).collect();
    let criterion = criteria
        .iter()
        .next()
        .map_or_else(|| "overall".to_string(), |s| s.to_string());
    let mut notes = Vec::new();
    if criteria.len() > 1 {
        notes.push(format!(
            "the comparison run holds several criteria; only `{criterion}` is shown"
        ));
    }
    let records: Vec<PairRecord> = c
        .records
        .iter()
        .filter(|r| r.criterion == criterion)
        .cloned()
        .collect();
    let mut outcomes = pair_outcomes(&records).map_err(stats_err("the pair outcomes"))?;
    let judged: Vec<_> = outcomes.iter().map(|o| o.judged()).collect();
    let position = if judged.is_empty() {
        None
    } else {
        let p = position_bias(&judged).map_err(stats_err("the position bias"))?;
        Some(Position {
            n_pairs: p.n_pairs,
            consistency: p.positional_consistency,
            first_slot_win_rate: p.first_slot_win_rate,
            first_slot_ci: p.first_slot_win_rate_ci,
            p_value: p.first_slot_p_value,
            caution: p.caution,
            verdict_line: p.verdict_line,
        })
    };
    let (rule, vetted_rules) = report_rule(inp, &records, &criterion, opts)?;
    if let Some(r) = &rule {
        set_verdicts(&mut outcomes, &r.verdicts);
    }
    let rule_name = rule.as_ref().map_or("debiased", |r| r.name.as_str());
    let (ranking, ranking_note) = match rank(&outcomes, rule_name, inp.resamples, inp.seed) {
        Ok(r) => (Some(r), None),
        Err(e) => (None, Some(format!("no ranking: {e}"))),
    };
    let length = inp
        .answers
        .map(|a| length_probe(&outcomes, a))
        .unwrap_or_default();
    if inp.answers.is_none() {
        notes.push("no answers file given: no length or self-preference probe".into());
    }
    // The judge's own answers are those whose `written_by` is the given name, else the
    // model file's stem, as in `assize compare`.
    let judge_name = inp.judge_name.map_or_else(
        || {
            std::path::Path::new(&c.model)
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default()
        },
        str::to_string,
    );
    let self_pref = inp.answers.map(|answers| {
        let pointwise = match (inp.runs.first(), inp.labels) {
            (Some(run), Some(labels)) => Some((run.records.as_slice(), labels, inp.rubric)),
            _ => None,
        };
        self_preference(
            &judge_name,
            &outcomes,
            answers,
            inp.preferences,
            pointwise,
            inp.seed,
        )
    });
    let (mut human, mut human_pairs) = (Vec::new(), 0);
    if let Some(v) = &vetted_rules {
        if let Some(k) = v.criteria.iter().find(|k| k.criterion == criterion) {
            human_pairs = k.n_pairs;
            human = k
                .methods
                .iter()
                .map(|m| HumanAgreement {
                    method: if m.out_of_sample {
                        format!("{} (tie band scored out of sample)", m.method)
                    } else {
                        m.method.clone()
                    },
                    accuracy: m.accuracy,
                    accuracy_ci: m.accuracy_ci.as_ref().map(|i| (i.lower, i.upper)),
                    kappa: m.kappa,
                })
                .collect();
        }
    } else if inp.preferences.is_some() {
        notes.push(
            "no judged pair was compared by humans: the ranking uses the calibrated rule".into(),
        );
    }
    Ok(PairwiseSection {
        dir: c.dir.clone(),
        model: c.model.clone(),
        criterion,
        pairs: outcomes.len(),
        low_mass: records
            .iter()
            .filter(|r| r.captured_mass < PAIR_LOW_MASS)
            .count(),
        position,
        rule,
        ranking,
        ranking_note,
        length,
        human,
        self_preference: self_pref,
        human_pairs,
        notes,
    })
}

/// The ranking's verdict rule: chosen against the human preferences (with the first
/// grading run feeding the pointwise rules) when they overlap the pairs, else calibrated.
fn report_rule(
    inp: &Inputs,
    records: &[PairRecord],
    criterion: &str,
    opts: &VetOptions,
) -> Result<(Option<RankingRule>, Option<PairVetReport>), ReportError> {
    let inputs = PairInputs {
        judges: vec![records],
        probes: vec![inp.compare.map_or(&[][..], |c| c.probes.as_slice())],
        grades: inp.runs.first().map(|r| (r.records.as_slice(), inp.rubric)),
    };
    let vetted = match inp.preferences {
        Some(prefs) => match vet_pair_inputs(&inputs, prefs, opts) {
            Ok(v) => Some(v),
            Err(VetError::NoPairOverlap { .. }) => None,
            Err(e) => return Err(stats_err("the pairwise vetting")(e)),
        },
        None => None,
    };
    let rule = ranking_rule(&inputs, criterion, vetted.as_ref())
        .map_err(stats_err("the ranking's verdict rule"))?;
    Ok((rule, vetted))
}

/// Every human score per (question, system, criterion), sorted by rater.
fn human_scores(inp: &Inputs) -> HashMap<(String, String, String), Vec<HumanScore>> {
    let mut labels: HashMap<(String, String, String), Vec<HumanScore>> = HashMap::new();
    for l in inp.labels.unwrap_or_default() {
        labels
            .entry((l.question_id.clone(), l.system.clone(), l.criterion.clone()))
            .or_default()
            .push(HumanScore {
                rater: l.rater.clone(),
                score: l.score.clone(),
            });
    }
    for v in labels.values_mut() {
        v.sort_by(|a, b| a.rater.cmp(&b.rater));
    }
    labels
}

/// The human consensus label of one item (lower median, as in `vet`).
fn consensus_label(c: &crate::rubric::Criterion, human: &[HumanScore]) -> Option<usize> {
    let positions: Vec<usize> = human
        .iter()
        .filter_map(|h| c.scale.index_of(&h.score))
        .collect();
    consensus_index(&positions)
}

/// At least [`DISPUTE_POINTS`] between the judge's expected score and the consensus.
fn is_disputed(r: &GradeRecord, c: &crate::rubric::Criterion, consensus: Option<usize>) -> bool {
    consensus.is_some_and(|i| (r.expected - c.scale.values()[i]).abs() >= DISPUTE_POINTS - 1e-9)
}

fn answers_by_item<'a>(inp: &Inputs<'a>) -> HashMap<(&'a str, &'a str), &'a AnswerRecord> {
    inp.answers
        .unwrap_or_default()
        .iter()
        .map(|a| ((a.question_id.as_str(), a.system.as_str()), a))
        .collect()
}

fn item_key(r: &GradeRecord) -> (String, String, String) {
    (r.question_id.clone(), r.system.clone(), r.criterion.clone())
}

/// Grades with low captured mass, and grades whose expected score is at least
/// [`DISPUTE_POINTS`] from the human consensus (lower median, as in `vet`).
fn flagged(inp: &Inputs) -> Vec<FlaggedItem> {
    let labels = human_scores(inp);
    let answers = answers_by_item(inp);
    let mut out = Vec::new();
    for run in inp.runs {
        let mut records: Vec<&GradeRecord> = run.records.iter().collect();
        records.sort_by_key(|r| item_key(r));
        for r in records {
            let Some(c) = inp.rubric.criterion(&r.criterion) else {
                continue;
            };
            let human = labels.get(&item_key(r)).cloned().unwrap_or_default();
            let consensus = consensus_label(c, &human);
            let mut reasons = Vec::new();
            if r.low_mass {
                reasons.push("low_mass".to_string());
            }
            if is_disputed(r, c, consensus) {
                reasons.push("disputed".to_string());
            }
            if reasons.is_empty() {
                continue;
            }
            let answer = answers.get(&(r.question_id.as_str(), r.system.as_str()));
            out.push(FlaggedItem {
                run: run.name.clone(),
                question_id: r.question_id.clone(),
                system: r.system.clone(),
                criterion: r.criterion.clone(),
                reasons,
                expected: r.expected,
                argmax: r.argmax.clone(),
                captured_mass: r.captured_mass,
                probabilities: r.probabilities.clone(),
                human_consensus: consensus.map(|i| c.scale.labels()[i].clone()),
                human_scores: human,
                rationale: r.rationale.clone(),
                question: answer.map(|a| a.question.clone()),
                answer: answer.map(|a| a.answer.clone()),
            });
        }
    }
    out
}

/// What makes an answer worth a look, over all its grades.
fn item_flags(criteria: &[ItemCriterion], screened: bool) -> Vec<String> {
    let grades = || criteria.iter().flat_map(|c| &c.grades);
    [
        ("low_mass", grades().any(|g| g.low_mass)),
        ("disputed", grades().any(|g| g.disputed)),
        ("screened", screened),
    ]
    .iter()
    .filter(|f| f.1)
    .map(|f| f.0.to_string())
    .collect()
}

/// Every answer any run graded, ordered by question and system, with every grade of
/// every run and further grade set per criterion, the human scores and the screen's
/// findings on the answer text.
fn items(inp: &Inputs, criteria: &[CriterionInfo]) -> Vec<ItemView> {
    let sources: Vec<(&str, SourceKind, &[GradeRecord])> = inp
        .runs
        .iter()
        .map(|r| (r.name.as_str(), SourceKind::Run, r.records.as_slice()))
        .chain(
            inp.extra
                .iter()
                .map(|g| (g.name.as_str(), g.kind, g.records.as_slice())),
        )
        .collect();
    let mut grades: BTreeMap<(String, String), BTreeMap<String, Vec<ItemGrade>>> = BTreeMap::new();
    for r in inp.runs.iter().flat_map(|run| &run.records) {
        grades
            .entry((r.question_id.clone(), r.system.clone()))
            .or_default();
    }
    let labels = human_scores(inp);
    for (name, kind, records) in sources {
        for r in records {
            let Some(per_item) = grades.get_mut(&(r.question_id.clone(), r.system.clone())) else {
                continue;
            };
            let Some(c) = inp.rubric.criterion(&r.criterion) else {
                continue;
            };
            let human = labels.get(&item_key(r)).map_or(&[][..], Vec::as_slice);
            per_item
                .entry(r.criterion.clone())
                .or_default()
                .push(ItemGrade {
                    source: name.to_string(),
                    kind,
                    expected: r.expected,
                    argmax: r.argmax.clone(),
                    probabilities: r.probabilities.clone(),
                    captured_mass: (kind != SourceKind::Calibrated).then_some(r.captured_mass),
                    low_mass: r.low_mass,
                    disputed: is_disputed(r, c, consensus_label(c, human)),
                });
        }
    }
    let answers = answers_by_item(inp);
    grades
        .into_iter()
        .map(|((question_id, system), mut per_item)| {
            let answer = answers.get(&(question_id.as_str(), system.as_str()));
            let criteria: Vec<ItemCriterion> = criteria
                .iter()
                .filter_map(|info| {
                    let grades = per_item.remove(&info.key)?;
                    let c = inp.rubric.criterion(&info.key)?;
                    let key = (question_id.clone(), system.clone(), info.key.clone());
                    let human_scores = labels.get(&key).cloned().unwrap_or_default();
                    Some(ItemCriterion {
                        criterion: info.key.clone(),
                        human_consensus: consensus_label(c, &human_scores)
                            .map(|i| c.scale.labels()[i].clone()),
                        human_scores,
                        grades,
                    })
                })
                .collect();
            let screen = answer.map(|a| screen(&a.answer).flags).unwrap_or_default();
            ItemView {
                flags: item_flags(&criteria, !screen.is_empty()),
                screen,
                question: answer.map(|a| a.question.clone()),
                answer: answer.map(|a| a.answer.clone()),
                question_id,
                system,
                criteria,
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rubric::load_rubric;

    fn rec(q: &str, expected: f64, low_mass: bool) -> GradeRecord {
        GradeRecord {
            question_id: q.into(),
            system: "sys".into(),
            criterion: "correctness".into(),
            labels: (1..=5).map(|i| i.to_string()).collect(),
            probabilities: vec![0.2; 5],
            captured_mass: if low_mass { 0.2 } else { 0.9 },
            expected,
            argmax: "3".into(),
            spread: 1.0,
            low_mass,
            rationale: None,
        }
    }

    fn run(name: &str, records: Vec<GradeRecord>) -> RunInput {
        RunInput {
            name: name.into(),
            dir: name.into(),
            model: String::new(),
            records,
        }
    }

    fn label(q: &str, rater: &str, score: &str) -> LabelRow {
        LabelRow {
            question_id: q.into(),
            system: "sys".into(),
            criterion: "correctness".into(),
            rater: rater.into(),
            score: score.into(),
            line: 0,
        }
    }

    fn build_with(runs: &[RunInput], labels: Option<&[LabelRow]>) -> Report {
        build_full(runs, labels, &[])
    }

    fn build_full(runs: &[RunInput], labels: Option<&[LabelRow]>, extra: &[GradeSet]) -> Report {
        let rubric = load_rubric(
            &std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("judge-templates/rubrics/quick.toml"),
        )
        .expect("bundled rubric");
        let inputs = Inputs {
            runs,
            compare: None,
            labels,
            preferences: None,
            rubric: &rubric,
            answers: None,
            judge_name: None,
            seed: 7,
            resamples: 200,
            extra,
        };
        build(&inputs).expect("report")
    }

    /// A paired bootstrap of a constant per-item difference is degenerate at that
    /// constant (every resample mean equals it): +0.5 on every item gives the interval
    /// [0.5, 0.5], beyond 0; an identical rerun gives [0, 0], not beyond 0.
    #[test]
    fn constant_shift_between_runs_is_beyond_its_interval_and_no_shift_is_not() {
        let base: Vec<GradeRecord> = [2.0, 3.0, 4.0, 4.5]
            .iter()
            .enumerate()
            .map(|(i, v)| rec(&format!("q{i}"), *v, false))
            .collect();
        let shifted: Vec<GradeRecord> = base
            .iter()
            .map(|r| GradeRecord {
                expected: r.expected + 0.5,
                ..r.clone()
            })
            .collect();
        let r = build_with(
            &[
                run("before", base.clone()),
                run("after", shifted),
                run("again", base),
            ],
            None,
        );
        assert_eq!(r.deltas.len(), 2);
        let d = &r.deltas[0];
        assert_eq!(
            (d.run.as_str(), d.n_items, d.difference, d.ci, d.beyond_ci),
            ("after", 4, 0.5, Some((0.5, 0.5)), true)
        );
        let same = &r.deltas[1];
        assert_eq!(
            (same.difference, same.ci, same.beyond_ci),
            (0.0, Some((0.0, 0.0)), false)
        );
        assert!(r
            .cautions
            .iter()
            .any(|c| c.kind == CautionKind::BeforeAfter && c.message.contains("`again`")));
    }

    /// Disputed means 2 or more points from the lower-median human consensus (as in
    /// `vet`): ratings 4, 5, 5 give consensus 5, so 2.5 is disputed and 3.1 is not;
    /// low captured mass is flagged whatever the humans said.
    #[test]
    fn flagged_items_are_low_mass_or_two_points_from_the_consensus() {
        let records = vec![
            rec("q1", 2.5, false),
            rec("q2", 3.1, false),
            rec("q3", 4.0, true),
        ];
        let labels: Vec<LabelRow> = ["q1", "q2"]
            .iter()
            .flat_map(|q| [label(q, "a", "4"), label(q, "b", "5"), label(q, "c", "5")])
            .collect();
        let r = build_with(&[run("only", records)], Some(&labels));
        let got: Vec<(&str, Vec<String>, Option<String>)> = r
            .flagged
            .iter()
            .map(|f| {
                (
                    f.question_id.as_str(),
                    f.reasons.clone(),
                    f.human_consensus.clone(),
                )
            })
            .collect();
        assert_eq!(
            got,
            vec![
                ("q1", vec!["disputed".to_string()], Some("5".to_string())),
                ("q3", vec!["low_mass".to_string()], None)
            ]
        );
        assert!(r
            .cautions
            .iter()
            .any(|c| c.kind == CautionKind::LowCapturedMass));
        assert!(!r.cautions.iter().any(|c| c.kind == CautionKind::NoLabels));
    }

    /// The per-item view holds every answer, flagged or not, with one grade per run
    /// and per further grade set; a calibrated grade has no captured mass, and a grade
    /// 2 points from the consensus is disputed in whichever source it is.
    #[test]
    fn every_answer_shows_every_source_grade_with_its_flags() {
        let base = vec![rec("q1", 4.9, false), rec("q2", 3.0, true)];
        let later = vec![rec("q1", 2.5, false), rec("q2", 3.0, false)];
        let calibrated = GradeSet {
            name: "calibrated judge (out of fold)".into(),
            kind: SourceKind::Calibrated,
            records: vec![rec("q1", 4.5, false)],
        };
        let labels = [label("q1", "a", "5"), label("q1", "b", "5")];
        let r = build_full(
            &[run("before", base), run("after", later)],
            Some(&labels),
            &[calibrated],
        );
        assert_eq!(r.items.len(), 2);
        let q1 = &r.items[0].criteria[0];
        let got: Vec<(&str, SourceKind, Option<f64>, bool)> = q1
            .grades
            .iter()
            .map(|g| (g.source.as_str(), g.kind, g.captured_mass, g.disputed))
            .collect();
        assert_eq!(
            got,
            vec![
                ("before", SourceKind::Run, Some(0.9), false),
                ("after", SourceKind::Run, Some(0.9), true),
                (
                    "calibrated judge (out of fold)",
                    SourceKind::Calibrated,
                    None,
                    false
                ),
            ]
        );
        assert_eq!(q1.human_consensus.as_deref(), Some("5"));
        assert_eq!(r.items[0].flags, vec!["disputed".to_string()]);
        assert_eq!(r.items[1].flags, vec!["low_mass".to_string()]);
        assert!(r.items[1].criteria[0].human_scores.is_empty());
    }
}
