//! `assize calibrate`: apply a calibration saved by `vet --save-calibration` to new
//! grading runs of the same setup, writing the calibrated grades as a run folder that
//! `estimate`, `vet` and `report` read. Refuses runs that differ from what the
//! calibration was fitted on (judges, rubric, templates, options, features), naming
//! every difference. Never runs a model and never changes the input runs.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use serde::Serialize;

use super::errors::usage;
use super::evidence::{Evidence, PanelArgs};
use super::{print_json, OutputArgs};
use crate::calibrate::MappingFile;
use crate::store::{write_atomic, Manifest, MANIFEST};

/// Arguments of `assize calibrate`.
#[derive(Debug, Clone, Args)]
pub struct CalibrateArgs {
    /// Calibration file written by `assize vet --save-calibration`
    #[arg(long, value_name = "FILE")]
    pub mapping: PathBuf,
    /// Grading run folder (holds `grades.jsonl`), or `latest` for the last one finished in `runs`
    #[arg(long, short = 'g', value_name = "DIR")]
    pub grades: PathBuf,
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    #[arg(long = "answers", short = 'a', value_name = "FILE")]
    pub baselines: Option<PathBuf>,
    #[command(flatten)]
    pub rubric: super::common::RubricArg,
    #[command(flatten)]
    pub panel: PanelArgs,
    /// Folder to write the calibrated grades into (`grades.jsonl` and `manifest.json`)
    #[arg(long, value_name = "DIR")]
    pub out_dir: PathBuf,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// What `assize calibrate --json` prints.
#[derive(Debug, Serialize)]
pub struct CalibrateReport {
    /// Folder written.
    pub run_dir: String,
    /// Calibrated records written.
    pub records: usize,
    /// Criteria calibrated.
    pub criteria: Vec<String>,
    /// Items left out because some judge or overlap feature was missing.
    pub incomplete: usize,
}

/// Run `assize calibrate`.
pub fn run(mut args: CalibrateArgs) -> anyhow::Result<ExitCode> {
    super::evidence::expand_panel_folder(&mut args.grades, &mut args.panel)?;
    let text = std::fs::read_to_string(&args.mapping)?;
    let mapping: MappingFile = serde_json::from_str(&text).map_err(|e| {
        usage(
            format!(
                "`{}` is not a calibration file: {e}",
                args.mapping.display()
            ),
            "write one with `assize vet --calibrate --save-calibration FILE`",
        )
    })?;
    let rubric = args.rubric.load_for_run(&args.grades)?;
    let evidence = Evidence::load(&args.grades, &args.panel, args.baselines.as_deref())?;
    let panel = evidence.runs.len() > 1;
    let differences = mapping.differences(
        &rubric.name,
        &evidence.fingerprints(panel),
        &evidence.overlap_names(),
    );
    if !differences.is_empty() {
        return Err(usage(
            format!(
                "the calibration `{}` does not match these runs:\n    {}",
                args.mapping.display(),
                differences.join("\n    ")
            ),
            "pass the same judges (`--panel NAME=DIR` in the same order), rubric, options and `--answers`, or fit a new calibration with `assize vet --calibrate --save-calibration`",
        ));
    }
    let table = evidence.table(panel);
    let records = mapping.apply(&table)?;
    std::fs::create_dir_all(&args.out_dir)?;
    let mut lines = String::new();
    for r in &records {
        lines.push_str(&serde_json::to_string(r)?);
        lines.push('\n');
    }
    write_atomic(
        &args.out_dir.join(super::grade::GRADES_FILE),
        lines.as_bytes(),
    )?;
    let manifest_path = args.grades.join(MANIFEST);
    let mut manifest: Manifest = serde_json::from_str(&std::fs::read_to_string(&manifest_path)?)?;
    manifest.kind = "calibrated".into();
    manifest
        .options
        .push(format!("calibration={}", args.mapping.display()));
    write_atomic(
        &args.out_dir.join(MANIFEST),
        serde_json::to_string_pretty(&manifest)?.as_bytes(),
    )?;
    let report = CalibrateReport {
        run_dir: args.out_dir.display().to_string(),
        records: records.len(),
        criteria: mapping
            .mappings
            .iter()
            .map(|m| m.criterion.clone())
            .collect(),
        incomplete: table.incomplete.len(),
    };
    if args.output.json {
        print_json(&report)?;
    } else {
        println!(
            "wrote {} calibrated grades ({}) to `{}`; {} item(s) left out for missing evidence",
            report.records,
            report.criteria.join(", "),
            report.run_dir,
            report.incomplete
        );
        println!("these grades are the mapping's predictions; they are trustworthy only for answers like the labelled ones (see README, When not to trust the results)");
    }
    Ok(ExitCode::SUCCESS)
}
