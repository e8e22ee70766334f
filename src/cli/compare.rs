//! `assize compare`: judge answers of two or more systems pairwise, every pair in
//! both orders, then report position bias, self-preference, length effects and a
//! ranking. Results live in a resumable run folder. Never aggregates by slot: every
//! verdict is stored by system identity.

use std::collections::{BTreeMap, HashSet};
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context as _;
use clap::Args;
use serde::Serialize;

use super::common::{default_run_dir, file_sha256, load_judge, progress, ModelArgs};
use super::errors::{usage, Usage};
use super::{print_json, OutputArgs};
use crate::data::{read_answers, read_labels, read_preferences, AnswerRecord};
use crate::judge::pairwise::{judge_both_orders, OVERALL_QUESTION};
use crate::judge::{Backend, GradeRecord, PairRecord};
use crate::probes::length::{length_probe, LengthProbe};
use crate::probes::ranking::{rank, Ranking};
use crate::probes::selfpref::{self_preference, SelfPreference};
use crate::probes::{pair_outcomes, PairOutcome};
use crate::rubric::forms::Forms;
use crate::rubric::{load_rubric, Need};
use crate::stats::pairwise::{position_bias, PositionBias};
use crate::store::{read_records, Appender, Manifest, RunDir};

/// Results file of a comparison run.
pub const PAIRS_FILE: &str = "pairs.jsonl";

/// Arguments of `assize compare`.
#[derive(Debug, Clone, Args)]
pub struct CompareArgs {
    /// Answers of two or more systems to the same questions (JSONL or CSV)
    #[arg(long, short = 'a', value_name = "FILE")]
    pub answers: PathBuf,
    /// Compare only these systems (comma-separated; default: all)
    #[arg(long, value_name = "NAMES", value_delimiter = ',')]
    pub systems: Vec<String>,
    /// Compare on this rubric criterion instead of overall quality
    #[arg(long, value_name = "KEY")]
    pub criterion: Option<String>,
    /// Rubric holding `--criterion`
    #[arg(
        long,
        short = 'r',
        value_name = "FILE",
        default_value = "judge-templates/rubrics/support.toml"
    )]
    pub rubric: PathBuf,
    #[command(flatten)]
    pub model: ModelArgs,
    /// The `written_by` value marking answers the judge's own model wrote (default: the model file name without `.gguf`)
    #[arg(long, value_name = "NAME")]
    pub judge_name: Option<String>,
    /// Human pairwise preferences, for the self-preference probe
    #[arg(long, value_name = "FILE")]
    pub preferences: Option<PathBuf>,
    /// A grading run folder and human labels (`--labels`), for the pointwise self-preference probe
    #[arg(long, value_name = "DIR", requires = "labels")]
    pub grades: Option<PathBuf>,
    /// Human labels (long form), used with `--grades`
    #[arg(long, value_name = "FILE")]
    pub labels: Option<PathBuf>,
    /// Bootstrap resamples for the ranking intervals
    #[arg(long, value_name = "N", default_value_t = 1000)]
    pub resamples: usize,
    /// Seed of every random draw
    #[arg(long, value_name = "N", default_value_t = 7)]
    pub seed: u64,
    /// Run folder (default: `runs/compare-HASH`)
    #[arg(long, value_name = "DIR")]
    pub run_dir: Option<PathBuf>,
    /// Judge at most this many questions (in file order)
    #[arg(long, value_name = "N")]
    pub limit: Option<usize>,
    /// Folder with form templates replacing the built-in ones
    #[arg(long, value_name = "DIR")]
    pub templates: Option<PathBuf>,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// What `assize compare --json` prints.
#[derive(Debug, Serialize)]
pub struct CompareReport {
    /// Run folder.
    pub run_dir: String,
    /// Judge model file.
    pub model: String,
    /// Criterion key, or `overall`.
    pub criterion: String,
    /// Pairs judged in both orders.
    pub pairs: usize,
    /// Judge calls computed by this invocation (the rest were resumed).
    pub computed: usize,
    /// Position bias over all pairs.
    pub position: Option<PositionBias>,
    /// Ranking of the systems (or why none could be made).
    pub ranking: Result<Ranking, String>,
    /// Length effect per pair of systems.
    pub length: Vec<LengthProbe>,
    /// Self-preference of the judge.
    pub self_preference: SelfPreference,
    /// Every pair with both orders' probabilities and the aggregated verdicts.
    pub outcomes: Vec<PairOutcome>,
    /// Pairs whose captured mass was below 0.5 (the judge ignored the verdict labels).
    pub low_mass: usize,
}

/// Questions with the answers of the chosen systems, in file order.
fn pairs_to_judge(
    answers: &[AnswerRecord],
    systems: &[String],
    limit: Option<usize>,
) -> Vec<(AnswerRecord, AnswerRecord)> {
    let mut by_q: BTreeMap<(usize, String), Vec<&AnswerRecord>> = BTreeMap::new();
    let mut order: Vec<String> = Vec::new();
    for a in answers {
        if !systems.is_empty() && !systems.contains(&a.system) {
            continue;
        }
        if !order.contains(&a.question_id) {
            order.push(a.question_id.clone());
        }
        let pos = order
            .iter()
            .position(|q| *q == a.question_id)
            .expect("just pushed");
        by_q.entry((pos, a.question_id.clone()))
            .or_default()
            .push(a);
    }
    let mut out = Vec::new();
    for (i, (_, group)) in by_q.into_iter().enumerate() {
        if limit.is_some_and(|n| i >= n) {
            break;
        }
        let mut g = group.clone();
        g.sort_by(|x, y| x.system.cmp(&y.system));
        for i in 0..g.len() {
            for j in i + 1..g.len() {
                out.push((g[i].clone(), g[j].clone()));
            }
        }
    }
    out
}

/// Judge all pairs not yet in the run folder and build the report.
pub fn compare_run(args: &CompareArgs, backend: &dyn Backend) -> anyhow::Result<CompareReport> {
    let answers = read_answers(&args.answers)?;
    let systems_present: HashSet<&str> = answers.iter().map(|a| a.system.as_str()).collect();
    for s in &args.systems {
        if !systems_present.contains(s.as_str()) {
            return Err(usage(
                format!(
                    "system `{s}` has no answers in `{}`",
                    args.answers.display()
                ),
                format!("use some of: {}", {
                    let mut v: Vec<_> = systems_present.iter().copied().collect();
                    v.sort();
                    v.join(", ")
                }),
            ));
        }
    }
    let forms = match &args.templates {
        Some(d) => Forms::from_dir(d)?,
        None => Forms::builtin()?,
    };
    let (criterion, question, show_ref, show_ctx) = match &args.criterion {
        Some(k) => {
            let rubric = load_rubric(&args.rubric)?;
            let c = rubric.criterion(k).ok_or_else(|| {
                usage(
                    format!("rubric `{}` has no criterion `{k}`", args.rubric.display()),
                    format!(
                        "use one of: {}",
                        rubric
                            .criteria
                            .iter()
                            .map(|c| c.key.as_str())
                            .collect::<Vec<_>>()
                            .join(", ")
                    ),
                )
            })?;
            (
                k.clone(),
                format!("{} Which answer does better on this?", c.question),
                c.needs.contains(&Need::Reference),
                c.needs.contains(&Need::Context),
            )
        }
        None => (
            "overall".to_string(),
            OVERALL_QUESTION.to_string(),
            true,
            true,
        ),
    };
    let pairs = pairs_to_judge(&answers, &args.systems, args.limit);
    if pairs.is_empty() {
        return Err(usage(
            "no question has answers from two of the chosen systems",
            "give answers of at least two systems to the same `question_id`",
        ));
    }
    let manifest = Manifest {
        kind: "compare".into(),
        tool_version: env!("CARGO_PKG_VERSION").into(),
        model_path: backend.model_path(),
        model_sha256: backend.model_sha256(),
        answers_sha256: file_sha256(&args.answers)?,
        rubric_sha256: if args.criterion.is_some() {
            file_sha256(&args.rubric)?
        } else {
            String::new()
        },
        templates_sha256: forms.sha256.clone(),
        options: vec![
            format!("criterion={criterion}"),
            format!("systems={}", args.systems.join(",")),
        ],
        seed: args.seed,
    };
    let dir = match &args.run_dir {
        Some(d) => d.clone(),
        None => default_run_dir("compare", &serde_json::to_string(&manifest)?),
    };
    let run = RunDir::open(&dir, manifest).map_err(|e| {
        anyhow::Error::new(e).context(Usage {
            what: format!("cannot use run folder `{}`", dir.display()),
            fix: "pass another `--run-dir`, or leave it out to get a folder named after the inputs"
                .into(),
        })
    })?;
    let path = run.file(PAIRS_FILE);
    let done: HashSet<String> = read_records::<PairRecord>(&path)?
        .iter()
        .map(PairRecord::key)
        .collect();
    let todo: Vec<&(AnswerRecord, AnswerRecord)> = pairs
        .iter()
        .filter(|(a, b)| {
            !done.contains(&format!(
                "{}/{}/{}/{}",
                a.question_id, criterion, a.system, b.system
            )) || !done.contains(&format!(
                "{}/{}/{}/{}",
                a.question_id, criterion, b.system, a.system
            ))
        })
        .collect();
    if !args.output.quiet {
        eprintln!(
            "run folder `{}`: {} of {} pairs already judged",
            dir.display(),
            pairs.len() - todo.len(),
            pairs.len()
        );
    }
    let mut app = Appender::open(&path)?;
    let bar = progress(todo.len() as u64, "comparing", args.output.quiet);
    let mut computed = 0;
    for (a, b) in todo {
        let recs = judge_both_orders(
            backend, &forms, a, b, &criterion, &question, show_ref, show_ctx,
        )
        .with_context(|| {
            format!(
                "cannot judge `{}` ({} vs {})",
                a.question_id, a.system, b.system
            )
        })?;
        for r in recs.iter().filter(|r| !done.contains(&r.key())) {
            app.append(r)?;
            computed += 1;
        }
        bar.inc(1);
    }
    bar.finish_and_clear();
    let records: Vec<PairRecord> = read_records::<PairRecord>(&path)?
        .into_iter()
        .filter(|r| r.criterion == criterion)
        .collect();
    let wanted: HashSet<(String, String, String)> = pairs
        .iter()
        .map(|(a, b)| (a.question_id.clone(), a.system.clone(), b.system.clone()))
        .collect();
    let outcomes: Vec<PairOutcome> = pair_outcomes(&records)?
        .into_iter()
        .filter(|o| wanted.contains(&(o.question_id.clone(), o.a.clone(), o.b.clone())))
        .collect();
    let judged: Vec<_> = outcomes.iter().map(PairOutcome::judged).collect();
    let judge_name = args.judge_name.clone().unwrap_or_else(|| {
        std::path::Path::new(&backend.model_path())
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default()
    });
    let prefs = args
        .preferences
        .as_ref()
        .map(|p| read_preferences(p))
        .transpose()?;
    let grades_labels = match (&args.grades, &args.labels) {
        (Some(g), Some(l)) => {
            let recs: Vec<GradeRecord> = read_records(&g.join(super::grade::GRADES_FILE))?;
            let labels = read_labels(l)?;
            Some((recs, labels, load_rubric(&args.rubric)?))
        }
        _ => None,
    };
    let self_pref = self_preference(
        &judge_name,
        &outcomes,
        &answers,
        prefs.as_deref(),
        grades_labels
            .as_ref()
            .map(|(g, l, r)| (g.as_slice(), l.as_slice(), r)),
        args.seed,
    );
    Ok(CompareReport {
        run_dir: dir.display().to_string(),
        model: backend.model_path(),
        criterion,
        pairs: outcomes.len(),
        computed,
        position: if judged.is_empty() { None } else { Some(position_bias(&judged)?) },
        ranking: rank(&outcomes, args.resamples, args.seed).map_err(|e| {
            format!("no ranking: {e}; compare more systems against each other so every system both wins and loses somewhere")
        }),
        length: length_probe(&outcomes, &answers),
        self_preference: self_pref,
        low_mass: records.iter().filter(|r| r.captured_mass < 0.5).count(),
        outcomes,
    })
}

/// Run `assize compare`.
pub fn run(args: CompareArgs) -> anyhow::Result<ExitCode> {
    let judge = load_judge(&args.model, args.output.quiet)?;
    let report = compare_run(&args, &judge)?;
    if args.output.json {
        print_json(&report)?;
    } else {
        print!("{}", compare_text(&report));
    }
    Ok(ExitCode::SUCCESS)
}

/// Human-readable comparison report.
pub fn compare_text(r: &CompareReport) -> String {
    let mut s = format!(
        "compared {} pairs on `{}` with `{}`, each in both orders (run folder `{}`)\n",
        r.pairs, r.criterion, r.model, r.run_dir
    );
    if let Some(p) = &r.position {
        s.push_str("\nposition bias\n");
        s.push_str(&format!(
            "  consistency {:.2} (same winner in both orders), first-slot win rate {:.2} [{:.2}, {:.2}], p = {}\n",
            p.positional_consistency,
            p.first_slot_win_rate,
            p.first_slot_win_rate_ci.0,
            p.first_slot_win_rate_ci.1,
            p.first_slot_p_value.map_or("-".into(), |v| format!("{v:.3}"))
        ));
        s.push_str(&format!(
            "  inconsistent pairs favouring slot 1: {}, slot 2: {}; mean shift of slot-1 probability from the swap {}\n",
            p.inconsistent_favour_first,
            p.inconsistent_favour_second,
            p.mean_first_slot_probability_shift.map_or("-".into(), |v| format!("{v:+.3}"))
        ));
        s.push_str(&format!(
            "  {}{}\n",
            if p.caution { "caution: " } else { "" },
            p.verdict_line
        ));
    }
    match &r.ranking {
        Ok(k) => {
            s.push_str("\nranking (debiased verdicts, Bradley-Terry on the Elo scale, 95% bootstrap CI over questions)\n");
            if let Some(p) = &k.prior {
                s.push_str(&format!("  note: {p}\n"));
            }
            for row in &k.rows {
                s.push_str(&format!(
                    "  {:<20} {:>7.0} [{:>5.0}, {:>5.0}]  wins {:>3}  ties {:>3}  losses {:>3}\n",
                    row.system,
                    row.rating,
                    row.rating_low,
                    row.rating_high,
                    row.wins,
                    row.ties,
                    row.losses
                ));
            }
        }
        Err(e) => s.push_str(&format!("\n{e}\n")),
    }
    if !r.length.is_empty() {
        s.push_str("\nlength (words)\n");
        for l in &r.length {
            s.push_str(&format!(
                "  {} vs {}: mean difference {:+.1}, longer answer won {} of decisive pairs, raw win rate {:.2}, length-controlled {}\n",
                l.a,
                l.b,
                l.mean_length_difference,
                l.longer_wins.map_or("-".into(), |v| format!("{:.0}%", v * 100.0)),
                l.raw_win_rate,
                l.length_controlled_win_rate.map_or("-".into(), |v| format!("{v:.2}"))
            ));
        }
    }
    s.push_str(&format!(
        "\nself-preference\n  {}\n",
        r.self_preference.summary
    ));
    if let Some(p) = &r.self_preference.pointwise {
        s.push_str(&format!(
            "  pointwise: judge minus human on own answers {:+.2}, on others {:+.2}; at equal human scores the difference is {:+.2} [{:+.2}, {:+.2}]\n",
            p.own_mean_residual, p.other_mean_residual, p.difference, p.ci.0, p.ci.1
        ));
    }
    if r.low_mass > 0 {
        s.push_str(&format!(
            "\ncaution: in {} judged orders the judge put under half its probability on the verdict labels; those verdicts are unreliable\n",
            r.low_mass
        ));
    }
    s
}
