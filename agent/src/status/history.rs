//! The event history: every leak event in the database, open and closed,
//! with its span and its final (or latest) total and band, as one document
//! for `leaktally events`, the web page's list of closed events and
//! `/api/events`.
//!
//! Left out: one event's full figures (the status document, `super`).

use crate::estimate::Method;
use crate::model::{Mass, TimeSpan};
use crate::report::{self, Presentation};
use crate::store::{self, StoreError};
use serde::Serialize;
use std::fmt::Write as _;

/// The events document's layout version (README, "Formats").
pub const FORMAT: u32 = 1;

/// Which events to list.
#[derive(Debug, Clone, Default)]
pub struct EventFilter {
    /// Only this tank's events.
    pub tank: Option<String>,
    /// Only open (`Some(true)`) or only closed (`Some(false)`) events.
    pub open: Option<bool>,
    /// Only events whose leak was still going at or after this time (open,
    /// or closed at or after it).
    pub since_ms: Option<i64>,
    /// Only events whose leak began before this time.
    pub until_ms: Option<i64>,
    /// At most this many, newest first.
    pub limit: Option<usize>,
}

/// The history: the events asked for, newest first.
#[derive(Debug, Clone, Serialize)]
pub struct EventsDocument {
    pub format: u32,
    /// RFC 3339, UTC, as every time in the document.
    pub generated_at: String,
    pub generated_at_ms: i64,
    /// The zone and units people's renderings use.
    pub time_zone: String,
    pub units: &'static str,
    pub caution: &'static str,
    pub events: Vec<EventSummary>,
    #[serde(skip)]
    pub presentation: Presentation,
}

/// One event in the history.
#[derive(Debug, Clone, Serialize)]
pub struct EventSummary {
    pub event: i64,
    pub tank: String,
    /// `open` or `closed`.
    pub state: &'static str,
    /// `operator` or `leak flag`.
    pub source: String,
    /// When the leak began (RFC 3339, UTC).
    pub start: String,
    pub start_ms: i64,
    /// When it was closed, for a closed event.
    pub end: Option<String>,
    pub end_ms: Option<i64>,
    /// From start to close, or to now for an open event, s.
    pub duration_s: f64,
    /// Its parameters' revision (1: as opened; each `leak revise` adds 1).
    pub revision: i64,
    /// The final total for a closed event, the latest for an open one; all
    /// absent before the first usable sample.
    pub released_best_kg: Option<f64>,
    pub released_low_kg: Option<f64>,
    pub released_high_kg: Option<f64>,
    /// Where the best figure comes from (a code: `orifice_given_hole`, ...).
    pub method: Option<Method>,
    /// The time of the sample the figures are from.
    pub last_sample: Option<String>,
    pub last_sample_ms: Option<i64>,
}

/// Builds the history from `conn` (read-only, beside the daemon).
pub fn history(
    conn: &rusqlite::Connection,
    filter: &EventFilter,
    presentation: &Presentation,
) -> Result<EventsDocument, StoreError> {
    let now = store::now_ms();
    let open_only = filter.open == Some(true);
    let mut events = Vec::new();
    for row in store::events(conn, open_only)? {
        let open = row.closed_at_ms.is_none();
        let wanted = filter.tank.as_ref().is_none_or(|t| *t == row.tank)
            && filter.open.is_none_or(|o| o == open)
            && filter
                .since_ms
                .is_none_or(|since| row.closed_at_ms.is_none_or(|end| end >= since))
            && filter.until_ms.is_none_or(|until| row.start_ms < until);
        if !wanted {
            continue;
        }
        if filter.limit.is_some_and(|limit| events.len() >= limit) {
            break;
        }
        let estimate = store::latest_estimate(conn, &row)?;
        let end_ms = row.closed_at_ms;
        events.push(EventSummary {
            event: row.id,
            tank: row.tank.clone(),
            state: if open { "open" } else { "closed" },
            source: row.source.clone(),
            start: report::rfc3339(row.start_ms),
            start_ms: row.start_ms,
            end: end_ms.map(report::rfc3339),
            end_ms,
            duration_s: (end_ms.unwrap_or(now) - row.start_ms).max(0) as f64 / 1000.0,
            revision: row.revision,
            released_best_kg: estimate.as_ref().map(|e| e.released_best_kg),
            released_low_kg: estimate.as_ref().map(|e| e.released_low_kg),
            released_high_kg: estimate.as_ref().map(|e| e.released_high_kg),
            method: estimate.as_ref().map(|e| e.method),
            last_sample: estimate.as_ref().map(|e| report::rfc3339(e.at_ms)),
            last_sample_ms: estimate.as_ref().map(|e| e.at_ms),
        });
    }
    Ok(EventsDocument {
        format: FORMAT,
        generated_at: report::rfc3339(now),
        generated_at_ms: now,
        time_zone: presentation.zone_name.clone(),
        units: presentation.units.name(),
        caution: report::CAUTION,
        events,
        presentation: presentation.clone(),
    })
}

impl EventSummary {
    /// The total and its band in words: `358 kg (band 303 to 410 kg)`.
    pub fn total_text(&self, people: &Presentation) -> String {
        match (
            self.released_best_kg,
            self.released_low_kg,
            self.released_high_kg,
        ) {
            (Some(best), Some(low), Some(high)) => format!(
                "{} (band {} to {})",
                people.mass(Mass::kilograms(best)),
                people.mass(Mass::kilograms(low)),
                people.mass(Mass::kilograms(high))
            ),
            _ => "no usable sample".into(),
        }
    }
}

/// The history as a table for people: one line per event, times in the
/// site's zone, the caution once at the end.
pub fn text(doc: &EventsDocument) -> String {
    let people = &doc.presentation;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "leaktally events at {}; times below in {}",
        people.time(doc.generated_at_ms),
        people.zone_name
    );
    if doc.events.is_empty() {
        let _ = writeln!(out, "No events match.");
    } else {
        let _ = writeln!(
            out,
            "{:>6}  {:<12} {:<7} {:<19} {:<19} {:>12}  {:>4}  total (final when closed)",
            "event", "tank", "state", "start", "end", "duration", "rev"
        );
    }
    for e in &doc.events {
        let short = |at: i64| people.strftime(at, "%Y-%m-%d %H:%M:%S");
        let _ = writeln!(
            out,
            "{:>6}  {:<12} {:<7} {:<19} {:<19} {:>12}  {:>4}  {}",
            e.event,
            crate::logging::one_line(&e.tank),
            e.state,
            short(e.start_ms),
            e.end_ms.map_or("-".into(), short),
            report::duration(TimeSpan::seconds(e.duration_s)),
            e.revision,
            e.total_text(people)
        );
    }
    let _ = writeln!(out, "\n{}", doc.caution);
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::LeakParams;

    #[test]
    fn the_history_lists_open_and_closed_events_and_filters_them() {
        let scratch = crate::store::scratch::ScratchDir::new("history");
        let db = scratch.db();
        let conn = store::open_read_write(&db).unwrap();
        store::register_tanks(&conn, ["T1", "T2"]).unwrap();
        let t0 = 1_796_126_400_000; // 2026-12-01T12:00:00Z
        let p = LeakParams::default();
        let first = store::create_event(&conn, "T1", t0, t0, "operator", &p).unwrap();
        store::close_event(&conn, first, t0 + 3_600_000).unwrap();
        let second =
            store::create_event(&conn, "T2", t0 + 7_200_000, t0 + 7_200_000, "leak flag", &p)
                .unwrap();
        drop(conn);
        let conn = store::open_read_only(&db).unwrap();
        let oslo = Presentation::new("Europe/Oslo", crate::config::Units::Metric).unwrap();

        let all = history(&conn, &EventFilter::default(), &oslo).unwrap();
        let ids: Vec<i64> = all.events.iter().map(|e| e.event).collect();
        assert_eq!(ids, [second, first], "newest first");
        let closed = &all.events[1];
        assert_eq!((closed.state, closed.duration_s), ("closed", 3600.0));
        assert_eq!(closed.end.as_deref(), Some("2026-12-01T13:00:00.000Z"));
        assert_eq!(all.time_zone, "Europe/Oslo");

        let only = |f: EventFilter| -> Vec<i64> {
            history(&conn, &f, &oslo)
                .unwrap()
                .events
                .iter()
                .map(|e| e.event)
                .collect()
        };
        let tank = EventFilter {
            tank: Some("T1".into()),
            ..EventFilter::default()
        };
        assert_eq!(only(tank), [first]);
        let closed_only = EventFilter {
            open: Some(false),
            ..EventFilter::default()
        };
        assert_eq!(only(closed_only), [first]);
        let open_only = EventFilter {
            open: Some(true),
            ..EventFilter::default()
        };
        assert_eq!(only(open_only), [second]);
        // The first was closed an hour before this.
        let since = EventFilter {
            since_ms: Some(t0 + 3_700_000),
            ..EventFilter::default()
        };
        assert_eq!(only(since), [second]);
        let until = EventFilter {
            until_ms: Some(t0 + 60_000),
            ..EventFilter::default()
        };
        assert_eq!(only(until), [first]);
        let one = EventFilter {
            limit: Some(1),
            ..EventFilter::default()
        };
        assert_eq!(only(one), [second]);

        let table = text(&all);
        for expected in [
            "times below in Europe/Oslo",
            // 12:00 UTC is 13:00 in Oslo in December (UTC+01:00).
            "closed  2026-12-01 13:00:00 2026-12-01 14:00:00",
            "1 h 00 min",
            "no usable sample",
            report::CAUTION,
        ] {
            assert!(table.contains(expected), "{expected:?} not in:\n{table}");
        }
    }
}
