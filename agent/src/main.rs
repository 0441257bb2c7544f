//! The `leaktally` binary: parse the command line, run, turn the outcome
//! into an exit code. The work itself lives in the library.

use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = <leaktally::cli::Cli as clap::Parser>::parse();
    match leaktally::cli::run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(err) => {
            eprintln!("error: {err:#}");
            ExitCode::FAILURE
        }
    }
}
