//! `leaktally events`: the event history, open and closed, for people and
//! for machines.
//!
//! Opens the database read-only (beside the daemon), has the read model
//! (`crate::status::history`) list the events, and prints the table or the
//! JSON.

use super::args::SiteArgs;
use super::exit::{self, Coded};
use crate::actions::parse_since;
use crate::status::{EventFilter, history};
use crate::store;

/// `leaktally events`' options.
#[derive(Debug, clap::Args)]
pub struct EventsArgs {
    /// Only this tank's events (its id in the config).
    #[arg(long)]
    pub tank: Option<String>,
    /// Only open events.
    #[arg(long, conflicts_with = "closed")]
    pub open: bool,
    /// Only closed events.
    #[arg(long)]
    pub closed: bool,
    /// Only events still leaking at or after this time: a time today in the
    /// site's zone (13:42), an RFC 3339 time, or how long ago (7d, 12h).
    #[arg(long, value_name = "TIME")]
    pub since: Option<String>,
    /// Only events that began before this time (written as for --since).
    #[arg(long, value_name = "TIME")]
    pub until: Option<String>,
    /// At most this many events, newest first.
    #[arg(long, value_name = "N")]
    pub limit: Option<usize>,
    /// Print the JSON document for machines instead of the table.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    pub site: SiteArgs,
}

/// Runs `leaktally events`: prints the events that match, newest first.
/// Exits with `exit::NO_DAEMON` when no daemon is running, after printing
/// them (open events' figures are then not being updated).
pub fn command(args: EventsArgs) -> anyhow::Result<()> {
    let (db, people) = args.site.database()?;
    let now = store::now_ms();
    let when = |t: &Option<String>| {
        t.as_deref()
            .map(|t| parse_since(t, now, &people.zone))
            .transpose()
    };
    let filter = EventFilter {
        tank: args.tank.clone(),
        open: match (args.open, args.closed) {
            (true, _) => Some(true),
            (_, true) => Some(false),
            _ => None,
        },
        since_ms: when(&args.since)?,
        until_ms: when(&args.until)?,
        limit: args.limit,
    };
    let conn = store::open_read_only(&db)?;
    let doc = history::history(&conn, &filter, &people)?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&doc)?);
    } else {
        print!("{}", history::text(&doc));
    }
    // Busy and stalled daemons are alive, and catch up by themselves.
    let running = store::heartbeat(&conn)?
        .is_some_and(|h| !matches!(h.state(now), store::DaemonState::NotRunning));
    if running {
        Ok(())
    } else {
        if !args.json {
            eprintln!(
                "warning: no daemon is running on {}: open events' figures are not being updated",
                db.display()
            );
        }
        Err(Coded::said(exit::NO_DAEMON, "no daemon is running"))
    }
}
