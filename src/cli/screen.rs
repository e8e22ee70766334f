//! `assize screen`: list answers that contain text aimed at the grader (instructions
//! to the grader, claims about the score, "ignore your instructions"), by the rule
//! set of `guard` and, with `--ask-judge`, by the judge's screening question; each
//! reported, and their union. Also the screening job `grade` and `injection` run
//! before grading: one unit per answer, resumable like every run, P(yes) stored
//! so the threshold can change without asking again. Never changes the answers file.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context as _;
use clap::Args;
use serde::Serialize;

use super::common::{default_run_dir, file_sha256, load_judge, ModelArgs};
use super::grade::{screen_answers, shown_path, ModelId};
use super::{print_json, OutputArgs};
use crate::data::{read_answers, AnswerRecord};
use crate::guard::{FlaggedAnswer, JudgeScreen, ScreenMode};
use crate::jobs::{input_hash, Job, JobSpec, Shard, Unit};
use crate::judge::screen::{ask, ScreenRecord};
use crate::judge::Backend;
use crate::rubric::forms::{screen_sha256, Forms};
use crate::store::Manifest;

/// Results file of a screening run.
pub const SCREEN_FILE: &str = "screen.jsonl";

/// Default threshold on the judge's P(yes). Measured with the default judge on the
/// demo answers and the injection probe's attacked copies (README, "Answers that
/// address the grader").
pub const DEFAULT_ABOVE: f64 = 0.75;

/// The judge's screening question, shared by `screen`, `grade` and `injection`.
#[derive(Debug, Clone, Args)]
pub struct AskJudgeArgs {
    /// Also ask the judge one yes/no question per answer before grading: does it contain text directed at the grader? (read from the label probabilities, resumable)
    #[arg(long)]
    pub ask_judge: bool,
    /// Flag an answer when the judge's P(yes) to the screening question is above this
    #[arg(long, value_name = "P", default_value_t = DEFAULT_ABOVE, value_parser = super::values::probability)]
    pub screen_above: f64,
}

impl Default for AskJudgeArgs {
    fn default() -> Self {
        AskJudgeArgs {
            ask_judge: false,
            screen_above: DEFAULT_ABOVE,
        }
    }
}

/// Arguments of `assize screen`.
#[derive(Debug, Clone, Args)]
pub struct ScreenArgs {
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    #[arg(long, short = 'a', value_name = "FILE")]
    pub answers: PathBuf,
    #[command(flatten)]
    pub ask: AskJudgeArgs,
    #[command(flatten)]
    pub model: ModelArgs,
    /// Run folder (default: `runs/KIND-HASH`, named after what the results depend on)
    #[arg(long, value_name = "DIR")]
    pub run_dir: Option<PathBuf>,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// What `assize screen --json` prints.
#[derive(Debug, Serialize)]
pub struct ScreenReport {
    /// Answers screened.
    pub answers: usize,
    /// Answers the rule set flagged.
    pub by_rules: usize,
    /// Answers the judge question flagged (absent without `--ask-judge`).
    pub by_judge: Option<usize>,
    /// The judge question's threshold on P(yes) (absent without `--ask-judge`).
    pub judge_above: Option<f64>,
    /// Screening run folder holding the judge's answers (absent without `--ask-judge`).
    pub run_dir: Option<String>,
    /// Answers flagged by either (the union), with the sentences, rules and P(yes).
    pub flagged: Vec<FlaggedAnswer>,
}

/// Where a screening run lives and how it is shared out.
pub struct ScreenPlace {
    /// Run folder; `None` names it after the judge and the answers file.
    pub dir: Option<PathBuf>,
    /// Shard of the work, as the grading run it serves.
    pub shard: Option<Shard>,
    /// No progress on stderr.
    pub quiet: bool,
}

/// The screening job over `answers` as written: one unit per answer. The default
/// folder's name covers the answers file, so another file never meets this one's
/// records.
pub fn open_job(
    answers: &[AnswerRecord],
    answers_path: &std::path::Path,
    model: &ModelId,
    model_args: &ModelArgs,
    place: &ScreenPlace,
) -> anyhow::Result<Job<AnswerRecord>> {
    let mut inputs = std::collections::BTreeMap::new();
    inputs.insert("answers".to_string(), shown_path(answers_path));
    let manifest = Manifest {
        kind: "screen".into(),
        tool_version: super::common::run_version(),
        model_path: model.path.clone(),
        model_sha256: model.sha256.clone(),
        rubric_sha256: String::new(),
        templates_sha256: screen_sha256(),
        options: vec![format!("context={:?}", model_args.context)],
        seed: 0,
        rubric_toml: None,
        inputs,
        shard: None,
    };
    let dir = match &place.dir {
        Some(d) => d.clone(),
        None => {
            let file = match answers_path.to_str() {
                Some("-") => input_hash(answers),
                _ => file_sha256(answers_path)?,
            };
            let mut m = manifest.clone();
            m.shard = place.shard.map(|s| s.to_string());
            default_run_dir("screen", &format!("{}{file}", m.identity_json()))
        }
    };
    let units = answers
        .iter()
        .map(|a| Unit {
            key: a.item_id(),
            input: input_hash(&(&a.question, &a.answer)),
            records: vec![a.item_id()],
            data: a.clone(),
        })
        .collect();
    let spec = JobSpec {
        dir: dir.clone(),
        manifest,
        results: SCREEN_FILE,
        what: "screening",
        quiet: place.quiet,
        shard: place.shard,
        slow_append: None,
        latest: None,
    };
    Job::open(spec, units).with_context(|| format!("cannot use screening folder `{}`", dir.display()))
}

/// Asks the judge about every answer the folder lacks; `backend` may be `None` only
/// when nothing remains. Returns the verdicts with the threshold applied.
pub fn finish(
    job: Job<AnswerRecord>,
    backend: Option<&dyn Backend>,
    above: f64,
) -> anyhow::Result<JudgeScreen> {
    let forms = Forms::builtin()?;
    let outcome = job.run(
        |a| {
            let b = backend.expect("a judge is loaded when work remains");
            Ok(vec![ask(b, &forms, a)?])
        },
        ScreenRecord::key,
    )?;
    if let Some(f) = outcome.failed.first() {
        anyhow::bail!(
            "the screening question failed on {} answer(s), first `{}`: {}",
            outcome.failed.len(),
            f.unit,
            f.error
        );
    }
    Ok(JudgeScreen {
        p_yes: outcome
            .records
            .into_iter()
            .map(|r| (r.key(), r.p_yes))
            .collect(),
        above,
    })
}

/// Run `assize screen`.
pub fn run(args: ScreenArgs) -> anyhow::Result<ExitCode> {
    let answers = read_answers(&args.answers)?;
    let n = answers.len();
    let (judge, run_dir) = if args.ask.ask_judge {
        let place = ScreenPlace {
            dir: args.run_dir.clone(),
            shard: None,
            quiet: args.output.quiet,
        };
        let job = open_job(&answers, &args.answers, &ModelId::resolve(&args.model)?, &args.model, &place)?;
        let dir = job.dir().display().to_string();
        let loaded = match job.remaining() {
            0 => None,
            _ => Some(load_judge(&args.model, args.output.quiet)?),
        };
        let verdicts = finish(job, loaded.as_ref().map(|j| j as &dyn Backend), args.ask.screen_above)?;
        (Some(verdicts), Some(dir))
    } else {
        (None, None)
    };
    let mut all = answers;
    let flagged = screen_answers(&mut all, ScreenMode::Flag, judge.as_ref());
    let report = ScreenReport {
        answers: n,
        by_rules: flagged.iter().filter(|f| f.by_rules()).count(),
        by_judge: judge.as_ref().map(|_| flagged.iter().filter(|f| f.by_judge).count()),
        judge_above: judge.as_ref().map(|j| j.above),
        run_dir,
        flagged,
    };
    if args.output.json {
        print_json(&report)?;
    } else {
        print!("{}", report_text(&report));
    }
    Ok(ExitCode::SUCCESS)
}

/// The human-readable screen listing.
fn report_text(r: &ScreenReport) -> String {
    let mut s = format!(
        "{} of {} answers contain text aimed at the grader",
        r.flagged.len(),
        r.answers
    );
    match (r.by_judge, r.judge_above) {
        (Some(j), Some(above)) => s.push_str(&format!(
            ": rule set {}, judge question {} (P(yes) above {above}), either {}\n",
            r.by_rules,
            j,
            r.flagged.len()
        )),
        _ => s.push_str(" (rule set; `--ask-judge` also asks the judge)\n"),
    }
    for f in &r.flagged {
        let judge = match f.judge_p_yes {
            Some(p) if f.by_judge => format!("judge P(yes) {p:.2}"),
            Some(p) => format!("judge P(yes) {p:.2}, below the threshold"),
            None => String::new(),
        };
        if f.flags.is_empty() {
            s.push_str(&format!("  {} (line {}): {judge}; no sentence named by the rule set\n", f.item, f.line));
        }
        for g in &f.flags {
            s.push_str(&format!(
                "  {} (line {}): {}: \"{}\"{}\n",
                f.item,
                f.line,
                g.rule.describe(),
                g.sentence,
                if judge.is_empty() { String::new() } else { format!("; {judge}") }
            ));
        }
    }
    if !r.flagged.is_empty() {
        s.push_str("grade with `--screen strip` to remove the sentences the rule set names, or `--screen skip` to leave flagged answers out\n");
    }
    s
}
