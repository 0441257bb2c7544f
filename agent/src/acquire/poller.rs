//! One task per device: poll on a fixed interval, decode, flag, send on.
//!
//! Each cycle makes the planned reads, turns the registers into SI readings
//! with a quality flag each, and sends one [`TankSample`] per tank of the
//! device down a bounded channel. A failed cycle still produces samples, all
//! flagged, so that the gap is on record. When the link is down the task
//! reconnects with exponential backoff and jitter, capped low enough that a
//! device that comes back is read again within a few seconds.
//!
//! Left out: what the samples are for. This module never looks at a leak.

use crate::acquire::link::{Link, LinkError, Words};
use crate::acquire::plan::{Read, plan_reads};
use crate::acquire::sample::{Quality, Reading, TankSample};
use crate::acquire::stats::{Outcome, Stats};
use crate::config::{Config, Role, Sensor};
use std::collections::HashMap;
use std::hash::{BuildHasher, Hasher};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::sync::mpsc;
use tokio::time::MissedTickBehavior;
use tokio_util::sync::CancellationToken;
use tracing::{debug, info, warn};

/// Reconnect delays: the first retry after this, doubling per failure...
const BACKOFF_START: Duration = Duration::from_millis(250);
/// ...up to this. Low, because DESIGN.md wants readings back within seconds
/// of a device's return, and a refused connect costs a device nothing.
const BACKOFF_CAP: Duration = Duration::from_secs(3);

/// The result of one poll cycle for one value.
#[derive(Debug, Clone, PartialEq)]
enum Raw {
    Registers(Vec<u16>),
    Bit(bool),
    Failed(Quality),
}

/// Polls one device until cancelled or until nobody listens any more.
///
/// Samples go to `out`, one batch per cycle. The channel is bounded: if the
/// consumer falls behind, this task waits, and its next ticks are delayed
/// rather than queued (`MissedTickBehavior::Delay`), so memory stays flat
/// and the timestamps stay true.
///
/// Every cycle is counted in `stats` (successes, failures, duration, the
/// latest good readings) before its batch is sent.
pub async fn poll_device(
    config: Arc<Config>,
    device: usize,
    out: mpsc::Sender<Vec<TankSample>>,
    stats: Arc<Stats>,
    cancel: CancellationToken,
) {
    let mut poller = DevicePoller::new(config, device);
    let mut tick = tokio::time::interval(poller.interval());
    tick.set_missed_tick_behavior(MissedTickBehavior::Delay);
    loop {
        tokio::select! {
            _ = cancel.cancelled() => break,
            _ = tick.tick() => {}
        }
        // Reads are idempotent, so abandoning a cycle half-way on shutdown
        // loses nothing.
        let began = Instant::now();
        let (batch, outcome) = tokio::select! {
            _ = cancel.cancelled() => break,
            cycle = poller.cycle() => cycle,
        };
        let at_ms = batch
            .first()
            .map_or_else(|| jiff::Timestamp::now().as_millisecond(), |s| s.at_ms);
        stats.record_cycle(device, outcome, began.elapsed(), at_ms);
        stats.record_samples(&batch);
        if out.send(batch).await.is_err() {
            break;
        }
    }
    debug!(device = %poller.device_id(), "poller stopped");
}

/// Tracks when a sensor's raw value last changed.
#[derive(Debug, Clone)]
struct LastChange {
    words: Vec<u16>,
    since: Instant,
}

struct DevicePoller {
    config: Arc<Config>,
    device: usize,
    plan: Vec<Read>,
    bridging: bool,
    link: Link,
    failures: u32,
    next_attempt: Instant,
    last_change: HashMap<(usize, Role), LastChange>,
}

impl DevicePoller {
    fn new(config: Arc<Config>, device: usize) -> Self {
        let d = &config.devices[device];
        let link = Link::new(&d.address, d.unit_id, d.request_timeout);
        let bridging = d.bridge_gaps;
        Self {
            plan: plan_reads(&config, device, bridging),
            bridging,
            link,
            failures: 0,
            next_attempt: Instant::now(),
            last_change: HashMap::new(),
            config,
            device,
        }
    }

    fn device_id(&self) -> &str {
        &self.config.devices[self.device].id
    }

    fn interval(&self) -> Duration {
        self.config.devices[self.device].poll_interval
    }

    /// One poll cycle: the samples of every tank on this device, and how
    /// the exchange went.
    async fn cycle(&mut self) -> (Vec<TankSample>, Outcome) {
        let at_ms = jiff::Timestamp::now().as_millisecond();
        let (raw, outcome) = self.read_all().await;
        (self.samples(&raw, at_ms), outcome)
    }

    async fn read_all(&mut self) -> (HashMap<(usize, Role), Raw>, Outcome) {
        let mut raw = HashMap::new();
        let lost = |raw: &mut HashMap<(usize, Role), Raw>, reads: &[Read]| {
            for read in reads {
                for &key in &read.values {
                    raw.insert(key, Raw::Failed(Quality::CommunicationLost));
                }
            }
        };
        if !self.link.is_connected() {
            if Instant::now() < self.next_attempt {
                lost(&mut raw, &self.plan);
                return (raw, Outcome::Failed { attempted: false });
            }
            match self.link.connect().await {
                Ok(()) => {
                    if self.failures > 0 {
                        info!(device = %self.device_id(), "link back up after {} failed attempts", self.failures);
                    }
                    self.failures = 0;
                }
                Err(e) => {
                    self.link_failed(&e);
                    lost(&mut raw, &self.plan);
                    return (raw, Outcome::Failed { attempted: true });
                }
            }
        }
        let mut outcome = Outcome::Answered;
        let plan = self.plan.clone();
        for (i, read) in plan.iter().enumerate() {
            match self.link.read(read).await {
                Ok(words) => self.distribute(&mut raw, read, words),
                Err(e) if e.is_illegal_address() && self.bridging && read.values.len() > 1 => {
                    warn!(
                        device = %self.device_id(),
                        "the device refused a read spanning unmapped registers; reading values separately from now on \
                         (set bridge_gaps = false in the config to skip this)"
                    );
                    self.bridging = false;
                    self.plan = plan_reads(&self.config, self.device, false);
                    for &key in &read.values {
                        raw.insert(key, Raw::Failed(Quality::DeviceError));
                    }
                    outcome = Outcome::Failed { attempted: true };
                }
                Err(e) if !e.needs_reconnect() => {
                    debug!(device = %self.device_id(), start = read.start, "read refused: {e}");
                    for &key in &read.values {
                        raw.insert(key, Raw::Failed(Quality::DeviceError));
                    }
                    outcome = Outcome::Failed { attempted: true };
                }
                Err(e) => {
                    self.link_failed(&e);
                    lost(&mut raw, &plan[i..]);
                    outcome = Outcome::Failed { attempted: true };
                    break;
                }
            }
        }
        (raw, outcome)
    }

    fn link_failed(&mut self, e: &LinkError) {
        if self.failures == 0 {
            warn!(device = %self.device_id(), "link down: {e}; reconnecting with backoff");
        } else {
            debug!(device = %self.device_id(), attempt = self.failures, "still down: {e}");
        }
        self.failures = self.failures.saturating_add(1);
        self.next_attempt = Instant::now() + backoff_delay(self.failures);
    }

    /// Hands each value of a read its slice of the answer.
    fn distribute(&self, raw: &mut HashMap<(usize, Role), Raw>, read: &Read, words: Words) {
        for &(tank, role) in &read.values {
            let t = &self.config.tanks[tank];
            let value = match (&words, role) {
                (Words::Bits(bits), Role::LeakFlag) => t
                    .leak_flag
                    .and_then(|f| bits.get(usize::from(f.address - read.start)).copied())
                    .map_or(Raw::Failed(Quality::DeviceError), Raw::Bit),
                (Words::Registers(regs), role) => match sensor_of(t, role) {
                    Some(s) => {
                        let from = usize::from(s.address - read.start);
                        let to = from + usize::from(s.data_type.width());
                        regs.get(from..to)
                            .map_or(Raw::Failed(Quality::DeviceError), |w| {
                                Raw::Registers(w.to_vec())
                            })
                    }
                    None => Raw::Failed(Quality::DeviceError),
                },
                _ => Raw::Failed(Quality::DeviceError),
            };
            raw.insert((tank, role), value);
        }
    }

    fn samples(&mut self, raw: &HashMap<(usize, Role), Raw>, at_ms: i64) -> Vec<TankSample> {
        let config = Arc::clone(&self.config);
        let now = Instant::now();
        let device = self.device;
        let mut out = Vec::new();
        for (tank_index, tank) in config
            .tanks
            .iter()
            .enumerate()
            .filter(|(_, t)| t.device == device)
        {
            let mut reading = |role: Role, sensor: &Sensor| -> Reading {
                let r = raw
                    .get(&(tank_index, role))
                    .cloned()
                    .unwrap_or(Raw::Failed(Quality::CommunicationLost));
                self.reading(tank_index, role, sensor, r, now)
            };
            let level = reading(Role::Level, &tank.level);
            let pressure = tank
                .pressure
                .as_ref()
                .map(|p| reading(Role::Pressure, &p.sensor));
            let transfer = tank.transfer.as_ref().map(|s| reading(Role::Transfer, s));
            let temperature = tank
                .temperature
                .as_ref()
                .map(|s| reading(Role::Temperature, s));
            let leak_flag = tank
                .leak_flag
                .map(|_| match raw.get(&(tank_index, Role::LeakFlag)) {
                    Some(Raw::Bit(b)) => Some(*b),
                    _ => None,
                });
            out.push(TankSample {
                tank: tank_index,
                tank_id: tank.id.clone(),
                at_ms,
                level,
                pressure,
                transfer,
                temperature,
                leak_flag,
            });
        }
        out
    }

    /// Decodes, scales and flags one value.
    fn reading(
        &mut self,
        tank: usize,
        role: Role,
        sensor: &Sensor,
        raw: Raw,
        now: Instant,
    ) -> Reading {
        let words = match raw {
            Raw::Registers(words) => words,
            Raw::Failed(q) => return Reading::bad(q),
            Raw::Bit(_) => return Reading::bad(Quality::DeviceError),
        };
        let stuck = self.note_change(tank, role, &words, now, sensor.stuck_after);
        flag(sensor, &words, stuck)
    }

    /// Records the words and says whether they have been the same for longer
    /// than `limit`.
    fn note_change(
        &mut self,
        tank: usize,
        role: Role,
        words: &[u16],
        now: Instant,
        limit: Option<Duration>,
    ) -> bool {
        let entry = self
            .last_change
            .entry((tank, role))
            .or_insert_with(|| LastChange {
                words: words.to_vec(),
                since: now,
            });
        if entry.words != words {
            entry.words = words.to_vec();
            entry.since = now;
        }
        limit.is_some_and(|limit| now.duration_since(entry.since) > limit)
    }
}

/// Decodes words into a flagged reading. Pure, so it can be tested and
/// fuzzed without a device.
pub fn flag(sensor: &Sensor, words: &[u16], stuck: bool) -> Reading {
    let Some(raw) = sensor.data_type.decode(words, sensor.word_order) else {
        return Reading::bad(Quality::DeviceError);
    };
    if !raw.is_finite() {
        return Reading::bad(Quality::NotANumber);
    }
    let si = sensor.to_si(raw);
    let (lo, hi) = sensor.valid_si;
    if !si.is_finite() {
        Reading::bad(Quality::NotANumber)
    } else if !sensor.accepts(si) {
        Reading::bad(Quality::OutOfRange)
    } else if stuck {
        Reading::bad(Quality::Stuck)
    } else {
        Reading::good(si.clamp(lo, hi))
    }
}

fn sensor_of(tank: &crate::config::Tank, role: Role) -> Option<&Sensor> {
    match role {
        Role::Level => Some(&tank.level),
        Role::Pressure => tank.pressure.as_ref().map(|p| &p.sensor),
        Role::Transfer => tank.transfer.as_ref(),
        Role::Temperature => tank.temperature.as_ref(),
        Role::LeakFlag => None,
    }
}

/// Delay before reconnect attempt `failures` (1 = after the first failure):
/// exponential, capped, with "equal jitter" (half fixed, half random) so
/// that many agents or devices do not retry in lockstep.
fn backoff_delay(failures: u32) -> Duration {
    let exp = BACKOFF_START.saturating_mul(1u32 << failures.saturating_sub(1).min(16));
    let ceiling = exp.min(BACKOFF_CAP);
    // A random fraction without a dependency: std's hasher keys are random.
    let random = std::collections::hash_map::RandomState::new()
        .build_hasher()
        .finish();
    let fraction = (random >> 11) as f64 / (1u64 << 53) as f64;
    ceiling.mul_f64(0.5 + 0.5 * fraction)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::acquire::decode::{DataType, RegisterKind, WordOrder};

    fn level_sensor(data_type: DataType) -> Sensor {
        Sensor {
            register: RegisterKind::Holding,
            address: 0,
            data_type,
            word_order: WordOrder::HighFirst,
            raw_span: (4000.0, 20000.0),
            engineering_span: (0.0, 5.0),
            unit: "m".into(),
            si_per_unit: 1.0,
            si_offset: 0.0,
            valid_si: (0.0, 5.0),
            stuck_after: None,
            accuracy: crate::config::Uncertainty {
                bound: 0.003,
                relative: false,
                stated: false,
            },
        }
    }

    #[test]
    fn readings_are_flagged() {
        let s = level_sensor(DataType::U16);
        assert_eq!(flag(&s, &[12000], false), Reading::good(2.5));
        assert_eq!(flag(&s, &[3000], false).quality, Quality::OutOfRange);
        assert_eq!(flag(&s, &[21000], false).quality, Quality::OutOfRange);
        assert_eq!(flag(&s, &[12000], true).quality, Quality::Stuck);
        assert_eq!(flag(&s, &[], false).quality, Quality::DeviceError);
        let mut f = level_sensor(DataType::F32);
        f.raw_span = (0.0, 5.0);
        let nan = DataType::F32.encode(f64::NAN, WordOrder::HighFirst);
        assert_eq!(flag(&f, &nan, false).quality, Quality::NotANumber);
        assert_eq!(
            flag(&f, &DataType::F32.encode(1.5, WordOrder::HighFirst), false),
            Reading::good(1.5)
        );
    }

    #[test]
    fn backoff_grows_to_its_cap_with_jitter() {
        for failures in 1..40 {
            let d = backoff_delay(failures);
            let ceiling = BACKOFF_START
                .saturating_mul(1 << (failures - 1).min(16))
                .min(BACKOFF_CAP);
            assert!(d >= ceiling / 2 && d <= ceiling, "{failures}: {d:?}");
        }
    }
}
