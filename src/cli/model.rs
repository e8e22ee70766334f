//! `assize model …`: inspect a GGUF judge file, fetch one from a model hub (or its
//! offline cache), show how the judge tokenises text and what it would say next,
//! and measure its speed. Never grades anything.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Context as _;
use clap::{Args, Subcommand};

use super::common::resolve_model;
use super::{errors::usage, print_json, OutputArgs};
use crate::engine::decoder::LoadOptions;
use crate::engine::tokenizer::JudgeTokenizer;
use crate::engine::{GgufFile, JudgeModel, ModelInfo};

/// `assize model` subcommands.
#[derive(Debug, Subcommand)]
pub enum ModelCommand {
    /// Describe a GGUF model file: architecture, sizes, tokenizer, quantisation, hash
    Info(InfoArgs),
    /// Fetch a GGUF file from a model hub repository, or find it in the local hub cache
    ///
    /// Uses the usual hub cache layout (`models--OWNER--NAME/snapshots/REV/FILE`).
    /// The cache folder is `--cache-dir`, else `$HF_HUB_CACHE`, else `$HF_HOME/hub`,
    /// else the hub client's default folder in your home cache. With `--offline` or `HF_HUB_OFFLINE=1`
    /// nothing is downloaded and a file missing from the cache is an error.
    Fetch(FetchArgs),
    /// Show how the judge's tokenizer splits a text: ids and pieces
    Tokens(TokensArgs),
    /// Show the judge's most likely next tokens after a prompt, with probabilities
    Next(NextArgs),
    /// Measure load time, prompt and generation speed, and peak memory of a judge
    ///
    /// Uses a fixed pseudo-random token sequence, so runs are comparable across
    /// machines and versions. Compare results as ratios; nothing here is a test.
    Bench(BenchArgs),
}

/// Arguments of `assize model tokens`.
#[derive(Debug, Args)]
pub struct TokensArgs {
    /// Judge model (GGUF path or `default`, `small`, `gemma`)
    #[arg(value_name = "MODEL")]
    pub model: String,
    /// Text to tokenise, as plain text (control strings stay plain text)
    #[arg(value_name = "TEXT")]
    pub text: String,
    /// Parse control-token strings in the text (as template text is), instead of plain text
    #[arg(long)]
    pub trusted: bool,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Arguments of `assize model next`.
#[derive(Debug, Args)]
pub struct NextArgs {
    /// Judge model (GGUF path or `default`, `small`, `gemma`)
    #[arg(value_name = "MODEL")]
    pub model: String,
    /// The prompt
    #[arg(value_name = "PROMPT")]
    pub prompt: String,
    /// Wrap the prompt as a user turn in the model's chat template
    #[arg(long)]
    pub chat: bool,
    /// Assistant text placed after the chat template's generation prompt (with `--chat`)
    #[arg(long, value_name = "TEXT", default_value = "")]
    pub prefill: String,
    /// How many tokens to show
    #[arg(long, short = 'k', value_name = "K", default_value_t = 10)]
    pub top: usize,
    /// Kernel threads (0 = all cores); results are identical for the same count
    #[arg(long, value_name = "N", default_value_t = 0, value_parser = super::values::threads)]
    pub threads: usize,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Arguments of `assize model bench`.
#[derive(Debug, Args)]
pub struct BenchArgs {
    /// Judge model (GGUF path or `default`, `small`, `gemma`)
    #[arg(value_name = "MODEL")]
    pub model: String,
    /// Prompt length in tokens
    #[arg(long, value_name = "N", default_value_t = 256)]
    pub prompt_tokens: usize,
    /// Tokens to generate after the prompt
    #[arg(long, value_name = "N", default_value_t = 64)]
    pub gen_tokens: usize,
    /// Kernel threads (0 = all cores); results are identical for the same count
    #[arg(long, value_name = "N", default_value_t = 0, value_parser = super::values::threads)]
    pub threads: usize,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Arguments of `assize model info`.
#[derive(Debug, Args)]
pub struct InfoArgs {
    /// Judge model (GGUF path or `default`, `small`, `gemma`)
    #[arg(value_name = "MODEL")]
    pub model: String,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Arguments of `assize model fetch`.
#[derive(Debug, Args)]
pub struct FetchArgs {
    /// Hub repository, `OWNER/NAME`
    #[arg(value_name = "REPO")]
    pub repo: String,
    /// File inside the repository, e.g. `model-q4_k_m.gguf`
    #[arg(value_name = "FILE")]
    pub file: String,
    /// Branch, tag or commit
    #[arg(long, value_name = "REV", default_value = "main")]
    pub revision: String,
    /// Hub cache folder (default: `$HF_HUB_CACHE`, `$HF_HOME/hub`, then the hub client's default)
    #[arg(long, value_name = "DIR")]
    pub cache_dir: Option<PathBuf>,
    /// Never download; only look in the cache (also set by `HF_HUB_OFFLINE=1`)
    #[arg(long)]
    pub offline: bool,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Run one `assize model` subcommand.
pub fn run(cmd: ModelCommand) -> anyhow::Result<ExitCode> {
    match cmd {
        ModelCommand::Info(args) => info(&args),
        ModelCommand::Fetch(args) => fetch(&args),
        ModelCommand::Tokens(args) => tokens(&args),
        ModelCommand::Next(args) => next(&args),
        ModelCommand::Bench(args) => bench(&args),
    }
}

fn info(args: &InfoArgs) -> anyhow::Result<ExitCode> {
    let gguf = GgufFile::open(&resolve_model(&args.model)?)?;
    let info = ModelInfo::from_file(&gguf)?;
    if args.output.json {
        print_json(&info)?;
    } else {
        print!("{}", info_text(&info));
    }
    Ok(ExitCode::SUCCESS)
}

fn opt<T: std::fmt::Display>(v: &Option<T>) -> String {
    v.as_ref()
        .map_or_else(|| "-".to_string(), |v| v.to_string())
}

fn info_text(i: &ModelInfo) -> String {
    let mut s = String::new();
    let mut line = |k: &str, v: String| s.push_str(&format!("{k:<16}{v}\n"));
    line("file", i.path.clone());
    line("name", opt(&i.name));
    line(
        "architecture",
        format!(
            "{}{}",
            i.architecture,
            if i.supported {
                ""
            } else {
                " (not supported by assize)"
            }
        ),
    );
    if let Some(l) = &i.layout {
        line("block layout", l.clone());
    }
    line(
        "parameters",
        format!("{} ({:.2} B)", i.parameters, i.parameters as f64 / 1e9),
    );
    line("layers", opt(&i.layers));
    line("hidden size", opt(&i.hidden_size));
    line("feed-forward", opt(&i.feed_forward));
    line("heads", opt(&i.heads));
    line("kv heads", opt(&i.kv_heads));
    line("context", opt(&i.context_length));
    line("vocabulary", opt(&i.vocab_size));
    line(
        "tokenizer",
        format!(
            "{}{}",
            opt(&i.tokenizer),
            i.tokenizer_pre
                .as_ref()
                .map(|p| format!(" (pre: {p})"))
                .unwrap_or_default()
        ),
    );
    line(
        "chat template",
        if i.chat_template {
            "yes"
        } else {
            "no (plain fallback format)"
        }
        .into(),
    );
    let types: Vec<String> = i
        .tensor_types
        .iter()
        .map(|(k, v)| format!("{k} {v}"))
        .collect();
    line(
        "tensors",
        format!("{} ({})", i.tensor_count, types.join(", ")),
    );
    line(
        "file size",
        format!(
            "{} bytes ({:.1} MiB)",
            i.file_size,
            i.file_size as f64 / 1048576.0
        ),
    );
    line("sha256", i.sha256.clone());
    s
}

/// Result of `assize model fetch`.
#[derive(Debug, serde::Serialize)]
pub struct FetchResult {
    /// Repository the file belongs to.
    pub repo: String,
    /// File name inside the repository.
    pub file: String,
    /// Revision asked for.
    pub revision: String,
    /// Local path of the file in the cache.
    pub path: String,
    /// Whether the file came from the cache without any download.
    pub from_cache: bool,
}

/// The hub cache folder: flag, `HF_HUB_CACHE`, `HF_HOME/hub`, or the crate default.
pub fn hub_cache_dir(flag: Option<&Path>) -> hf_hub::Cache {
    if let Some(dir) = flag {
        return hf_hub::Cache::new(dir.to_path_buf());
    }
    if let Some(dir) = std::env::var_os("HF_HUB_CACHE") {
        return hf_hub::Cache::new(PathBuf::from(dir));
    }
    hf_hub::Cache::from_env()
}

fn offline_from_env() -> bool {
    std::env::var("HF_HUB_OFFLINE")
        .map(|v| matches!(v.trim(), "1" | "true" | "TRUE" | "yes" | "on"))
        .unwrap_or(false)
}

fn fetch(args: &FetchArgs) -> anyhow::Result<ExitCode> {
    if !args.repo.contains('/') {
        return Err(usage(
            format!("repository `{}` is not of the form `OWNER/NAME`", args.repo),
            "name the repository as `OWNER/NAME`",
        ));
    }
    let cache = hub_cache_dir(args.cache_dir.as_deref());
    let repo = hf_hub::Repo::with_revision(
        args.repo.clone(),
        hf_hub::RepoType::Model,
        args.revision.clone(),
    );
    let cached = cache.repo(repo.clone()).get(&args.file);
    let offline = args.offline || offline_from_env();
    let (path, from_cache) = match cached {
        Some(p) => (p, true),
        None if offline => {
            return Err(usage(
                format!(
                    "`{}` of `{}` (revision `{}`) is not in the hub cache `{}` and offline mode is on",
                    args.file,
                    args.repo,
                    args.revision,
                    cache.path().display()
                ),
                "fetch it once while online, point `--cache-dir` (or `HF_HUB_CACHE`) at the cache that holds it, or check the file name",
            ))
        }
        None => {
            let api = hf_hub::api::sync::ApiBuilder::from_cache(cache.clone())
                .with_progress(!args.output.quiet)
                .build()
                .context("cannot set up the hub client")?;
            let p = api.repo(repo).get(&args.file).with_context(|| {
                format!("cannot download `{}` from `{}`", args.file, args.repo)
            })?;
            (p, false)
        }
    };
    // A fetched file is only useful if it is a readable model.
    GgufFile::open(&path)?;
    let result = FetchResult {
        repo: args.repo.clone(),
        file: args.file.clone(),
        revision: args.revision.clone(),
        path: path.display().to_string(),
        from_cache,
    };
    if args.output.json {
        print_json(&result)?;
    } else {
        println!("{}", result.path);
    }
    Ok(ExitCode::SUCCESS)
}

/// One token of `assize model tokens`.
#[derive(Debug, serde::Serialize)]
pub struct TokenRow {
    /// Token id.
    pub id: u32,
    /// The piece as text.
    pub piece: String,
}

fn tokens(args: &TokensArgs) -> anyhow::Result<ExitCode> {
    let path = resolve_model(&args.model)?;
    let gguf = GgufFile::open(&path)?;
    let tok = JudgeTokenizer::from_gguf(&gguf)?;
    let ids = if args.trusted {
        tok.encode_trusted(&args.text)?
    } else {
        tok.encode_plain(&args.text)?
    };
    let rows: Vec<TokenRow> = ids
        .iter()
        .map(|&id| TokenRow {
            id,
            piece: tok.piece(id),
        })
        .collect();
    if args.output.json {
        print_json(&rows)?;
    } else {
        for r in &rows {
            println!("{:>8}  {:?}", r.id, r.piece);
        }
        eprintln!("{} tokens", rows.len());
    }
    Ok(ExitCode::SUCCESS)
}

/// One candidate of `assize model next`.
#[derive(Debug, serde::Serialize)]
pub struct NextRow {
    /// Token id.
    pub id: u32,
    /// The piece as text.
    pub piece: String,
    /// Probability of this token next.
    pub probability: f64,
}

fn next(args: &NextArgs) -> anyhow::Result<ExitCode> {
    let path = resolve_model(&args.model)?;
    let model = JudgeModel::load(
        &path,
        &LoadOptions {
            threads: args.threads,
            context_cap: None,
        },
    )?;
    let ids = if args.chat {
        model.encode_chat("", &args.prompt, &args.prefill)?
    } else {
        let mut v: Vec<u32> = Vec::new();
        if model.tokenizer.add_bos() {
            v.extend(model.tokenizer.bos());
        }
        v.extend(model.tokenizer.encode_plain(&args.prompt)?);
        v
    };
    let rows: Vec<NextRow> = model
        .top_next(&ids, args.top)?
        .into_iter()
        .map(|(id, piece, probability)| NextRow {
            id,
            piece,
            probability,
        })
        .collect();
    if args.output.json {
        print_json(&rows)?;
    } else {
        for r in &rows {
            println!("{:>8.4}  {:>8}  {:?}", r.probability, r.id, r.piece);
        }
    }
    Ok(ExitCode::SUCCESS)
}

fn bench(args: &BenchArgs) -> anyhow::Result<ExitCode> {
    let path = resolve_model(&args.model)?;
    let report =
        crate::engine::bench::run_bench(&path, args.prompt_tokens, args.gen_tokens, args.threads)?;
    if args.output.json {
        print_json(&report)?;
    } else {
        println!("model           {}", report.model);
        println!("sha256          {}", report.sha256);
        println!("architecture    {} ({})", report.arch, report.quantisation);
        println!("threads         {}", report.threads);
        println!("load            {:.2} s", report.load_seconds);
        println!(
            "prompt          {:.1} tokens/s ({} tokens)",
            report.prompt_tokens_per_second, report.prompt_tokens
        );
        println!(
            "generation      {:.1} tokens/s ({} tokens)",
            report.gen_tokens_per_second, report.gen_tokens
        );
        if let Some(b) = report.peak_rss_bytes {
            println!("peak memory     {:.0} MiB", b as f64 / 1048576.0);
        }
        if let Some(c) = &report.cpu {
            println!("cpu             {c}");
        }
    }
    Ok(ExitCode::SUCCESS)
}
