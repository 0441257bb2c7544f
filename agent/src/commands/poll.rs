//! `leaktally poll`: read the configured devices and print every sample.
//!
//! A commissioning and diagnosis tool: it runs the same acquisition as the
//! daemon, without the store or any leak tracking, and writes one JSON
//! document per tank per cycle to standard output ([`Line`], one per line,
//! each with its `format`). A summary of how many readings were good goes
//! to standard error at the end; when a device did not answer properly
//! for any reading, the command exits with code 3, as `check` does.

use crate::acquire;
use crate::acquire::sample::Quality;
use std::collections::BTreeMap;
use std::io::Write as _;
use std::path::Path;
use std::sync::Arc;
use std::time::Duration;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

/// `leaktally poll`'s options.
#[derive(Debug, clap::Args)]
pub struct PollArgs {
    #[command(flatten)]
    pub config: super::args::ConfigArg,
    /// Stop after this many seconds (default: until Ctrl-C).
    #[arg(long)]
    pub seconds: Option<f64>,
}

pub use crate::acquire::line::{FORMAT, Line};

/// Runs `leaktally poll` as the command line gave it, until the time is up
/// or the process is told to stop.
pub fn command(args: PollArgs) -> anyhow::Result<()> {
    super::args::runtime()?.block_on(run(
        &args.config.required_path()?,
        args.seconds,
        crate::shutdown::signalled(),
    ))
}

/// Polls until `seconds` have passed (forever if `None`) or `stop` resolves.
pub async fn run(
    path: &Path,
    seconds: Option<f64>,
    stop: impl Future<Output = ()>,
) -> anyhow::Result<()> {
    let config = Arc::new(crate::config::load(path)?);
    let cancel = CancellationToken::new();
    let tasks = TaskTracker::new();
    let mut samples = acquire::start(Arc::clone(&config), &cancel, &tasks);
    tasks.close();

    let deadline = async {
        match seconds {
            Some(s) => tokio::time::sleep(Duration::from_secs_f64(s.max(0.0))).await,
            None => std::future::pending().await,
        }
    };
    tokio::pin!(deadline, stop);
    let mut counts: BTreeMap<&'static str, u64> = BTreeMap::new();
    let mut stdout = std::io::stdout().lock();
    loop {
        tokio::select! {
            _ = &mut deadline => break,
            _ = &mut stop => break,
            batch = samples.recv() => {
                let Some(batch) = batch else { break };
                for sample in &batch {
                    let qualities = std::iter::once(sample.level.quality)
                        .chain(sample.pressure.map(|r| r.quality))
                        .chain(sample.transfer.map(|r| r.quality));
                    for q in qualities {
                        *counts.entry(q.name()).or_default() += 1;
                    }
                    serde_json::to_writer(&mut stdout, &Line::of(sample, &config))?;
                    writeln!(stdout)?;
                }
                stdout.flush()?;
            }
        }
    }
    cancel.cancel();
    tasks.wait().await;
    let total: u64 = counts.values().sum();
    let good = counts.get(Quality::Good.name()).copied().unwrap_or(0);
    let detail: Vec<String> = counts.iter().map(|(k, v)| format!("{k} {v}")).collect();
    eprintln!(
        "poll: {total} readings, {good} good ({})",
        detail.join(", ")
    );
    // As `check` does: a device that did not answer, or answered wrongly,
    // is exit code 3 (the config was valid); a reading flagged for its
    // value (out of range, stuck) is the sensor's, not the device's.
    let failed: u64 = [Quality::CommunicationLost, Quality::DeviceError]
        .iter()
        .map(|q| counts.get(q.name()).copied().unwrap_or(0))
        .sum();
    if failed > 0 {
        return Err(super::exit::Coded::said(
            super::exit::DEVICES_FAILED,
            &format!("{failed} reading(s) not answered properly by their device"),
        ));
    }
    Ok(())
}
