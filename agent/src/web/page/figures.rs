//! The four headline tiles of an estimate, the first thing on a card and
//! all above the fold on a phone: released so far (with its band), flowing
//! now, the forecast, and the reportable quantities. Each number is a
//! `<span>` with `data-field` and `data-event` for scripts; what is not
//! needed at a glance (volumes of the band, what makes the band, the phase)
//! is in `details.rs`.
//!
//! Every quantity is said by the site's `Presentation` (its units, one unit
//! a figure: a rate is always per second) and every time in its zone.
//!
//! Left out: how the figures are made (`details.rs`) and the chart
//! (`trend.rs`).

use super::span;
use crate::estimate::Crossing;
use crate::model::{Density, Mass, MassRate};
use crate::report::Presentation;
use crate::status::EstimateView;
use crate::web::html::{Html, markup};

/// A quantity as the presentation says it (`1,230 kg`), cut into its
/// number and its unit, so that the page can set the unit smaller.
fn parts(text: &str) -> (&str, &str) {
    text.split_once(' ').unwrap_or((text, ""))
}

/// The four headline tiles: released so far, flowing now, the forecast,
/// and the reportable quantities.
pub(crate) fn figures(id: i64, est: &EstimateView, people: &Presentation, now_ms: i64) -> Html {
    let mut out = markup!(r#"<div class="figures">"#);
    out.push(released(id, est, people));
    out.push(flowing(id, est, people));
    out.push(forecast(id, est, people, now_ms));
    out.push(reportable(id, est, people, now_ms));
    markup!(&mut out, "\n</div>\n");
    out
}

/// Released so far: the best total, its band, and its volume.
fn released(id: i64, est: &EstimateView, people: &Presentation) -> Html {
    let mass = |kg: f64| people.mass(Mass::kilograms(kg));
    let rho = Density::kg_per_cubic_metre(est.density_kg_m3);
    markup!(
        r#"
<div class="figure released">
<h3>Released so far</h3>
<p class="big">{best}</p>
<p class="band">band {low} – {high}</p>
<p class="volume" data-field="released-best-volume" data-event="{id}">{volume}</p>
</div>"#,
        best = figure("released-best-kg", id, &mass(est.released_best_kg), true),
        low = figure("released-low-kg", id, &mass(est.released_low_kg), false),
        high = figure("released-high-kg", id, &mass(est.released_high_kg), true),
        volume = people.volume(Mass::kilograms(est.released_best_kg), rho),
        id = id,
    )
}

/// Flowing now: the rate, its band, and the volume it makes in an hour.
fn flowing(id: i64, est: &EstimateView, people: &Presentation) -> Html {
    let rate = |kg_s: f64| people.rate(MassRate::kg_per_second(kg_s));
    let rho = Density::kg_per_cubic_metre(est.density_kg_m3);
    markup!(
        r#"
<div class="figure rate">
<h3>Flowing now</h3>
<p class="big">{best}</p>
<p class="band">band {low} – {high}</p>
<p class="volume">{hourly} an hour</p>
</div>"#,
        best = figure("rate-best", id, &rate(est.rate_best_kg_s), true),
        low = figure("rate-low", id, &rate(est.rate_low_kg_s), false),
        high = figure("rate-high", id, &rate(est.rate_high_kg_s), true),
        hourly = people.volume(Mass::kilograms(est.rate_best_kg_s * 3600.0), rho),
    )
}

/// The forecast: the total when the flow stops, when that is, and the
/// totals at two times ahead; or why there is none.
fn forecast(id: i64, est: &EstimateView, people: &Presentation, now_ms: i64) -> Html {
    let mass = |kg: f64| people.mass(Mass::kilograms(kg));
    let at = |ms: i64| people.clock_near(ms, now_ms, "%H:%M %Z");
    let body = match &est.forecast {
        Some(f) if f.stops_after_s.is_finite() => {
            let stop_ms = f.made_at_ms + (f.stops_after_s * 1000.0) as i64;
            markup!(
                r#"
<p class="big">{total}</p>
<p class="band">total when the flow stops in <span data-field="forecast-stop-in" data-event="{id}">{inn}</span>, at <time data-field="forecast-stop-at" data-event="{id}" datetime="{machine}">{stop}</time></p>
<p class="fine">total by {at15}: {q} · by {at60}: {h}</p>"#,
                id = id,
                total = figure("forecast-total-kg", id, &mass(f.total_at_stop_kg), true),
                inn = span(stop_ms - now_ms),
                machine = crate::report::rfc3339(stop_ms),
                stop = people.clock_near(stop_ms, now_ms, "%H:%M:%S %Z"),
                at15 = at(f.made_at_ms + 15 * 60_000),
                q = figure("forecast-15min-kg", id, &mass(f.total_in_15_min_kg), true),
                at60 = at(f.made_at_ms + 60 * 60_000),
                h = figure("forecast-1h-kg", id, &mass(f.total_in_1_h_kg), true),
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

/// The reportable quantities: each crossed (by the best estimate, or by
/// the band's high end), or how far off.
fn reportable(id: i64, est: &EstimateView, people: &Presentation, now_ms: i64) -> Html {
    let mut out = markup!(
        r#"
<div class="figure reportable">
<h3>Reportable quantities</h3>
"#
    );
    if est.crossings.is_empty() {
        markup!(
            &mut out,
            r#"<p class="fine">None configured for this tank.</p>"#
        );
    } else {
        markup!(&mut out, "<ul>\n");
        out.extend(
            est.crossings
                .iter()
                .map(|c| crossing(id, c, est.released_best_kg, people, now_ms)),
        );
        markup!(&mut out, "</ul>");
    }
    markup!(&mut out, "\n</div>");
    out
}

/// One reportable quantity: when the best estimate crossed it, or when the
/// band's high end did, or how far off it is. Times as a clock in the
/// site's zone (the full time is in the element's `datetime`).
fn crossing(id: i64, c: &Crossing, released_kg: f64, people: &Presentation, now_ms: i64) -> Html {
    let q = people.mass(Mass::kilograms(c.quantity_kg));
    let clock = |ms: i64| {
        markup!(
            r#"<time datetime="{machine}">{clock}</time>"#,
            machine = crate::report::rfc3339(ms),
            clock = people.clock_near(ms, now_ms, "%H:%M:%S %Z")
        )
    };
    let crossed = c.at_ms.map_or(Html::new(), |at| {
        markup!(r#" data-crossed-at-ms="{at}""#, at = at)
    });
    let high = c.high_at_ms.map_or(Html::new(), |at| {
        markup!(r#" data-high-at-ms="{at}""#, at = at)
    });
    let (class, text) = match (c.at_ms, c.high_at_ms) {
        // The band's earlier crossing decides notification (README,
        // "Notification"): said beside the best estimate's, never hidden.
        (Some(best), Some(high)) if high < best => (
            "crossed",
            markup!(
                "reached at {at} (best estimate); may have been reached from {high} (the band's high end)",
                at = clock(best),
                high = clock(high)
            ),
        ),
        (Some(best), _) => ("crossed", markup!("reached at {at}", at = clock(best))),
        (None, Some(high)) => (
            "crossed",
            markup!(
                "may have been reached at {at} (the band's high end; the best estimate is below)",
                at = clock(high)
            ),
        ),
        (None, None) => (
            "pending",
            markup!(
                "not reached: {left} to go",
                left = people.mass(Mass::kilograms((c.quantity_kg - released_kg).max(0.0)))
            ),
        ),
    };
    markup!(
        r#"<li class="{class}" data-field="reportable" data-event="{id}" data-quantity-kg="{qty}"{crossed}{high}><strong>{q}</strong> {text}</li>
"#,
        class = class,
        id = id,
        qty = c.quantity_kg,
        crossed = crossed,
        high = high,
        q = q,
        text = text
    )
}

/// One figure: `<span data-field=.. data-event=.. data-unit=..>number</span>`
/// from a quantity the presentation said, with its unit after it when
/// `with_unit` (a band's low end leaves it to the high end's).
fn figure(field: &str, event: i64, quantity: &str, with_unit: bool) -> Html {
    let (number, unit) = parts(quantity);
    let mut out = markup!(
        r#"<span class="num" data-field="{field}" data-event="{event}" data-unit="{unit}">{number}</span>"#,
        field = field,
        event = event,
        unit = unit,
        number = number
    );
    if with_unit && !unit.is_empty() {
        markup!(&mut out, r#"<span class="unit">{unit}</span>"#, unit = unit);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Units;

    #[test]
    fn figures_take_the_site_units_and_keep_their_unit_apart() {
        let metric = Presentation::default();
        let us = Presentation {
            units: Units::UsCustomary,
            ..Presentation::default()
        };
        let kg = metric.mass(Mass::kilograms(1234.6));
        assert_eq!(parts(&kg), ("1,230", "kg"));
        let lb = us.rate(MassRate::kg_per_second(0.1));
        assert_eq!(parts(&lb), ("0.220", "lb/s"));
        let html = figure("rate-best", 3, &lb, true).into_string();
        assert!(html.contains(r#"data-unit="lb/s">0.220</span>"#), "{html}");
        assert!(
            html.ends_with(r#"<span class="unit">lb/s</span>"#),
            "{html}"
        );
    }
}
