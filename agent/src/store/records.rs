//! The rows the store keeps, and the SQL that reads and writes them.
//!
//! Each function takes a connection (or transaction) and does one thing;
//! callers choose the transaction boundaries. Times are UTC milliseconds.

use super::{StoreError, StoreResult};
use crate::acquire::sample::{Quality, Reading, TankSample};
use crate::estimate::{Estimate, LeakParams};
use rusqlite::{Connection, OptionalExtension, params};
use serde::{Deserialize, Serialize};

fn quality_name(q: Quality) -> &'static str {
    match q {
        Quality::Good => "good",
        Quality::CommunicationLost => "communication_lost",
        Quality::DeviceError => "device_error",
        Quality::OutOfRange => "out_of_range",
        Quality::Stuck => "stuck",
        Quality::NotANumber => "not_a_number",
        Quality::ImplausibleStep => "implausible_step",
    }
}

fn quality_from(name: &str) -> StoreResult<Quality> {
    Ok(match name {
        "good" => Quality::Good,
        "communication_lost" => Quality::CommunicationLost,
        "device_error" => Quality::DeviceError,
        "out_of_range" => Quality::OutOfRange,
        "stuck" => Quality::Stuck,
        "not_a_number" => Quality::NotANumber,
        "implausible_step" => Quality::ImplausibleStep,
        other => {
            return Err(StoreError::Corrupt(format!(
                "unknown sample quality {other:?}"
            )));
        }
    })
}

/// Makes sure every tank tag has a row.
pub fn register_tanks<'a>(
    conn: &Connection,
    tags: impl IntoIterator<Item = &'a str>,
) -> StoreResult<()> {
    let mut stmt = conn.prepare_cached("INSERT OR IGNORE INTO tanks (tag) VALUES (?1)")?;
    for tag in tags {
        stmt.execute([tag])?;
    }
    Ok(())
}

/// Stores samples; one already stored (same tank and time) is left as it
/// was. Returns how many were new.
pub fn insert_samples(conn: &Connection, samples: &[TankSample]) -> StoreResult<usize> {
    let mut stmt = conn.prepare_cached(
        "INSERT OR IGNORE INTO samples (tank, at_ms, level, level_q, pressure, pressure_q, transfer, transfer_q, flag, temperature, temperature_q)
         VALUES ((SELECT id FROM tanks WHERE tag = ?1), ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
    )?;
    let mut new = 0;
    for s in samples {
        let value = |r: &Reading| r.value.filter(|v| v.is_finite() && r.is_good());
        let flag: Option<i64> = s.leak_flag.map(|f| match f {
            Some(true) => 1,
            Some(false) => 0,
            None => 2,
        });
        new += stmt.execute(params![
            s.tank_id,
            s.at_ms,
            value(&s.level),
            quality_name(s.level.quality),
            s.pressure.as_ref().and_then(value),
            s.pressure.map(|r| quality_name(r.quality)),
            s.transfer.as_ref().and_then(value),
            s.transfer.map(|r| quality_name(r.quality)),
            flag,
            s.temperature.as_ref().and_then(value),
            s.temperature.map(|r| quality_name(r.quality)),
        ])?;
    }
    Ok(new)
}

/// The samples of a tank from `from_ms` to `to_ms` inclusive, in time order.
pub fn samples_between(
    conn: &Connection,
    tank: &str,
    from_ms: i64,
    to_ms: i64,
) -> StoreResult<Vec<TankSample>> {
    let mut stmt = conn.prepare_cached(
        "SELECT s.at_ms, s.level, s.level_q, s.pressure, s.pressure_q, s.transfer, s.transfer_q, s.flag, s.temperature, s.temperature_q
         FROM samples s JOIN tanks t ON t.id = s.tank
         WHERE t.tag = ?1 AND s.at_ms BETWEEN ?2 AND ?3 ORDER BY s.at_ms",
    )?;
    let rows = stmt.query_map(params![tank, from_ms, to_ms], |r| {
        Ok((
            r.get::<_, i64>(0)?,
            r.get::<_, Option<f64>>(1)?,
            r.get::<_, String>(2)?,
            r.get::<_, Option<f64>>(3)?,
            r.get::<_, Option<String>>(4)?,
            r.get::<_, Option<f64>>(5)?,
            r.get::<_, Option<String>>(6)?,
            r.get::<_, Option<i64>>(7)?,
            r.get::<_, Option<f64>>(8)?,
            r.get::<_, Option<String>>(9)?,
        ))
    })?;
    let mut out = Vec::new();
    for row in rows {
        let (
            at_ms,
            level,
            level_q,
            pressure,
            pressure_q,
            transfer,
            transfer_q,
            flag,
            temperature,
            temperature_q,
        ) = row?;
        let reading = |value: Option<f64>, q: &str| -> StoreResult<Reading> {
            Ok(Reading {
                value,
                quality: quality_from(q)?,
            })
        };
        out.push(TankSample {
            tank: 0,
            tank_id: tank.to_owned(),
            at_ms,
            level: reading(level, &level_q)?,
            pressure: pressure_q
                .as_deref()
                .map(|q| reading(pressure, q))
                .transpose()?,
            transfer: transfer_q
                .as_deref()
                .map(|q| reading(transfer, q))
                .transpose()?,
            temperature: temperature_q
                .as_deref()
                .map(|q| reading(temperature, q))
                .transpose()?,
            leak_flag: flag.map(|f| match f {
                0 => Some(false),
                1 => Some(true),
                _ => None,
            }),
        });
    }
    Ok(out)
}

/// Whether a good level of `tank` is stored within `slack_ms` either side
/// of `at_ms`: whether the logged history covers that moment.
pub fn good_level_near(
    conn: &Connection,
    tank: &str,
    at_ms: i64,
    slack_ms: i64,
) -> StoreResult<bool> {
    Ok(conn.query_row(
        "SELECT EXISTS (SELECT 1 FROM samples s JOIN tanks t ON t.id = s.tank
                        WHERE t.tag = ?1 AND s.at_ms BETWEEN ?2 AND ?3 AND s.level_q = 'good')",
        params![
            tank,
            at_ms.saturating_sub(slack_ms),
            at_ms.saturating_add(slack_ms)
        ],
        |r| r.get(0),
    )?)
}

/// The time of a tank's oldest stored sample.
pub fn first_sample_ms(conn: &Connection, tank: &str) -> StoreResult<Option<i64>> {
    Ok(conn.query_row(
        "SELECT MIN(s.at_ms) FROM samples s JOIN tanks t ON t.id = s.tank WHERE t.tag = ?1",
        [tank],
        |r| r.get(0),
    )?)
}

/// Counts the samples of a tank, and how many share a timestamp (which the
/// primary key forbids; tests check it anyway).
pub fn sample_count(conn: &Connection, tank: &str) -> StoreResult<(i64, i64)> {
    Ok(conn.query_row(
        "SELECT COUNT(*), COUNT(*) - COUNT(DISTINCT s.at_ms) FROM samples s JOIN tanks t ON t.id = s.tank WHERE t.tag = ?1",
        [tank],
        |r| Ok((r.get(0)?, r.get(1)?)),
    )?)
}

/// A leak event.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EventRow {
    pub id: i64,
    pub tank: String,
    pub opened_at_ms: i64,
    pub start_ms: i64,
    pub closed_at_ms: Option<i64>,
    /// "operator" or "leak flag".
    pub source: String,
    pub revision: i64,
    pub params: LeakParams,
}

fn event_from_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<(EventRow, String)> {
    Ok((
        EventRow {
            id: r.get(0)?,
            tank: r.get(1)?,
            opened_at_ms: r.get(2)?,
            start_ms: r.get(3)?,
            closed_at_ms: r.get(4)?,
            source: r.get(5)?,
            revision: r.get(6)?,
            params: LeakParams::default(),
        },
        r.get(7)?,
    ))
}

fn parse_params((mut event, json): (EventRow, String)) -> StoreResult<EventRow> {
    event.params = serde_json::from_str(&json)
        .map_err(|e| StoreError::Corrupt(format!("event {} parameters: {e}", event.id)))?;
    Ok(event)
}

const EVENT_COLUMNS: &str =
    "id, tank, opened_at_ms, start_ms, closed_at_ms, source, revision, params";

/// Every event, newest first; only open ones if `open_only`.
pub fn events(conn: &Connection, open_only: bool) -> StoreResult<Vec<EventRow>> {
    let sql = format!(
        "SELECT {EVENT_COLUMNS} FROM events {} ORDER BY id DESC",
        if open_only {
            "WHERE closed_at_ms IS NULL"
        } else {
            ""
        }
    );
    let mut stmt = conn.prepare(&sql)?;
    let rows = stmt.query_map([], event_from_row)?;
    rows.map(|r| parse_params(r?)).collect()
}

/// One event by id.
pub fn event(conn: &Connection, id: i64) -> StoreResult<Option<EventRow>> {
    let sql = format!("SELECT {EVENT_COLUMNS} FROM events WHERE id = ?1");
    conn.query_row(&sql, [id], event_from_row)
        .optional()?
        .map(parse_params)
        .transpose()
}

/// Creates an event and returns its id.
pub fn create_event(
    conn: &Connection,
    tank: &str,
    opened_at_ms: i64,
    start_ms: i64,
    source: &str,
    params: &LeakParams,
) -> StoreResult<i64> {
    conn.execute(
        "INSERT INTO events (tank, opened_at_ms, start_ms, source, revision, params) VALUES (?1, ?2, ?3, ?4, 1, ?5)",
        params![tank, opened_at_ms, start_ms, source, json(params)?],
    )?;
    Ok(conn.last_insert_rowid())
}

/// Gives an event new parameters as its next revision; returns the revision.
pub fn revise_event(conn: &Connection, id: i64, params: &LeakParams) -> StoreResult<i64> {
    conn.execute(
        "UPDATE events SET revision = revision + 1, params = ?2 WHERE id = ?1",
        params![id, json(params)?],
    )?;
    Ok(
        conn.query_row("SELECT revision FROM events WHERE id = ?1", [id], |r| {
            r.get(0)
        })?,
    )
}

pub fn close_event(conn: &Connection, id: i64, at_ms: i64) -> StoreResult<()> {
    conn.execute(
        "UPDATE events SET closed_at_ms = ?2, tracking_error = NULL WHERE id = ?1 AND closed_at_ms IS NULL",
        params![id, at_ms],
    )?;
    Ok(())
}

/// Drops an event's estimates and crossings after `at_ms` (every revision).
pub fn drop_estimates_after(conn: &Connection, event: i64, at_ms: i64) -> StoreResult<()> {
    conn.execute(
        "DELETE FROM estimates WHERE event = ?1 AND at_ms > ?2",
        params![event, at_ms],
    )?;
    conn.execute(
        "DELETE FROM crossings WHERE event = ?1 AND at_ms > ?2",
        params![event, at_ms],
    )?;
    Ok(())
}

/// The open event of a tank (the newest, should there be more).
pub fn open_event_of_tank(conn: &Connection, tank: &str) -> StoreResult<Option<EventRow>> {
    let sql = format!(
        "SELECT {EVENT_COLUMNS} FROM events WHERE tank = ?1 AND closed_at_ms IS NULL ORDER BY id DESC LIMIT 1"
    );
    conn.query_row(&sql, [tank], event_from_row)
        .optional()?
        .map(parse_params)
        .transpose()
}

/// Marks an open event as not tracked, and why; None clears it.
pub fn set_tracking_error(conn: &Connection, event: i64, why: Option<&str>) -> StoreResult<()> {
    conn.execute(
        "UPDATE events SET tracking_error = ?2 WHERE id = ?1",
        params![event, why],
    )?;
    Ok(())
}

/// Why each open event that is not tracked is not, by event id.
pub fn tracking_errors(conn: &Connection) -> StoreResult<std::collections::HashMap<i64, String>> {
    let mut stmt = conn.prepare(
        "SELECT id, tracking_error FROM events WHERE closed_at_ms IS NULL AND tracking_error IS NOT NULL",
    )?;
    let rows = stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))?;
    Ok(rows.collect::<Result<_, _>>()?)
}

fn json<T: Serialize>(value: &T) -> StoreResult<String> {
    serde_json::to_string(value).map_err(|e| StoreError::Corrupt(e.to_string()))
}

/// Stores estimates of one event revision (again: a replay writes the same
/// rows) and the first crossings they report.
pub fn insert_estimates(
    conn: &Connection,
    event: i64,
    revision: i64,
    estimates: &[Estimate],
) -> StoreResult<()> {
    let mut stmt = conn.prepare_cached(
        "INSERT OR REPLACE INTO estimates (event, revision, at_ms, best_kg, low_kg, high_kg, rate_kg_s, method, doc)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
    )?;
    let mut crossing = conn.prepare_cached(
        "INSERT OR IGNORE INTO crossings (event, revision, quantity_kg, at_ms) VALUES (?1, ?2, ?3, ?4)",
    )?;
    for e in estimates {
        stmt.execute(params![
            event,
            revision,
            e.at_ms,
            e.released_best_kg,
            e.released_low_kg,
            e.released_high_kg,
            e.rate_best_kg_s,
            e.method.code(),
            json(e)?
        ])?;
        for c in &e.crossings {
            if let Some(at) = c.at_ms {
                crossing.execute(params![event, revision, c.quantity_kg, at])?;
            }
        }
    }
    Ok(())
}

/// The latest estimate of an event's current revision.
pub fn latest_estimate(conn: &Connection, event: &EventRow) -> StoreResult<Option<Estimate>> {
    let doc: Option<String> = conn
        .query_row(
            "SELECT doc FROM estimates WHERE event = ?1 AND revision = ?2 ORDER BY at_ms DESC LIMIT 1",
            params![event.id, event.revision],
            |r| r.get(0),
        )
        .optional()?;
    doc.map(|d| {
        serde_json::from_str(&d)
            .map_err(|e| StoreError::Corrupt(format!("estimate of event {}: {e}", event.id)))
    })
    .transpose()
}

/// Every estimate of one event revision, in time order.
pub fn estimates_of(conn: &Connection, event: i64, revision: i64) -> StoreResult<Vec<Estimate>> {
    let mut stmt = conn
        .prepare("SELECT doc FROM estimates WHERE event = ?1 AND revision = ?2 ORDER BY at_ms")?;
    let rows = stmt.query_map(params![event, revision], |r| r.get::<_, String>(0))?;
    rows.map(|doc| {
        serde_json::from_str(&doc?).map_err(|e| StoreError::Corrupt(format!("estimate: {e}")))
    })
    .collect()
}

/// Up to `limit` estimates of one event revision after `after_ms`, in time
/// order: one page, so a replay compares a long event with its live
/// figures without holding them all.
pub fn estimates_after(
    conn: &Connection,
    event: i64,
    revision: i64,
    after_ms: i64,
    limit: usize,
) -> StoreResult<Vec<Estimate>> {
    let mut stmt = conn.prepare_cached(
        "SELECT doc FROM estimates WHERE event = ?1 AND revision = ?2 AND at_ms > ?3 ORDER BY at_ms LIMIT ?4",
    )?;
    let limit = i64::try_from(limit).unwrap_or(i64::MAX);
    let rows = stmt.query_map(params![event, revision, after_ms, limit], |r| {
        r.get::<_, String>(0)
    })?;
    rows.map(|doc| {
        serde_json::from_str(&doc?).map_err(|e| StoreError::Corrupt(format!("estimate: {e}")))
    })
    .collect()
}

/// The time of a tank's newest stored sample.
pub fn last_sample_ms(conn: &Connection, tank: &str) -> StoreResult<Option<i64>> {
    Ok(conn.query_row(
        "SELECT MAX(s.at_ms) FROM samples s JOIN tanks t ON t.id = s.tank WHERE t.tag = ?1",
        [tank],
        |r| r.get(0),
    )?)
}

/// The released totals (time, best, low, high in kg) of one event
/// revision, in time order, from the estimate columns alone: for charts,
/// which need neither the whole documents nor their JSON parsing.
pub fn released_series(
    conn: &Connection,
    event: i64,
    revision: i64,
) -> StoreResult<Vec<(i64, f64, f64, f64)>> {
    let mut stmt = conn.prepare_cached(
        "SELECT at_ms, best_kg, low_kg, high_kg FROM estimates WHERE event = ?1 AND revision = ?2 ORDER BY at_ms",
    )?;
    let rows = stmt.query_map(params![event, revision], |r| {
        Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
    })?;
    Ok(rows.collect::<Result<_, _>>()?)
}

/// An operator's request and what became of it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ActionRow {
    pub id: i64,
    pub requested_at_ms: i64,
    pub os_user: String,
    pub host: String,
    /// open, revise, note or close.
    pub kind: String,
    pub event: Option<i64>,
    pub request: serde_json::Value,
    /// pending, done or refused.
    pub state: String,
    pub handled_at_ms: Option<i64>,
    pub outcome: Option<String>,
}

fn action_from_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<(ActionRow, String)> {
    Ok((
        ActionRow {
            id: r.get(0)?,
            requested_at_ms: r.get(1)?,
            os_user: r.get(2)?,
            host: r.get(3)?,
            kind: r.get(4)?,
            event: r.get(5)?,
            request: serde_json::Value::Null,
            state: r.get(7)?,
            handled_at_ms: r.get(8)?,
            outcome: r.get(9)?,
        },
        r.get(6)?,
    ))
}

const ACTION_COLUMNS: &str =
    "id, requested_at_ms, os_user, host, kind, event, request, state, handled_at_ms, outcome";

fn parse_action((mut action, request): (ActionRow, String)) -> StoreResult<ActionRow> {
    action.request = serde_json::from_str(&request)
        .map_err(|e| StoreError::Corrupt(format!("action {} request: {e}", action.id)))?;
    Ok(action)
}

/// Records an operator's request; returns its id.
pub fn request_action(
    conn: &Connection,
    kind: &str,
    event: Option<i64>,
    request: &serde_json::Value,
    who: &(String, String),
) -> StoreResult<i64> {
    conn.execute(
        "INSERT INTO actions (requested_at_ms, os_user, host, kind, event, request) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        params![super::now_ms(), who.0, who.1, kind, event, request.to_string()],
    )?;
    Ok(conn.last_insert_rowid())
}

/// Actions waiting for the daemon, oldest first.
pub fn pending_actions(conn: &Connection) -> StoreResult<Vec<ActionRow>> {
    let sql = format!("SELECT {ACTION_COLUMNS} FROM actions WHERE state = 'pending' ORDER BY id");
    let mut stmt = conn.prepare_cached(&sql)?;
    let rows = stmt.query_map([], action_from_row)?;
    rows.map(|r| parse_action(r?)).collect()
}

pub fn action(conn: &Connection, id: i64) -> StoreResult<Option<ActionRow>> {
    let sql = format!("SELECT {ACTION_COLUMNS} FROM actions WHERE id = ?1");
    conn.query_row(&sql, [id], action_from_row)
        .optional()?
        .map(parse_action)
        .transpose()
}

/// The actions of one event (its audit trail), oldest first.
pub fn actions_of(conn: &Connection, event: i64) -> StoreResult<Vec<ActionRow>> {
    let sql = format!("SELECT {ACTION_COLUMNS} FROM actions WHERE event = ?1 ORDER BY id");
    let mut stmt = conn.prepare(&sql)?;
    let rows = stmt.query_map([event], action_from_row)?;
    rows.map(|r| parse_action(r?)).collect()
}

/// Marks an action done or refused, with what changed or why not, now.
pub fn finish_action(
    conn: &Connection,
    id: i64,
    event: Option<i64>,
    done: bool,
    outcome: &str,
) -> StoreResult<()> {
    finish_action_at(conn, id, event, done, outcome, super::now_ms())
}

/// As [`finish_action`], handled at `at_ms` (the daemon's timeline).
pub fn finish_action_at(
    conn: &Connection,
    id: i64,
    event: Option<i64>,
    done: bool,
    outcome: &str,
    at_ms: i64,
) -> StoreResult<()> {
    conn.execute(
        "UPDATE actions SET state = ?2, handled_at_ms = ?3, outcome = ?4, event = COALESCE(event, ?5) WHERE id = ?1 AND state = 'pending'",
        params![id, if done { "done" } else { "refused" }, at_ms, outcome, event],
    )?;
    Ok(())
}

/// Whether an action still waits for the daemon.
pub fn action_is_pending(conn: &Connection, id: i64) -> StoreResult<bool> {
    Ok(conn
        .query_row(
            "SELECT state = 'pending' FROM actions WHERE id = ?1",
            [id],
            |r| r.get::<_, bool>(0),
        )
        .optional()?
        .unwrap_or(false))
}

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
    conn.execute(
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
    conn.execute(
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
/// it. One index lookup per tank.
pub fn latest_stored_ms(conn: &Connection) -> StoreResult<Option<i64>> {
    let beat: Option<i64> = conn
        .query_row(
            "SELECT MAX(beat_at_ms, COALESCE(stopped_at_ms, beat_at_ms)) FROM daemon WHERE id = 1",
            [],
            |r| r.get(0),
        )
        .optional()?
        .flatten();
    let sample: Option<i64> = conn.query_row(
        "SELECT MAX((SELECT MAX(s.at_ms) FROM samples s WHERE s.tank = t.id)) FROM tanks t",
        [],
        |r| r.get(0),
    )?;
    Ok(beat.max(sample))
}

/// Records a step of the wall clock (or what the timeline did about one).
pub fn record_clock_step(conn: &Connection, step: &crate::clock::ClockStep) -> StoreResult<()> {
    conn.execute(
        "INSERT INTO clock_steps (kind, at_ms, wall_ms, step_ms, offset_ms) VALUES (?1, ?2, ?3, ?4, ?5)",
        params![step.kind.name(), step.at_ms, step.wall_ms, step.step_ms, step.offset_ms],
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
