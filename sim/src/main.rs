//! The `leaktally-sim` binary: parse the command line, set up logging to
//! stderr, turn SIGINT and SIGTERM into a graceful stop, and hand over to
//! the library. Nothing else lives here, so tests drive the library
//! in-process instead.

use clap::Parser;
use std::path::PathBuf;
use std::process::ExitCode;
use tokio_util::sync::CancellationToken;

/// A Modbus TCP (or RTU) tank simulator with true draining physics, for leaktally's
/// demo and tests. All data it serves is invented.
#[derive(Debug, Parser)]
#[command(name = "leaktally-sim", version)]
struct Cli {
    /// The scenario file (TOML); its `site` key names the agent config to serve.
    #[arg(long, value_name = "FILE")]
    scenario: PathBuf,
    /// Address to listen on, e.g. 127.0.0.1:0 for any free port [default: the
    /// first device's address in the site config].
    #[arg(long, value_name = "ADDR")]
    listen: Option<String>,
    /// Serve Modbus RTU on this serial port instead of TCP (a real port, or
    /// one end of a pty pair), at the site config's serial settings.
    #[arg(long, value_name = "PATH", conflicts_with = "listen")]
    serial: Option<PathBuf>,
    /// Write the ground truth (CSV, a row per tank every 100 ms) to this file.
    #[arg(long, value_name = "FILE")]
    truth: Option<PathBuf>,
}

#[tokio::main]
async fn main() -> ExitCode {
    let cli = Cli::parse();
    leaktally::logging::to_stderr();
    let shutdown = CancellationToken::new();
    if let Err(e) = stop_on_signals(shutdown.clone()) {
        eprintln!("leaktally-sim: cannot watch for signals: {e}");
        return ExitCode::FAILURE;
    }
    let options = leaktally_sim::Options {
        scenario: cli.scenario,
        listen: cli.listen,
        serial: cli.serial,
        truth: cli.truth,
    };
    match leaktally_sim::launch(options, shutdown).await {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("leaktally-sim: {e:#}");
            ExitCode::FAILURE
        }
    }
}

/// Cancels `token` on the first SIGINT or SIGTERM.
fn stop_on_signals(token: CancellationToken) -> std::io::Result<()> {
    use tokio::signal::unix::{SignalKind, signal};
    let mut interrupt = signal(SignalKind::interrupt())?;
    let mut terminate = signal(SignalKind::terminate())?;
    tokio::spawn(async move {
        tokio::select! {
            _ = interrupt.recv() => {}
            _ = terminate.recv() => {}
        }
        tracing::info!("stopping on a signal");
        token.cancel();
    });
    Ok(())
}
