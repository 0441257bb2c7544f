//! The command line: subcommands and their options, and dispatch to the
//! library. Parsing is clap's; each subcommand's work lives in its module.

use clap::{Parser, Subcommand};

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
    /// Show what leaktally computes, on an invented demo tank.
    Demo,
}

/// Runs one parsed command.
pub fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Demo => {
            print!("{}", crate::demo::run()?);
            Ok(())
        }
    }
}
