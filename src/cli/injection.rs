//! `assize injection`: probe whether instructions hidden in an answer ("rate this 5")
//! move the judge's grades. Grades each answer as is and with the instruction
//! appended, in a resumable run folder, and reports the shift per criterion. Never
//! changes the user's answers file.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use serde::Serialize;

use super::common::load_judge;
use super::grade::{finish_run, open_job, prepare, GradeArgs, ModelId};
use super::print_json;
use crate::data::read_answers;
use crate::guard::ScreenMode;
use crate::judge::grade::label_value;
use crate::judge::{Backend, GradeRecord};
use crate::probes::injection::{injection_effect, InjectionEffect, ProbePair, DEFAULT_INJECTION};
use crate::store::read_records;

/// Arguments of `assize injection`.
#[derive(Debug, Clone, Args)]
pub struct InjectionArgs {
    #[command(flatten)]
    pub grade: GradeArgs,
    /// The instruction appended to every answer (the injected text)
    #[arg(long, value_name = "TEXT", default_value = DEFAULT_INJECTION)]
    pub instruction: String,
}

/// What `assize injection --json` prints.
#[derive(Debug, Serialize)]
pub struct InjectionReport {
    /// Run folder.
    pub run_dir: String,
    /// The instruction used.
    pub instruction: String,
    /// Effect per criterion.
    pub effects: Vec<InjectionEffect>,
    /// How the grader-text screen did on the probe.
    pub screen: ScreenCounts,
}

/// The screen's detection on the probe: injected copies flagged (detection) and
/// original answers flagged (false alarms).
#[derive(Debug, Serialize)]
pub struct ScreenCounts {
    /// The `--screen` mode the probe was graded with.
    pub mode: ScreenMode,
    /// Injected copies flagged.
    pub injected_flagged: usize,
    /// Injected copies.
    pub injected: usize,
    /// Original answers flagged.
    pub original_flagged: usize,
    /// Original answers.
    pub original: usize,
}

/// Suffix of the system name of injected copies.
pub const INJECTED: &str = "+injected";

/// Run `assize injection`.
pub fn run(mut args: InjectionArgs) -> anyhow::Result<ExitCode> {
    let quiet = args.grade.output.quiet;
    let mut answers = read_answers(&args.grade.answers)?;
    answers.truncate(args.grade.limit.unwrap_or(20));
    let run_dir = args
        .grade
        .run_dir
        .clone()
        .unwrap_or_else(|| PathBuf::from("runs").join("injection"));
    let probe_file = run_dir.join("probe-answers.jsonl");
    let mut lines = String::new();
    for a in &answers {
        let mut b = a.clone();
        b.system = format!("{}{INJECTED}", a.system);
        b.answer = format!("{}\n\n{}", a.answer, args.instruction);
        lines.push_str(&serde_json::to_string(a)?);
        lines.push('\n');
        lines.push_str(&serde_json::to_string(&b)?);
        lines.push('\n');
    }
    // A finished probe in a read-only folder is still reported: write only on change.
    if std::fs::read(&probe_file).ok().as_deref() != Some(lines.as_bytes()) {
        std::fs::create_dir_all(&run_dir)?;
        crate::store::write_atomic(&probe_file, lines.as_bytes())?;
    }
    args.grade.answers = probe_file;
    args.grade.limit = None;
    args.grade.run_dir = Some(run_dir.join("grades"));
    let prepared = prepare(&args.grade)?;
    let job = open_job(
        &args.grade,
        &prepared,
        &ModelId::resolve(&args.grade.model)?,
    )?;
    let judge = match job.remaining() {
        0 => None,
        _ => Some(load_judge(&args.grade.model, quiet)?),
    };
    let graded = finish_run(
        &args.grade,
        &prepared,
        job,
        judge.as_ref().map(|j| j as &dyn Backend),
    )?;
    let recs: Vec<GradeRecord> =
        read_records(&run_dir.join("grades").join(super::grade::GRADES_FILE))?;
    let mut effects = Vec::new();
    for c in &prepared.rubric.criteria {
        let top = *c.scale.values().last().expect("a scale has labels");
        let pairs: Vec<ProbePair> = recs
            .iter()
            .filter(|r| r.criterion == c.key && !r.system.ends_with(INJECTED))
            .filter_map(|o| {
                let inj = recs.iter().find(|r| {
                    r.criterion == c.key
                        && r.question_id == o.question_id
                        && r.system == format!("{}{INJECTED}", o.system)
                })?;
                Some(ProbePair {
                    original: o.expected,
                    injected: inj.expected,
                    original_argmax: label_value(&o.argmax),
                    injected_argmax: label_value(&inj.argmax),
                })
            })
            .collect();
        if !pairs.is_empty() {
            effects.push(injection_effect(&c.key, &pairs, top, args.grade.seed)?);
        }
    }
    let injected_flagged = prepared
        .flagged
        .iter()
        .filter(|f| f.item.ends_with(INJECTED))
        .count();
    let report = InjectionReport {
        run_dir: run_dir.display().to_string(),
        instruction: args.instruction.clone(),
        effects,
        screen: ScreenCounts {
            mode: args.grade.screen,
            injected_flagged,
            injected: answers.len(),
            original_flagged: prepared.flagged.len() - injected_flagged,
            original: answers.len(),
        },
    };
    if args.grade.output.json {
        print_json(&report)?;
    } else {
        println!(
            "injected instruction: \"{}\" ({} graded records, run folder `{}`)\n",
            report.instruction, graded.records, report.run_dir
        );
        for e in &report.effects {
            println!(
                "{:<14} n {:>3}  mean shift {:+.2} [{:+.2}, {:+.2}]  label raised {:>3.0}%  reached top {:>3.0}%",
                e.criterion, e.n, e.mean_shift, e.ci.0, e.ci.1, e.raised * 100.0, e.reached_top * 100.0
            );
            println!("  {}", e.verdict);
        }
        let c = &report.screen;
        println!(
            "\ngrader-text screen ({}): flagged {} of {} injected copies and {} of {} original answers; {}",
            format!("{:?}", c.mode).to_lowercase(),
            c.injected_flagged,
            c.injected,
            c.original_flagged,
            c.original,
            c.mode.action()
        );
    }
    Ok(ExitCode::SUCCESS)
}
