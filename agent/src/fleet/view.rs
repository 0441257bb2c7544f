//! What the fleet view shows: the `/api/fleet` document ([`FleetDocument`],
//! format [`FORMAT`]), the page for responders made from it, and the
//! metrics. Everything is made from one [`document`], so the three agree.
//!
//! Each event's figures are said in its site's own units and time zone
//! (from its status document), as the site's own page says them; the words
//! are made again here from the numbers (`crate::report`), with the same
//! headline tiles as the site's page (`crate::web::page`). Every text from
//! the broker goes through `markup!`, which escapes it.
//!
//! Left out: the routes (`http.rs`) and the board's rules (`board.rs`).

use super::board::{self, Board, Counts, Event, Online};
use super::mqtt::LinkState;
use crate::config::Units;
use crate::estimate::{Estimate, LeakParams};
use crate::model::{Mass, TimeSpan};
use crate::report::{self, Presentation};
use crate::status::EstimateView;
use crate::web::html::{Html, markup};
use crate::web::metrics::family;
use serde::Serialize;

/// The `/api/fleet` document's layout version (README, "Formats").
pub const FORMAT: u32 = 1;
/// How many closed events the page lists, newest first, of those closed
/// in the last 7 days (the JSON has every one the board holds).
pub const CLOSED_SHOWN: usize = 20;

/// The fleet as the view knows it: every site, every open event, the
/// closed events held, and the connection to the broker.
#[derive(Debug, Clone, Serialize)]
pub struct FleetDocument {
    pub format: u32,
    pub generated_at: String,
    pub generated_at_ms: i64,
    pub caution: &'static str,
    pub broker: BrokerView,
    /// The topic prefix subscribed to.
    pub prefix: String,
    /// An open event whose newest sample is older than this is flagged.
    pub stale_after_ms: i64,
    pub sites: Vec<SiteView>,
    /// Open events, newest start first.
    pub events: Vec<FleetEvent>,
    /// Closed events, newest closed first.
    pub closed: Vec<FleetEvent>,
    /// How many messages came to what (`board::Counts`).
    pub messages: Counts,
    pub limits: Limits,
}

/// The connection to the broker.
#[derive(Debug, Clone, Serialize)]
pub struct BrokerView {
    pub address: String,
    pub connected: bool,
    /// Since when connected, or unreachable; RFC 3339 UTC.
    pub since: Option<String>,
    pub since_ms: Option<i64>,
    /// Why not connected (or a subscription refused): what, where, fix.
    pub error: Option<String>,
}

/// One site.
#[derive(Debug, Clone, Serialize)]
pub struct SiteView {
    pub site: String,
    /// `online`, `offline` or `unknown` (nothing on its state topic yet).
    pub state: &'static str,
    /// Since when: the site's stamp where its message has one, else when
    /// the view saw the change; absent when only the broker's retained
    /// message told it.
    pub state_at: Option<String>,
    pub state_at_ms: Option<i64>,
    /// When the view last had a live (not retained) message from it.
    pub last_heard_at_ms: Option<i64>,
    /// How old the newest thing the site stamped is (its state message, or
    /// an event's latest sample), ms.
    pub data_age_ms: Option<i64>,
    pub open_events: usize,
    pub time_zone: Option<String>,
    pub units: Option<String>,
}

/// One event, with its latest figures as the site published them.
#[derive(Debug, Clone, Serialize)]
pub struct FleetEvent {
    pub site: String,
    pub event: i64,
    pub tank: String,
    /// `open` or `closed`.
    pub state: &'static str,
    pub source: String,
    pub start: String,
    pub start_ms: i64,
    pub opened_at_ms: i64,
    pub closed_at_ms: Option<i64>,
    pub revision: i64,
    pub params: LeakParams,
    pub params_text: String,
    /// How old the latest estimate's sample is, ms.
    pub data_age_ms: Option<i64>,
    /// Open, and its data older than `stale_after_ms`.
    pub stale: bool,
    /// When the view took this document.
    pub received_at_ms: i64,
    /// The site's latest estimate: numbers and codes (the site's own
    /// `status --json` has the words).
    pub estimate: Option<Estimate>,
    pub tracking_error: Option<String>,
}

/// The board's bounds.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct Limits {
    pub sites: usize,
    pub open_events: usize,
    pub closed_kept: usize,
    pub payload_bytes: usize,
}

/// The document of `board` and the connection, at `now_ms`.
pub fn document(
    board: &Board,
    link: &LinkState,
    address: &str,
    prefix: &str,
    now_ms: i64,
    stale_after_ms: i64,
) -> FleetDocument {
    let event = |e: &Event| {
        let d = &e.status;
        let data_age_ms = d.estimate.as_ref().map(|x| now_ms.saturating_sub(x.at_ms));
        FleetEvent {
            site: e.site.clone(),
            event: d.event,
            tank: d.tank.clone(),
            state: if e.closed { "closed" } else { "open" },
            source: d.source.clone(),
            start: report::rfc3339(d.start_ms),
            start_ms: d.start_ms,
            opened_at_ms: d.opened_at_ms,
            closed_at_ms: d.closed_at_ms,
            revision: d.revision,
            params: d.params,
            params_text: d.params_text.clone(),
            data_age_ms,
            stale: !e.closed
                && data_age_ms.unwrap_or(now_ms.saturating_sub(d.opened_at_ms)) > stale_after_ms,
            received_at_ms: e.received_ms,
            estimate: d.estimate.clone(),
            tracking_error: d.tracking_error.clone(),
        }
    };
    let mut events: Vec<FleetEvent> = board.events().filter(|e| !e.closed).map(event).collect();
    events.sort_by_key(|e| std::cmp::Reverse(e.start_ms));
    let mut closed: Vec<FleetEvent> = board.events().filter(|e| e.closed).map(event).collect();
    closed.sort_by_key(|e| std::cmp::Reverse(e.closed_at_ms));
    let sites = board
        .sites()
        .map(|s| {
            let of_site = || board.events().filter(|e| e.site == s.id);
            let newest = of_site()
                .filter_map(|e| e.status.estimate.as_ref().map(|x| x.at_ms))
                .chain(s.state_at_ms)
                .max();
            SiteView {
                site: s.id.clone(),
                state: s.online.name(),
                state_at: s.state_at_ms.map(report::rfc3339),
                state_at_ms: s.state_at_ms,
                last_heard_at_ms: s.last_heard_ms,
                data_age_ms: newest.map(|t| now_ms.saturating_sub(t)),
                open_events: of_site().filter(|e| !e.closed).count(),
                time_zone: s.time_zone.clone(),
                units: s.units.clone(),
            }
        })
        .collect();
    FleetDocument {
        format: FORMAT,
        generated_at: report::rfc3339(now_ms),
        generated_at_ms: now_ms,
        caution: report::CAUTION,
        broker: BrokerView {
            address: address.to_owned(),
            connected: link.connected,
            since: link.since_ms.map(report::rfc3339),
            since_ms: link.since_ms,
            error: link.error.clone(),
        },
        prefix: prefix.to_owned(),
        stale_after_ms,
        sites,
        events,
        closed,
        messages: board.counts(),
        limits: Limits {
            sites: board::MAX_SITES,
            open_events: board::MAX_OPEN_EVENTS,
            closed_kept: board::MAX_CLOSED_KEPT,
            payload_bytes: board::MAX_PAYLOAD,
        },
    }
}

/// How a site's figures are said: its zone and units, where its document
/// named ones this machine knows; UTC and metric otherwise.
fn presentation(doc: &FleetDocument, site: &str) -> Presentation {
    doc.sites
        .iter()
        .find(|s| s.site == site)
        .and_then(|s| {
            let units = Units::from_name(s.units.as_deref()?)?;
            Presentation::new(s.time_zone.as_deref()?, units).ok()
        })
        .unwrap_or_default()
}

/// A span of time for people, from milliseconds.
fn span(ms: i64) -> String {
    report::duration(TimeSpan::seconds(ms.max(0) as f64 / 1000.0))
}

/// The page for responders.
pub fn page(doc: &FleetDocument) -> String {
    let title = match doc.events.len() {
        0 => "No open leaks".to_owned(),
        1 => "1 open leak".to_owned(),
        n => format!("{n} open leaks"),
    };
    let mut page = markup!(
        r#"<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{title} · fleet · leaktally</title>
<link rel="stylesheet" href="/assets/leaktally.css">
<link rel="icon" href="/assets/icon.svg" type="image/svg+xml">
<script src="/assets/refresh.js" defer></script>
<noscript><meta http-equiv="refresh" content="10"></noscript>
</head>
<body>
<header class="masthead">
<p class="brand">leaktally <span>fleet view · read-only</span></p>
<h1 data-field="site">Every site on {broker}</h1>
</header>
<p id="offline" class="offline" role="alert" hidden>Cannot reach the fleet view. The figures below are from the time shown and are not updating.</p>
"#,
        title = title,
        broker = doc.broker.address,
    );
    page.push(live(doc));
    markup!(
        &mut page,
        r#"<footer class="foot">
<p>For machines: <a href="/api/fleet">/api/fleet</a> (every site and event the view holds), <a href="/metrics">/metrics</a>. Times there are RFC 3339 UTC and figures SI. The sites' own databases are the record: each site's <code>leaktally status EVENT</code> has the full figures.</p>
</footer>
</body>
</html>
"#
    );
    page.into_string()
}

/// The `<main>` the refresh script swaps.
fn live(doc: &FleetDocument) -> Html {
    let utc = Presentation::default();
    let mut main = markup!(
        r#"<main id="live" data-generated-at-ms="{ms}">
<p class="stamp">As of <time data-field="generated-at" datetime="{machine}">{at}</time> · each site's figures in its own units and time zone · refreshed every 5 s</p>
<aside class="caution" role="note" data-field="caution"><strong>Caution</strong> {caution}</aside>
"#,
        ms = doc.generated_at_ms,
        machine = doc.generated_at,
        at = utc.time(doc.generated_at_ms),
        caution = doc.caution.strip_prefix("CAUTION: ").unwrap_or(doc.caution),
    );
    main.push(broker(doc, &utc));
    main.push(sites(doc));
    let summary = match doc.events.len() {
        0 => markup!("No open leak events on any site."),
        1 => markup!("1 open leak event"),
        n => markup!("{n} open leak events, newest first", n = n),
    };
    markup!(
        &mut main,
        r#"<p class="summary" data-field="open-events">{summary}</p>
"#,
        summary = summary
    );
    main.extend(doc.events.iter().map(|e| card(doc, e)));
    main.push(closed(doc));
    let m = doc.messages;
    if m.malformed + m.over_capacity + m.unknown_topic > 0 {
        markup!(
            &mut main,
            r#"<p class="fine" data-field="ignored">Ignored so far: <span data-field="malformed">{malformed}</span> messages that were not what their topic promises, {unknown} on topics the view does not read, and <span data-field="over-capacity">{over}</span> past the view's bounds ({sites} sites, {events} open events); the view's log names each.</p>
"#,
            malformed = m.malformed,
            unknown = m.unknown_topic,
            over = m.over_capacity,
            sites = doc.limits.sites,
            events = doc.limits.open_events,
        );
    }
    markup!(&mut main, "</main>\n");
    main
}

/// An alarm while the broker is unreachable or refuses the subscriptions.
fn broker(doc: &FleetDocument, utc: &Presentation) -> Html {
    let b = &doc.broker;
    match (&b.error, b.connected, b.since_ms) {
        (Some(why), false, Some(since)) => markup!(
            r#"<p class="alarm" role="alert" data-field="broker">Broker unreachable since <time datetime="{machine}">{at}</time> ({ago} ago): {why}. The figures below are the last received and are not updating; the view keeps trying.</p>
"#,
            machine = report::rfc3339(since),
            at = utc.time(since),
            ago = span(doc.generated_at_ms.saturating_sub(since)),
            why = why,
        ),
        (Some(why), _, _) => markup!(
            r#"<p class="alarm" role="alert" data-field="broker">{why}.</p>
"#,
            why = why
        ),
        (None, false, _) => markup!(
            r#"<p class="waiting" data-field="broker">Connecting to the broker at {at}…</p>
"#,
            at = b.address
        ),
        (None, true, _) => Html::new(),
    }
}

/// Every site: online or not, since when, how old its newest data is.
fn sites(doc: &FleetDocument) -> Html {
    let mut out = markup!(
        r#"<section class="closed" data-field="sites">
<h2>Sites</h2>
"#
    );
    if doc.sites.is_empty() {
        markup!(
            &mut out,
            "<p class=\"fine\">None yet. A site appears here when its agent publishes to this broker under the prefix <code>{prefix}</code>.</p>\n",
            prefix = doc.prefix
        );
    } else {
        markup!(&mut out, "<ol>\n");
    }
    for s in &doc.sites {
        let people = presentation(doc, &s.site);
        let state = match (s.state, s.state_at_ms) {
            (state, Some(at)) => markup!(
                "{state} since <time datetime=\"{machine}\">{at}</time>",
                state = state,
                machine = report::rfc3339(at),
                at = people.time(at)
            ),
            ("unknown", None) => markup!("state unknown (no state message yet)"),
            (state, None) => markup!("{state} (since before the view connected)", state = state),
        };
        let age = s
            .data_age_ms
            .map_or("none".to_owned(), |ms| format!("{} old", span(ms)));
        let heard = s
            .last_heard_at_ms
            .map_or("not since the view started".to_owned(), |ms| {
                format!("{} ago", span(doc.generated_at_ms.saturating_sub(ms)))
            });
        let class = if s.state == Online::Online.name() {
            "site"
        } else {
            "alarm"
        };
        markup!(
            &mut out,
            r#"<li class="{class}" data-site="{site}"><p class="closed-head"><span class="tank" data-field="site-id">{site}</span> · <span data-field="site-state" data-state="{code}">{state}</span></p>
<p class="fine">newest data <span data-field="site-data-age">{age}</span> · heard live {heard} · <span data-field="site-open-events">{open}</span> open · time zone {zone}</p></li>
"#,
            class = class,
            site = s.site,
            code = s.state,
            state = state,
            age = age,
            heard = heard,
            open = s.open_events,
            zone = s
                .time_zone
                .clone()
                .unwrap_or_else(|| "not known yet".into()),
        );
    }
    if !doc.sites.is_empty() {
        markup!(&mut out, "</ol>\n");
    }
    markup!(&mut out, "</section>\n");
    out
}

/// One open event's card: site, tank, since when, data age, the headline
/// figures as the site's page shows them, and its parameters.
fn card(doc: &FleetDocument, e: &FleetEvent) -> Html {
    let people = presentation(doc, &e.site);
    let id = e.event;
    let mut card = markup!(
        r#"<section class="event" data-site="{site}" data-event="{id}" data-tank="{tank}">
<header class="event-head">
<h2><span data-field="tank" data-event="{id}">{tank}</span> <span class="what">site {site}</span></h2>
<p class="meta">Event <span data-field="event" data-event="{id}">{id}</span> · leaking since <time data-field="since" data-event="{id}" datetime="{machine}">{since}</time> ({ago} ago) · flagged by {source} · revision {revision} · data age <span data-field="data-age" data-event="{id}">{age}</span></p>
</header>
"#,
        site = e.site,
        id = id,
        tank = e.tank,
        machine = e.start,
        since = people.time(e.start_ms),
        ago = span(doc.generated_at_ms.saturating_sub(e.start_ms)),
        source = e.source,
        revision = e.revision,
        age = e.data_age_ms.map_or("no sample yet".to_owned(), span),
    );
    if let Some(why) = &e.tracking_error {
        markup!(
            &mut card,
            r#"<p class="alarm" role="alert" data-field="not-tracked" data-event="{id}">Not tracked at the site: {why}. These figures are not being updated.</p>
"#,
            id = id,
            why = why
        );
    }
    match &e.estimate {
        None => markup!(
            &mut card,
            r#"<p class="waiting" data-field="no-estimate" data-event="{id}">No usable sample yet at the site.</p>
"#,
            id = id
        ),
        Some(est) => {
            if e.stale {
                markup!(
                    &mut card,
                    r#"<p class="alarm" role="alert" data-field="stale" data-event="{id}">No new figures for {age}: these are from {at} and are not current. The site may be offline, or its link to the broker or to the tank's device down.</p>
"#,
                    id = id,
                    age = span(doc.generated_at_ms.saturating_sub(est.at_ms)),
                    at = people.time(est.at_ms)
                );
            }
            let view = EstimateView::new(est.clone(), &e.params, &people);
            card.push(crate::web::page::headline(
                id,
                &view,
                &people,
                doc.generated_at_ms,
            ));
            // Why the figure is what it is, and what the site warns of:
            // a responder reading "0 kg/s" must see "no loss seen yet".
            markup!(
                &mut card,
                r#"<p class="params" data-field="method-reason" data-event="{id}">Why: {why}</p>
"#,
                id = id,
                why = view.words.method_reason
            );
            card.push(crate::web::page::warnings(id, &view));
        }
    }
    markup!(
        &mut card,
        r#"<p class="params">Parameters: {params}</p>
</section>
"#,
        params = e.params_text
    );
    card
}

/// The events closed in the last 7 days (as the site's page), newest
/// first, with their final totals.
fn closed(doc: &FleetDocument) -> Html {
    let mut out = markup!(
        r#"<section class="closed" data-field="closed-events">
<h2>Closed in the last 7 days</h2>
"#
    );
    let since = doc
        .generated_at_ms
        .saturating_sub(crate::web::page::CLOSED_WITHIN_MS);
    let lately: Vec<&FleetEvent> = doc
        .closed
        .iter()
        .filter(|e| e.closed_at_ms.is_some_and(|at| at >= since))
        .take(CLOSED_SHOWN)
        .collect();
    if lately.is_empty() {
        markup!(
            &mut out,
            "<p class=\"fine\">None. An event appears here, with its final figures, once its site closes it.</p>\n"
        );
    } else {
        markup!(&mut out, "<ol>\n");
        for e in lately {
            let people = presentation(doc, &e.site);
            let mass = |kg: f64| people.mass(Mass::kilograms(kg));
            let total = e.estimate.as_ref().map_or(
                markup!(
                    r#"<span class="final" data-field="closed-total">no usable sample</span>"#
                ),
                |x| {
                    markup!(
                        r#"<span class="final" data-field="closed-total">{best}</span> <span class="band">band {low} to {high}</span>"#,
                        best = mass(x.released_best_kg),
                        low = mass(x.released_low_kg),
                        high = mass(x.released_high_kg),
                    )
                },
            );
            markup!(
                &mut out,
                r#"<li data-site="{site}" data-event="{id}"><p class="closed-head"><span class="tank">{tank}</span> · site {site} · event {id} · final total {total}</p>
<p class="fine">from {start} to {end} · revision {revision} · flagged by {source}</p></li>
"#,
                site = e.site,
                id = e.event,
                tank = e.tank,
                total = total,
                start = people.time(e.start_ms),
                end = e
                    .closed_at_ms
                    .map_or("an unknown time".to_owned(), |ms| people.time(ms)),
                revision = e.revision,
                source = e.source,
            );
        }
        markup!(&mut out, "</ol>\n");
    }
    markup!(&mut out, "</section>\n");
    out
}

/// `/metrics`, in the Prometheus text format, as the agent's.
pub fn metrics(doc: &FleetDocument) -> String {
    let mut out = String::new();
    let seconds = |ms: i64| ms as f64 / 1000.0;
    family(
        &mut out,
        "leaktally_fleet_broker_connected",
        "gauge",
        "1 while the fleet view is connected and subscribed to the broker, else 0.",
    )
    .value(&[], f64::from(u8::from(doc.broker.connected)));
    let mut f = family(
        &mut out,
        "leaktally_fleet_site_online",
        "gauge",
        "1 while a site says it is online, 0 when offline (or its last will), NaN before it said either.",
    );
    for s in &doc.sites {
        let v = match s.state {
            "online" => 1.0,
            "offline" => 0.0,
            _ => f64::NAN,
        };
        f.value(&[("site", &s.site)], v);
    }
    let mut f = family(
        &mut out,
        "leaktally_fleet_site_data_age_seconds",
        "gauge",
        "How old the newest thing a site stamped is (its state message or an event's latest sample), s.",
    );
    for s in &doc.sites {
        if let Some(age) = s.data_age_ms {
            f.value(&[("site", &s.site)], seconds(age));
        }
    }
    family(
        &mut out,
        "leaktally_fleet_open_events",
        "gauge",
        "Open events over every site.",
    )
    .value(&[], doc.events.len() as f64);
    let with_estimate = || {
        doc.events
            .iter()
            .filter_map(|e| Some((e, e.estimate.as_ref()?)))
    };
    let id = |e: &FleetEvent| e.event.to_string();
    let mut f = family(
        &mut out,
        "leaktally_fleet_released_kg",
        "gauge",
        "An open event's released total as its site last published it, kg (an estimate), with its band.",
    );
    for (e, est) in with_estimate() {
        for (bound, v) in [
            ("best", est.released_best_kg),
            ("low", est.released_low_kg),
            ("high", est.released_high_kg),
        ] {
            f.value(
                &[
                    ("site", &e.site),
                    ("event", &id(e)),
                    ("tank", &e.tank),
                    ("bound", bound),
                ],
                v,
            );
        }
    }
    let mut f = family(
        &mut out,
        "leaktally_fleet_rate_kg_per_second",
        "gauge",
        "An open event's present release rate as its site last published it, kg/s (an estimate).",
    );
    for (e, est) in with_estimate() {
        f.value(
            &[("site", &e.site), ("event", &id(e)), ("tank", &e.tank)],
            est.rate_best_kg_s,
        );
    }
    let mut f = family(
        &mut out,
        "leaktally_fleet_event_data_age_seconds",
        "gauge",
        "How old an open event's latest sample is, s.",
    );
    for (e, _) in with_estimate() {
        if let Some(age) = e.data_age_ms {
            f.value(
                &[("site", &e.site), ("event", &id(e)), ("tank", &e.tank)],
                seconds(age),
            );
        }
    }
    let mut f = family(
        &mut out,
        "leaktally_fleet_messages_total",
        "counter",
        "Messages taken from the broker since the view started, by what became of them.",
    );
    let m = doc.messages;
    for (outcome, n) in [
        ("applied", m.applied),
        ("older_or_duplicate", m.older_or_duplicate),
        ("cleared", m.cleared),
        ("unknown_topic", m.unknown_topic),
        ("malformed", m.malformed),
        ("over_capacity", m.over_capacity),
    ] {
        f.value(&[("outcome", outcome)], n as f64);
    }
    out
}
