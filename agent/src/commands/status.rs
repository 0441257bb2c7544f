//! `leaktally status`: the running totals, for people and for machines.
//!
//! Opens the database read-only (beside the daemon's writer, so it works
//! from any terminal on the box and while the daemon runs), has the read
//! model (`crate::status`) build the document, and prints it as the table
//! (`crate::report::table`) or as JSON.

use crate::status::{self, StatusDocument, StatusError};
use crate::store;
use std::path::Path;

/// The status document of one event, or of every open event, read from
/// the database at `db`.
pub fn read(db: &Path, event: Option<i64>) -> anyhow::Result<StatusDocument> {
    let conn = store::open_read_only(db)?;
    status::document(&conn, event).map_err(|e| match e {
        StatusError::NoEvent(id) => anyhow::anyhow!(
            "there is no event {id} in {}; `leaktally status` lists the open events",
            db.display()
        ),
        StatusError::Store(e) => e.into(),
    })
}

/// Prints the document of one event, or of every open event.
pub fn print(db: &Path, event: Option<i64>, json: bool) -> anyhow::Result<()> {
    let doc = read(db, event)?;
    if json {
        println!("{}", serde_json::to_string_pretty(&doc)?);
    } else {
        print!("{}", status::text(&doc));
    }
    Ok(())
}
