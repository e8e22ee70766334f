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
use super::{print_json, OutputArgs};
use crate::data::{read_answers, read_labels_checked, OtherCriteria, read_preferences, AnswerRecord};
use crate::judge::{GradeRecord, PairRecord, ProbeRecord};
use crate::overlap::{score_pair, OverlapOptions};
use crate::rubric::Rubric;
use crate::store::read_records;
use crate::vet::{
    gate_failures, report_text, vet, vet_pair_inputs, PairInputs, PairVetReport, Variant,
    VariantKind, VetOptions, VetReport,
};

/// Arguments of `assize vet`.
#[derive(Debug, Clone, Args)]
pub struct VetArgs {
    /// Grading run folder (holds `grades.jsonl`)
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
    /// Comparison run folder (holds `pairs.jsonl`)
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
    let rubric = args.rubric.load_for_run(&args.grades)?;
    let answers = args.baselines.as_deref().map(read_answers).transpose()?;
    let labels = read_labels_checked(&args.labels, &rubric.scales(), answers.as_deref(), OtherCriteria::Refuse)?;
    let primary = load_grades(&args.grades)?;
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
    let mut variants = vec![
        Variant {
            name: "expected score".into(),
            records: &primary,
            kind: VariantKind::ExpectedScore,
        },
        Variant {
            name: "argmax label".into(),
            records: &primary,
            kind: VariantKind::Argmax,
        },
    ];
    for (name, recs) in &extra {
        variants.push(Variant {
            name: name.clone(),
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
    let opts = VetOptions {
        resamples: args.resamples,
        seed: args.seed,
        ..VetOptions::default()
    };
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
    Ok(VetOutput {
        pointwise,
        pairwise,
        gate_failures: gate,
    })
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
