//! `leaktally leak open|revise|note|close`: operator actions.
//!
//! The CLI does not change anything itself. It writes the request as an
//! action row (one transaction, durable once committed), then waits for the
//! daemon to pick it up and acknowledge it, and prints what the daemon did.
//! If no daemon is running, it says so and writes nothing: a request nobody
//! acts on would only mislead. A request the daemon has not acknowledged
//! (busy, stalled on the database, or gone since) stays recorded and is
//! applied with the time it was made; the CLI says which and why.

use crate::cli::{HoleArgs, LeakCommand, ParamChanges};
use crate::estimate::{
    ParamChange, ParamError, check_cd, check_cd_range, check_density_kg_m3, check_hole_diameter_mm,
    check_hole_height_m,
};
use crate::report;
use crate::store::{self, DaemonState, SILENT_AFTER_MS, StoreError};
use crate::tracker::Request;
use anyhow::bail;
use std::path::Path;
use std::time::{Duration, Instant};

/// How long to wait for the daemon's acknowledgement.
const ACK_WAIT: Duration = Duration::from_secs(20);

/// Runs one `leak` subcommand.
pub fn run(command: LeakCommand) -> anyhow::Result<()> {
    let now = store::now_ms();
    let (db, request) = match command {
        LeakCommand::Open {
            tank,
            hole,
            since,
            note,
            db,
        } => {
            if hole.hole_height.is_none() {
                eprintln!(
                    "warning: no --hole-height given; assuming the hole is at the tank bottom, which releases the most (the conservative choice)"
                );
            }
            if hole.cd.is_none() {
                eprintln!(
                    "note: no --cd given; using 1.0 (conservative), with the band from 0.61 to 1.0"
                );
            }
            let since_ms = since.as_deref().map(|s| parse_since(s, now)).transpose()?;
            let given = hole.change()?;
            let request = Request::Open {
                tank,
                hole_diameter_m: given.hole_diameter_m,
                hole_height_m: given.hole_height_m,
                cd: given.cd,
                cd_range: given.cd_range,
                since_ms,
                note,
            };
            (db, request)
        }
        LeakCommand::Revise {
            event,
            changes,
            note,
            db,
        } => {
            let request = Request::Revise {
                event,
                change: changes.change()?,
                note,
            };
            (db, request)
        }
        LeakCommand::Note { event, text, db } => (db, Request::Note { event, text }),
        LeakCommand::Close { event, note, db } => (db, Request::Close { event, note }),
    };
    let outcome = send(&db, &request)?;
    // The daemon's outcome quotes the operator's note and tank id; a
    // control character in them must not reach the terminal as one.
    println!("{}", crate::logging::one_line(&outcome));
    Ok(())
}

impl HoleArgs {
    /// What the options give, each checked by its one rule, in SI; in the
    /// order they are checked (a diameter's refusal is said first).
    pub fn change(&self) -> Result<ParamChange, ParamError> {
        Ok(ParamChange {
            hole_diameter_m: self.diameter_m()?,
            hole_height_m: self.height_m()?,
            cd: self.cd_checked()?,
            cd_range: self.cd_range_checked()?,
            ..ParamChange::default()
        })
    }

    /// `--hole-diameter`, in metres.
    pub fn diameter_m(&self) -> Result<Option<f64>, ParamError> {
        self.hole_diameter.map(check_hole_diameter_mm).transpose()
    }

    /// `--hole-height`, in metres.
    pub fn height_m(&self) -> Result<Option<f64>, ParamError> {
        self.hole_height.map(check_hole_height_m).transpose()
    }

    /// `--cd`.
    pub fn cd_checked(&self) -> Result<Option<f64>, ParamError> {
        self.cd.map(check_cd).transpose()
    }

    /// `--cd-range LOW..HIGH`, which must include `--cd` (or the default).
    pub fn cd_range_checked(&self) -> Result<Option<(f64, f64)>, ParamError> {
        self.cd_range
            .as_deref()
            .map(|text| check_cd_range(text, self.cd))
            .transpose()
    }
}

impl ParamChanges {
    /// The change the options give, each value checked, in SI.
    pub fn change(&self) -> Result<ParamChange, ParamError> {
        Ok(ParamChange {
            unknown_diameter: self.unknown_diameter,
            density_kg_m3: self.density.map(check_density_kg_m3).transpose()?,
            ..self.hole.change()?
        })
    }
}

/// Sends a request to the daemon and waits for its acknowledgement; returns
/// the daemon's account of what it did.
///
/// A request is only written when a daemon can take it: one that is
/// running (busy or not), or stalled on the database (it takes the request
/// once it can write again). With no daemon it says so and writes nothing.
/// A request written in the seconds after a daemon died or stalled (its
/// heartbeat still fresh) stays in its row and is applied, with the time it
/// was made, by the next daemon or once the daemon can write; the wait says
/// so as soon as the heartbeat goes stale.
pub fn send(db: &Path, request: &Request) -> anyhow::Result<String> {
    if !db.exists() {
        bail!(
            "the database {} does not exist, so no daemon is running on it; start one with `leaktally run --config FILE --db {}`",
            db.display(),
            db.display()
        );
    }
    let conn = store::open_for_requests(db)?;
    let heartbeat = store::heartbeat(&conn).map_err(|e| damage_said(e, db))?;
    let Some(h) = heartbeat else {
        bail!(
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
            bail!(
                "no leaktally daemon is running on {} (last seen {}); start it with `leaktally run --config {} --db {}`; nothing was changed",
                db.display(),
                report::utc(h.beat_at_ms),
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
                report::utc(h.beat_at_ms)
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
    let action = store::action(&conn, id)?
        .ok_or_else(|| StoreError::Corrupt(format!("action {id} vanished")))?;
    let made = report::utc(action.requested_at_ms);
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
            "done" => return Ok(action.outcome.unwrap_or_default()),
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
            DaemonState::NotRunning => bail!(
                "the daemon stopped before it took request {id}; the request is recorded and will be applied, with the time it was made ({made}), when a daemon next starts on {}: {restart}",
                db.display()
            ),
            // As soon as it shows (a heartbeat 5 s stale): it will not
            // take the request until it can write, however long that is.
            DaemonState::Stalled => bail!(
                "the daemon is running but stalled on the database (it has not written to it for over {} s: another program holding the write lock, a full disk, or a disk that does not answer; its log says which); request {id} is recorded and will be applied, with the time it was made ({made}), once it can write again; `leaktally status` shows when",
                SILENT_AFTER_MS / 1000
            ),
            DaemonState::Busy { for_ms, activity } if waited => bail!(
                "the daemon is running but busy ({activity}, for {} s), and has not taken request {id} yet; the request is recorded and it will apply it, with the time it was made ({made}), as soon as it gets to it; `leaktally status` shows when",
                for_ms / 1000
            ),
            _ if waited => bail!(
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
    let user = std::env::var("USER")
        .or_else(|_| std::env::var("LOGNAME"))
        .ok()
        .or_else(user_from_uid)
        .unwrap_or_else(|| "unknown".into());
    let host = std::fs::read_to_string("/proc/sys/kernel/hostname")
        .map(|h| h.trim().to_owned())
        .or_else(|_| std::env::var("HOSTNAME"))
        .unwrap_or_else(|_| "unknown".into());
    (user, host)
}

/// The login name of this process's real uid, from /proc and /etc/passwd,
/// for sessions (services, sudo, cron) that set no USER.
fn user_from_uid() -> Option<String> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let uid = status
        .lines()
        .find_map(|l| l.strip_prefix("Uid:"))?
        .split_whitespace()
        .next()?
        .to_owned();
    let passwd = std::fs::read_to_string("/etc/passwd").ok()?;
    passwd.lines().find_map(|line| {
        let mut fields = line.split(':');
        let name = fields.next()?;
        (fields.nth(1)? == uid).then(|| name.to_owned())
    })
}

/// Parses `--since`: an RFC 3339 time (`2026-12-01T13:42:00Z`), a time of
/// day today in this machine's time zone (`13:42` or `13:42:30`; yesterday
/// only when that is less than 3 h ago, as just after midnight), or a
/// duration ago (`90s`, `5m`, `1h30m`).
pub fn parse_since(text: &str, now_ms: i64) -> anyhow::Result<i64> {
    let text = text.trim();
    if let Some(ago) = parse_duration(text) {
        if ago > MAX_AGO {
            bail!(
                "--since {text} is more than {} days ago; no logged history goes back that far; give a full time such as 2026-12-01T13:42:00Z",
                MAX_AGO.as_secs() / 86_400
            );
        }
        return Ok(now_ms.saturating_sub(ago.as_millis() as i64));
    }
    if let Ok(t) = text.parse::<jiff::Timestamp>() {
        return Ok(t.as_millisecond());
    }
    if let Ok(time) = text.parse::<jiff::civil::Time>() {
        let now = jiff::Timestamp::from_millisecond(now_ms)?
            .to_zoned_datetime(jiff::tz::TimeZone::system());
        let mut at = now
            .date()
            .to_datetime(time)
            .to_zoned_datetime(now.time_zone().clone())?;
        if at.timestamp() > now.timestamp() {
            // Just after midnight, 23:55 means a few minutes ago, yesterday.
            // Much further back, a time still to come today is a slip.
            at = at.yesterday()?;
            if now_ms - at.timestamp().as_millisecond() > 3 * 3_600_000 {
                bail!(
                    "--since {text} is later than the time now ({}); give how long ago (like 20m) or a full time such as {}",
                    now.strftime("%H:%M"),
                    at.strftime("%Y-%m-%dT%H:%M:%S%:z")
                );
            }
        }
        return Ok(at.timestamp().as_millisecond());
    }
    bail!(
        "--since {text:?} is not a time or a duration; write a time today like 13:42, a UTC time like 2026-12-01T13:42:00Z, or how long ago like 90s, 5m or 1h30m"
    )
}

/// The furthest back a duration may go: a year is past any event's logged
/// history (the rolling window keeps 24 h; event samples are kept).
const MAX_AGO: Duration = Duration::from_secs(366 * 86_400);

/// `90s`, `5m`, `1h30m`, `2h`: a duration from number-and-unit parts.
pub fn parse_duration(text: &str) -> Option<Duration> {
    let mut total = 0.0;
    let mut number = String::new();
    let mut any = false;
    let mut chars = text.chars().peekable();
    while let Some(c) = chars.next() {
        if c.is_ascii_digit() || c == '.' {
            number.push(c);
            continue;
        }
        let mut unit = c.to_string();
        while let Some(&n) = chars.peek() {
            if n.is_ascii_alphabetic() {
                unit.push(n);
                chars.next();
            } else {
                break;
            }
        }
        let value: f64 = number.parse().ok()?;
        number.clear();
        let seconds = match unit.as_str() {
            "s" | "sec" => 1.0,
            "m" | "min" => 60.0,
            "h" | "hr" => 3600.0,
            _ => return None,
        };
        total += value * seconds;
        any = true;
    }
    if !(any && number.is_empty()) {
        return None;
    }
    // Refuses NaN, negatives and sizes past Duration's range.
    Duration::try_from_secs_f64(total).ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn since_accepts_durations_and_times() {
        let now = jiff::Timestamp::from_second(1_780_000_000)
            .unwrap()
            .as_millisecond();
        assert_eq!(parse_since("90s", now).unwrap(), now - 90_000);
        assert_eq!(parse_since("1h30m", now).unwrap(), now - 5_400_000);
        assert_eq!(
            parse_since("2026-05-28T20:00:00Z", now).unwrap(),
            1_779_998_400_000
        );
        let today = parse_since("00:00", now).unwrap();
        assert!(today <= now && now - today < 86_400_000);
        let err = parse_since("9000h", now).unwrap_err().to_string();
        assert!(err.contains("more than 366 days ago"), "{err}");
        for bad in [
            "soon",
            "5 parsecs",
            "12:99",
            "-5m",
            "",
            "99999999999999999999s",
        ] {
            let err = parse_since(bad, now).unwrap_err().to_string();
            assert!(err.contains("is not a time or a duration"), "{bad}: {err}");
        }
    }
}
