//! The responder page: every open event on one server-rendered HTML page.
//!
//! Built for a phone at a command post as much as a desk: one column that
//! widens into a grid, the figures large and each with its unit, the
//! caution at the top. Every figure carries `data-field` and `data-event`
//! attributes so that tests (and anyone scripting against the page) can
//! find it without scraping the layout.
//!
//! The page is [`Html`], built section by section with `markup!`, which
//! escapes every text it is given (tank ids, descriptions, operator notes,
//! reasons, anything from the database or the config); a text that is not
//! escaped does not compile.
//!
//! Left out: client-side rendering. The refresh script only fetches this
//! page again and swaps the fresh `<main>` in; nothing is computed in the
//! browser.

use crate::model::TimeSpan;
use crate::report::{self, estimate as words};
use crate::status::{EstimateView, EventStatus, StatusDocument, Volumes};
use crate::store::ActionRow;
use crate::store::health::HealthSnapshot;
use crate::web::chart::{self, Point};
use crate::web::html::{Html, markup};
use std::fmt::Write as _;

/// Everything the page shows.
pub struct PageData {
    pub site: String,
    pub doc: StatusDocument,
    /// Per event of `doc.events`, in the same order.
    pub events: Vec<EventExtras>,
    /// A latest estimate older than this is flagged as not current.
    pub stale_after_ms: i64,
    /// Whether the database takes the daemon's writes.
    pub store: HealthSnapshot,
}

/// What the page shows beside an event's status document.
pub struct EventExtras {
    pub series: Vec<Point>,
    pub notes: Vec<Note>,
    pub description: String,
    pub substance: String,
}

/// An operator's note on an event, from the audit trail.
#[derive(Debug, Clone, PartialEq)]
pub struct Note {
    pub at_ms: i64,
    /// open, revise, note or close.
    pub kind: String,
    pub who: String,
    pub text: String,
}

/// The notes in an event's actions: the text of `leak note`, and the
/// `--note` of open, revise and close, for the actions that were carried out.
pub fn notes(actions: &[ActionRow]) -> Vec<Note> {
    actions
        .iter()
        .filter(|a| a.state == "done")
        .filter_map(|a| {
            let text = a
                .request
                .get(if a.kind == "note" { "text" } else { "note" })?
                .as_str()?
                .trim();
            (!text.is_empty()).then(|| Note {
                at_ms: a.handled_at_ms.unwrap_or(a.requested_at_ms),
                kind: a.kind.clone(),
                who: format!("{}@{}", a.os_user, a.host),
                text: text.to_owned(),
            })
        })
        .collect()
}

/// A rate as its number and unit: kg/h under 1 kg/s (where kg/s would read
/// 0.0), kg/s above, as `report::rate` does.
pub fn rate_parts(kg_s: f64) -> (String, &'static str) {
    if kg_s != 0.0 && kg_s.abs() < 1.0 {
        (report::grouped(kg_s * 3600.0), "kg/h")
    } else {
        (report::significant(kg_s), "kg/s")
    }
}

/// A span of time for people, from milliseconds.
fn span(ms: i64) -> String {
    report::duration(TimeSpan::seconds(ms.max(0) as f64 / 1000.0))
}

/// Renders the page.
pub fn render(data: &PageData) -> String {
    let doc = &data.doc;
    let mut page = head(doc.events.len(), &data.site);
    page.push(live(data));
    page.push(foot(doc.caution));
    page.into_string()
}

/// The document's head and the masthead, up to the live part.
fn head(open: usize, site: &str) -> Html {
    let title = match open {
        0 => "No open leaks".to_owned(),
        1 => "1 open leak".to_owned(),
        n => format!("{n} open leaks"),
    };
    markup!(
        r#"<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{title} · {site} · leaktally</title>
<link rel="stylesheet" href="/assets/leaktally.css">
<link rel="icon" href="/assets/icon.svg" type="image/svg+xml">
<script src="/assets/refresh.js" defer></script>
<noscript><meta http-equiv="refresh" content="10"></noscript>
</head>
<body>
<header class="masthead">
<p class="brand">leaktally <span>responder view · read-only</span></p>
<h1 data-field="site">{site}</h1>
</header>
<p id="offline" class="offline" role="alert" hidden>Cannot reach the agent. The figures below are from the time shown and are not updating.</p>
"#,
        title = title,
        site = site,
    )
}

/// The `<main>` the refresh script swaps: the stamp, the caution, the
/// daemon's state, and a card per event.
fn live(data: &PageData) -> Html {
    let doc = &data.doc;
    let mut main = markup!(
        r#"<main id="live" data-generated-at-ms="{ms}">
<p class="stamp">Figures as of <time data-field="generated-at">{at}</time> · the page refreshes every 5 s</p>
<aside class="caution" role="note"><strong>Caution</strong> {caution}</aside>
"#,
        ms = doc.generated_at_ms,
        at = doc.generated_at,
        caution = doc.caution.strip_prefix("CAUTION: ").unwrap_or(doc.caution),
    );
    main.push(daemon_state(doc, &data.store));
    main.push(summary(doc.events.len()));
    main.extend(
        doc.events
            .iter()
            .zip(&data.events)
            .map(|(e, extras)| card(e, extras, doc.generated_at_ms, data.stale_after_ms)),
    );
    markup!(&mut main, "</main>\n");
    main
}

/// An alarm when the figures are not being updated: the database takes no
/// writes, or the daemon is not running. Nothing while all is well.
fn daemon_state(doc: &StatusDocument, store: &HealthSnapshot) -> Html {
    if let Some((since, why)) = store.failing {
        let mut text = format!(
            "The database has taken none of the agent's writes since {}: {}. {} poll cycles ({} samples) wait in the agent's memory and will be stored when it does; the figures below stop at that time.",
            report::utc(since),
            why.describe(),
            store.held_cycles,
            store.held_samples
        );
        if store.dropped_samples > 0 {
            let _ = write!(
                text,
                " To bound memory, {} samples of tanks with no open event were given up; every event sample is kept.",
                store.dropped_samples
            );
        }
        markup!(
            r#"<p class="alarm" role="alert" data-field="store">{text}</p>
"#,
            text = text
        )
    } else if !doc.daemon_running {
        // (While writes fail the heartbeat is stale too, but this page is
        // served by the daemon itself, so the message above is the true one.)
        markup!(
            r#"<p class="alarm" role="alert">The agent's daemon is not running (last seen {seen}); these figures are not being updated.</p>
"#,
            seen = doc.daemon_last_seen.as_deref().unwrap_or("never")
        )
    } else {
        Html::new()
    }
}

/// How many events are open, or how one appears when none is.
fn summary(open: usize) -> Html {
    let text = match open {
        0 => markup!(
            "No open leak events. Events appear here as soon as an operator flags a leak (`leaktally leak open`) or the control system raises a tank's leak flag."
        ),
        1 => markup!("1 open leak event"),
        n => markup!("{n} open leak events, newest first", n = n),
    };
    markup!(
        r#"<p class="summary" data-field="open-events">{text}</p>
"#,
        text = text
    )
}

/// The links for machines and the caution in full, closing the document.
fn foot(caution: &str) -> Html {
    markup!(
        r#"<footer class="foot">
<p>For machines: <a href="/api/status">/api/status</a> (the document of <code>leaktally status --json</code>), <code>/api/events/ID</code>, <code>/api/events/ID/series</code>, <a href="/metrics">/metrics</a>.</p>
<p>{caution}</p>
</footer>
</body>
</html>
"#,
        caution = caution
    )
}

/// One event's card: its head, why its figures may not be current, the
/// figures, the chart and the reportable quantities, how the figures are
/// made, and the operators' notes.
fn card(e: &EventStatus, extras: &EventExtras, now_ms: i64, stale_after_ms: i64) -> Html {
    let id = e.event;
    let at_ms = e.estimate.as_ref().map_or(Html::new(), |est| {
        markup!(r#" data-estimate-at-ms="{at}""#, at = est.at_ms)
    });
    let mut card = markup!(
        r#"<section class="event" id="event-{id}" data-event="{id}" data-tank="{tank}"{at_ms}>
"#,
        id = id,
        tank = e.tank,
        at_ms = at_ms,
    );
    card.push(event_head(e, extras, now_ms));
    if let Some(why) = &e.tracking_error {
        markup!(
            &mut card,
            r#"<p class="alarm" role="alert" data-field="not-tracked" data-event="{id}">Not tracked: {why}. These figures are not being updated.</p>
"#,
            id = id,
            why = why
        );
    }
    match &e.estimate {
        None => markup!(
            &mut card,
            r#"<p class="waiting" data-field="no-estimate" data-event="{id}">No usable sample yet: the first figures appear with the tank's next good level reading.</p>
"#,
            id = id
        ),
        Some(est) => {
            let age = now_ms - est.at_ms;
            if age > stale_after_ms {
                markup!(
                    &mut card,
                    r#"<p class="alarm" role="alert" data-field="stale" data-event="{id}">No new sample for {age}: these figures are from {at} and are not current. Check the link to the tank's device.</p>
"#,
                    id = id,
                    age = span(age),
                    at = report::utc(est.at_ms)
                );
            }
            card.push(figures(id, est, now_ms));
            card.push(trend(id, e.start_ms, est, &extras.series));
            card.push(details(id, est, age));
        }
    }
    card.push(notes_panel(id, &extras.notes));
    markup!(&mut card, "</section>\n");
    card
}

/// The tank, what it holds, when the leak started and the parameters.
fn event_head(e: &EventStatus, extras: &EventExtras, now_ms: i64) -> Html {
    let id = e.event;
    let what: Vec<&str> = [extras.description.as_str(), extras.substance.as_str()]
        .into_iter()
        .filter(|t| !t.is_empty())
        .collect();
    let what = if what.is_empty() {
        Html::new()
    } else {
        markup!(
            r#" <span class="what">{what}</span>"#,
            what = what.join(" · ")
        )
    };
    markup!(
        r#"<header class="event-head">
<h2><span data-field="tank" data-event="{id}">{tank}</span>{what}</h2>
<p class="meta">Event <span data-field="event" data-event="{id}">{id}</span> · leaking since <time data-field="since" data-event="{id}">{since}</time> ({ago} ago) · flagged by {source} · revision {revision}</p>
<p class="params">Parameters: {params}</p>
</header>
"#,
        id = id,
        tank = e.tank,
        what = what,
        since = e.start,
        ago = span(now_ms - e.start_ms),
        source = e.source,
        revision = e.revision,
        params = e.params_text,
    )
}

/// The three headline figures: released so far, flowing now, forecast.
fn figures(id: i64, est: &EstimateView, now_ms: i64) -> Html {
    let mut out = markup!(r#"<div class="figures">"#);
    out.push(released(id, est));
    out.push(flowing(id, est));
    out.push(forecast(id, est, now_ms));
    markup!(&mut out, "\n</div>\n");
    out
}

/// Released so far: mass, volumes, the band and what makes it.
fn released(id: i64, est: &EstimateView) -> Html {
    let rho = est.density_kg_m3;
    let vol = |kg: f64| Volumes::of(kg, rho);
    let (best, low, high) = (
        vol(est.released_best_kg),
        vol(est.released_low_kg),
        vol(est.released_high_kg),
    );
    let g = report::grouped;
    let m3 = report::significant;
    markup!(
        r#"
<div class="figure released">
<h3>Released so far</h3>
<p class="big">{kg}</p>
<p class="volume">{vm3} · {vl}</p>
<p class="band">band {lo} – {hi}</p>
<p class="band">{lom3} – {him3} m³ · {lol} – {hil} L</p>
<p class="fine" data-field="band-causes" data-event="{id}">band from {causes}</p>
<p class="fine">= {gal} US gal = {bbl} bbl at {rho} kg/m³</p>
</div>"#,
        kg = figure("released-best-kg", id, &g(est.released_best_kg), "kg"),
        vm3 = figure("released-best-m3", id, &m3(best.m3), "m³"),
        vl = figure("released-best-l", id, &g(best.litres), "L"),
        lo = figure("released-low-kg", id, &g(est.released_low_kg), ""),
        hi = figure("released-high-kg", id, &g(est.released_high_kg), "kg"),
        lom3 = m3(low.m3),
        him3 = m3(high.m3),
        lol = g(low.litres),
        hil = g(high.litres),
        id = id,
        causes = est.words.band_text,
        gal = g(best.us_gallons),
        bbl = g(best.barrels),
        rho = g(rho),
    )
}

/// Flowing now: the rate, as volumes too, its band, the phase and level.
fn flowing(id: i64, est: &EstimateView) -> Html {
    let (rate, rate_unit) = rate_parts(est.rate_best_kg_s);
    let (rate_lo, rate_lo_unit) = rate_parts(est.rate_low_kg_s);
    let (rate_hi, rate_hi_unit) = rate_parts(est.rate_high_kg_s);
    let rate_m3_h = est.rate_best_kg_s / est.density_kg_m3 * 3600.0;
    markup!(
        r#"
<div class="figure rate">
<h3>Flowing now</h3>
<p class="big">{rate}</p>
<p class="volume">{m3h} m³/h · {lmin} L/min</p>
<p class="band">band {lo} – {hi}</p>
<p class="fine">{phase} phase · at level {level:.3} m</p>
</div>"#,
        rate = figure_with_unit("rate-best", id, &rate, rate_unit),
        m3h = report::significant(rate_m3_h),
        lmin = report::grouped(rate_m3_h * 1000.0 / 60.0),
        lo = figure_with_unit("rate-low", id, &rate_lo, rate_lo_unit),
        hi = figure_with_unit("rate-high", id, &rate_hi, rate_hi_unit),
        phase = words::phase_text(est),
        level = est.level_m,
    )
}

/// The forecast: when the flow stops and the total then, or why there is
/// none.
fn forecast(id: i64, est: &EstimateView, now_ms: i64) -> Html {
    let g = report::grouped;
    let body = match &est.forecast {
        Some(f) if f.stops_after_s.is_finite() => {
            let stop_ms = f.made_at_ms + (f.stops_after_s * 1000.0) as i64;
            let total = Volumes::of(f.total_at_stop_kg, est.density_kg_m3);
            markup!(
                r#"
<p class="mid">flow stops at <time data-field="forecast-stop-at" data-event="{id}">{at}</time></p>
<p>in <span data-field="forecast-stop-in" data-event="{id}">{inn}</span>, at level {lvl:.2} m</p>
<p class="mid">total then {total}</p>
<p class="volume">{tm3} m³ · {tl} L</p>
<p class="fine">in 15 min: {q} · in 1 h: {h}</p>"#,
                id = id,
                at = report::utc(stop_ms),
                inn = span(stop_ms - now_ms),
                lvl = f.stop_level_m,
                total = figure("forecast-total-kg", id, &g(f.total_at_stop_kg), "kg"),
                tm3 = report::significant(total.m3),
                tl = g(total.litres),
                q = figure("forecast-15min-kg", id, &g(f.total_in_15_min_kg), "kg"),
                h = figure("forecast-1h-kg", id, &g(f.total_in_1_h_kg), "kg"),
            )
        }
        Some(_) => markup!(r#"<p class="mid">the flow is not forecast to stop</p>"#),
        None => markup!(
            r#"
<p data-field="forecast-none" data-event="{id}">No forecast yet: it needs a hole size or a fitted hole ({fit}).</p>"#,
            id = id,
            fit = est.words.fit_status
        ),
    };
    markup!(
        r#"
<div class="figure forecast">
<h3>Forecast</h3>{body}
</div>"#,
        body = body
    )
}

/// One figure: `<span data-field=.. data-event=..>number</span>` and its unit.
fn figure(field: &str, event: i64, number: &str, unit: &str) -> Html {
    let mut out = markup!(
        r#"<span class="num" data-field="{field}" data-event="{event}">{number}</span>"#,
        field = field,
        event = event,
        number = number
    );
    if !unit.is_empty() {
        markup!(&mut out, r#"<span class="unit">{unit}</span>"#, unit = unit);
    }
    out
}

/// A figure whose unit may change with its size (kg/s or kg/h): the unit
/// is in `data-unit` too, for scripts.
fn figure_with_unit(field: &str, event: i64, number: &str, unit: &str) -> Html {
    markup!(
        r#"<span class="num" data-field="{field}" data-event="{event}" data-unit="{unit}">{number}</span><span class="unit">{unit}</span>"#,
        field = field,
        event = event,
        unit = unit,
        number = number
    )
}

/// The chart, and the reportable quantities beside it.
fn trend(id: i64, start_ms: i64, est: &EstimateView, series: &[Point]) -> Html {
    let thresholds: Vec<f64> = est.crossings.iter().map(|c| c.quantity_kg).collect();
    let chart = chart::svg(id, start_ms, series, &thresholds).unwrap_or_else(|| {
        markup!(r#"<p class="fine">The chart appears with the second estimate.</p>"#)
    });
    let mut out = markup!(
        r#"<div class="trend">
<figure class="plot">{chart}<figcaption><span class="key best"></span> best estimate <span class="key band"></span> low to high band <span class="key threshold"></span> reportable quantity</figcaption></figure>
<div class="panel reportable">
<h3>Reportable quantities</h3>
"#,
        chart = chart
    );
    if est.crossings.is_empty() {
        markup!(
            &mut out,
            "<p class=\"fine\">None configured for this tank.</p>\n"
        );
    } else {
        markup!(&mut out, "<ul>\n");
        out.extend(
            est.crossings
                .iter()
                .map(|c| crossing(id, c, est.released_best_kg)),
        );
        markup!(&mut out, "</ul>\n");
    }
    markup!(&mut out, "</div>\n</div>\n");
    out
}

/// One reportable quantity: when the best estimate crossed it, or when
/// the band's high end did, or how far off it is.
fn crossing(id: i64, c: &crate::estimate::Crossing, released_kg: f64) -> Html {
    let q = chart::whole(c.quantity_kg);
    if c.at_ms.is_none() && c.high_at_ms.is_none() {
        return markup!(
            r#"<li class="pending" data-field="reportable" data-event="{id}" data-quantity-kg="{qty}"><strong>{q} kg</strong> not reached ({left} kg to go)</li>
"#,
            id = id,
            qty = c.quantity_kg,
            q = q,
            left = report::grouped((c.quantity_kg - released_kg).max(0.0))
        );
    }
    let crossed = c.at_ms.map_or(Html::new(), |at| {
        markup!(r#" data-crossed-at-ms="{at}""#, at = at)
    });
    let high = c.high_at_ms.map_or(Html::new(), |at| {
        markup!(r#" data-high-at-ms="{at}""#, at = at)
    });
    markup!(
        r#"<li class="crossed" data-field="reportable" data-event="{id}" data-quantity-kg="{qty}"{crossed}{high}><strong>{q} kg</strong> {text}</li>
"#,
        id = id,
        qty = c.quantity_kg,
        crossed = crossed,
        high = high,
        q = q,
        text = words::crossing_text(c)
    )
}

/// How the figure is made, after any warning the operator must see, and
/// the data quality.
fn details(id: i64, est: &EstimateView, age_ms: i64) -> Html {
    let mut out = markup!("<div class=\"details\">\n");
    out.push(warnings(id, est));
    out.push(basis(id, est));
    out.push(quality(id, est, age_ms));
    markup!(&mut out, "</div>\n");
    out
}

/// The given hole's disagreement with the level first, then the other
/// warnings.
fn warnings(id: i64, est: &EstimateView) -> Html {
    let mut out = est.consistency.as_ref().map_or(Html::new(), |warning| {
        markup!(
            r#"<p class="caution" data-field="consistency" data-event="{id}"><strong>Check the hole size:</strong> {warning}</p>
"#,
            id = id,
            warning = warning
        )
    });
    let others: Vec<&String> = est
        .warnings
        .iter()
        .zip(&est.words.warnings_text)
        .filter(|(w, _)| *w != crate::estimate::Warning::HoleInconsistent)
        .map(|(_, text)| text)
        .collect();
    if !others.is_empty() {
        markup!(
            &mut out,
            r#"<ul class="warnings" data-field="warnings" data-event="{id}">
"#,
            id = id
        );
        out.extend(
            others
                .into_iter()
                .map(|text| markup!("<li>{text}</li>\n", text = text)),
        );
        markup!(&mut out, "</ul>\n");
    }
    out
}

/// How it is estimated: the method and why, the level balance, the hole.
fn basis(id: i64, est: &EstimateView) -> Html {
    let g = report::grouped;
    let mut out = markup!(
        r#"<div class="panel basis">
<h3>How it is estimated</h3>
<dl>
<dt>Best from</dt><dd data-field="method" data-event="{id}">{method}</dd>
<dt>Why</dt><dd>{reason}</dd>
"#,
        id = id,
        method = words::method_name(est.method),
        reason = est.words.method_reason,
    );
    if let Some(inv) = est.inventory_kg {
        markup!(
            &mut out,
            "<dt>Level balance</dt><dd>{inv} ± {band} kg lost from the tank</dd>\n",
            inv = g(inv),
            band = g(est.band.inventory_kg)
        );
    }
    if let Some(text) = &est.words.implied_cd_text {
        markup!(
            &mut out,
            "<dt>Implied Cd</dt><dd>{text}</dd>\n",
            text = text
        );
    }
    markup!(
        &mut out,
        r#"<dt>Fitted hole</dt><dd>{hole}</dd>
<dt>Above the hole</dt><dd>{rem} kg still in the tank</dd>
</dl>
</div>
"#,
        hole = est.words.fit_status,
        rem = g(est.remaining_above_hole_kg),
    );
    out
}

/// Data quality: the last sample, samples used and skipped, gaps.
fn quality(id: i64, est: &EstimateView, age_ms: i64) -> Html {
    let q = &est.quality;
    let bridged = if q.gaps_bridged == 0 {
        "in the data".to_owned()
    } else {
        format!(
            "bridged by the model ({} kg, longest {:.0} s)",
            report::grouped(q.bridged_kg),
            q.longest_gap_s
        )
    };
    markup!(
        r#"<div class="panel quality">
<h3>Data quality</h3>
<dl>
<dt>Last sample</dt><dd><time data-field="estimate-at" data-event="{id}">{last}</time> ({age} ago)</dd>
<dt>Samples</dt><dd><span data-field="samples-used" data-event="{id}">{used}</span> used, <span data-field="samples-skipped" data-event="{id}">{skipped}</span> skipped as bad</dd>
<dt>Pressure held</dt><dd>{held} samples on the last good pressure</dd>
<dt>Gaps</dt><dd><span data-field="gaps-bridged" data-event="{id}">{gaps}</span> {bridged}</dd>
</dl>
</div>
"#,
        id = id,
        last = report::utc(est.at_ms),
        age = span(age_ms),
        used = q.samples_used,
        skipped = q.samples_skipped,
        held = q.pressure_held,
        gaps = q.gaps_bridged,
        bridged = bridged,
    )
}

/// The operators' notes, oldest first; nothing when there are none.
fn notes_panel(id: i64, notes: &[Note]) -> Html {
    if notes.is_empty() {
        return Html::new();
    }
    let mut out = markup!("<div class=\"panel notes\">\n<h3>Operator notes</h3>\n<ol>\n");
    out.extend(notes.iter().map(|n| {
        markup!(
            r#"<li data-field="note" data-event="{id}"><time>{at}</time> <span class="who">{who}{doing}</span> {text}</li>
"#,
            id = id,
            at = report::utc(n.at_ms),
            who = n.who,
            doing = match n.kind.as_str() {
                "open" => ", opening the event:",
                "revise" => ", revising it:",
                "close" => ", closing it:",
                _ => ":",
            },
            text = n.text
        )
    }));
    markup!(&mut out, "</ol>\n</div>\n");
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rates_switch_to_kg_per_hour_below_one_kg_per_second() {
        assert_eq!(rate_parts(5.614), ("5.61".to_owned(), "kg/s"));
        assert_eq!(rate_parts(0.1), ("360".to_owned(), "kg/h"));
        assert_eq!(rate_parts(0.0), ("0".to_owned(), "kg/s"));
    }

    #[test]
    fn notes_come_from_done_actions_of_every_kind() {
        let action = |kind: &str, state: &str, request: serde_json::Value| ActionRow {
            id: 1,
            requested_at_ms: 1_000,
            os_user: "op".into(),
            host: "cr1".into(),
            kind: kind.into(),
            event: Some(1),
            request,
            state: state.into(),
            handled_at_ms: Some(2_000),
            outcome: None,
        };
        let notes = notes(&[
            action(
                "open",
                "done",
                serde_json::json!({"note": "seen by the bund"}),
            ),
            action(
                "note",
                "done",
                serde_json::json!({"text": "foam on its way"}),
            ),
            action(
                "note",
                "refused",
                serde_json::json!({"text": "never applied"}),
            ),
            action("close", "done", serde_json::json!({"note": null})),
        ]);
        let texts: Vec<&str> = notes.iter().map(|n| n.text.as_str()).collect();
        assert_eq!(texts, ["seen by the bund", "foam on its way"]);
        assert_eq!(notes[0].who, "op@cr1");
    }
}
