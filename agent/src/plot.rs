//! Charts of a replay: release rate and cumulative release over time, each
//! with its band, and the reportable quantities, as an SVG file.
//!
//! Drawn with `plotters`' SVG backend only, which needs no system library:
//! the text goes out as SVG text for the viewer to render. Left out: PNG,
//! which would need an embedded font.

use crate::report;
use crate::track::estimator::Estimate;
use anyhow::Context;
use plotters::prelude::*;
use std::path::Path;

/// What the chart is about, for its title.
pub struct ChartLabels<'a> {
    pub tank: &'a str,
    pub event: Option<i64>,
    /// One line on the parameters, e.g. "hole 40.0 mm at 0.30 m, Cd 0.61".
    pub params: &'a str,
}

const BAND: RGBColor = RGBColor(0xf2, 0xb8, 0x6b);
const BEST: RGBColor = RGBColor(0x1d, 0x3c, 0x6e);
const THRESHOLD: RGBColor = RGBColor(0xa8, 0x1c, 0x1c);

/// Writes the chart of `estimates` (in time order) to `path` as SVG.
pub fn write_svg(
    path: &Path,
    estimates: &[Estimate],
    reportable_kg: &[f64],
    labels: &ChartLabels,
) -> anyhow::Result<()> {
    let svg = render_svg(estimates, reportable_kg, labels)?;
    std::fs::write(path, svg).with_context(|| format!("writing the plot {}", path.display()))
}

/// The chart as SVG text.
pub fn render_svg(
    estimates: &[Estimate],
    reportable_kg: &[f64],
    labels: &ChartLabels,
) -> anyhow::Result<String> {
    let first = estimates
        .first()
        .context("nothing to plot: the replay produced no estimate")?;
    let t0 = first.at_ms;
    let minutes = |e: &Estimate| (e.at_ms - t0) as f64 / 60_000.0;
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

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (1000, 760)).into_drawing_area();
        root.fill(&WHITE).map_err(plot_error)?;
        let (top, rest) = root.split_vertically(60);
        top.draw(&Text::new(
            title,
            (20, 15),
            ("sans-serif", 22).into_font().color(&BLACK),
        ))
        .map_err(plot_error)?;
        top.draw(&Text::new(
            format!("from {}; band: shaded; caution below", report::utc(t0)),
            (20, 40),
            ("sans-serif", 14).into_font().color(&RGBColor(90, 90, 90)),
        ))
        .map_err(plot_error)?;
        let (charts, footer) = rest.split_vertically(660);
        let (upper, lower) = charts.split_vertically(310);

        let minutes: &dyn Fn(&Estimate) -> f64 = &minutes;
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

        footer
            .draw(&Text::new(
                report::CAUTION.to_owned(),
                (20, 10),
                ("sans-serif", 12).into_font().color(&RGBColor(120, 20, 20)),
            ))
            .map_err(plot_error)?;
        root.present().map_err(plot_error)?;
    }
    Ok(svg)
}

/// One of the two panels: what it shows of each estimate.
struct Panel<'a> {
    caption: &'a str,
    y_desc: &'a str,
    y_max: f64,
    band: &'a dyn Fn(&Estimate) -> (f64, f64),
    band_label: &'a str,
    best: &'a dyn Fn(&Estimate) -> f64,
    best_label: &'a str,
}

/// Draws a panel: axes, the shaded low–high band, the best line, the
/// horizontal `lines` (value, legend) and the legend.
fn panel<DB: DrawingBackend>(
    area: &DrawingArea<DB, plotters::coord::Shift>,
    spec: &Panel,
    estimates: &[Estimate],
    minutes: &dyn Fn(&Estimate) -> f64,
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
