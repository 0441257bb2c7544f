//! The status table for a terminal: the daemon's state, each event with
//! its latest estimate, and the caution.
//!
//! It renders borrowed views ([`Table`], [`Daemon`], [`Event`]) that the read
//! model (`crate::status`) fills from its document, so that the prose lives
//! here while this module knows nothing of the document or how it is read.
//!
//! Left out: the JSON (the document serialises itself) and the web page
//! (`crate::web::page`, which lays out the same words as HTML).

use super::estimate::{self, Words};
use super::{Presentation, duration};
use crate::estimate::Estimate;
use crate::model::{Density, Mass, MassRate, TimeSpan};
use std::fmt::Write as _;

/// What the table shows.
pub struct Table<'a> {
    /// When the figures were read.
    pub generated_at_ms: i64,
    /// How times and figures are shown.
    pub presentation: &'a Presentation,
    pub daemon: Daemon<'a>,
    pub events: Vec<Event<'a>>,
    pub caution: &'a str,
}

/// The daemon's state, as the table says it.
pub struct Daemon<'a> {
    /// Beating its heartbeat (busy or not).
    pub running: bool,
    /// Not beating, but its process is alive: it cannot write.
    pub stalled: bool,
    /// What a busy daemon is busy with.
    pub busy_with: Option<&'a str>,
    /// When it last beat.
    pub last_seen_ms: Option<i64>,
    /// Its timeline minus the wall clock, ms.
    pub clock_offset_ms: Option<i64>,
}

/// One event's lines.
pub struct Event<'a> {
    pub id: i64,
    pub tank: &'a str,
    /// Who flagged it: `operator` or `leak flag`.
    pub source: &'a str,
    pub revision: i64,
    /// The leak's start.
    pub start_ms: i64,
    pub closed_at_ms: Option<i64>,
    pub params_text: &'a str,
    /// Why an open event is not being tracked.
    pub tracking_error: Option<&'a str>,
    /// Whether its data stopped for longer than the site's polling explains.
    pub stale: bool,
    pub data_age_ms: Option<i64>,
    /// The latest estimate and its words; none before the first usable
    /// sample.
    pub estimate: Option<(&'a Estimate, &'a Words)>,
}

/// The table for people.
pub fn render(table: &Table<'_>) -> String {
    let mut out = String::new();
    let daemon = &table.daemon;
    let people = table.presentation;
    let last_seen = daemon
        .last_seen_ms
        .map_or("never".into(), |at| people.time(at));
    let _ = writeln!(
        out,
        "leaktally status at {}",
        people.time(table.generated_at_ms)
    );
    if daemon.stalled {
        let _ = writeln!(
            out,
            "WARNING: the daemon is running but stalled on the database: it has not written to it since {}. Its writes fail or wait (another program holding the write lock, a full disk, or a disk that does not answer; its log and web page say which). These figures are behind; it catches up by itself once it can write.",
            last_seen
        );
    } else if let Some(activity) = daemon.busy_with {
        let _ = writeln!(
            out,
            "NOTE: the daemon is running but busy ({activity}); its database writes go on, and these figures may lag by a few seconds."
        );
    } else if !daemon.running {
        let _ = writeln!(
            out,
            "WARNING: no daemon is running (last seen {}); these figures are not being updated.",
            last_seen
        );
    }
    if let Some(offset) = daemon.clock_offset_ms.filter(|o| o.abs() >= 1000) {
        let _ = writeln!(
            out,
            "NOTE: the daemon's times run {} {} this machine's clock after a step of the wall clock (it keeps every sample in order; README, \"Clock steps\").",
            duration(TimeSpan::seconds(offset.unsigned_abs() as f64 / 1000.0)),
            if offset > 0 { "ahead of" } else { "behind" }
        );
    }
    if table.events.is_empty() {
        let _ = writeln!(out, "No open leak events.");
    }
    for e in &table.events {
        event_text(&mut out, e, people);
    }
    let _ = writeln!(out, "\n{}", table.caution);
    out
}

/// One event's lines.
fn event_text(out: &mut String, e: &Event<'_>, people: &Presentation) {
    let start = people.time(e.start_ms);
    let span = match e.closed_at_ms {
        Some(closed) => format!(
            "closed; leaked from {start} to {} ({})",
            people.time(closed),
            duration(TimeSpan::seconds(
                (closed - e.start_ms).max(0) as f64 / 1000.0
            ))
        ),
        None => format!("open since {start}"),
    };
    let _ = writeln!(
        out,
        "\nEvent {}  tank {}  {span} (flagged by {}, revision {})",
        e.id, e.tank, e.source, e.revision
    );
    let _ = writeln!(out, "  parameters   {}", e.params_text);
    if let Some(why) = e.tracking_error {
        let _ = writeln!(
            out,
            "  NOT TRACKED  {why}; these figures are not being updated. Close the event (`leaktally leak close {}`), or fix that and restart the daemon.",
            e.id
        );
    }
    if e.stale && e.tracking_error.is_none() {
        let _ = writeln!(
            out,
            "  WARNING      no new data for {}: the figures below are not current; check the link to the tank's device and its gauge",
            e.data_age_ms
                .map_or("any sample yet".into(), |age| duration(TimeSpan::seconds(
                    age as f64 / 1000.0
                )))
        );
    }
    let Some((est, said)) = e.estimate else {
        let _ = writeln!(out, "  no usable sample yet");
        return;
    };
    let rho = Density::kg_per_cubic_metre(est.density_kg_m3);
    let kg = |x: f64| people.mass(Mass::kilograms(x));
    let flow = |x: f64| people.rate(MassRate::kg_per_second(x));
    let _ = writeln!(
        out,
        "  released     {}  (band {} to {})",
        kg(est.released_best_kg),
        kg(est.released_low_kg),
        kg(est.released_high_kg)
    );
    let _ = writeln!(
        out,
        "               {}",
        people.volume(Mass::kilograms(est.released_best_kg), rho)
    );
    let _ = writeln!(out, "  band from    {}", said.band_text);
    let closed = e.closed_at_ms.is_some();
    let _ = writeln!(
        out,
        "  {}  {}  (band {} to {}), {} phase",
        if closed { "rate at end" } else { "rate now   " },
        flow(est.rate_best_kg_s),
        flow(est.rate_low_kg_s),
        flow(est.rate_high_kg_s),
        estimate::phase_text(est)
    );
    let _ = writeln!(
        out,
        "  best from    {}: {}",
        estimate::method_name(est.method),
        said.method_reason
    );
    for warning in &said.warnings_text {
        let _ = writeln!(out, "  WARNING      {warning}");
    }
    if let Some(inv) = est.inventory_kg {
        let _ = writeln!(
            out,
            "  inventory    {} ± {} by the level balance",
            kg(inv),
            kg(est.band.inventory_kg)
        );
    }
    let _ = writeln!(out, "  fitted hole  {}", said.fit_status);
    if let Some(text) = &said.implied_cd_text {
        let _ = writeln!(out, "  implied Cd   {text}");
    }
    let _ = writeln!(
        out,
        "  density      {}",
        estimate::density_text(
            est.density_kg_m3,
            est.temperature_k.map_or(
                estimate::DensityBasis::Fixed,
                estimate::DensityBasis::Temperature
            )
        )
    );
    let _ = writeln!(
        out,
        "  remaining    {} above the hole (level {})",
        kg(est.remaining_above_hole_kg),
        people.length(est.level_m)
    );
    match &est.forecast {
        _ if closed => {
            let _ = writeln!(
                out,
                "  forecast     none: the event is closed (the leak was isolated)"
            );
        }
        Some(f) => {
            let _ = writeln!(
                out,
                "  forecast     flow stops in {} at {}; total then {}; total released by 15 min from now {}, by 1 h from now {}",
                duration(TimeSpan::seconds(f.stops_after_s)),
                people.length(f.stop_level_m),
                kg(f.total_at_stop_kg),
                kg(f.total_in_15_min_kg),
                kg(f.total_in_1_h_kg)
            );
        }
        None => {
            let _ = writeln!(out, "  forecast     needs a hole size or a fitted hole");
        }
    }
    for c in &est.crossings {
        let _ = writeln!(
            out,
            "  reportable   {}: {}",
            kg(c.quantity_kg),
            estimate::crossing_text(c, people)
        );
    }
    let q = &est.quality;
    let _ = writeln!(
        out,
        "  data         {} samples used, {} skipped, {} pressure held, {} gap(s) bridged ({}, longest {:.0} s)",
        q.samples_used,
        q.samples_skipped,
        q.pressure_held,
        q.gaps_bridged,
        kg(q.bridged_kg),
        q.longest_gap_s
    );
    let _ = writeln!(out, "  last sample  {}", people.time(est.at_ms));
}
