//! The `assize` binary: parse arguments, run the command, turn an error into a
//! message (what, where, fix) and an exit code (0 ok, 1 gate failed, 2 usage or
//! input error). Holds no logic of its own.

use std::process::ExitCode;

use clap::Parser;

fn main() -> ExitCode {
    let cli = assize::cli::Cli::parse();
    match assize::cli::run(cli) {
        Ok(code) => code,
        Err(err) => {
            eprint!("{}", assize::cli::render_error(&err));
            assize::cli::exit_code_for(&err)
        }
    }
}
