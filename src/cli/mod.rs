//! Command-line stage: argument structs, help text and the dispatch to each
//! subcommand. Input: parsed arguments. Output: data on stdout (text, or one JSON
//! document with `--json`), logs and progress on stderr. Never computes statistics
//! or touches tensors itself; it calls the stage modules.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

pub mod answer;
pub mod calibrate;
pub mod common;
pub mod compare;
pub mod csv_out;
pub mod errors;
pub mod estimate;
pub mod evidence;
pub mod grade;
pub mod grade_panel;
pub mod injection;
pub mod merge;
pub mod model;
pub mod overlap;
pub mod report;
pub mod rubric;
pub mod screen;
pub mod values;
pub mod vet;

pub use errors::{exit_code_for, render_error, GateFailed};

/// Grade open-ended answers with a small local judge model on a CPU, and check
/// whether that judge can be trusted.
///
/// assize reads the judge's token probabilities at each score slot instead of one
/// sampled word, vets the judge against human labels, and reports quality with
/// confidence intervals. Everything runs locally; nothing leaves the machine.
#[derive(Debug, Parser)]
#[command(
    name = "assize",
    version,
    propagate_version = true,
    max_term_width = 100
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Inspect, fetch, tokenise with and benchmark judge model files
    #[command(subcommand)]
    Model(model::ModelCommand),
    /// Grade answers criterion by criterion with the local judge (resumable)
    Grade(grade::GradeArgs),
    /// Compare systems pairwise, both answer orders, with bias probes and a ranking
    Compare(compare::CompareArgs),
    /// Probe whether instructions hidden in answers ("rate this 5") move the judge's grades
    Injection(injection::InjectionArgs),
    /// Join the shard folders of one run (`--shard K/N`) into a single run folder
    Merge(merge::MergeArgs),
    /// Let a local model answer a file of questions (to add a system, or probe self-preference)
    Answer(answer::AnswerArgs),
    /// List answers containing text aimed at the grader (instructions, claims about the score)
    Screen(screen::ScreenArgs),
    /// Check a judge against human labels: agreement, human ceiling, calibration, trust cards
    Vet(vet::VetArgs),
    /// Apply a saved calibration (`vet --save-calibration`) to new grading runs of the same setup
    Calibrate(calibrate::CalibrateArgs),
    /// Estimate quality per system from judge grades plus a few human labels (prediction-powered)
    Estimate(estimate::EstimateArgs),
    /// Reference-based text metrics (ROUGE, BLEU, chrF, edit distance, token F1) per answer and system
    Overlap(overlap::OverlapArgs),
    /// Render run folders as a report: self-contained HTML, Markdown summary, versioned JSON
    Report(report::ReportArgs),
    /// Check rubric files and show the exact prompt the judge will see
    #[command(subcommand)]
    Rubric(rubric::RubricCommand),
}

/// Options shared by every command that prints results.
#[derive(Debug, Clone, clap::Args)]
pub struct OutputArgs {
    /// Print one JSON document on stdout instead of text
    #[arg(long)]
    pub json: bool,
    /// Hide progress bars and informational messages on stderr
    #[arg(long, short = 'q')]
    pub quiet: bool,
}

/// Run one parsed command line.
pub fn run(cli: Cli) -> anyhow::Result<ExitCode> {
    match cli.command {
        Command::Model(cmd) => model::run(cmd),
        Command::Grade(args) => grade::run(args),
        Command::Compare(mut args) => {
            let q = args.output.quiet;
            args.grades = args.grades.map(|g| latest_run(&g, grade::KIND, q)).transpose()?;
            compare::run(args)
        }
        Command::Rubric(cmd) => rubric::run(cmd),
        Command::Vet(mut args) => {
            let q = args.output.quiet;
            args.grades = latest_run(&args.grades, grade::KIND, q)?;
            for p in &mut args.pairs {
                *p = latest_run(p, compare::KIND, q)?;
            }
            vet::run(args)
        }
        Command::Screen(args) => screen::run(args),
        Command::Calibrate(mut args) => {
            let q = args.output.quiet;
            args.grades = latest_run(&args.grades, grade::KIND, q)?;
            calibrate::run(args)
        }
        Command::Answer(args) => answer::run(args),
        Command::Injection(args) => injection::run(args),
        Command::Merge(args) => merge::run(args),
        Command::Estimate(mut args) => {
            let q = args.output.quiet;
            args.grades = latest_run(&args.grades, grade::KIND, q)?;
            estimate::run(args)
        }
        Command::Overlap(args) => overlap::run(args),
        Command::Report(mut args) => {
            let q = args.output.quiet;
            for g in &mut args.grades {
                *g = latest_run(g, grade::KIND, q)?;
            }
            args.compare = args.compare.map(|c| latest_run(&c, compare::KIND, q)).transpose()?;
            report::run(args)
        }
    }
}

/// A run folder argument with `latest` (or `DIR/latest`, `DIR/latest-KIND`) replaced by
/// the run folder it names; says on stderr which one unless `quiet`. Reads only.
pub fn latest_run(
    value: &std::path::Path,
    kind: &str,
    quiet: bool,
) -> anyhow::Result<std::path::PathBuf> {
    let Some(pointer) = crate::store::latest::pointer_for(value, kind) else {
        return Ok(value.to_path_buf());
    };
    let dir = crate::store::latest::read_pointer(&pointer, kind)?;
    if quiet {
        return Ok(dir);
    }
    eprintln!(
        "`{}` is `{}`, the last {kind} run finished in `{}`",
        value.display(),
        dir.display(),
        pointer.parent().map_or_else(String::new, |p| p.display().to_string())
    );
    Ok(dir)
}

/// Print a serialisable value as pretty JSON on stdout.
pub fn print_json<T: serde::Serialize>(value: &T) -> anyhow::Result<()> {
    let text = serde_json::to_string_pretty(value)?;
    println!("{text}");
    Ok(())
}

/// Folders searched for fetched judge models, in order: `$ASSIZE_MODELS_DIR` alone
/// when set; otherwise the per-user data folder (where `scripts/fetch-models` puts
/// them by default), then `models/` in the current folder (a development checkout).
pub fn models_dirs() -> Vec<PathBuf> {
    if let Some(dir) = std::env::var_os("ASSIZE_MODELS_DIR") {
        return vec![PathBuf::from(dir)];
    }
    let mut dirs: Vec<PathBuf> = user_models_dir().into_iter().collect();
    dirs.push(PathBuf::from("models"));
    dirs
}

/// The per-user models folder: `$XDG_DATA_HOME/assize/models`, else
/// `~/.local/share/assize/models` (XDG Base Directory specification: a relative
/// `XDG_DATA_HOME` is ignored). `None` without a home folder.
pub fn user_models_dir() -> Option<PathBuf> {
    let xdg = std::env::var_os("XDG_DATA_HOME")
        .map(PathBuf::from)
        .filter(|p| p.is_absolute());
    let data = xdg.or_else(|| {
        std::env::var_os("HOME")
            .filter(|h| !h.is_empty())
            .map(|h| PathBuf::from(h).join(".local/share"))
    })?;
    Some(data.join("assize/models"))
}
