//! `leaktally status`: the running totals, for people and for machines.
//!
//! Reads the database only (a read-only connection beside the daemon's), so
//! it works from any terminal on the box and while the daemon runs. The JSON
//! document is the one the web page serves too; its fields are documented in
//! the README and only ever added to, never renamed.

use crate::estimate::{Estimate, LeakParams};
use crate::model::{Density, Mass, MassRate, TimeSpan};
use crate::report::{self, estimate as words};
use crate::store::{self, DaemonState, EventRow};
use crate::tracker::describe_params;
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
    /// database (locked by another program, its disk full, or a disk that
    /// does not answer).
    pub daemon_stalled: bool,
    /// `running`, `busy` (beating, but its main loop has not turned for
    /// 5 s), `stalled` or `not_running`.
    pub daemon_state: &'static str,
    /// What a busy daemon is busy with.
    pub daemon_busy_with: Option<String>,
    pub daemon_last_seen: Option<String>,
    /// The daemon's timeline minus the wall clock, ms, at its last beat: not
    /// 0 after the wall clock stepped (the README's "Clock steps").
    pub daemon_clock_offset_ms: Option<i64>,
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
    /// How old the latest estimate's sample is, ms, and whether that is
    /// older than the site's polling explains (an open event whose data
    /// stopped: a link down, a gauge failed).
    pub data_age_ms: Option<i64>,
    pub stale: bool,
    /// The latest estimate; absent until the first usable sample.
    pub estimate: Option<EstimateView>,
    /// Why an open event is not being tracked (its figures are not being
    /// updated); absent while it is.
    pub tracking_error: Option<String>,
}

/// An estimate as reports show it: the stored numbers and codes, and the
/// same said in words (rendered by `report::estimate`, never stored).
#[derive(Debug, Clone, Serialize)]
pub struct EstimateView {
    #[serde(flatten)]
    pub estimate: Estimate,
    #[serde(flatten)]
    pub words: words::Words,
    /// The given hole's disagreement with the level drop, if any (kept
    /// for readers of the first document format; also in `warnings_text`).
    pub consistency: Option<String>,
}

impl EstimateView {
    pub fn new(estimate: Estimate, params: &LeakParams) -> Self {
        let e = &estimate;
        let hole = crate::estimate::Warning::HoleInconsistent;
        Self {
            words: words::Words::of(e, params),
            consistency: e
                .warnings
                .contains(hole)
                .then(|| words::warning_text(hole, e, params)),
            estimate,
        }
    }
}

impl std::ops::Deref for EstimateView {
    type Target = Estimate;
    fn deref(&self) -> &Estimate {
        &self.estimate
    }
}

/// When an open event's data counts as stale: five poll intervals of the
/// slowest device, and never under 10 s.
pub fn stale_after_ms(config: &crate::config::Config) -> i64 {
    config
        .devices
        .iter()
        .map(|d| d.poll_interval.as_millis() as i64)
        .max()
        .unwrap_or(1000)
        .saturating_mul(5)
        .max(DEFAULT_STALE_AFTER_MS)
}

/// The stale limit when the site's config cannot be read.
pub const DEFAULT_STALE_AFTER_MS: i64 = 10_000;

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

/// Builds the status document of one event, or of every open event. The
/// stale limit comes from the config the daemon runs with, when it can be
/// read.
pub fn document(db: &Path, event: Option<i64>) -> anyhow::Result<StatusDocument> {
    let conn = store::open_read_only(db)?;
    let stale_after = store::heartbeat(&conn)?
        .and_then(|h| crate::config::load(Path::new(&h.config)).ok())
        .map_or(DEFAULT_STALE_AFTER_MS, |c| stale_after_ms(&c));
    document_with(&conn, db, event, stale_after)
}

/// The same, on an open connection, with a known stale limit.
pub fn document_with(
    conn: &rusqlite::Connection,
    db: &Path,
    event: Option<i64>,
    stale_after_ms: i64,
) -> anyhow::Result<StatusDocument> {
    let now = store::now_ms();
    let rows: Vec<EventRow> = match event {
        Some(id) => vec![store::event(conn, id)?.ok_or_else(|| {
            anyhow::anyhow!(
                "there is no event {id} in {}; `leaktally status` lists the open events",
                db.display()
            )
        })?],
        None => store::events(conn, true)?,
    };
    let untracked = store::tracking_errors(conn)?;
    let mut events = Vec::new();
    for row in rows {
        let estimate = store::latest_estimate(conn, &row)?;
        let data_age_ms = estimate.as_ref().map(|e| now - e.at_ms);
        let open = row.closed_at_ms.is_none();
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
            data_age_ms,
            stale: open && data_age_ms.unwrap_or(now - row.opened_at_ms) > stale_after_ms,
            estimate: estimate.map(|e| EstimateView::new(e, &row.params)),
            tracking_error: untracked.get(&row.id).cloned(),
        });
    }
    let heartbeat = store::heartbeat(conn)?;
    let state = heartbeat
        .as_ref()
        .map_or(DaemonState::NotRunning, |h| h.state(now));
    let running = matches!(state, DaemonState::Running | DaemonState::Busy { .. });
    Ok(StatusDocument {
        format: 1,
        generated_at: report::utc(now),
        generated_at_ms: now,
        caution: report::CAUTION,
        daemon_running: running,
        daemon_stalled: state == DaemonState::Stalled,
        daemon_state: state.name(),
        daemon_busy_with: match &state {
            DaemonState::Busy { activity, .. } => Some(activity.clone()),
            _ => None,
        },
        daemon_clock_offset_ms: heartbeat
            .as_ref()
            .filter(|_| running)
            .and_then(|h| h.clock_offset_ms),
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
            "WARNING: the daemon is running but stalled on the database: it has not written to it since {}. Its writes fail or wait (another program holding the write lock, a full disk, or a disk that does not answer; its log and web page say which). These figures are behind; it catches up by itself once it can write.",
            doc.daemon_last_seen.as_deref().unwrap_or("never")
        );
    } else if let Some(activity) = &doc.daemon_busy_with {
        let _ = writeln!(
            out,
            "NOTE: the daemon is running but busy ({activity}); its database writes go on, and these figures may lag by a few seconds."
        );
    } else if !doc.daemon_running {
        let _ = writeln!(
            out,
            "WARNING: no daemon is running (last seen {}); these figures are not being updated.",
            doc.daemon_last_seen.as_deref().unwrap_or("never")
        );
    }
    if let Some(offset) = doc.daemon_clock_offset_ms.filter(|o| o.abs() >= 1000) {
        let _ = writeln!(
            out,
            "NOTE: the daemon's times run {} {} this machine's clock after a step of the wall clock (it keeps every sample in order; README, \"Clock steps\").",
            report::duration(TimeSpan::seconds(offset.unsigned_abs() as f64 / 1000.0)),
            if offset > 0 { "ahead of" } else { "behind" }
        );
    }
    if doc.events.is_empty() {
        let _ = writeln!(out, "No open leak events.");
    }
    for e in &doc.events {
        event_text(&mut out, e);
    }
    let _ = writeln!(out, "\n{}", doc.caution);
    out
}

/// One event's lines.
fn event_text(out: &mut String, e: &EventStatus) {
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
    if let Some(why) = &e.tracking_error {
        let _ = writeln!(
            out,
            "  NOT TRACKED  {why}; these figures are not being updated. Close the event (`leaktally leak close {}`), or fix that and restart the daemon.",
            e.event
        );
    }
    if e.stale && e.tracking_error.is_none() {
        let _ = writeln!(
            out,
            "  WARNING      no new data for {}: the figures below are not current; check the link to the tank's device and its gauge",
            e.data_age_ms
                .map_or("any sample yet".into(), |age| report::duration(
                    TimeSpan::seconds(age as f64 / 1000.0)
                ))
        );
    }
    let Some(est) = &e.estimate else {
        let _ = writeln!(out, "  no usable sample yet");
        return;
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
    let _ = writeln!(out, "  band from    {}", est.words.band_text);
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
        words::phase_text(est)
    );
    let _ = writeln!(
        out,
        "  best from    {}: {}",
        words::method_name(est.method),
        est.words.method_reason
    );
    for warning in &est.words.warnings_text {
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
    let _ = writeln!(out, "  fitted hole  {}", est.words.fit_status);
    if let Some(text) = &est.words.implied_cd_text {
        let _ = writeln!(out, "  implied Cd   {text}");
    }
    let _ = writeln!(
        out,
        "  density      {} kg/m³{}",
        report::significant(est.density_kg_m3),
        est.temperature_k.map_or(" (fixed)".to_owned(), |t| format!(
            " at the liquid's {} °C",
            report::significant(t - 273.15)
        ))
    );
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
                "  forecast     flow stops in {} at {:.2} m; total then {}; total by 15 min from now {}; by 1 h {}",
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
        let _ = writeln!(
            out,
            "  reportable   {}: {}",
            kg(c.quantity_kg),
            crossing_text(c)
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
    let _ = writeln!(out, "  last sample  {}", report::utc(est.at_ms));
}

/// A reportable quantity's crossings: when it may have been reached (the
/// band's high end) and when the best estimate reached it.
pub fn crossing_text(c: &crate::estimate::Crossing) -> String {
    match (c.high_at_ms, c.at_ms) {
        (_, Some(best)) => format!(
            "reached at {} (best estimate){}",
            report::utc(best),
            c.high_at_ms
                .filter(|&h| h < best)
                .map_or(String::new(), |h| format!(
                    "; may have been reached from {} (band's high end)",
                    report::utc(h)
                ))
        ),
        (Some(high), None) => format!(
            "MAY HAVE BEEN REACHED from {} (band's high end); the best estimate is below it",
            report::utc(high)
        ),
        (None, None) => "not reached".into(),
    }
}
