//! `assize grade`: grade every answer on every rubric criterion with the local judge,
//! in a resumable run folder, and print per-system summaries. Never computes a
//! statistic itself; `judge` and `stats` do.

use std::collections::{HashMap, HashSet};
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context as _;
use clap::Args;
use serde::Serialize;

use super::common::{default_run_dir, file_sha256, load_judge, progress, ModelArgs};
use super::errors::usage;
use super::{print_json, OutputArgs};
use crate::data::{check_labels, read_answers, read_labels, AnswerRecord};
use crate::judge::anchors::AnchorPool;
use crate::judge::grade::{grade_item, summarize, GradeOptions, SummaryRow};
use crate::judge::{Backend, GradeRecord};
use crate::rubric::forms::Forms;
use crate::rubric::{load_rubric, Rubric, RubricError};
use crate::store::{read_records, Appender, Manifest, RunDir};

/// Results file of a grading run.
pub const GRADES_FILE: &str = "grades.jsonl";

/// Arguments of `assize grade`.
#[derive(Debug, Clone, Args)]
pub struct GradeArgs {
    /// Answers to grade (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by)
    #[arg(long, short = 'a', value_name = "FILE")]
    pub answers: PathBuf,
    /// Rubric file (TOML); bundled ones are in judge-templates/rubrics/
    #[arg(
        long,
        short = 'r',
        value_name = "FILE",
        default_value = "judge-templates/rubrics/support.toml"
    )]
    pub rubric: PathBuf,
    /// Grade only these criteria (comma-separated keys)
    #[arg(long, value_name = "KEYS", value_delimiter = ',')]
    pub criteria: Vec<String>,
    #[command(flatten)]
    pub model: ModelArgs,
    /// Let the judge write an assessment following the evaluation steps before the score
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
    /// Flag records whose captured probability mass is below this
    #[arg(long, value_name = "P", default_value_t = 0.5)]
    pub low_mass: f64,
    /// Seed of every random draw (anchor choice, bootstrap, sampling)
    #[arg(long, value_name = "N", default_value_t = 7)]
    pub seed: u64,
    /// Run folder (default: `runs/grade-HASH`, derived from model, data, rubric and options)
    #[arg(long, value_name = "DIR")]
    pub run_dir: Option<PathBuf>,
    /// Grade at most this many answers (in file order), e.g. for a quick look
    #[arg(long, value_name = "N")]
    pub limit: Option<usize>,
    /// Compute every form from scratch instead of forking shared prefixes (for benchmarks)
    #[arg(long)]
    pub no_prefix_reuse: bool,
    /// Folder with form templates (`system.j2`, `grade.j2`, `pair.j2`) replacing the built-in ones
    #[arg(long, value_name = "DIR")]
    pub templates: Option<PathBuf>,
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
    /// Answers in file order (after `--limit`).
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
pub fn prepare(args: &GradeArgs) -> anyhow::Result<Prepared> {
    let all_answers = read_answers(&args.answers)?;
    let mut answers = all_answers.clone();
    if let Some(n) = args.limit {
        answers.truncate(n);
    }
    let mut rubric = load_rubric(&args.rubric)?;
    if !args.criteria.is_empty() {
        rubric.select(&args.criteria)?;
    }
    let forms = match &args.templates {
        Some(d) => Forms::from_dir(d)?,
        None => Forms::builtin()?,
    };
    let mut missing = Vec::new();
    for a in &answers {
        for c in &rubric.criteria {
            if let Err(e @ RubricError::MissingField { .. }) =
                forms.grade(&rubric, a, c, false, &[])
            {
                missing.push(format!("line {}: {e}", a.line));
            }
        }
    }
    if !missing.is_empty() {
        let shown: Vec<String> = missing.iter().take(20).cloned().collect();
        return Err(usage(
            format!(
                "answers `{}` lack fields the rubric needs ({} problem(s)):\n    {}",
                args.answers.display(),
                missing.len(),
                shown.join("\n    ")
            ),
            "add the missing fields, or leave those criteria out with `--criteria`",
        ));
    }
    let anchors = match &args.anchors {
        Some(p) => {
            let labels = read_labels(p)?;
            let scales: HashMap<String, Vec<String>> = rubric
                .criteria
                .iter()
                .map(|c| (c.key.clone(), c.scale.labels()))
                .collect();
            let relevant: Vec<_> = labels
                .iter()
                .filter(|l| scales.contains_key(&l.criterion))
                .cloned()
                .collect();
            check_labels(p, &relevant, &all_answers, &scales)?;
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
    Ok(Prepared {
        answers,
        rubric,
        forms,
        anchors,
        templates_dir: args.templates.clone(),
    })
}

/// The manifest of a grading run.
pub fn manifest(args: &GradeArgs, p: &Prepared, backend: &dyn Backend) -> anyhow::Result<Manifest> {
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
    if let Some(a) = &args.anchors {
        options.push(format!("anchors_sha256={}", file_sha256(a)?));
        options.push(format!("anchor_count={}", args.anchor_count));
    }
    Ok(Manifest {
        kind: "grade".into(),
        tool_version: env!("CARGO_PKG_VERSION").into(),
        model_path: backend.model_path(),
        model_sha256: backend.model_sha256(),
        answers_sha256: file_sha256(&args.answers)?,
        rubric_sha256: p.rubric.sha256.clone(),
        templates_sha256: p.forms.sha256.clone(),
        options,
        seed: args.seed,
    })
}

/// Grade everything not yet in the run folder; return the report.
pub fn grade_run(
    args: &GradeArgs,
    p: &Prepared,
    backend: &dyn Backend,
) -> anyhow::Result<GradeReport> {
    let manifest = manifest(args, p, backend)?;
    let dir = match &args.run_dir {
        Some(d) => d.clone(),
        None => default_run_dir("grade", &serde_json::to_string(&manifest)?),
    };
    let run = RunDir::open(&dir, manifest).map_err(|e| {
        let msg = e.to_string();
        anyhow::Error::new(e).context(super::errors::Usage {
            what: format!("cannot use run folder `{}`", dir.display()),
            fix: if msg.contains("different run") {
                "pass another `--run-dir`, or leave it out to get a folder named after the inputs"
                    .into()
            } else {
                "check that the folder is writable".into()
            },
        })
    })?;
    let steps_owned;
    let p = if args.generate_steps {
        steps_owned = with_generated_steps(&run, p, backend, args.output.quiet)?;
        &steps_owned
    } else {
        p
    };
    let path = run.file(GRADES_FILE);
    let existing: Vec<GradeRecord> = read_records(&path)?;
    let done: HashSet<String> = existing.iter().map(GradeRecord::key).collect();
    let todo: Vec<&AnswerRecord> = p
        .answers
        .iter()
        .filter(|a| {
            p.rubric
                .criteria
                .iter()
                .any(|c| !done.contains(&format!("{}/{}/{}", a.question_id, a.system, c.key)))
        })
        .collect();
    if !args.output.quiet {
        eprintln!(
            "run folder `{}`: {} of {} answers already graded",
            dir.display(),
            p.answers.len() - todo.len(),
            p.answers.len()
        );
    }
    let opts = GradeOptions {
        reasoning: args.reasoning,
        reasoning_tokens: args.reasoning_tokens,
        low_mass: args.low_mass,
        seed: args.seed,
    };
    let mut appender = Appender::open(&path)?;
    let bar = progress(todo.len() as u64, "grading", args.output.quiet);
    let mut computed = 0;
    let mut failed = Vec::new();
    for a in todo {
        match grade_item(backend, &p.forms, &p.rubric, a, p.anchors.as_ref(), &opts) {
            Ok(records) => {
                for r in records.iter().filter(|r| !done.contains(&r.key())) {
                    appender.append(r)?;
                    computed += 1;
                }
            }
            Err(e) => {
                let msg = format!("{:#}", anyhow::Error::new(e));
                bar.suspend(|| eprintln!("warning: skipped `{}`: {msg}", a.item_id()));
                failed.push(FailedItem {
                    item: a.item_id(),
                    error: msg,
                });
            }
        }
        bar.inc(1);
    }
    bar.finish_and_clear();
    let wanted: HashSet<String> = p
        .answers
        .iter()
        .flat_map(|a| {
            p.rubric
                .criteria
                .iter()
                .map(move |c| format!("{}/{}/{}", a.question_id, a.system, c.key))
        })
        .collect();
    let records: Vec<GradeRecord> = read_records::<GradeRecord>(&path)?
        .into_iter()
        .filter(|r| wanted.contains(&r.key()))
        .collect();
    let summary = if records.is_empty() {
        Vec::new()
    } else {
        summarize(&records, args.seed)?
    };
    Ok(GradeReport {
        run_dir: dir.display().to_string(),
        model: backend.model_path(),
        rubric: p.rubric.name.clone(),
        records: records.len(),
        computed,
        low_mass: records
            .iter()
            .filter(|r| r.low_mass)
            .map(GradeRecord::key)
            .collect(),
        summary,
        failed,
    })
}

/// The rubric with judge-written evaluation steps, from `steps.json` in the run
/// folder or generated once and saved there.
fn with_generated_steps(
    run: &RunDir,
    p: &Prepared,
    backend: &dyn Backend,
    quiet: bool,
) -> anyhow::Result<Prepared> {
    let path = run.file("steps.json");
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
            crate::store::write_atomic(&path, serde_json::to_string_pretty(&cached)?.as_bytes())?;
        }
        let steps = &cached[&c.key];
        if !steps.is_empty() {
            c.steps = steps.clone();
        }
    }
    Ok(Prepared {
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

/// Run `assize grade`.
pub fn run(args: GradeArgs) -> anyhow::Result<ExitCode> {
    let prepared = prepare(&args)?;
    let mut judge = load_judge(&args.model, args.output.quiet)?;
    if args.no_prefix_reuse {
        judge.set_prefix_reuse(false);
    }
    let started = std::time::Instant::now();
    let report = grade_run(&args, &prepared, &judge).context("grading stopped")?;
    if !args.output.quiet && report.computed > 0 {
        let secs = started.elapsed().as_secs_f64();
        let c = judge.counters();
        eprintln!(
            "computed {} records in {:.1} s ({:.1} answers/min); prompt tokens run {} , reused {}, generated {}",
            report.computed,
            secs,
            report.computed as f64 / prepared.rubric.criteria.len().max(1) as f64 / secs * 60.0,
            c.computed_tokens,
            c.reused_tokens,
            c.generated_tokens
        );
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
        eprintln!("  fix: shorten those answers or raise `--context`, then run the same command again to finish");
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
    if !r.low_mass.is_empty() {
        s.push_str(&format!(
            "\ncaution: {} record(s) have low captured mass: the judge did not answer in the form's labels there, so their scores are unreliable (see `low_mass` in {})\n",
            r.low_mass.len(),
            GRADES_FILE
        ));
    }
    s
}
