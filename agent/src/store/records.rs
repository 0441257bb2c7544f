//! The rows the store keeps, and the SQL that reads and writes them.
//!
//! Each function takes a connection (or transaction) and does one thing;
//! callers choose the transaction boundaries. Times are UTC milliseconds.

use super::{StoreError, StoreResult};
use crate::acquire::sample::{Quality, Reading, TankSample};
use crate::track::estimator::{Estimate, LeakParams};
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
        "UPDATE events SET closed_at_ms = ?2 WHERE id = ?1 AND closed_at_ms IS NULL",
        params![id, at_ms],
    )?;
    Ok(())
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

/// Marks an action done or refused, with what changed or why not.
pub fn finish_action(
    conn: &Connection,
    id: i64,
    event: Option<i64>,
    done: bool,
    outcome: &str,
) -> StoreResult<()> {
    conn.execute(
        "UPDATE actions SET state = ?2, handled_at_ms = ?3, outcome = ?4, event = COALESCE(event, ?5) WHERE id = ?1",
        params![id, if done { "done" } else { "refused" }, super::now_ms(), outcome, event],
    )?;
    Ok(())
}

/// The daemon's heartbeat row.
#[derive(Debug, Clone, PartialEq)]
pub struct Heartbeat {
    pub pid: i64,
    pub started_at_ms: i64,
    pub beat_at_ms: i64,
    pub config: String,
    pub stopped_at_ms: Option<i64>,
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
}

pub fn beat(conn: &Connection, pid: u32, started_at_ms: i64, config: &str) -> StoreResult<()> {
    conn.execute(
        "INSERT INTO daemon (id, pid, started_at_ms, beat_at_ms, config) VALUES (1, ?1, ?2, ?3, ?4)
         ON CONFLICT (id) DO UPDATE SET pid = ?1, started_at_ms = ?2, beat_at_ms = ?3, config = ?4, stopped_at_ms = NULL",
        params![pid, started_at_ms, super::now_ms(), config],
    )?;
    Ok(())
}

pub fn mark_stopped(conn: &Connection) -> StoreResult<()> {
    conn.execute(
        "UPDATE daemon SET stopped_at_ms = ?1 WHERE id = 1",
        [super::now_ms()],
    )?;
    Ok(())
}

pub fn heartbeat(conn: &Connection) -> StoreResult<Option<Heartbeat>> {
    Ok(conn
        .query_row(
            "SELECT pid, started_at_ms, beat_at_ms, config, stopped_at_ms FROM daemon WHERE id = 1",
            [],
            |r| {
                Ok(Heartbeat {
                    pid: r.get(0)?,
                    started_at_ms: r.get(1)?,
                    beat_at_ms: r.get(2)?,
                    config: r.get(3)?,
                    stopped_at_ms: r.get(4)?,
                })
            },
        )
        .optional()?)
}

/// How the rolling history is kept (DESIGN.md section 3): full rate for
/// `full_ms`, one sample per `thin_every_ms` per tank back to `keep_ms`, none
/// older. Samples inside an event (from its start to its close, or still
/// open) are kept at full rate for as long as the event is kept.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Retention {
    pub full_ms: i64,
    pub thin_every_ms: i64,
    pub keep_ms: i64,
}

impl Retention {
    /// 2 h at full rate, one per 10 s back to 24 h.
    pub const DEFAULT: Retention = Retention {
        full_ms: 2 * 3_600_000,
        thin_every_ms: 10_000,
        keep_ms: 24 * 3_600_000,
    };
}

/// Applies the retention to the samples that have aged in the last
/// `slice_ms` (call it at least that often): a bounded amount of work each
/// time, however long the history. Returns how many rows went.
pub fn trim_history(
    conn: &Connection,
    now_ms: i64,
    retention: Retention,
    slice_ms: i64,
) -> StoreResult<usize> {
    let tanks: Vec<(i64, String)> = {
        let mut stmt = conn.prepare_cached("SELECT id, tag FROM tanks")?;
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))?
            .collect::<Result<_, _>>()?
    };
    let mut removed = 0;
    for (id, tag) in tanks {
        // Event windows of this tank, to keep.
        let windows: Vec<(i64, i64)> = {
            let mut stmt = conn.prepare_cached(
                "SELECT start_ms, COALESCE(closed_at_ms, ?2) FROM events WHERE tank = ?1",
            )?;
            stmt.query_map(params![tag, i64::MAX], |r| Ok((r.get(0)?, r.get(1)?)))?
                .collect::<Result<_, _>>()?
        };
        let kept = |at: i64| windows.iter().any(|&(a, b)| at >= a && at <= b);
        let mut doomed = Vec::new();
        {
            // Too old: everything past keep_ms.
            let mut stmt =
                conn.prepare_cached("SELECT at_ms FROM samples WHERE tank = ?1 AND at_ms < ?2")?;
            for at in stmt.query_map(params![id, now_ms - retention.keep_ms], |r| {
                r.get::<_, i64>(0)
            })? {
                let at = at?;
                if !kept(at) {
                    doomed.push(at);
                }
            }
            // Just aged out of full rate: keep the first of each bucket.
            let mut stmt = conn
                .prepare_cached("SELECT at_ms FROM samples WHERE tank = ?1 AND at_ms >= ?2 AND at_ms < ?3 ORDER BY at_ms")?;
            let from = now_ms - retention.full_ms - slice_ms;
            let mut bucket = i64::MIN;
            for at in stmt.query_map(params![id, from, now_ms - retention.full_ms], |r| {
                r.get::<_, i64>(0)
            })? {
                let at = at?;
                let b = at.div_euclid(retention.thin_every_ms);
                if b == bucket && !kept(at) {
                    doomed.push(at);
                }
                bucket = b;
            }
        }
        let mut delete =
            conn.prepare_cached("DELETE FROM samples WHERE tank = ?1 AND at_ms = ?2")?;
        for at in doomed {
            removed += delete.execute(params![id, at])?;
        }
    }
    Ok(removed)
}
