//! The command line: subcommands and their options, and dispatch to the
//! library. Parsing is clap's; each subcommand's work lives in `commands`.

use crate::commands;
use clap::{Parser, Subcommand};
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
    /// Show what leaktally computes, on an invented demo tank.
    Demo,
    /// Validate a config file and show the tanks, registers and reads.
    Check {
        /// The site config (TOML).
        #[arg(long, short)]
        config: PathBuf,
        /// Do not try to connect to the devices.
        #[arg(long)]
        offline: bool,
    },
    /// Read the configured devices and print each sample as a JSON line.
    Poll {
        /// The site config (TOML).
        #[arg(long, short)]
        config: PathBuf,
        /// Stop after this many seconds (default: until Ctrl-C).
        #[arg(long)]
        seconds: Option<f64>,
    },
}

/// Runs one parsed command.
pub fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Demo => {
            print!("{}", commands::demo::run()?);
            Ok(())
        }
        Command::Check { config, offline } => {
            let text = runtime()?.block_on(commands::check::run(&config, offline))?;
            print!("{text}");
            Ok(())
        }
        Command::Poll { config, seconds } => runtime()?.block_on(commands::poll::run(
            &config,
            seconds,
            crate::shutdown::signalled(),
        )),
    }
}

fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    Ok(tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()?)
}
