//! The command line: the top-level parser, composed of each command's
//! arguments (which live with the command, in `commands`), and dispatch.
//!
//! Left out: what any command does, and how its options are checked.

use crate::commands::args::{DEFAULT_DB, runtime};
use crate::commands::check::CheckArgs;
use crate::commands::demo::DemoArgs;
use crate::commands::leak::LeakCommand;
use crate::commands::poll::PollArgs;
use crate::commands::replay::ReplayArgs;
use crate::commands::status::StatusArgs;
use crate::commands::whatif::WhatifArgs;
use crate::commands::{check, demo, leak, poll, replay, status, whatif};
// Re-exported so that code outside the crate (the property tests in the root
// package, which has no clap dependency of its own) can bring the trait into
// scope and call `Cli::try_parse_from`.
pub use clap::Parser;
use clap::Subcommand;
use std::path::PathBuf;

/// Running released-quantity estimates for leaking tanks. Estimates for
/// emergency planning, not measurements.
#[derive(Debug, Parser)]
#[command(name = "leaktally", version, about, long_about = None)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the simulator and the agent on an invented site, flag a leak and
    /// show the running totals live (about a minute; Ctrl-C stops it).
    Demo(DemoArgs),
    /// Run a logged event (or a historian's readings) through the estimator
    /// again, with changed parameters if asked; export CSV, SVG or JSON.
    Replay(ReplayArgs),
    /// Pre-planning figures for a tank and hole sizes that have not happened:
    /// liquid below the surface, the headspace gas above it.
    Whatif(WhatifArgs),
    /// Validate a config file, show the tanks, registers and reads, and read
    /// each block of every device once (exit 2 if a device or read fails).
    Check(CheckArgs),
    /// Read the configured devices and print each sample as a JSON line.
    Poll(PollArgs),
    /// Run the agent: poll, track open leak events, log to the database.
    Run {
        /// The site config (TOML).
        #[arg(value_parser = crate::commands::args::path_arg, long, short)]
        config: PathBuf,
        /// The SQLite database the daemon writes.
        #[arg(value_parser = crate::commands::args::path_arg, long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
    /// Flag, revise, annotate or close a leak event (the daemon applies it).
    #[command(subcommand)]
    Leak(LeakCommand),
    /// Show the running totals of the open events (or of one event).
    Status(StatusArgs),
}

/// Runs one parsed command.
pub fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Demo(args) => demo::command(args),
        Command::Replay(args) => replay::command(args),
        Command::Whatif(args) => whatif::command(args),
        Command::Check(args) => check::command(args),
        Command::Poll(args) => poll::command(args),
        Command::Run { config, db } => {
            let config = crate::config::load(&config)?;
            runtime()?.block_on(crate::daemon::run(
                config,
                &db,
                crate::shutdown::signalled(),
            ))
        }
        Command::Leak(command) => leak::command(command),
        Command::Status(args) => status::command(args),
    }
}

#[cfg(test)]
mod tests {
    use super::Cli;
    use clap::Parser;

    /// Issue 11: every command refuses a path with a control character in
    /// it (commands::args::path_arg), so no echo of it can forge a line.
    #[test]
    fn every_path_option_refuses_control_characters() {
        for args in [
            &[
                "leaktally",
                "check",
                "--config",
                "/tmp/none\nOK: config valid",
            ][..],
            &["leaktally", "poll", "--config", "a\u{1b}[2Jb"][..],
            &["leaktally", "status", "--db", "a\nb.db"][..],
            &["leaktally", "run", "--config", "s.toml", "--db", "a\nb.db"][..],
            &["leaktally", "replay", "1", "--csv", "out\n.csv"][..],
            &["leaktally", "whatif", "--tank", "T", "--config", "a\nb"][..],
            &["leaktally", "leak", "note", "1", "text", "--db", "a\nb"][..],
        ] {
            let e = Cli::try_parse_from(args).unwrap_err().to_string();
            assert!(e.contains("control character"), "{args:?}: {e}");
        }
    }
}
