//! The `leaktally` binary: parse the command line, set up logging, run,
//! turn the outcome into an exit code. The work itself lives in the library.

use leaktally::commands::exit;
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = <leaktally::cli::Cli as clap::Parser>::parse();
    // The demo keeps the screen for its narration and logs to a file of its
    // own.
    if !matches!(cli.command, leaktally::cli::Command::Demo(_)) {
        leaktally::logging::to_stderr();
    }
    match leaktally::cli::run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        // Outcomes with codes of their own (README, "Exit codes"), so that
        // scripts can tell them from a plain failure.
        Err(err) if exit::code_of(&err) != exit::FAILED => {
            eprintln!(
                "warning: {}",
                leaktally::logging::lines(&format!("{err:#}"))
            );
            ExitCode::from(exit::code_of(&err))
        }
        Err(err) => {
            // Errors quote config text, device replies and file names; their
            // control characters are escaped, their line breaks kept.
            eprintln!("error: {}", leaktally::logging::lines(&format!("{err:#}")));
            ExitCode::FAILURE
        }
    }
}
