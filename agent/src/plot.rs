//! Charts of a replay: release rate and cumulative release over time, each
//! with its band, and the reportable quantities, as an SVG file.
//!
//! Drawn with `plotters`' SVG backend only, which needs no system library:
//! the text goes out as SVG text for the viewer to render. Left out: PNG,
//! which would need an embedded font, and writing the file (the replay
//! writes it, atomically).
//!
//! The chart takes a [`ChartSeries`], thinned as the estimates arrive, so a
//! replay of any length draws from a bounded number of points: a chart
//! 1,000 pixels wide shows no more than a few thousand anyway. Thinning
//! merges neighbouring estimates into one point whose band spans their
//! lowest low and highest high, so the shaded band still covers every
//! estimate; the best line passes through the last estimate of each point.

use crate::config::Units;
use crate::estimate::{Estimate, Figures, LeakParams, Warning};
use crate::model::{Mass, MassRate};
use crate::report::{self, Presentation, presentation::POUNDS_PER_KG};
use anyhow::Context;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

/// What the chart is about, for its title.
pub struct ChartLabels<'a> {
    pub tank: &'a str,
    pub event: Option<i64>,
    /// One line on the parameters, e.g. "hole 40.0 mm at 0.30 m, Cd 0.61".
    pub params: &'a str,
    /// The final estimate and the parameters it rests on: its warnings are
    /// listed under the chart, in words.
    pub last: &'a Estimate,
    pub leak: &'a LeakParams,
}

/// The width of the chart, and the most characters of a note line under
/// it (12 px sans-serif averages well under 7 px a character).
const WIDTH: u32 = 1000;
const NOTE_CHARS: usize = 160;
/// The height of a line of notes under the chart, px.
const NOTE_LINE: i32 = 16;
/// The width of the legend beside each panel, right of its data area, px:
/// outside the data, so that it never covers the latest estimates (which
/// end at the right edge).
const LEGEND_WIDTH: u32 = 260;
/// The most time ticks on a panel's axis, and the most when their labels
/// carry seconds.
const TIME_TICKS: f64 = 8.0;
const TIME_TICKS_WITH_SECONDS: f64 = 6.0;

const BAND: RGBColor = RGBColor(0xf2, 0xb8, 0x6b);
const BEST: RGBColor = RGBColor(0x1d, 0x3c, 0x6e);
const WARNING: RGBColor = RGBColor(0x9a, 0x4a, 0x00);
const GRID: RGBColor = RGBColor(0xe4, 0xe4, 0xe4);
/// The legend's frame (a colour of its own, so tests can find it).
const LEGEND_FRAME: RGBColor = RGBColor(0x5a, 0x5a, 0x5a);

/// The reportable quantities' lines: each its own colour and its own dash
/// pattern (SVG `stroke-dasharray`), so that two lines read apart in
/// print, in grey and for a reader who does not tell the colours apart.
/// The best estimate is the one solid line. Cycles beyond four quantities.
const THRESHOLD_STYLES: [(RGBColor, &str); 4] = [
    (RGBColor(0xa8, 0x1c, 0x1c), "10 5"),
    (RGBColor(0x6a, 0x1b, 0x9a), "3 4"),
    (RGBColor(0x1b, 0x6e, 0x3a), "14 4 3 4"),
    (RGBColor(0x8a, 0x5a, 0x00), "6 3"),
];

/// One point of the chart: one estimate, or several neighbouring ones
/// thinned into one.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ChartPoint {
    /// The time of the last estimate the point holds.
    pub at_ms: i64,
    pub rate_low_kg_s: f64,
    pub rate_best_kg_s: f64,
    pub rate_high_kg_s: f64,
    pub released_low_kg: f64,
    pub released_best_kg: f64,
    pub released_high_kg: f64,
}

impl ChartPoint {
    pub fn of(e: &Figures) -> Self {
        Self {
            at_ms: e.at_ms,
            rate_low_kg_s: e.rate_low_kg_s,
            rate_best_kg_s: e.rate_best_kg_s,
            rate_high_kg_s: e.rate_high_kg_s,
            released_low_kg: e.released_low_kg,
            released_best_kg: e.released_best_kg,
            released_high_kg: e.released_high_kg,
        }
    }

    /// This point and a later one as one: the later's time and best
    /// figures, the band over both.
    fn merge(self, later: Self) -> Self {
        Self {
            at_ms: later.at_ms,
            rate_low_kg_s: self.rate_low_kg_s.min(later.rate_low_kg_s),
            rate_best_kg_s: later.rate_best_kg_s,
            rate_high_kg_s: self.rate_high_kg_s.max(later.rate_high_kg_s),
            released_low_kg: self.released_low_kg.min(later.released_low_kg),
            released_best_kg: later.released_best_kg,
            released_high_kg: self.released_high_kg.max(later.released_high_kg),
        }
    }
}

/// The points of a chart, thinned as estimates arrive so that it never
/// holds more than about `max_points`. Each finished point holds the same
/// number of estimates; when the points reach the limit, neighbours are
/// merged in pairs and each new point holds twice as many. The first
/// estimate stays a point of its own, so the lines start where the replay
/// does.
#[derive(Debug, Clone)]
pub struct ChartSeries {
    first: Option<ChartPoint>,
    done: Vec<ChartPoint>,
    filling: Option<ChartPoint>,
    filled: usize,
    per_point: usize,
    max_points: usize,
    estimates: u64,
}

impl ChartSeries {
    /// About two points per pixel of the chart's width.
    pub const DEFAULT_MAX_POINTS: usize = 2000;

    /// A series of at most about `max_points` points (at least 2).
    pub fn new(max_points: usize) -> Self {
        Self {
            first: None,
            done: Vec::new(),
            filling: None,
            filled: 0,
            per_point: 1,
            max_points: max_points.max(2),
            estimates: 0,
        }
    }

    /// Takes the next estimate's figures (in time order).
    pub fn push(&mut self, e: &Figures) {
        self.estimates += 1;
        let point = ChartPoint::of(e);
        if self.first.is_none() {
            self.first = Some(point);
            return;
        }
        self.filling = Some(match self.filling {
            Some(earlier) => earlier.merge(point),
            None => point,
        });
        self.filled += 1;
        if self.filled < self.per_point {
            return;
        }
        self.done.extend(self.filling.take());
        self.filled = 0;
        if self.done.len() >= self.max_points {
            self.done = self
                .done
                .chunks(2)
                .map(|pair| match pair {
                    [a, b] => a.merge(*b),
                    [a] => *a,
                    _ => unreachable!("chunks(2) gives one or two"),
                })
                .collect();
            self.per_point *= 2;
        }
    }

    /// The points, in time order.
    pub fn points(&self) -> Vec<ChartPoint> {
        self.first
            .iter()
            .chain(&self.done)
            .chain(&self.filling)
            .copied()
            .collect()
    }

    /// How many estimates went in.
    pub fn estimates(&self) -> u64 {
        self.estimates
    }

    /// How many estimates each finished point holds.
    pub fn per_point(&self) -> usize {
        self.per_point
    }
}

/// The chart as SVG text: masses and rates in the site's units, the time
/// axis in clock time in its zone (with the time since the start under
/// each tick), each panel's legend beside its data area.
pub fn render_svg(
    series: &ChartSeries,
    reportable_kg: &[f64],
    labels: &ChartLabels,
    people: &Presentation,
) -> anyhow::Result<String> {
    let estimates = series.points();
    let estimates = estimates.as_slice();
    let first = estimates
        .first()
        .context("nothing to plot: the replay produced no estimate")?;
    let t0 = first.at_ms;
    let seconds = |e: &ChartPoint| (e.at_ms - t0) as f64 / 1000.0;
    let t_end = estimates.last().map_or(1.0, seconds).max(1.0);
    // The site's units: masses in kg or lb, rates in kg/s or lb/s.
    let per_kg = match people.units {
        Units::Metric => 1.0,
        Units::UsCustomary => POUNDS_PER_KG,
    };
    let unit_of = |text: String| text.split_once(' ').map(|(_, u)| u.to_owned());
    let mass_unit = unit_of(people.mass(Mass::kilograms(1.0))).unwrap_or_default();
    let rate_unit = unit_of(people.rate(MassRate::kg_per_second(1.0))).unwrap_or_default();
    let max_rate = estimates
        .iter()
        .map(|e| e.rate_high_kg_s * per_kg)
        .fold(0.0, f64::max)
        .max(1e-6)
        * 1.1;
    let max_total = estimates
        .iter()
        .map(|e| e.released_high_kg)
        .chain(
            reportable_kg
                .iter()
                .copied()
                .filter(|q| *q < 3.0 * first.released_high_kg.max(1.0) + 1e9),
        )
        .fold(0.0, f64::max)
        .max(1e-3)
        * per_kg
        * 1.1;
    let title = match labels.event {
        Some(id) => format!(
            "Tank {}, event {id}: release replayed ({})",
            labels.tank, labels.params
        ),
        None => format!(
            "Tank {}: release from readings ({})",
            labels.tank, labels.params
        ),
    };

    // Under the chart, outside the data area: the final estimate's
    // warnings in words, then the caution.
    let warnings = report::estimate::warnings_text(labels.last, labels.leak, people);
    // (text, a warning's colour, its indent in px)
    let mut notes: Vec<(String, bool, i32)> = Vec::new();
    if warnings.is_empty() {
        notes.push(("No warnings at the end of the replay.".to_owned(), false, 0));
    } else {
        notes.push(("Warnings at the end of the replay:".to_owned(), true, 0));
        for w in &warnings {
            for (i, line) in wrap(w, NOTE_CHARS - 4).into_iter().enumerate() {
                match i {
                    0 => notes.push((format!("• {line}"), true, 0)),
                    _ => notes.push((line, true, 10)),
                }
            }
        }
    }
    for line in wrap(report::CAUTION, NOTE_CHARS) {
        notes.push((line, false, 0));
    }
    // Above it, when most of the total (or a large part: the warning's
    // threshold) was bridged across data gaps rather than measured.
    let bridged = bridged_headline(labels.last);
    let header = if bridged.is_some() { 80 } else { 60 };
    let footer = 14 + NOTE_LINE * notes.len() as i32;
    let height = header as u32 + 700 + footer as u32;
    let end_ms = estimates.last().map_or(t0, |e| e.at_ms).max(t0 + 1000);
    let (step_ms, pattern) = clock_step(end_ms - t0, TIME_TICKS, TIME_TICKS_WITH_SECONDS);
    let axis = TimeAxis {
        ticks: clock_ticks(t0, end_ms, step_ms, people)
            .into_iter()
            .map(|at| {
                let after_s = (at - t0) as f64 / 1000.0;
                // Minutes; as minutes and seconds (`+1:05`) when the
                // ticks are under a minute apart.
                let since = if step_ms < 60_000 {
                    let whole = after_s.round() as i64;
                    format!("+{}:{:02}", whole / 60, whole % 60)
                } else {
                    format!("+{}", report::presentation::whole(after_s / 60.0))
                };
                (after_s, people.strftime(at, pattern), since)
            })
            .collect(),
        description: format!(
            "clock time ({}); under it, time since the event start (min)",
            people.zone_text(t0)
        ),
    };

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, height)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_error)?;
        let (top, rest) = root.split_vertically(header);
        top.draw(&Text::new(
            title,
            (20, 15),
            ("sans-serif", 22).into_font().color(&BLACK),
        ))
        .map_err(plot_error)?;
        if let Some(line) = bridged {
            top.draw(&Text::new(
                line,
                (20, 60),
                ("sans-serif", 14).into_font().color(&WARNING),
            ))
            .map_err(plot_error)?;
        }
        let thinned = if series.per_point() > 1 {
            format!(
                "; {} estimates, up to {} a point",
                series.estimates(),
                series.per_point()
            )
        } else {
            String::new()
        };
        top.draw(&Text::new(
            format!(
                "from {}; band: shaded{thinned}; warnings and caution below",
                people.time(t0)
            ),
            (20, 40),
            ("sans-serif", 14).into_font().color(&RGBColor(90, 90, 90)),
        ))
        .map_err(plot_error)?;
        let (charts, footer) = rest.split_vertically(700);
        let (upper, lower) = charts.split_vertically(350);

        let seconds: &dyn Fn(&ChartPoint) -> f64 = &seconds;
        let rate_desc = format!("rate ({rate_unit})");
        let rate_best = format!("best estimate ({rate_unit})");
        panel(
            &upper,
            &Panel {
                caption: "Release rate",
                y_desc: &rate_desc,
                y_max: max_rate,
                band: &|e| (e.rate_low_kg_s * per_kg, e.rate_high_kg_s * per_kg),
                band_label: "rate band",
                best: &|e| e.rate_best_kg_s * per_kg,
                best_label: &rate_best,
            },
            estimates,
            seconds,
            t_end,
            &axis,
            &[],
        )?;
        let lines: Vec<Threshold> = reportable_kg
            .iter()
            .filter(|q| **q * per_kg <= max_total)
            .enumerate()
            .map(|(i, &q)| Threshold {
                value: q * per_kg,
                label: format!("reportable quantity {}", people.mass(Mass::kilograms(q))),
                color: THRESHOLD_STYLES[i % THRESHOLD_STYLES.len()].0,
            })
            .collect();
        let released_desc = format!("released ({mass_unit})");
        let released_best = format!("best estimate ({mass_unit})");
        panel(
            &lower,
            &Panel {
                caption: "Cumulative release",
                y_desc: &released_desc,
                y_max: max_total,
                band: &|e| (e.released_low_kg * per_kg, e.released_high_kg * per_kg),
                band_label: "released band",
                best: &|e| e.released_best_kg * per_kg,
                best_label: &released_best,
            },
            estimates,
            seconds,
            t_end,
            &axis,
            &lines,
        )?;

        for (i, (line, warning, indent)) in notes.into_iter().enumerate() {
            let color = if warning {
                WARNING
            } else {
                RGBColor(120, 20, 20)
            };
            footer
                .draw(&Text::new(
                    line,
                    (20 + indent, 6 + NOTE_LINE * i as i32),
                    ("sans-serif", 12).into_font().color(&color),
                ))
                .map_err(plot_error)?;
        }
        root.present().map_err(plot_error)?;
    }
    Ok(dashed(svg))
}

/// Gives the reportable quantities' lines (and their legend samples) their
/// dash patterns. plotters' SVG backend writes no `stroke-dasharray`, and
/// its dashed series cuts a line into hundreds of short ones (and leaves
/// the legend's sample solid), so each dashed style is drawn in a colour
/// of its own and its pattern is added here to the lines of that colour.
fn dashed(svg: String) -> String {
    THRESHOLD_STYLES.iter().fold(svg, |svg, (color, pattern)| {
        let stroke = format!(
            r##"stroke="#{:02X}{:02X}{:02X}""##,
            color.0, color.1, color.2
        );
        svg.replace(
            &stroke,
            &format!(r#"{stroke} stroke-dasharray="{pattern}""#),
        )
    })
}

/// The step between clock ticks for a span, ms, giving at most `most` of
/// them (`most_with_seconds` for the wider labels of a step under a
/// minute), and the `strftime` pattern of their labels: seconds only when
/// the step is under a minute, the date when it is a day or more. Shared
/// with the web page's chart.
pub fn clock_step(span_ms: i64, most: f64, most_with_seconds: f64) -> (i64, &'static str) {
    const STEPS_S: [i64; 17] = [
        1, 2, 5, 10, 15, 30, 60, 120, 300, 600, 900, 1800, 3600, 7200, 10_800, 21_600, 43_200,
    ];
    let step_s = STEPS_S
        .iter()
        .copied()
        .find(|&s| {
            let most = if s < 60 { most_with_seconds } else { most };
            span_ms as f64 / (s as f64 * 1000.0) <= most
        })
        .unwrap_or_else(|| {
            // Whole days beyond.
            let days = (span_ms as f64 / 86_400_000.0 / most).ceil().max(1.0) as i64;
            days * 86_400
        });
    let pattern = if step_s < 60 {
        "%H:%M:%S"
    } else if step_s < 86_400 {
        "%H:%M"
    } else {
        "%b %d %H:%M"
    };
    (step_s * 1000, pattern)
}

/// The round clock times (multiples of `step_ms` in the site's local time,
/// at the offset it has at `start_ms`) from `start_ms` to `end_ms`.
pub fn clock_ticks(start_ms: i64, end_ms: i64, step_ms: i64, people: &Presentation) -> Vec<i64> {
    let offset_ms = jiff::Timestamp::from_millisecond(start_ms)
        .map_or(0, |t| i64::from(people.zone.to_offset(t).seconds()) * 1000);
    let local_start = start_ms + offset_ms;
    let mut at = local_start.div_euclid(step_ms) * step_ms - offset_ms;
    if at < start_ms {
        at += step_ms;
    }
    let mut ticks = Vec::new();
    while at <= end_ms {
        ticks.push(at);
        at += step_ms;
    }
    ticks
}

/// The line above the chart when the final total rests largely on data
/// gaps bridged by the forecast (the warning `bridged_gaps_dominate`).
fn bridged_headline(last: &Estimate) -> Option<String> {
    if !last.warnings.contains(Warning::BridgedGapsDominate) {
        return None;
    }
    let q = &last.quality;
    let share = 100.0 * q.bridged_kg / last.released_best_kg.max(1e-9);
    let how_much = if share > 50.0 {
        format!("Most of the final total ({} %)", report::number(share))
    } else {
        format!("{} % of the final total", report::number(share))
    };
    Some(format!(
        "{how_much} was bridged across {} data gap(s), not measured: see the warnings below",
        q.gaps_bridged
    ))
}

/// `text` in lines of at most about `width` characters, broken at spaces.
fn wrap(text: &str, width: usize) -> Vec<String> {
    let mut lines = Vec::new();
    let mut line = String::new();
    for word in text.split_whitespace() {
        if !line.is_empty() && line.chars().count() + 1 + word.chars().count() > width {
            lines.push(std::mem::take(&mut line));
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(word);
    }
    if !line.is_empty() {
        lines.push(line);
    }
    lines
}

/// One of the two panels: what it shows of each estimate.
struct Panel<'a> {
    caption: &'a str,
    y_desc: &'a str,
    y_max: f64,
    band: &'a dyn Fn(&ChartPoint) -> (f64, f64),
    band_label: &'a str,
    best: &'a dyn Fn(&ChartPoint) -> f64,
    best_label: &'a str,
}

/// The time axis both panels share: each tick's seconds since the first
/// estimate, its clock time and its time since the start; and what the
/// axis says it is.
struct TimeAxis {
    ticks: Vec<(f64, String, String)>,
    description: String,
}

/// A horizontal line across a panel: a reportable quantity.
struct Threshold {
    value: f64,
    label: String,
    color: RGBColor,
}

/// Draws a panel: axes, the shaded low–high band, the best line, the
/// horizontal `lines`, and beside the data area the legend.
fn panel<DB: DrawingBackend>(
    area: &DrawingArea<DB, plotters::coord::Shift>,
    spec: &Panel,
    estimates: &[ChartPoint],
    seconds: &dyn Fn(&ChartPoint) -> f64,
    t_end: f64,
    axis: &TimeAxis,
    lines: &[Threshold],
) -> anyhow::Result<()> {
    let (data_area, legend_area) = area.split_horizontally(WIDTH - LEGEND_WIDTH);
    let mut chart = ChartBuilder::on(&data_area)
        .margin(12)
        .x_label_area_size(62)
        .y_label_area_size(80)
        .caption(spec.caption, ("sans-serif", 18))
        .build_cartesian_2d(0.0..t_end, 0.0..spec.y_max)
        .map_err(plot_error)?;
    chart
        .configure_mesh()
        .disable_x_mesh()
        .x_labels(0)
        .y_labels(6)
        .y_label_formatter(&|v| report::presentation::whole(*v))
        .x_desc(axis.description.as_str())
        .y_desc(spec.y_desc)
        .label_style(("sans-serif", 14))
        .draw()
        .map_err(plot_error)?;
    // The clock-time ticks, with the time since the start under each.
    let tick_font = ("sans-serif", 14)
        .into_font()
        .color(&BLACK)
        .pos(Pos::new(HPos::Center, VPos::Top));
    let since_font = ("sans-serif", 12)
        .into_font()
        .color(&RGBColor(90, 90, 90))
        .pos(Pos::new(HPos::Center, VPos::Top));
    for (at_s, clock, since) in &axis.ticks {
        chart
            .draw_series(std::iter::once(PathElement::new(
                vec![(*at_s, 0.0), (*at_s, spec.y_max)],
                GRID.stroke_width(1),
            )))
            .map_err(plot_error)?;
        chart
            .plotting_area()
            .draw(
                &(EmptyElement::at((*at_s, 0.0))
                    + PathElement::new(vec![(0, 0), (0, 5)], BLACK.stroke_width(1))
                    + Text::new(clock.clone(), (0, 8), tick_font.clone())
                    + Text::new(since.clone(), (0, 25), since_font.clone())),
            )
            .map_err(plot_error)?;
    }
    let mut outline: Vec<(f64, f64)> = estimates
        .iter()
        .map(|e| (seconds(e), (spec.band)(e).1))
        .collect();
    outline.extend(
        estimates
            .iter()
            .rev()
            .map(|e| (seconds(e), (spec.band)(e).0)),
    );
    chart
        .draw_series(std::iter::once(Polygon::new(
            outline,
            BAND.mix(0.6).filled(),
        )))
        .map_err(plot_error)?;
    for line in lines {
        chart
            .draw_series(LineSeries::new(
                vec![(0.0, line.value), (t_end, line.value)],
                line.color.stroke_width(2),
            ))
            .map_err(plot_error)?;
    }
    chart
        .draw_series(LineSeries::new(
            estimates.iter().map(|e| (seconds(e), (spec.best)(e))),
            BEST.stroke_width(2),
        ))
        .map_err(plot_error)?;

    // The legend, right of the data area.
    let entries = 2 + lines.len() as i32;
    let (left, right, top, row) = (10, LEGEND_WIDTH as i32 - 10, 44, 24);
    legend_area
        .draw(&Rectangle::new(
            [(left, top), (right, top + 14 + row * entries)],
            LEGEND_FRAME.stroke_width(1),
        ))
        .map_err(plot_error)?;
    let text = ("sans-serif", 13)
        .into_font()
        .color(&BLACK)
        .pos(Pos::new(HPos::Left, VPos::Center));
    let sample = |i: i32| (left + 10, top + 19 + row * i);
    let (x, y) = sample(0);
    legend_area
        .draw(&Rectangle::new(
            [(x, y - 6), (x + 30, y + 6)],
            BAND.mix(0.6).filled(),
        ))
        .map_err(plot_error)?;
    let mut labels = vec![(spec.band_label.to_owned(), (x, y))];
    let (x, y) = sample(1);
    legend_area
        .draw(&PathElement::new(
            vec![(x, y), (x + 30, y)],
            BEST.stroke_width(2),
        ))
        .map_err(plot_error)?;
    labels.push((spec.best_label.to_owned(), (x, y)));
    for (i, line) in lines.iter().enumerate() {
        let (x, y) = sample(2 + i as i32);
        legend_area
            .draw(&PathElement::new(
                vec![(x, y), (x + 30, y)],
                line.color.stroke_width(2),
            ))
            .map_err(plot_error)?;
        labels.push((line.label.clone(), (x, y)));
    }
    for (label, (x, y)) in labels {
        legend_area
            .draw(&Text::new(label, (x + 38, y), text.clone()))
            .map_err(plot_error)?;
    }
    Ok(())
}

fn plot_error<E: std::fmt::Display>(e: E) -> anyhow::Error {
    anyhow::anyhow!("drawing the chart: {e}")
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::acquire::sample::{Reading, TankSample};
    use crate::estimate::LeakParams;
    use crate::estimator::Estimator;

    /// Estimates of a real estimator on a draining tank: `n` samples, 1 s
    /// apart, with a little level noise so the band moves.
    fn estimates(n: usize) -> Vec<Figures> {
        run(n).0
    }

    /// The same, with the final whole estimate and the parameters.
    fn run(n: usize) -> (Vec<Figures>, Estimate, LeakParams) {
        let text = std::fs::read_to_string(
            std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml"),
        )
        .unwrap();
        let config = crate::config::parse(&text, std::path::Path::new("demo.toml")).unwrap();
        let tank = &config.tanks[0];
        let params = LeakParams {
            hole_diameter_m: Some(0.04),
            hole_height_m: 0.3,
            cd: 0.61,
            density_kg_m3: None,
            ..LeakParams::default()
        };
        let mut estimator = Estimator::new(tank, params, 0, 1000).unwrap();
        let figures = (0..n)
            .filter_map(|i| {
                let wobble = if i % 7 == 0 { 0.002 } else { 0.0 };
                estimator.push(&TankSample {
                    tank: 0,
                    tank_id: tank.id.as_str().into(),
                    at_ms: 1000 * i as i64,
                    level: Reading::good(4.2 - 0.0008 * i as f64 + wobble),
                    pressure: None,
                    transfer: None,
                    temperature: None,
                    leak_flag: None,
                })
            })
            .collect();
        (figures, estimator.estimate().unwrap(), params)
    }

    /// The y coordinate of the SVG text element that holds `text`.
    fn text_y(svg: &str, text: &str) -> f64 {
        let text = text.replace('\'', "&apos;");
        let at = svg
            .find(&text)
            .unwrap_or_else(|| panic!("no {text:?} in the chart"));
        let tag = svg[..at].rfind("<text").unwrap();
        let y = svg[tag..at].find(" y=\"").unwrap() + tag + 4;
        svg[y..y + svg[y..].find('"').unwrap()].parse().unwrap()
    }

    #[test]
    fn a_long_series_is_thinned_to_a_bound_that_still_covers_every_estimate() {
        let all = estimates(5000);
        let mut series = ChartSeries::new(100);
        for e in &all {
            series.push(e);
        }
        let points = series.points();
        assert!(points.len() <= 102, "{} points", points.len());
        assert!(points.len() >= 50, "{} points", points.len());
        assert_eq!(series.estimates(), all.len() as u64);
        assert_eq!(
            points[0],
            ChartPoint::of(&all[0]),
            "the first estimate stands alone"
        );
        assert_eq!(
            points.last().unwrap().at_ms,
            all.last().unwrap().at_ms,
            "the last estimate ends the series"
        );
        assert!(points.windows(2).all(|w| w[0].at_ms < w[1].at_ms));
        // Every estimate lies inside the band of the point that holds it
        // (the first point whose time is at or after its own).
        for e in &all {
            let p = points.iter().find(|p| p.at_ms >= e.at_ms).unwrap();
            assert!(p.rate_low_kg_s <= e.rate_low_kg_s && e.rate_high_kg_s <= p.rate_high_kg_s);
            assert!(
                p.released_low_kg <= e.released_low_kg && e.released_high_kg <= p.released_high_kg
            );
        }
    }

    #[test]
    fn a_short_series_keeps_every_estimate() {
        let (all, last, leak) = run(30);
        let mut series = ChartSeries::new(ChartSeries::DEFAULT_MAX_POINTS);
        for e in &all {
            series.push(e);
        }
        let expected: Vec<ChartPoint> = all.iter().map(ChartPoint::of).collect();
        assert_eq!(series.points(), expected);
        assert_eq!(series.per_point(), 1);
        let labels = ChartLabels {
            tank: "FF-T12",
            event: None,
            params: "hole 40.0 mm",
            last: &last,
            leak: &leak,
        };
        let people = Presentation::default();
        let svg = render_svg(&series, &[250.0], &labels, &people).unwrap();
        assert!(svg.contains("Cumulative release") && !svg.contains("estimates, up to"));
        assert!(render_svg(&ChartSeries::new(10), &[], &labels, &people).is_err());
    }

    /// Every warning of the final estimate is said in words under the
    /// chart, below its data area, and a total that rests mostly on
    /// bridged gaps is said above it.
    #[test]
    fn the_chart_lists_the_final_warnings_and_a_bridged_total() {
        let (all, mut last, leak) = run(30);
        let mut series = ChartSeries::new(ChartSeries::DEFAULT_MAX_POINTS);
        for e in &all {
            series.push(e);
        }
        last.warnings.insert(Warning::BridgedGapsDominate);
        last.warnings.insert(Warning::HoleHeightAssumed);
        last.quality.gaps_bridged = 2;
        last.quality.longest_gap_s = 300.0;
        last.quality.bridged_kg = 0.8 * last.released_best_kg;
        let labels = ChartLabels {
            tank: "FF-T12",
            event: Some(3),
            params: "hole 40.0 mm",
            last: &last,
            leak: &leak,
        };
        let people = Presentation::default();
        let svg = render_svg(&series, &[250.0], &labels, &people).unwrap();
        let bottom_axis = text_y(&svg, "time since the event start (min)");
        let words = report::estimate::warnings_text(&last, &leak, &people);
        assert!(words.len() >= 2, "{words:?}");
        for w in &words {
            // Long warnings are wrapped: their first words start a line.
            let start: String = w.split_whitespace().take(6).collect::<Vec<_>>().join(" ");
            assert!(
                text_y(&svg, &start) > bottom_axis,
                "{start:?} in the data area"
            );
        }
        assert!(text_y(&svg, "CAUTION") > text_y(&svg, "Warnings at the end"));
        let headline = "Most of the final total (80.0 %) was bridged across 2 data gap(s)";
        assert!(text_y(&svg, headline) < text_y(&svg, "Release rate"));

        // Without the warning, no headline; without warnings, said so.
        last.warnings = Default::default();
        let labels = ChartLabels {
            tank: "FF-T12",
            event: Some(3),
            params: "hole 40.0 mm",
            last: &last,
            leak: &leak,
        };
        let svg = render_svg(&series, &[], &labels, &people).unwrap();
        assert!(!svg.contains("was bridged across"));
        assert!(svg.contains("No warnings at the end of the replay."));
    }

    /// The tags named `name` in `svg`, each as the text between `<name`
    /// and its `>` (plotters writes one tag per element, attributes in
    /// double quotes).
    fn tags<'a>(svg: &'a str, name: &str) -> Vec<&'a str> {
        let open = format!("<{name} ");
        svg.match_indices(&open)
            .map(|(at, _)| &svg[at..at + svg[at..].find('>').unwrap()])
            .collect()
    }

    fn attribute<'a>(tag: &'a str, name: &str) -> Option<&'a str> {
        let key = format!(" {name}=\"");
        let at = tag.find(&key)? + key.len();
        Some(&tag[at..at + tag[at..].find('"')?])
    }

    fn number(tag: &str, name: &str) -> f64 {
        attribute(tag, name).unwrap().parse().unwrap()
    }

    /// The points of a polyline or polygon.
    fn points(tag: &str) -> Vec<(f64, f64)> {
        attribute(tag, "points")
            .unwrap()
            .split_whitespace()
            .map(|p| {
                let (x, y) = p.split_once(',').unwrap();
                (x.parse().unwrap(), y.parse().unwrap())
            })
            .collect()
    }

    /// The texts of the chart's `<text>` elements.
    fn texts(svg: &str) -> Vec<&str> {
        svg.match_indices("<text ")
            .map(|(at, _)| {
                let start = at + svg[at..].find('>').unwrap() + 1;
                svg[start..start + svg[start..].find('<').unwrap()].trim()
            })
            .collect()
    }

    /// A chart of 30 s of a draining tank with two reportable quantities
    /// inside the data, in a zone of a half-hour offset.
    fn two_quantities() -> String {
        let (all, last, leak) = run(30);
        let mut series = ChartSeries::new(ChartSeries::DEFAULT_MAX_POINTS);
        for e in &all {
            series.push(e);
        }
        let high = all.last().unwrap().released_high_kg;
        let labels = ChartLabels {
            tank: "FF-T12",
            event: Some(3),
            params: "hole 40.0 mm",
            last: &last,
            leak: &leak,
        };
        let kolkata = Presentation::new("Asia/Kolkata", crate::config::Units::Metric).unwrap();
        render_svg(&series, &[0.4 * high, 0.8 * high], &labels, &kolkata).unwrap()
    }

    /// The legends sit beside the data areas: nothing drawn in a data area
    /// (band, best line, reportable lines, grid) reaches into a legend's
    /// box, so the legend covers none of the latest estimates.
    #[test]
    fn the_legends_are_outside_the_data() {
        let svg = two_quantities();
        let frame = r##"stroke="#5A5A5A""##;
        let legends: Vec<(f64, f64, f64, f64)> = tags(&svg, "rect")
            .into_iter()
            .filter(|t| t.contains(frame))
            .map(|t| {
                let (x, y) = (number(t, "x"), number(t, "y"));
                (x, y, x + number(t, "width"), y + number(t, "height"))
            })
            .collect();
        assert_eq!(legends.len(), 2, "one legend a panel");
        let inside = |(x, y): (f64, f64), (x0, y0, x1, y1): (f64, f64, f64, f64)| {
            x >= x0 && x <= x1 && y >= y0 && y <= y1
        };
        let mut data_right: f64 = 0.0;
        for tag in tags(&svg, "polyline")
            .into_iter()
            .chain(tags(&svg, "polygon"))
        {
            let points = points(tag);
            // A legend's own samples lie inside its box.
            if legends
                .iter()
                .any(|&l| points.iter().all(|&p| inside(p, l)))
            {
                continue;
            }
            for &(x, y) in &points {
                data_right = data_right.max(x);
                for &legend in &legends {
                    assert!(
                        !inside((x, y), legend),
                        "({x}, {y}) under a legend {legend:?}"
                    );
                }
            }
        }
        for (x0, ..) in &legends {
            assert!(
                *x0 > data_right,
                "a legend at {x0} over data up to {data_right}"
            );
        }
    }

    /// The best estimate is the one solid line; the two reportable
    /// quantities differ from it and from each other in dash and colour.
    #[test]
    fn the_lines_differ_by_dash_as_well_as_colour() {
        let svg = two_quantities();
        let lines = tags(&svg, "polyline");
        let best = r##"stroke="#1D3C6E""##;
        assert!(lines.iter().filter(|t| t.contains(best)).count() >= 4);
        assert!(
            lines
                .iter()
                .filter(|t| t.contains(best))
                .all(|t| attribute(t, "stroke-dasharray").is_none()),
            "the best line is solid"
        );
        let mut styles: Vec<(&str, &str)> = lines
            .iter()
            .filter_map(|t| Some((attribute(t, "stroke")?, attribute(t, "stroke-dasharray")?)))
            .collect();
        styles.sort();
        styles.dedup();
        assert_eq!(styles.len(), 2, "{styles:?}");
        assert_ne!(styles[0].0, styles[1].0, "colours");
        assert_ne!(styles[0].1, styles[1].1, "dashes");
    }

    /// Tick values are round and said as people write them (no `4000.0`),
    /// and the time axis shows clock times in the site's zone.
    #[test]
    fn ticks_are_round_and_the_time_axis_is_the_site_clock() {
        let svg = two_quantities();
        let texts = texts(&svg);
        let numbers: Vec<&str> = texts
            .iter()
            .copied()
            .filter(|t| t.replace(',', "").parse::<f64>().is_ok())
            .collect();
        assert!(numbers.len() >= 6, "{texts:?}");
        for n in &numbers {
            assert!(
                !n.contains('.') || !n.ends_with('0'),
                "{n:?} has trailing zeros"
            );
            let plain = n.replace(',', "");
            if plain.len() > 3 && !plain.contains('.') {
                assert!(n.contains(','), "{n:?} not grouped");
            }
        }
        // The estimates run 0 to 29 s after 1970-01-01T00:00:00Z, 05:30 in
        // Kolkata (UTC+05:30): ticks every 5 s of its clock.
        for clock in ["05:30:00", "05:30:05", "05:30:25"] {
            assert!(texts.contains(&clock), "{clock} not in {texts:?}");
        }
        assert!(
            texts.contains(&"+0:05"),
            "the time since the start: {texts:?}"
        );
        assert!(
            texts
                .iter()
                .any(|t| t.contains("clock time (Asia/Kolkata, UTC+05:30)")),
            "{texts:?}"
        );
        assert!(
            texts
                .iter()
                .any(|t| t.starts_with("from 1970-01-01 05:30:00 IST")),
            "{texts:?}"
        );
    }

    #[test]
    fn clock_ticks_fall_on_round_times_of_the_zone() {
        assert_eq!(clock_step(29_000, 8.0, 6.0), (5_000, "%H:%M:%S"));
        assert_eq!(clock_step(3_600_000, 8.0, 6.0), (600_000, "%H:%M"));
        let kolkata = Presentation::new("Asia/Kolkata", crate::config::Units::Metric).unwrap();
        // 23:40 UTC is 05:10 in Kolkata: 15-minute ticks from 05:15 there.
        let start = 1_796_082_000_000; // 2026-11-30T23:40:00Z
        let ticks = clock_ticks(start, start + 3_600_000, 900_000, &kolkata);
        let clocks: Vec<String> = ticks.iter().map(|&t| kolkata.clock(t)).collect();
        assert_eq!(clocks, ["05:15:00", "05:30:00", "05:45:00", "06:00:00"]);
    }

    #[test]
    fn notes_wrap_at_spaces() {
        let lines = wrap("aaa bbb ccc ddd", 7);
        assert_eq!(lines, vec!["aaa bbb", "ccc ddd"]);
        assert_eq!(wrap("", 10), Vec::<String>::new());
    }
}
