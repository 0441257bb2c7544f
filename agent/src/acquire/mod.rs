//! Acquisition: reading tank values from Modbus devices, over TCP or on
//! serial lines (RTU).
//!
//! * [`plan`]: coalescing a device's values into as few reads as possible.
//! * [`link`]: the read-only Modbus client with timeouts and reconnects.
//! * [`serial`]: serial lines, each shared by its devices one request at a
//!   time.
//! * [`poller`]: one task per device, producing flagged samples.
//! * [`plausible`]: how fast a tank's level can move, for the step check.
//! * [`notices`]: what the pollers log, once per change of state.
//! * [`sample`]: what acquisition hands on.
//! * [`stats`]: poll counters and latest readings, for the metrics page.
//!
//! Architecture invariant: only this module knows register addresses and
//! talks Modbus, and it only ever reads (see [`link`]).

pub mod line;
pub mod link;
pub mod notices;
pub mod plan;
pub mod plausible;
pub mod poller;
pub mod sample;
pub mod serial;
pub mod stats;

use crate::clock::Clock;
use crate::config::Config;
use sample::TankSample;
use stats::Stats;
use std::sync::Arc;
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

/// Batches the channel holds before pollers wait: a few cycles of every
/// device, enough to ride out a slow database commit.
pub const CHANNEL_BATCHES: usize = 64;

/// Starts one poller task per device on `tasks` and returns the stream of
/// sample batches. The stream ends once every poller has stopped (cancel
/// `cancel` to stop them).
pub fn start(
    config: Arc<Config>,
    cancel: &CancellationToken,
    tasks: &TaskTracker,
) -> mpsc::Receiver<Vec<TankSample>> {
    let stats = Arc::new(Stats::new(&config));
    let clock = Arc::new(Clock::system());
    start_with_stats(config, stats, clock, CHANNEL_BATCHES, cancel, tasks)
}

/// Like [`start`], with the pollers counting into `stats` (made by
/// [`Stats::new`] from the same config), which the daemon shares with its
/// metrics page, timing their samples by `clock`, on a channel of `slots`
/// batches.
pub fn start_with_stats(
    config: Arc<Config>,
    stats: Arc<Stats>,
    clock: Arc<Clock>,
    slots: usize,
    cancel: &CancellationToken,
    tasks: &TaskTracker,
) -> mpsc::Receiver<Vec<TankSample>> {
    let (tx, rx) = mpsc::channel(slots.max(1));
    // One bus per serial port, shared by the pollers of its devices.
    let buses = serial::Buses::for_config(&config);
    for device in 0..config.devices.len() {
        if config.tanks.iter().any(|t| t.device == device) {
            tasks.spawn(poller::poll_device(
                Arc::clone(&config),
                device,
                buses.clone(),
                tx.clone(),
                Arc::clone(&stats),
                Arc::clone(&clock),
                cancel.clone(),
            ));
        }
    }
    rx
}
