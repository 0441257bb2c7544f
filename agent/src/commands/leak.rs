//! `leaktally leak open|revise|note|close`: operator actions.
//!
//! It checks the options, builds the request and hands it to
//! [`actions::send`], which writes it for the daemon and waits for its
//! acknowledgement; then it prints what the daemon did.
//!
//! Left out: the waiting and what it says when the daemon does not answer
//! (`crate::actions`).

use crate::actions::{self, Request, parse_since};
use crate::cli::{HoleArgs, LeakCommand, ParamChanges};
use crate::estimate::{
    ParamChange, ParamError, check_cd, check_cd_range, check_density_kg_m3, check_hole_diameter_mm,
    check_hole_height_m,
};
use crate::store;

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
    let reply = actions::send(&db, &request)?;
    // The daemon's outcome quotes the operator's note and tank id; a
    // control character in them must not reach the terminal as one.
    println!("{}", crate::logging::one_line(&reply.text));
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
