//! Operator actions: the requests the CLI writes and what the daemon made
//! of them (the audit trail).

use super::{StoreError, StoreResult, unit};
use rusqlite::{Connection, OptionalExtension, params};
use serde::{Deserialize, Serialize};

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
    unit::execute(
        conn,
        "INSERT INTO actions (requested_at_ms, os_user, host, kind, event, request) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        params![
            super::now_ms(),
            who.0,
            who.1,
            kind,
            event,
            request.to_string()
        ],
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

/// Whether any operator request waits (the partial index answers it).
pub fn any_pending(conn: &Connection) -> StoreResult<bool> {
    Ok(unit::query_row(
        conn,
        "SELECT EXISTS (SELECT 1 FROM actions WHERE state = 'pending')",
        [],
        |r| r.get(0),
    )?)
}

pub fn action(conn: &Connection, id: i64) -> StoreResult<Option<ActionRow>> {
    let sql = format!("SELECT {ACTION_COLUMNS} FROM actions WHERE id = ?1");
    unit::query_row(conn, &sql, [id], action_from_row)
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
    unit::execute(
        conn,
        "UPDATE actions SET state = ?2, handled_at_ms = ?3, outcome = ?4, event = COALESCE(event, ?5) WHERE id = ?1 AND state = 'pending'",
        params![
            id,
            if done { "done" } else { "refused" },
            at_ms,
            outcome,
            event
        ],
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
