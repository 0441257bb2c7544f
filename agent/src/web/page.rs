//! The responder page: every open event on one server-rendered HTML page.
//!
//! Built for a phone at a command post as much as a desk: one column that
//! widens into a grid, the figures large and each with its unit, the
//! caution at the top. Every figure carries `data-field` and `data-event`
//! attributes so that tests (and anyone scripting against the page) can
//! find it without scraping the layout.
//!
//! Every piece of text from the database or the config (tank ids,
//! descriptions, operator notes, reasons) goes through [`escape`]; the page
//! builds no markup from data any other way.
//!
//! Left out: client-side rendering. The refresh script only fetches this
//! page again and swaps the fresh `<main>` in; nothing is computed in the
//! browser.

use crate::model::TimeSpan;
use crate::report::{self, estimate as words};
use crate::status::{EventStatus, StatusDocument, Volumes};
use crate::store::ActionRow;
use crate::store::health::HealthSnapshot;
use crate::web::chart::{self, Point};
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

/// Text made safe for HTML content and quoted attribute values.
pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
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

/// One figure: `<span data-field=.. data-event=..>number</span>` and its unit.
fn figure(field: &str, event: i64, number: &str, unit: &str) -> String {
    let mut out = format!(
        r#"<span class="num" data-field="{field}" data-event="{event}">{}</span>"#,
        escape(number)
    );
    if !unit.is_empty() {
        let _ = write!(out, r#"<span class="unit">{}</span>"#, escape(unit));
    }
    out
}

/// Renders the page.
pub fn render(data: &PageData) -> String {
    let doc = &data.doc;
    let open = doc.events.len();
    let mut s = String::with_capacity(16 * 1024);
    let title = match open {
        0 => "No open leaks".to_owned(),
        1 => "1 open leak".to_owned(),
        n => format!("{n} open leaks"),
    };
    let _ = write!(
        s,
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
        site = escape(&data.site),
    );
    let _ = write!(
        s,
        r#"<main id="live" data-generated-at-ms="{ms}">
<p class="stamp">Figures as of <time data-field="generated-at">{at}</time> · the page refreshes every 5 s</p>
<aside class="caution" role="note"><strong>Caution</strong> {caution}</aside>
"#,
        ms = doc.generated_at_ms,
        at = escape(&doc.generated_at),
        caution = escape(doc.caution.strip_prefix("CAUTION: ").unwrap_or(doc.caution)),
    );
    if let Some((since, why)) = data.store.failing {
        let h = &data.store;
        let mut text = format!(
            "The database has taken none of the agent's writes since {}: {}. {} poll cycles ({} samples) wait in the agent's memory and will be stored when it does; the figures below stop at that time.",
            report::utc(since),
            why.describe(),
            h.held_cycles,
            h.held_samples
        );
        if h.dropped_samples > 0 {
            let _ = write!(
                text,
                " To bound memory, {} samples of tanks with no open event were given up; every event sample is kept.",
                h.dropped_samples
            );
        }
        let _ = writeln!(
            s,
            r#"<p class="alarm" role="alert" data-field="store">{}</p>"#,
            escape(&text)
        );
    } else if !doc.daemon_running {
        // (While writes fail the heartbeat is stale too, but this page is
        // served by the daemon itself, so the message above is the true one.)
        let _ = writeln!(
            s,
            r#"<p class="alarm" role="alert">The agent's daemon is not running (last seen {}); these figures are not being updated.</p>"#,
            escape(doc.daemon_last_seen.as_deref().unwrap_or("never"))
        );
    }
    let _ = writeln!(
        s,
        r#"<p class="summary" data-field="open-events">{}</p>"#,
        match open {
            0 => "No open leak events. Events appear here as soon as an operator flags a leak (`leaktally leak open`) or the control system raises a tank's leak flag.".to_owned(),
            1 => "1 open leak event".to_owned(),
            n => format!("{n} open leak events, newest first"),
        }
    );
    for (e, extras) in doc.events.iter().zip(&data.events) {
        event(&mut s, e, extras, doc.generated_at_ms, data.stale_after_ms);
    }
    s.push_str("</main>\n");
    let _ = write!(
        s,
        r#"<footer class="foot">
<p>For machines: <a href="/api/status">/api/status</a> (the document of <code>leaktally status --json</code>), <code>/api/events/ID</code>, <code>/api/events/ID/series</code>, <a href="/metrics">/metrics</a>.</p>
<p>{}</p>
</footer>
</body>
</html>
"#,
        escape(doc.caution)
    );
    s
}

fn event(s: &mut String, e: &EventStatus, extras: &EventExtras, now_ms: i64, stale_after_ms: i64) {
    let id = e.event;
    let at_ms = e.estimate.as_ref().map_or(String::new(), |est| {
        format!(r#" data-estimate-at-ms="{}""#, est.at_ms)
    });
    let _ = write!(
        s,
        r#"<section class="event" id="event-{id}" data-event="{id}" data-tank="{tank}"{at_ms}>
<header class="event-head">
<h2><span data-field="tank" data-event="{id}">{tank}</span>"#,
        tank = escape(&e.tank),
    );
    let what: Vec<&str> = [extras.description.as_str(), extras.substance.as_str()]
        .into_iter()
        .filter(|t| !t.is_empty())
        .collect();
    if !what.is_empty() {
        let _ = write!(
            s,
            r#" <span class="what">{}</span>"#,
            escape(&what.join(" · "))
        );
    }
    let _ = write!(
        s,
        r#"</h2>
<p class="meta">Event <span data-field="event" data-event="{id}">{id}</span> · leaking since <time data-field="since" data-event="{id}">{since}</time> ({ago} ago) · flagged by {source} · revision {revision}</p>
<p class="params">Parameters: {params}</p>
</header>
"#,
        since = escape(&e.start),
        ago = span(now_ms - e.start_ms),
        source = escape(&e.source),
        revision = e.revision,
        params = escape(&e.params_text),
    );
    if let Some(why) = &e.tracking_error {
        let _ = writeln!(
            s,
            r#"<p class="alarm" role="alert" data-field="not-tracked" data-event="{id}">Not tracked: {}. These figures are not being updated.</p>"#,
            escape(why)
        );
    }
    let Some(est) = &e.estimate else {
        let _ = writeln!(
            s,
            r#"<p class="waiting" data-field="no-estimate" data-event="{id}">No usable sample yet: the first figures appear with the tank's next good level reading.</p>"#
        );
        notes_block(s, id, &extras.notes);
        s.push_str("</section>\n");
        return;
    };
    let age = now_ms - est.at_ms;
    if age > stale_after_ms {
        let _ = writeln!(
            s,
            r#"<p class="alarm" role="alert" data-field="stale" data-event="{id}">No new sample for {}: these figures are from {} and are not current. Check the link to the tank's device.</p>"#,
            span(age),
            escape(&report::utc(est.at_ms))
        );
    }
    let rho = est.density_kg_m3;
    let vol = |kg: f64| Volumes::of(kg, rho);
    let (best, low, high) = (
        vol(est.released_best_kg),
        vol(est.released_low_kg),
        vol(est.released_high_kg),
    );
    let g = report::grouped;
    let m3 = report::significant;

    // The three headline figures.
    s.push_str(r#"<div class="figures">"#);
    let _ = write!(
        s,
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
        gal = g(best.us_gallons),
        bbl = g(best.barrels),
        rho = g(rho),
        causes = escape(&est.words.band_text),
    );
    let (rate, rate_unit) = rate_parts(est.rate_best_kg_s);
    let (rate_lo, rate_lo_unit) = rate_parts(est.rate_low_kg_s);
    let (rate_hi, rate_hi_unit) = rate_parts(est.rate_high_kg_s);
    let rate_m3_h = est.rate_best_kg_s / rho * 3600.0;
    let _ = write!(
        s,
        r#"
<div class="figure rate">
<h3>Flowing now</h3>
<p class="big">{rate}</p>
<p class="volume">{m3h} m³/h · {lmin} L/min</p>
<p class="band">band {lo} – {hi}</p>
<p class="fine">{phase} phase · at level {level} m</p>
</div>"#,
        rate = figure_with_unit("rate-best", id, &rate, rate_unit),
        m3h = m3(rate_m3_h),
        lmin = g(rate_m3_h * 1000.0 / 60.0),
        lo = figure_with_unit("rate-low", id, &rate_lo, rate_lo_unit),
        hi = figure_with_unit("rate-high", id, &rate_hi, rate_hi_unit),
        phase = escape(words::phase_text(est)),
        level = format_args!("{:.3}", est.level_m),
    );
    s.push_str(
        r#"
<div class="figure forecast">
<h3>Forecast</h3>"#,
    );
    match &est.forecast {
        Some(f) if f.stops_after_s.is_finite() => {
            let stop_ms = f.made_at_ms + (f.stops_after_s * 1000.0) as i64;
            let total = vol(f.total_at_stop_kg);
            let _ = write!(
                s,
                r#"
<p class="mid">flow stops at <time data-field="forecast-stop-at" data-event="{id}">{at}</time></p>
<p>in <span data-field="forecast-stop-in" data-event="{id}">{inn}</span>, at level {lvl} m</p>
<p class="mid">total then {total}</p>
<p class="volume">{tm3} m³ · {tl} L</p>
<p class="fine">in 15 min: {q} · in 1 h: {h}</p>"#,
                at = escape(&report::utc(stop_ms)),
                inn = span(stop_ms - now_ms),
                lvl = format_args!("{:.2}", f.stop_level_m),
                total = figure("forecast-total-kg", id, &g(f.total_at_stop_kg), "kg"),
                tm3 = m3(total.m3),
                tl = g(total.litres),
                q = figure("forecast-15min-kg", id, &g(f.total_in_15_min_kg), "kg"),
                h = figure("forecast-1h-kg", id, &g(f.total_in_1_h_kg), "kg"),
            );
        }
        Some(_) => s.push_str(r#"<p class="mid">the flow is not forecast to stop</p>"#),
        None => {
            let _ = write!(
                s,
                r#"
<p data-field="forecast-none" data-event="{id}">No forecast yet: it needs a hole size or a fitted hole ({}).</p>"#,
                escape(&est.words.fit_status)
            );
        }
    }
    s.push_str("\n</div>\n</div>\n");

    // The chart.
    let thresholds: Vec<f64> = est.crossings.iter().map(|c| c.quantity_kg).collect();
    s.push_str(
        r#"<div class="trend">
<figure class="plot">"#,
    );
    match chart::svg(id, e.start_ms, &extras.series, &thresholds) {
        Some(svg) => s.push_str(svg.as_str()),
        None => s.push_str(r#"<p class="fine">The chart appears with the second estimate.</p>"#),
    }
    let _ = write!(
        s,
        r#"<figcaption><span class="key best"></span> best estimate <span class="key band"></span> low to high band <span class="key threshold"></span> reportable quantity</figcaption></figure>
<div class="panel reportable">
<h3>Reportable quantities</h3>
"#
    );
    if est.crossings.is_empty() {
        s.push_str("<p class=\"fine\">None configured for this tank.</p>\n");
    } else {
        s.push_str("<ul>\n");
        for c in &est.crossings {
            let q = chart::whole(c.quantity_kg);
            let high = c
                .high_at_ms
                .map_or(String::new(), |at| format!(r#" data-high-at-ms="{at}""#));
            match (c.at_ms, c.high_at_ms) {
                (Some(at), _) => {
                    let _ = writeln!(
                        s,
                        r#"<li class="crossed" data-field="reportable" data-event="{id}" data-quantity-kg="{}" data-crossed-at-ms="{at}"{high}><strong>{q} kg</strong> {}</li>"#,
                        c.quantity_kg,
                        escape(&words::crossing_text(c))
                    );
                }
                (None, Some(_)) => {
                    let _ = writeln!(
                        s,
                        r#"<li class="crossed" data-field="reportable" data-event="{id}" data-quantity-kg="{}"{high}><strong>{q} kg</strong> {}</li>"#,
                        c.quantity_kg,
                        escape(&words::crossing_text(c))
                    );
                }
                (None, None) => {
                    let _ = writeln!(
                        s,
                        r#"<li class="pending" data-field="reportable" data-event="{id}" data-quantity-kg="{}"><strong>{q} kg</strong> not reached ({} kg to go)</li>"#,
                        c.quantity_kg,
                        g((c.quantity_kg - est.released_best_kg).max(0.0))
                    );
                }
            }
        }
        s.push_str("</ul>\n");
    }
    s.push_str("</div>\n</div>\n<div class=\"details\">\n");

    // How the figure is made, after any disagreement the operator must see.
    if let Some(warning) = &est.consistency {
        let _ = writeln!(
            s,
            r#"<p class="caution" data-field="consistency" data-event="{id}"><strong>Check the hole size:</strong> {}</p>"#,
            escape(warning)
        );
    }
    let others: Vec<&String> = est
        .warnings
        .iter()
        .zip(&est.words.warnings_text)
        .filter(|(w, _)| *w != crate::estimate::Warning::HoleInconsistent)
        .map(|(_, text)| text)
        .collect();
    if !others.is_empty() {
        let _ = writeln!(
            s,
            r#"<ul class="warnings" data-field="warnings" data-event="{id}">"#
        );
        for text in others {
            let _ = writeln!(s, "<li>{}</li>", escape(text));
        }
        s.push_str("</ul>\n");
    }
    let _ = write!(
        s,
        r#"<div class="panel basis">
<h3>How it is estimated</h3>
<dl>
<dt>Best from</dt><dd data-field="method" data-event="{id}">{method}</dd>
<dt>Why</dt><dd>{reason}</dd>
"#,
        method = escape(words::method_name(est.method)),
        reason = escape(&est.words.method_reason),
    );
    if let Some(inv) = est.inventory_kg {
        let _ = writeln!(
            s,
            "<dt>Level balance</dt><dd>{} ± {} kg lost from the tank</dd>",
            g(inv),
            g(est.band.inventory_kg)
        );
    }
    let hole = escape(&est.words.fit_status);
    if let Some(text) = &est.words.implied_cd_text {
        let _ = writeln!(s, "<dt>Implied Cd</dt><dd>{}</dd>", escape(text));
    }
    let _ = write!(
        s,
        r#"<dt>Fitted hole</dt><dd>{hole}</dd>
<dt>Above the hole</dt><dd>{rem} kg still in the tank</dd>
</dl>
</div>
"#,
        rem = g(est.remaining_above_hole_kg),
    );

    // Data quality.
    let q = &est.quality;
    let _ = write!(
        s,
        r#"<div class="panel quality">
<h3>Data quality</h3>
<dl>
<dt>Last sample</dt><dd><time data-field="estimate-at" data-event="{id}">{last}</time> ({age} ago)</dd>
<dt>Samples</dt><dd><span data-field="samples-used" data-event="{id}">{used}</span> used, <span data-field="samples-skipped" data-event="{id}">{skipped}</span> skipped as bad</dd>
<dt>Pressure held</dt><dd>{held} samples on the last good pressure</dd>
<dt>Gaps</dt><dd><span data-field="gaps-bridged" data-event="{id}">{gaps}</span> {bridged}</dd>
</dl>
</div>
</div>
"#,
        last = escape(&report::utc(est.at_ms)),
        age = span(age),
        used = q.samples_used,
        skipped = q.samples_skipped,
        held = q.pressure_held,
        gaps = q.gaps_bridged,
        bridged = if q.gaps_bridged == 0 {
            "in the data".to_owned()
        } else {
            format!(
                "bridged by the model ({} kg, longest {:.0} s)",
                g(q.bridged_kg),
                q.longest_gap_s
            )
        },
    );
    notes_block(s, id, &extras.notes);
    s.push_str("</section>\n");
}

/// A figure whose unit may change with its size (kg/s or kg/h): the unit
/// is in `data-unit` too, for scripts.
fn figure_with_unit(field: &str, event: i64, number: &str, unit: &str) -> String {
    format!(
        r#"<span class="num" data-field="{field}" data-event="{event}" data-unit="{}">{}</span><span class="unit">{}</span>"#,
        escape(unit),
        escape(number),
        escape(unit)
    )
}

fn notes_block(s: &mut String, id: i64, notes: &[Note]) {
    if notes.is_empty() {
        return;
    }
    s.push_str("<div class=\"panel notes\">\n<h3>Operator notes</h3>\n<ol>\n");
    for n in notes {
        let _ = writeln!(
            s,
            r#"<li data-field="note" data-event="{id}"><time>{}</time> <span class="who">{}{}</span> {}</li>"#,
            escape(&report::utc(n.at_ms)),
            escape(&n.who),
            match n.kind.as_str() {
                "open" => ", opening the event:",
                "revise" => ", revising it:",
                "close" => ", closing it:",
                _ => ":",
            },
            escape(&n.text)
        );
    }
    s.push_str("</ol>\n</div>\n");
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escaping_covers_markup_and_both_quotes() {
        assert_eq!(
            escape(r#"<img src=x onerror="alert('1')">&"#),
            "&lt;img src=x onerror=&quot;alert(&#39;1&#39;)&quot;&gt;&amp;"
        );
        assert_eq!(escape("FF-T12 · ü"), "FF-T12 · ü");
    }

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
