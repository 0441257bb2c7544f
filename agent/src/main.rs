//! The `leaktally` binary: parse the command line, set up logging, run,
//! turn the outcome into an exit code. The work itself lives in the library.

use leaktally::commands::exit;
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = <leaktally::cli::Cli as clap::Parser>::parse();
    // A report piped into `head` ends quietly when the reader stops, as
    // other Unix tools do, instead of failing on a broken pipe. Not for the
    // daemon (and the demo, which runs one): a peer that closes a socket
    // must never stop it.
    if !matches!(
        cli.command,
        leaktally::cli::Command::Run(_)
            | leaktally::cli::Command::Demo(_)
            | leaktally::cli::Command::Fleet(_)
    ) {
        // SAFETY: setting a signal's disposition to the default, before
        // any thread is started.
        unsafe {
            libc::signal(libc::SIGPIPE, libc::SIG_DFL);
        }
    }
    // The demo keeps the screen for its narration and logs to a file of its
    // own.
    if !matches!(cli.command, leaktally::cli::Command::Demo(_)) {
        leaktally::logging::to_stderr();
    }
    match leaktally::cli::run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        // Outcomes with codes of their own (README, "Exit codes"), so that
        // scripts can tell them from a plain failure.
        // Nothing was done for a request with no daemon: an error, with
        // its own code.
        Err(err)
            if exit::code_of(&err) == exit::NO_DAEMON
                && err.is::<leaktally::actions::NoDaemon>() =>
        {
            eprintln!("error: {}", leaktally::logging::lines(&format!("{err:#}")));
            ExitCode::from(exit::NO_DAEMON)
        }
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
