//! The responder page: every open event on one server-rendered HTML page.
//!
//! Built for a phone at a command post as much as a desk: one column that
//! widens into a grid, the figures large and each with its unit, the
//! caution once, at the top. On a phone (390 by 844 CSS pixels) the released
//! total with its band, the rate, the forecast and the reportable
//! quantities of the newest event are all above the fold; the chart and how
//! the figures are made follow. Every time is in the site's zone and every
//! quantity in the site's units (`report::Presentation`). Every figure carries `data-field` and `data-event`
//! attributes so that tests (and anyone scripting against the page) can
//! find it without scraping the layout.
//!
//! The page is [`Html`], built section by section with `markup!`, which
//! escapes every text it is given (tank ids, descriptions, operator notes,
//! reasons, anything from the database or the config); a text that is not
//! escaped does not compile.
//!
//! This file holds what the page is given ([`PageData`]) and the page's
//! outline: the frame around `<main>`, then in `<main>` the top of the page
//! and a card per event. The sections are in the files beside it:
//!
//! * `frame.rs`: the document head, the masthead and the footer.
//! * `state.rs`: the stamp, the caution, the daemon's state, the summary.
//! * `event.rs`: one event's card, its head and its alarms.
//! * `figures.rs`: released so far, flowing now, the forecast.
//! * `trend.rs`: the chart and the reportable quantities.
//! * `details.rs`: the warnings, how it is estimated, the data quality.
//! * `notes.rs`: the operators' notes, from the audit trail to the panel.
//! * `closed.rs`: the events closed lately, with their final figures.
//!
//! Left out: client-side rendering. The refresh script only fetches this
//! page again and swaps the fresh `<main>` in; nothing is computed in the
//! browser. The chart's SVG is `web::chart`'s, the escaping `web::html`'s.

mod closed;
mod details;
mod event;
mod figures;
mod frame;
mod loss;
mod notes;
mod state;
mod trend;

pub(crate) use details::warnings;
pub(crate) use figures::figures as headline;
pub use loss::Suspected;
pub use notes::{Note, notes};

use crate::model::TimeSpan;
use crate::report;
use crate::status::StatusDocument;
use crate::status::history::EventSummary;
use crate::store::health::HealthSnapshot;
use crate::store::outbox::OutboxSnapshot;
use crate::web::chart::Point;
use crate::web::html::{Html, markup};

/// Everything the page shows.
pub struct PageData {
    pub site: String,
    pub doc: StatusDocument,
    /// Per event of `doc.events`, in the same order.
    pub events: Vec<EventExtras>,
    /// The events closed lately, newest first: at most [`CLOSED_SHOWN`],
    /// closed within [`CLOSED_WITHIN_MS`].
    pub closed: Vec<EventSummary>,
    /// A latest estimate older than this is flagged as not current.
    pub stale_after_ms: i64,
    /// Whether the database takes the daemon's writes.
    pub store: HealthSnapshot,
    /// The suspected losses standing (tanks with no event open).
    pub losses: Vec<Suspected>,
    /// The MQTT outbox, and the broker (`host:port`) when one is
    /// configured.
    pub outbox: OutboxSnapshot,
    pub broker: Option<String>,
}

/// How many closed events the page lists, at most.
pub const CLOSED_SHOWN: usize = 10;
/// How long ago an event may have closed to be listed: a week, so that the
/// next shift and the week's review still find its final total.
pub const CLOSED_WITHIN_MS: i64 = 7 * 24 * 3_600_000;

/// What the page shows beside an event's status document.
pub struct EventExtras {
    pub series: Vec<Point>,
    pub notes: Vec<Note>,
    pub description: String,
    pub substance: String,
}

/// Renders the page.
pub fn render(data: &PageData) -> String {
    let doc = &data.doc;
    let mut page = frame::head(doc.events.len(), &data.site);
    page.push(live(data));
    page.push(frame::foot());
    page.into_string()
}

/// The `<main>` the refresh script swaps: the stamp, the caution, the
/// daemon's state, a card per open event, and the events closed lately.
fn live(data: &PageData) -> Html {
    let doc = &data.doc;
    let mut main = markup!(
        "<main id=\"live\" data-generated-at-ms=\"{ms}\">\n",
        ms = doc.generated_at_ms
    );
    main.push(state::top(doc, &data.store));
    let people = &doc.presentation;
    if let Some(broker) = &data.broker {
        main.push(state::outbox(broker, &data.outbox, people));
    }
    main.push(loss::list(&data.losses, people));
    main.extend(doc.events.iter().zip(&data.events).map(|(e, extras)| {
        event::card(e, extras, people, doc.generated_at_ms, data.stale_after_ms)
    }));
    main.push(closed::list(&data.closed, people));
    markup!(&mut main, "</main>\n");
    main
}

/// A span of time for people, from milliseconds.
fn span(ms: i64) -> String {
    report::duration(TimeSpan::seconds(ms.max(0) as f64 / 1000.0))
}
