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
use super::evidence::{Evidence, PanelArgs, PRIMARY};
use super::{print_json, OutputArgs};
use crate::calibrate::{cross_fit, group_folds, Method, Target};
use crate::data::{read_labels_checked, OtherCriteria};
use crate::judge::anchors::consensus_index;
use crate::judge::GradeRecord;
use crate::stats::ppi::{classical_mean, cross_ppi_mean, ppi_mean_with_lambda, MeanEstimate};
use crate::store::read_records;

/// Arguments of `assize estimate`.
#[derive(Debug, Clone, Args)]
pub struct EstimateArgs {
    /// Grading run folder (holds `grades.jsonl`), or `latest` for the last one finished in `runs`
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
    /// Add label-calibrated grades, cross-fitted on the labelled items so every figure
    /// shown for them is out of sample (needs `--labels`)
    #[arg(long)]
    pub calibrate: bool,
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    #[arg(
        long = "answers",
        short = 'a',
        value_name = "FILE",
        requires = "calibrate"
    )]
    pub baselines: Option<PathBuf>,
    #[command(flatten)]
    pub panel: PanelArgs,
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
    /// Cross-prediction-powered estimate from the calibrated predictions (with `--calibrate`).
    pub cross_ppi: Option<MeanEstimate>,
    /// The same with the power-tuned weight λ of PPI++ on the calibrated predictions.
    pub cross_ppi_plus_plus: Option<MeanEstimate>,
    /// Width of the cross-PPI++ interval divided by the PPI++ interval's (below 1: narrower).
    pub width_ratio: Option<f64>,
}

/// One labelled or unlabelled item of a (system, criterion) group.
struct Item {
    question_id: String,
    /// Consensus scale position (labelled items only).
    position: Option<usize>,
    judge: f64,
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
    /// What the calibrated predictions were fitted on, per criterion (with `--calibrate`).
    pub calibration: Vec<String>,
}

/// Compute the estimates.
pub fn estimate(args: &EstimateArgs) -> anyhow::Result<EstimateReport> {
    let mut args = args.clone();
    super::evidence::expand_panel_folder(&mut args.grades, &mut args.panel)?;
    let args = &args;
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
    let mut kept: Vec<(String, String, Vec<Item>, Vec<Item>, Option<f64>)> = Vec::new();
    for ((system, criterion), recs) in groups {
        let Some(c) = rubric.criterion(&criterion) else {
            skipped.push(format!("{system}/{criterion}: criterion not in the rubric"));
            continue;
        };
        let values = c.scale.values();
        let (mut labelled, mut unlabelled): (Vec<Item>, Vec<Item>) = recs
            .iter()
            .map(|r| Item {
                question_id: r.question_id.clone(),
                position: ratings
                    .get(&(r.question_id.clone(), r.system.clone(), r.criterion.clone()))
                    .and_then(|v| consensus_index(v)),
                judge: r.expected,
            })
            .partition(|i| i.position.is_some());
        let held_out_human_mean = args.label_share.map(|_| {
            labelled
                .iter()
                .map(|i| values[i.position.expect("labelled")])
                .sum::<f64>()
                / labelled.len().max(1) as f64
        });
        if let Some(share) = args.label_share {
            let mut rng = ChaCha8Rng::seed_from_u64(args.seed);
            labelled.shuffle(&mut rng);
            let keep = ((labelled.len() as f64 * share).round() as usize)
                .clamp(2.min(labelled.len()), labelled.len());
            unlabelled.extend(labelled.drain(keep..).map(|i| Item {
                position: None,
                ..i
            }));
        }
        if labelled.len() < 2 || unlabelled.is_empty() {
            skipped.push(if labelled.len() < 2 {
                format!("{system}/{criterion}: {} labelled item(s); label at least 2", labelled.len())
            } else {
                format!("{system}/{criterion}: every item is labelled, so there is nothing to correct; use the human mean, or `--label-share 0.3` to see how the estimate behaves")
            });
            continue;
        }
        kept.push((system, criterion, labelled, unlabelled, held_out_human_mean));
    }
    let calibrated = match args.calibrate {
        true => Some(calibrated_predictions(args, &rubric, &kept)?),
        false => None,
    };
    for (system, criterion, labelled, unlabelled, held_out_human_mean) in kept {
        let values = rubric
            .criterion(&criterion)
            .expect("checked above")
            .scale
            .values();
        let y: Vec<f64> = labelled
            .iter()
            .map(|i| values[i.position.expect("labelled")])
            .collect();
        let f: Vec<f64> = labelled.iter().map(|i| i.judge).collect();
        let u: Vec<f64> = unlabelled.iter().map(|i| i.judge).collect();
        let all = (f.iter().sum::<f64>() + u.iter().sum::<f64>()) / (f.len() + u.len()) as f64;
        let ppi = ppi_mean_with_lambda(&y, &f, &u, Some(1.0), alpha)?;
        let cross_ppi = match &calibrated {
            Some((preds, _)) => {
                let look = |i: &Item| {
                    preds
                        .get(&(criterion.clone(), i.question_id.clone(), system.clone()))
                        .copied()
                };
                let oof: Option<Vec<f64>> = labelled.iter().map(look).collect();
                let new: Option<Vec<f64>> = unlabelled.iter().map(look).collect();
                match (oof, new) {
                    (Some(oof), Some(new)) => Some((
                        cross_ppi_mean(&y, &oof, &new, alpha)?,
                        ppi_mean_with_lambda(&y, &oof, &new, None, alpha)?,
                    )),
                    _ => None,
                }
            }
            None => None,
        };
        let width = |m: &MeanEstimate| m.ci_high - m.ci_low;
        let ppi_plus_plus = ppi_mean_with_lambda(&y, &f, &u, None, alpha)?;
        let (cross_ppi, cross_ppi_plus_plus) = cross_ppi.unzip();
        rows.push(EstimateRow {
            n_labelled: y.len(),
            n_unlabelled: u.len(),
            judge_mean: all,
            human_only: classical_mean(&y, alpha)?,
            width_ratio: cross_ppi_plus_plus
                .as_ref()
                .filter(|_| width(&ppi_plus_plus) > 0.0)
                .map(|c| width(c) / width(&ppi_plus_plus)),
            ppi_plus_plus,
            ppi,
            cross_ppi,
            cross_ppi_plus_plus,
            held_out_human_mean,
            system,
            criterion,
        });
    }
    let calibration = calibrated.map(|c| c.1).unwrap_or_default();
    Ok(EstimateReport {
        level: args.level,
        rows,
        skipped,
        calibration,
    })
}

/// Calibrated expected scores keyed by (criterion, question, system): out of fold for
/// the labelled items kept, the fold models' average for the rest; and one line per
/// criterion saying what was fitted.
fn calibrated_predictions(
    args: &EstimateArgs,
    rubric: &crate::rubric::Rubric,
    kept: &[(String, String, Vec<Item>, Vec<Item>, Option<f64>)],
) -> anyhow::Result<(HashMap<(String, String, String), f64>, Vec<String>)> {
    let evidence = Evidence::load(&args.grades, &args.panel, args.baselines.as_deref())?;
    let table = evidence.table(evidence.runs.len() > 1);
    let mut preds = HashMap::new();
    let mut notes: Vec<String> = evidence.overlap_note.iter().cloned().collect();
    for c in &rubric.criteria {
        let groups: Vec<_> = kept.iter().filter(|k| k.1 == c.key).collect();
        let row = |sys: &str, i: &Item| table.rows.get(&(i.question_id.clone(), sys.to_string()));
        let lab: Vec<(&str, &Item)> = groups
            .iter()
            .flat_map(|g| g.2.iter().map(|i| (g.0.as_str(), i)))
            .filter(|(s, i)| row(s, i).is_some())
            .collect();
        if lab.is_empty() {
            continue;
        }
        let rows: Vec<&[f64]> = lab
            .iter()
            .map(|(s, i)| row(s, i).expect("filtered").as_slice())
            .collect();
        let y: Vec<usize> = lab
            .iter()
            .map(|(_, i)| i.position.expect("labelled"))
            .collect();
        let q: Vec<String> = lab.iter().map(|(_, i)| i.question_id.clone()).collect();
        let target = Target {
            values: c.scale.values(),
        };
        let iso = table.column(&format!("{PRIMARY}/{}/expected", c.key));
        let fit = group_folds(&q, args.panel.folds, args.seed).and_then(|f| {
            cross_fit(
                &Method::candidates(iso),
                &rows,
                &y,
                &q,
                &f,
                &target,
                args.seed,
            )
        });
        let cf = match fit {
            Ok(cf) => cf,
            Err(e) => {
                notes.push(format!("`{}`: not calibrated ({e})", c.key));
                continue;
            }
        };
        notes.push(format!(
            "`{}`: {} labelled items, {} folds by question, {} features from {}; {}",
            c.key,
            lab.len(),
            cf.models.len(),
            table.names.len(),
            evidence
                .runs
                .iter()
                .map(|r| r.name.as_str())
                .collect::<Vec<_>>()
                .join(", "),
            cf.methods()
        ));
        for ((s, i), p) in lab.iter().zip(&cf.out_of_fold) {
            preds.insert(
                (c.key.clone(), i.question_id.clone(), s.to_string()),
                p.expected,
            );
        }
        for g in &groups {
            for i in &g.3 {
                if let Some(r) = row(&g.0, i) {
                    preds.insert(
                        (c.key.clone(), i.question_id.clone(), g.0.clone()),
                        cf.predict_new(r).expected,
                    );
                }
            }
        }
    }
    Ok((preds, notes))
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
    if r.rows.iter().any(|row| row.cross_ppi.is_some()) {
        println!("\nwith label-calibrated predictions (cross-prediction-powered inference, Zrnic & Candes 2024)");
        println!(
            "{:<16} {:<13} {:>21} {:>21} {:>21} {:>11}",
            "system", "criterion", "PPI++", "cross-PPI", "cross-PPI++", "width"
        );
        for row in &r.rows {
            if let (Some(c), Some(cp)) = (&row.cross_ppi, &row.cross_ppi_plus_plus) {
                let w = row
                    .width_ratio
                    .map_or("-".to_string(), |w| format!("{:.0}%", w * 100.0));
                println!(
                    "{:<16} {:<13} {:>21} {:>21} {:>21} {:>11}",
                    row.system,
                    row.criterion,
                    ci(&row.ppi_plus_plus),
                    ci(c),
                    ci(cp),
                    w
                );
            }
        }
        println!("width: the cross-PPI++ interval's width as a share of the PPI++ interval's (below 100%: the calibration narrowed it)");
        for n in &r.calibration {
            println!("calibration: {n}");
        }
        println!("each labelled item's calibrated prediction comes from a model fitted without its question, so the correction stays unbiased; the calibration adds no labels, it uses the same ones better");
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
