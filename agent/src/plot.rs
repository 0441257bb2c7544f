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

use crate::estimate::{Estimate, Figures, LeakParams, Warning};
use crate::report;
use anyhow::Context;
use plotters::prelude::*;

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

const BAND: RGBColor = RGBColor(0xf2, 0xb8, 0x6b);
const BEST: RGBColor = RGBColor(0x1d, 0x3c, 0x6e);
const THRESHOLD: RGBColor = RGBColor(0xa8, 0x1c, 0x1c);
const WARNING: RGBColor = RGBColor(0x9a, 0x4a, 0x00);

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

/// The chart as SVG text.
pub fn render_svg(
    series: &ChartSeries,
    reportable_kg: &[f64],
    labels: &ChartLabels,
) -> anyhow::Result<String> {
    let estimates = series.points();
    let estimates = estimates.as_slice();
    let first = estimates
        .first()
        .context("nothing to plot: the replay produced no estimate")?;
    let t0 = first.at_ms;
    let minutes = |e: &ChartPoint| (e.at_ms - t0) as f64 / 60_000.0;
    let t_end = estimates.last().map_or(1.0, minutes).max(1.0 / 60.0);
    let max_rate = estimates
        .iter()
        .map(|e| e.rate_high_kg_s)
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
    let warnings =
        report::estimate::warnings_text(labels.last, labels.leak, &report::Presentation::default());
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
    let height = header as u32 + 660 + footer as u32;

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
                report::utc(t0)
            ),
            (20, 40),
            ("sans-serif", 14).into_font().color(&RGBColor(90, 90, 90)),
        ))
        .map_err(plot_error)?;
        let (charts, footer) = rest.split_vertically(660);
        let (upper, lower) = charts.split_vertically(310);

        let minutes: &dyn Fn(&ChartPoint) -> f64 = &minutes;
        panel(
            &upper,
            &Panel {
                caption: "Release rate",
                y_desc: "rate (kg/s)",
                y_max: max_rate,
                band: &|e| (e.rate_low_kg_s, e.rate_high_kg_s),
                band_label: "rate band",
                best: &|e| e.rate_best_kg_s,
                best_label: "best estimate (kg/s)",
            },
            estimates,
            minutes,
            t_end,
            &[],
        )?;
        let lines: Vec<(f64, String)> = reportable_kg
            .iter()
            .filter(|q| **q <= max_total)
            .map(|&q| {
                let label = format!(
                    "reportable quantity {}",
                    report::mass(crate::model::Mass::kilograms(q))
                );
                (q, label)
            })
            .collect();
        panel(
            &lower,
            &Panel {
                caption: "Cumulative release",
                y_desc: "released (kg)",
                y_max: max_total,
                band: &|e| (e.released_low_kg, e.released_high_kg),
                band_label: "released band",
                best: &|e| e.released_best_kg,
                best_label: "best estimate (kg)",
            },
            estimates,
            minutes,
            t_end,
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
    Ok(svg)
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

/// Draws a panel: axes, the shaded low–high band, the best line, the
/// horizontal `lines` (value, legend) and the legend.
fn panel<DB: DrawingBackend>(
    area: &DrawingArea<DB, plotters::coord::Shift>,
    spec: &Panel,
    estimates: &[ChartPoint],
    minutes: &dyn Fn(&ChartPoint) -> f64,
    t_end: f64,
    lines: &[(f64, String)],
) -> anyhow::Result<()> {
    let mut chart = ChartBuilder::on(area)
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(70)
        .caption(spec.caption, ("sans-serif", 18))
        .build_cartesian_2d(0.0..t_end, 0.0..spec.y_max)
        .map_err(plot_error)?;
    chart
        .configure_mesh()
        .x_desc("time since the event start (min)")
        .y_desc(spec.y_desc)
        .draw()
        .map_err(plot_error)?;
    let mut outline: Vec<(f64, f64)> = estimates
        .iter()
        .map(|e| (minutes(e), (spec.band)(e).1))
        .collect();
    outline.extend(
        estimates
            .iter()
            .rev()
            .map(|e| (minutes(e), (spec.band)(e).0)),
    );
    chart
        .draw_series(std::iter::once(Polygon::new(
            outline,
            BAND.mix(0.6).filled(),
        )))
        .map_err(plot_error)?
        .label(spec.band_label)
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 20, y + 5)], BAND.mix(0.6).filled()));
    chart
        .draw_series(LineSeries::new(
            estimates.iter().map(|e| (minutes(e), (spec.best)(e))),
            BEST.stroke_width(2),
        ))
        .map_err(plot_error)?
        .label(spec.best_label)
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], BEST.stroke_width(2)));
    for (value, label) in lines {
        chart
            .draw_series(LineSeries::new(
                vec![(0.0, *value), (t_end, *value)],
                THRESHOLD.stroke_width(1),
            ))
            .map_err(plot_error)?
            .label(label.as_str())
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], THRESHOLD));
    }
    chart
        .configure_series_labels()
        .background_style(WHITE.mix(0.8))
        .border_style(BLACK)
        .draw()
        .map_err(plot_error)?;
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
        let svg = render_svg(&series, &[250.0], &labels).unwrap();
        assert!(svg.contains("Cumulative release") && !svg.contains("estimates, up to"));
        assert!(render_svg(&ChartSeries::new(10), &[], &labels).is_err());
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
        let svg = render_svg(&series, &[250.0], &labels).unwrap();
        let bottom_axis = text_y(&svg, "time since the event start (min)");
        let words = report::estimate::warnings_text(&last, &leak, &report::Presentation::default());
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
        let svg = render_svg(&series, &[], &labels).unwrap();
        assert!(!svg.contains("was bridged across"));
        assert!(svg.contains("No warnings at the end of the replay."));
    }

    #[test]
    fn notes_wrap_at_spaces() {
        let lines = wrap("aaa bbb ccc ddd", 7);
        assert_eq!(lines, vec!["aaa bbb", "ccc ddd"]);
        assert_eq!(wrap("", 10), Vec::<String>::new());
    }
}
