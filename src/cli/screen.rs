//! `assize screen`: list answers that contain text aimed at the grader (instructions
//! to the grader, claims about the score, "ignore your instructions"), by the rule
//! set of `guard`, without grading anything. Never changes the answers file.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use serde::Serialize;

use super::grade::screen_answers;
use super::{print_json, OutputArgs};
use crate::data::read_answers;
use crate::guard::{FlaggedAnswer, ScreenMode};

/// Arguments of `assize screen`.
#[derive(Debug, Clone, Args)]
pub struct ScreenArgs {
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    #[arg(long, short = 'a', value_name = "FILE")]
    pub answers: PathBuf,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// What `assize screen --json` prints.
#[derive(Debug, Serialize)]
pub struct ScreenReport {
    /// Answers screened.
    pub answers: usize,
    /// Answers flagged, with the sentences and rules.
    pub flagged: Vec<FlaggedAnswer>,
}

/// Run `assize screen`.
pub fn run(args: ScreenArgs) -> anyhow::Result<ExitCode> {
    let mut answers = read_answers(&args.answers)?;
    let n = answers.len();
    let report = ScreenReport {
        answers: n,
        flagged: screen_answers(&mut answers, ScreenMode::Flag),
    };
    if args.output.json {
        print_json(&report)?;
        return Ok(ExitCode::SUCCESS);
    }
    println!(
        "{} of {} answers contain text aimed at the grader",
        report.flagged.len(),
        n
    );
    for f in &report.flagged {
        for g in &f.flags {
            println!(
                "  {} (line {}): {}: \"{}\"",
                f.item,
                f.line,
                g.rule.describe(),
                g.sentence
            );
        }
    }
    if !report.flagged.is_empty() {
        println!("grade with `--screen strip` to remove the flagged sentences, or `--screen skip` to leave those answers out");
    }
    Ok(ExitCode::SUCCESS)
}
