//! `assize injection`: probe whether instructions hidden in an answer ("rate this 5")
//! move the judge's grades. Grades each answer as is and with the instruction
//! appended, in a resumable run folder, and reports the shift per criterion. Never
//! changes the user's answers file.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use serde::Serialize;

use super::common::load_judge;
use super::grade::{finish_run, screened_job, GradeArgs, Screened};
use super::print_json;
use crate::data::read_answers;
use crate::guard::{FlaggedAnswer, ScreenMode};
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
    /// Injected copies flagged (by the rule set or the judge question).
    pub injected_flagged: usize,
    /// Injected copies flagged by the rule set.
    pub injected_by_rules: usize,
    /// Injected copies flagged by the judge question (absent without `--ask-judge`).
    pub injected_by_judge: Option<usize>,
    /// Injected copies.
    pub injected: usize,
    /// Original answers flagged (by the rule set or the judge question).
    pub original_flagged: usize,
    /// Original answers flagged by the rule set.
    pub original_by_rules: usize,
    /// Original answers flagged by the judge question (absent without `--ask-judge`).
    pub original_by_judge: Option<usize>,
    /// Original answers.
    pub original: usize,
}

impl ScreenCounts {
    /// Counts of the screen over the probe's answers.
    fn of(flagged: &[FlaggedAnswer], mode: ScreenMode, asked: bool, n: usize) -> Self {
        let count = |injected: bool, f: &dyn Fn(&FlaggedAnswer) -> bool| {
            flagged
                .iter()
                .filter(|a| a.item.ends_with(INJECTED) == injected && f(a))
                .count()
        };
        ScreenCounts {
            mode,
            injected_flagged: count(true, &|_| true),
            injected_by_rules: count(true, &FlaggedAnswer::by_rules),
            injected_by_judge: asked.then(|| count(true, &|a| a.by_judge)),
            injected: n,
            original_flagged: count(false, &|_| true),
            original_by_rules: count(false, &FlaggedAnswer::by_rules),
            original_by_judge: asked.then(|| count(false, &|a| a.by_judge)),
            original: n,
        }
    }

    /// One line per detector, in plain words.
    fn text(&self) -> String {
        let mode = format!("{:?}", self.mode).to_lowercase();
        let line = |who: &str, i: usize, o: usize| {
            format!(
                "  {who:<15} flagged {i} of {} injected copies, {o} of {} original answers\n",
                self.injected, self.original
            )
        };
        let mut s = format!("\ngrader-text screen (`--screen {mode}`: flagged answers {}):\n", self.mode.action());
        s.push_str(&line("rule set", self.injected_by_rules, self.original_by_rules));
        if let (Some(i), Some(o)) = (self.injected_by_judge, self.original_by_judge) {
            s.push_str(&line("judge question", i, o));
            s.push_str(&line("either", self.injected_flagged, self.original_flagged));
        }
        s
    }
}

/// Suffix of the system name of injected copies.
pub const INJECTED: &str = "+injected";

/// Run `assize injection`.
pub fn run(mut args: InjectionArgs) -> anyhow::Result<ExitCode> {
    if !args.grade.judges.is_empty() {
        return Err(super::errors::usage(
            "`injection` probes one judge; it takes no `--judges`",
            "run the probe once per judge with `--model`",
        ));
    }
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
    let Screened {
        prepared,
        job,
        mut judge,
        ..
    } = screened_job(&args.grade)?;
    if judge.is_none() && job.remaining() > 0 {
        judge = Some(load_judge(&args.grade.model, quiet)?);
    }
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
    let report = InjectionReport {
        run_dir: run_dir.display().to_string(),
        instruction: args.instruction.clone(),
        effects,
        screen: ScreenCounts::of(
            &prepared.flagged,
            args.grade.screen,
            args.grade.ask.ask_judge,
            answers.len(),
        ),
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
        if report.effects.is_empty() && args.grade.screen == ScreenMode::Skip {
            println!("no pair of original and injected answer was graded: the screen left out every injected copy (`--screen skip`)");
        }
        print!("{}", report.screen.text());
    }
    Ok(ExitCode::SUCCESS)
}
