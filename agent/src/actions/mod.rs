//! The operator-actions client: what an operator may ask the daemon for,
//! and how the CLI asks.
//!
//! The CLI does not change anything itself. [`send`] writes the request as
//! an action row (one transaction, durable once committed), then waits for
//! the daemon to pick it up and acknowledge it, and returns the daemon's
//! [`Reply`]. If no daemon is running, it says so and writes nothing: a
//! request nobody acts on would only mislead. A request the daemon has not
//! acknowledged (busy, stalled on the database, or gone since) stays
//! recorded and is applied with the time it was made; the error says which
//! and why.
//!
//! * [`request`]: the requests, as stored in action rows (the tracker reads
//!   them from there).
//! * [`since`]: times and durations as operators write them.
//!
//! Left out: what the daemon does with a request (`crate::tracker`).

pub mod request;
pub mod since;

pub use request::Request;
pub use since::{parse_duration, parse_since};

use crate::report::Presentation;
use crate::store::{self, DaemonState, SILENT_AFTER_MS, StoreError};
use anyhow::bail;
use std::path::Path;
use std::time::{Duration, Instant};

/// No daemon is running to act on a request, so nothing was written; a
/// code of its own (`commands::exit::NO_DAEMON`).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct NoDaemon(pub String);

/// The request is recorded but the daemon has not acknowledged it (it will
/// apply it later); a code of its own (`commands::exit::NOT_ACKNOWLEDGED`).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct Unacknowledged(pub String);

macro_rules! no_daemon {
    ($($arg:tt)*) => {
        return Err(NoDaemon(format!($($arg)*)).into())
    };
}

macro_rules! unacknowledged {
    ($($arg:tt)*) => {
        return Err(Unacknowledged(format!($($arg)*)).into())
    };
}

/// How long to wait for the daemon's acknowledgement.
const ACK_WAIT: Duration = Duration::from_secs(20);

/// The daemon's acknowledgement of a request it carried out.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Reply {
    /// The action row's id.
    pub action: i64,
    /// The event the request opened or acted on.
    pub event: Option<i64>,
    /// The daemon's account of what it did, as recorded in the row. It
    /// quotes the operator's note and tank id: echo it through
    /// `logging::one_line`.
    pub text: String,
}

/// Sends a request to the daemon and waits for its acknowledgement; returns
/// what the daemon did, with the event it acted on.
///
/// A request is only written when a daemon can take it: one that is
/// running (busy or not), or stalled on the database (it takes the request
/// once it can write again). With no daemon it says so and writes nothing.
/// A request written in the seconds after a daemon died or stalled (its
/// heartbeat still fresh) stays in its row and is applied, with the time it
/// was made, by the next daemon or once the daemon can write; the wait says
/// so as soon as the heartbeat goes stale.
pub fn send(db: &Path, request: &Request, people: &Presentation) -> anyhow::Result<Reply> {
    // Opening checks access first: a permission in the way is said as
    // such, and only a file that is not there means no daemon.
    let conn = match store::open_for_requests(db) {
        Err(StoreError::Missing(_)) => no_daemon!(
            "the database {} does not exist, so no daemon is running on it; start one with `leaktally run --config FILE --db {}`",
            db.display(),
            db.display()
        ),
        opened => opened?,
    };
    let heartbeat = store::heartbeat(&conn).map_err(|e| damage_said(e, db))?;
    let Some(h) = heartbeat else {
        no_daemon!(
            "no leaktally daemon has ever run on {}; start it with `leaktally run --config FILE --db {}`; nothing was changed",
            db.display(),
            db.display()
        );
    };
    match h.state(store::now_ms()) {
        DaemonState::NotRunning => {
            // Why it is not running may be the file itself: the daemon
            // refuses to start on a damaged one.
            store::check_integrity(db, &conn)?;
            no_daemon!(
                "no leaktally daemon is running on {} (last seen {}); start it with `leaktally run --config {} --db {}`; nothing was changed",
                db.display(),
                people.time(h.beat_at_ms),
                h.config,
                db.display()
            )
        }
        DaemonState::Stalled => {
            // A damaged file stalls a daemon too; never write to one.
            store::check_integrity(db, &conn)?;
            eprintln!(
                "warning: the leaktally daemon on {} (pid {}) is running but stalled on the database: it has not written to it since {}; it takes this request once it can write again",
                db.display(),
                h.pid,
                people.time(h.beat_at_ms)
            )
        }
        DaemonState::Running | DaemonState::Busy { .. } => {}
    }
    let value = serde_json::to_value(request)?;
    let id = store::request_action(&conn, request.kind(), request.event(), &value, &who())
        .map_err(|e| {
            anyhow::Error::from(damage_said(e, db)).context(format!(
                "recording the request in {}; nothing was changed",
                db.display()
            ))
        })?;
    crate::doorbell::ring(db);
    let action = store::action(&conn, id)?
        .ok_or_else(|| StoreError::Corrupt(format!("action {id} vanished")))?;
    let made = people.time(action.requested_at_ms);
    let restart = format!(
        "`leaktally run --config {} --db {}`",
        h.config,
        db.display()
    );
    let started = Instant::now();
    loop {
        std::thread::sleep(Duration::from_millis(100));
        let action = store::action(&conn, id)?
            .ok_or_else(|| StoreError::Corrupt(format!("action {id} vanished")))?;
        match action.state.as_str() {
            "done" => {
                return Ok(Reply {
                    action: id,
                    event: action.event,
                    text: action.outcome.unwrap_or_default(),
                });
            }
            "refused" => bail!(
                "the daemon refused: {}",
                crate::logging::one_line(&action.outcome.unwrap_or_default())
            ),
            _ => {}
        }
        let now = store::now_ms();
        let state = store::heartbeat(&conn)?.map_or(DaemonState::NotRunning, |h| h.state(now));
        let waited = started.elapsed() > ACK_WAIT;
        match state {
            DaemonState::NotRunning => unacknowledged!(
                "the daemon stopped before it took request {id}; the request is recorded and will be applied, with the time it was made ({made}), when a daemon next starts on {}: {restart}",
                db.display()
            ),
            // As soon as it shows (a heartbeat 5 s stale): it will not
            // take the request until it can write, however long that is.
            DaemonState::Stalled => unacknowledged!(
                "the daemon is running but stalled on the database (it has not written to it for over {} s: another program holding the write lock, a full disk, or a disk that does not answer; its log says which); request {id} is recorded and will be applied, with the time it was made ({made}), once it can write again; `leaktally status` shows when",
                SILENT_AFTER_MS / 1000
            ),
            DaemonState::Busy { for_ms, activity } if waited => unacknowledged!(
                "the daemon is running but busy ({activity}, for {} s), and has not taken request {id} yet; the request is recorded and it will apply it, with the time it was made ({made}), as soon as it gets to it; `leaktally status` shows when",
                for_ms / 1000
            ),
            _ if waited => unacknowledged!(
                "the daemon is running but has not taken request {id} within {} s; the request is recorded and will be applied, with the time it was made ({made}); see the daemon's log, and `leaktally status`",
                ACK_WAIT.as_secs()
            ),
            _ => {}
        }
    }
}

/// A store error, with the damaged-database message when SQLite says the
/// file is damaged.
fn damage_said(e: StoreError, db: &Path) -> StoreError {
    if e.is_damage() && !matches!(e, StoreError::Damaged { .. }) {
        StoreError::Damaged {
            path: db.to_owned(),
            details: e.to_string(),
        }
    } else {
        e
    }
}

/// The operating-system user and host, for the audit trail.
pub fn who() -> (String, String) {
    // The real uid's name first: USER is the operator's to set, and the
    // audit trail must name who made the request.
    let user = user_from_uid()
        .or_else(|| std::env::var("USER").ok())
        .or_else(|| std::env::var("LOGNAME").ok())
        .unwrap_or_else(|| "unknown".into());
    let host = std::fs::read_to_string("/proc/sys/kernel/hostname")
        .map(|h| h.trim().to_owned())
        .or_else(|_| std::env::var("HOSTNAME"))
        .unwrap_or_else(|_| "unknown".into());
    (user, host)
}

/// The login name of this process's real uid, from /proc and /etc/passwd
/// (none for a uid with no entry there).
fn user_from_uid() -> Option<String> {
    #[cfg(unix)]
    {
        // SAFETY: getuid cannot fail and touches no memory.
        store::access::login_name(unsafe { libc::getuid() })
    }
    #[cfg(not(unix))]
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The reply carries the event the daemon recorded on the action row,
    /// not a number read out of its words.
    #[test]
    fn the_reply_names_the_event_the_daemon_recorded() {
        let scratch = crate::store::scratch::ScratchDir::new("actions");
        let db = scratch.db();
        let conn = store::open_read_write(&db).unwrap();
        store::beat(&conn, std::process::id(), store::now_ms(), "site.toml").unwrap();
        // A stand-in daemon: it takes the one request and records event 41,
        // with words that put another number where the event id once was.
        let daemon = std::thread::spawn(move || {
            for _ in 0..100 {
                if let Some(action) = store::pending_actions(&conn).unwrap().first() {
                    let text = "opened 7 events? no: event 41 on T1";
                    store::finish_action(&conn, action.id, Some(41), true, text).unwrap();
                    return action.id;
                }
                std::thread::sleep(Duration::from_millis(20));
            }
            panic!("no request arrived");
        });
        let request = Request::Open {
            tank: "T1".into(),
            hole_diameter_m: None,
            hole_height_m: None,
            cd: None,
            cd_range: None,
            since_ms: None,
            note: None,
        };
        let reply = send(&db, &request, &Presentation::default()).unwrap();
        let action = daemon.join().unwrap();
        assert_eq!(
            reply,
            Reply {
                action,
                event: Some(41),
                text: "opened 7 events? no: event 41 on T1".into(),
            }
        );
    }
}
