//! The `leaktally` binary: parse the command line, set up logging, run,
//! turn the outcome into an exit code. The work itself lives in the library.

use std::io::IsTerminal;
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = <leaktally::cli::Cli as clap::Parser>::parse();
    // Logs go to standard error, so that standard output stays clean for
    // reports and JSON. RUST_LOG adjusts the level (default: info). The demo
    // keeps the screen for its narration and logs to a file of its own.
    if !matches!(cli.command, leaktally::cli::Command::Demo { .. }) {
        init_logging();
    }
    match leaktally::cli::run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(err) => {
            eprintln!("error: {err:#}");
            ExitCode::FAILURE
        }
    }
}

fn init_logging() {
    tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_ansi(std::io::stderr().is_terminal())
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env()
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .init();
}
