//! `assize grade`: grade every answer on every rubric criterion with the local judge,
//! in a resumable run folder, and print per-system summaries. Never computes a
//! statistic itself; `judge` and `stats` do.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context as _;
use clap::Args;
use serde::Serialize;

use super::common::{
    default_run_dir, file_sha256, load_judge, resolve_model, ModelArgs, RubricArg,
};
use super::errors::usage;
use super::{print_json, OutputArgs};
use crate::data::{read_answers, read_labels_checked, AnswerRecord, OtherCriteria};
use crate::guard::{flag_answer, FlaggedAnswer, JudgeScreen, ScreenMode};
use crate::jobs::{input_hash, Job, JobSpec, Shard, Unit};
use crate::judge::anchors::AnchorPool;
use crate::judge::grade::{grade_item, summarize, GradeOptions, SummaryRow};
use crate::judge::{Backend, GradeRecord};
use crate::rubric::forms::Forms;
use crate::rubric::{Rubric, RubricError};
use crate::store::Manifest;

/// Results file of a grading run.
pub const GRADES_FILE: &str = "grades.jsonl";

/// Kind of a grading run: its default folder `runs/grade-HASH` and pointer `runs/latest-grade`.
pub const KIND: &str = "grade";

/// Arguments of `assize grade`.
#[derive(Debug, Clone, Args)]
pub struct GradeArgs {
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    #[arg(long, short = 'a', value_name = "FILE")]
    pub answers: PathBuf,
    #[command(flatten)]
    pub rubric: RubricArg,
    /// Rubric criteria to use, as comma-separated keys (default: all; `compare` and `rubric show` take one)
    #[arg(long, value_name = "KEYS", value_delimiter = ',')]
    pub criteria: Vec<String>,
    #[command(flatten)]
    pub model: ModelArgs,
    /// Grade with each of these judges in turn (comma-separated, each as `--model` takes it): one ordinary run folder per judge inside a panel folder (`--run-dir`, default `runs/panel-HASH`) that `vet`, `estimate`, `calibrate` and `report` read as a panel
    #[arg(long, value_name = "MODELS", value_delimiter = ',', conflicts_with = "model")]
    pub judges: Vec<String>,
    /// Reasoning first: the judge writes an assessment following the evaluation steps, then the score
    #[arg(long)]
    pub reasoning: bool,
    /// Let the judge write each criterion's evaluation steps once (cached in the run folder) instead of the rubric's
    #[arg(long, requires = "reasoning")]
    pub generate_steps: bool,
    /// Token limit of the written assessment
    #[arg(long, value_name = "N", default_value_t = 160)]
    pub reasoning_tokens: usize,
    /// Human labels to draw few-shot anchors from (shown in every form)
    #[arg(long, value_name = "FILE")]
    pub anchors: Option<PathBuf>,
    /// Anchors shown per criterion
    #[arg(long, value_name = "N", default_value_t = 3)]
    pub anchor_count: usize,
    /// What to do with answers containing text aimed at the grader (flagged before grading)
    #[arg(long, value_enum, value_name = "MODE", default_value = "flag")]
    pub screen: ScreenMode,
    #[command(flatten)]
    pub ask: super::screen::AskJudgeArgs,
    /// Flag records whose captured probability mass is below this
    #[arg(long, value_name = "P", default_value_t = 0.5, value_parser = super::values::probability)]
    pub low_mass: f64,
    /// Seed of every random draw
    #[arg(long, value_name = "N", default_value_t = 7)]
    pub seed: u64,
    /// Run folder (default: `runs/KIND-HASH`, named after what the results depend on)
    #[arg(long, value_name = "DIR")]
    pub run_dir: Option<PathBuf>,
    /// Take only shard K of N (K from 0), for running one job on many machines; `env/N` or `env` reads K (and N) from a Kubernetes Indexed Job or Slurm job array
    #[arg(long, value_name = "K/N", value_parser = Shard::parse)]
    pub shard: Option<Shard>,
    /// Use at most this many answers (in file order), e.g. for a quick look
    #[arg(long = "max-answers", value_name = "N", value_parser = super::values::at_least_one)]
    pub limit: Option<usize>,
    /// Compute every form from scratch instead of forking shared prefixes (for benchmarks)
    #[arg(long)]
    pub no_prefix_reuse: bool,
    /// Folder with form templates (`system.j2`, `grade.j2`, `pair.j2`) replacing the built-in ones
    #[arg(long, value_name = "DIR")]
    pub templates: Option<PathBuf>,
    /// Also write the result table as CSV to this file
    #[arg(long, value_name = "FILE")]
    pub csv: Option<PathBuf>,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// What `assize grade --json` prints.
#[derive(Debug, Serialize)]
pub struct GradeReport {
    /// Run folder holding the manifest and `grades.jsonl`.
    pub run_dir: String,
    /// Judge model file.
    pub model: String,
    /// Rubric name.
    pub rubric: String,
    /// Records in the run (this command's answers and criteria).
    pub records: usize,
    /// Records computed by this invocation (the rest were resumed).
    pub computed: usize,
    /// Per system and criterion.
    pub summary: Vec<SummaryRow>,
    /// Records whose captured mass was low: `question_id/system/criterion`.
    pub low_mass: Vec<String>,
    /// Items that could not be graded, with the reason.
    pub failed: Vec<FailedItem>,
    /// Answers that address the grader, and what `--screen` did with them.
    pub flagged: Vec<FlaggedAnswer>,
    /// The `--screen` mode.
    pub screen: ScreenMode,
}

/// An item that could not be graded.
#[derive(Debug, Clone, Serialize)]
pub struct FailedItem {
    /// `question_id/system`.
    pub item: String,
    /// Why.
    pub error: String,
}

/// Everything a grading run needs, loaded and checked.
pub struct Prepared {
    /// Answers the screen flagged as addressing the grader (before `--screen` acted).
    pub flagged: Vec<FlaggedAnswer>,
    /// Answers in file order (after `--max-answers`).
    pub answers: Vec<AnswerRecord>,
    /// Rubric after `--criteria`.
    pub rubric: Rubric,
    /// Form templates.
    pub forms: Forms,
    /// Few-shot anchors, when asked for.
    pub anchors: Option<AnchorPool>,
    /// Template folder, when not the built-in templates.
    pub templates_dir: Option<PathBuf>,
}

/// Load and check inputs; every missing field of every item is reported at once.
/// Answers are screened by the rule set only; see [`prepare_screened`].
pub fn prepare(args: &GradeArgs) -> anyhow::Result<Prepared> {
    prepare_screened(args, None)
}

/// [`prepare`], with the judge question's verdicts joining the rule set's screen.
pub fn prepare_screened(args: &GradeArgs, judge: Option<&JudgeScreen>) -> anyhow::Result<Prepared> {
    let all_answers = read_answers(&args.answers)?;
    let mut answers = all_answers.clone();
    if let Some(n) = args.limit {
        answers.truncate(n);
    }
    let flagged = screen_answers(&mut answers, args.screen, judge);
    let mut rubric = args.rubric.load()?;
    if !args.criteria.is_empty() {
        rubric.select(&args.criteria)?;
    }
    let forms = match &args.templates {
        Some(d) => Forms::from_dir(d)?,
        None => Forms::builtin()?,
    };
    let anchors = match &args.anchors {
        Some(p) => {
            let labels =
                read_labels_checked(p, &rubric.scales(), Some(&all_answers), OtherCriteria::Skip)?;
            Some(AnchorPool::build(
                &all_answers,
                &labels,
                &rubric,
                args.anchor_count,
                args.seed,
            ))
        }
        None => None,
    };
    let p = Prepared {
        flagged,
        answers,
        rubric,
        forms,
        anchors,
        templates_dir: args.templates.clone(),
    };
    check_forms(args, &p)?;
    Ok(p)
}

/// Render every form of every item before any judge loads: missing fields are
/// listed per item in one pass; a template that fails is reported once, as a
/// template problem.
fn check_forms(args: &GradeArgs, p: &Prepared) -> anyhow::Result<()> {
    let mut missing = Vec::new();
    for a in &p.answers {
        for c in &p.rubric.criteria {
            let anchors = p
                .anchors
                .as_ref()
                .map(|pool| pool.for_item(&c.key, &a.question_id))
                .unwrap_or_default();
            match p.forms.grade(&p.rubric, a, c, args.reasoning, &anchors) {
                Ok(_) => {}
                Err(e @ RubricError::MissingField { .. }) => {
                    missing.push(format!("line {}: {e}", a.line))
                }
                Err(e) => {
                    return Err(anyhow::Error::new(e).context(format!(
                        "cannot render the grading form for `{}` on `{}`",
                        a.item_id(),
                        c.key
                    )))
                }
            }
        }
    }
    if missing.is_empty() {
        return Ok(());
    }
    Err(usage(
        format!(
            "answers `{}` lack fields the rubric needs ({} problem(s)):\n{}",
            args.answers.display(),
            missing.len(),
            crate::data::list(&missing)
        ),
        "add the missing fields, or leave those criteria out with `--criteria`",
    ))
}

/// Which judge a run uses, known before the model loads.
#[derive(Debug, Clone)]
pub struct ModelId {
    /// The model file as the judge reports it.
    pub path: String,
    /// SHA-256 of the model file.
    pub sha256: String,
}

impl ModelId {
    /// The identity of a loaded (or scripted) backend.
    pub fn of(backend: &dyn Backend) -> Self {
        ModelId {
            path: backend.model_path(),
            sha256: backend.model_sha256(),
        }
    }

    /// Resolve `--model` and hash the file, without loading it.
    pub fn resolve(args: &ModelArgs) -> anyhow::Result<Self> {
        let path = resolve_model(&args.model)?;
        Ok(ModelId {
            path: path.display().to_string(),
            sha256: crate::engine::gguf::sha256_file(&path)
                .with_context(|| format!("cannot read judge `{}`", path.display()))?,
        })
    }
}

/// The manifest of a grading run.
pub fn manifest(args: &GradeArgs, p: &Prepared, model: &ModelId) -> anyhow::Result<Manifest> {
    let mut options = vec![
        format!(
            "criteria={}",
            p.rubric
                .criteria
                .iter()
                .map(|c| c.key.as_str())
                .collect::<Vec<_>>()
                .join(",")
        ),
        format!("reasoning={}", args.reasoning),
        format!("reasoning_tokens={}", args.reasoning_tokens),
        format!("low_mass={}", args.low_mass),
        format!("context={:?}", args.model.context),
        format!("prefix_reuse={}", !args.no_prefix_reuse),
        format!("generate_steps={}", args.generate_steps),
    ];
    // Only a screen that changes what is graded enters the manifest, so runs made
    // before the option existed still resume.
    if args.screen != ScreenMode::Flag {
        options.push(format!("screen={:?}", args.screen).to_lowercase());
        if args.ask.ask_judge {
            options.push(format!("screen_above={}", args.ask.screen_above));
        }
    }
    let mut inputs = std::collections::BTreeMap::new();
    inputs.insert("answers".to_string(), shown_path(&args.answers));
    inputs.insert("rubric".to_string(), shown_path(&args.rubric.named()));
    if let Some(a) = &args.anchors {
        options.push(format!("anchors_sha256={}", file_sha256(a)?));
        options.push(format!("anchor_count={}", args.anchor_count));
        inputs.insert("anchors".to_string(), shown_path(a));
    }
    Ok(Manifest {
        kind: "grade".into(),
        tool_version: super::common::run_version(),
        model_path: model.path.clone(),
        model_sha256: model.sha256.clone(),
        rubric_sha256: p.rubric.sha256.clone(),
        templates_sha256: p.forms.sha256.clone(),
        options,
        seed: args.seed,
        rubric_toml: Some(p.rubric.text.clone()),
        inputs,
        shard: None,
    })
}

/// A path for the manifest: relative to the working folder when inside it.
pub fn shown_path(path: &std::path::Path) -> String {
    std::env::current_dir()
        .ok()
        .and_then(|cwd| path.strip_prefix(cwd).ok().map(|p| p.to_path_buf()))
        .unwrap_or_else(|| path.to_path_buf())
        .display()
        .to_string()
}

/// The grading job: one unit per answer, producing one record per criterion. A
/// unit's input hash covers the answer and the anchors its forms show.
pub fn open_job(
    args: &GradeArgs,
    p: &Prepared,
    model: &ModelId,
) -> anyhow::Result<Job<AnswerRecord>> {
    let manifest = manifest(args, p, model)?;
    let dir = match &args.run_dir {
        Some(d) => d.clone(),
        None => default_run_dir(KIND, &shard_identity(&manifest, args.shard)),
    };
    let units = p
        .answers
        .iter()
        .map(|a| {
            let anchors: Vec<_> = p
                .rubric
                .criteria
                .iter()
                .map(|c| {
                    p.anchors
                        .as_ref()
                        .map(|pool| pool.for_item(&c.key, &a.question_id))
                })
                .collect();
            Unit {
                key: a.item_id(),
                input: input_hash(&(a, anchors)),
                records: p
                    .rubric
                    .criteria
                    .iter()
                    .map(|c| format!("{}/{}/{}", a.question_id, a.system, c.key))
                    .collect(),
                data: a.clone(),
            }
        })
        .collect();
    let spec = JobSpec {
        dir: dir.clone(),
        manifest,
        results: GRADES_FILE,
        what: "grading",
        quiet: args.output.quiet,
        shard: args.shard,
        slow_append: None,
        latest: Some(KIND),
    };
    Job::open(spec, units).with_context(|| format!("cannot use run folder `{}`", dir.display()))
}

/// The manifest identity with the shard, for a default folder name per shard.
pub fn shard_identity(m: &Manifest, shard: Option<Shard>) -> String {
    let mut m = m.clone();
    m.shard = shard.map(|s| s.to_string());
    m.identity_json()
}

/// Grade everything not yet in the run folder; return the report.
pub fn grade_run(
    args: &GradeArgs,
    p: &Prepared,
    backend: &dyn Backend,
) -> anyhow::Result<GradeReport> {
    let job = open_job(args, p, &ModelId::of(backend))?;
    finish_run(args, p, job, Some(backend))
}

/// Run a grading job; `backend` may be `None` only when nothing remains.
pub fn finish_run(
    args: &GradeArgs,
    p: &Prepared,
    job: Job<AnswerRecord>,
    backend: Option<&dyn Backend>,
) -> anyhow::Result<GradeReport> {
    let dir = job.dir().to_path_buf();
    if !args.output.quiet {
        eprintln!(
            "run folder `{}`: {} of {} answers already graded",
            dir.display(),
            job.total() - job.remaining(),
            job.total()
        );
    }
    let steps_owned;
    let p = match backend {
        Some(b) if args.generate_steps && job.remaining() > 0 => {
            steps_owned = with_generated_steps(&job, p, b, args.output.quiet)?;
            &steps_owned
        }
        _ => p,
    };
    let opts = GradeOptions {
        reasoning: args.reasoning,
        reasoning_tokens: args.reasoning_tokens,
        low_mass: args.low_mass,
        seed: args.seed,
    };
    let (started, before) = (std::time::Instant::now(), backend.and_then(|b| b.counters()));
    let outcome = job.run(
        |a| {
            let b = backend.expect("a judge is loaded when work remains");
            Ok(grade_item(
                b,
                &p.forms,
                &p.rubric,
                a,
                p.anchors.as_ref(),
                &opts,
            )?)
        },
        GradeRecord::key,
    )?;
    if outcome.computed > 0 {
        let after = backend.and_then(|b| b.counters());
        record_cost(&job, outcome.computed, started.elapsed(), before, after)?;
    }
    let records = outcome.records;
    let summary = if records.is_empty() {
        Vec::new()
    } else {
        summarize(&records, args.seed)?
    };
    Ok(GradeReport {
        run_dir: dir.display().to_string(),
        model: backend.map_or_else(String::new, |b| b.model_path()),
        rubric: p.rubric.name.clone(),
        records: records.len(),
        computed: outcome.computed,
        low_mass: records
            .iter()
            .filter(|r| r.low_mass)
            .map(GradeRecord::key)
            .collect(),
        summary,
        flagged: p.flagged.clone(),
        screen: args.screen,
        failed: outcome
            .failed
            .into_iter()
            .map(|f| FailedItem {
                item: f.unit,
                error: f.error,
            })
            .collect(),
    })
}

/// Adds this invocation's grading time and decoder work to `cost.json` in the run
/// folder (the job holds the lock, since it computed records).
fn record_cost(
    job: &Job<AnswerRecord>,
    computed: usize,
    elapsed: std::time::Duration,
    before: Option<crate::engine::WorkCounters>,
    after: Option<crate::engine::WorkCounters>,
) -> anyhow::Result<()> {
    use crate::store::cost::{read_cost, Cost, COST_FILE};
    let (b, a) = (before.unwrap_or_default(), after.unwrap_or_default());
    let mut log = read_cost(job.dir())?.unwrap_or_default();
    log.sessions.push(Cost {
        records: computed as u64,
        seconds: elapsed.as_secs_f64(),
        prompt_tokens_computed: a.computed_tokens - b.computed_tokens,
        prompt_tokens_reused: a.reused_tokens - b.reused_tokens,
        generated_tokens: a.generated_tokens - b.generated_tokens,
    });
    job.save(COST_FILE, serde_json::to_string_pretty(&log)?.as_bytes())?;
    Ok(())
}

/// The rubric with judge-written evaluation steps, from `steps.json` in the run
/// folder or generated once and saved there (the job holds the lock).
fn with_generated_steps(
    job: &Job<AnswerRecord>,
    p: &Prepared,
    backend: &dyn Backend,
    quiet: bool,
) -> anyhow::Result<Prepared> {
    let path = job.dir().join("steps.json");
    let mut cached: std::collections::BTreeMap<String, Vec<String>> = if path.exists() {
        serde_json::from_str(&std::fs::read_to_string(&path)?).with_context(|| {
            format!(
                "`{}` is damaged; delete it to generate the steps again",
                path.display()
            )
        })?
    } else {
        Default::default()
    };
    let mut rubric = p.rubric.clone();
    for c in &mut rubric.criteria {
        if !cached.contains_key(&c.key) {
            if !quiet {
                eprintln!("asking the judge for evaluation steps of `{}`", c.key);
            }
            let steps = crate::judge::steps::generate_steps(backend, c)?;
            cached.insert(c.key.clone(), steps);
            job.save(
                "steps.json",
                serde_json::to_string_pretty(&cached)?.as_bytes(),
            )?;
        }
        let steps = &cached[&c.key];
        if !steps.is_empty() {
            c.steps = steps.clone();
        }
    }
    Ok(Prepared {
        flagged: p.flagged.clone(),
        answers: p.answers.clone(),
        rubric,
        forms: match &p.templates_dir {
            Some(d) => Forms::from_dir(d)?,
            None => Forms::builtin()?,
        },
        anchors: p.anchors.clone(),
        templates_dir: p.templates_dir.clone(),
    })
}

/// Inputs checked, answers screened and the grading job opened. With `--ask-judge`
/// the run folder is checked first, then the judge's screening question runs in
/// `screen/` of the run folder (the judge loads only when answers are left to ask
/// about, and is returned for grading), and the job is opened on the screened answers.
pub fn screened_job(args: &GradeArgs) -> anyhow::Result<Screened> {
    let prepared = prepare(args)?;
    let model_id = ModelId::resolve(&args.model)?;
    let job = open_job(args, &prepared, &model_id)?;
    if !args.ask.ask_judge {
        return Ok(Screened {
            prepared,
            job,
            judge: None,
            model_id,
        });
    }
    let place = super::screen::ScreenPlace {
        dir: Some(job.dir().join("screen")),
        shard: args.shard,
        quiet: args.output.quiet,
    };
    drop(job);
    let mut answers = read_answers(&args.answers)?;
    answers.truncate(args.limit.unwrap_or(usize::MAX));
    let sjob = super::screen::open_job(&answers, &args.answers, &model_id, &args.model, &place)?;
    let judge = match sjob.remaining() {
        0 => None,
        _ => Some(load_judge(&args.model, args.output.quiet)?),
    };
    let verdicts = super::screen::finish(
        sjob,
        judge.as_ref().map(|j| j as &dyn Backend),
        args.ask.screen_above,
    )?;
    let prepared = prepare_screened(args, Some(&verdicts))?;
    let job = open_job(args, &prepared, &model_id)?;
    Ok(Screened {
        prepared,
        job,
        judge,
        model_id,
    })
}

/// A grading job ready to run, after the screen.
pub struct Screened {
    /// Inputs, screened.
    pub prepared: Prepared,
    /// The grading job on the screened answers.
    pub job: Job<AnswerRecord>,
    /// The judge, when the screening question loaded it.
    pub judge: Option<crate::engine::JudgeModel>,
    /// The judge's identity.
    pub model_id: ModelId,
}

/// Run `assize grade`: check inputs and the run folder, load the judge only when
/// work remains, grade, print the summary.
pub fn run(args: GradeArgs) -> anyhow::Result<ExitCode> {
    if !args.judges.is_empty() {
        return super::grade_panel::run(args);
    }
    let Screened {
        prepared,
        job,
        mut judge,
        model_id,
    } = screened_job(&args)?;
    if judge.is_none() && job.remaining() > 0 {
        judge = Some(load_judge(&args.model, args.output.quiet)?);
    }
    if let (Some(j), true) = (judge.as_mut(), args.no_prefix_reuse) {
        j.set_prefix_reuse(false);
    }
    let started = std::time::Instant::now();
    let mut report = finish_run(
        &args,
        &prepared,
        job,
        judge.as_ref().map(|j| j as &dyn Backend),
    )
    .context("grading stopped")?;
    report.model = model_id.path.clone();
    if let (Some(judge), false, true) = (&judge, args.output.quiet, report.computed > 0) {
        let secs = started.elapsed().as_secs_f64();
        let c = judge.counters();
        eprintln!(
            "computed {} records in {:.1} s ({:.1} answers/min); prompt tokens: {} computed, {} reused from shared prefixes; {} generated",
            report.computed,
            secs,
            report.computed as f64 / prepared.rubric.criteria.len().max(1) as f64 / secs * 60.0,
            c.computed_tokens,
            c.reused_tokens,
            c.generated_tokens
        );
    }
    if let Some(path) = &args.csv {
        let dir = std::path::Path::new(&report.run_dir);
        let records: Vec<GradeRecord> = crate::store::read_records(&dir.join(GRADES_FILE))?;
        super::csv_out::write_grades(path, &records)?;
    }
    if args.output.json {
        print_json(&report)?;
    } else {
        print!("{}", summary_text(&report));
    }
    if !report.failed.is_empty() {
        eprintln!(
            "error: {} answer(s) could not be graded (listed above); everything else is saved in `{}`",
            report.failed.len(),
            report.run_dir
        );
        eprintln!("  fix: shorten those answers or raise `--max-context`, then run the same command again to finish");
        return Ok(ExitCode::from(2));
    }
    Ok(ExitCode::SUCCESS)
}

/// The human-readable summary table.
pub fn summary_text(r: &GradeReport) -> String {
    let mut s = format!(
        "graded {} records with `{}` on rubric `{}` (run folder `{}`)\n\n",
        r.records, r.model, r.rubric, r.run_dir
    );
    s.push_str(&format!(
        "{:<18} {:<14} {:>4} {:>6} {:>17} {:>7} {:>8}\n",
        "system", "criterion", "n", "mean", "95% CI", "argmax", "low-mass"
    ));
    for row in &r.summary {
        s.push_str(&format!(
            "{:<18} {:<14} {:>4} {:>6.2} {:>17} {:>7.2} {:>8}\n",
            row.system,
            row.criterion,
            row.n,
            row.mean,
            format!("[{:.2}, {:.2}]", row.ci_low, row.ci_high),
            row.mean_argmax,
            row.low_mass
        ));
    }
    s.push_str(&flagged_text(&r.flagged, r.screen));
    if !r.low_mass.is_empty() {
        s.push_str(&format!(
            "\ncaution: {} record(s) have low captured mass: the judge did not answer in the form's labels there, so their scores are unreliable (see `low_mass` in {})\n",
            r.low_mass.len(),
            GRADES_FILE
        ));
    }
    s
}

/// The caution listing answers that address the grader and what grading did with them.
pub fn flagged_text(flagged: &[FlaggedAnswer], mode: ScreenMode) -> String {
    if flagged.is_empty() {
        return String::new();
    }
    let judge_only = flagged.iter().filter(|f| !f.by_rules()).count();
    let mut s = format!(
        "\ncaution: {} answer(s) contain text aimed at the grader; flagged by the rule set: {}\n",
        flagged.len(),
        mode.action()
    );
    if judge_only > 0 {
        s.push_str(&format!(
            "  {judge_only} flagged by the judge question only: {}\n",
            mode.judge_only_action()
        ));
    }
    for f in flagged {
        let mut why: Vec<String> = f
            .flags
            .iter()
            .map(|g| format!("{}: \"{}\"", g.rule.describe(), g.sentence))
            .collect();
        if let (Some(p), true) = (f.judge_p_yes, f.by_judge) {
            why.push(format!("judge question P(yes) {p:.2}"));
        }
        s.push_str(&format!("  {} (line {}): {}\n", f.item, f.line, why.join("; ")));
    }
    if mode == ScreenMode::Flag {
        s.push_str("  fix: grade them with `--screen strip` (flagged sentences removed) or `--screen skip`\n");
    }
    s
}

/// Screens every answer for text aimed at the grader, by the rule set and, when
/// given, the judge question's verdicts: with `strip` the rule-flagged sentences are
/// removed (an answer only the judge flagged is graded as written), with `skip` a
/// flagged answer is dropped from the run.
pub fn screen_answers(
    answers: &mut Vec<AnswerRecord>,
    mode: ScreenMode,
    judge: Option<&JudgeScreen>,
) -> Vec<FlaggedAnswer> {
    let mut flagged = Vec::new();
    answers.retain_mut(|a| {
        let verdict = judge.and_then(|j| j.verdict(&a.item_id()));
        let Some((f, s)) = flag_answer(a.item_id(), a.line, &a.answer, verdict) else {
            return true;
        };
        flagged.push(f);
        if mode == ScreenMode::Strip {
            a.answer = s.cleaned;
        }
        mode.grades()
    });
    flagged
}
