//! The `leaktally` binary: parse the command line, set up logging, run,
//! turn the outcome into an exit code. The work itself lives in the library.

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
        // A valid config whose devices did not all answer: a code of its
        // own, so that scripts can tell it from an invalid config.
        Err(err) if err.is::<leaktally::commands::check::DevicesFailed>() => {
            eprintln!(
                "warning: {}",
                leaktally::logging::lines(&format!("{err:#}"))
            );
            ExitCode::from(leaktally::commands::check::EXIT_DEVICES_FAILED)
        }
        Err(err) => {
            // Errors quote config text, device replies and file names; their
            // control characters are escaped, their line breaks kept.
            eprintln!("error: {}", leaktally::logging::lines(&format!("{err:#}")));
            ExitCode::FAILURE
        }
    }
}
