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

use crate::config::Units;
use crate::model::Mass;
use crate::plot::clock_ticks;
use crate::report::{self, Presentation, presentation::POUNDS_PER_KG};
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

/// The series document's layout version.
pub const SERIES_FORMAT: u32 = 1;

/// The `/api/events/{id}/series` document.
#[derive(Debug, Clone, Serialize)]
pub struct Series {
    /// Version of this document's layout ([`SERIES_FORMAT`]).
    pub format: u32,
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
            format: SERIES_FORMAT,
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

/// Chart size in SVG user units; the page scales it to its column. On a
/// phone the column is about 340 px, a little over half of this, so the
/// style sheet sets the labels in user units large enough to read there
/// (and the margins below leave room for them).
const WIDTH: f64 = 640.0;
const HEIGHT: f64 = 300.0;
const LEFT: f64 = 96.0;
const RIGHT: f64 = 24.0;
const TOP: f64 = 18.0;
const BOTTOM: f64 = 64.0;

/// The most time ticks: five clock times (`14:40`), or three with seconds
/// (`14:40:15`), which fit the chart's width at the labels' phone size.
const TIME_TICKS: f64 = 5.0;
const TIME_TICKS_WITH_SECONDS: f64 = 3.0;

/// The chart of one event's cumulative release: the low–high band, the
/// best estimate, and the reportable quantities as dashed lines where they
/// fall inside (or just above) the data; masses in the site's units, the
/// time axis in clock time in its zone. `None` with fewer than 2 points.
pub fn svg(
    event: i64,
    start_ms: i64,
    points: &[Point],
    thresholds: &[f64],
    people: &Presentation,
) -> Option<Html> {
    if points.len() < 2 {
        return None;
    }
    // The site's mass unit: kg, or lb.
    let per_kg = people.mass(Mass::kilograms(1.0));
    let unit = per_kg.split_once(' ').map_or("kg", |(_, u)| u).to_owned();
    let scale = match people.units {
        Units::Metric => 1.0,
        Units::UsCustomary => POUNDS_PER_KG,
    };
    let end_ms = points[points.len() - 1].at_ms.max(start_ms + 1);
    let data_max = points.iter().map(|p| p.high_kg).fold(0.0, f64::max) * scale;
    // Show a threshold the release is approaching too, not only one passed.
    let shown: Vec<f64> = thresholds
        .iter()
        .copied()
        .filter(|&q| q > 0.0 && q * scale <= (data_max * 1.5).max(1.0))
        .collect();
    let top_value = shown
        .iter()
        .map(|q| q * scale)
        .fold(data_max, f64::max)
        .max(1.0);
    let (y_step, y_max) = nice_axis(top_value);

    let plot_w = WIDTH - LEFT - RIGHT;
    let plot_h = HEIGHT - TOP - BOTTOM;
    let x = |at_ms: i64| LEFT + (at_ms - start_ms) as f64 / (end_ms - start_ms) as f64 * plot_w;
    let y = |kg: f64| TOP + plot_h - (kg * scale / y_max).clamp(0.0, 1.0) * plot_h;

    let mut s = markup!(
        r#"<svg class="chart" viewBox="0 0 {w} {h}" role="img" aria-labelledby="chart-title-{event}" data-event="{event}" data-points="{n}" xmlns="http://www.w3.org/2000/svg"><title id="chart-title-{event}">Released since the leak started, {unit}: best estimate with the low to high band</title>"#,
        w = WIDTH,
        h = HEIGHT,
        event = event,
        n = points.len(),
        unit = unit.as_str(),
    );
    // Grid and y labels.
    let mut v = 0.0;
    while v <= y_max * (1.0 + 1e-9) {
        let yy = TOP + plot_h - v / y_max * plot_h;
        markup!(
            &mut s,
            r#"<line class="grid" x1="{x1}" x2="{x2}" y1="{yy:.1}" y2="{yy:.1}"/><text class="tick y" x="{tx}" y="{ty:.1}" text-anchor="end">{label}</text>"#,
            x1 = LEFT,
            x2 = WIDTH - RIGHT,
            yy = yy,
            tx = LEFT - 8.0,
            ty = yy + 5.0,
            label = whole(v)
        );
        v += y_step;
    }
    // Time ticks: round clock times in the site's zone.
    let (step_ms, pattern) = clock_step(end_ms - start_ms);
    for at in clock_ticks(start_ms, end_ms, step_ms, people) {
        let xx = x(at);
        markup!(
            &mut s,
            r#"<line class="tickmark" x1="{xx:.1}" x2="{xx:.1}" y1="{y1}" y2="{y2}"/><text class="tick x" x="{xx:.1}" y="{ty}" text-anchor="middle" data-at-ms="{at}">{label}</text>"#,
            xx = xx,
            y1 = TOP + plot_h,
            y2 = TOP + plot_h + 6.0,
            ty = TOP + plot_h + 26.0,
            at = at,
            label = people.strftime(at, pattern)
        );
    }
    markup!(
        &mut s,
        r#"<text class="axis x" x="{ax}" y="{ay}" text-anchor="middle">time, {zone}</text><text class="axis y" x="16" y="{ky}" text-anchor="middle" transform="rotate(-90 16 {ky})">{unit} released</text>"#,
        ax = LEFT + plot_w / 2.0,
        ay = HEIGHT - 6.0,
        zone = people.zone_text(start_ms),
        ky = TOP + plot_h / 2.0,
        unit = unit.as_str(),
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
    // Each quantity its own colour and dash (classes q0 to q2, cycling), so
    // that two lines close together still read apart; each is labelled.
    for (i, q) in shown.iter().enumerate() {
        let yy = y(*q);
        let style = i % 3;
        markup!(
            &mut s,
            r#"<line class="threshold q{style}" x1="{x1}" x2="{x2}" y1="{yy:.1}" y2="{yy:.1}"/><text class="threshold-label q{style}" x="{tx}" y="{ty:.1}" text-anchor="start">reportable {q}</text>"#,
            style = style,
            x1 = LEFT,
            x2 = WIDTH - RIGHT,
            yy = yy,
            tx = LEFT + 6.0,
            ty = yy - 6.0,
            q = people.mass(Mass::kilograms(*q))
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
        r#"<circle class="now" cx="{cx:.1}" cy="{cy:.1}" r="5"/><line class="frame" x1="{x1}" x2="{x1}" y1="{top}" y2="{yb}"/><line class="frame" x1="{x1}" x2="{xr}" y1="{yb}" y2="{yb}"/></svg>"#,
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

/// The step between clock ticks for a span, ms, and their labels' pattern
/// (`crate::plot::clock_step`, the replay chart's, with this chart's
/// limits).
fn clock_step(span_ms: i64) -> (i64, &'static str) {
    crate::plot::clock_step(span_ms, TIME_TICKS, TIME_TICKS_WITH_SECONDS)
}

pub use report::presentation::whole;

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
        let people = Presentation::default();
        let svg = svg(7, 1_000, &points, &[50.0, 2_000.0], &people)
            .unwrap()
            .into_string();
        assert!(svg.starts_with("<svg") && svg.ends_with("</svg>"));
        assert!(svg.contains(r#"class="band""#) && svg.contains(r#"class="best""#));
        assert!(svg.contains("reportable 50.0 kg"), "near the data: shown");
        assert!(!svg.contains("2,000 kg"), "far above the data: left out");
        assert!(svg.contains("time, UTC"), "{svg}");
        // Two quantities near the data: two styles.
        let two = super::svg(7, 1_000, &points, &[30.0, 60.0], &people)
            .unwrap()
            .into_string();
        assert!(two.contains(r#"class="threshold q0""#) && two.contains(r#"class="threshold q1""#));
        // Masses in the site's units.
        let us = Presentation {
            units: Units::UsCustomary,
            ..Presentation::default()
        };
        let pounds = super::svg(7, 1_000, &points, &[50.0], &us)
            .unwrap()
            .into_string();
        assert!(pounds.contains("reportable 110 lb") && pounds.contains("lb released"));
        // 1 s to 60 s after the epoch, ticks every 30 s of the clock.
        for label in ["00:00:30", "00:01:00"] {
            assert!(svg.contains(&format!(">{label}</text>")), "{label}: {svg}");
        }
        assert!(super::svg(7, 1_000, &points[..1], &[], &people).is_none());
    }

    #[test]
    fn axes_get_round_steps() {
        assert_eq!(nice_axis(93.0), (25.0, 100.0));
        assert_eq!(nice_axis(1_234.0), (500.0, 1_500.0));
        assert_eq!(clock_step(20_000), (10_000, "%H:%M:%S"));
        assert_eq!(clock_step(59_000), (30_000, "%H:%M:%S"));
        assert_eq!(clock_step(600_000), (120_000, "%H:%M"));
        assert_eq!(clock_step(10 * 3_600_000), (7_200_000, "%H:%M"));
        // Ticks fall on round clock times of the site's zone: in Kolkata
        // (UTC+05:30) an hour's step ticks at 05:00 local, 23:30 UTC.
        let kolkata = Presentation::new("Asia/Kolkata", Units::Metric).unwrap();
        let start = 1_796_081_400_000; // 2026-11-30T23:30:00Z, 05:00 there
        let ticks = clock_ticks(start - 600_000, start + 3 * 3_600_000, 3_600_000, &kolkata);
        assert_eq!(ticks[0], start);
        assert_eq!(kolkata.clock(ticks[1]), "06:00:00");
        assert_eq!(
            (whole(50.0), whole(2.5), whole(12_000.0)),
            ("50".into(), "2.5".into(), "12,000".into())
        );
    }
}
