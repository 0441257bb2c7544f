//! The daemon's heartbeat row (what readers tell a live, busy, stalled or
//! gone daemon by), the recorded clock steps, and the latest time anything
//! stored carries.

use super::{StoreResult, unit};
use rusqlite::{Connection, OptionalExtension, params};
use serde::Serialize;

/// The daemon's heartbeat row.
#[derive(Debug, Clone, PartialEq)]
pub struct Heartbeat {
    pub pid: i64,
    pub started_at_ms: i64,
    /// The last beat on the daemon's timeline.
    pub beat_at_ms: i64,
    pub config: String,
    pub stopped_at_ms: Option<i64>,
    /// The last beat on the wall clock (absent before schema version 3).
    pub beat_wall_ms: Option<i64>,
    /// The daemon's timeline minus the wall clock at the last beat.
    pub clock_offset_ms: Option<i64>,
    /// When the daemon's main loop last turned, on the wall clock.
    pub loop_wall_ms: Option<i64>,
    /// What the daemon was doing at the last beat.
    pub activity: Option<String>,
}

impl Heartbeat {
    /// Whether the daemon that beat last is a live leaktally process on
    /// this machine (read from /proc; false elsewhere). A daemon whose
    /// database is locked or full cannot beat, but is still running, and
    /// a second one must not be started beside it.
    pub fn process_alive(&self) -> bool {
        if self.stopped_at_ms.is_some() {
            return false;
        }
        std::fs::read_to_string(format!("/proc/{}/comm", self.pid))
            .is_ok_and(|comm| comm.trim_end() == "leaktally")
    }

    /// How long ago (ms) the daemon beat, by a reader's wall clock
    /// `now_wall_ms`: wall against wall, so that the daemon's timeline
    /// running ahead of or behind the wall clock does not count.
    pub fn age_ms(&self, now_wall_ms: i64) -> i64 {
        now_wall_ms - self.beat_wall_ms.unwrap_or(self.beat_at_ms)
    }

    /// How long ago (ms) the daemon's main loop last turned, by a reader's
    /// wall clock; None if it does not say.
    pub fn loop_age_ms(&self, now_wall_ms: i64) -> Option<i64> {
        self.loop_wall_ms.map(|at| now_wall_ms - at)
    }
}

/// A heartbeat older than this (by the wall clock) means the daemon is not
/// writing to the database.
pub const SILENT_AFTER_MS: i64 = 5_000;
/// A main loop that has not turned for this long, under a fresh heartbeat,
/// means the daemon is busy.
pub const BUSY_AFTER_MS: i64 = 5_000;

/// What a reader can tell of the daemon from its heartbeat row.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum DaemonState {
    /// Beating, its main loop turning.
    Running,
    /// Beating, but its main loop has not turned for `for_ms`: it is busy
    /// with `activity`.
    Busy { for_ms: i64, activity: String },
    /// Its process is alive but has not beaten: it cannot write to the
    /// database (locked, full, or a disk that does not answer).
    Stalled,
    /// No daemon: stopped, or its process has gone.
    NotRunning,
}

impl DaemonState {
    pub fn name(&self) -> &'static str {
        match self {
            DaemonState::Running => "running",
            DaemonState::Busy { .. } => "busy",
            DaemonState::Stalled => "stalled",
            DaemonState::NotRunning => "not_running",
        }
    }
}

impl Heartbeat {
    /// The daemon's state, by a reader's wall clock `now_wall_ms`. A fresh
    /// heartbeat counts as running even if the process has just died (the
    /// seconds after a kill -9): the beat goes stale within
    /// [`SILENT_AFTER_MS`].
    pub fn state(&self, now_wall_ms: i64) -> DaemonState {
        if self.stopped_at_ms.is_some() {
            return DaemonState::NotRunning;
        }
        if self.age_ms(now_wall_ms) <= SILENT_AFTER_MS {
            return match self.loop_age_ms(now_wall_ms) {
                Some(age) if age > BUSY_AFTER_MS => DaemonState::Busy {
                    for_ms: age,
                    activity: self.activity.clone().unwrap_or_default(),
                },
                _ => DaemonState::Running,
            };
        }
        if self.process_alive() {
            DaemonState::Stalled
        } else {
            DaemonState::NotRunning
        }
    }
}

/// What the daemon writes into its heartbeat row.
#[derive(Debug, Clone, PartialEq)]
pub struct Beat {
    pub pid: u32,
    pub started_at_ms: i64,
    pub config: String,
    /// The beat on the daemon's timeline and on the wall clock.
    pub at_ms: i64,
    pub wall_ms: i64,
    pub loop_wall_ms: i64,
    pub activity: String,
}

/// Beats now (timeline and wall clock alike), saying nothing of the loop:
/// for tests and tools that stand in for a daemon.
pub fn beat(conn: &Connection, pid: u32, started_at_ms: i64, config: &str) -> StoreResult<()> {
    let now = super::now_ms();
    beat_with(
        conn,
        &Beat {
            pid,
            started_at_ms,
            config: config.to_owned(),
            at_ms: now,
            wall_ms: now,
            loop_wall_ms: now,
            activity: "polling".into(),
        },
    )
}

pub fn beat_with(conn: &Connection, b: &Beat) -> StoreResult<()> {
    unit::execute(conn,
        "INSERT INTO daemon (id, pid, started_at_ms, beat_at_ms, config, beat_wall_ms, clock_offset_ms, loop_wall_ms, activity)
         VALUES (1, ?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)
         ON CONFLICT (id) DO UPDATE SET pid = ?1, started_at_ms = ?2, beat_at_ms = ?3, config = ?4, stopped_at_ms = NULL,
             beat_wall_ms = ?5, clock_offset_ms = ?6, loop_wall_ms = ?7, activity = ?8",
        params![
            b.pid,
            b.started_at_ms,
            b.at_ms,
            b.config,
            b.wall_ms,
            b.at_ms - b.wall_ms,
            b.loop_wall_ms,
            b.activity
        ],
    )?;
    Ok(())
}

pub fn mark_stopped(conn: &Connection) -> StoreResult<()> {
    let now = super::now_ms();
    mark_stopped_at(conn, now, now)
}

pub fn mark_stopped_at(conn: &Connection, at_ms: i64, wall_ms: i64) -> StoreResult<()> {
    unit::execute(
        conn,
        "UPDATE daemon SET stopped_at_ms = ?1, beat_wall_ms = ?2, activity = 'stopped' WHERE id = 1",
        params![at_ms, wall_ms],
    )?;
    Ok(())
}

pub fn heartbeat(conn: &Connection) -> StoreResult<Option<Heartbeat>> {
    Ok(conn
        .query_row(
            "SELECT pid, started_at_ms, beat_at_ms, config, stopped_at_ms, beat_wall_ms, clock_offset_ms, loop_wall_ms, activity
             FROM daemon WHERE id = 1",
            [],
            |r| {
                Ok(Heartbeat {
                    pid: r.get(0)?,
                    started_at_ms: r.get(1)?,
                    beat_at_ms: r.get(2)?,
                    config: r.get(3)?,
                    stopped_at_ms: r.get(4)?,
                    beat_wall_ms: r.get(5)?,
                    clock_offset_ms: r.get(6)?,
                    loop_wall_ms: r.get(7)?,
                    activity: r.get(8)?,
                })
            },
        )
        .optional()?)
}

/// The latest time anything stored carries (the heartbeat, the newest
/// sample of any tank), so that a restarted daemon's timeline starts after
/// it. One index lookup per sample set.
pub fn latest_stored_ms(conn: &Connection) -> StoreResult<Option<i64>> {
    let beat: Option<i64> = conn
        .query_row(
            "SELECT MAX(beat_at_ms, COALESCE(stopped_at_ms, beat_at_ms)) FROM daemon WHERE id = 1",
            [],
            |r| r.get(0),
        )
        .optional()?
        .flatten();
    let sample = super::samples::newest_sample_ms(conn)?;
    Ok(beat.max(sample))
}

/// Records a step of the wall clock (or what the timeline did about one).
pub fn record_clock_step(conn: &Connection, step: &crate::clock::ClockStep) -> StoreResult<()> {
    unit::execute(
        conn,
        "INSERT INTO clock_steps (kind, at_ms, wall_ms, step_ms, offset_ms) VALUES (?1, ?2, ?3, ?4, ?5)",
        params![
            step.kind.name(),
            step.at_ms,
            step.wall_ms,
            step.step_ms,
            step.offset_ms
        ],
    )?;
    Ok(())
}

/// A recorded clock step: kind, timeline time, wall time, step, offset.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct ClockStepRow {
    pub kind: String,
    pub at_ms: i64,
    pub wall_ms: i64,
    pub step_ms: i64,
    pub offset_ms: i64,
}

/// Every recorded clock step, oldest first.
pub fn clock_steps(conn: &Connection) -> StoreResult<Vec<ClockStepRow>> {
    let mut stmt = conn
        .prepare("SELECT kind, at_ms, wall_ms, step_ms, offset_ms FROM clock_steps ORDER BY id")?;
    let rows = stmt.query_map([], |r| {
        Ok(ClockStepRow {
            kind: r.get(0)?,
            at_ms: r.get(1)?,
            wall_ms: r.get(2)?,
            step_ms: r.get(3)?,
            offset_ms: r.get(4)?,
        })
    })?;
    Ok(rows.collect::<Result<_, _>>()?)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn beat(at_ms: i64, wall_ms: i64, loop_wall_ms: i64) -> Heartbeat {
        Heartbeat {
            pid: i64::from(u32::MAX), // no such process
            started_at_ms: 0,
            beat_at_ms: at_ms,
            config: "site.toml".into(),
            stopped_at_ms: None,
            beat_wall_ms: Some(wall_ms),
            clock_offset_ms: Some(at_ms - wall_ms),
            loop_wall_ms: Some(loop_wall_ms),
            activity: Some("storing 300 held poll cycle(s)".into()),
        }
    }

    /// Readers judge the heartbeat by the wall clock on both sides: a
    /// daemon whose timeline runs an hour ahead (or behind) after a clock
    /// step is still running; one whose loop has not turned for 6 s is busy
    /// with what it says; a stale beat of a process that is gone, or a
    /// stopped daemon, is not running.
    #[test]
    fn the_daemon_state_is_judged_by_the_wall_clock() {
        let now = 1_780_000_000_000;
        let hour = 3_600_000;
        assert_eq!(
            beat(now + hour, now - 500, now - 200).state(now),
            DaemonState::Running
        );
        assert_eq!(
            beat(now - hour, now - 500, now - 200).state(now),
            DaemonState::Running
        );
        assert_eq!(
            beat(now, now - 500, now - 6_000).state(now),
            DaemonState::Busy {
                for_ms: 6_000,
                activity: "storing 300 held poll cycle(s)".into()
            }
        );
        assert_eq!(
            beat(now, now - 6_000, now - 6_000).state(now),
            DaemonState::NotRunning
        );
        let mut stopped = beat(now, now, now);
        stopped.stopped_at_ms = Some(now);
        assert_eq!(stopped.state(now), DaemonState::NotRunning);
        // Rows from before schema version 3 have no wall-clock beat.
        let mut old = beat(now - 1000, 0, 0);
        (old.beat_wall_ms, old.loop_wall_ms) = (None, None);
        assert_eq!(old.state(now), DaemonState::Running);
    }
}
