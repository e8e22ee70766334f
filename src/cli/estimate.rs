//! `assize estimate`: a corrected quality estimate per system and criterion from judge
//! grades on every item plus human labels on a few, by prediction-powered inference
//! (Angelopoulos, Bates, Fannjiang, Jordan & Zrnic 2023) and its power-tuned form
//! PPI++ (Angelopoulos, Duchi & Zrnic 2023), beside the judge-only and human-only
//! means. Never runs the model: it reads a finished grading run.

use std::collections::{BTreeMap, HashMap};
use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use super::common::RubricArg;
use super::errors::usage;
use super::{print_json, OutputArgs};
use crate::data::{read_labels_checked, OtherCriteria};
use crate::judge::anchors::consensus_index;
use crate::judge::GradeRecord;
use crate::stats::ppi::{classical_mean, ppi_mean_with_lambda, MeanEstimate};
use crate::store::read_records;

/// Arguments of `assize estimate`.
#[derive(Debug, Clone, Args)]
pub struct EstimateArgs {
    /// Grading run folder (holds `grades.jsonl`)
    #[arg(long, short = 'g', value_name = "DIR")]
    pub grades: PathBuf,
    /// Human labels in long form (question_id, system, criterion, rater, score)
    ///
    /// The consensus of an item is the lower median of its raters' scores.
    #[arg(long, short = 'l', value_name = "FILE")]
    pub labels: PathBuf,
    #[command(flatten)]
    pub rubric: RubricArg,
    /// Use only this share of the labelled items (seeded), holding the rest out to show
    /// how close the estimate gets to the full human mean
    #[arg(long, value_name = "SHARE", value_parser = super::values::share)]
    pub label_share: Option<f64>,
    /// Interval coverage
    #[arg(long, value_name = "LEVEL", default_value_t = 0.95, value_parser = super::values::level)]
    pub level: f64,
    /// Seed of every random draw
    #[arg(long, value_name = "N", default_value_t = 7)]
    pub seed: u64,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// One system and criterion.
#[derive(Debug, Serialize)]
pub struct EstimateRow {
    /// System.
    pub system: String,
    /// Criterion key.
    pub criterion: String,
    /// Items with a human consensus used as labels.
    pub n_labelled: usize,
    /// Items with judge grades only.
    pub n_unlabelled: usize,
    /// Mean judge expected score over all items (uncorrected).
    pub judge_mean: f64,
    /// Mean of the human consensus on the labelled items, with its normal interval.
    pub human_only: MeanEstimate,
    /// Prediction-powered estimate (lambda = 1).
    pub ppi: MeanEstimate,
    /// Power-tuned estimate (lambda chosen from the data, clipped to [0, 1]).
    pub ppi_plus_plus: MeanEstimate,
    /// Mean human consensus over all labelled items, including held-out ones (only with `--label-share`).
    pub held_out_human_mean: Option<f64>,
}

/// What `assize estimate --json` prints.
#[derive(Debug, Serialize)]
pub struct EstimateReport {
    /// Interval coverage.
    pub level: f64,
    /// Per system and criterion.
    pub rows: Vec<EstimateRow>,
    /// Pairs skipped and why.
    pub skipped: Vec<String>,
}

/// Compute the estimates.
pub fn estimate(args: &EstimateArgs) -> anyhow::Result<EstimateReport> {
    if !(0.5..1.0).contains(&args.level) {
        return Err(usage(
            format!("`--level {}` is not in [0.5, 1)", args.level),
            "use e.g. 0.95",
        ));
    }
    let rubric = args.rubric.load_for_run(&args.grades)?;
    let labels = read_labels_checked(&args.labels, &rubric.scales(), None, OtherCriteria::Refuse)?;
    let grades: Vec<GradeRecord> = read_records(&args.grades.join(super::grade::GRADES_FILE))?;
    if grades.is_empty() {
        return Err(usage(
            format!("`{}` holds no grades", args.grades.display()),
            "pass the run folder that `assize grade` printed",
        ));
    }
    let mut ratings: HashMap<(String, String, String), Vec<usize>> = HashMap::new();
    for l in &labels {
        if let Some(c) = rubric.criterion(&l.criterion) {
            if let Some(i) = c.scale.index_of(&l.score) {
                ratings
                    .entry((l.question_id.clone(), l.system.clone(), l.criterion.clone()))
                    .or_default()
                    .push(i);
            }
        }
    }
    let mut groups: BTreeMap<(String, String), Vec<&GradeRecord>> = BTreeMap::new();
    for g in &grades {
        groups
            .entry((g.system.clone(), g.criterion.clone()))
            .or_default()
            .push(g);
    }
    let alpha = 1.0 - args.level;
    let mut rows = Vec::new();
    let mut skipped = Vec::new();
    for ((system, criterion), recs) in groups {
        let Some(c) = rubric.criterion(&criterion) else {
            skipped.push(format!("{system}/{criterion}: criterion not in the rubric"));
            continue;
        };
        let values = c.scale.values();
        let mut labelled: Vec<(f64, f64)> = Vec::new();
        let mut unlabelled: Vec<f64> = Vec::new();
        for r in &recs {
            match ratings
                .get(&(r.question_id.clone(), r.system.clone(), r.criterion.clone()))
                .and_then(|v| consensus_index(v))
            {
                Some(i) => labelled.push((values[i], r.expected)),
                None => unlabelled.push(r.expected),
            }
        }
        let held_out_human_mean = args
            .label_share
            .map(|_| labelled.iter().map(|p| p.0).sum::<f64>() / labelled.len().max(1) as f64);
        if let Some(share) = args.label_share {
            let mut rng = ChaCha8Rng::seed_from_u64(args.seed);
            labelled.shuffle(&mut rng);
            let keep = ((labelled.len() as f64 * share).round() as usize)
                .clamp(2.min(labelled.len()), labelled.len());
            for (_, f) in labelled.drain(keep..) {
                unlabelled.push(f);
            }
        }
        if labelled.len() < 2 || unlabelled.is_empty() {
            skipped.push(if labelled.len() < 2 {
                format!("{system}/{criterion}: {} labelled item(s); label at least 2", labelled.len())
            } else {
                format!("{system}/{criterion}: every item is labelled, so there is nothing to correct; use the human mean, or `--label-share 0.3` to see how the estimate behaves")
            });
            continue;
        }
        let y: Vec<f64> = labelled.iter().map(|p| p.0).collect();
        let f: Vec<f64> = labelled.iter().map(|p| p.1).collect();
        let all = recs.iter().map(|r| r.expected).sum::<f64>() / recs.len() as f64;
        rows.push(EstimateRow {
            n_labelled: y.len(),
            n_unlabelled: unlabelled.len(),
            judge_mean: all,
            human_only: classical_mean(&y, alpha)?,
            ppi: ppi_mean_with_lambda(&y, &f, &unlabelled, Some(1.0), alpha)?,
            ppi_plus_plus: ppi_mean_with_lambda(&y, &f, &unlabelled, None, alpha)?,
            held_out_human_mean,
            system,
            criterion,
        });
    }
    Ok(EstimateReport {
        level: args.level,
        rows,
        skipped,
    })
}

/// Run `assize estimate`.
pub fn run(args: EstimateArgs) -> anyhow::Result<ExitCode> {
    let r = estimate(&args)?;
    if args.output.json {
        print_json(&r)?;
        return Ok(ExitCode::SUCCESS);
    }
    println!(
        "quality estimates with {:.0}% intervals (judge grades on every item, human labels on some)\n",
        r.level * 100.0
    );
    println!(
        "{:<16} {:<13} {:>5} {:>6} {:>7} {:>21} {:>21} {:>21} {:>9}",
        "system",
        "criterion",
        "lab.",
        "unlab.",
        "judge",
        "humans only",
        "PPI",
        "PPI++",
        "all-human"
    );
    let ci = |m: &MeanEstimate| format!("{:.2} [{:.2}, {:.2}]", m.estimate, m.ci_low, m.ci_high);
    for row in &r.rows {
        println!(
            "{:<16} {:<13} {:>5} {:>6} {:>7.2} {:>21} {:>21} {:>21} {:>9}",
            row.system,
            row.criterion,
            row.n_labelled,
            row.n_unlabelled,
            row.judge_mean,
            ci(&row.human_only),
            ci(&row.ppi),
            ci(&row.ppi_plus_plus),
            row.held_out_human_mean
                .map_or("-".into(), |v| format!("{v:.2}"))
        );
    }
    println!("\nthe judge column is uncorrected; PPI corrects it with the labelled items and its interval accounts for both samples");
    if r.rows.iter().any(|row| row.n_labelled < 30) {
        println!("caution: with fewer than 30 labelled items per row the normal intervals are rough, and a corrected estimate can even leave the scale; label more items");
    }
    for s in &r.skipped {
        eprintln!("warning: skipped {s}");
    }
    Ok(ExitCode::SUCCESS)
}
