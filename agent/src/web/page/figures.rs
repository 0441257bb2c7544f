//! The three headline figures of an estimate: released so far (mass,
//! volumes, the band and what makes it), flowing now (the rate, its band,
//! the phase) and the forecast (when the flow stops, the total then). Each
//! number is a `<span>` with `data-field` and `data-event` for scripts.
//!
//! Left out: how the figures are made (`details.rs`) and the chart
//! (`trend.rs`).

use super::span;
use crate::report::{self, estimate as words};
use crate::status::{EstimateView, Volumes};
use crate::web::html::{Html, markup};

/// A rate as its number and unit: kg/h under 1 kg/s (where kg/s would read
/// 0.0), kg/s above, as `report::rate` does.
fn rate_parts(kg_s: f64) -> (String, &'static str) {
    if kg_s != 0.0 && kg_s.abs() < 1.0 {
        (report::number(kg_s * 3600.0), "kg/h")
    } else {
        (report::number(kg_s), "kg/s")
    }
}

/// The three headline figures: released so far, flowing now, forecast.
pub(super) fn figures(id: i64, est: &EstimateView, now_ms: i64) -> Html {
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
    let g = report::number;
    let m3 = report::number;
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
        m3h = report::number(rate_m3_h),
        lmin = report::number(rate_m3_h * 1000.0 / 60.0),
        lo = figure_with_unit("rate-low", id, &rate_lo, rate_lo_unit),
        hi = figure_with_unit("rate-high", id, &rate_hi, rate_hi_unit),
        phase = words::phase_text(est),
        level = est.level_m,
    )
}

/// The forecast: when the flow stops and the total then, or why there is
/// none.
fn forecast(id: i64, est: &EstimateView, now_ms: i64) -> Html {
    let g = report::number;
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
                tm3 = report::number(total.m3),
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rates_switch_to_kg_per_hour_below_one_kg_per_second() {
        assert_eq!(rate_parts(5.614), ("5.61".to_owned(), "kg/s"));
        assert_eq!(rate_parts(0.1), ("360".to_owned(), "kg/h"));
        assert_eq!(rate_parts(0.0), ("0".to_owned(), "kg/s"));
    }
}
