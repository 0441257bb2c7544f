//! Leak events: their rows, revisions, closes and tracking state.

use super::{StoreError, StoreResult, unit};
use crate::estimate::LeakParams;
use rusqlite::{Connection, OptionalExtension, params};
use serde::{Deserialize, Serialize};

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
    unit::query_row(conn, &sql, [id], event_from_row)
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
    unit::execute(
        conn,
        "INSERT INTO events (tank, opened_at_ms, start_ms, source, revision, params) VALUES (?1, ?2, ?3, ?4, 1, ?5)",
        params![tank, opened_at_ms, start_ms, source, json(params)?],
    )?;
    Ok(conn.last_insert_rowid())
}

/// Gives an event new parameters as its next revision; returns the revision.
pub fn revise_event(conn: &Connection, id: i64, params: &LeakParams) -> StoreResult<i64> {
    unit::execute(
        conn,
        "UPDATE events SET revision = revision + 1, params = ?2 WHERE id = ?1",
        params![id, json(params)?],
    )?;
    Ok(unit::query_row(
        conn,
        "SELECT revision FROM events WHERE id = ?1",
        [id],
        |r| r.get(0),
    )?)
}

pub fn close_event(conn: &Connection, id: i64, at_ms: i64) -> StoreResult<()> {
    unit::execute(
        conn,
        "UPDATE events SET closed_at_ms = ?2, tracking_error = NULL WHERE id = ?1 AND closed_at_ms IS NULL",
        params![id, at_ms],
    )?;
    Ok(())
}

/// The open event of a tank (the newest, should there be more).
pub fn open_event_of_tank(conn: &Connection, tank: &str) -> StoreResult<Option<EventRow>> {
    let sql = format!(
        "SELECT {EVENT_COLUMNS} FROM events WHERE tank = ?1 AND closed_at_ms IS NULL ORDER BY id DESC LIMIT 1"
    );
    unit::query_row(conn, &sql, [tank], event_from_row)
        .optional()?
        .map(parse_params)
        .transpose()
}

/// Marks an open event as not tracked, and why; None clears it.
pub fn set_tracking_error(conn: &Connection, event: i64, why: Option<&str>) -> StoreResult<()> {
    unit::execute(
        conn,
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
