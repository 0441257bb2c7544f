//! `leaktally replay`: run logged samples (or a historian's readings)
//! through the estimator again, with the parameters changed if asked.
//!
//! It is the very estimator the daemon runs, fed the very samples the daemon
//! stored, so with no overrides it reproduces the logged live figures
//! exactly, and says so by comparing every estimate. Outputs: a summary for
//! people (with the cautions) or a JSON document, the time series as CSV,
//! and a chart as SVG.

use crate::acquire::sample::TankSample;
use crate::config::{Config, Tank};
use crate::model::{Density, Mass, MassRate, TimeSpan};
use crate::plot::{self, ChartLabels};
use crate::readings;
use crate::report;
use crate::store;
use crate::track::estimator::{Estimate, Estimator, LeakParams};
use crate::track::tracker::describe_params;
use anyhow::{Context, bail};
use serde::Serialize;
use std::fmt::Write as _;
use std::io::IsTerminal;
use std::path::{Path, PathBuf};

/// Parameter changes for a replay; `None` keeps the logged value.
#[derive(Debug, Clone, Default)]
pub struct Overrides {
    pub hole_diameter_m: Option<f64>,
    pub unknown_diameter: bool,
    pub hole_height_m: Option<f64>,
    pub cd: Option<f64>,
    pub cd_range: Option<(f64, f64)>,
    pub density_kg_m3: Option<f64>,
    pub from_ms: Option<i64>,
    pub to_ms: Option<i64>,
}

impl Overrides {
    fn any(&self) -> bool {
        self.hole_diameter_m.is_some()
            || self.unknown_diameter
            || self.hole_height_m.is_some()
            || self.cd.is_some()
            || self.cd_range.is_some()
            || self.density_kg_m3.is_some()
            || self.from_ms.is_some()
            || self.to_ms.is_some()
    }

    fn apply(&self, mut p: LeakParams) -> LeakParams {
        if self.unknown_diameter {
            p.hole_diameter_m = None;
        }
        if self.hole_diameter_m.is_some() {
            p.hole_diameter_m = self.hole_diameter_m;
        }
        if let Some(h) = self.hole_height_m {
            p.hole_height_m = h;
            p.hole_height_assumed = false;
        }
        if let Some(c) = self.cd {
            p.cd = c;
            p.cd_assumed = false;
        }
        if self.cd_range.is_some() {
            p.cd_range = self.cd_range;
        }
        if self.density_kg_m3.is_some() {
            p.density_kg_m3 = self.density_kg_m3;
        }
        p
    }
}

/// Where the samples come from.
pub enum Source {
    /// A logged event in the database.
    Event {
        db: PathBuf,
        event: i64,
        config: Option<PathBuf>,
    },
    /// A readings CSV for a tank of a config.
    Readings {
        file: PathBuf,
        tank: String,
        config: PathBuf,
    },
}

/// Where the outputs go.
#[derive(Debug, Clone, Default)]
pub struct Outputs {
    pub csv: Option<PathBuf>,
    pub plot: Option<PathBuf>,
    pub json: bool,
}

/// The replay's summary document (`--json`).
#[derive(Debug, Clone, Serialize)]
pub struct Summary {
    pub event: Option<i64>,
    pub tank: String,
    pub revision: Option<i64>,
    pub params: LeakParams,
    pub params_text: String,
    pub overrides: bool,
    pub samples: usize,
    /// Rows of a readings file that were skipped, with their messages.
    pub skipped_rows: Vec<String>,
    pub from: String,
    pub to: String,
    /// The final replayed estimate.
    pub replayed: Estimate,
    /// The final logged live estimate, for an event.
    pub live: Option<Estimate>,
    /// Whether every replayed estimate equals the logged one (no overrides).
    pub identical: Option<bool>,
    pub compared: usize,
    pub matching: usize,
    pub csv: Option<String>,
    pub plot: Option<String>,
    pub caution: &'static str,
}

/// Runs a replay and returns what to print.
pub fn run(source: Source, overrides: &Overrides, outputs: &Outputs) -> anyhow::Result<String> {
    let (summary, estimates, reportable) = replay(source, overrides)?;
    let mut summary = summary;
    if let Some(path) = &outputs.csv {
        write_csv(path, &estimates, &summary)?;
        summary.csv = Some(path.display().to_string());
    }
    if let Some(path) = &outputs.plot {
        let labels = ChartLabels {
            tank: &summary.tank,
            event: summary.event,
            params: &summary.params_text,
        };
        plot::write_svg(path, &estimates, &reportable, &labels)?;
        summary.plot = Some(path.display().to_string());
    }
    Ok(if outputs.json {
        serde_json::to_string_pretty(&summary)? + "\n"
    } else {
        human(&summary)
    })
}

/// Replays and returns the summary, every estimate, and the reportable
/// quantities (for the chart).
pub fn replay(
    source: Source,
    overrides: &Overrides,
) -> anyhow::Result<(Summary, Vec<Estimate>, Vec<f64>)> {
    match source {
        Source::Event { db, event, config } => {
            let conn = store::open_read_only(&db)?;
            let row = store::event(&conn, event)?.with_context(|| {
                format!(
                    "there is no event {event} in {}; `leaktally status` lists the open events",
                    db.display()
                )
            })?;
            let config_path = match config {
                Some(p) => p,
                None => match store::heartbeat(&conn)? {
                    Some(h) => PathBuf::from(h.config),
                    None => bail!(
                        "the database does not say which config its daemon used; give --config FILE"
                    ),
                },
            };
            let config = crate::config::load(&config_path).with_context(|| {
                format!(
                    "loading the config {} (give another with --config)",
                    config_path.display()
                )
            })?;
            let (tank, interval) = tank_of(&config, &row.tank)?;
            let params = overrides.apply(row.params);
            let live = store::estimates_of(&conn, row.id, row.revision)?;
            let from = overrides.from_ms.unwrap_or(row.start_ms);
            // A closed event ends with its last live estimate: a sample taken
            // just before the close but stored after it never reached the
            // event, so the replay leaves it out too.
            let end_of_event = row
                .closed_at_ms
                .map(|closed| live.last().map_or(closed, |e| e.at_ms.min(closed)));
            let to = overrides.to_ms.or(end_of_event).unwrap_or(i64::MAX);
            if to < from {
                bail!("--to is before --from; give an end after the start");
            }
            // From one gap limit before the start, so that the estimator can
            // interpolate the level at the start as the live run did.
            let lookback = crate::track::estimator::gap_limit_ms(interval);
            let samples = store::samples_between(&conn, &row.tank, from - lookback, to)?;
            let estimates = run_estimator(tank, params, from, interval, &samples)?;
            let (identical, compared, matching) = if overrides.any() {
                (None, 0, 0)
            } else {
                let matching = estimates.iter().zip(&live).filter(|(a, b)| a == b).count();
                let same = matching == live.len() && live.len() == estimates.len();
                (Some(same), live.len(), matching)
            };
            let summary = Summary {
                event: Some(row.id),
                tank: row.tank.clone(),
                revision: Some(row.revision),
                params,
                params_text: describe_params(&params),
                overrides: overrides.any(),
                // The samples in the range, not the one before it that the
                // start is interpolated from.
                samples: samples.iter().filter(|s| s.at_ms >= from).count(),
                skipped_rows: Vec::new(),
                from: report::utc(from),
                to: report::utc(estimates.last().map_or(from, |e| e.at_ms)),
                replayed: last(&estimates)?,
                live: live.last().cloned(),
                identical,
                compared,
                matching,
                csv: None,
                plot: None,
                caution: report::CAUTION,
            };
            let reportable = tank.reportable.iter().map(|m| m.si()).collect();
            Ok((summary, estimates, reportable))
        }
        Source::Readings { file, tank, config } => {
            let config = crate::config::load(&config)?;
            let (t, interval) = tank_of(&config, &tank)?;
            let data = readings::read(&file, &tank)?;
            let first = data.samples[0].at_ms;
            let from = overrides.from_ms.unwrap_or(first);
            let to = overrides.to_ms.unwrap_or(i64::MAX);
            let samples: Vec<TankSample> = data
                .samples
                .into_iter()
                .filter(|s| {
                    s.at_ms >= from - crate::track::estimator::gap_limit_ms(interval)
                        && s.at_ms <= to
                })
                .collect();
            let params = overrides.apply(LeakParams::default());
            let estimates = run_estimator(t, params, from, interval, &samples)?;
            let summary = Summary {
                event: None,
                tank: tank.clone(),
                revision: None,
                params,
                params_text: describe_params(&params),
                overrides: overrides.any(),
                samples: samples.len(),
                skipped_rows: data.skipped,
                from: report::utc(from),
                to: report::utc(estimates.last().map_or(from, |e| e.at_ms)),
                replayed: last(&estimates)?,
                live: None,
                identical: None,
                compared: 0,
                matching: 0,
                csv: None,
                plot: None,
                caution: report::CAUTION,
            };
            Ok((
                summary,
                estimates,
                t.reportable.iter().map(|m| m.si()).collect(),
            ))
        }
    }
}

fn tank_of<'a>(config: &'a Config, tank: &str) -> anyhow::Result<(&'a Tank, i64)> {
    let t = config
        .tanks
        .iter()
        .find(|t| t.id == tank)
        .with_context(|| {
            let known: Vec<&str> = config.tanks.iter().map(|t| t.id.as_str()).collect();
            format!(
                "there is no tank {tank:?} in {}; the tanks are: {}",
                config.path.display(),
                known.join(", ")
            )
        })?;
    Ok((t, config.devices[t.device].poll_interval.as_millis() as i64))
}

fn last(estimates: &[Estimate]) -> anyhow::Result<Estimate> {
    estimates
        .last()
        .cloned()
        .context("no usable sample in the range: nothing to replay (check --from and --to)")
}

/// Feeds the samples to a fresh estimator, with progress on a terminal for
/// long replays.
fn run_estimator(
    tank: &Tank,
    params: LeakParams,
    from: i64,
    interval: i64,
    samples: &[TankSample],
) -> anyhow::Result<Vec<Estimate>> {
    let mut estimator = Estimator::new(tank, params, from, interval)?;
    let progress = std::io::stderr().is_terminal() && samples.len() > 50_000;
    let step = (samples.len() / 20).max(1);
    let mut out = Vec::with_capacity(samples.len());
    for (i, s) in samples.iter().enumerate() {
        if let Some(e) = estimator.push(s) {
            out.push(e);
        }
        if progress && i % step == 0 {
            eprint!(
                "\rreplaying: {:>3} % of {} samples",
                100 * i / samples.len(),
                samples.len()
            );
        }
    }
    if progress {
        eprintln!("\rreplaying: 100 % of {} samples", samples.len());
    }
    Ok(out)
}

/// One row of the replay's time series.
#[derive(Serialize)]
struct Row<'a> {
    time: String,
    at_ms: i64,
    level_m: f64,
    driving_pressure_pa: f64,
    rate_kg_s: f64,
    released_best_kg: f64,
    released_low_kg: f64,
    released_high_kg: f64,
    inventory_kg: Option<f64>,
    method: &'a str,
    samples_used: u64,
    samples_skipped: u64,
    gaps_bridged: u64,
    after_gap: bool,
}

fn write_csv(path: &Path, estimates: &[Estimate], summary: &Summary) -> anyhow::Result<()> {
    let mut w =
        csv::Writer::from_path(path).with_context(|| format!("writing {}", path.display()))?;
    let z = summary.params.hole_height_m;
    for e in estimates {
        let column = (e.level_m - z).max(0.0);
        let driving = if column > 0.0 {
            (e.headspace_pa + e.density_kg_m3 * crate::model::STANDARD_GRAVITY * column).max(0.0)
        } else {
            e.headspace_pa.max(0.0)
        };
        w.serialize(Row {
            time: jiff::Timestamp::from_millisecond(e.at_ms)
                .map(|t| t.to_string())
                .unwrap_or_default(),
            at_ms: e.at_ms,
            level_m: e.level_m,
            driving_pressure_pa: driving,
            rate_kg_s: e.rate_best_kg_s,
            released_best_kg: e.released_best_kg,
            released_low_kg: e.released_low_kg,
            released_high_kg: e.released_high_kg,
            inventory_kg: e.inventory_kg,
            method: e.method.code(),
            samples_used: e.quality.samples_used,
            samples_skipped: e.quality.samples_skipped,
            gaps_bridged: e.quality.gaps_bridged,
            after_gap: e.after_gap,
        })?;
    }
    w.flush()?;
    Ok(())
}

/// The summary for people.
pub fn human(s: &Summary) -> String {
    let kg = |x: f64| report::mass(Mass::kilograms(x));
    let mut out = String::new();
    let what = match s.event {
        Some(id) => format!(
            "event {id}, tank {} (revision {})",
            s.tank,
            s.revision.unwrap_or(1)
        ),
        None => format!("readings of tank {}", s.tank),
    };
    let _ = writeln!(
        out,
        "Replay of {what}: {} samples from {} to {}",
        s.samples, s.from, s.to
    );
    let _ = writeln!(
        out,
        "parameters   {}{}",
        s.params_text,
        if s.overrides {
            " (changed for this replay)"
        } else {
            ""
        }
    );
    if !s.skipped_rows.is_empty() {
        let _ = writeln!(
            out,
            "skipped      {} row(s) of the readings file:",
            s.skipped_rows.len()
        );
        for m in s.skipped_rows.iter().take(10) {
            let _ = writeln!(out, "               {m}");
        }
    }
    let r = &s.replayed;
    let column = |label: &str, replayed: String, live: Option<String>| {
        format!("{label:<14}{replayed:<34}{}\n", live.unwrap_or_default())
    };
    let live = s.live.as_ref();
    out += &column("", "replayed".into(), live.map(|_| "logged live".into()));
    out += &column(
        "released",
        kg(r.released_best_kg),
        live.map(|l| kg(l.released_best_kg)),
    );
    out += &column(
        "band",
        format!("{} to {}", kg(r.released_low_kg), kg(r.released_high_kg)),
        live.map(|l| format!("{} to {}", kg(l.released_low_kg), kg(l.released_high_kg))),
    );
    out += &column(
        "rate at end",
        report::rate(MassRate::kg_per_second(r.rate_best_kg_s)),
        live.map(|l| report::rate(MassRate::kg_per_second(l.rate_best_kg_s))),
    );
    out += &column(
        "method",
        report::estimate::method_name(r.method).into(),
        live.map(|l| report::estimate::method_name(l.method).into()),
    );
    let hole = |e: &Estimate| {
        e.fitted_diameter_m
            .map_or("-".to_owned(), |d| format!("{:.1} mm", d * 1000.0))
    };
    out += &column("fitted hole", hole(r), live.map(hole));
    out += &column(
        "inventory",
        r.inventory_kg.map_or("-".into(), kg),
        live.map(|l| l.inventory_kg.map_or("-".into(), kg)),
    );
    let _ = writeln!(
        out,
        "volume       {}",
        report::volumes(
            Mass::kilograms(r.released_best_kg),
            Density::kg_per_cubic_metre(r.density_kg_m3)
        )
    );
    if let Some(f) = &r.forecast {
        let _ = writeln!(
            out,
            "forecast     at the end: flow stops {} later at {:.2} m, total then {}",
            report::duration(TimeSpan::seconds(f.stops_after_s)),
            f.stop_level_m,
            kg(f.total_at_stop_kg)
        );
    }
    for c in &r.crossings {
        let when = c.at_ms.map_or("not reached".to_owned(), |t| {
            format!("crossed at {}", report::utc(t))
        });
        let _ = writeln!(out, "reportable   {}: {when}", kg(c.quantity_kg));
    }
    match s.identical {
        Some(true) => {
            let _ = writeln!(
                out,
                "The replay reproduces the logged live figures exactly ({} of {} estimates identical).",
                s.matching, s.compared
            );
        }
        Some(false) => {
            let _ = writeln!(
                out,
                "WARNING: the replay differs from the logged live figures ({} of {} estimates identical); the config may have changed since.",
                s.matching, s.compared
            );
        }
        None => {}
    }
    if let Some(p) = &s.csv {
        let _ = writeln!(out, "time series  {p}");
    }
    if let Some(p) = &s.plot {
        let _ = writeln!(out, "chart        {p}");
    }
    let _ = writeln!(out, "\n{}", s.caution);
    out
}
