//! The fleet's board: what the sites have said on the broker, as the view
//! shows it. Pure and clock-free: [`Board::ingest`] takes a message's topic,
//! payload and retained flag with the time it arrived, and the board keeps
//! each site's online state and each event's latest document.
//!
//! Rules:
//!
//! * An event's documents are ordered by (revision, the estimate's sample
//!   time, closed after open). A document at or below the one held is a
//!   duplicate (QoS 1 may deliver twice; a reconnect delivers every
//!   retained document again) or an older one, and is ignored, so each is
//!   applied once and the board never goes back in time.
//! * A summary (or a status document that says the event is closed)
//!   replaces the live status and closes the event; a closed event stays
//!   closed, whatever status document comes after.
//! * A site's state message (`online` or `offline`, the agent's plain text,
//!   or a JSON form with a stamp) is applied in the order the broker
//!   delivers it, or by its stamp when it has one.
//! * A payload that is not what the topic promises (not JSON, another
//!   layout, another format version, an event or a site other than the
//!   topic's) is counted and said in the [`Outcome`], never a panic; an
//!   empty payload (a retained message being cleared) is ignored.
//! * A document with a time outside the years 2000 to 2200, or bigger than
//!   the board holds (see [`MAX_TEXT`]), is malformed too.
//! * Memory is bounded: at most [`MAX_SITES`] sites, [`MAX_OPEN_EVENTS`]
//!   open events and [`MAX_CLOSED_KEPT`] closed ones (the newest), and a
//!   payload of at most [`MAX_PAYLOAD`] bytes. What would go past a bound
//!   is refused and counted; a closed event let go is remembered by its
//!   ids alone (at most [`MAX_FORGOTTEN`]) so a stale retained status
//!   cannot bring it back as open.
//!
//! The board keeps no authority: the sites' databases are the record, and
//! a fleet view restarted learns everything again from the retained
//! documents.
//!
//! Left out: the connection (`mqtt.rs`), the page and the JSON (`view.rs`).

use super::topics::{self, Topic};
use crate::estimate::{Estimate, LeakParams};
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, HashSet};

/// The most sites the board holds.
pub const MAX_SITES: usize = 1_000;
/// The most open events the board holds, over every site.
pub const MAX_OPEN_EVENTS: usize = 5_000;
/// The most closed events the board holds (the most recently closed).
pub const MAX_CLOSED_KEPT: usize = 500;
/// Closed events let go of whose ids the board still remembers.
pub const MAX_FORGOTTEN: usize = 50_000;
/// The largest payload the board reads, bytes. A status document with a
/// dozen reportable quantities is a few kB.
pub const MAX_PAYLOAD: usize = 64 * 1024;
/// The longest text of a held document (tank, source, parameters, why not
/// tracked), bytes (a real one is a few dozen), and the most reportable
/// quantities: so an event held costs under 10 kB whatever a publisher
/// sends, and the board at all its bounds under 100 MB.
pub const MAX_TEXT: usize = 1024;
pub const MAX_CROSSINGS: usize = 64;
/// The state message's layout version the view reads.
pub const STATE_FORMAT: u32 = 1;

/// A site's online state.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Online {
    Online,
    Offline,
    /// Nothing on its state topic yet (only its event documents).
    Unknown,
}

impl Online {
    pub fn name(self) -> &'static str {
        match self {
            Online::Online => "online",
            Online::Offline => "offline",
            Online::Unknown => "unknown",
        }
    }
}

/// One site, as far as the broker has told.
#[derive(Debug, Clone)]
pub struct Site {
    pub id: String,
    pub online: Online,
    /// Since when the site is in its state, UTC ms: its own stamp where the
    /// message has one, else when the view saw the change live; `None`
    /// when only a retained, unstamped message told it.
    pub state_at_ms: Option<i64>,
    /// When the view last had a live (not retained) message from the site,
    /// on the view's clock.
    pub last_heard_ms: Option<i64>,
    /// The site's time zone and units, from its latest status document.
    pub time_zone: Option<String>,
    pub units: Option<String>,
}

/// One event's latest document.
#[derive(Debug, Clone)]
pub struct Event {
    pub site: String,
    pub status: EventDocument,
    pub closed: bool,
    /// When the view took this document, on its own clock.
    pub received_ms: i64,
}

impl Event {
    /// The order of documents: revision, sample time, closed after open.
    fn key(&self) -> Key {
        Key::of(&self.status, self.closed)
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
struct Key(i64, i64, bool);

impl Key {
    fn of(doc: &EventDocument, closed: bool) -> Self {
        Key(
            doc.revision,
            doc.estimate.as_ref().map_or(i64::MIN, |e| e.at_ms),
            closed,
        )
    }
}

/// One event of a status document, as the view reads it (the fields of
/// `crate::status::EventStatus` it shows; the words are made again in the
/// site's units and zone, from the numbers).
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct EventDocument {
    pub event: i64,
    pub tank: String,
    pub state: String,
    pub source: String,
    pub start_ms: i64,
    pub opened_at_ms: i64,
    pub closed_at_ms: Option<i64>,
    pub revision: i64,
    pub params: LeakParams,
    pub params_text: String,
    pub estimate: Option<Estimate>,
    #[serde(default)]
    pub tracking_error: Option<String>,
}

/// The status document (`crate::status::StatusDocument`) as the view
/// reads it.
#[derive(Debug, Deserialize)]
struct StatusWire {
    format: u32,
    /// Not in the document today; checked against the topic if a
    /// publisher adds it.
    #[serde(default)]
    site: Option<String>,
    time_zone: String,
    units: String,
    events: Vec<EventDocument>,
}

/// The state message.
#[derive(Debug, Deserialize)]
struct StateWire {
    format: u32,
    site: String,
    state: String,
    at_ms: i64,
}

/// What became of one message.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Outcome {
    /// It changed the board.
    Applied,
    /// A duplicate, or older than what the board holds.
    OlderOrDuplicate,
    /// An empty payload: a retained message cleared.
    Cleared,
    /// A topic the view does not read.
    UnknownTopic,
    /// Not what the topic promises; why.
    Malformed(String),
    /// Past one of the board's bounds; which.
    OverCapacity(String),
}

/// How many messages came to each outcome.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct Counts {
    pub applied: u64,
    pub older_or_duplicate: u64,
    pub cleared: u64,
    pub unknown_topic: u64,
    pub malformed: u64,
    pub over_capacity: u64,
}

/// Every site and event the broker has told of.
#[derive(Debug, Default)]
pub struct Board {
    prefix: String,
    sites: BTreeMap<String, Site>,
    events: BTreeMap<(String, i64), Event>,
    /// Closed events let go of, by (site, event), and in the order they
    /// were let go (to let go of the oldest ids first).
    forgotten: HashSet<(String, i64)>,
    forgotten_order: std::collections::VecDeque<(String, i64)>,
    counts: Counts,
}

impl Board {
    /// An empty board for the topics under `prefix`.
    pub fn new(prefix: &str) -> Self {
        Self {
            prefix: prefix.to_owned(),
            ..Self::default()
        }
    }

    /// Takes one message, which arrived at `now_ms` (the view's clock).
    pub fn ingest(&mut self, topic: &str, payload: &[u8], retained: bool, now_ms: i64) -> Outcome {
        let outcome = self.apply(topic, payload, retained, now_ms);
        let c = &mut self.counts;
        match outcome {
            Outcome::Applied => c.applied += 1,
            Outcome::OlderOrDuplicate => c.older_or_duplicate += 1,
            Outcome::Cleared => c.cleared += 1,
            Outcome::UnknownTopic => c.unknown_topic += 1,
            Outcome::Malformed(_) => c.malformed += 1,
            Outcome::OverCapacity(_) => c.over_capacity += 1,
        }
        outcome
    }

    fn apply(&mut self, topic: &str, payload: &[u8], retained: bool, now_ms: i64) -> Outcome {
        let Some(parsed) = topics::parse(&self.prefix, topic) else {
            return Outcome::UnknownTopic;
        };
        if payload.is_empty() {
            return Outcome::Cleared;
        }
        if payload.len() > MAX_PAYLOAD {
            return Outcome::Malformed(format!(
                "{} bytes, more than the {MAX_PAYLOAD} the view reads",
                payload.len()
            ));
        }
        let site = match parsed {
            Topic::State { site } | Topic::Status { site, .. } | Topic::Summary { site, .. } => {
                site
            }
        };
        if !self.sites.contains_key(site) && self.sites.len() >= MAX_SITES {
            return Outcome::OverCapacity(format!(
                "the view holds {MAX_SITES} sites already; site {site:?} is not shown"
            ));
        }
        let outcome = match parsed {
            Topic::State { site } => self.state(site, payload, retained, now_ms),
            Topic::Status { site, event } => self.document(site, event, payload, false, now_ms),
            Topic::Summary { site, event } => self.document(site, event, payload, true, now_ms),
        };
        // A message that was read (applied or not) says the site is there;
        // a retained one may be days old, so only a live one counts as heard.
        if matches!(outcome, Outcome::Applied | Outcome::OlderOrDuplicate)
            && !retained
            && let Some(s) = self.sites.get_mut(site)
        {
            s.last_heard_ms = Some(s.last_heard_ms.map_or(now_ms, |t| t.max(now_ms)));
        }
        outcome
    }

    fn site_mut(&mut self, site: &str) -> &mut Site {
        self.sites.entry(site.to_owned()).or_insert_with(|| Site {
            id: site.to_owned(),
            online: Online::Unknown,
            state_at_ms: None,
            last_heard_ms: None,
            time_zone: None,
            units: None,
        })
    }

    /// A state message: the agent's plain `online` or `offline` (its
    /// last will too), in the order the broker delivers them (a reconnect
    /// delivers the retained one, which is the latest); or the stamped JSON
    /// form (`{"format":1,"site":..,"state":..,"at_ms":..}`), ordered by its
    /// stamp.
    fn state(&mut self, site: &str, payload: &[u8], retained: bool, now_ms: i64) -> Outcome {
        let plain = match std::str::from_utf8(payload).map(str::trim) {
            Ok("online") => Some(Online::Online),
            Ok("offline") => Some(Online::Offline),
            _ => None,
        };
        let (online, stamped) = match plain {
            Some(online) => (online, None),
            None => match Self::stamped_state(site, payload) {
                Ok((online, at_ms)) => (online, Some(at_ms)),
                Err(why) => return Outcome::Malformed(why),
            },
        };
        let s = self.site_mut(site);
        // An agent stamps its last will and its `online` with the same
        // connection time: at one stamp, `offline` is the later news (the
        // connection that began then has ended), never `online`.
        let older = |at: i64, held: i64| {
            at < held || (at == held && online == Online::Online && s.online == Online::Offline)
        };
        match stamped {
            Some(at) if s.state_at_ms.is_some_and(|held| older(at, held)) => {
                return Outcome::OlderOrDuplicate;
            }
            _ if s.online == online && (stamped.is_none() || s.state_at_ms == stamped) => {
                return Outcome::OlderOrDuplicate;
            }
            _ => {}
        }
        s.online = online;
        // Since when: the site's stamp, else when the view saw the change
        // live; a retained message without a stamp says only "as of before
        // the view connected".
        s.state_at_ms = stamped.or((!retained).then_some(now_ms));
        Outcome::Applied
    }

    /// The stamped JSON state message, checked against its topic's site.
    fn stamped_state(site: &str, payload: &[u8]) -> Result<(Online, i64), String> {
        let wire: StateWire = serde_json::from_slice(payload).map_err(|e| {
            format!("not a state message (\"online\" or \"offline\", or its JSON form): {e}")
        })?;
        if wire.format != STATE_FORMAT {
            return Err(format!(
                "state message format {}, and this view reads format {STATE_FORMAT}; run the same leaktally version on the sites and the view",
                wire.format
            ));
        }
        if wire.site != site {
            return Err(format!(
                "the state message names site {:?} but came on site {site:?}'s topic",
                wire.site
            ));
        }
        match wire.state.as_str() {
            "online" => Ok((Online::Online, wire.at_ms)),
            "offline" => Ok((Online::Offline, wire.at_ms)),
            other => Err(format!(
                "state {other:?}: a site is \"online\" or \"offline\""
            )),
        }
    }

    fn document(
        &mut self,
        site: &str,
        event: i64,
        payload: &[u8],
        summary: bool,
        now_ms: i64,
    ) -> Outcome {
        let wire: StatusWire = match serde_json::from_slice(payload) {
            Ok(w) => w,
            Err(e) => return Outcome::Malformed(format!("not a status document: {e}")),
        };
        if wire.format != crate::status::FORMAT {
            return Outcome::Malformed(format!(
                "status document format {}, and this view reads format {}; run the same leaktally version on the sites and the view",
                wire.format,
                crate::status::FORMAT
            ));
        }
        if let Some(named) = wire.site.as_deref().filter(|s| *s != site) {
            return Outcome::Malformed(format!(
                "the document names site {named:?} but came on site {site:?}'s topic"
            ));
        }
        let Some(doc) = wire.events.into_iter().find(|e| e.event == event) else {
            return Outcome::Malformed(format!(
                "the document does not hold event {event}, which its topic names"
            ));
        };
        if let Some(why) = oversized(&doc).or_else(|| implausible(&doc)) {
            return Outcome::Malformed(why);
        }
        let closed = summary || doc.state == "closed" || doc.closed_at_ms.is_some();
        let id = (site.to_owned(), event);
        if self.forgotten.contains(&id) {
            return Outcome::OlderOrDuplicate;
        }
        let key = Key::of(&doc, closed);
        match self.events.get(&id) {
            Some(held) if held.closed || key <= held.key() => return Outcome::OlderOrDuplicate,
            Some(_) => {}
            None if !closed && self.open_events() >= MAX_OPEN_EVENTS => {
                return Outcome::OverCapacity(format!(
                    "the view holds {MAX_OPEN_EVENTS} open events already; event {event} of site {site:?} is not shown"
                ));
            }
            None => {}
        }
        let s = self.site_mut(site);
        s.time_zone = Some(wire.time_zone);
        s.units = Some(wire.units);
        self.events.insert(
            id,
            Event {
                site: site.to_owned(),
                status: doc,
                closed,
                received_ms: now_ms,
            },
        );
        if closed {
            self.let_go_of_old_closed();
        }
        Outcome::Applied
    }

    fn open_events(&self) -> usize {
        self.events.values().filter(|e| !e.closed).count()
    }

    /// Keeps the [`MAX_CLOSED_KEPT`] most recently closed events, and the
    /// ids of those let go.
    fn let_go_of_old_closed(&mut self) {
        let closed = self.events.values().filter(|e| e.closed).count();
        if closed <= MAX_CLOSED_KEPT {
            return;
        }
        let mut by_age: Vec<(i64, (String, i64))> = self
            .events
            .iter()
            .filter(|(_, e)| e.closed)
            .map(|(id, e)| (e.status.closed_at_ms.unwrap_or(i64::MIN), id.clone()))
            .collect();
        by_age.sort();
        for (_, id) in by_age.into_iter().take(closed - MAX_CLOSED_KEPT) {
            self.events.remove(&id);
            if self.forgotten.insert(id.clone()) {
                self.forgotten_order.push_back(id);
            }
        }
        while self.forgotten_order.len() > MAX_FORGOTTEN {
            if let Some(old) = self.forgotten_order.pop_front() {
                self.forgotten.remove(&old);
            }
        }
    }

    /// Every site, by id.
    pub fn sites(&self) -> impl Iterator<Item = &Site> {
        self.sites.values()
    }

    /// Every event held, open and closed, by site and event id.
    pub fn events(&self) -> impl Iterator<Item = &Event> {
        self.events.values()
    }

    pub fn counts(&self) -> Counts {
        self.counts
    }
}

/// The earliest and latest time a held document may carry, UTC ms (the
/// years 2000 and 2200): a time outside is no site's clock, and the page's
/// arithmetic on times stays far from overflow.
pub const EARLIEST_MS: i64 = 946_684_800_000;
pub const LATEST_MS: i64 = 7_258_118_400_000;
/// The longest a forecast may say the flow goes on, s (a thousand years).
pub const LONGEST_FORECAST_S: f64 = 3.2e10;

/// Why a document's times are no site's, if they are not.
fn implausible(doc: &EventDocument) -> Option<String> {
    let mut times = vec![
        ("start_ms", Some(doc.start_ms)),
        ("opened_at_ms", Some(doc.opened_at_ms)),
        ("closed_at_ms", doc.closed_at_ms),
    ];
    if let Some(e) = &doc.estimate {
        times.push(("estimate.at_ms", Some(e.at_ms)));
        if let Some(f) = &e.forecast {
            times.push(("forecast.made_at_ms", Some(f.made_at_ms)));
            if f.stops_after_s.is_finite() && !(0.0..=LONGEST_FORECAST_S).contains(&f.stops_after_s)
            {
                return Some(format!(
                    "its forecast stops after {} s, outside 0 to {LONGEST_FORECAST_S}",
                    f.stops_after_s
                ));
            }
        }
        for c in &e.crossings {
            times.push(("crossings[].at_ms", c.at_ms));
            times.push(("crossings[].high_at_ms", c.high_at_ms));
        }
    }
    times.into_iter().find_map(|(field, at)| {
        at.filter(|t| !(EARLIEST_MS..=LATEST_MS).contains(t))
            .map(|t| format!("its {field} {t} is not a time between the years 2000 and 2200"))
    })
}

/// Why a document is larger than the board holds, if it is.
fn oversized(doc: &EventDocument) -> Option<String> {
    let texts = [
        ("tank", doc.tank.len()),
        ("source", doc.source.len()),
        ("params_text", doc.params_text.len()),
        ("state", doc.state.len()),
        (
            "tracking_error",
            doc.tracking_error.as_ref().map_or(0, String::len),
        ),
    ];
    if let Some((field, len)) = texts.iter().find(|(_, len)| *len > MAX_TEXT) {
        return Some(format!(
            "its {field} is {len} bytes, more than the {MAX_TEXT} the view holds"
        ));
    }
    let crossings = doc.estimate.as_ref().map_or(0, |e| e.crossings.len());
    (crossings > MAX_CROSSINGS).then(|| {
        format!(
            "it has {crossings} reportable quantities, more than the {MAX_CROSSINGS} the view holds"
        )
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fleet::testing::{SiteDb, state};

    const STATUS: &str = "leaktally/ff/events/1/status";
    const SUMMARY: &str = "leaktally/ff/events/1/summary";

    fn released(board: &Board) -> Vec<(i64, Option<i64>, bool)> {
        board
            .events()
            .map(|e| {
                (
                    e.status.revision,
                    e.status.estimate.as_ref().map(|x| x.at_ms),
                    e.closed,
                )
            })
            .collect()
    }

    #[test]
    fn each_document_is_applied_once_and_never_an_older_one() {
        let site = SiteDb::new("fleet-board-order");
        assert_eq!(site.event, 1);
        let empty = site.document();
        site.store(1, 0..60);
        let first = site.document();
        site.store(1, 60..120);
        let second = site.document();
        let t1 = site.estimates[59].at_ms;
        let t2 = site.estimates[119].at_ms;

        let mut board = Board::new("leaktally");
        assert_eq!(board.ingest(STATUS, &empty, true, 10), Outcome::Applied);
        assert_eq!(released(&board), [(1, None, false)]);
        assert_eq!(board.ingest(STATUS, &first, false, 11), Outcome::Applied);
        assert_eq!(released(&board), [(1, Some(t1), false)]);
        // QoS 1 delivers twice.
        assert_eq!(
            board.ingest(STATUS, &first, false, 12),
            Outcome::OlderOrDuplicate
        );
        assert_eq!(board.ingest(STATUS, &second, false, 13), Outcome::Applied);
        assert_eq!(released(&board), [(1, Some(t2), false)]);
        // The retained first document again, after a reconnect: older.
        assert_eq!(
            board.ingest(STATUS, &first, true, 14),
            Outcome::OlderOrDuplicate
        );
        assert_eq!(
            board.ingest(STATUS, &empty, true, 14),
            Outcome::OlderOrDuplicate
        );
        let [e] = board.events().collect::<Vec<_>>()[..] else {
            panic!()
        };
        assert_eq!(e.status.tank, crate::fleet::testing::HOSTILE_TANK);
        assert_eq!(e.received_ms, 13);
        let best = e.status.estimate.as_ref().unwrap().released_best_kg;
        assert_eq!(best, site.estimates[119].released_best_kg);
        assert!(best > 0.0);
        assert_eq!(
            board.counts(),
            Counts {
                applied: 3,
                older_or_duplicate: 3,
                ..Counts::default()
            }
        );
        // A site heard of only by its documents: state unknown, heard live
        // last at 13 (the retained messages at 14 do not count).
        let [s] = board.sites().collect::<Vec<_>>()[..] else {
            panic!()
        };
        assert_eq!((s.online, s.last_heard_ms), (Online::Unknown, Some(13)));
        assert_eq!(s.time_zone.as_deref(), Some("UTC"));
    }

    #[test]
    fn a_new_revision_wins_even_before_its_first_estimate() {
        let site = SiteDb::new("fleet-board-revision");
        site.store(1, 0..120);
        let late_in_one = site.document();
        assert_eq!(site.revise(), 2);
        let fresh_two = site.document();
        site.store(2, 0..30);
        let two = site.document();

        let mut board = Board::new("leaktally");
        assert_eq!(
            board.ingest(STATUS, &late_in_one, true, 1),
            Outcome::Applied
        );
        assert_eq!(board.ingest(STATUS, &fresh_two, true, 2), Outcome::Applied);
        assert_eq!(released(&board), [(2, None, false)]);
        assert_eq!(board.ingest(STATUS, &two, true, 3), Outcome::Applied);
        assert_eq!(
            board.ingest(STATUS, &late_in_one, true, 4),
            Outcome::OlderOrDuplicate
        );
        assert_eq!(
            released(&board),
            [(2, Some(site.estimates[29].at_ms), false)]
        );
    }

    #[test]
    fn a_summary_closes_the_event_for_good() {
        let site = SiteDb::new("fleet-board-summary");
        site.store(1, 0..120);
        let live = site.document();
        let end = site.estimates[119].at_ms;
        site.close(end);
        let summary = site.document();

        let mut board = Board::new("leaktally");
        assert_eq!(board.ingest(STATUS, &live, false, 1), Outcome::Applied);
        assert_eq!(board.ingest(SUMMARY, &summary, false, 2), Outcome::Applied);
        assert_eq!(released(&board), [(1, Some(end), true)]);
        let e = board.events().next().unwrap();
        assert_eq!(
            (e.status.state.as_str(), e.status.closed_at_ms),
            ("closed", Some(end))
        );
        // The retained status again, and the summary twice: nothing changes.
        for (topic, payload) in [(STATUS, &live), (SUMMARY, &summary), (STATUS, &live)] {
            assert_eq!(
                board.ingest(topic, payload, true, 3),
                Outcome::OlderOrDuplicate
            );
        }
        assert_eq!(released(&board), [(1, Some(end), true)]);

        // The agent publishes the closed document on the status topic too,
        // then the same under summary: closed by the first, the second a
        // duplicate.
        let mut board = Board::new("leaktally");
        assert_eq!(board.ingest(STATUS, &live, false, 1), Outcome::Applied);
        assert_eq!(board.ingest(STATUS, &summary, false, 2), Outcome::Applied);
        assert_eq!(released(&board), [(1, Some(end), true)]);
        assert_eq!(
            board.ingest(SUMMARY, &summary, false, 3),
            Outcome::OlderOrDuplicate
        );

        // Summary first, as retained topics may come in any order.
        let mut board = Board::new("leaktally");
        assert_eq!(board.ingest(SUMMARY, &summary, true, 1), Outcome::Applied);
        assert_eq!(
            board.ingest(STATUS, &live, true, 1),
            Outcome::OlderOrDuplicate
        );
        assert_eq!(released(&board), [(1, Some(end), true)]);
    }

    #[test]
    fn the_state_topic_says_online_and_offline_in_order() {
        let mut board = Board::new("leaktally");
        let topic = "leaktally/ff/state";
        assert_eq!(
            board.ingest(topic, &state("ff", "online", 1_000), true, 5),
            Outcome::Applied
        );
        let site = |b: &Board| {
            let s = b.sites().next().unwrap();
            (s.online, s.state_at_ms, s.last_heard_ms)
        };
        // Retained: not heard live.
        assert_eq!(site(&board), (Online::Online, Some(1_000), None));
        // The last will, published by the broker.
        assert_eq!(
            board.ingest(topic, &state("ff", "offline", 2_000), false, 6),
            Outcome::Applied
        );
        assert_eq!(site(&board), (Online::Offline, Some(2_000), Some(6)));
        assert_eq!(
            board.ingest(topic, &state("ff", "online", 1_000), true, 7),
            Outcome::OlderOrDuplicate
        );
        assert_eq!(
            board.ingest(topic, &state("ff", "offline", 2_000), false, 8),
            Outcome::OlderOrDuplicate
        );
        assert_eq!(
            board.ingest(topic, &state("ff", "online", 3_000), false, 9),
            Outcome::Applied
        );
        assert_eq!(site(&board), (Online::Online, Some(3_000), Some(9)));
        // The agent stamps the will and its online with one connection's
        // time: the will that comes after its online is the later news.
        assert_eq!(
            board.ingest(topic, &state("ff", "offline", 3_000), false, 10),
            Outcome::Applied
        );
        assert_eq!(site(&board), (Online::Offline, Some(3_000), Some(10)));
        assert_eq!(
            board.ingest(topic, &state("ff", "online", 3_000), true, 11),
            Outcome::OlderOrDuplicate
        );
    }

    #[test]
    fn the_agents_plain_state_is_taken_in_the_order_it_comes() {
        let mut board = Board::new("leaktally");
        let topic = "leaktally/depot-7/state";
        let site = |b: &Board| {
            let s = b.sites().next().unwrap();
            (s.online, s.state_at_ms, s.last_heard_ms)
        };
        // Retained when the view subscribes: the state, but not since when.
        assert_eq!(board.ingest(topic, b"online", true, 5), Outcome::Applied);
        assert_eq!(site(&board), (Online::Online, None, None));
        // The last will, live.
        assert_eq!(
            board.ingest(topic, b"offline\n", false, 6),
            Outcome::Applied
        );
        assert_eq!(site(&board), (Online::Offline, Some(6), Some(6)));
        // The same again (QoS 1, or the retained one on a reconnect).
        assert_eq!(
            board.ingest(topic, b"offline", true, 7),
            Outcome::OlderOrDuplicate
        );
        assert_eq!(site(&board), (Online::Offline, Some(6), Some(6)));
        assert_eq!(board.ingest(topic, b"online", false, 8), Outcome::Applied);
        assert_eq!(site(&board), (Online::Online, Some(8), Some(8)));
        assert!(matches!(
            board.ingest(topic, b"Online!", false, 9),
            Outcome::Malformed(why) if why.contains("\"online\" or \"offline\"")
        ));
    }

    #[test]
    fn hostile_and_mistaken_payloads_are_counted_never_taken() {
        let site = SiteDb::new("fleet-board-hostile");
        site.store(1, 0..10);
        let good = site.document();
        let mut other_format: serde_json::Value = serde_json::from_slice(&good).unwrap();
        other_format["format"] = 99.into();
        let other_format = serde_json::to_vec(&other_format).unwrap();
        let mut other_site: serde_json::Value = serde_json::from_slice(&good).unwrap();
        other_site["site"] = "elsewhere".into();
        let other_site = serde_json::to_vec(&other_site).unwrap();

        let mut board = Board::new("leaktally");
        let malformed = |o: Outcome, says: &str| match o {
            Outcome::Malformed(why) => assert!(why.contains(says), "{why:?} lacks {says:?}"),
            other => panic!("{other:?}, expected malformed: {says}"),
        };
        malformed(
            board.ingest(STATUS, b"{not json", false, 1),
            "not a status document",
        );
        malformed(
            board.ingest(STATUS, &[0xff, 0xfe, 0], false, 1),
            "not a status document",
        );
        malformed(
            board.ingest(STATUS, b"[]", false, 1),
            "not a status document",
        );
        malformed(board.ingest(STATUS, &other_format, false, 1), "format 99");
        malformed(board.ingest(STATUS, &other_site, false, 1), "\"elsewhere\"");
        // Event 2's topic with event 1's document.
        malformed(
            board.ingest("leaktally/ff/events/2/status", &good, false, 1),
            "does not hold event 2",
        );
        malformed(
            board.ingest("leaktally/ff/state", &state("other", "online", 1), false, 1),
            "names site \"other\"",
        );
        malformed(
            board.ingest("leaktally/ff/state", &state("ff", "asleep", 1), false, 1),
            "\"asleep\"",
        );
        malformed(
            board.ingest(STATUS, &vec![b' '; MAX_PAYLOAD + 1], false, 1),
            "more than",
        );
        let mut long_tank: serde_json::Value = serde_json::from_slice(&good).unwrap();
        long_tank["events"][0]["tank"] = "T".repeat(MAX_TEXT + 1).into();
        malformed(
            board.ingest(STATUS, &serde_json::to_vec(&long_tank).unwrap(), false, 1),
            "its tank is 1025 bytes",
        );
        assert_eq!(
            board.ingest("leaktally/ff/tanks/T1/reading", b"{}", false, 1),
            Outcome::UnknownTopic
        );
        assert_eq!(board.ingest(STATUS, b"", true, 1), Outcome::Cleared);
        assert_eq!(board.sites().count() + board.events().count(), 0);
        assert_eq!(
            board.counts(),
            Counts {
                malformed: 10,
                unknown_topic: 1,
                cleared: 1,
                ..Counts::default()
            }
        );
        assert_eq!(board.ingest(STATUS, &good, false, 2), Outcome::Applied);
    }

    /// Thousands of damaged copies of a real document (bytes changed, cut,
    /// doubled; fields given other types and extreme numbers) on every kind
    /// of topic: none panics, and each is counted once.
    #[test]
    fn damaged_documents_never_panic_and_are_all_counted() {
        let site = SiteDb::new("fleet-board-damaged");
        site.store(1, 0..30);
        let good = site.document();
        let value: serde_json::Value = serde_json::from_slice(&good).unwrap();
        assert!(value["events"][0]["estimate"]["forecast"].is_object());
        assert!(value["events"][0]["estimate"]["crossings"][0].is_object());
        // xorshift64: a fixed sequence, so a failure repeats.
        let mut seed = 0x9E37_79B9_7F4A_7C15_u64;
        let mut next = move || {
            seed ^= seed << 13;
            seed ^= seed >> 7;
            seed ^= seed << 17;
            seed
        };
        let topics = [
            STATUS,
            SUMMARY,
            "leaktally/ff/state",
            "leaktally/ff/events/7/status",
        ];
        let odd_values = [
            serde_json::json!(null),
            serde_json::json!(-1),
            serde_json::json!(1e308),
            serde_json::json!(i64::MIN),
            serde_json::json!(u64::MAX),
            serde_json::json!("closed"),
            serde_json::json!([]),
            serde_json::json!({}),
            serde_json::json!(true),
        ];
        let mut board = Board::new("leaktally");
        let tries = 3_000;
        for n in 0..tries {
            let payload = if n % 2 == 0 {
                let mut bytes = good.clone();
                for _ in 0..=(next() % 8) {
                    let at = (next() as usize) % bytes.len();
                    match next() % 3 {
                        0 => bytes[at] = next() as u8,
                        1 => bytes.truncate(at.max(1)),
                        _ => {
                            let copy = bytes[at..].to_vec();
                            bytes.extend(copy);
                        }
                    }
                }
                bytes
            } else {
                // One field of the document, or of its event or estimate,
                // given an odd value.
                let mut v = value.clone();
                let target = match next() % 6 {
                    0 => &mut v,
                    1 => &mut v["events"][0],
                    2 => &mut v["events"][0]["estimate"]["forecast"],
                    3 => &mut v["events"][0]["estimate"]["crossings"][0],
                    4 => &mut v["events"][0]["estimate"]["quality"],
                    _ => &mut v["events"][0]["estimate"],
                };
                if let Some(map) = target.as_object_mut() {
                    let keys: Vec<String> = map.keys().cloned().collect();
                    let key = &keys[(next() as usize) % keys.len()];
                    map[key] = odd_values[(next() as usize) % odd_values.len()].clone();
                }
                serde_json::to_vec(&v).unwrap()
            };
            let topic = topics[(next() as usize) % topics.len()];
            let retained = next() % 2 == 0;
            board.ingest(topic, &payload, retained, n);
            // What one document alone makes of the page, the JSON and the
            // metrics.
            let mut alone = Board::new("leaktally");
            if alone.ingest(topic, &payload, retained, n) == Outcome::Applied {
                let link = crate::fleet::mqtt::LinkState::default();
                let doc =
                    crate::fleet::view::document(&alone, &link, "b:1883", "leaktally", n, 60_000);
                assert!(!crate::fleet::view::page(&doc).is_empty());
                assert!(!crate::fleet::view::metrics(&doc).is_empty());
                serde_json::to_string(&doc).unwrap();
            }
        }
        let c = board.counts();
        let counted = c.applied
            + c.older_or_duplicate
            + c.cleared
            + c.unknown_topic
            + c.malformed
            + c.over_capacity;
        assert_eq!(counted, tries as u64);
        assert!(c.malformed > tries as u64 / 2, "{c:?}");
        // Whatever was taken reads back as a document the page can show.
        for e in board.events() {
            assert!(
                e.status.event == 1 || e.status.event == 7,
                "{:?}",
                e.status.event
            );
        }
    }

    #[test]
    fn memory_is_bounded_and_closed_events_let_go_stay_closed() {
        let site = SiteDb::new("fleet-board-bounds");
        site.store(1, 0..5);
        let open = site.document();
        site.close(site.estimates[4].at_ms);
        let closed = site.document();
        // The same documents under many sites' topics and event ids.
        let as_event = |doc: &[u8], id: i64| {
            let mut v: serde_json::Value = serde_json::from_slice(doc).unwrap();
            v["events"][0]["event"] = id.into();
            serde_json::to_vec(&v).unwrap()
        };
        let mut board = Board::new("leaktally");
        for n in 0..MAX_SITES {
            let topic = format!("leaktally/s{n}/state");
            assert_eq!(
                board.ingest(&topic, &state(&format!("s{n}"), "online", 1), false, 1),
                Outcome::Applied
            );
        }
        assert!(matches!(
            board.ingest("leaktally/one-too-many/events/1/status", &open, false, 1),
            Outcome::OverCapacity(why) if why.contains("1000 sites")
        ));
        for id in 1..=MAX_OPEN_EVENTS as i64 {
            let topic = format!("leaktally/s0/events/{id}/status");
            assert_eq!(
                board.ingest(&topic, &as_event(&open, id), false, 1),
                Outcome::Applied
            );
        }
        let next = MAX_OPEN_EVENTS as i64 + 1;
        assert!(matches!(
            board.ingest(&format!("leaktally/s0/events/{next}/status"), &as_event(&open, next), false, 1),
            Outcome::OverCapacity(why) if why.contains("open events")
        ));
        // Closing frees room; past MAX_CLOSED_KEPT the oldest closed go.
        for id in 1..=(MAX_CLOSED_KEPT as i64 + 3) {
            let topic = format!("leaktally/s0/events/{id}/summary");
            assert_eq!(
                board.ingest(&topic, &as_event(&closed, id), false, 1),
                Outcome::Applied
            );
        }
        assert_eq!(board.events().filter(|e| e.closed).count(), MAX_CLOSED_KEPT);
        assert_eq!(board.sites().count(), MAX_SITES);
        // A stale retained status of a closed event let go does not come
        // back as open.
        let forgotten = (1..=MAX_CLOSED_KEPT as i64 + 3)
            .find(|id| !board.events().any(|e| e.status.event == *id))
            .unwrap();
        assert_eq!(
            board.ingest(
                &format!("leaktally/s0/events/{forgotten}/status"),
                &as_event(&open, forgotten),
                true,
                2
            ),
            Outcome::OlderOrDuplicate
        );
        assert!(!board.events().any(|e| e.status.event == forgotten));
    }
}
