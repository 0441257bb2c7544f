//! Poll statistics: counters the pollers update and the metrics page reads.
//!
//! One [`Stats`] per daemon, shared as an `Arc` between the device pollers
//! (writers) and the web server (reader). Everything is a relaxed atomic, so
//! a poller never waits for a reader and a reader never blocks polling; the
//! price is that a reader may see one counter of a cycle updated and the
//! next not yet, which a metrics scrape tolerates (Prometheus clients make
//! the same trade). A mutex was the alternative; it would let a slow scrape
//! delay a poll cycle, which the acquisition path must never allow.
//!
//! Left out: anything about leaks, and anything that talks to a device.
//! These are in-memory counts of what the pollers already did, so acquire
//! still only reads Modbus.

use crate::acquire::sample::TankSample;
use crate::config::Config;
use std::sync::atomic::{AtomicI64, AtomicU64, Ordering};
use std::time::Duration;

/// Upper bounds of the poll-cycle duration histogram, seconds. A healthy
/// device on a LAN answers a cycle in a few milliseconds; a timed-out one
/// takes its request timeout (500 ms by default), so the buckets span both,
/// finest at the low end where a LAN device's cycles fall.
pub const CYCLE_BUCKETS_S: [f64; 16] = [
    0.0005, 0.001, 0.0015, 0.002, 0.003, 0.005, 0.0075, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0,
    2.5, 5.0,
];

/// No value recorded yet (a timestamp of 0 ms would be 1970).
const NEVER: i64 = i64::MIN;

/// The statistics of every device and tank of a config.
#[derive(Debug)]
pub struct Stats {
    devices: Vec<DeviceStats>,
    tanks: Vec<TankStats>,
}

/// Counters of one device.
#[derive(Debug)]
struct DeviceStats {
    id: String,
    successes: AtomicU64,
    failures: AtomicU64,
    /// Per bucket of [`CYCLE_BUCKETS_S`], plus one past the last bound; not
    /// cumulative (the reader adds them up).
    buckets: [AtomicU64; CYCLE_BUCKETS_S.len() + 1],
    duration_sum_ns: AtomicU64,
    last_success_ms: AtomicI64,
}

/// Latest good readings of one tank.
#[derive(Debug)]
struct TankStats {
    id: String,
    level: Latest,
    pressure: Latest,
}

/// The latest good value of one reading: the f64's bits and when.
#[derive(Debug)]
struct Latest {
    bits: AtomicU64,
    at_ms: AtomicI64,
}

impl Latest {
    fn new() -> Self {
        Self {
            bits: AtomicU64::new(0),
            at_ms: AtomicI64::new(NEVER),
        }
    }

    fn set(&self, value: f64, at_ms: i64) {
        self.bits.store(value.to_bits(), Ordering::Relaxed);
        self.at_ms.store(at_ms, Ordering::Relaxed);
    }

    fn get(&self) -> Option<(f64, i64)> {
        let at = self.at_ms.load(Ordering::Relaxed);
        (at != NEVER).then(|| (f64::from_bits(self.bits.load(Ordering::Relaxed)), at))
    }
}

/// How one poll cycle went.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Outcome {
    /// Every planned read answered.
    Answered,
    /// The link is down or a read failed; `attempted` is false when the
    /// cycle fell inside the reconnect backoff and sent nothing.
    Failed { attempted: bool },
}

/// A copy of one device's counters.
#[derive(Debug, Clone, PartialEq)]
pub struct DeviceSnapshot {
    pub id: String,
    pub successes: u64,
    pub failures: u64,
    /// Cumulative counts per bound of [`CYCLE_BUCKETS_S`].
    pub cumulative: Vec<(f64, u64)>,
    /// Cycles timed (those that sent a request), and their total seconds.
    pub count: u64,
    pub sum_s: f64,
    pub last_success_ms: Option<i64>,
}

/// A copy of one tank's latest good readings, SI, with UTC ms.
#[derive(Debug, Clone, PartialEq)]
pub struct TankSnapshot {
    pub id: String,
    /// Level above the tank bottom, m.
    pub level: Option<(f64, i64)>,
    /// Pressure as the transmitter reports it, Pa (gauge or absolute as
    /// configured).
    pub pressure: Option<(f64, i64)>,
}

impl Stats {
    /// Zeroed statistics for every device and tank of `config`, in its order.
    pub fn new(config: &Config) -> Self {
        Self {
            devices: config
                .devices
                .iter()
                .map(|d| DeviceStats {
                    id: d.id.clone(),
                    successes: AtomicU64::new(0),
                    failures: AtomicU64::new(0),
                    buckets: std::array::from_fn(|_| AtomicU64::new(0)),
                    duration_sum_ns: AtomicU64::new(0),
                    last_success_ms: AtomicI64::new(NEVER),
                })
                .collect(),
            tanks: config
                .tanks
                .iter()
                .map(|t| TankStats {
                    id: t.id.clone(),
                    level: Latest::new(),
                    pressure: Latest::new(),
                })
                .collect(),
        }
    }

    /// Records one poll cycle of device `device` (an index into the
    /// config's devices) that began at `at_ms` and took `took`.
    pub fn record_cycle(&self, device: usize, outcome: Outcome, took: Duration, at_ms: i64) {
        let Some(d) = self.devices.get(device) else {
            return;
        };
        match outcome {
            Outcome::Answered => {
                d.successes.fetch_add(1, Ordering::Relaxed);
                d.last_success_ms.store(at_ms, Ordering::Relaxed);
            }
            Outcome::Failed { .. } => {
                d.failures.fetch_add(1, Ordering::Relaxed);
            }
        }
        // A cycle skipped during the backoff sent nothing, so its duration
        // says nothing about the device.
        if outcome != (Outcome::Failed { attempted: false }) {
            let secs = took.as_secs_f64();
            let bucket = CYCLE_BUCKETS_S
                .iter()
                .position(|&bound| secs <= bound)
                .unwrap_or(CYCLE_BUCKETS_S.len());
            d.buckets[bucket].fetch_add(1, Ordering::Relaxed);
            let ns = u64::try_from(took.as_nanos()).unwrap_or(u64::MAX);
            d.duration_sum_ns.fetch_add(ns, Ordering::Relaxed);
        }
    }

    /// Keeps the good level and pressure readings of a cycle's samples.
    pub fn record_samples(&self, samples: &[TankSample]) {
        for s in samples {
            let Some(t) = self.tanks.get(s.tank) else {
                continue;
            };
            if let Some(v) = s.level.value.filter(|_| s.level.is_good()) {
                t.level.set(v, s.at_ms);
            }
            if let Some(v) = s.pressure.and_then(|p| p.value.filter(|_| p.is_good())) {
                t.pressure.set(v, s.at_ms);
            }
        }
    }

    pub fn devices(&self) -> Vec<DeviceSnapshot> {
        self.devices
            .iter()
            .map(|d| {
                let mut running = 0;
                let mut cumulative = Vec::with_capacity(CYCLE_BUCKETS_S.len());
                for (bound, count) in CYCLE_BUCKETS_S.iter().zip(&d.buckets) {
                    running += count.load(Ordering::Relaxed);
                    cumulative.push((*bound, running));
                }
                let count = running + d.buckets[CYCLE_BUCKETS_S.len()].load(Ordering::Relaxed);
                let last = d.last_success_ms.load(Ordering::Relaxed);
                DeviceSnapshot {
                    id: d.id.clone(),
                    successes: d.successes.load(Ordering::Relaxed),
                    failures: d.failures.load(Ordering::Relaxed),
                    cumulative,
                    count,
                    sum_s: d.duration_sum_ns.load(Ordering::Relaxed) as f64 * 1e-9,
                    last_success_ms: (last != NEVER).then_some(last),
                }
            })
            .collect()
    }

    pub fn tanks(&self) -> Vec<TankSnapshot> {
        self.tanks
            .iter()
            .map(|t| TankSnapshot {
                id: t.id.clone(),
                level: t.level.get(),
                pressure: t.pressure.get(),
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::acquire::sample::{Quality, Reading};
    use std::path::Path;

    fn demo() -> Config {
        crate::config::load(&Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml"))
            .unwrap()
    }

    #[test]
    fn cycles_fill_the_counters_and_the_histogram() {
        let stats = Stats::new(&demo());
        let ms = Duration::from_millis;
        stats.record_cycle(0, Outcome::Answered, ms(3), 1_000);
        stats.record_cycle(0, Outcome::Answered, ms(40), 2_000);
        stats.record_cycle(0, Outcome::Failed { attempted: true }, ms(400), 3_000);
        stats.record_cycle(0, Outcome::Failed { attempted: false }, ms(0), 4_000);
        stats.record_cycle(0, Outcome::Failed { attempted: true }, ms(9_000), 5_000);
        stats.record_cycle(99, Outcome::Answered, ms(1), 0); // no such device: ignored
        let d = &stats.devices()[0];
        assert_eq!((d.successes, d.failures), (2, 3));
        assert_eq!(d.count, 4, "the skipped cycle is not timed");
        assert!((d.sum_s - 9.443).abs() < 1e-9, "{}", d.sum_s);
        let at = |bound: f64| d.cumulative.iter().find(|(b, _)| *b == bound).unwrap().1;
        assert_eq!((at(0.005), at(0.05), at(0.5), at(5.0)), (1, 2, 3, 3));
        assert_eq!(d.last_success_ms, Some(2_000));
        assert_eq!(stats.devices()[1].last_success_ms, None);
    }

    #[test]
    fn only_good_readings_are_kept() {
        let config = demo();
        let stats = Stats::new(&config);
        let sample = |level: Reading, pressure: Option<Reading>, at_ms| TankSample {
            tank: 1,
            tank_id: config.tanks[1].id.as_str().into(),
            at_ms,
            level,
            pressure,
            transfer: None,
            temperature: None,
            leak_flag: None,
        };
        stats.record_samples(&[sample(Reading::good(1.5), Some(Reading::good(15e3)), 10)]);
        stats.record_samples(&[sample(
            Reading::bad(Quality::Stuck),
            Some(Reading::bad(Quality::CommunicationLost)),
            20,
        )]);
        let t = &stats.tanks()[1];
        assert_eq!(t.level, Some((1.5, 10)));
        assert_eq!(t.pressure, Some((15e3, 10)));
        assert_eq!(stats.tanks()[0].level, None);
    }
}
