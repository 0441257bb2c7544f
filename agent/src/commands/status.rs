//! `leaktally status`: the running totals, for people and for machines.
//!
//! Opens the database read-only (beside the daemon's writer, so it works
//! from any terminal on the box and while the daemon runs), has the read
//! model (`crate::status`) build the document, and prints it as the table
//! (`crate::report::table`) or as JSON.

use super::args::SiteArgs;
use super::exit::{self, Coded};
use crate::report::Presentation;
use crate::status::{self, StatusDocument, StatusError};
use crate::store;
use std::path::Path;

/// `leaktally status`'s options.
#[derive(Debug, clap::Args)]
pub struct StatusArgs {
    /// One event's id, open or closed (`leaktally events` lists them); all
    /// open events if absent.
    #[arg(value_parser = super::args::event_id)]
    pub event: Option<i64>,
    /// Print the JSON document for machines instead of the table.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    pub site: SiteArgs,
}

/// The status document of one event (open or closed), or of every open
/// event, read from the database at `db`.
pub fn read(
    db: &Path,
    event: Option<i64>,
    people: &Presentation,
) -> anyhow::Result<StatusDocument> {
    let conn = store::open_read_only(db)?;
    status::document(&conn, event, people).map_err(|e| match e {
        StatusError::NoEvent(id) => anyhow::anyhow!(
            "there is no event {id} in {}; `leaktally events` lists every event, open and closed",
            db.display()
        ),
        StatusError::Store(e) => e.into(),
    })
}

/// Runs `leaktally status` as the command line gave it: prints the
/// document of one event, or of every open event. Exits with
/// `exit::NO_DAEMON` when no daemon is running (the figures are not being
/// updated), after printing them; a busy or stalled one is running.
pub fn command(args: StatusArgs) -> anyhow::Result<()> {
    let (db, people) = args.site.database()?;
    let doc = read(&db, args.event, &people)?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&doc)?);
    } else {
        print!("{}", status::text(&doc));
    }
    // A stalled daemon is alive and catches up by itself: not code 4; nor
    // is a closed event asked for by its id, whose figures are final.
    let all_final = args.event.is_some() && doc.events.iter().all(|e| e.state == "closed");
    if doc.daemon_running || doc.daemon_stalled || all_final {
        Ok(())
    } else {
        Err(Coded::said(
            exit::NO_DAEMON,
            "no daemon is running: these figures are not being updated",
        ))
    }
}
