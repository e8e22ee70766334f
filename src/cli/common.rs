//! Helpers shared by the subcommands: model resolution and loading, progress bars,
//! file hashes, run-folder naming. Never computes results.

use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::Context as _;
use clap::Args;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use sha2::{Digest, Sha256};

use super::errors::usage;
use super::models_dirs;
use crate::engine::decoder::LoadOptions;
use crate::engine::JudgeModel;
use crate::rubric::{load_rubric, parse_rubric, Criterion, Rubric};
use crate::store::read_manifest;

/// File name of the default judge inside the models folder.
pub const DEFAULT_JUDGE: &str = "qwen2.5-coder-1.5b-instruct-q4_k_m.gguf";

/// Short names for the bundled judges.
pub const ALIASES: &[(&str, &str)] = &[
    ("default", DEFAULT_JUDGE),
    ("small", "qwen2.5-coder-0.5b-instruct-q5_0.gguf"),
    ("gemma", "gemma-3-270m-q4_k_m.gguf"),
];

/// The `--rubric` option, shared by every command that needs a rubric.
#[derive(Debug, Clone, Args)]
pub struct RubricArg {
    /// Rubric: a bundled one by name (`support`, `quick`) or a TOML file (default: the run's own when reading a run, else `support`)
    #[arg(long = "rubric", short = 'r', value_name = "RUBRIC")]
    pub path: Option<PathBuf>,
}

/// The rubric used when none is named and no run records one.
pub const DEFAULT_RUBRIC: &str = "support";

impl RubricArg {
    /// What `--rubric` names, or the default rubric.
    pub fn named(&self) -> PathBuf {
        self.path
            .clone()
            .unwrap_or_else(|| PathBuf::from(DEFAULT_RUBRIC))
    }

    /// For a command that starts a run: the named rubric, else `support`.
    pub fn load(&self) -> anyhow::Result<Rubric> {
        Ok(load_rubric(&self.named())?)
    }

    /// Criterion `key` of `rubric` (loaded from this option), or a usage error that
    /// names the rubric and lists its criteria.
    pub fn criterion<'r>(&self, rubric: &'r Rubric, key: &str) -> anyhow::Result<&'r Criterion> {
        rubric.criterion(key).ok_or_else(|| {
            let keys: Vec<&str> = rubric.criteria.iter().map(|c| c.key.as_str()).collect();
            super::errors::usage(
                format!("rubric `{}` has no criterion `{key}`", self.named().display()),
                format!("use one of: {}", keys.join(", ")),
            )
        })
    }

    /// For a command that reads a run folder: the rubric text recorded in its
    /// manifest, unless `--rubric` names one; a named rubric whose criteria differ
    /// from the run's is refused, since the grades would be read on the wrong scales.
    pub fn load_for_run(&self, run: &Path) -> anyhow::Result<Rubric> {
        let recorded = read_manifest(run)
            .ok()
            .flatten()
            .and_then(|m| m.rubric_toml.map(|t| (m.inputs.get("rubric").cloned(), t)));
        let Some(path) = &self.path else {
            return match recorded {
                Some((name, text)) => {
                    let shown = PathBuf::from(name.unwrap_or_else(|| "(recorded rubric)".into()));
                    parse_rubric(&shown, &text).map_err(|e| {
                        anyhow::Error::new(e).context(usage(
                            format!("the rubric recorded in `{}` cannot be read", run.display()),
                            "name the rubric the run was graded with (`--rubric`)",
                        ))
                    })
                }
                None => {
                    eprintln!(
                        "warning: run `{}` does not record its rubric; reading it with the bundled `{DEFAULT_RUBRIC}` rubric\n  fix: name the rubric it was graded with (`--rubric NAME_OR_FILE`)",
                        run.display()
                    );
                    Ok(load_rubric(Path::new(DEFAULT_RUBRIC))?)
                }
            };
        };
        let named = load_rubric(path)?;
        if let Some((_, text)) = recorded {
            let theirs = parse_rubric(path, &text).ok();
            let same_scales = theirs.is_some_and(|t| {
                t.criteria
                    .iter()
                    .all(|c| named.criterion(&c.key).is_none_or(|n| n.scale == c.scale))
            });
            if !same_scales {
                return Err(usage(
                    format!(
                        "rubric `{}` gives a criterion of run `{}` another scale than the rubric it was graded with",
                        path.display(),
                        run.display()
                    ),
                    "leave out `--rubric` to use the run's own rubric",
                ));
            }
        }
        Ok(named)
    }
}

/// The single criterion a command takes from `--criteria`, if any; several are a
/// usage error naming the command.
pub fn one_criterion<'a>(keys: &'a [String], command: &str) -> anyhow::Result<Option<&'a String>> {
    match keys {
        [] => Ok(None),
        [k] => Ok(Some(k)),
        _ => Err(usage(
            format!("`{command}` takes one criterion, got {}", keys.join(", ")),
            format!("run `{command}` once per criterion"),
        )),
    }
}

/// Options that choose and load the judge model.
#[derive(Debug, Clone, Args)]
pub struct ModelArgs {
    /// Judge model: a GGUF path, or `default`, `small`, `gemma` for the fetched judges
    #[arg(long, short = 'm', value_name = "MODEL", default_value = "default")]
    pub model: String,
    /// Kernel threads (0 = all cores); results are identical for the same count
    #[arg(long, value_name = "N", default_value_t = 0, value_parser = super::values::threads)]
    pub threads: usize,
    /// Cap on prompt length in tokens, below the model's trained context
    #[arg(long = "max-context", value_name = "TOKENS")]
    pub context: Option<usize>,
}

/// Resolve `--model` to a file path: a short judge name (`default`, `small`,
/// `gemma`) looked up in the models folders, else an existing file, else a file name
/// inside the models folders.
pub fn resolve_model(name: &str) -> anyhow::Result<PathBuf> {
    let dirs = models_dirs();
    let alias = ALIASES.iter().find(|(a, _)| *a == name);
    let as_path = PathBuf::from(name);
    if alias.is_none() && as_path.is_file() {
        return Ok(as_path);
    }
    let file = alias.map_or(name, |(_, f)| *f);
    if let Some(p) = dirs.iter().map(|d| d.join(file)).find(|p| p.is_file()) {
        return Ok(p);
    }
    let looked = dirs
        .iter()
        .map(|d| format!("`{}`", d.display()))
        .collect::<Vec<_>>()
        .join(", ");
    Err(match alias {
        Some((alias, _)) => usage(
            format!("judge `{alias}` is not fetched yet (looked for `{file}` in {looked})"),
            format!("run `scripts/fetch-models --model {alias}` in the source checkout, or set `ASSIZE_MODELS_DIR` to the folder that holds it"),
        ),
        None => usage(
            format!("model `{name}` is neither a file nor a known judge name (also looked in {looked})"),
            "pass a GGUF path, or one of `default`, `small`, `gemma` (fetch them with `scripts/fetch-models --model NAME`)",
        ),
    })
}

/// Load the judge named by the arguments, telling stderr what happens.
pub fn load_judge(args: &ModelArgs, quiet: bool) -> anyhow::Result<JudgeModel> {
    let path = resolve_model(&args.model)?;
    if !quiet {
        eprintln!("loading judge `{}`", path.display());
    }
    let start = std::time::Instant::now();
    let opts = LoadOptions {
        threads: args.threads,
        context_cap: args.context,
    };
    let model = JudgeModel::load(&path, &opts)
        .with_context(|| format!("cannot load judge `{}`", path.display()))?;
    if !quiet {
        eprintln!(
            "loaded {} judge in {:.1} s",
            model.arch,
            start.elapsed().as_secs_f64()
        );
    }
    Ok(model)
}

/// A progress bar on stderr, hidden when stderr is not a terminal or with `--quiet`.
pub fn progress(len: u64, what: &str, quiet: bool) -> ProgressBar {
    let bar = ProgressBar::new(len);
    if quiet || !std::io::stderr().is_terminal() {
        bar.set_draw_target(ProgressDrawTarget::hidden());
    }
    let style =
        ProgressStyle::with_template("{msg} {bar:30} {pos}/{len} items, {per_sec}, eta {eta}")
            .expect("static progress template");
    bar.set_style(if std::env::var_os("NO_COLOR").is_some() {
        style
    } else {
        style.progress_chars("=> ")
    });
    bar.set_message(what.to_string());
    bar.enable_steady_tick(Duration::from_millis(500));
    bar
}

/// SHA-256 of a file's bytes, lowercase hex.
pub fn file_sha256(path: &Path) -> anyhow::Result<String> {
    let bytes = std::fs::read(path).with_context(|| format!("cannot read `{}`", path.display()))?;
    Ok(format!("{:x}", Sha256::digest(&bytes)))
}

/// The version a run folder records and must match on resume: the release and the
/// engine's arithmetic revision (`engine::NUMERICS`).
pub fn run_version() -> String {
    format!(
        "{}+numerics.{}",
        env!("CARGO_PKG_VERSION"),
        crate::engine::NUMERICS
    )
}

/// A run folder name derived from what the run depends on, so the same command
/// resumes and any change of model, rubric, data or options starts a fresh run.
pub fn default_run_dir(kind: &str, manifest_json: &str) -> PathBuf {
    let h = format!("{:x}", Sha256::digest(manifest_json.as_bytes()));
    PathBuf::from("runs").join(format!("{kind}-{}", &h[..12]))
}
