//! `assize report`: render finished run folders as a report people read: one HTML
//! page (self-contained, offline, printable), a Markdown summary for a pull-request
//! comment, and a versioned JSON document. Input: grading run folders (the first is
//! the baseline), optionally a comparison run, human labels and preferences, the
//! rubric and the answers. Never runs the model and never computes a statistic
//! itself; `report` assembles what `judge`, `vet`, `probes` and `stats` compute.

use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::{SystemTime, UNIX_EPOCH};

use anyhow::Context as _;
use clap::Args;

use super::common::RubricArg;
use super::errors::usage;
use super::OutputArgs;
use crate::data::{read_answers, read_labels_checked, read_preferences, OtherCriteria};
use crate::judge::{GradeRecord, PairRecord};
use crate::report::{self, CompareInput, GradeSet, Inputs, Report, RunInput};
use crate::store::{read_records, Manifest, MANIFEST};

/// Arguments of `assize report`.
///
/// With no output flag the Markdown summary goes to stdout. Set `SOURCE_DATE_EPOCH`
/// (seconds) to stamp the report with that time instead of the clock, for
/// byte-identical reports.
#[derive(Debug, Clone, Args)]
pub struct ReportArgs {
    /// Grading run folder (holds `grades.jsonl`), or `latest` for the last one finished in `runs`
    ///
    /// Repeat to show runs side by side, the first being the baseline ("before").
    #[arg(long, short = 'g', value_name = "DIR", required = true)]
    pub grades: Vec<PathBuf>,
    /// Comparison run folder (holds `pairs.jsonl`), or `latest` for the last one finished in `runs`
    ///
    /// Adds position bias, the ranking, length and self-preference.
    #[arg(long = "pairs", value_name = "DIR")]
    pub compare: Option<PathBuf>,
    /// Human labels in long form (question_id, system, criterion, rater, score)
    ///
    /// Vets the judge: trust verdicts, confusion, calibration.
    #[arg(long, short = 'l', value_name = "FILE")]
    pub labels: Option<PathBuf>,
    /// Human pairwise preferences (question_id, system_a, system_b, rater, preferred)
    ///
    /// Checks the comparison run's verdicts.
    #[arg(long, value_name = "FILE", requires = "compare")]
    pub preferences: Option<PathBuf>,
    #[command(flatten)]
    pub rubric: RubricArg,
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    ///
    /// Gives the texts of listed items, answer lengths for the length probe and
    /// `written_by` for the self-preference probe.
    #[arg(long, short = 'a', value_name = "FILE")]
    pub answers: Option<PathBuf>,
    /// The `written_by` value marking answers the judge's own model wrote (default: the judge's model file name without `.gguf`)
    #[arg(long, value_name = "NAME")]
    pub judge_name: Option<String>,
    /// Write the HTML report (one self-contained file) here
    #[arg(long, value_name = "FILE")]
    pub html: Option<PathBuf>,
    /// Write the Markdown summary here
    #[arg(long, value_name = "FILE")]
    pub markdown: Option<PathBuf>,
    /// Write the JSON report (schema `assize.report/2`) here
    #[arg(long = "json-file", value_name = "FILE")]
    pub json_file: Option<PathBuf>,
    /// Seed of every random draw
    #[arg(long, value_name = "N", default_value_t = 7)]
    pub seed: u64,
    #[command(flatten)]
    pub panel: super::evidence::PanelArgs,
    /// Add label-calibrated grades, cross-fitted on the labelled items so every figure
    /// shown for them is out of sample (needs `--labels`)
    #[arg(long, requires = "labels")]
    pub calibrate: bool,
    /// Bootstrap resamples per interval
    #[arg(long, value_name = "N", default_value_t = 2000, value_parser = super::values::at_least_one)]
    pub resamples: usize,
    #[command(flatten)]
    pub output: OutputArgs,
}

fn manifest_model(dir: &Path) -> String {
    std::fs::read_to_string(dir.join(MANIFEST))
        .ok()
        .and_then(|t| serde_json::from_str::<Manifest>(&t).ok())
        .map(|m| m.model_path)
        .unwrap_or_default()
}

fn results_file(dir: &Path, file: &str, producer: &str) -> anyhow::Result<PathBuf> {
    let path = dir.join(file);
    if !path.exists() {
        return Err(usage(
            format!("`{}` holds no `{file}`", dir.display()),
            format!("pass the run folder that `assize {producer}` printed"),
        ));
    }
    Ok(path)
}

/// Display names of the runs: folder names, numbered when two are equal.
fn run_names(dirs: &[PathBuf]) -> Vec<String> {
    let base: Vec<String> = dirs
        .iter()
        .map(|d| {
            d.file_name().map_or_else(
                || d.display().to_string(),
                |n| n.to_string_lossy().into_owned(),
            )
        })
        .collect();
    base.iter()
        .enumerate()
        .map(|(i, n)| {
            if base.iter().filter(|m| *m == n).count() > 1 {
                format!("{n} ({})", i + 1)
            } else {
                n.clone()
            }
        })
        .collect()
}

/// Days since 1970-01-01 to a civil date (Hinnant 2013, "chrono-compatible low-level date algorithms").
fn civil_from_days(z: i64) -> (i64, u32, u32) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    (yoe + era * 400 + i64::from(m <= 2), m, d)
}

/// Seconds since the epoch as RFC 3339 UTC.
pub fn rfc3339(secs: i64) -> String {
    let (y, m, d) = civil_from_days(secs.div_euclid(86_400));
    let s = secs.rem_euclid(86_400);
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        s / 3600,
        s / 60 % 60,
        s % 60
    )
}

fn now() -> String {
    let secs = std::env::var("SOURCE_DATE_EPOCH")
        .ok()
        .and_then(|v| v.trim().parse::<i64>().ok())
        .unwrap_or_else(|| {
            SystemTime::now()
                .duration_since(UNIX_EPOCH)
                .map_or(0, |d| d.as_secs() as i64)
        });
    rfc3339(secs)
}

/// Load every input and assemble the report; `extra` are the grade sets shown beside
/// the runs in the per-item view.
pub fn build_report(args: &ReportArgs, extra: &[GradeSet]) -> anyhow::Result<Report> {
    let rubric = args.rubric.load_for_run(&args.grades[0])?;
    let names = run_names(&args.grades);
    let mut runs = Vec::new();
    for (dir, name) in args.grades.iter().zip(names) {
        let path = results_file(dir, super::grade::GRADES_FILE, "grade")?;
        let records: Vec<GradeRecord> = read_records(&path)?;
        runs.push(RunInput {
            name,
            dir: dir.display().to_string(),
            model: manifest_model(dir),
            records,
        });
    }
    let compare = match &args.compare {
        Some(dir) => {
            let path = results_file(dir, super::compare::PAIRS_FILE, "compare")?;
            let records: Vec<PairRecord> = read_records(&path)?;
            let probe_path = dir.join(super::compare::PROBES_FILE);
            let probes = if probe_path.exists() {
                read_records(&probe_path)?
            } else {
                Vec::new()
            };
            Some(CompareInput {
                dir: dir.display().to_string(),
                model: manifest_model(dir),
                records,
                probes,
            })
        }
        None => None,
    };
    let answers = args.answers.as_deref().map(read_answers).transpose()?;
    let labels = args
        .labels
        .as_deref()
        .map(|p| {
            read_labels_checked(
                p,
                &rubric.scales(),
                answers.as_deref(),
                OtherCriteria::Refuse,
            )
        })
        .transpose()?;
    let preferences = args
        .preferences
        .as_deref()
        .map(read_preferences)
        .transpose()?;
    let inputs = Inputs {
        runs: &runs,
        compare: compare.as_ref(),
        labels: labels.as_deref(),
        preferences: preferences.as_deref(),
        rubric: &rubric,
        answers: answers.as_deref(),
        judge_name: args.judge_name.as_deref(),
        seed: args.seed,
        resamples: args.resamples,
        extra,
    };
    let mut r = report::build(&inputs).map_err(|e| match e {
        report::ReportError::UnknownCriterion { .. } => {
            let what = e.to_string();
            usage(what, "pass the rubric the run was graded with (`--rubric`)")
        }
        other => anyhow::Error::new(other),
    })?;
    r.generated_at = now();
    Ok(r)
}

fn write(path: &Path, text: &str, what: &str) -> anyhow::Result<()> {
    std::fs::write(path, text)
        .with_context(|| format!("cannot write the {what} report `{}`", path.display()))?;
    eprintln!("wrote {what} report `{}`", path.display());
    Ok(())
}

/// Run `assize report`.
pub fn run(mut args: ReportArgs) -> anyhow::Result<ExitCode> {
    super::evidence::expand_panel_folder(&mut args.grades[0], &mut args.panel)?;
    let (variants, extra) = match variant_section(&args)? {
        Some((section, sets)) => (Some(section), sets),
        None => (None, Vec::new()),
    };
    let mut r = build_report(&args, &extra)?;
    r.variants = variants;
    if let Some(p) = &args.html {
        write(p, &report::html::render(&r)?, "HTML")?;
    }
    if let Some(p) = &args.json_file {
        write(p, &report::json::render(&r), "JSON")?;
    }
    if let Some(p) = &args.markdown {
        write(p, &report::markdown::render(&r), "Markdown")?;
    }
    if args.output.json {
        print!("{}", report::json::render(&r));
    } else if args.html.is_none() && args.json_file.is_none() && args.markdown.is_none() {
        print!("{}", report::markdown::render(&r));
    }
    Ok(ExitCode::SUCCESS)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Hinnant (2013) civil calendar: 0 s is 1970-01-01T00:00:00Z; 951782400 s is the
    /// leap day 2000-02-29 (a well-known Unix timestamp); one second before 2000 ends
    /// the 1990s.
    #[test]
    fn epoch_seconds_format_as_utc_dates() {
        assert_eq!(rfc3339(0), "1970-01-01T00:00:00Z");
        assert_eq!(rfc3339(951_782_400), "2000-02-29T00:00:00Z");
        assert_eq!(rfc3339(946_684_799), "1999-12-31T23:59:59Z");
    }

    #[test]
    fn equal_folder_names_are_numbered() {
        let n = run_names(&[
            PathBuf::from("a/run"),
            PathBuf::from("b/run"),
            PathBuf::from("c/other"),
        ]);
        assert_eq!(n, vec!["run (1)", "run (2)", "other"]);
    }
}

/// The out-of-sample variant comparison of `vet`, when `--panel` or `--calibrate` asks
/// for it and labels are given; the first grading run is the primary judge. Also
/// returns the panel's and the calibrated grades for the per-item view.
fn variant_section(
    args: &ReportArgs,
) -> anyhow::Result<Option<(report::VariantSection, Vec<GradeSet>)>> {
    let Some(labels) = &args.labels else {
        return Ok(None);
    };
    if !args.calibrate && args.panel.panel.is_empty() {
        return Ok(None);
    }
    let vet_args = super::vet::VetArgs {
        grades: args.grades[0].clone(),
        labels: labels.clone(),
        rubric: args.rubric.clone(),
        variant: Vec::new(),
        baselines: args.answers.clone(),
        pairs: Vec::new(),
        preferences: None,
        min_kappa: None,
        resamples: args.resamples,
        seed: args.seed,
        csv: None,
        panel: args.panel.clone(),
        calibrate: args.calibrate,
        save_calibration: None,
        output: super::OutputArgs {
            json: true,
            quiet: true,
        },
    };
    let out = super::vet::vet_run(&vet_args)?;
    let section = report::VariantSection {
        panel_members: out.panel.map(|p| p.members).unwrap_or_default(),
        choice: out.variant_choice,
        notes: out.calibration_notes,
        grading_cost: out.grading_cost,
    };
    Ok(Some((section, out.grade_sets)))
}
