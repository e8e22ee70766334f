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

use super::common::{default_run_dir, load_judge, one_criterion, ModelArgs, RubricArg};
use super::errors::usage;
use super::grade::{shard_identity, shown_path, ModelId};
use super::{print_json, OutputArgs};
use crate::data::{
    read_answers, read_labels_checked, read_preferences, AnswerRecord, LabelRow, OtherCriteria,
    PreferenceRow,
};
use crate::jobs::{input_hash, Job, JobSpec, Shard, Unit};
use crate::judge::pairwise::{judge_both_orders, judge_probe, OVERALL_QUESTION};
use crate::judge::{Backend, GradeRecord, PairRecord, ProbeKind, ProbeRecord};
use crate::probes::length::{length_probe, LengthProbe};
use crate::probes::ranking::{rank, Ranking};
use crate::probes::selfpref::{self_preference, SelfPreference};
use crate::probes::{pair_outcomes, set_verdicts, PairOutcome};
use crate::rubric::forms::Forms;
use crate::rubric::{Need, Rubric};
use crate::stats::pairwise::{position_bias, PositionBias};
use crate::store::{read_records, Manifest};
use crate::vet::{ranking_rule, vet_pair_inputs, PairInputs, RankingRule, VetError, VetOptions};

/// Results file of a comparison run.
pub const PAIRS_FILE: &str = "pairs.jsonl";

/// Kind of a comparison run: its default folder `runs/compare-HASH` and pointer `runs/latest-compare`.
pub const KIND: &str = "compare";
/// Slot probes of a comparison run (identical and blank answers, one order each).
pub const PROBES_FILE: &str = "slot-probes.jsonl";

/// Arguments of `assize compare`.
#[derive(Debug, Clone, Args)]
pub struct CompareArgs {
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    #[arg(long, short = 'a', value_name = "FILE")]
    pub answers: PathBuf,
    /// Compare only these systems (comma-separated; default: all)
    #[arg(long, value_name = "NAMES", value_delimiter = ',')]
    pub systems: Vec<String>,
    /// Rubric criteria to use, as comma-separated keys (default: all; `compare` and `rubric show` take one)
    #[arg(long = "criteria", value_name = "KEYS", value_delimiter = ',')]
    pub criterion: Vec<String>,
    #[command(flatten)]
    pub rubric: RubricArg,
    #[command(flatten)]
    pub model: ModelArgs,
    /// The `written_by` value marking answers the judge's own model wrote (default: the judge's model file name without `.gguf`)
    #[arg(long, value_name = "NAME")]
    pub judge_name: Option<String>,
    /// Human pairwise preferences (question_id, system_a, system_b, rater, preferred)
    #[arg(long, value_name = "FILE")]
    pub preferences: Option<PathBuf>,
    /// Grading run folder (holds `grades.jsonl`), or `latest` for the last one finished in `runs`
    ///
    /// With `--labels`, adds the pointwise self-preference probe.
    #[arg(long, short = 'g', value_name = "DIR", requires = "labels")]
    pub grades: Option<PathBuf>,
    /// Human labels in long form (question_id, system, criterion, rater, score)
    #[arg(long, short = 'l', value_name = "FILE")]
    pub labels: Option<PathBuf>,
    /// Bootstrap resamples per interval
    #[arg(long, value_name = "N", default_value_t = 2000, value_parser = super::values::at_least_one)]
    pub resamples: usize,
    /// Seed of every random draw
    #[arg(long, value_name = "N", default_value_t = 7)]
    pub seed: u64,
    /// Run folder (default: `runs/KIND-HASH`, named after what the results depend on)
    #[arg(long, value_name = "DIR")]
    pub run_dir: Option<PathBuf>,
    /// Take only shard K of N (K from 0), for running one job on many machines; `env/N` or `env` reads K (and N) from a Kubernetes Indexed Job or Slurm job array
    #[arg(long, value_name = "K/N", value_parser = Shard::parse)]
    pub shard: Option<Shard>,
    /// Use at most this many questions (in file order), e.g. for a quick look
    #[arg(long = "max-questions", value_name = "N", value_parser = super::values::at_least_one)]
    pub limit: Option<usize>,
    /// Folder with form templates (`system.j2`, `grade.j2`, `pair.j2`) replacing the built-in ones
    #[arg(long, value_name = "DIR")]
    pub templates: Option<PathBuf>,
    /// Probe the judge's slot prior on this many questions (two forms each: blank answers, one answer shown twice; 0: none)
    ///
    /// The prior is also estimated from the pairs themselves (both orders); only the
    /// blank-answer probes identify the prior of a tie (Zhao et al. 2021).
    #[arg(long, value_name = "N", default_value_t = 8)]
    pub slot_probes: usize,
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
    /// Slot probes judged by this invocation (the rest were resumed).
    pub probes_computed: usize,
    /// The verdict rule the ranking uses, with the judge's slot prior before and after.
    pub rule: Option<RankingRule>,
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

/// A comparison's inputs, checked before any judge loads.
pub struct CompareSetup {
    /// Every answer in the file.
    pub answers: Vec<AnswerRecord>,
    /// Form templates.
    pub forms: Forms,
    /// Criterion key, or `overall`.
    pub criterion: String,
    /// The question the judge answers for each pair.
    pub question: String,
    /// Show references / contexts in the form.
    pub show_ref: bool,
    /// Show contexts in the form.
    pub show_ctx: bool,
    /// Pairs to judge, in file order.
    pub pairs: Vec<(AnswerRecord, AnswerRecord)>,
    /// The rubric's text and hash, when a criterion is compared.
    pub rubric: Option<(String, String)>,
    /// Human preferences (`--preferences`), read before any judging.
    pub preferences: Option<Vec<PreferenceRow>>,
    /// Grades, labels and the run's rubric (`--grades`, `--labels`), read before any judging.
    pub grades_labels: Option<(Vec<GradeRecord>, Vec<LabelRow>, Rubric)>,
}

/// Read and check the answers, systems, criterion and templates.
pub fn compare_setup(args: &CompareArgs) -> anyhow::Result<CompareSetup> {
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
    let (criterion, question, show_ref, show_ctx, rubric) =
        match one_criterion(&args.criterion, "compare")? {
            Some(k) => {
                let rubric = args.rubric.load()?;
                let c = args.rubric.criterion(&rubric, k)?;
                (
                    k.clone(),
                    format!("{} Which answer does better on this?", c.question),
                    c.needs.contains(&Need::Reference),
                    c.needs.contains(&Need::Context),
                    Some((rubric.text.clone(), rubric.sha256.clone())),
                )
            }
            None => (
                "overall".to_string(),
                OVERALL_QUESTION.to_string(),
                true,
                true,
                None,
            ),
        };
    let pairs = pairs_to_judge(&answers, &args.systems, args.limit);
    if pairs.is_empty() {
        return Err(usage(
            "no question has answers from two of the chosen systems",
            "give answers of at least two systems to the same `question_id`",
        ));
    }
    // Every form renders before any judge loads: a template problem shows now.
    for (a, b) in &pairs {
        forms
            .pair(a, b, &question, show_ref, show_ctx)
            .with_context(|| format!("cannot render the pairwise form for `{}`", a.question_id))?;
    }
    let preferences = args
        .preferences
        .as_ref()
        .map(|p| read_preferences(p))
        .transpose()?;
    let grades_labels = match (&args.grades, &args.labels) {
        (Some(g), Some(l)) => {
            let recs: Vec<GradeRecord> = read_records(&g.join(super::grade::GRADES_FILE))?;
            let rubric = args.rubric.load_for_run(g)?;
            let labels =
                read_labels_checked(l, &rubric.scales(), Some(&answers), OtherCriteria::Refuse)?;
            Some((recs, labels, rubric))
        }
        _ => None,
    };
    Ok(CompareSetup {
        answers,
        forms,
        criterion,
        question,
        show_ref,
        show_ctx,
        pairs,
        rubric,
        preferences,
        grades_labels,
    })
}

/// Where a comparison's records go and what they depend on.
fn compare_spec(args: &CompareArgs, s: &CompareSetup, model: &ModelId) -> JobSpec {
    let mut inputs = std::collections::BTreeMap::new();
    inputs.insert("answers".to_string(), shown_path(&args.answers));
    if s.rubric.is_some() {
        inputs.insert("rubric".to_string(), shown_path(&args.rubric.named()));
    }
    let manifest = Manifest {
        kind: "compare".into(),
        tool_version: super::common::run_version(),
        model_path: model.path.clone(),
        model_sha256: model.sha256.clone(),
        rubric_sha256: s.rubric.as_ref().map(|r| r.1.clone()).unwrap_or_default(),
        templates_sha256: s.forms.sha256.clone(),
        options: vec![
            format!("criterion={}", s.criterion),
            format!("systems={}", args.systems.join(",")),
        ],
        seed: args.seed,
        rubric_toml: s.rubric.as_ref().map(|r| r.0.clone()),
        inputs,
        shard: None,
    };
    let dir = match &args.run_dir {
        Some(d) => d.clone(),
        None => default_run_dir(KIND, &shard_identity(&manifest, args.shard)),
    };
    JobSpec {
        dir,
        manifest,
        results: PAIRS_FILE,
        what: "comparing",
        quiet: args.output.quiet,
        shard: args.shard,
        slow_append: None,
        latest: Some(KIND),
    }
}

/// The comparison job: one unit per pair of answers, producing both orders.
pub fn open_compare_job(
    args: &CompareArgs,
    s: &CompareSetup,
    model: &ModelId,
) -> anyhow::Result<Job<(AnswerRecord, AnswerRecord)>> {
    let spec = compare_spec(args, s, model);
    let dir = spec.dir.clone();
    let c = &s.criterion;
    let units = s
        .pairs
        .iter()
        .map(|(a, b)| Unit {
            key: format!("{}/{}/{}", a.question_id, a.system, b.system),
            input: input_hash(&(a, b)),
            records: vec![
                format!("{}/{c}/{}/{}", a.question_id, a.system, b.system),
                format!("{}/{c}/{}/{}", a.question_id, b.system, a.system),
            ],
            data: (a.clone(), b.clone()),
        })
        .collect();
    Job::open(spec, units).with_context(|| format!("cannot use run folder `{}`", dir.display()))
}

/// Slot probes: on each of the first `--slot-probes` questions, blank answers and the
/// alphabetically first system's answer shown twice.
fn probe_units(args: &CompareArgs, s: &CompareSetup) -> Vec<Unit<(ProbeKind, AnswerRecord)>> {
    let mut seen = HashSet::new();
    let firsts = s
        .pairs
        .iter()
        .map(|(a, _)| a)
        .filter(|a| seen.insert(a.question_id.clone()))
        .take(args.slot_probes);
    let mut units = Vec::new();
    for a in firsts {
        for kind in [ProbeKind::ContentFree, ProbeKind::IdenticalAnswers] {
            let record = ProbeRecord {
                question_id: a.question_id.clone(),
                criterion: s.criterion.clone(),
                kind,
                system: (kind == ProbeKind::IdenticalAnswers).then(|| a.system.clone()),
                p_first: 0.0,
                p_second: 0.0,
                p_tie: 0.0,
                captured_mass: 0.0,
            };
            units.push(Unit {
                key: record.key(),
                input: input_hash(&(kind, a)),
                records: vec![record.key()],
                data: (kind, a.clone()),
            });
        }
    }
    units
}

/// Whether some slot probe of this comparison is missing from its run folder.
pub fn probes_pending(
    args: &CompareArgs,
    s: &CompareSetup,
    dir: &std::path::Path,
) -> anyhow::Result<bool> {
    let path = dir.join(PROBES_FILE);
    let done: HashSet<String> = if path.exists() {
        read_records::<ProbeRecord>(&path)?
            .iter()
            .map(ProbeRecord::key)
            .collect()
    } else {
        HashSet::new()
    };
    Ok(probe_units(args, s).iter().any(|u| !done.contains(&u.key)))
}

/// Judge the slot probes not yet in the run folder; returns all of them and how many were computed.
fn run_probes(
    args: &CompareArgs,
    s: &CompareSetup,
    spec: JobSpec,
    backend: Option<&dyn Backend>,
) -> anyhow::Result<(Vec<ProbeRecord>, usize)> {
    let spec = JobSpec {
        results: PROBES_FILE,
        what: "probing slots",
        shard: None,
        ..spec
    };
    let dir = spec.dir.clone();
    let job = Job::open(spec, probe_units(args, s))
        .with_context(|| format!("cannot use run folder `{}`", dir.display()))?;
    if job.remaining() > 0 && backend.is_none() {
        return Ok((Vec::new(), 0));
    }
    let outcome = job.run(
        |(kind, a)| {
            let backend = backend.expect("a judge is loaded when work remains");
            Ok(vec![judge_probe(
                backend,
                &s.forms,
                a,
                *kind,
                &s.criterion,
                &s.question,
                s.show_ref,
                s.show_ctx,
            )?])
        },
        ProbeRecord::key,
    )?;
    Ok((outcome.records, outcome.computed))
}

/// Judge all pairs not yet in the run folder and build the report.
pub fn compare_run(args: &CompareArgs, backend: &dyn Backend) -> anyhow::Result<CompareReport> {
    let setup = compare_setup(args)?;
    let model = ModelId::of(backend);
    let job = open_compare_job(args, &setup, &model)?;
    finish_compare(args, &setup, job, &model, Some(backend))
}

/// Run a comparison job; `backend` may be `None` only when nothing remains.
pub fn finish_compare(
    args: &CompareArgs,
    s: &CompareSetup,
    job: Job<(AnswerRecord, AnswerRecord)>,
    model: &ModelId,
    backend: Option<&dyn Backend>,
) -> anyhow::Result<CompareReport> {
    let dir = job.dir().to_path_buf();
    if !args.output.quiet {
        eprintln!(
            "run folder `{}`: {} of {} pairs already judged",
            dir.display(),
            job.total() - job.remaining(),
            job.total()
        );
    }
    let outcome = job.run(
        |(a, b)| {
            let backend = backend.expect("a judge is loaded when work remains");
            Ok(judge_both_orders(
                backend,
                &s.forms,
                a,
                b,
                &s.criterion,
                &s.question,
                s.show_ref,
                s.show_ctx,
            )?
            .to_vec())
        },
        PairRecord::key,
    )?;
    // Release the folder lock before the slot probes open their job in the same folder.
    drop(job);
    if !outcome.failed.is_empty() {
        return Err(usage(
            format!(
                "{} pair(s) could not be judged; every other pair is saved in `{}`:\n{}",
                outcome.failed.len(),
                dir.display(),
                crate::data::list(
                    &outcome
                        .failed
                        .iter()
                        .map(|f| format!("{}: {}", f.unit, f.error))
                        .collect::<Vec<_>>()
                )
            ),
            "shorten those answers or raise `--max-context`, then run the same command again to finish",
        ));
    }
    let (probes, probes_computed) = if args.shard.is_none() && args.slot_probes > 0 {
        run_probes(args, s, compare_spec(args, s, model), backend)?
    } else {
        (Vec::new(), 0)
    };
    let criterion = s.criterion.clone();
    let answers = &s.answers;
    let records = outcome.records;
    let model_path = backend.map_or_else(|| job_model(&dir), |b| b.model_path());
    let mut outcomes: Vec<PairOutcome> = pair_outcomes(&records)?;
    let judged: Vec<_> = outcomes.iter().map(PairOutcome::judged).collect();
    let judge_name = args.judge_name.clone().unwrap_or_else(|| {
        std::path::Path::new(&model_path)
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default()
    });
    let inputs = PairInputs {
        judges: vec![&records],
        probes: vec![&probes],
        grades: s.grades_labels.as_ref().map(|(g, _, r)| (g.as_slice(), r)),
    };
    let rule = chosen_rule(args, &inputs, s.preferences.as_deref(), &criterion)?;
    if let Some(r) = &rule {
        set_verdicts(&mut outcomes, &r.verdicts);
    }
    let rule_name = rule
        .as_ref()
        .map_or("debiased", |r| r.name.as_str())
        .to_string();
    let self_pref = self_preference(
        &judge_name,
        &outcomes,
        answers,
        s.preferences.as_deref(),
        s.grades_labels
            .as_ref()
            .map(|(g, l, r)| (g.as_slice(), l.as_slice(), r)),
        args.seed,
    );
    Ok(CompareReport {
        run_dir: dir.display().to_string(),
        model: model_path,
        criterion,
        pairs: outcomes.len(),
        computed: outcome.computed,
        position: if judged.is_empty() { None } else { Some(position_bias(&judged)?) },
        probes_computed,
        rule,
        ranking: rank(&outcomes, &rule_name, args.resamples, args.seed).map_err(|e| {
            format!("no ranking: {e}; compare more systems against each other so every system both wins and loses somewhere")
        }),
        length: length_probe(&outcomes, answers),
        self_preference: self_pref,
        low_mass: records.iter().filter(|r| r.captured_mass < 0.5).count(),
        outcomes,
    })
}

/// The ranking's verdict rule: chosen against `prefs` when they overlap the pairs,
/// else the calibrated rule.
fn chosen_rule(
    args: &CompareArgs,
    inputs: &PairInputs,
    prefs: Option<&[crate::data::PreferenceRow]>,
    criterion: &str,
) -> anyhow::Result<Option<RankingRule>> {
    let opts = VetOptions {
        resamples: args.resamples,
        seed: args.seed,
        ..VetOptions::default()
    };
    let vetted = match prefs {
        Some(p) => match vet_pair_inputs(inputs, p, &opts) {
            Ok(v) => Some(v),
            Err(VetError::NoPairOverlap { .. }) => None,
            Err(e) => return Err(e.into()),
        },
        None => None,
    };
    Ok(ranking_rule(inputs, criterion, vetted.as_ref())?)
}

/// The judge model recorded in a run folder's manifest.
fn job_model(dir: &std::path::Path) -> String {
    crate::store::read_manifest(dir)
        .ok()
        .flatten()
        .map(|m| m.model_path)
        .unwrap_or_default()
}

/// Run `assize compare`: check inputs and the run folder, load the judge only when
/// pairs remain, judge them, print the report.
pub fn run(args: CompareArgs) -> anyhow::Result<ExitCode> {
    let setup = compare_setup(&args)?;
    let model_id = ModelId::resolve(&args.model)?;
    let job = open_compare_job(&args, &setup, &model_id)?;
    let probing =
        args.shard.is_none() && args.slot_probes > 0 && probes_pending(&args, &setup, job.dir())?;
    let judge = if job.remaining() > 0 || probing {
        Some(load_judge(&args.model, args.output.quiet)?)
    } else {
        None
    };
    let report = finish_compare(
        &args,
        &setup,
        job,
        &model_id,
        judge.as_ref().map(|j| j as &dyn Backend),
    )?;
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
    if let Some(rule) = &r.rule {
        let k = &rule.calibration;
        s.push_str(&format!(
            "\nslot prior (Zhao et al. 2021 calibration, from {} pairs, {} identical-answer and {} blank-answer probes): first {:.3}, second {:.3}, tie {:.3}{}\n",
            k.prior.from_pairs,
            k.prior.from_identical,
            k.prior.from_content_free,
            k.prior.first,
            k.prior.second,
            k.prior.tie,
            if k.prior.tie_estimated { "" } else { " (tie prior left neutral)" }
        ));
        s.push_str(&format!(
            "  same winner in both orders: {:.2} raw, {:.2} calibrated; first-shown answer wins {:.2} raw, {:.2} calibrated\n",
            k.before.consistency, k.after.consistency, k.before.first_slot_rate, k.after.first_slot_rate
        ));
        s.push_str(&format!(
            "  verdict rule for the ranking: {} ({}){}\n",
            rule.name,
            rule.order
                .map_or("order cannot enter".to_string(), |o| format!(
                    "same winner in both orders {:.2}, first-shown answer wins {:.2}",
                    o.consistency, o.first_slot_rate
                )),
            if rule.chosen_against_humans {
                " (chosen against the human preferences; see `assize vet --pairs`)"
            } else {
                " (default; pass `--preferences` to choose a rule against human preferences)"
            }
        ));
    }
    match &r.ranking {
        Ok(k) => {
            s.push_str(&format!("\nchance of beating a system of average strength (Bradley-Terry fit of the {} verdicts, Hunter 2004; 95% bootstrap interval over questions)\n", k.rule));
            if let Some(p) = &k.prior {
                s.push_str(&format!("  note: {p}\n"));
            }
            for row in &k.rows {
                s.push_str(&format!(
                    "  {:<20} {:>4.0}%  ({:.0}% to {:.0}%)  won {} of {} compared (ties count half)\n",
                    row.system,
                    row.beats_average * 100.0,
                    row.beats_average_low * 100.0,
                    row.beats_average_high * 100.0,
                    row.wins as f64 + 0.5 * row.ties as f64,
                    row.comparisons()
                ));
            }
        }
        Err(e) => s.push_str(&format!("\n{e}\n")),
    }
    if !r.length.is_empty() {
        s.push_str("\nlength (words)\n");
        for l in &r.length {
            s.push_str(&format!(
                "  {} vs {}: mean difference {:+.1}, longer answer won {} of decisive pairs, raw win rate {:.2}, win rate at equal length {}\n",
                l.a,
                l.b,
                l.mean_length_difference,
                l.longer_wins.map_or("-".into(), |v| format!("{:.0}%", v * 100.0)),
                l.raw_win_rate,
                l.win_rate_at_equal_length.map_or("-".into(), |v| format!("{v:.2}"))
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
