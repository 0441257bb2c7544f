//! `leaktally poll`: read the configured devices and print every sample.
//!
//! A commissioning and diagnosis tool: it runs the same acquisition as the
//! daemon, without the store or any leak tracking, and writes one JSON
//! document per tank per cycle to standard output ([`Line`], one per line,
//! each with its `format`). A summary of how many readings were good goes
//! to standard error at the end; when a device did not answer properly
//! for any reading, the command exits with code 3, as `check` does.

use crate::acquire;
use crate::acquire::sample::{Quality, Reading, TankSample};
use crate::config::Config;
use serde::Serialize;
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

/// The version of `poll`'s JSON lines; fields are only ever added within a
/// version. 2: `tank` (was `tank_id`), `at` RFC 3339 UTC, the unit (and for
/// a pressure its reference) in every reading's name.
pub const FORMAT: u32 = 2;

/// One tank's readings in one cycle, as `poll` prints them: each reading
/// `{"value": ..., "quality": ...}` under a name that carries its unit, the
/// value present only when the quality is `good`.
#[derive(Debug, Serialize)]
pub struct Line<'a> {
    pub format: u32,
    pub tank: &'a str,
    /// When the cycle's reads began, RFC 3339 UTC.
    pub at: String,
    /// The same, ms since 1970 UTC.
    pub at_ms: i64,
    /// Liquid level above the tank bottom, m.
    pub level_m: Reading,
    /// The pressure transmitter's reading, Pa, relative to ambient: under
    /// this name when the transmitter is configured gauge (`absolute =
    /// false`). At its tap: the headspace, or the liquid column above a
    /// submerged tap as well (`pressure_tap`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub pressure_pa_gauge: Option<Reading>,
    /// The same, under this name when the transmitter reads absolute
    /// pressure (above a vacuum).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub pressure_pa_absolute: Option<Reading>,
    /// `headspace` or `submerged`; absent without a transmitter.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub pressure_tap: Option<&'static str>,
    /// Net transfer flow into the tank, m³/s; absent when not mapped.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub transfer_m3_s: Option<Reading>,
    /// The liquid's temperature, K; absent when not mapped.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub temperature_k: Option<Reading>,
    /// The leak flag; absent when not mapped, `null` when unreadable.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub leak_flag: Option<Option<bool>>,
}

impl<'a> Line<'a> {
    /// The line for `sample`, named by its tank's transmitter in `config`.
    pub fn of(sample: &'a TankSample, config: &Config) -> Self {
        let sensor = config
            .tanks
            .get(sample.tank)
            .filter(|t| *t.id == *sample.tank_id)
            .or_else(|| config.tanks.iter().find(|t| *t.id == *sample.tank_id))
            .and_then(|t| t.pressure.as_ref());
        let absolute = sensor.is_some_and(|s| s.absolute);
        Line {
            format: FORMAT,
            tank: &sample.tank_id,
            at: crate::report::rfc3339(sample.at_ms),
            at_ms: sample.at_ms,
            level_m: sample.level,
            pressure_pa_gauge: sample.pressure.filter(|_| !absolute),
            pressure_pa_absolute: sample.pressure.filter(|_| absolute),
            pressure_tap: sample.pressure.and(sensor).map(|s| match s.tap {
                crate::model::PressureTap::Headspace => "headspace",
                crate::model::PressureTap::Submerged { .. } => "submerged",
            }),
            transfer_m3_s: sample.transfer,
            temperature_k: sample.temperature,
            leak_flag: sample.leak_flag,
        }
    }
}

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
