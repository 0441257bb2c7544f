//! `leaktally status`: the running totals, for people and for machines.
//!
//! Reads the database only (a read-only connection beside the daemon's), so
//! it works from any terminal on the box and while the daemon runs. The JSON
//! document is the one the web page serves too; its fields are documented in
//! the README and only ever added to, never renamed.

use crate::model::{Density, Mass, MassRate, TimeSpan};
use crate::report;
use crate::store::{self, EventRow};
use crate::track::estimator::{Estimate, LeakParams};
use crate::track::tracker::describe_params;
use serde::Serialize;
use std::fmt::Write as _;
use std::path::Path;

/// The status document: every event asked for, with its latest estimate.
#[derive(Debug, Clone, Serialize)]
pub struct StatusDocument {
    /// Version of this document's layout.
    pub format: u32,
    pub generated_at: String,
    pub generated_at_ms: i64,
    pub caution: &'static str,
    /// Whether a daemon has beaten its heartbeat in the last 5 s.
    pub daemon_running: bool,
    /// Not beating, but its process is alive: it cannot write to the
    /// database (locked by another program, or its disk full).
    pub daemon_stalled: bool,
    pub daemon_last_seen: Option<String>,
    pub events: Vec<EventStatus>,
}

/// One event in the status document.
#[derive(Debug, Clone, Serialize)]
pub struct EventStatus {
    pub event: i64,
    pub tank: String,
    /// "open" or "closed".
    pub state: &'static str,
    /// "operator" or "leak flag".
    pub source: String,
    pub start: String,
    pub start_ms: i64,
    pub opened_at_ms: i64,
    pub closed_at_ms: Option<i64>,
    pub revision: i64,
    pub params: LeakParams,
    pub params_text: String,
    /// The best released total as liquid volume at the logged density.
    pub released_volume: Option<Volumes>,
    /// The latest estimate; absent until the first usable sample.
    pub estimate: Option<Estimate>,
}

/// A volume in the units responders use.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct Volumes {
    pub m3: f64,
    pub litres: f64,
    pub us_gallons: f64,
    pub barrels: f64,
}

impl Volumes {
    pub fn of(mass_kg: f64, density_kg_m3: f64) -> Self {
        let m3 = mass_kg / density_kg_m3;
        let litres = m3 * 1000.0;
        Self {
            m3,
            litres,
            us_gallons: litres / report::LITRES_PER_US_GALLON,
            barrels: litres / report::LITRES_PER_BARREL,
        }
    }
}

/// Builds the status document of one event, or of every open event.
pub fn document(db: &Path, event: Option<i64>) -> anyhow::Result<StatusDocument> {
    let conn = store::open_read_only(db)?;
    let rows: Vec<EventRow> = match event {
        Some(id) => vec![store::event(&conn, id)?.ok_or_else(|| {
            anyhow::anyhow!(
                "there is no event {id} in {}; `leaktally status` lists the open events",
                db.display()
            )
        })?],
        None => store::events(&conn, true)?,
    };
    let mut events = Vec::new();
    for row in rows {
        let estimate = store::latest_estimate(&conn, &row)?;
        events.push(EventStatus {
            event: row.id,
            tank: row.tank.clone(),
            state: if row.closed_at_ms.is_some() {
                "closed"
            } else {
                "open"
            },
            source: row.source.clone(),
            start: report::utc(row.start_ms),
            start_ms: row.start_ms,
            opened_at_ms: row.opened_at_ms,
            closed_at_ms: row.closed_at_ms,
            revision: row.revision,
            params: row.params,
            params_text: describe_params(&row.params),
            released_volume: estimate
                .as_ref()
                .map(|e| Volumes::of(e.released_best_kg, e.density_kg_m3)),
            estimate,
        });
    }
    let now = store::now_ms();
    let heartbeat = store::heartbeat(&conn)?;
    let running = heartbeat
        .as_ref()
        .is_some_and(|h| h.stopped_at_ms.is_none() && now - h.beat_at_ms <= 5_000);
    Ok(StatusDocument {
        format: 1,
        generated_at: report::utc(now),
        generated_at_ms: now,
        caution: report::CAUTION,
        daemon_running: running,
        daemon_stalled: !running && heartbeat.as_ref().is_some_and(|h| h.process_alive()),
        daemon_last_seen: heartbeat.map(|h| report::utc(h.beat_at_ms)),
        events,
    })
}

/// The document as a table for people.
pub fn human(doc: &StatusDocument) -> String {
    let mut out = String::new();
    let _ = writeln!(out, "leaktally status at {}", doc.generated_at);
    if doc.daemon_stalled {
        let _ = writeln!(
            out,
            "WARNING: the daemon is running but has not written to the database since {}: another program may hold its lock, or its disk may be full (see the daemon's log). These figures are behind; it catches up by itself once it can write.",
            doc.daemon_last_seen.as_deref().unwrap_or("never")
        );
    } else if !doc.daemon_running {
        let _ = writeln!(
            out,
            "WARNING: no daemon is running (last seen {}); these figures are not being updated.",
            doc.daemon_last_seen.as_deref().unwrap_or("never")
        );
    }
    if doc.events.is_empty() {
        let _ = writeln!(out, "No open leak events.");
    }
    for e in &doc.events {
        let span = match e.closed_at_ms {
            Some(closed) => format!("closed; leaked from {} to {}", e.start, report::utc(closed)),
            None => format!("open since {}", e.start),
        };
        let _ = writeln!(
            out,
            "\nEvent {}  tank {}  {span} (flagged by {}, revision {})",
            e.event, e.tank, e.source, e.revision
        );
        let _ = writeln!(out, "  parameters   {}", e.params_text);
        let Some(est) = &e.estimate else {
            let _ = writeln!(out, "  no usable sample yet");
            continue;
        };
        let rho = Density::kg_per_cubic_metre(est.density_kg_m3);
        let kg = |x: f64| report::mass(Mass::kilograms(x));
        let rate = |x: f64| report::rate(MassRate::kg_per_second(x));
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
            report::volumes(Mass::kilograms(est.released_best_kg), rho)
        );
        let closed = e.closed_at_ms.is_some();
        let _ = writeln!(
            out,
            "  {}  {}  (band {} to {}), {} phase",
            if closed {
                "rate at end "
            } else {
                "rate now    "
            },
            rate(est.rate_best_kg_s),
            rate(est.rate_low_kg_s),
            rate(est.rate_high_kg_s),
            est.phase
        );
        let _ = writeln!(
            out,
            "  best from    {}: {}",
            est.method.name(),
            est.method_reason
        );
        if let Some(warning) = &est.consistency {
            let _ = writeln!(out, "  WARNING      {warning}");
        }
        if let Some(inv) = est.inventory_kg {
            let _ = writeln!(out, "  inventory    {} by the level balance", kg(inv));
        }
        match est.fitted_diameter_m {
            Some(d) => {
                let _ = writeln!(
                    out,
                    "  fitted hole  {:.1} mm at Cd {}",
                    d * 1000.0,
                    e.params.cd
                );
            }
            None => {
                let _ = writeln!(out, "  fitted hole  {}", est.fit_status);
            }
        }
        let _ = writeln!(
            out,
            "  remaining    {} above the hole (level {:.3} m)",
            kg(est.remaining_above_hole_kg),
            est.level_m
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
                    "  forecast     flow stops in {} at {:.2} m; total then {}; in 15 min {}; in 1 h {}",
                    report::duration(TimeSpan::seconds(f.stops_after_s)),
                    f.stop_level_m,
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
            let when = c.at_ms.map_or("not reached".to_owned(), |t| {
                format!("crossed at {}", report::utc(t))
            });
            let _ = writeln!(out, "  reportable   {}: {when}", kg(c.quantity_kg));
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
        let _ = writeln!(out, "  last sample  {}", report::utc(est.at_ms));
    }
    let _ = writeln!(out, "\n{}", doc.caution);
    out
}
