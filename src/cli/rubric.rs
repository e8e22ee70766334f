//! `assize rubric …`: check a rubric file, and show the exact prompt the judge will
//! see for one item (a dry run: no weights are loaded). Never grades.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Args, Subcommand};
use serde::Serialize;

use super::common::{one_criterion, resolve_model, RubricArg};
use super::errors::usage;
use super::{print_json, OutputArgs};
use crate::data::read_answers;
use crate::engine::chat::{ChatFormat, ChatMessage, Role};
use crate::engine::tokenizer::JudgeTokenizer;
use crate::engine::GgufFile;
use crate::rubric::forms::Forms;
use crate::rubric::{bundled_names, bundled_text, load_rubric, BUNDLED};

/// `assize rubric` subcommands.
#[derive(Debug, Subcommand)]
pub enum RubricCommand {
    /// Check a rubric file; every problem is listed with its line
    Check(CheckArgs),
    /// Show the exact prompt the judge sees for one answer and criterion (no model run)
    Show(ShowArgs),
    /// List the rubrics built into the binary, usable by name with `--rubric`
    List(ListArgs),
    /// Print a bundled rubric's TOML, to start a rubric of your own from it
    Print(PrintArgs),
}

/// Arguments of `assize rubric list`.
#[derive(Debug, Args)]
pub struct ListArgs {
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Arguments of `assize rubric print`.
#[derive(Debug, Args)]
pub struct PrintArgs {
    /// Bundled rubric name (see `assize rubric list`)
    #[arg(value_name = "NAME")]
    pub name: String,
}

/// Arguments of `assize rubric check`.
#[derive(Debug, Args)]
pub struct CheckArgs {
    /// Rubric: a bundled one by name or a TOML file
    #[arg(value_name = "RUBRIC")]
    pub rubric: PathBuf,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Arguments of `assize rubric show`.
#[derive(Debug, Args)]
pub struct ShowArgs {
    #[command(flatten)]
    pub rubric: RubricArg,
    /// Answers file (JSONL or CSV: question_id, system, question, answer, optional context, reference, written_by; `-` reads stdin)
    #[arg(long, short = 'a', value_name = "FILE")]
    pub answers: PathBuf,
    /// The answer to show, as `QUESTION_ID/SYSTEM`
    #[arg(long, value_name = "ID")]
    pub item: String,
    /// Rubric criteria to use, as comma-separated keys (default: all; `compare` and `rubric show` take one)
    #[arg(long = "criteria", value_name = "KEYS", value_delimiter = ',')]
    pub criterion: Vec<String>,
    /// Reasoning first: the judge writes an assessment following the evaluation steps, then the score
    #[arg(long)]
    pub reasoning: bool,
    /// Judge model: a GGUF path, or `default`, `small`, `gemma` for the fetched judges
    ///
    /// The form is rendered through its chat template and its tokens counted (only the
    /// file header is read).
    #[arg(long, short = 'm', value_name = "MODEL", default_value = "default")]
    pub model: String,
    /// Show the form messages without any chat template
    #[arg(long)]
    pub raw: bool,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Run one `assize rubric` subcommand.
pub fn run(cmd: RubricCommand) -> anyhow::Result<ExitCode> {
    match cmd {
        RubricCommand::Check(a) => check(&a),
        RubricCommand::Show(a) => show(&a),
        RubricCommand::List(a) => list(&a),
        RubricCommand::Print(a) => print(&a),
    }
}

/// One line of `assize rubric list --json`.
#[derive(Debug, Serialize)]
pub struct BundledRubric {
    /// Name to pass to `--rubric`.
    pub name: String,
    /// The rubric's one-line description.
    pub description: String,
    /// Criterion keys with their scales, as `key (scale)`.
    pub criteria: Vec<String>,
}

fn list(args: &ListArgs) -> anyhow::Result<ExitCode> {
    let mut rows = Vec::new();
    for (name, _) in BUNDLED {
        let r = load_rubric(std::path::Path::new(name))?;
        rows.push(BundledRubric {
            name: name.to_string(),
            description: r.description,
            criteria: r
                .criteria
                .iter()
                .map(|c| format!("{} ({})", c.key, c.scale.name()))
                .collect(),
        });
    }
    if args.output.json {
        print_json(&rows)?;
        return Ok(ExitCode::SUCCESS);
    }
    for r in &rows {
        println!("{:<10} {}", r.name, r.description);
        println!("{:<10} criteria: {}", "", r.criteria.join(", "));
    }
    Ok(ExitCode::SUCCESS)
}

fn print(args: &PrintArgs) -> anyhow::Result<ExitCode> {
    let text = bundled_text(std::path::Path::new(&args.name)).ok_or_else(|| {
        usage(
            format!("no bundled rubric `{}`", args.name),
            format!("use one of {}", bundled_names()),
        )
    })?;
    print!("{text}");
    Ok(ExitCode::SUCCESS)
}

fn check(args: &CheckArgs) -> anyhow::Result<ExitCode> {
    let r = load_rubric(&args.rubric)?;
    if args.output.json {
        print_json(&r)?;
    } else {
        println!(
            "rubric `{}` is valid: {} criteria",
            r.name,
            r.criteria.len()
        );
        for c in &r.criteria {
            println!(
                "  {:<14} scale {:<7} needs {:?}",
                c.key,
                c.scale.name(),
                c.needs
            );
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// What `assize rubric show --json` prints.
#[derive(Debug, Serialize)]
pub struct ShownPrompt {
    /// The form's system message.
    pub system: String,
    /// The form's user message.
    pub user: String,
    /// The assistant prefill before the slot.
    pub prefill: String,
    /// The full prompt after the chat template (absent with `--raw`).
    pub prompt: Option<String>,
    /// Token count of the prompt (absent with `--raw`).
    pub tokens: Option<usize>,
}

fn show(args: &ShowArgs) -> anyhow::Result<ExitCode> {
    let rubric = args.rubric.load()?;
    let answers = read_answers(&args.answers)?;
    let item = answers
        .iter()
        .find(|a| a.item_id() == args.item)
        .ok_or_else(|| {
            usage(
                format!("no answer `{}` in `{}`", args.item, args.answers.display()),
                "name the answer as `QUESTION_ID/SYSTEM`, e.g. `q01/assistant-v1`",
            )
        })?;
    let c = match one_criterion(&args.criterion, "rubric show")? {
        Some(k) => args.rubric.criterion(&rubric, k)?,
        None => &rubric.criteria[0],
    };
    let form = Forms::builtin()?.grade(&rubric, item, c, args.reasoning, &[])?;
    let (prompt, tokens) = if args.raw {
        (None, None)
    } else {
        let gguf = GgufFile::open(&resolve_model(&args.model)?)?;
        let chat = ChatFormat::from_gguf(&gguf)?;
        let tok = JudgeTokenizer::from_gguf(&gguf)?;
        let msgs = [
            ChatMessage {
                role: Role::System,
                content: form.system.clone(),
            },
            ChatMessage {
                role: Role::User,
                content: form.user.clone(),
            },
        ];
        let mut segs = chat.render_segments(&msgs, true)?;
        segs.push(crate::engine::chat::Segment::Content(form.prefill.clone()));
        let ids = tok.encode_segments(&segs, true)?;
        let text = format!("{}{}", chat.render(&msgs, true)?, form.prefill);
        (Some(text), Some(ids.len()))
    };
    let shown = ShownPrompt {
        system: form.system,
        user: form.user,
        prefill: form.prefill,
        prompt,
        tokens,
    };
    if args.output.json {
        print_json(&shown)?;
    } else {
        match &shown.prompt {
            Some(p) => {
                println!("{p}");
                eprintln!("{} tokens", shown.tokens.unwrap_or(0));
            }
            None => println!(
                "[system]\n{}\n\n[user]\n{}\n\n[assistant]\n{}",
                shown.system, shown.user, shown.prefill
            ),
        }
    }
    Ok(ExitCode::SUCCESS)
}
