//! What acquisition says in the log, and when: a device's link, the reads a
//! device refuses, and readings flagged bad, each said when it starts and
//! when it ends, never every poll cycle.
//!
//! * [`LinkWatch`]: one line when a device's link goes down (with why), one
//!   when it answers again (with how long it was gone), and one more only if
//!   the reason changes while it is down (a timeout that becomes "connection
//!   refused"). A TCP connection alone does not count as back: a gateway
//!   can accept connections while the device behind it is silent.
//! * [`BlockWatch`]: per planned read, one line when the device starts to
//!   refuse it (the exception code, what it means, what to check) or to
//!   answer it wrongly, one if the refusal changes, one when it answers
//!   again; reads that change alike in one cycle share their line.
//! * [`ReadingWatch`]: per tank and sensor, the first reading flagged bad,
//!   then at most one summary a minute ("12 readings flagged not_a_number
//!   in the last 60 s"), and one line once it has been good for 10 s.
//!   Readings lost with the link, or refused by the device, are the other
//!   two watches' to say.
//!
//! Each watch returns the line to log rather than logging it, so that its
//! timing can be tested with made-up instants.
//!
//! Left out: metrics (stats.rs counts every cycle) and anything a device is
//! sent.

use crate::acquire::link::{LinkError, exception_hint};
use crate::acquire::sample::Quality;
use crate::config::Role;
use std::collections::{BTreeMap, HashMap};
use std::time::{Duration, Instant};

/// How often a sensor's flagged readings may be summarised.
pub const SUMMARY_EVERY: Duration = Duration::from_secs(60);
/// How long a sensor must read good before its spell of flagged readings
/// is said to be over.
pub const GOOD_AGAIN_AFTER: Duration = Duration::from_secs(10);
/// Distinct reasons said while a link stays down; more are kept for the
/// debug log, so that a flapping error cannot fill the log.
const REASONS_SAID: usize = 3;

/// How loud a line is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Level {
    Debug,
    Info,
    Warn,
}

/// One line for the log.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Notice {
    pub level: Level,
    pub text: String,
}

impl Notice {
    fn warn(text: String) -> Option<Self> {
        Some(Self {
            level: Level::Warn,
            text,
        })
    }

    fn info(text: String) -> Option<Self> {
        Some(Self {
            level: Level::Info,
            text,
        })
    }

    fn debug(text: String) -> Option<Self> {
        Some(Self {
            level: Level::Debug,
            text,
        })
    }
}

/// A duration as people say it: "850 ms", "12.3 s", "4 min 5 s", "2 h 3 min".
pub fn spoken(d: Duration) -> String {
    let s = d.as_secs_f64();
    if s < 1.0 {
        format!("{} ms", d.as_millis())
    } else if s < 60.0 {
        format!("{s:.1} s")
    } else if s < 3600.0 {
        format!("{} min {} s", d.as_secs() / 60, d.as_secs() % 60)
    } else {
        format!("{} h {} min", d.as_secs() / 3600, d.as_secs() % 3600 / 60)
    }
}

/// The state of one device's link, as the log has told it.
#[derive(Debug)]
pub struct LinkWatch {
    device: String,
    state: LinkState,
}

#[derive(Debug)]
enum LinkState {
    /// Not yet answered since the agent started.
    Starting,
    Up,
    Down {
        since: Instant,
        failed_attempts: u32,
        reasons: Vec<String>,
    },
}

impl LinkWatch {
    /// `device` names the device in every line, with its address.
    pub fn new(device: String) -> Self {
        Self {
            device,
            state: LinkState::Starting,
        }
    }

    pub fn is_down(&self) -> bool {
        matches!(self.state, LinkState::Down { .. })
    }

    /// The device answered a request (even with an exception).
    pub fn answered(&mut self, now: Instant) -> Option<Notice> {
        match std::mem::replace(&mut self.state, LinkState::Up) {
            LinkState::Up => None,
            LinkState::Starting => Notice::info(format!("{}: answering", self.device)),
            LinkState::Down {
                since,
                failed_attempts,
                ..
            } => Notice::info(format!(
                "{}: link back up after {} ({failed_attempts} failed attempt{})",
                self.device,
                spoken(now.duration_since(since)),
                if failed_attempts == 1 { "" } else { "s" }
            )),
        }
    }

    /// A connect or an exchange failed; the next attempt is `retry_in` away.
    pub fn failed(&mut self, error: &LinkError, now: Instant) -> Option<Notice> {
        let reason = error.to_string();
        match &mut self.state {
            LinkState::Down {
                failed_attempts,
                reasons,
                since,
            } => {
                *failed_attempts = failed_attempts.saturating_add(1);
                if reasons.contains(&reason) {
                    return Notice::debug(format!(
                        "{}: still down (attempt {failed_attempts}): {reason}",
                        self.device
                    ));
                }
                reasons.push(reason.clone());
                if reasons.len() > REASONS_SAID {
                    return Notice::debug(format!("{}: still down: {reason}", self.device));
                }
                Notice::info(format!(
                    "{}: still down after {}, now: {reason}",
                    self.device,
                    spoken(now.duration_since(*since))
                ))
            }
            state => {
                let first = matches!(state, LinkState::Starting);
                *state = LinkState::Down {
                    since: now,
                    failed_attempts: 1,
                    reasons: vec![reason.clone()],
                };
                let what = if first {
                    "cannot reach it"
                } else {
                    "link down"
                };
                Notice::warn(format!(
                    "{}: {what}: {reason}; retrying with backoff, and its readings are flagged communication_lost until it answers",
                    self.device
                ))
            }
        }
    }
}

/// A planned read, as the log names it and as the watch tells reads apart.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct BlockKey {
    pub function: u8,
    pub start: u16,
    pub count: u16,
}

/// The reads one device refuses or answers wrongly. Changes are gathered
/// over a cycle and said together ([`BlockWatch::flush`]): a device that
/// refuses all its reads at once (busy, or the wrong unit id) gets one
/// line, not one per read.
#[derive(Debug)]
pub struct BlockWatch {
    device: String,
    /// The device's unit id, for the hints that name it.
    unit_id: u8,
    troubled: HashMap<BlockKey, Trouble>,
    changes: Vec<Change>,
}

#[derive(Debug)]
struct Trouble {
    error: LinkError,
    since: Instant,
    cycles: u64,
}

/// One read whose state changed this cycle.
#[derive(Debug)]
struct Change {
    kind: ChangeKind,
    what: String,
    error: LinkError,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum ChangeKind {
    Started,
    Changed,
    /// Answered again, after this long and this many cycles.
    Cleared(Duration, u64),
}

impl BlockWatch {
    pub fn new(device: String, unit_id: u8) -> Self {
        Self {
            device,
            unit_id,
            troubled: HashMap::new(),
            changes: Vec::new(),
        }
    }

    /// The device refused `key` (described as `what`) or answered it
    /// wrongly.
    /// `what` names the read, for the log; it is made only when a line is.
    pub fn refused(
        &mut self,
        key: BlockKey,
        what: impl FnOnce() -> String,
        error: &LinkError,
        now: Instant,
    ) {
        let kind = match self.troubled.get_mut(&key) {
            Some(t) if t.error == *error => {
                t.cycles += 1;
                return;
            }
            Some(t) => {
                t.error = error.clone();
                t.cycles += 1;
                ChangeKind::Changed
            }
            None => {
                self.troubled.insert(
                    key,
                    Trouble {
                        error: error.clone(),
                        since: now,
                        cycles: 1,
                    },
                );
                ChangeKind::Started
            }
        };
        self.changes.push(Change {
            kind,
            what: what(),
            error: error.clone(),
        });
    }

    /// The device answered `key` properly.
    /// `what` names the read, for the log; it is made only when a line is
    /// (a read that was in trouble and is answered again), never on every
    /// answered cycle.
    pub fn answered(&mut self, key: BlockKey, what: impl FnOnce() -> String, now: Instant) {
        if let Some(t) = self.troubled.remove(&key) {
            self.changes.push(Change {
                kind: ChangeKind::Cleared(now.duration_since(t.since), t.cycles),
                what: what(),
                error: t.error,
            });
        }
    }

    /// Forgets reads that are no longer made (the plan changed), without a
    /// line: the line that changed the plan says why.
    pub fn forget(&mut self, key: BlockKey) {
        self.troubled.remove(&key);
    }

    /// The lines for this cycle's changes: one per kind of change and
    /// error, naming every read it concerns.
    pub fn flush(&mut self) -> Vec<Notice> {
        let mut groups: Vec<(ChangeKind, LinkError, Vec<String>)> = Vec::new();
        for c in self.changes.drain(..) {
            // Cleared reads group by error alone; their spells may differ by
            // a cycle, and the first one's length is said.
            let same = |(kind, error, _): &&mut (ChangeKind, LinkError, Vec<String>)| {
                *error == c.error
                    && match (kind, c.kind) {
                        (ChangeKind::Cleared(..), ChangeKind::Cleared(..)) => true,
                        (k, other) => *k == other,
                    }
            };
            match groups.iter_mut().find(same) {
                Some(group) => group.2.push(c.what),
                None => groups.push((c.kind, c.error, vec![c.what])),
            }
        }
        groups
            .into_iter()
            .filter_map(|(kind, error, reads)| self.line(kind, &error, &reads))
            .collect()
    }

    fn line(&self, kind: ChangeKind, error: &LinkError, reads: &[String]) -> Option<Notice> {
        let device = &self.device;
        let (subject, values) = match reads {
            [one] => (one.clone(), "its values are"),
            many => (
                format!("{} reads ({})", many.len(), many.join("; ")),
                "their values are",
            ),
        };
        let hint = self.hint(error);
        match kind {
            ChangeKind::Started => Notice::warn(format!(
                "{device}: {subject}: {error}; {hint}; {values} flagged device_error until it answers"
            )),
            ChangeKind::Changed => {
                Notice::warn(format!("{device}: {subject}: now {error}; {hint}"))
            }
            ChangeKind::Cleared(after, cycles) => Notice::info(format!(
                "{device}: {subject}: answered again, after {} ({cycles} cycle{} with: {error})",
                spoken(after),
                if cycles == 1 { "" } else { "s" }
            )),
        }
    }

    fn hint(&self, error: &LinkError) -> String {
        match error {
            LinkError::Exception {
                code: code @ (4 | 10 | 11),
            } => format!(
                "{} (this device's unit_id is {})",
                exception_hint(*code),
                self.unit_id
            ),
            LinkError::Exception { code } => exception_hint(*code).to_owned(),
            LinkError::Malformed { got, wanted, .. } if got > wanted => {
                "more values than asked for is a device or gateway fault, never data to use".into()
            }
            LinkError::Malformed { .. } => {
                "a short reply is a device or gateway fault, never data to use".into()
            }
            _ => String::new(),
        }
    }
}

/// Readings flagged bad, per sensor: a sensor is a small index the caller
/// chooses (the poller: the tank's place on its device and the role), so
/// that this, which runs for every reading, hashes nothing.
#[derive(Debug, Default)]
pub struct ReadingWatch {
    sensors: Vec<Flagged>,
}

#[derive(Debug, Default)]
struct Flagged {
    /// When this sensor last had a line.
    last_line: Option<Instant>,
    /// Whether a spell of flagged readings is going on (said or not).
    in_spell: bool,
    /// Flagged readings not yet said, by flag.
    pending: BTreeMap<&'static str, u64>,
    /// Since when the readings have been good, inside a spell.
    good_since: Option<Instant>,
}

impl ReadingWatch {
    /// One reading of sensor `sensor` (tank `tank_id`'s `role`).
    pub fn saw(
        &mut self,
        sensor: usize,
        tank_id: &str,
        role: Role,
        quality: Quality,
        now: Instant,
    ) -> Option<Notice> {
        if sensor >= self.sensors.len() {
            self.sensors.resize_with(sensor + 1, Flagged::default);
        }
        let f = &mut self.sensors[sensor];
        let quiet = f
            .last_line
            .is_none_or(|t| now.duration_since(t) >= SUMMARY_EVERY);
        // Named only when a line is said: this runs for every reading.
        let who = || format!("{tank_id} {}", role.name());
        match quality {
            // The link and block watches say these, per device and read.
            Quality::CommunicationLost | Quality::DeviceError => None,
            Quality::Good => {
                if !f.in_spell {
                    return None;
                }
                let good_since = *f.good_since.get_or_insert(now);
                if !quiet {
                    return None;
                }
                if now.duration_since(good_since) >= GOOD_AGAIN_AFTER {
                    let more = if f.pending.is_empty() {
                        String::new()
                    } else {
                        format!("; since the last line {}", counted(&f.pending))
                    };
                    f.in_spell = false;
                    f.pending.clear();
                    f.good_since = None;
                    f.last_line = Some(now);
                    return Notice::info(format!(
                        "{}: readings good again for {}{more}",
                        who(),
                        spoken(now.duration_since(good_since))
                    ));
                }
                summary(f, who, now)
            }
            bad => {
                f.good_since = None;
                let starts = !f.in_spell;
                f.in_spell = true;
                if starts && quiet {
                    f.last_line = Some(now);
                    return Notice::warn(format!(
                        "{}: reading flagged {} ({}); more are summarised at most once a minute",
                        who(),
                        bad.key(),
                        bad.reason()
                    ));
                }
                *f.pending.entry(bad.key()).or_default() += 1;
                if quiet { summary(f, who, now) } else { None }
            }
        }
    }
}

/// The summary line of a sensor's pending flagged readings, if any.
fn summary(f: &mut Flagged, who: impl FnOnce() -> String, now: Instant) -> Option<Notice> {
    if f.pending.is_empty() {
        return None;
    }
    let over = f.last_line.map_or(SUMMARY_EVERY, |t| now.duration_since(t));
    let text = format!(
        "{}: {} in the last {} s",
        who(),
        counted(&f.pending),
        over.as_secs()
    );
    f.pending.clear();
    f.last_line = Some(now);
    Notice::warn(text)
}

/// "12 readings flagged not_a_number", or with several flags
/// "15 readings flagged (12 not_a_number, 3 out_of_range)".
fn counted(pending: &BTreeMap<&'static str, u64>) -> String {
    let total: u64 = pending.values().sum();
    let noun = if total == 1 { "reading" } else { "readings" };
    if let [(flag, _)] = pending.iter().collect::<Vec<_>>().as_slice() {
        return format!("{total} {noun} flagged {flag}");
    }
    let parts: Vec<String> = pending.iter().map(|(k, n)| format!("{n} {k}")).collect();
    format!("{total} {noun} flagged ({})", parts.join(", "))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn at(base: Instant, seconds: f64) -> Instant {
        base + Duration::from_secs_f64(seconds)
    }

    #[test]
    fn an_outage_is_two_lines_whatever_its_length() {
        let t0 = Instant::now();
        let mut link = LinkWatch::new("rtu-west at 127.0.0.1:15020".into());
        assert!(
            link.answered(t0)
                .is_some_and(|n| n.text.ends_with("answering"))
        );
        let timeout = LinkError::Timeout(Duration::from_millis(400));
        let mut said = Vec::new();
        // A 30 s outage polled every second, each attempt timing out.
        for i in 0..30 {
            said.extend(link.failed(&timeout, at(t0, 1.0 + f64::from(i))));
        }
        said.extend(link.answered(at(t0, 31.5)));
        let loud: Vec<&Notice> = said.iter().filter(|n| n.level != Level::Debug).collect();
        assert_eq!(loud.len(), 2, "{said:#?}");
        assert_eq!(loud[0].level, Level::Warn);
        assert!(
            loud[0].text.contains("link down: no answer within 400 ms"),
            "{}",
            loud[0].text
        );
        assert_eq!(
            loud[1].text,
            "rtu-west at 127.0.0.1:15020: link back up after 30.5 s (30 failed attempts)"
        );
        // A new reason while down is said once; repeats are not.
        link.failed(&timeout, at(t0, 40.0));
        let refused = LinkError::Connect {
            address: "127.0.0.1:15020".into(),
            reason: "connection refused".into(),
        };
        let changed = link.failed(&refused, at(t0, 41.0)).unwrap();
        assert_eq!(changed.level, Level::Info);
        assert!(
            changed
                .text
                .contains("still down after 1.0 s, now: connecting"),
            "{}",
            changed.text
        );
        assert_eq!(
            link.failed(&refused, at(t0, 42.0)).unwrap().level,
            Level::Debug
        );
        assert_eq!(
            link.failed(&timeout, at(t0, 43.0)).unwrap().level,
            Level::Debug
        );
    }

    #[test]
    fn a_refused_read_is_said_when_it_starts_changes_and_clears() {
        let t0 = Instant::now();
        let mut blocks = BlockWatch::new("rtu-east".into(), 7);
        let key = |start| BlockKey {
            function: 3,
            start,
            count: 4,
        };
        let what = "function 03 holding registers 10..13";
        let busy = LinkError::Exception { code: 6 };
        blocks.refused(key(10), || what.into(), &busy, t0);
        let first = blocks.flush();
        assert_eq!(first.len(), 1);
        assert_eq!(first[0].level, Level::Warn);
        assert!(
            first[0]
                .text
                .contains("10..13: the device answered exception 6 (server device busy)"),
            "{}",
            first[0].text
        );
        assert!(
            first[0].text.contains("should clear by itself"),
            "{}",
            first[0].text
        );
        for i in 1..10 {
            blocks.refused(key(10), || what.into(), &busy, at(t0, f64::from(i)));
            assert_eq!(blocks.flush(), []);
        }
        let gateway = LinkError::Exception { code: 11 };
        blocks.refused(key(10), || what.into(), &gateway, at(t0, 10.0));
        let changed = blocks.flush();
        assert!(
            changed[0]
                .text
                .contains(": now the device answered exception 11"),
            "{}",
            changed[0].text
        );
        assert!(
            changed[0].text.contains("unit_id is 7"),
            "{}",
            changed[0].text
        );
        blocks.answered(key(10), || what.into(), at(t0, 12.0));
        let clear = blocks.flush();
        assert_eq!(clear[0].level, Level::Info);
        assert!(
            clear[0]
                .text
                .contains("answered again, after 12.0 s (11 cycles"),
            "{}",
            clear[0].text
        );
        blocks.answered(key(10), || what.into(), at(t0, 13.0));
        assert_eq!(blocks.flush(), []);
        let long = LinkError::Malformed {
            got: 6,
            wanted: 4,
            what: "registers",
        };
        blocks.refused(key(10), || what.into(), &long, at(t0, 14.0));
        let text = &blocks.flush()[0].text;
        assert!(
            text.contains("answered 6 registers where 4 were asked for"),
            "{text}"
        );
        assert!(text.contains("more values than asked"), "{text}");
    }

    /// A device that refuses all its reads at once gets one line for them,
    /// and one when they all answer again.
    #[test]
    fn reads_refused_together_are_said_together() {
        let t0 = Instant::now();
        let mut blocks = BlockWatch::new("rtu-east".into(), 9);
        let gateway = LinkError::Exception { code: 11 };
        for start in [0u16, 10, 20] {
            let key = BlockKey {
                function: 3,
                start,
                count: 2,
            };
            blocks.refused(key, || format!("holding {start}"), &gateway, t0);
        }
        let said = blocks.flush();
        assert_eq!(said.len(), 1, "{said:#?}");
        assert!(said[0].text.starts_with("rtu-east: 3 reads (holding 0; holding 10; holding 20): the device answered exception 11"), "{}", said[0].text);
        assert!(
            said[0].text.contains("check unit_id") && said[0].text.contains("unit_id is 9"),
            "{}",
            said[0].text
        );
        for start in [0u16, 10, 20] {
            let key = BlockKey {
                function: 3,
                start,
                count: 2,
            };
            blocks.answered(
                key,
                || format!("holding {start}"),
                at(t0, 4.0 + f64::from(start) / 100.0),
            );
        }
        let said = blocks.flush();
        assert_eq!(said.len(), 1, "{said:#?}");
        assert!(
            said[0].text.contains(
                "3 reads (holding 0; holding 10; holding 20): answered again, after 4.0 s"
            ),
            "{}",
            said[0].text
        );
    }

    #[test]
    fn flagged_readings_are_said_first_then_once_a_minute_then_when_good() {
        let t0 = Instant::now();
        let mut watch = ReadingWatch::default();
        let mut said: Vec<(f64, Notice)> = Vec::new();
        // NaN for 150 s at 1 Hz, then good for 50 s.
        for i in 0..200 {
            let t = f64::from(i);
            let q = if i < 150 {
                Quality::NotANumber
            } else {
                Quality::Good
            };
            if let Some(n) = watch.saw(1, "FF-T14", Role::Level, q, at(t0, t)) {
                said.push((t, n));
            }
        }
        let times: Vec<f64> = said.iter().map(|(t, _)| *t).collect();
        // The last line waits for the minute since the one before.
        assert_eq!(times, [0.0, 60.0, 120.0, 180.0], "{said:#?}");
        assert!(
            said[0].1.text.starts_with(
                "FF-T14 level: reading flagged not_a_number (a float register held NaN"
            )
        );
        assert_eq!(
            said[1].1.text,
            "FF-T14 level: 60 readings flagged not_a_number in the last 60 s"
        );
        assert_eq!(
            said[3].1.text,
            "FF-T14 level: readings good again for 30.0 s; since the last line 29 readings flagged not_a_number"
        );
        // Lost and refused readings are not this watch's to say.
        for i in 0..100 {
            let t = 200.0 + f64::from(i);
            assert_eq!(
                watch.saw(
                    1,
                    "FF-T14",
                    Role::Level,
                    Quality::CommunicationLost,
                    at(t0, t)
                ),
                None
            );
        }
    }

    #[test]
    fn a_flapping_sensor_gets_at_most_a_line_a_minute() {
        let t0 = Instant::now();
        let mut watch = ReadingWatch::default();
        let mut lines = Vec::new();
        // Bad one second in twelve, for ten minutes; two flags.
        for i in 0..600u32 {
            let q = match i % 12 {
                0 => Quality::OutOfRange,
                6 => Quality::Stuck,
                _ => Quality::Good,
            };
            if let Some(n) = watch.saw(0, "FF-T12", Role::Level, q, at(t0, f64::from(i))) {
                lines.push((i, n.text));
            }
        }
        for pair in lines.windows(2) {
            assert!(pair[1].0 - pair[0].0 >= 60, "{lines:#?}");
        }
        assert!(lines.len() >= 9, "{lines:#?}");
        assert!(
            lines
                .iter()
                .any(|(_, t)| t.contains("(5 out_of_range, 5 stuck)")),
            "{lines:#?}"
        );
    }
}
