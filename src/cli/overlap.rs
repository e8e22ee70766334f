//! `assize overlap`: reference-based text metrics (ROUGE, BLEU, chrF, edit-distance
//! similarity, token F1, exact match) for every answer with a reference, per item and
//! per system. Cheap baselines; no model. Never invents a reference.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use serde::Serialize;

use super::errors::usage;
use super::{print_json, OutputArgs};
use crate::data::read_answers;
use crate::overlap::{score_corpus, score_pair, OverlapOptions, OverlapScores, TokenizerMode};

/// Arguments of `assize overlap`.
#[derive(Debug, Clone, Args)]
pub struct OverlapArgs {
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    ///
    /// Only answers with a `reference` field are scored.
    #[arg(long, short = 'a', value_name = "FILE")]
    pub answers: PathBuf,
    /// Porter-stem words for ROUGE
    #[arg(long)]
    pub stem: bool,
    /// Keep accented and non-Latin letters in ROUGE words (default drops them, as the common reference implementation does)
    #[arg(long)]
    pub unicode: bool,
    /// Lowercase before BLEU and chrF
    #[arg(long)]
    pub lowercase: bool,
    /// Print every item, not only the per-system means
    #[arg(long)]
    pub items: bool,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Scores of one answer.
#[derive(Debug, Serialize)]
pub struct ItemOverlap {
    /// Question id.
    pub question_id: String,
    /// System.
    pub system: String,
    /// The metrics.
    pub scores: OverlapScores,
}

/// Per-system means, and corpus-level BLEU and chrF.
#[derive(Debug, Serialize)]
pub struct SystemOverlap {
    /// System.
    pub system: String,
    /// Answers with a reference.
    pub n: usize,
    /// Mean of each per-answer metric.
    pub mean: OverlapScores,
    /// Corpus BLEU (0-100).
    pub corpus_bleu: f64,
    /// Corpus chrF (0-100).
    pub corpus_chrf: f64,
    /// Corpus chrF++ (0-100).
    pub corpus_chrfpp: f64,
}

/// What `assize overlap --json` prints.
#[derive(Debug, Serialize)]
pub struct OverlapReport {
    /// Per system.
    pub systems: Vec<SystemOverlap>,
    /// Per answer.
    pub items: Vec<ItemOverlap>,
    /// Answers skipped for lack of a reference.
    pub without_reference: usize,
}

fn mean(v: &[&OverlapScores]) -> OverlapScores {
    let n = v.len() as f64;
    let avg = |f: fn(&OverlapScores) -> f64| v.iter().map(|s| f(s)).sum::<f64>() / n;
    OverlapScores {
        rouge1_f: avg(|s| s.rouge1_f),
        rouge2_f: avg(|s| s.rouge2_f),
        rougel_f: avg(|s| s.rougel_f),
        rougelsum_f: avg(|s| s.rougelsum_f),
        bleu: avg(|s| s.bleu),
        chrf: avg(|s| s.chrf),
        chrfpp: avg(|s| s.chrfpp),
        levenshtein_sim: avg(|s| s.levenshtein_sim),
        indel_sim: avg(|s| s.indel_sim),
        token_f1: avg(|s| s.token_f1),
        exact_match: avg(|s| s.exact_match),
    }
}

/// Run `assize overlap`.
pub fn run(args: OverlapArgs) -> anyhow::Result<ExitCode> {
    let answers = read_answers(&args.answers)?;
    let opts = OverlapOptions {
        tokenizer: if args.unicode {
            TokenizerMode::Unicode
        } else {
            TokenizerMode::Compatible
        },
        stem: args.stem,
        lowercase: args.lowercase,
    };
    let mut items = Vec::new();
    let mut by_system: BTreeMap<String, Vec<(String, String)>> = BTreeMap::new();
    let mut without = 0;
    for a in &answers {
        let Some(r) = &a.reference else {
            without += 1;
            continue;
        };
        items.push(ItemOverlap {
            question_id: a.question_id.clone(),
            system: a.system.clone(),
            scores: score_pair(&a.answer, &[r.as_str()], &opts)?,
        });
        by_system
            .entry(a.system.clone())
            .or_default()
            .push((a.answer.clone(), r.clone()));
    }
    if items.is_empty() {
        return Err(usage(
            format!(
                "no answer in `{}` has a `reference`",
                args.answers.display()
            ),
            "add a `reference` field with a known-good answer to each line",
        ));
    }
    let mut systems = Vec::new();
    for (system, pairs) in by_system {
        let hyps: Vec<&str> = pairs.iter().map(|p| p.0.as_str()).collect();
        let refs: Vec<[&str; 1]> = pairs.iter().map(|p| [p.1.as_str()]).collect();
        let corpus = score_corpus(&hyps, &refs, &opts)?;
        let mine: Vec<&OverlapScores> = items
            .iter()
            .filter(|i| i.system == system)
            .map(|i| &i.scores)
            .collect();
        systems.push(SystemOverlap {
            n: mine.len(),
            mean: mean(&mine),
            corpus_bleu: corpus.bleu,
            corpus_chrf: corpus.chrf,
            corpus_chrfpp: corpus.chrfpp,
            system,
        });
    }
    let report = OverlapReport {
        systems,
        items,
        without_reference: without,
    };
    if args.output.json {
        print_json(&report)?;
        return Ok(ExitCode::SUCCESS);
    }
    println!(
        "{:<18} {:>4} {:>8} {:>8} {:>8} {:>7} {:>7} {:>7} {:>8} {:>6}",
        "system", "n", "ROUGE-1", "ROUGE-2", "ROUGE-L", "BLEU", "chrF", "chrF++", "token-F1", "EM"
    );
    for s in &report.systems {
        println!(
            "{:<18} {:>4} {:>8.3} {:>8.3} {:>8.3} {:>7.1} {:>7.1} {:>7.1} {:>8.3} {:>6.3}",
            s.system,
            s.n,
            s.mean.rouge1_f,
            s.mean.rouge2_f,
            s.mean.rougel_f,
            s.corpus_bleu,
            s.corpus_chrf,
            s.corpus_chrfpp,
            s.mean.token_f1,
            s.mean.exact_match
        );
    }
    println!("(ROUGE, token F1, EM: means over answers; BLEU, chrF: corpus level, 0-100)");
    if args.items {
        for i in &report.items {
            println!(
                "{:<8} {:<18} ROUGE-L {:.3}  BLEU {:>5.1}  chrF {:>5.1}  Levenshtein {:.3}  Indel {:.3}  F1 {:.3}",
                i.question_id, i.system, i.scores.rougel_f, i.scores.bleu, i.scores.chrf,
                i.scores.levenshtein_sim, i.scores.indel_sim, i.scores.token_f1
            );
        }
    }
    if without > 0 {
        eprintln!("warning: {without} answer(s) without `reference` were skipped; fix: add references to score them");
    }
    Ok(ExitCode::SUCCESS)
}
