//! One task per device: poll on a fixed interval, decode, flag, send on.
//!
//! Each cycle makes the planned reads, turns the registers into SI readings
//! with a quality flag each, and sends one [`TankSample`] per tank of the
//! device down a bounded channel. A failed cycle still produces samples, all
//! flagged, so that the gap is on record. When the link is down the task
//! reconnects with exponential backoff and jitter, capped low enough that a
//! device that comes back is read again within a few seconds.
//!
//! A read the device refuses with "illegal data address" (exception 02)
//! that covers several values is not given up on, nor is the device
//! switched to separate reads for good on one refusal: its parts
//! ([`split_read`]) are read at once, in the same cycle. If the device
//! answers some of them, it is the combining it refuses (or one value's
//! address, which is then named): those parts are read from then on, and
//! the whole is tried again every [`RECOMBINE_AFTER`]. If it refuses the
//! parts too, the device is refusing everything for now, and nothing
//! changes. What was decided, and why, goes in the log.
//!
//! The log says each kind of trouble when it starts and when it ends (see
//! [`notices`](crate::acquire::notices)), never every cycle.
//!
//! Left out: what the samples are for. This module never looks at a leak.

use crate::acquire::link::{Link, LinkError, Words, exception_meaning};
use crate::acquire::notices::{BlockKey, BlockWatch, Level, LinkWatch, Notice, ReadingWatch};
use crate::acquire::plan::{Read, plan_reads, split_read};
use crate::acquire::plausible::StepLimit;
use crate::acquire::sample::{Quality, Reading, TankSample};
use crate::acquire::serial::Buses;
use crate::acquire::stats::{Outcome, Stats};
use crate::clock::Clock;
use crate::config::{Config, Role, Sensor};
use std::collections::{HashMap, VecDeque};
use std::hash::{BuildHasher, Hasher};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::sync::mpsc;
use tokio::time::MissedTickBehavior;
use tokio_util::sync::CancellationToken;
use tracing::{debug, info, warn};

/// Reconnect delays: the first retry after this, doubling per failure...
const BACKOFF_START: Duration = Duration::from_millis(250);
/// ...up to this. Low, because readings must be back within seconds of a
/// device's return, and a refused connect costs a device nothing.
const BACKOFF_CAP: Duration = Duration::from_secs(3);
/// How long a read the device refused as a whole (but answered in parts) is
/// read in parts before the whole is tried again. A device's register map
/// changes only when its program does, so once in ten minutes costs one
/// refused request and finds a fixed map soon enough.
pub const RECOMBINE_AFTER: Duration = Duration::from_secs(600);

/// The result of one poll cycle for one value: its registers (one or two,
/// held inline: this is made for every value of every cycle), its bit, or
/// why there is none.
#[derive(Debug, Clone, PartialEq)]
enum Raw {
    Registers(RegisterWords),
    Bit(bool),
    Failed(Quality),
}

/// The one or two registers of a value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct RegisterWords {
    words: [u16; 2],
    len: u8,
}

impl RegisterWords {
    /// `None` for more than two registers (no data type takes more).
    fn of(words: &[u16]) -> Option<Self> {
        let mut out = Self {
            words: [0; 2],
            len: u8::try_from(words.len()).ok().filter(|&n| n <= 2)?,
        };
        out.words[..words.len()].copy_from_slice(words);
        Some(out)
    }

    fn as_slice(&self) -> &[u16] {
        &self.words[..usize::from(self.len)]
    }
}

/// What one cycle got for each value of the device, by the tank's place
/// on the device and the role: a plain index (this is filled and read for
/// every value of every cycle).
struct RawMap {
    /// The place of each of the config's tanks on this device (`NONE` for
    /// another device's).
    local_of: Arc<[u32]>,
    values: Vec<Option<Raw>>,
}

/// Roles per tank, for the indexes of [`RawMap`] and the per-value state.
const ROLES: usize = 5;
/// Not a tank of this device.
const NONE: u32 = u32::MAX;

fn slot(local_of: &[u32], tank: usize, role: Role) -> Option<usize> {
    let local = *local_of.get(tank)?;
    (local != NONE).then(|| local as usize * ROLES + role as usize)
}

impl RawMap {
    fn new(local_of: &Arc<[u32]>, tanks: usize) -> Self {
        Self {
            local_of: Arc::clone(local_of),
            values: vec![None; tanks * ROLES],
        }
    }

    fn insert(&mut self, (tank, role): (usize, Role), raw: Raw) {
        if let Some(i) = slot(&self.local_of, tank, role) {
            self.values[i] = Some(raw);
        }
    }

    /// Sets a value only if the cycle got nothing for it yet.
    fn insert_if_absent(&mut self, (tank, role): (usize, Role), raw: Raw) {
        if let Some(i) = slot(&self.local_of, tank, role) {
            self.values[i].get_or_insert(raw);
        }
    }

    fn get(&self, (tank, role): (usize, Role)) -> Option<&Raw> {
        slot(&self.local_of, tank, role).and_then(|i| self.values[i].as_ref())
    }
}

/// Polls one device until cancelled or until nobody listens any more.
///
/// Samples go to `out`, one batch per cycle. The channel is bounded: if the
/// consumer falls behind, this task waits, and its next ticks are delayed
/// rather than queued (`MissedTickBehavior::Delay`), so memory stays flat
/// and the timestamps stay true.
///
/// Every cycle is counted in `stats` (successes, failures, duration, the
/// latest good readings) before its batch is sent. Sample times come from
/// `clock`, the daemon's timeline, which never goes back or jumps.
///
/// The send is not raced against `cancel`: a batch made is a batch
/// acquired, and the daemon drains the channel at shutdown until every
/// poller has gone.
pub async fn poll_device(
    config: Arc<Config>,
    device: usize,
    buses: Buses,
    out: mpsc::Sender<Vec<TankSample>>,
    stats: Arc<Stats>,
    clock: Arc<Clock>,
    cancel: CancellationToken,
) {
    let mut poller = DevicePoller::new(config, device, &buses, clock);
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
            .map_or_else(|| poller.clock.now_ms(), |s| s.at_ms);
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
    words: RegisterWords,
    since: Instant,
}

/// A read of the plan that is read in parts for now, or (no parts) one
/// whose parts the device refused as well, which is not split again until
/// the retry: a device refusing everything must not cost a request per
/// value every cycle.
#[derive(Debug, Clone)]
struct Split {
    parts: Vec<Read>,
    /// When to try the whole read (and its parts) again.
    retry_at: Instant,
}

/// How one planned read went.
enum Answer {
    /// Every value of it was read.
    Whole,
    /// The device answered, but refused some or all of it.
    Refused,
}

struct DevicePoller {
    config: Arc<Config>,
    device: usize,
    clock: Arc<Clock>,
    /// The reads as the config plans them (coalesced where it allows).
    plan: Vec<Arc<Read>>,
    /// Reads of `plan`, by index, that the device refused whole but
    /// answered in parts.
    split: HashMap<usize, Split>,
    link: Link,
    failures: u32,
    next_attempt: Instant,
    links: LinkWatch,
    blocks: BlockWatch,
    readings: ReadingWatch,
    /// The device's tanks (config indices), in config order, and each of
    /// the config's tanks' place among them (see [`RawMap`]).
    tanks: Vec<usize>,
    local_of: Arc<[u32]>,
    /// Per value (place * ROLES + role): when its raw value last changed.
    last_change: Vec<Option<LastChange>>,
    /// Per tank (by place): the last good level (m) and when it was read.
    last_good_level: Vec<Option<(f64, Instant)>>,
    /// Per tank (by place): how fast its level can move.
    step_limits: Vec<StepLimit>,
    /// Per tank (by place): its tag, shared by the samples.
    names: Vec<Arc<str>>,
}

impl DevicePoller {
    fn new(config: Arc<Config>, device: usize, buses: &Buses, clock: Arc<Clock>) -> Self {
        let d = &config.devices[device];
        let link = Link::for_device(d, buses);
        let name = format!("{} ({} unit {})", d.id, d.address, d.unit_id);
        let tanks: Vec<usize> = (0..config.tanks.len())
            .filter(|&t| config.tanks[t].device == device)
            .collect();
        let mut local_of = vec![NONE; config.tanks.len()];
        for (place, &t) in tanks.iter().enumerate() {
            local_of[t] = place as u32;
        }
        Self {
            plan: plan_reads(&config, device, d.bridge_gaps)
                .into_iter()
                .map(Arc::new)
                .collect(),
            split: HashMap::new(),
            link,
            failures: 0,
            next_attempt: Instant::now(),
            links: LinkWatch::new(name),
            blocks: BlockWatch::new(d.id.clone(), d.unit_id),
            readings: ReadingWatch::default(),
            last_change: vec![None; tanks.len() * ROLES],
            last_good_level: vec![None; tanks.len()],
            step_limits: tanks
                .iter()
                .map(|&t| StepLimit::for_tank(&config.tanks[t]))
                .collect(),
            names: tanks
                .iter()
                .map(|&t| Arc::from(config.tanks[t].id.as_str()))
                .collect(),
            local_of: local_of.into(),
            tanks,
            config,
            device,
            clock,
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
        let at_ms = self.clock.now_ms();
        let (raw, outcome) = self.read_all().await;
        for notice in self.blocks.flush() {
            emit(Some(notice));
        }
        (self.samples(&raw, at_ms), outcome)
    }

    async fn read_all(&mut self) -> (RawMap, Outcome) {
        let mut raw = RawMap::new(&self.local_of, self.tanks.len());
        if !self.link.is_connected() {
            if Instant::now() < self.next_attempt {
                lost(&mut raw, &self.plan);
                return (raw, Outcome::Failed { attempted: false });
            }
            if let Err(e) = self.link.connect().await {
                self.link_failed(&e);
                lost(&mut raw, &self.plan);
                return (raw, Outcome::Failed { attempted: true });
            }
        }
        let mut outcome = Outcome::Answered;
        for index in 0..self.plan.len() {
            match self.read_planned(index, &mut raw).await {
                Ok(Answer::Whole) => {}
                Ok(Answer::Refused) => outcome = Outcome::Failed { attempted: true },
                Err(e) => {
                    self.link_failed(&e);
                    lost(&mut raw, &self.plan[index..]);
                    // Values of earlier reads that the failed one shares
                    // nothing with keep what they got.
                    outcome = Outcome::Failed { attempted: true };
                    break;
                }
            }
        }
        (raw, outcome)
    }

    /// One read of the plan, whole or in its parts. `Err` only when the
    /// exchange failed (the link needs a reconnect).
    async fn read_planned(&mut self, index: usize, raw: &mut RawMap) -> Result<Answer, LinkError> {
        // Shared: a read names every value it covers.
        let read = Arc::clone(&self.plan[index]);
        let now = Instant::now();
        if let Some(split) = self.split.get(&index)
            && now < split.retry_at
        {
            if split.parts.is_empty() {
                let answer = self.read_simple(&read, raw).await?;
                if matches!(answer, Answer::Whole) {
                    // It answers again: a later refusal may split it.
                    self.split.remove(&index);
                }
                return Ok(answer);
            }
            let parts = split.parts.clone();
            let mut whole = true;
            for part in &parts {
                whole &= matches!(self.read_simple(part, raw).await?, Answer::Whole);
            }
            return Ok(if whole {
                Answer::Whole
            } else {
                Answer::Refused
            });
        }
        let retrying = self.split.contains_key(&index);
        match self.link.read(&read).await {
            Ok(words) => {
                self.answered(&read);
                self.distribute(raw, &read, words);
                if let Some(split) = self.split.remove(&index)
                    && !split.parts.is_empty()
                {
                    for part in &split.parts {
                        self.blocks.forget(key(part));
                    }
                    info!(
                        "{}: {} is answered as a whole again; back to one read for its {} values",
                        self.device_id(),
                        self.describe(&read),
                        read.values.len()
                    );
                }
                Ok(Answer::Whole)
            }
            Err(e) if e.is_illegal_address() && read.values.len() > 1 => {
                self.links_answered();
                self.try_parts(index, &read, &e, retrying, raw).await
            }
            Err(e) if e.device_answered() => {
                self.links_answered();
                self.refused(&read, &e);
                mark(raw, &read, Quality::DeviceError);
                Ok(Answer::Refused)
            }
            Err(e) => Err(e),
        }
    }

    /// The device refused a read of several values with exception 02: reads
    /// its parts (down to single values where a part is refused too) and
    /// decides, from what it answers, whether to read in parts from now on.
    async fn try_parts(
        &mut self,
        index: usize,
        read: &Read,
        error: &LinkError,
        retrying: bool,
        raw: &mut RawMap,
    ) -> Result<Answer, LinkError> {
        let mut pending: VecDeque<Read> = split_read(&self.config, read).into();
        let mut answered = Vec::new();
        let mut refused = Vec::new();
        while let Some(part) = pending.pop_front() {
            match self.link.read(&part).await {
                Ok(words) => {
                    self.distribute(raw, &part, words);
                    answered.push(part);
                }
                Err(e) if e.is_illegal_address() && part.values.len() > 1 => {
                    for (i, finer) in split_read(&self.config, &part).into_iter().enumerate() {
                        pending.insert(i, finer);
                    }
                }
                Err(e) if e.device_answered() => {
                    mark(raw, &part, Quality::DeviceError);
                    refused.push((part, e));
                }
                Err(e) => return Err(e),
            }
        }
        if answered.is_empty() {
            // Nothing is learned by splitting: the device refuses all of it
            // for now. The whole is read (and refused) as planned until the
            // retry, when the parts are tried again.
            self.split.insert(
                index,
                Split {
                    parts: Vec::new(),
                    retry_at: Instant::now() + RECOMBINE_AFTER,
                },
            );
            self.refused(read, error);
            mark(raw, read, Quality::DeviceError);
            return Ok(Answer::Refused);
        }
        self.blocks.forget(key(read));
        let whole = self.describe(read);
        let because = if refused.is_empty() {
            "so it refuses the combined read (unmapped registers in the span, or a limit on how many it reads at once)".to_owned()
        } else {
            let named: Vec<String> = refused
                .iter()
                .flat_map(|(part, _)| &part.values)
                .map(|&(tank, role)| format!("{} {}", self.config.tanks[tank].id, role.name()))
                .collect();
            format!("and refuses {} even alone (said below)", named.join(", "))
        };
        let line = format!(
            "{}: {whole} got exception 2 ({}); it answers {} of its {} parts read alone, {because}; reading the parts separately from now on, and the whole again in {} min (bridge_gaps = false plans separate reads from the start)",
            self.device_id(),
            exception_meaning(2),
            answered.len(),
            answered.len() + refused.len(),
            RECOMBINE_AFTER.as_secs() / 60
        );
        // Said loudly the first time; a repeat after the retry changes
        // nothing and goes to the debug log.
        if retrying {
            debug!("{line}");
        } else {
            warn!("{line}");
        }
        for part in &answered {
            self.answered(part);
        }
        let all_answered = refused.is_empty();
        for (part, e) in &refused {
            self.refused(part, e);
        }
        let mut parts = answered;
        parts.extend(refused.into_iter().map(|(part, _)| part));
        parts.sort_by_key(|p| p.start);
        self.split.insert(
            index,
            Split {
                parts,
                retry_at: Instant::now() + RECOMBINE_AFTER,
            },
        );
        Ok(if all_answered {
            Answer::Whole
        } else {
            Answer::Refused
        })
    }

    /// One read, no splitting: for the parts of a split read.
    async fn read_simple(&mut self, read: &Read, raw: &mut RawMap) -> Result<Answer, LinkError> {
        match self.link.read(read).await {
            Ok(words) => {
                self.answered(read);
                self.distribute(raw, read, words);
                Ok(Answer::Whole)
            }
            Err(e) if e.device_answered() => {
                self.links_answered();
                self.refused(read, &e);
                mark(raw, read, Quality::DeviceError);
                Ok(Answer::Refused)
            }
            Err(e) => Err(e),
        }
    }

    /// The device answered `read` properly.
    fn answered(&mut self, read: &Read) {
        self.links_answered();
        let config = &self.config;
        self.blocks
            .answered(key(read), || describe_read(config, read), Instant::now());
    }

    /// The device refused `read` or answered it wrongly.
    fn refused(&mut self, read: &Read, error: &LinkError) {
        let config = &self.config;
        self.blocks.refused(
            key(read),
            || describe_read(config, read),
            error,
            Instant::now(),
        );
    }

    /// The device answered something: the link is up.
    fn links_answered(&mut self) {
        self.failures = 0;
        let notice = self.links.answered(Instant::now());
        emit(notice);
    }

    fn link_failed(&mut self, e: &LinkError) {
        self.failures = self.failures.saturating_add(1);
        self.next_attempt = Instant::now() + backoff_delay(self.failures);
        let notice = self.links.failed(e, Instant::now());
        emit(notice);
    }

    /// A read as the log names it: "function 03 holding registers 10..13
    /// (FF-T14 level, FF-T14 pressure)".
    fn describe(&self, read: &Read) -> String {
        describe_read(&self.config, read)
    }

    /// Hands each value of a read its slice of the answer.
    fn distribute(&self, raw: &mut RawMap, read: &Read, words: Words) {
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
                                RegisterWords::of(w)
                                    .map_or(Raw::Failed(Quality::DeviceError), Raw::Registers)
                            })
                    }
                    None => Raw::Failed(Quality::DeviceError),
                },
                _ => Raw::Failed(Quality::DeviceError),
            };
            raw.insert((tank, role), value);
        }
    }

    fn samples(&mut self, raw: &RawMap, at_ms: i64) -> Vec<TankSample> {
        let config = Arc::clone(&self.config);
        let now = Instant::now();
        let mut out = Vec::with_capacity(self.tanks.len());
        for place in 0..self.tanks.len() {
            let tank_index = self.tanks[place];
            let tank = &config.tanks[tank_index];
            let mut reading = |role: Role, sensor: &Sensor| -> Reading {
                let r = raw
                    .get((tank_index, role))
                    .cloned()
                    .unwrap_or(Raw::Failed(Quality::CommunicationLost));
                let reading = self.reading(place, role, sensor, r, now);
                let notice = self.readings.saw(
                    place * ROLES + role as usize,
                    &tank.id,
                    role,
                    reading.quality,
                    now,
                );
                emit(notice);
                reading
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
                .map(|_| match raw.get((tank_index, Role::LeakFlag)) {
                    Some(Raw::Bit(b)) => Some(*b),
                    _ => None,
                });
            out.push(TankSample {
                tank: tank_index,
                tank_id: Arc::clone(&self.names[place]),
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

    /// Decodes, scales and flags one value of the tank at `place` on the
    /// device; a level is also checked against the last good one
    /// ([`StepLimit`]).
    fn reading(
        &mut self,
        place: usize,
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
        let stuck = self.note_change(
            place * ROLES + role as usize,
            words,
            now,
            sensor.stuck_after,
        );
        let reading = flag(sensor, words.as_slice(), stuck);
        match (role, reading.value) {
            (Role::Level, Some(level)) if reading.is_good() => {
                let plausible = match self.last_good_level[place] {
                    Some((last, at)) => self.step_limits[place].allows(
                        &self.config.tanks[self.tanks[place]],
                        last,
                        level,
                        now.duration_since(at).as_secs_f64(),
                    ),
                    None => true,
                };
                if plausible {
                    self.last_good_level[place] = Some((level, now));
                    reading
                } else {
                    Reading::bad(Quality::ImplausibleStep)
                }
            }
            _ => reading,
        }
    }

    /// Records the words of value `slot` and says whether they have been
    /// the same for longer than `limit`.
    fn note_change(
        &mut self,
        slot: usize,
        words: RegisterWords,
        now: Instant,
        limit: Option<Duration>,
    ) -> bool {
        let entry = self.last_change[slot].get_or_insert(LastChange { words, since: now });
        if entry.words != words {
            entry.words = words;
            entry.since = now;
        }
        limit.is_some_and(|limit| now.duration_since(entry.since) > limit)
    }
}

/// A read as the log and `leaktally check` name it: "function 03 holding
/// registers 10..13 (FF-T14 level, FF-T14 pressure)".
pub fn describe_read(config: &Config, read: &Read) -> String {
    let values: Vec<String> = read
        .values
        .iter()
        .map(|&(tank, role)| format!("{} {}", config.tanks[tank].id, role.name()))
        .collect();
    let last = u32::from(read.start) + u32::from(read.count).max(1) - 1;
    let span = if read.count <= 1 {
        format!("{} {}", read.table.name(), read.start)
    } else {
        format!("{}s {}..{last}", read.table.name(), read.start)
    };
    format!(
        "function {:02} {span} ({})",
        read.function_code(),
        values.join(", ")
    )
}

/// Marks every value of `reads` lost with the link.
fn lost(raw: &mut RawMap, reads: &[Arc<Read>]) {
    for read in reads {
        for &key in &read.values {
            raw.insert_if_absent(key, Raw::Failed(Quality::CommunicationLost));
        }
    }
}

/// Marks every value of `read` with `quality`.
fn mark(raw: &mut RawMap, read: &Read, quality: Quality) {
    for &key in &read.values {
        raw.insert(key, Raw::Failed(quality));
    }
}

fn key(read: &Read) -> BlockKey {
    BlockKey {
        function: read.function_code(),
        start: read.start,
        count: read.count,
    }
}

/// Logs a notice, if there is one. The text names the device (and the
/// tank) itself, so no fields are added.
fn emit(notice: Option<Notice>) {
    let Some(Notice { level, text }) = notice else {
        return;
    };
    match level {
        Level::Debug => debug!("{text}"),
        Level::Info => info!("{text}"),
        Level::Warn => warn!("{text}"),
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
    use crate::registers::{DataType, RegisterKind, WordOrder};

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
