//! The read model: the running totals of the open events (or of one
//! event), as one document for people and for machines.
//!
//! [`document`] builds the [`StatusDocument`] from one connection the caller
//! opened (read-only, beside the daemon's writer), so `leaktally status`,
//! the demo, the web page, `/api/*` and `/metrics` show the same figures
//! from the same reads, and a web request reads everything it shows through
//! one connection. The JSON is the document serialised; its fields are
//! documented in the README and only ever added to, never renamed. Its words
//! (the `*_text` fields, the terminal table) come from `crate::report`.
//!
//! Left out: opening the database (the caller's, with the path it names in
//! its messages) and any writing.

pub mod history;

pub use history::{EventFilter, EventsDocument};

use crate::estimate::{Estimate, LeakParams};
use crate::report::{self, Presentation, estimate as words, table};
use crate::store::{self, DaemonState, EventRow, StoreError};
use serde::Serialize;
use std::path::Path;

/// The status document's layout version. 2: machine times are RFC 3339
/// UTC (they were "2026-12-01 13:42:07 UTC"), and `time_zone` and `units`
/// say how people's renderings show them.
pub const FORMAT: u32 = 2;

/// The status document: every event asked for, with its latest estimate.
#[derive(Debug, Clone, Serialize)]
pub struct StatusDocument {
    /// Version of this document's layout (README, "Formats").
    pub format: u32,
    /// RFC 3339, UTC, as every time in the document.
    pub generated_at: String,
    pub generated_at_ms: i64,
    /// The site's time zone, which people's renderings of this document
    /// use (`[site] time_zone`), and its units (`metric` or `us`).
    pub time_zone: String,
    pub units: &'static str,
    /// How the document's renderings for people show times and figures.
    #[serde(skip)]
    pub presentation: Presentation,
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
    pub daemon_last_seen_ms: Option<i64>,
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
    pub fn new(estimate: Estimate, params: &LeakParams, people: &Presentation) -> Self {
        let e = &estimate;
        let hole = crate::estimate::Warning::HoleInconsistent;
        Self {
            words: words::Words::of(e, params, people),
            consistency: e
                .warnings
                .contains(hole)
                .then(|| words::warning_text(hole, e, params, people)),
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

/// Why a document could not be built.
#[derive(Debug, thiserror::Error)]
pub enum StatusError {
    /// The event asked for is not in the database.
    #[error("there is no event {0}; `leaktally events` lists every event")]
    NoEvent(i64),
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// Builds the status document of one event, or of every open event, from
/// `conn`. The stale limit comes from the config the daemon runs with (its
/// heartbeat names the file), when it can be read.
pub fn document(
    conn: &rusqlite::Connection,
    event: Option<i64>,
    presentation: &Presentation,
) -> Result<StatusDocument, StatusError> {
    let heartbeat = store::heartbeat(conn)?;
    let stale_after = heartbeat
        .as_ref()
        .and_then(|h| crate::config::load(Path::new(&h.config)).ok())
        .map_or(DEFAULT_STALE_AFTER_MS, |c| stale_after_ms(&c));
    let now = store::now_ms();
    let rows: Vec<EventRow> = match event {
        Some(id) => vec![store::event(conn, id)?.ok_or(StatusError::NoEvent(id))?],
        None => store::events(conn, true)?,
    };
    let untracked = store::tracking_errors(conn)?;
    let mut events = Vec::new();
    for row in rows {
        let estimate = store::latest_estimate(conn, &row)?;
        let tracking_error = untracked.get(&row.id).cloned();
        events.push(event_status(
            row,
            estimate,
            tracking_error,
            now,
            stale_after,
            presentation,
        ));
    }
    let state = heartbeat
        .as_ref()
        .map_or(DaemonState::NotRunning, |h| h.state(now));
    let running = matches!(state, DaemonState::Running | DaemonState::Busy { .. });
    Ok(StatusDocument {
        format: FORMAT,
        generated_at: report::rfc3339(now),
        generated_at_ms: now,
        time_zone: presentation.zone_name.clone(),
        units: presentation.units.name(),
        presentation: presentation.clone(),
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
        daemon_last_seen: heartbeat.as_ref().map(|h| report::rfc3339(h.beat_at_ms)),
        daemon_last_seen_ms: heartbeat.map(|h| h.beat_at_ms),
        events,
    })
}

/// One event's entry, from its row and latest estimate, as of `now`.
fn event_status(
    row: EventRow,
    estimate: Option<Estimate>,
    tracking_error: Option<String>,
    now: i64,
    stale_after: i64,
    presentation: &Presentation,
) -> EventStatus {
    let data_age_ms = estimate.as_ref().map(|e| now - e.at_ms);
    let open = row.closed_at_ms.is_none();
    EventStatus {
        event: row.id,
        tank: row.tank.clone(),
        state: if open { "open" } else { "closed" },
        source: row.source.clone(),
        start: report::rfc3339(row.start_ms),
        start_ms: row.start_ms,
        opened_at_ms: row.opened_at_ms,
        closed_at_ms: row.closed_at_ms,
        revision: row.revision,
        params: row.params,
        params_text: words::describe_params(&row.params, presentation),
        released_volume: estimate
            .as_ref()
            .map(|e| Volumes::of(e.released_best_kg, e.density_kg_m3)),
        data_age_ms,
        stale: open && data_age_ms.unwrap_or(now - row.opened_at_ms) > stale_after,
        estimate: estimate.map(|e| EstimateView::new(e, &row.params, presentation)),
        tracking_error,
    }
}

/// The status document of one event as the running daemon publishes it
/// (`crate::publish`): the document `leaktally status EVENT --json` shows,
/// built from what the daemon holds at `now` (its own heartbeat is `now`,
/// so it says running) without reading the database.
pub fn published(
    row: &EventRow,
    estimate: Option<Estimate>,
    tracking_error: Option<String>,
    now: i64,
    stale_after: i64,
    presentation: &Presentation,
) -> StatusDocument {
    StatusDocument {
        format: FORMAT,
        generated_at: report::rfc3339(now),
        generated_at_ms: now,
        time_zone: presentation.zone_name.clone(),
        units: presentation.units.name(),
        presentation: presentation.clone(),
        caution: report::CAUTION,
        daemon_running: true,
        daemon_stalled: false,
        daemon_state: DaemonState::Running.name(),
        daemon_busy_with: None,
        daemon_last_seen: Some(report::rfc3339(now)),
        daemon_last_seen_ms: Some(now),
        daemon_clock_offset_ms: None,
        events: vec![event_status(
            row.clone(),
            estimate,
            tracking_error,
            now,
            stale_after,
            presentation,
        )],
    }
}

impl StatusDocument {
    /// The document as the terminal table's views, for
    /// [`report::table::render`].
    pub fn table(&self) -> table::Table<'_> {
        table::Table {
            generated_at_ms: self.generated_at_ms,
            presentation: &self.presentation,
            daemon: table::Daemon {
                running: self.daemon_running,
                stalled: self.daemon_stalled,
                busy_with: self.daemon_busy_with.as_deref(),
                last_seen_ms: self.daemon_last_seen_ms,
                clock_offset_ms: self.daemon_clock_offset_ms,
            },
            events: self.events.iter().map(EventStatus::table).collect(),
            caution: self.caution,
        }
    }
}

impl EventStatus {
    fn table(&self) -> table::Event<'_> {
        table::Event {
            id: self.event,
            tank: &self.tank,
            source: &self.source,
            revision: self.revision,
            start_ms: self.start_ms,
            closed_at_ms: self.closed_at_ms,
            params_text: &self.params_text,
            tracking_error: self.tracking_error.as_deref(),
            stale: self.stale,
            data_age_ms: self.data_age_ms,
            estimate: self.estimate.as_ref().map(|e| (&e.estimate, &e.words)),
        }
    }
}

/// The document as a table for people.
pub fn text(doc: &StatusDocument) -> String {
    table::render(&doc.table())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_document_is_built_from_the_callers_connection() {
        let scratch = crate::store::scratch::ScratchDir::new("status");
        let db = scratch.db();
        let conn = store::open_read_write(&db).unwrap();
        store::register_tanks(&conn, ["T1"]).unwrap();
        let start = store::now_ms() - 60_000;
        let params = LeakParams {
            hole_diameter_m: Some(0.025),
            ..LeakParams::default()
        };
        let id = store::create_event(&conn, "T1", start, start, "operator", &params).unwrap();
        drop(conn);

        let conn = store::open_read_only(&db).unwrap();
        let doc = document(&conn, None, &Presentation::default()).unwrap();
        assert_eq!(doc.daemon_state, "not_running");
        let [e] = doc.events.as_slice() else {
            panic!("{:?}", doc.events)
        };
        assert_eq!((e.event, e.tank.as_str(), e.state), (id, "T1", "open"));
        assert_eq!(
            e.params_text,
            words::describe_params(&params, &Presentation::default())
        );
        // No sample for a minute, against the 10 s limit with no config.
        assert!(e.stale && e.estimate.is_none());
        let text = text(&doc);
        for expected in [
            "WARNING: no daemon is running (last seen never)",
            &format!("Event {id}  tank T1  open since"),
            "hole 25.0 mm at 0 m (assumed: the bottom)",
            "WARNING      no new data for any sample yet",
            "no usable sample yet",
            report::CAUTION,
        ] {
            assert!(text.contains(expected), "{expected:?} not in:\n{text}");
        }
        assert!(matches!(
            document(&conn, Some(id + 1), &Presentation::default()),
            Err(StatusError::NoEvent(missing)) if missing == id + 1
        ));
    }
}
