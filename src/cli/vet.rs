//! `assize vet`: compare judge grades with human labels per criterion (agreement
//! against the human ceiling, calibration, trust cards), optionally pairwise verdicts
//! with human preferences, and reference-based metrics as baselines; an optional gate
//! for CI pipelines. Never runs the model: it reads finished run folders.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use serde::Serialize;

use super::common::RubricArg;
use super::errors::{usage, GateFailed};
use super::evidence::{Evidence, PanelArgs, PRIMARY};
use super::{print_json, OutputArgs};
use crate::calibrate::{FeatureTable, MappingFile, MAPPING_FORMAT};
use crate::data::{
    read_answers, read_labels_checked, read_preferences, AnswerRecord, OtherCriteria,
};
use crate::judge::panel::Panel;
use crate::judge::{GradeRecord, PairRecord, ProbeRecord};
use crate::overlap::{score_pair, OverlapOptions};
use crate::report::{GradeSet, SourceKind};
use crate::rubric::Rubric;
use crate::store::read_records;
use crate::vet::{
    choice_text, choose_variant, cross_fitted_records, fit_mappings, gate_failures, report_text,
    vet, vet_pair_inputs, Candidate, CandidateSource, PairInputs, PairVetReport, Variant,
    VariantChoice, VariantKind, VetOptions, VetReport,
};

/// Arguments of `assize vet`.
#[derive(Debug, Clone, Args)]
pub struct VetArgs {
    /// Grading run folder (holds `grades.jsonl`), or `latest` for the last one finished in `runs`
    #[arg(long, short = 'g', value_name = "DIR")]
    pub grades: PathBuf,
    /// Human labels in long form (question_id, system, criterion, rater, score)
    #[arg(long, short = 'l', value_name = "FILE")]
    pub labels: PathBuf,
    #[command(flatten)]
    pub rubric: RubricArg,
    /// More grading runs to show side by side, as `NAME=DIR` (e.g. `reasoning=runs/grade-…`)
    #[arg(long, value_name = "NAME=DIR")]
    pub variant: Vec<String>,
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    ///
    /// Adds reference-based metrics (ROUGE-L, BLEU, chrF, token F1) as baselines.
    #[arg(long = "answers", short = 'a', value_name = "FILE")]
    pub baselines: Option<PathBuf>,
    /// Comparison run folder (holds `pairs.jsonl`), or `latest` for the last one finished in `runs`
    ///
    /// Its verdicts are vetted against `--preferences`. Repeat it with the comparison
    /// runs of other judges on the same pairs to vet them as a panel (the first is the
    /// primary judge). Slot probes stored in a run folder enter that judge's slot
    /// prior; the grades of `--grades` feed the pointwise rules.
    #[arg(long, value_name = "DIR", requires = "preferences")]
    pub pairs: Vec<PathBuf>,
    /// Human pairwise preferences (question_id, system_a, system_b, rater, preferred)
    #[arg(long, value_name = "FILE")]
    pub preferences: Option<PathBuf>,
    /// Exit with status 1 when a criterion's judge quadratic kappa has a 95% lower bound below this
    #[arg(long, value_name = "KAPPA")]
    pub min_kappa: Option<f64>,
    /// Bootstrap resamples per interval
    #[arg(long, value_name = "N", default_value_t = 2000, value_parser = super::values::at_least_one)]
    pub resamples: usize,
    /// Seed of every random draw
    #[arg(long, value_name = "N", default_value_t = 7)]
    pub seed: u64,
    /// Also write the result table as CSV to this file
    #[arg(long, value_name = "FILE")]
    pub csv: Option<PathBuf>,
    #[command(flatten)]
    pub panel: PanelArgs,
    /// Add label-calibrated grades, cross-fitted on the labelled items so every figure
    /// shown for them is out of sample (needs `--labels`)
    #[arg(long)]
    pub calibrate: bool,
    /// Fit the calibration on all labelled items and save it here, with what it was fitted on
    #[arg(long, value_name = "FILE", requires = "calibrate")]
    pub save_calibration: Option<PathBuf>,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// What `assize vet --json` prints.
#[derive(Debug, Serialize)]
pub struct VetOutput {
    /// Pointwise vetting per criterion.
    pub pointwise: VetReport,
    /// Pairwise vetting, when a comparison run and preferences were given.
    pub pairwise: Option<PairVetReport>,
    /// Criteria that failed `--min-kappa`.
    pub gate_failures: Vec<String>,
    /// Every variant out of sample and the best per criterion (nested cross-validation).
    pub variant_choice: VariantChoice,
    /// Panel members and items left out of the panel, when `--panel` was given.
    pub panel: Option<PanelSummary>,
    /// Methods chosen for calibrated variants, and why something was not calibrated.
    pub calibration_notes: Vec<String>,
    /// Panel members', the panel's and the calibrated out-of-fold grades, for the
    /// report's per-item view (not printed).
    #[serde(skip)]
    pub grade_sets: Vec<GradeSet>,
    /// What grading cost per judge run (`--grades` and each panel member) and together.
    pub grading_cost: super::evidence::GradingCosts,
}

/// The panel as vetted.
#[derive(Debug, Serialize)]
pub struct PanelSummary {
    /// Member names; `judge` is the `--grades` run.
    pub members: Vec<String>,
    /// Items (question/system/criterion) some member did not grade, left out of the panel.
    pub incomplete: Vec<String>,
}

fn load_grades(dir: &std::path::Path) -> anyhow::Result<Vec<GradeRecord>> {
    let path = dir.join(super::grade::GRADES_FILE);
    if !path.exists() {
        return Err(usage(
            format!(
                "`{}` holds no grading results (`{}` is missing)",
                dir.display(),
                super::grade::GRADES_FILE
            ),
            "pass the run folder that `assize grade` printed",
        ));
    }
    Ok(read_records(&path)?)
}

/// Baseline records: each overlap metric of each answer against its reference,
/// copied to every criterion of the rubric (a metric has no notion of criterion).
fn baseline_records(
    answers: &[AnswerRecord],
    rubric: &Rubric,
) -> anyhow::Result<Vec<(String, Vec<GradeRecord>)>> {
    let opts = OverlapOptions::default();
    let metrics = ["ROUGE-L", "BLEU", "chrF", "token F1"];
    let mut out: Vec<(String, Vec<GradeRecord>)> = metrics
        .iter()
        .map(|m| (m.to_string(), Vec::new()))
        .collect();
    for a in answers {
        let Some(r) = &a.reference else { continue };
        let s = score_pair(&a.answer, &[r.as_str()], &opts)?;
        let values = [s.rougel_f, s.bleu, s.chrf, s.token_f1];
        for c in &rubric.criteria {
            for (slot, v) in out.iter_mut().zip(values) {
                slot.1.push(GradeRecord {
                    question_id: a.question_id.clone(),
                    system: a.system.clone(),
                    criterion: c.key.clone(),
                    labels: c.scale.labels(),
                    probabilities: Vec::new(),
                    captured_mass: 1.0,
                    expected: v,
                    argmax: String::new(),
                    spread: 0.0,
                    low_mass: false,
                    rationale: None,
                });
            }
        }
    }
    Ok(out)
}

/// Each comparison run's pair records and slot probes (none when the run has no probes file).
pub fn load_comparisons(
    dirs: &[PathBuf],
) -> anyhow::Result<(Vec<Vec<PairRecord>>, Vec<Vec<ProbeRecord>>)> {
    let (mut pairs, mut probes) = (Vec::new(), Vec::new());
    for dir in dirs {
        let path = dir.join(super::compare::PAIRS_FILE);
        if !path.exists() {
            return Err(usage(
                format!(
                    "`{}` holds no comparison results (`{}` is missing)",
                    dir.display(),
                    super::compare::PAIRS_FILE
                ),
                "pass the run folder that `assize compare` printed",
            ));
        }
        pairs.push(read_records(&path)?);
        let probe_path = dir.join(super::compare::PROBES_FILE);
        probes.push(if probe_path.exists() {
            read_records(&probe_path)?
        } else {
            Vec::new()
        });
    }
    Ok((pairs, probes))
}

/// Compute the vetting reports.
pub fn vet_run(args: &VetArgs) -> anyhow::Result<VetOutput> {
    let mut args = args.clone();
    super::evidence::expand_panel_folder(&mut args.grades, &mut args.panel)?;
    let args = &args;
    let rubric = args.rubric.load_for_run(&args.grades)?;
    let answers = args.baselines.as_deref().map(read_answers).transpose()?;
    let labels = read_labels_checked(
        &args.labels,
        &rubric.scales(),
        answers.as_deref(),
        OtherCriteria::Refuse,
    )?;
    let evidence = Evidence::load(&args.grades, &args.panel, args.baselines.as_deref())?;
    let primary = &evidence.runs[0].records;
    let mut extra = Vec::new();
    for v in &args.variant {
        let Some((name, dir)) = v.split_once('=') else {
            return Err(usage(
                format!("`--variant {v}` is not `NAME=DIR`"),
                "write it as e.g. `--variant reasoning=runs/grade-abc`",
            ));
        };
        extra.push((name.to_string(), load_grades(std::path::Path::new(dir))?));
    }
    let baselines = match &answers {
        Some(answers) => baseline_records(answers, &rubric)?,
        None => Vec::new(),
    };
    let opts = VetOptions {
        resamples: args.resamples,
        seed: args.seed,
        folds: args.panel.folds,
        ..VetOptions::default()
    };
    let panel = evidence.panel()?;
    let grading_cost = evidence.costs();
    let tables: Vec<(String, FeatureTable)> = if args.calibrate {
        let mut t = vec![(format!("calibrated {PRIMARY}"), evidence.table(false))];
        if panel.is_some() {
            t.push(("calibrated panel".to_string(), evidence.table(true)));
        }
        t
    } else {
        Vec::new()
    };
    let mut calibration_notes: Vec<String> = evidence.overlap_note.iter().cloned().collect();
    let mut calibrated = Vec::new();
    for (name, table) in &tables {
        let (recs, notes) = cross_fitted_records(table, Some(PRIMARY), &labels, &rubric, &opts)?;
        calibration_notes.extend(notes.into_iter().map(|n| format!("{name} {n}")));
        calibrated.push((name.clone(), recs));
    }
    let mut fixed: Vec<(String, &[GradeRecord], VariantKind)> = vec![
        ("expected score".into(), primary, VariantKind::ExpectedScore),
        ("argmax label".into(), primary, VariantKind::Argmax),
    ];
    for (name, recs) in &extra {
        fixed.push((name.clone(), recs, VariantKind::ExpectedScore));
    }
    for r in evidence.runs.iter().skip(1) {
        fixed.push((r.name.clone(), &r.records, VariantKind::ExpectedScore));
    }
    if let Some(p) = &panel {
        fixed.push(("panel mean".into(), &p.records, VariantKind::ExpectedScore));
    }
    let mut variants: Vec<Variant> = fixed
        .iter()
        .map(|(name, records, kind)| Variant {
            name: name.clone(),
            records,
            kind: *kind,
        })
        .collect();
    for (name, recs) in &calibrated {
        variants.push(Variant {
            name: format!("{name} (oos)"),
            records: recs,
            kind: VariantKind::ExpectedScore,
        });
    }
    for (name, recs) in &baselines {
        variants.push(Variant {
            name: name.clone(),
            records: recs,
            kind: VariantKind::Baseline,
        });
    }
    let mut candidates: Vec<Candidate> = fixed
        .iter()
        .map(|(name, records, kind)| Candidate {
            name: name.clone(),
            source: CandidateSource::Fixed(records, *kind),
        })
        .collect();
    for (name, table) in &tables {
        candidates.push(Candidate {
            name: name.clone(),
            source: CandidateSource::Calibrated {
                table,
                isotonic_source: Some(PRIMARY.into()),
            },
        });
    }
    let variant_choice = choose_variant(&candidates, &labels, &rubric, &opts)?;
    if let (Some(path), Some((_, table))) = (&args.save_calibration, tables.last()) {
        let file = MappingFile {
            format: MAPPING_FORMAT,
            rubric: rubric.name.clone(),
            sources: evidence.fingerprints(tables.len() > 1),
            overlap: evidence.overlap_names(),
            mappings: fit_mappings(
                table,
                Some(PRIMARY),
                &labels,
                &rubric,
                &opts,
                &variant_choice,
                &tables.last().expect("checked").0,
            )?,
        };
        crate::store::write_atomic(path, serde_json::to_string_pretty(&file)?.as_bytes())?;
        calibration_notes.push(format!(
            "saved `{}` (fitted on all labelled items) to `{}`",
            tables.last().map_or("", |t| t.0.as_str()),
            path.display()
        ));
    }
    let pointwise = vet(&variants, &labels, &rubric, &opts)?;
    let pairwise = match &args.preferences {
        Some(p) if !args.pairs.is_empty() => {
            let (pairs, probes) = load_comparisons(&args.pairs)?;
            let inputs = PairInputs {
                judges: pairs.iter().map(Vec::as_slice).collect(),
                probes: probes.iter().map(Vec::as_slice).collect(),
                grades: Some((&primary, &rubric)),
            };
            Some(vet_pair_inputs(&inputs, &read_preferences(p)?, &opts)?)
        }
        _ => None,
    };
    let gate = args
        .min_kappa
        .map(|k| gate_failures(&pointwise, k))
        .unwrap_or_default();
    let grade_sets = grade_sets(&evidence, panel.as_ref(), calibrated);
    Ok(VetOutput {
        grade_sets,
        pointwise,
        pairwise,
        gate_failures: gate,
        variant_choice,
        panel: panel.map(|p| PanelSummary {
            members: p.members,
            incomplete: p.incomplete.into_iter().map(|i| i.key).collect(),
        }),
        calibration_notes,
        grading_cost,
    })
}

/// The grade sets beside the primary run: panel members, the panel, calibrated ones.
fn grade_sets(
    evidence: &Evidence,
    panel: Option<&Panel<GradeRecord>>,
    calibrated: Vec<(String, Vec<GradeRecord>)>,
) -> Vec<GradeSet> {
    let set = |name: &str, kind, records: &[GradeRecord]| GradeSet {
        name: name.to_string(),
        kind,
        records: records.to_vec(),
    };
    let mut sets: Vec<GradeSet> = evidence
        .runs
        .iter()
        .skip(1)
        .map(|r| set(&r.name, SourceKind::PanelMember, &r.records))
        .collect();
    if let Some(p) = panel {
        sets.push(set("panel mean", SourceKind::Panel, &p.records));
    }
    sets.extend(calibrated.into_iter().map(|(name, records)| GradeSet {
        name: format!("{name} (out of fold)"),
        kind: SourceKind::Calibrated,
        records,
    }));
    sets
}

/// Run `assize vet`.
pub fn run(args: VetArgs) -> anyhow::Result<ExitCode> {
    let out = vet_run(&args)?;
    if let Some(path) = &args.csv {
        super::csv_out::write_vet(path, &out.pointwise)?;
    }
    if args.output.json {
        print_json(&out)?;
    } else {
        print!("{}", report_text(&out.pointwise, out.pairwise.as_ref()));
        print!("{}", choice_text(&out.variant_choice));
        if let Some(p) = &out.panel {
            println!(
                "panel: {} (mean of the members' score distributions, Verga et al. 2024); {} item(s) left out because a member did not grade them",
                p.members.join(", "),
                p.incomplete.len()
            );
        }
        for n in &out.calibration_notes {
            println!("calibration: {n}");
        }
        print!("{}", out.grading_cost.text());
    }
    if !out.gate_failures.is_empty() {
        return Err(GateFailed(format!(
            "judge agreement below --min-kappa {} on: {}",
            args.min_kappa.unwrap_or(0.0),
            out.gate_failures.join(", ")
        ))
        .into());
    }
    Ok(ExitCode::SUCCESS)
}
