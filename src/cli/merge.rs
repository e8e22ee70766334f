//! `assize merge`: join the shard folders of one run (each written with
//! `--shard K/N`) into a single run folder that `vet`, `estimate` and `report` read
//! like any other. Arguments and printing only; the checks live in `jobs::merge`.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;

use super::{print_json, OutputArgs};
use crate::jobs::merge::merge;

/// Arguments of `assize merge`.
#[derive(Debug, Clone, Args)]
pub struct MergeArgs {
    /// Shard folders of one run, each written with `--shard K/N` (all N of them)
    #[arg(required = true, value_name = "DIR")]
    pub shards: Vec<PathBuf>,
    /// The new run folder to write (must not hold a run yet)
    #[arg(long, value_name = "DIR")]
    pub into: PathBuf,
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Run `assize merge`.
pub fn run(args: MergeArgs) -> anyhow::Result<ExitCode> {
    let kinds = [
        (super::grade::GRADES_FILE, super::grade::KIND),
        (super::compare::PAIRS_FILE, super::compare::KIND),
    ];
    let report = merge(&args.into, &args.shards, &kinds)?;
    if args.output.json {
        print_json(&report)?;
    } else {
        let files: Vec<String> = report
            .records
            .iter()
            .map(|(f, n)| format!("{n} records in `{f}`"))
            .collect();
        println!(
            "merged {} shards into `{}`: {}",
            report.shards,
            report.run_dir,
            files.join(", ")
        );
    }
    Ok(ExitCode::SUCCESS)
}
