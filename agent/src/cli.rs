//! The command line: the top-level parser, composed of each command's
//! arguments (which live with the command, in `commands`), and dispatch.
//!
//! Left out: what any command does, and how its options are checked.

use crate::commands::args::{SiteArgs, runtime};
use crate::commands::check::CheckArgs;
use crate::commands::demo::DemoArgs;
use crate::commands::docs::{CompletionsArgs, ManualArgs};
use crate::commands::events::EventsArgs;
use crate::commands::fleet::FleetArgs;
use crate::commands::leak::LeakCommand;
use crate::commands::poll::PollArgs;
use crate::commands::replay::ReplayArgs;
use crate::commands::status::StatusArgs;
use crate::commands::whatif::WhatifArgs;
use crate::commands::{check, demo, docs, events, fleet, leak, poll, replay, status, whatif};
// Re-exported so that code outside the crate (the property tests in the root
// package, which has no clap dependency of its own) can bring the trait into
// scope and call `Cli::try_parse_from`.
pub use clap::Parser;
use clap::{CommandFactory, Subcommand};

/// Running released-quantity estimates for leaking tanks. Estimates for
/// emergency planning, not measurements.
#[derive(Debug, Parser)]
#[command(
    name = "leaktally",
    version,
    about,
    long_about = None,
    // Our own `help` command, which takes --help itself (clap's does not).
    disable_help_subcommand = true,
    after_help = "Exit codes: 0 done; 1 failed; 2 the command line is wrong; 3 a device did not answer (check, poll); 4 no daemon is running (status, events, leak); 5 a request is recorded but not yet acknowledged (leak). Environment: LEAKTALLY_CONFIG, LEAKTALLY_DB, NO_COLOR, RUST_LOG."
)]
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
    /// each block of every device once (exit 3 if a device or read fails).
    Check(CheckArgs),
    /// Read the configured devices and print each sample as a JSON line.
    Poll(PollArgs),
    /// Run the agent: poll, track open leak events, log to the database.
    Run(SiteArgs),
    /// Flag, revise, annotate or close a leak event (the daemon applies it).
    #[command(subcommand)]
    Leak(LeakCommand),
    /// Show the running totals of the open events, or one event's (open
    /// or closed) in full.
    Status(StatusArgs),
    /// List the events, open and closed, with their final or latest totals.
    Events(EventsArgs),
    /// A read-only central view of every site that publishes to an MQTT
    /// broker: a page, /api/fleet and /metrics.
    Fleet(FleetArgs),
    /// Print the shell completion script (bash, zsh, fish, elvish,
    /// powershell).
    Completions(CompletionsArgs),
    /// Print the man page, or write one per command with --dir.
    Manual(ManualArgs),
    /// Print the help of leaktally, or of one of its commands
    /// (`leaktally help leak open`).
    Help(HelpArgs),
}

/// `leaktally help`'s options.
#[derive(Debug, clap::Args)]
pub struct HelpArgs {
    /// The command (and subcommand) to explain.
    #[arg(value_name = "COMMAND")]
    pub command: Vec<String>,
}

/// Prints the long help of the command `path` names.
fn help(path: &[String]) -> anyhow::Result<()> {
    let mut command = Cli::command();
    command.build();
    for name in path {
        let names: Vec<String> = command
            .get_subcommands()
            .map(|c| c.get_name().to_owned())
            .collect();
        let Some(sub) = command.find_subcommand(name).cloned() else {
            anyhow::bail!(
                "there is no command \"{}\" here; the commands are: {}",
                crate::logging::one_line(name),
                names.join(", ")
            );
        };
        command = sub;
    }
    print!("{}", command.render_long_help());
    Ok(())
}

/// Runs one parsed command.
pub fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Demo(args) => demo::command(args),
        Command::Replay(args) => replay::command(args),
        Command::Whatif(args) => whatif::command(args),
        Command::Check(args) => check::command(args),
        Command::Poll(args) => poll::command(args),
        Command::Run(site) => {
            let (config, db) = site.config_and_database()?;
            runtime()?.block_on(crate::daemon::run(
                config,
                &db,
                crate::shutdown::signalled(),
            ))
        }
        Command::Leak(command) => leak::command(command),
        Command::Status(args) => status::command(args),
        Command::Events(args) => events::command(args),
        Command::Fleet(args) => fleet::command(args),
        Command::Completions(args) => docs::completions(args, Cli::command()),
        Command::Manual(args) => docs::manual(args, Cli::command()),
        Command::Help(args) => help(&args.command),
    }
}

#[cfg(test)]
mod tests {
    use super::Cli;
    use clap::{CommandFactory, Parser};

    /// Issue 16: every command and every option says what it is for in
    /// --help (and so in the man pages and completions made from it).
    #[test]
    fn every_command_and_option_has_help_text() {
        fn walk(command: &clap::Command, path: &str, missing: &mut Vec<String>) {
            let path = format!("{path} {}", command.get_name());
            if command.get_about().is_none() {
                missing.push(format!("{path}: no about"));
            }
            for arg in command.get_arguments() {
                let id = arg.get_id().as_str();
                if id != "help" && id != "version" && arg.get_help().is_none() {
                    missing.push(format!("{path}: {id}"));
                }
            }
            for sub in command.get_subcommands() {
                walk(sub, &path, missing);
            }
        }
        let mut command = Cli::command();
        command.build();
        let mut missing = Vec::new();
        walk(&command, "", &mut missing);
        assert!(missing.is_empty(), "no help text: {missing:#?}");
    }

    /// `leaktally help --help` is help, not a usage error.
    #[test]
    fn help_takes_help() {
        let e = Cli::try_parse_from(["leaktally", "help", "--help"]).unwrap_err();
        assert_eq!(e.kind(), clap::error::ErrorKind::DisplayHelp);
        assert_eq!(e.exit_code(), 0);
        assert!(Cli::try_parse_from(["leaktally", "help", "leak", "open"]).is_ok());
    }

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
