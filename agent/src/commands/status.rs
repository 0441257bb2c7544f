//! `leaktally status`: the running totals, for people and for machines.
//!
//! Opens the database read-only (beside the daemon's writer, so it works
//! from any terminal on the box and while the daemon runs), has the read
//! model (`crate::status`) build the document, and prints it as the table
//! (`crate::report::table`) or as JSON.

use super::args::DEFAULT_DB;
use crate::status::{self, StatusDocument, StatusError};
use crate::store;
use std::path::{Path, PathBuf};

/// `leaktally status`'s options.
#[derive(Debug, clap::Args)]
pub struct StatusArgs {
    /// One event's id; all open events if absent.
    pub event: Option<i64>,
    /// Print the JSON document for machines instead of the table.
    #[arg(long)]
    pub json: bool,
    /// The SQLite database the daemon writes.
    #[arg(value_parser = crate::commands::args::path_arg, long, default_value = DEFAULT_DB)]
    pub db: PathBuf,
}

/// The status document of one event, or of every open event, read from
/// the database at `db`.
pub fn read(db: &Path, event: Option<i64>) -> anyhow::Result<StatusDocument> {
    let conn = store::open_read_only(db)?;
    status::document(&conn, event, &crate::report::Presentation::default()).map_err(|e| match e {
        StatusError::NoEvent(id) => anyhow::anyhow!(
            "there is no event {id} in {}; `leaktally status` lists the open events",
            db.display()
        ),
        StatusError::Store(e) => e.into(),
    })
}

/// Runs `leaktally status` as the command line gave it: prints the
/// document of one event, or of every open event.
pub fn command(args: StatusArgs) -> anyhow::Result<()> {
    let doc = read(&args.db, args.event)?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&doc)?);
    } else {
        print!("{}", status::text(&doc));
    }
    Ok(())
}
