//! The outbox: messages for the MQTT broker that it has not acknowledged
//! yet, oldest first, in the database.
//!
//! A message is written in the same unit of work as what it reports (a
//! tick's estimates, an event's close), so a message exists exactly when
//! its estimate does: a daemon killed at any moment, even with SIGKILL
//! while the broker is out of reach, finds every unsent message here when
//! it starts again. The publisher (`crate::publish`) reads them in order,
//! and deletes each one the broker has acknowledged.
//!
//! Bounded: past the limit the oldest messages are given up, readings
//! first, then status documents that a newer one of the same event
//! follows (the broker keeps only the newest retained one anyway); an
//! event's newest status document and every closing summary are always
//! kept. What was given up is counted in [`OutboxState`], which the page
//! and the metrics show.
//!
//! Left out: topics, payloads' contents and the broker (the publisher's).

use super::StoreResult;
use rusqlite::{Connection, OptionalExtension, params};
use std::sync::atomic::{AtomicBool, AtomicI64, AtomicU64, Ordering};

/// What a message is, for its topic and for the bound.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// An event's status document after an estimate (retained).
    Status,
    /// An event's closing summary (retained).
    Summary,
    /// A tank's thinned reading.
    Reading,
    /// A suspected loss raised or cleared on a tank (retained; never given
    /// up to the outbox's bound).
    SuspectedLoss,
}

impl Kind {
    pub fn key(self) -> &'static str {
        match self {
            Kind::Status => "status",
            Kind::Summary => "summary",
            Kind::Reading => "reading",
            Kind::SuspectedLoss => "suspected_loss",
        }
    }

    fn of_key(key: &str) -> Option<Self> {
        match key {
            "status" => Some(Kind::Status),
            "summary" => Some(Kind::Summary),
            "reading" => Some(Kind::Reading),
            "suspected_loss" => Some(Kind::SuspectedLoss),
            _ => None,
        }
    }
}

/// A message to put in the outbox.
#[derive(Debug, Clone, PartialEq)]
pub struct Message {
    pub kind: Kind,
    /// The event (status, summary) or the tank (reading) it is about.
    pub event: Option<i64>,
    pub tank: Option<String>,
    /// The sample time it reports.
    pub at_ms: i64,
    /// JSON.
    pub payload: String,
}

/// A message in the outbox, with its place in the order.
#[derive(Debug, Clone, PartialEq)]
pub struct Queued {
    pub seq: i64,
    pub message: Message,
}

/// Puts `messages` in the outbox, then keeps it within `limit`; returns
/// how many older messages were given up to make room.
pub fn enqueue(conn: &Connection, messages: &[Message], limit: usize) -> StoreResult<u64> {
    if messages.is_empty() {
        return Ok(0);
    }
    let mut insert = conn.prepare_cached(
        "INSERT INTO outbox (kind, event, tank, at_ms, payload) VALUES (?1, ?2, ?3, ?4, ?5)",
    )?;
    for m in messages {
        insert.execute(params![m.kind.key(), m.event, m.tank, m.at_ms, m.payload])?;
    }
    bound(conn, limit)
}

/// Gives up the oldest messages that may go while the outbox holds more
/// than `limit`. The span of sequence numbers is an upper bound of the
/// count, read from the index alone; only past the limit is it counted.
fn bound(conn: &Connection, limit: usize) -> StoreResult<u64> {
    let span: i64 = conn
        .prepare_cached("SELECT COALESCE(MAX(seq) - MIN(seq) + 1, 0) FROM outbox")?
        .query_row([], |r| r.get(0))?;
    if span <= limit as i64 {
        return Ok(0);
    }
    let count = depth(conn)?;
    let over = count.saturating_sub(limit as u64);
    if over == 0 {
        return Ok(0);
    }
    let gone = conn
        .prepare_cached(
            "DELETE FROM outbox WHERE seq IN (
                 SELECT seq FROM outbox
                 WHERE kind = 'reading'
                    OR (kind = 'status' AND seq NOT IN
                        (SELECT MAX(seq) FROM outbox WHERE kind = 'status' GROUP BY event))
                 ORDER BY kind = 'status', seq
                 LIMIT ?1)",
        )?
        .execute([over as i64])?;
    Ok(gone as u64)
}

/// How many messages wait.
pub fn depth(conn: &Connection) -> StoreResult<u64> {
    let n: i64 = conn
        .prepare_cached("SELECT COUNT(*) FROM outbox")?
        .query_row([], |r| r.get(0))?;
    Ok(n as u64)
}

/// The sample time of the oldest message waiting, if any.
pub fn oldest_ms(conn: &Connection) -> StoreResult<Option<i64>> {
    Ok(conn
        .prepare_cached("SELECT at_ms FROM outbox ORDER BY seq LIMIT 1")?
        .query_row([], |r| r.get(0))
        .optional()?)
}

/// Up to `n` messages after `after` (a sequence number; 0 for the first),
/// oldest first.
pub fn next(conn: &Connection, after: i64, n: usize) -> StoreResult<Vec<Queued>> {
    let mut stmt = conn.prepare_cached(
        "SELECT seq, kind, event, tank, at_ms, payload FROM outbox WHERE seq > ?1 ORDER BY seq LIMIT ?2",
    )?;
    let rows = stmt.query_map(params![after, n as i64], |r| {
        let kind: String = r.get(1)?;
        Ok((
            r.get::<_, i64>(0)?,
            kind,
            r.get(2)?,
            r.get(3)?,
            r.get(4)?,
            r.get(5)?,
        ))
    })?;
    let mut out = Vec::new();
    for row in rows {
        let (seq, kind, event, tank, at_ms, payload) = row?;
        let Some(kind) = Kind::of_key(&kind) else {
            return Err(super::StoreError::Corrupt(format!(
                "outbox message {seq} is of an unknown kind {kind:?}"
            )));
        };
        out.push(Queued {
            seq,
            message: Message {
                kind,
                event,
                tank,
                at_ms,
                payload,
            },
        });
    }
    Ok(out)
}

/// Deletes the messages the broker acknowledged.
pub fn delete(conn: &Connection, seqs: &[i64]) -> StoreResult<()> {
    let mut stmt = conn.prepare_cached("DELETE FROM outbox WHERE seq = ?1")?;
    for seq in seqs {
        stmt.execute([seq])?;
    }
    Ok(())
}

/// The outbox as the page and the metrics show it; the publisher and the
/// tracker keep it up to date. Relaxed atomics, as `store::health`.
#[derive(Debug, Default)]
pub struct OutboxState {
    /// Whether a broker is configured at all.
    configured: AtomicBool,
    /// Connected to the broker (its CONNACK came).
    connected: AtomicBool,
    /// Messages waiting in the database.
    depth: AtomicU64,
    /// The sample time of the oldest of them, ms (0: none).
    oldest_ms: AtomicI64,
    /// Messages given up to the bound since the daemon started.
    dropped: AtomicU64,
    /// Messages the broker acknowledged since the daemon started.
    sent: AtomicU64,
    /// When the broker last acknowledged a message, ms (0: never).
    last_sent_ms: AtomicI64,
    /// When the connection was last lost or refused, ms (0: never).
    last_error_ms: AtomicI64,
    /// Since when the broker has not been reached: the first failure
    /// after the last connection (or the start), ms (0: connected).
    down_since_ms: AtomicI64,
    last_error: std::sync::Mutex<Option<String>>,
}

/// A copy of [`OutboxState`] at one moment.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct OutboxSnapshot {
    pub configured: bool,
    pub connected: bool,
    pub depth: u64,
    /// The sample time of the oldest message waiting.
    pub oldest_ms: Option<i64>,
    pub dropped: u64,
    pub sent: u64,
    pub last_sent_ms: Option<i64>,
    pub last_error_ms: Option<i64>,
    pub last_error: Option<String>,
    /// Since when the broker has not been reached (`None` while connected
    /// or before the first attempt ends).
    pub down_since_ms: Option<i64>,
}

impl OutboxState {
    pub fn configured() -> Self {
        let state = Self::default();
        state.configured.store(true, Ordering::Relaxed);
        state
    }

    pub fn set_connected(&self, connected: bool) {
        self.connected.store(connected, Ordering::Relaxed);
        if connected {
            self.down_since_ms.store(0, Ordering::Relaxed);
        }
    }

    /// How many messages wait, and the sample time of the oldest.
    pub fn set_depth(&self, depth: u64, oldest_ms: Option<i64>) {
        self.depth.store(depth, Ordering::Relaxed);
        self.oldest_ms
            .store(oldest_ms.unwrap_or(0), Ordering::Relaxed);
    }

    pub fn add_dropped(&self, n: u64) {
        self.dropped.fetch_add(n, Ordering::Relaxed);
    }

    pub fn add_sent(&self, n: u64, at_ms: i64) {
        self.sent.fetch_add(n, Ordering::Relaxed);
        self.last_sent_ms.store(at_ms, Ordering::Relaxed);
    }

    pub fn set_error(&self, at_ms: i64, why: String) {
        self.last_error_ms.store(at_ms, Ordering::Relaxed);
        // Retries fail again and again: the outage began at the first.
        let _ = self
            .down_since_ms
            .compare_exchange(0, at_ms, Ordering::Relaxed, Ordering::Relaxed);
        *self.last_error.lock().unwrap_or_else(|p| p.into_inner()) = Some(why);
    }

    pub fn snapshot(&self) -> OutboxSnapshot {
        let at = |a: &AtomicI64| Some(a.load(Ordering::Relaxed)).filter(|&v| v != 0);
        OutboxSnapshot {
            configured: self.configured.load(Ordering::Relaxed),
            connected: self.connected.load(Ordering::Relaxed),
            depth: self.depth.load(Ordering::Relaxed),
            oldest_ms: at(&self.oldest_ms),
            dropped: self.dropped.load(Ordering::Relaxed),
            sent: self.sent.load(Ordering::Relaxed),
            last_sent_ms: at(&self.last_sent_ms),
            last_error_ms: at(&self.last_error_ms),
            last_error: self
                .last_error
                .lock()
                .unwrap_or_else(|p| p.into_inner())
                .clone(),
            down_since_ms: at(&self.down_since_ms),
        }
    }
}

#[cfg(test)]
mod tests {

    #[test]
    fn an_outage_is_dated_from_its_first_failure_not_the_latest_retry() {
        let state = OutboxState::configured();
        state.set_error(1_000, "refused".into());
        state.set_error(6_000, "refused".into());
        let seen = state.snapshot();
        assert_eq!(
            (seen.down_since_ms, seen.last_error_ms),
            (Some(1_000), Some(6_000))
        );
        state.set_connected(true);
        assert_eq!(state.snapshot().down_since_ms, None);
        state.set_connected(false);
        state.set_error(9_000, "lost".into());
        assert_eq!(state.snapshot().down_since_ms, Some(9_000));
    }
    use super::*;

    fn message(kind: Kind, event: i64, at_ms: i64) -> Message {
        Message {
            kind,
            event: Some(event),
            tank: None,
            at_ms,
            payload: format!("{{\"at\":{at_ms}}}"),
        }
    }

    #[test]
    fn messages_come_out_in_order_and_go_when_acknowledged() {
        let scratch = crate::store::scratch::ScratchDir::new("outbox");
        let conn = crate::store::open_read_write(&scratch.db()).unwrap();
        let sent: Vec<Message> = (0..5).map(|i| message(Kind::Status, 1, i)).collect();
        assert_eq!(enqueue(&conn, &sent, 100).unwrap(), 0);
        let got = next(&conn, 0, 3).unwrap();
        assert_eq!(
            got.iter().map(|q| q.message.at_ms).collect::<Vec<_>>(),
            [0, 1, 2]
        );
        delete(&conn, &[got[0].seq, got[1].seq]).unwrap();
        assert_eq!(depth(&conn).unwrap(), 3);
        let rest = next(&conn, 0, 10).unwrap();
        assert_eq!(
            rest.iter().map(|q| q.message.clone()).collect::<Vec<_>>(),
            sent[2..]
        );
        assert_eq!(next(&conn, rest[1].seq, 10).unwrap().len(), 1);
    }

    /// Past the bound, readings go first, then superseded status
    /// documents; an event's newest status and every summary stay.
    #[test]
    fn the_bound_gives_up_readings_then_superseded_documents() {
        let scratch = crate::store::scratch::ScratchDir::new("outbox-bound");
        let conn = crate::store::open_read_write(&scratch.db()).unwrap();
        let mut all = vec![
            Message {
                kind: Kind::Reading,
                event: None,
                tank: Some("T1".into()),
                at_ms: 0,
                payload: "{}".into(),
            },
            message(Kind::Summary, 9, 0),
        ];
        all.extend((1..=4).map(|i| message(Kind::Status, 1, i)));
        all.push(message(Kind::Status, 2, 1));
        assert_eq!(enqueue(&conn, &all, 100).unwrap(), 0);
        // 7 held, 4 allowed: the reading and two older documents of event 1.
        assert_eq!(bound(&conn, 4).unwrap(), 3);
        let left: Vec<(Kind, Option<i64>, i64)> = next(&conn, 0, 10)
            .unwrap()
            .into_iter()
            .map(|q| (q.message.kind, q.message.event, q.message.at_ms))
            .collect();
        assert_eq!(
            left,
            [
                (Kind::Summary, Some(9), 0),
                (Kind::Status, Some(1), 3),
                (Kind::Status, Some(1), 4),
                (Kind::Status, Some(2), 1)
            ]
        );
        // Never below what must stay.
        assert_eq!(bound(&conn, 1).unwrap(), 1);
        assert_eq!(depth(&conn).unwrap(), 3);
    }
}
