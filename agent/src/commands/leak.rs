//! `leaktally leak open|revise|note|close`: operator actions.
//!
//! It checks the options, builds the request and hands it to
//! [`actions::send`], which writes it for the daemon and waits for its
//! acknowledgement; then it prints what the daemon did.
//!
//! Left out: the waiting and what it says when the daemon does not answer
//! (`crate::actions`).

use super::args::{HoleArgs, ParamChangeArgs, SiteArgs};
use crate::actions::{self, Request, parse_since};
use crate::store;
use clap::Subcommand;

#[derive(Debug, Subcommand)]
pub enum LeakCommand {
    /// Open a leak event on a tank.
    Open {
        /// The tank's id (tag) in the config.
        #[arg(long)]
        tank: String,
        #[command(flatten)]
        hole: HoleArgs,
        /// When the leak began: a time today in the site's time zone
        /// (13:42), an RFC 3339 time (2026-12-01T13:42:00Z) or how long
        /// ago (90s, 5m, 1h30m). The total is computed from then, from the
        /// logged history.
        #[arg(long)]
        since: Option<String>,
        /// A note for the audit trail.
        #[arg(long)]
        note: Option<String>,
        #[command(flatten)]
        site: SiteArgs,
        /// Print the daemon's acknowledgement as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Recompute an event from its start with new parameters (logged).
    Revise {
        /// The event's id (`leaktally events` lists them).
        #[arg(value_parser = super::args::event_id)]
        event: i64,
        #[command(flatten)]
        changes: ParamChangeArgs,
        /// Why, for the audit trail.
        #[arg(long)]
        note: Option<String>,
        #[command(flatten)]
        site: SiteArgs,
        /// Print the daemon's acknowledgement as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Add a note to an event's audit trail.
    Note {
        /// The event's id (`leaktally events` lists them).
        #[arg(value_parser = super::args::event_id)]
        event: i64,
        /// The note, in quotes.
        text: String,
        #[command(flatten)]
        site: SiteArgs,
        /// Print the daemon's acknowledgement as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Close an event once the leak is isolated; its total no longer changes.
    Close {
        /// The event's id (`leaktally events` lists them).
        #[arg(value_parser = super::args::event_id)]
        event: i64,
        /// How the leak was isolated, for the audit trail.
        #[arg(long)]
        note: Option<String>,
        #[command(flatten)]
        site: SiteArgs,
        /// Print the daemon's acknowledgement as JSON.
        #[arg(long)]
        json: bool,
    },
}

/// What `leak --json` prints: the daemon's acknowledgement.
#[derive(Debug, serde::Serialize)]
struct Acknowledged<'a> {
    /// Version of this document's layout (README, "Formats").
    format: u32,
    /// `open`, `revise`, `note` or `close`.
    request: &'a str,
    /// The action's row in the audit trail.
    action: i64,
    /// The event the request opened or acted on.
    event: Option<i64>,
    /// The daemon's account of what it did.
    text: String,
}

impl LeakCommand {
    /// Where the site and its database are, for every subcommand.
    fn site(&self) -> &SiteArgs {
        match self {
            LeakCommand::Open { site, .. }
            | LeakCommand::Revise { site, .. }
            | LeakCommand::Note { site, .. }
            | LeakCommand::Close { site, .. } => site,
        }
    }
}

/// Runs one `leak` subcommand.
pub fn command(command: LeakCommand) -> anyhow::Result<()> {
    let now = store::now_ms();
    let (db, people) = command.site().database()?;
    let (json, request) = match command {
        LeakCommand::Open {
            tank,
            hole,
            since,
            note,
            json,
            ..
        } => {
            if hole.hole_height.is_none() {
                eprintln!(
                    "warning: no --hole-height-m given; assuming the hole is at the tank bottom, which releases the most (the conservative choice)"
                );
            }
            if hole.cd.is_none() {
                eprintln!(
                    "note: no --cd given; using 1.0 (conservative), with the band from 0.61 to 1.0"
                );
            }
            let since_ms = since
                .as_deref()
                .map(|s| parse_since(s, now, &people.zone))
                .transpose()?;
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
            (json, request)
        }
        LeakCommand::Revise {
            event,
            changes,
            note,
            json,
            ..
        } => {
            let request = Request::Revise {
                event,
                change: changes.change()?,
                note,
            };
            (json, request)
        }
        LeakCommand::Note {
            event, text, json, ..
        } => (json, Request::Note { event, text }),
        LeakCommand::Close {
            event, note, json, ..
        } => (json, Request::Close { event, note }),
    };
    let reply = actions::send(&db, &request, &people)?;
    if json {
        let doc = Acknowledged {
            format: 1,
            request: request.kind(),
            action: reply.action,
            event: reply.event,
            text: reply.text,
        };
        println!("{}", serde_json::to_string_pretty(&doc)?);
    } else {
        // The daemon's outcome quotes the operator's note and tank id; a
        // control character in them must not reach the terminal as one.
        println!("{}", crate::logging::one_line(&reply.text));
    }
    Ok(())
}
