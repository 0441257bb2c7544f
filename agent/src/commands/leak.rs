//! `leaktally leak open|revise|note|close`: operator actions.
//!
//! It checks the options, builds the request and hands it to
//! [`actions::send`], which writes it for the daemon and waits for its
//! acknowledgement; then it prints what the daemon did.
//!
//! Left out: the waiting and what it says when the daemon does not answer
//! (`crate::actions`).

use super::args::{DEFAULT_DB, HoleArgs, ParamChangeArgs};
use crate::actions::{self, Request, parse_since};
use crate::store;
use clap::Subcommand;
use std::path::PathBuf;

#[derive(Debug, Subcommand)]
pub enum LeakCommand {
    /// Open a leak event on a tank.
    Open {
        /// The tank's id (tag) in the config.
        #[arg(long)]
        tank: String,
        #[command(flatten)]
        hole: HoleArgs,
        /// When the leak began: a time today (13:42), a UTC time
        /// (2026-12-01T13:42:00Z) or how long ago (90s, 5m, 1h30m).
        /// The total is computed from then, from the logged history.
        #[arg(long)]
        since: Option<String>,
        /// A note for the audit trail.
        #[arg(long)]
        note: Option<String>,
        /// The SQLite database the daemon writes.
        #[arg(value_parser = crate::commands::args::path_arg, long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
    /// Recompute an event from its start with new parameters (logged).
    Revise {
        /// The event's id.
        event: i64,
        #[command(flatten)]
        changes: ParamChangeArgs,
        #[arg(long)]
        note: Option<String>,
        /// The SQLite database the daemon writes.
        #[arg(value_parser = crate::commands::args::path_arg, long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
    /// Add a note to an event's audit trail.
    Note {
        event: i64,
        text: String,
        /// The SQLite database the daemon writes.
        #[arg(value_parser = crate::commands::args::path_arg, long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
    /// Close an event once the leak is isolated; its total no longer changes.
    Close {
        event: i64,
        #[arg(long)]
        note: Option<String>,
        /// The SQLite database the daemon writes.
        #[arg(value_parser = crate::commands::args::path_arg, long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
}

/// Runs one `leak` subcommand.
pub fn command(command: LeakCommand) -> anyhow::Result<()> {
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
    let reply = actions::send(&db, &request)?;
    // The daemon's outcome quotes the operator's note and tank id; a
    // control character in them must not reach the terminal as one.
    println!("{}", crate::logging::one_line(&reply.text));
    Ok(())
}
