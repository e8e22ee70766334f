//! `assize answer`: let a local model answer a file of questions, producing an
//! answers file (`written_by` set to the model), e.g. to add a system to compare or
//! to probe a judge's preference for its own writing. Never grades.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context as _;
use clap::Args;

use super::common::{load_judge, progress, ModelArgs};
use super::OutputArgs;
use crate::data::table::read_rows;
use crate::data::AnswerRecord;

/// Default instruction given to the answering model.
pub const DEFAULT_INSTRUCTION: &str = "You answer questions from the public. Use only the source text when one is given; if it does not cover the question, say so. Answer in one to three sentences.";

/// Arguments of `assize answer`.
#[derive(Debug, Clone, Args)]
pub struct AnswerArgs {
    /// Questions (JSONL or CSV: question_id, question, optional context, reference)
    #[arg(long, short = 'i', value_name = "FILE")]
    pub questions: PathBuf,
    /// Where to write the answers (JSONL); existing lines are kept and skipped
    #[arg(long, short = 'o', value_name = "FILE")]
    pub out: PathBuf,
    /// System name to put on the answers
    #[arg(long, value_name = "NAME")]
    pub system: String,
    /// System message given to the model
    #[arg(long = "system-message", value_name = "TEXT", default_value = DEFAULT_INSTRUCTION)]
    pub instruction: String,
    /// Token limit per answer
    #[arg(long, value_name = "N", default_value_t = 120)]
    pub max_tokens: usize,
    /// Sampling temperature (0 = greedy, the default)
    #[arg(long, value_name = "T", default_value_t = 0.0)]
    pub temperature: f64,
    /// Seed of every random draw
    #[arg(long, value_name = "N", default_value_t = 7)]
    pub seed: u64,
    #[command(flatten)]
    pub model: ModelArgs,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Run `assize answer`.
pub fn run(args: AnswerArgs) -> anyhow::Result<ExitCode> {
    let (rows, problems) = read_rows("questions", &args.questions)?;
    crate::data::table::finish("questions", &args.questions, (), problems)?;
    let judge = load_judge(&args.model, args.output.quiet)?;
    let author = judge
        .path
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let done: std::collections::HashSet<String> = if args.out.exists() {
        crate::data::read_answers(&args.out)?
            .into_iter()
            .map(|a| a.question_id)
            .collect()
    } else {
        Default::default()
    };
    let mut file = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(&args.out)
        .with_context(|| format!("cannot write `{}`", args.out.display()))?;
    let bar = progress(rows.len() as u64, "answering", args.output.quiet);
    let mut written = 0;
    for row in &rows {
        let qid = row
            .required("question_id")
            .map_err(|m| anyhow::anyhow!("questions line {}: {m}", row.line))?;
        let question = row
            .required("question")
            .map_err(|m| anyhow::anyhow!("questions line {}: {m}", row.line))?;
        bar.inc(1);
        if done.contains(&qid) {
            continue;
        }
        let context = row.optional("context");
        let user = match &context {
            Some(c) => format!("Source text:\n{c}\n\nQuestion: {question}"),
            None => question.clone(),
        };
        let prompt = judge.encode_chat(&args.instruction, &user, "")?;
        let out = judge.generate(
            &qid,
            &prompt,
            args.max_tokens,
            &[],
            args.temperature,
            args.seed,
        )?;
        let rec = AnswerRecord {
            question_id: qid,
            system: args.system.clone(),
            question,
            answer: out.text.trim().to_string(),
            context,
            reference: row.optional("reference"),
            written_by: Some(author.clone()),
            line: 0,
        };
        writeln!(file, "{}", serde_json::to_string(&rec)?)?;
        file.flush()?;
        written += 1;
    }
    bar.finish_and_clear();
    if !args.output.quiet {
        eprintln!(
            "wrote {written} answers to `{}` (written_by `{author}`)",
            args.out.display()
        );
    }
    Ok(ExitCode::SUCCESS)
}
