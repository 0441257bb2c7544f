//! The cumulative-release series of an event: thinned for the wire, and
//! drawn as a small inline SVG for the page.
//!
//! The SVG is written by hand rather than with plotters: it is a band, a
//! line, two axes and a few dashed thresholds, and hand-written markup
//! takes its colours from the page's style sheet (classes, not inline
//! styles, which the page's content security policy forbids). It is built
//! as [`Html`] like the page around it, though it holds only numbers and
//! our own words.
//!
//! Left out: interaction. The chart is a picture; the figures beside it
//! are the numbers to read.

use crate::report;
use crate::store::EventRow;
use crate::web::html::{Html, markup};
use serde::Serialize;

/// The most points a series carries: several per pixel of a phone-sized
/// chart, and a few kilobytes of JSON however long the event runs.
pub const MAX_POINTS: usize = 500;

/// One point of the cumulative release, kg since the event start.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Point {
    pub at_ms: i64,
    pub best_kg: f64,
    pub low_kg: f64,
    pub high_kg: f64,
}

/// The `/api/events/{id}/series` document.
#[derive(Debug, Clone, Serialize)]
pub struct Series {
    pub event: i64,
    pub tank: String,
    pub revision: i64,
    pub start_ms: i64,
    /// How many estimates the revision has; `points` holds at most
    /// [`MAX_POINTS`] of them.
    pub estimates: usize,
    pub points: Vec<Point>,
}

impl Series {
    pub fn new(row: &EventRow, all: Vec<Point>) -> Self {
        Self {
            event: row.id,
            tank: row.tank.clone(),
            revision: row.revision,
            start_ms: row.start_ms,
            estimates: all.len(),
            points: thin(all, MAX_POINTS),
        }
    }
}

pub fn points(series: &[(i64, f64, f64, f64)]) -> Vec<Point> {
    series
        .iter()
        .map(|&(at_ms, best_kg, low_kg, high_kg)| Point {
            at_ms,
            best_kg,
            low_kg,
            high_kg,
        })
        .collect()
}

/// At most `max` points (at least 2) of a time-ordered series: the first,
/// the last, and the last point of each of `max - 2` equal slices of time
/// between them.
///
/// Picking by time rather than every n-th point keeps a gap in the data a
/// gap on the chart. The last point of a slice is exact for a cumulative
/// series, which only rises: nothing between two kept points lies above
/// the later one.
pub fn thin(points: Vec<Point>, max: usize) -> Vec<Point> {
    let max = max.max(2);
    if points.len() <= max {
        return points;
    }
    let (first, last) = (points[0], points[points.len() - 1]);
    let span = (last.at_ms - first.at_ms).max(1) as f64;
    let slices = (max - 2) as f64;
    let slice_of = |at: i64| (((at - first.at_ms) as f64 / span) * slices).floor() as i64;
    let mut out = Vec::with_capacity(max);
    out.push(first);
    let inner = &points[1..points.len() - 1];
    for (i, p) in inner.iter().enumerate() {
        let this = slice_of(p.at_ms);
        let next = inner.get(i + 1).map(|q| slice_of(q.at_ms));
        if next != Some(this) {
            out.push(*p);
        }
    }
    out.push(last);
    // Round-off at the slice edges can leave one too many; drop inner
    // points evenly until it fits.
    while out.len() > max {
        out.remove(out.len() / 2);
    }
    out
}

/// Chart size in SVG user units; the page scales it to its column.
const WIDTH: f64 = 640.0;
const HEIGHT: f64 = 250.0;
const LEFT: f64 = 70.0;
const RIGHT: f64 = 18.0;
const TOP: f64 = 16.0;
const BOTTOM: f64 = 40.0;

/// The chart of one event's cumulative release: the low–high band, the
/// best estimate, and the reportable quantities as dashed lines where they
/// fall inside (or just above) the data. `None` with fewer than 2 points.
pub fn svg(event: i64, start_ms: i64, points: &[Point], thresholds: &[f64]) -> Option<Html> {
    if points.len() < 2 {
        return None;
    }
    let end_ms = points[points.len() - 1].at_ms.max(start_ms + 1);
    let data_max = points.iter().map(|p| p.high_kg).fold(0.0, f64::max);
    // Show a threshold the release is approaching too, not only one passed.
    let shown: Vec<f64> = thresholds
        .iter()
        .copied()
        .filter(|&q| q > 0.0 && q <= (data_max * 1.5).max(1.0))
        .collect();
    let top_value = shown.iter().copied().fold(data_max, f64::max).max(1.0);
    let (y_step, y_max) = nice_axis(top_value);
    let span_s = (end_ms - start_ms) as f64 / 1000.0;
    let (x_step_s, x_unit, x_per_unit) = time_axis(span_s);

    let plot_w = WIDTH - LEFT - RIGHT;
    let plot_h = HEIGHT - TOP - BOTTOM;
    let x = |at_ms: i64| LEFT + (at_ms - start_ms) as f64 / (end_ms - start_ms) as f64 * plot_w;
    let y = |kg: f64| TOP + plot_h - (kg / y_max).clamp(0.0, 1.0) * plot_h;

    let mut s = markup!(
        r#"<svg class="chart" viewBox="0 0 {w} {h}" role="img" aria-labelledby="chart-title-{event}" data-event="{event}" data-points="{n}" xmlns="http://www.w3.org/2000/svg"><title id="chart-title-{event}">Released since the leak started, kg: best estimate with the low to high band</title>"#,
        w = WIDTH,
        h = HEIGHT,
        event = event,
        n = points.len()
    );
    // Grid and y labels.
    let mut v = 0.0;
    while v <= y_max * (1.0 + 1e-9) {
        let yy = y(v);
        markup!(
            &mut s,
            r#"<line class="grid" x1="{x1}" x2="{x2}" y1="{yy:.1}" y2="{yy:.1}"/><text class="tick" x="{tx}" y="{ty:.1}" text-anchor="end">{label}</text>"#,
            x1 = LEFT,
            x2 = WIDTH - RIGHT,
            yy = yy,
            tx = LEFT - 8.0,
            ty = yy + 4.0,
            label = whole(v)
        );
        v += y_step;
    }
    // x labels.
    let mut t = 0.0;
    while t <= span_s + 1e-9 {
        let xx = LEFT + t / span_s.max(1e-9) * plot_w;
        markup!(
            &mut s,
            r#"<line class="tickmark" x1="{xx:.1}" x2="{xx:.1}" y1="{y1}" y2="{y2}"/><text class="tick" x="{xx:.1}" y="{ty}" text-anchor="middle">{label}</text>"#,
            xx = xx,
            y1 = TOP + plot_h,
            y2 = TOP + plot_h + 5.0,
            ty = TOP + plot_h + 19.0,
            label = trim_number(t / x_per_unit)
        );
        t += x_step_s;
    }
    markup!(
        &mut s,
        r#"<text class="axis x" x="{ax}" y="{ay}" text-anchor="middle">{x_unit} since the leak started</text><text class="axis y" x="14" y="{ky}" text-anchor="middle" transform="rotate(-90 14 {ky})">kg released</text>"#,
        ax = LEFT + plot_w / 2.0,
        ay = HEIGHT - 4.0,
        x_unit = x_unit,
        ky = TOP + plot_h / 2.0,
    );
    // Band: along the high values, back along the low ones.
    markup!(&mut s, r#"<polygon class="band" points=""#);
    for p in points {
        markup!(&mut s, "{x:.1},{y:.1} ", x = x(p.at_ms), y = y(p.high_kg));
    }
    for p in points.iter().rev() {
        markup!(&mut s, "{x:.1},{y:.1} ", x = x(p.at_ms), y = y(p.low_kg));
    }
    markup!(&mut s, r#""/>"#);
    for q in &shown {
        let yy = y(*q);
        markup!(
            &mut s,
            r#"<line class="threshold" x1="{x1}" x2="{x2}" y1="{yy:.1}" y2="{yy:.1}"/><text class="threshold-label" x="{tx}" y="{ty:.1}" text-anchor="start">reportable {q} kg</text>"#,
            x1 = LEFT,
            x2 = WIDTH - RIGHT,
            yy = yy,
            tx = LEFT + 6.0,
            ty = yy - 5.0,
            q = whole(*q)
        );
    }
    markup!(&mut s, r#"<polyline class="best" points=""#);
    for p in points {
        markup!(&mut s, "{x:.1},{y:.1} ", x = x(p.at_ms), y = y(p.best_kg));
    }
    markup!(&mut s, r#""/>"#);
    let last = points[points.len() - 1];
    markup!(
        &mut s,
        r#"<circle class="now" cx="{cx:.1}" cy="{cy:.1}" r="4"/><line class="frame" x1="{x1}" x2="{x1}" y1="{top}" y2="{yb}"/><line class="frame" x1="{x1}" x2="{xr}" y1="{yb}" y2="{yb}"/></svg>"#,
        cx = x(last.at_ms),
        cy = y(last.best_kg),
        x1 = LEFT,
        top = TOP,
        yb = TOP + plot_h,
        xr = WIDTH - RIGHT
    );
    Some(s)
}

/// A round step (1, 2 or 5 times a power of ten) giving 3 to 6 gridlines
/// up to at least `top`, and the axis maximum it leads to.
fn nice_axis(top: f64) -> (f64, f64) {
    let rough = top / 4.0;
    let power = 10f64.powf(rough.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * power)
        .find(|&s| s >= rough)
        .unwrap_or(10.0 * power);
    (step, (top / step).ceil() * step)
}

/// Tick step in seconds, the unit's name, and seconds per unit, for a time
/// span: seconds under 2 min, minutes under 3 h, hours beyond.
fn time_axis(span_s: f64) -> (f64, &'static str, f64) {
    let pick = |steps: &[f64], per: f64| {
        steps
            .iter()
            .map(|s| s * per)
            .find(|&s| span_s / s <= 6.0)
            .unwrap_or(steps[steps.len() - 1] * per)
    };
    if span_s < 120.0 {
        (pick(&[5.0, 10.0, 15.0, 20.0, 30.0], 1.0), "seconds", 1.0)
    } else if span_s < 3.0 * 3600.0 {
        (
            pick(&[1.0, 2.0, 5.0, 10.0, 15.0, 20.0, 30.0], 60.0),
            "minutes",
            60.0,
        )
    } else {
        (
            pick(&[1.0, 2.0, 3.0, 6.0, 12.0, 24.0, 48.0], 3600.0),
            "hours",
            3600.0,
        )
    }
}

/// A round quantity as people write it: 50, 2.5, 12,000 (`report::number`
/// would say 50.0, its three significant figures).
pub fn whole(x: f64) -> String {
    let text = report::number(x);
    if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.').to_owned()
    } else {
        text
    }
}

/// A tick value without trailing zeros: 5, 2.5.
fn trim_number(x: f64) -> String {
    let text = format!("{x:.2}");
    text.trim_end_matches('0').trim_end_matches('.').to_owned()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn series(n: usize, every_ms: i64) -> Vec<Point> {
        (0..n)
            .map(|i| {
                let kg = i as f64;
                Point {
                    at_ms: 1_000 + i as i64 * every_ms,
                    best_kg: kg,
                    low_kg: 0.6 * kg,
                    high_kg: 1.6 * kg,
                }
            })
            .collect()
    }

    #[test]
    fn thinning_keeps_the_ends_and_at_most_the_limit() {
        assert_eq!(thin(series(10, 1000), 500).len(), 10);
        for n in [501, 502, 777, 86_400] {
            let all = series(n, 1000);
            let thinned = thin(all.clone(), MAX_POINTS);
            assert!(thinned.len() <= MAX_POINTS, "{n}: {}", thinned.len());
            assert!(thinned.len() >= MAX_POINTS - 2, "{n}: {}", thinned.len());
            assert_eq!(thinned[0], all[0]);
            assert_eq!(thinned.last(), all.last());
            assert!(thinned.windows(2).all(|w| w[0].at_ms < w[1].at_ms));
        }
        // A gap stays a gap: 300 points, an hour of nothing, 300 points.
        let mut gappy = series(300, 1000);
        gappy.extend(series(300, 1000).into_iter().map(|mut p| {
            p.at_ms += 3_600_000;
            p
        }));
        let thinned = thin(gappy, 100);
        let big_steps = thinned
            .windows(2)
            .filter(|w| w[1].at_ms - w[0].at_ms > 1_000_000)
            .count();
        assert_eq!(big_steps, 1);
        assert!(thinned.len() <= 100);
    }

    #[test]
    fn the_chart_draws_band_line_and_thresholds() {
        let points = series(60, 1000);
        let svg = svg(7, 1_000, &points, &[50.0, 2_000.0])
            .unwrap()
            .into_string();
        assert!(svg.starts_with("<svg") && svg.ends_with("</svg>"));
        assert!(svg.contains(r#"class="band""#) && svg.contains(r#"class="best""#));
        assert!(svg.contains("reportable 50 kg"), "near the data: shown");
        assert!(!svg.contains("2000 kg"), "far above the data: left out");
        assert!(svg.contains("seconds since the leak started"));
        assert!(super::svg(7, 1_000, &points[..1], &[]).is_none());
    }

    #[test]
    fn axes_get_round_steps() {
        assert_eq!(nice_axis(93.0), (25.0, 100.0));
        assert_eq!(nice_axis(1_234.0), (500.0, 1_500.0));
        assert_eq!(time_axis(20.0).0, 5.0);
        assert_eq!(time_axis(600.0), (120.0, "minutes", 60.0));
        assert_eq!(time_axis(10.0 * 3600.0), (7_200.0, "hours", 3600.0));
        assert_eq!(trim_number(2.5), "2.5");
        assert_eq!(trim_number(10.0), "10");
        assert_eq!(
            (whole(50.0), whole(2.5), whole(12_000.0)),
            ("50".into(), "2.5".into(), "12,000".into())
        );
    }
}
