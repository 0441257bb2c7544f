//! The daemon's timeline: the times of samples, estimates and events,
//! which never go back and never jump, whatever the wall clock does.
//!
//! Sample times used to be read from the wall clock, which NTP, an
//! operator or a virtual machine's host can step. A step back of an hour
//! made every new sample older than the last one (the estimator skipped
//! them all and the running total froze for an hour); a step forward made
//! a gap of an hour (which the estimator bridged with its forecast, so the
//! total jumped). The timeline is instead the monotonic clock, which steps
//! never touch, anchored to the wall clock once: at start, never earlier
//! than the stored history (so a daemon started after the wall clock went
//! back still stores every sample in order). Every second the daemon
//! compares it with the wall clock; a jump in the difference is a step,
//! logged and recorded in the store's `clock_steps` table (not on each
//! sample: their rows stay as they are). The timeline does not follow a
//! step while any event is open; with none open it moves forward to the
//! wall clock (a gap in the history, recorded as `realigned`). It never
//! moves back: after the wall clock goes back, the timeline stays ahead of
//! it, by the step, until the daemon restarts after a stop longer than the
//! step (or the wall clock goes forward again). Times that come from the
//! wall clock of another process (the CLI's request times and `--since`)
//! are moved onto the timeline with [`Clock::from_wall`].
//!
//! Left out: slewing. NTP's slewing changes the monotonic clock and the
//! wall clock alike on Linux, so the two differ only by steps.

use std::sync::Mutex;
use std::sync::atomic::{AtomicI64, Ordering};
use tokio::time::Instant;

/// A change in the difference between the timeline and the wall clock
/// smaller than this is not taken for a step. Steps that NTP makes are
/// 128 ms or more (ntpd's default; chrony's is configurable), so a second
/// keeps sub-second corrections out of the log while catching any step
/// that would matter to a poll interval of a second or more.
pub const STEP_THRESHOLD_MS: i64 = 1_000;

/// Where the wall-clock time comes from: the system's clock in the daemon,
/// anything in tests.
pub type WallSource = Box<dyn Fn() -> i64 + Send + Sync>;

/// The system's wall clock, UTC milliseconds.
pub fn system_wall_ms() -> i64 {
    jiff::Timestamp::now().as_millisecond()
}

/// What happened to the timeline against the wall clock.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StepKind {
    /// The wall clock jumped; the timeline went on as it was.
    WallStep,
    /// The timeline moved forward to the wall clock (no event was open).
    Realigned,
    /// At start, the timeline was set just after the stored history,
    /// which the wall clock was behind.
    AnchoredAhead,
}

impl StepKind {
    pub fn name(self) -> &'static str {
        match self {
            StepKind::WallStep => "wall_step",
            StepKind::Realigned => "realigned",
            StepKind::AnchoredAhead => "anchored_ahead",
        }
    }
}

/// One step, as logged and stored.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ClockStep {
    pub kind: StepKind,
    /// The timeline when it was seen, UTC ms.
    pub at_ms: i64,
    /// The wall clock then, UTC ms.
    pub wall_ms: i64,
    /// How far the wall clock jumped (for a wall step; negative is back),
    /// or how far the timeline moved (realigned, anchored ahead).
    pub step_ms: i64,
    /// The timeline minus the wall clock afterwards.
    pub offset_ms: i64,
}

impl ClockStep {
    /// The step in words, for the log.
    pub fn describe(&self) -> String {
        let size = crate::report::duration(crate::model::TimeSpan::seconds(
            self.step_ms.unsigned_abs() as f64 / 1000.0,
        ));
        let ahead = crate::report::duration(crate::model::TimeSpan::seconds(
            self.offset_ms.unsigned_abs() as f64 / 1000.0,
        ));
        let relation = match self.offset_ms {
            o if o.abs() < STEP_THRESHOLD_MS => "in step with the wall clock".to_owned(),
            o if o > 0 => format!("{ahead} ahead of the wall clock"),
            _ => format!("{ahead} behind the wall clock"),
        };
        match self.kind {
            StepKind::WallStep => format!(
                "the wall clock stepped {} by {size}; sample times go on from the monotonic clock, without a gap or a jump back, and now run {relation}",
                if self.step_ms < 0 { "back" } else { "forward" }
            ),
            StepKind::Realigned => format!(
                "no event is open, so the timeline moved forward by {size} to the wall clock (a gap in the stored history, recorded as a clock step); it is now {relation}"
            ),
            StepKind::AnchoredAhead => format!(
                "the wall clock is behind the stored history, so the timeline starts just after it, {relation}, to keep every sample in order"
            ),
        }
    }
}

/// The timeline. Cheap to read from any thread.
pub struct Clock {
    wall: WallSource,
    origin: Instant,
    /// The timeline at `origin`, UTC ms; only ever raised.
    origin_ms: AtomicI64,
    state: Mutex<State>,
}

struct State {
    /// The timeline minus the wall clock at the last look.
    seen_offset_ms: i64,
    /// Steps seen but not yet stored.
    pending: Vec<ClockStep>,
}

impl Clock {
    /// The system's clocks, anchored at the wall clock now.
    pub fn system() -> Self {
        Self::anchored(Box::new(system_wall_ms), None)
    }

    /// Anchored at the wall clock now, or just after `floor_ms` (the latest
    /// stored time) when the wall clock is not past it: the stored history
    /// stays in order whatever the wall clock says.
    pub fn anchored(wall: WallSource, floor_ms: Option<i64>) -> Self {
        let origin = Instant::now();
        let wall_now = wall();
        let start = match floor_ms {
            Some(floor) if floor >= wall_now => floor + 1,
            _ => wall_now,
        };
        let offset = start - wall_now;
        let mut pending = Vec::new();
        if offset > 0 {
            pending.push(ClockStep {
                kind: StepKind::AnchoredAhead,
                at_ms: start,
                wall_ms: wall_now,
                step_ms: offset,
                offset_ms: offset,
            });
        }
        Self {
            wall,
            origin,
            origin_ms: AtomicI64::new(start),
            state: Mutex::new(State {
                seen_offset_ms: offset,
                pending,
            }),
        }
    }

    /// The timeline now, UTC ms: never less than any earlier reading.
    pub fn now_ms(&self) -> i64 {
        let elapsed = Instant::now().duration_since(self.origin).as_millis() as i64;
        self.origin_ms.load(Ordering::Acquire) + elapsed
    }

    /// The wall clock now, UTC ms.
    pub fn wall_ms(&self) -> i64 {
        (self.wall)()
    }

    /// The timeline minus the wall clock, now.
    pub fn offset_ms(&self) -> i64 {
        self.now_ms() - self.wall_ms()
    }

    /// A wall-clock time (another process's, such as the CLI's) on the
    /// timeline.
    pub fn from_wall(&self, wall_ms: i64) -> i64 {
        wall_ms.saturating_add(self.offset_ms())
    }

    /// Looks for a wall-clock step since the last look and, when
    /// `may_realign` (no event is open), moves a timeline that is behind
    /// the wall clock forward to it. Returns what happened (also kept for
    /// [`Clock::take_pending`]).
    pub fn check(&self, may_realign: bool) -> Vec<ClockStep> {
        let mut state = self.state.lock().unwrap_or_else(|p| p.into_inner());
        let (now, wall) = (self.now_ms(), self.wall_ms());
        let offset = now - wall;
        let mut seen = Vec::new();
        if (offset - state.seen_offset_ms).abs() >= STEP_THRESHOLD_MS {
            seen.push(ClockStep {
                kind: StepKind::WallStep,
                at_ms: now,
                wall_ms: wall,
                step_ms: state.seen_offset_ms - offset,
                offset_ms: offset,
            });
            state.seen_offset_ms = offset;
        }
        if may_realign && offset <= -STEP_THRESHOLD_MS {
            self.origin_ms.fetch_add(-offset, Ordering::AcqRel);
            let now = self.now_ms();
            let offset_after = now - wall;
            seen.push(ClockStep {
                kind: StepKind::Realigned,
                at_ms: now,
                wall_ms: wall,
                step_ms: -offset,
                offset_ms: offset_after,
            });
            state.seen_offset_ms = offset_after;
        }
        state.pending.extend_from_slice(&seen);
        seen
    }

    /// The steps not yet stored, oldest first; give them back with
    /// [`Clock::restore_pending`] if storing fails.
    pub fn take_pending(&self) -> Vec<ClockStep> {
        let mut state = self.state.lock().unwrap_or_else(|p| p.into_inner());
        std::mem::take(&mut state.pending)
    }

    pub fn restore_pending(&self, mut steps: Vec<ClockStep>) {
        let mut state = self.state.lock().unwrap_or_else(|p| p.into_inner());
        steps.append(&mut state.pending);
        state.pending = steps;
    }
}

/// A wall clock for tests: the paused tokio clock plus an offset that the
/// test steps.
#[cfg(test)]
pub mod testing {
    use super::*;
    use std::sync::Arc;

    #[derive(Clone)]
    pub struct SteppedWall {
        base_ms: i64,
        origin: Instant,
        step_ms: Arc<AtomicI64>,
    }

    impl SteppedWall {
        pub fn new(base_ms: i64) -> Self {
            Self {
                base_ms,
                origin: Instant::now(),
                step_ms: Arc::new(AtomicI64::new(0)),
            }
        }

        /// Steps the wall clock by `ms` (negative: back).
        pub fn step(&self, ms: i64) {
            self.step_ms.fetch_add(ms, Ordering::SeqCst);
        }

        pub fn now_ms(&self) -> i64 {
            self.base_ms
                + Instant::now().duration_since(self.origin).as_millis() as i64
                + self.step_ms.load(Ordering::SeqCst)
        }

        pub fn source(&self) -> WallSource {
            let me = self.clone();
            Box::new(move || me.now_ms())
        }
    }
}

#[cfg(test)]
mod tests {
    use super::testing::SteppedWall;
    use super::*;
    use std::time::Duration;

    const BASE: i64 = 1_780_000_000_000;

    #[tokio::test(start_paused = true)]
    async fn steps_back_and_forward_leave_the_timeline_alone_while_events_are_open() {
        let wall = SteppedWall::new(BASE);
        let clock = Clock::anchored(wall.source(), None);
        assert_eq!(clock.now_ms(), BASE);
        let mut last = clock.now_ms();
        for second in 1..=30 {
            tokio::time::sleep(Duration::from_secs(1)).await;
            match second {
                10 => wall.step(-3_600_000),
                20 => wall.step(3_600_000),
                _ => {}
            }
            let steps = clock.check(false);
            let now = clock.now_ms();
            assert_eq!(now - last, 1000, "second {second}");
            last = now;
            match second {
                10 => {
                    assert_eq!(steps.len(), 1, "{steps:?}");
                    assert_eq!(steps[0].kind, StepKind::WallStep);
                    assert_eq!(steps[0].step_ms, -3_600_000);
                    assert_eq!(steps[0].offset_ms, 3_600_000);
                    assert!(steps[0].describe().contains("stepped back by 1 h"));
                }
                20 => {
                    assert_eq!(steps[0].step_ms, 3_600_000);
                    assert_eq!(steps[0].offset_ms, 0);
                }
                _ => assert!(steps.is_empty(), "second {second}: {steps:?}"),
            }
        }
        assert_eq!(clock.take_pending().len(), 2);
        assert!(clock.take_pending().is_empty());
        // A request made on the wall clock 5 s ago, while the wall clock
        // is an hour behind, lands 5 s ago on the timeline.
        wall.step(-3_600_000);
        clock.check(false);
        assert_eq!(
            clock.from_wall(wall.now_ms() - 5_000),
            clock.now_ms() - 5_000
        );
    }

    #[tokio::test(start_paused = true)]
    async fn a_forward_step_is_followed_only_with_no_event_open_and_a_back_step_never() {
        let wall = SteppedWall::new(BASE);
        let clock = Clock::anchored(wall.source(), None);
        wall.step(600_000);
        tokio::time::sleep(Duration::from_secs(1)).await;
        let before = clock.now_ms();
        assert_eq!(clock.check(false).len(), 1);
        assert_eq!(
            clock.now_ms(),
            before,
            "not followed while an event is open"
        );
        let steps = clock.check(true);
        assert_eq!(steps.len(), 1, "{steps:?}");
        assert_eq!(steps[0].kind, StepKind::Realigned);
        assert_eq!(clock.now_ms(), before + 600_000);
        assert_eq!(clock.offset_ms(), 0);

        wall.step(-600_000);
        tokio::time::sleep(Duration::from_secs(1)).await;
        let before = clock.now_ms();
        let steps = clock.check(true);
        assert_eq!(steps.len(), 1);
        assert_eq!(steps[0].kind, StepKind::WallStep);
        assert_eq!(clock.now_ms(), before, "never back");
        assert_eq!(clock.offset_ms(), 600_000);
    }

    #[tokio::test(start_paused = true)]
    async fn a_start_behind_the_stored_history_anchors_after_it() {
        let wall = SteppedWall::new(BASE);
        let clock = Clock::anchored(wall.source(), Some(BASE + 3_600_000));
        assert_eq!(clock.now_ms(), BASE + 3_600_001);
        let pending = clock.take_pending();
        assert_eq!(pending.len(), 1);
        assert_eq!(pending[0].kind, StepKind::AnchoredAhead);
        assert!(clock.check(false).is_empty(), "the anchoring is not a step");
        let ahead_of_nothing = Clock::anchored(wall.source(), Some(BASE - 10));
        assert!(ahead_of_nothing.take_pending().is_empty());
        assert!((ahead_of_nothing.now_ms() - wall.now_ms()).abs() < 5);
    }
}
