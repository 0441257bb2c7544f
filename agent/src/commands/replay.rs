//! `leaktally replay`: run logged samples (or a historian's readings)
//! through the estimator again, with the parameters changed if asked.
//!
//! It is the very estimator the daemon runs, fed the very samples the daemon
//! stored, so with no overrides it reproduces the logged live figures
//! exactly, and says so by comparing every estimate with its logged twin.
//! Outputs: a summary for people (with the cautions) or a JSON document,
//! the time series as CSV, and a chart as SVG.
//!
//! A replay runs in bounded memory whatever its length: samples are read a
//! page at a time (from the database) or a row at a time (from a readings
//! file), each estimate goes to the CSV as it comes and into a thinned chart
//! series, and the live estimates are read a page at a time beside the
//! replayed ones. The one exception is a readings file out of time order:
//! its rows are sorted in memory, as compact tuples of 48 bytes, never as
//! estimates.
//!
//! Outputs never replace inputs (the readings, its columns file, the
//! config, the database and its journal files), an existing output is
//! replaced only with `--force`, and each output is written to a temporary
//! file beside it and renamed into place when the replay has succeeded, so
//! an interrupted replay never leaves half a file under the final name.

use super::args::{ParamChangeArgs, SiteArgs};
use crate::acquire::sample::TankSample;
use crate::actions::parse_since;
use crate::config::{Config, Tank};
use crate::estimate::{Estimate, Figures, LeakParams, ParamChange};
use crate::estimator::Estimator;
use crate::model::{Density, Mass, MassRate, TimeSpan};
use crate::plot::{self, ChartLabels, ChartSeries};
use crate::readings::{self, Import, ImportReport, Layout, Target, TimeOrder, Verdict};
use crate::report::{self, estimate::describe_params};
use crate::store;
use anyhow::{Context, bail};
use serde::Serialize;
use std::collections::VecDeque;
use std::fmt::Write as _;
use std::fs::File;
use std::io::{IsTerminal, Write as _};
use std::path::{Path, PathBuf};

/// `leaktally replay`'s options.
#[derive(Debug, clap::Args)]
pub struct ReplayArgs {
    /// The event's id (leave out with --readings).
    #[arg(required_unless_present = "readings", value_parser = super::args::event_id)]
    pub event: Option<i64>,
    /// A CSV of timestamped readings instead of a logged event (see the
    /// README for the columns); needs --tank and the site config.
    #[arg(value_parser = crate::commands::args::path_arg, long, requires = "tank", conflicts_with = "event")]
    pub readings: Option<PathBuf>,
    #[command(flatten)]
    pub layout: Box<ReadingsArgs>,
    /// The tank the readings are from.
    #[arg(long)]
    pub tank: Option<String>,
    #[command(flatten)]
    pub changes: ParamChangeArgs,
    /// Start the replay here instead of at the event's start (a time, a
    /// UTC time, or how long ago, as for `leak open --since`).
    #[arg(long)]
    pub from: Option<String>,
    /// End the replay here.
    #[arg(long)]
    pub to: Option<String>,
    /// Write the time series to this CSV file.
    #[arg(value_parser = crate::commands::args::path_arg, long, value_name = "FILE")]
    pub csv: Option<PathBuf>,
    /// Write a chart of rate and cumulative release to this SVG file.
    #[arg(value_parser = crate::commands::args::path_arg, long, value_name = "FILE.svg")]
    pub plot: Option<PathBuf>,
    /// Print the summary as JSON.
    #[arg(long)]
    pub json: bool,
    /// Replace the --csv and --plot files if they exist.
    #[arg(long)]
    pub force: bool,
    /// The site config (for an event, default: the site's, else the one
    /// its daemon ran with) and the database.
    #[command(flatten)]
    pub site: SiteArgs,
}

/// How to read a readings file (`replay --readings`), beyond its header.
/// Boxed in the command: parsed once, and it would make every other
/// subcommand's value as large.
#[derive(Debug, Clone, clap::Args)]
pub struct ReadingsArgs {
    /// What a column of the readings holds, e.g. "PT-14 [kPa(g)]=pressure,kPa,gauge":
    /// QUANTITY (time, level, pressure, transfer, temperature, tank or unused),
    /// then the unit, and for pressure gauge|absolute and headspace|tap=M;
    /// repeat for more columns.
    #[arg(
        long = "column",
        value_name = "NAME=QUANTITY,UNIT,...",
        requires = "readings"
    )]
    pub column: Vec<String>,
    /// A TOML file describing the readings' columns and format (default:
    /// <readings file>.columns.toml beside it, when there is one).
    #[arg(value_parser = crate::commands::args::path_arg, long = "columns", value_name = "FILE.toml", requires = "readings")]
    pub columns_file: Option<PathBuf>,
    /// The readings' field separator: , ; tab | or space (default: read
    /// from the header line).
    #[arg(long, value_name = "CHAR", requires = "readings")]
    pub separator: Option<String>,
    /// The readings write decimals with a comma (1,5).
    #[arg(long, requires = "readings")]
    pub decimal_comma: bool,
    /// The time zone of readings times written without an offset: an IANA
    /// name (Europe/Berlin), UTC, or an offset (+01:00). Default UTC.
    #[arg(long, value_name = "ZONE", requires = "readings")]
    pub time_zone: Option<String>,
    /// How the readings write times: auto, unix_s, unix_ms, or a strftime
    /// pattern such as "%d.%m.%Y %H:%M:%S".
    #[arg(long, value_name = "FORMAT", requires = "readings")]
    pub time_format: Option<String>,
    /// The headspace gauge pressure, kPa, held for the whole readings file,
    /// for a file with no pressure column.
    #[arg(
        long,
        value_name = "KPA",
        requires = "readings",
        allow_negative_numbers = true
    )]
    pub headspace: Option<f64>,
}

/// Runs `leaktally replay` as the command line gave it: checks the options,
/// replays and prints the summary.
pub fn command(args: ReplayArgs) -> anyhow::Result<()> {
    let ReplayArgs {
        event,
        readings,
        layout,
        tank,

        changes,
        from,
        to,
        csv,
        plot,
        json,
        force,
        site,
    } = args;
    let now = store::now_ms();
    // The database and the site's zone from one reading of the config; a
    // readings file needs no database, so its absence is no error yet.
    let resolved = site.database();
    let zone = match &resolved {
        Ok((_, people)) => people.zone.clone(),
        Err(_) => site.presentation().zone,
    };
    let when = |t: Option<String>| t.map(|t| parse_since(&t, now, &zone)).transpose();
    let config = site.config_path();
    let overrides = Overrides {
        change: changes.change()?,
        from_ms: when(from)?,
        to_ms: when(to)?,
    };
    if let Some(p) = &plot
        && p.extension().is_none_or(|e| e != "svg")
    {
        anyhow::bail!(
            "--plot {}: the chart is written as SVG; give a file name ending in .svg",
            p.display()
        );
    }
    let mut protect = Vec::new();
    let source = match (event, readings) {
        (_, Some(file)) => {
            if let Ok((db, _)) = &resolved {
                protect.push(db.clone());
            }
            Source::Readings {
                file,
                tank: tank.unwrap_or_default(),
                config: site.config.required_path()?,
                options: ReadingsOptions {
                    columns: layout.column,
                    columns_file: layout.columns_file,
                    separator: layout.separator,
                    decimal_comma: layout.decimal_comma,
                    time_zone: layout.time_zone,
                    time_format: layout.time_format,
                    headspace_kpa: layout.headspace,
                },
            }
        }
        (Some(event), None) => Source::Event {
            db: resolved?.0,
            event,
            config,
        },
        (None, None) => {
            anyhow::bail!(
                "give an event id (`leaktally events` lists them), or --readings FILE with --tank"
            )
        }
    };
    let outputs = Outputs {
        csv,
        plot,
        json,
        force,
        protect,
    };
    print!("{}", run(source, &overrides, &outputs)?);
    Ok(())
}

/// What a replay changes: the parameters (`None` keeps the logged value)
/// and the stretch replayed.
#[derive(Debug, Clone, Default)]
pub struct Overrides {
    pub change: ParamChange,
    pub from_ms: Option<i64>,
    pub to_ms: Option<i64>,
}

impl Overrides {
    fn any(&self) -> bool {
        !self.change.is_empty() || self.from_ms.is_some() || self.to_ms.is_some()
    }
}

/// How to read a readings file, from the command line.
#[derive(Debug, Clone, Default)]
pub struct ReadingsOptions {
    /// `--column NAME=SPEC`, in order.
    pub columns: Vec<String>,
    /// `--columns FILE.toml`; without it, `<readings>.columns.toml` beside
    /// the file is used when it exists.
    pub columns_file: Option<PathBuf>,
    pub separator: Option<String>,
    pub decimal_comma: bool,
    pub time_zone: Option<String>,
    pub time_format: Option<String>,
    /// `--headspace`: gauge headspace pressure held for the whole file, kPa.
    pub headspace_kpa: Option<f64>,
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
        options: ReadingsOptions,
    },
}

/// Where the outputs go.
#[derive(Debug, Clone, Default)]
pub struct Outputs {
    pub csv: Option<PathBuf>,
    pub plot: Option<PathBuf>,
    pub json: bool,
    /// Replace existing output files.
    pub force: bool,
    /// Further files no output may replace (the database, for a readings
    /// replay, which does not open it).
    pub protect: Vec<PathBuf>,
}

/// The version of the summary document (`replay --json`); fields are only
/// ever added within a version. 1: `from` and `to` RFC 3339 UTC.
pub const FORMAT: u32 = 1;

/// The version of the time series CSV (`replay --csv`): columns are only
/// ever appended. 2: `time` RFC 3339 UTC with milliseconds, `method` a code
/// (`orifice_given_hole`, `fitted_hole`, `inventory_balance`, `no_data`, as
/// in the JSON) and `method_text` its words.
pub const CSV_FORMAT: u32 = 2;

/// The replay's summary document (`--json`).
#[derive(Debug, Clone, Serialize)]
pub struct Summary {
    pub format: u32,
    pub event: Option<i64>,
    pub tank: String,
    pub revision: Option<i64>,
    pub params: LeakParams,
    pub params_text: String,
    pub overrides: bool,
    pub samples: usize,
    /// Rows of a readings file that were skipped, with their messages (the
    /// first 100; `readings.rows_skipped` counts them all).
    pub skipped_rows: Vec<String>,
    /// How a readings file was read: every column used or unused, the
    /// pressure conversion, repeated and out-of-order times, warnings.
    pub readings: Option<ImportReport>,
    /// RFC 3339 UTC.
    pub from: String,
    /// RFC 3339 UTC.
    pub to: String,
    /// The same, ms since 1970 UTC, for the text.
    #[serde(skip)]
    pub from_ms: i64,
    #[serde(skip)]
    pub to_ms: i64,
    /// The site's zone and units, for the text; not in the document.
    #[serde(skip)]
    pub site: report::Presentation,
    /// The final replayed estimate.
    pub replayed: Estimate,
    /// The same in words: why, the fit, the band, every warning.
    pub replayed_words: report::estimate::Words,
    /// The density the replayed figures use, and why that one, in words.
    pub density_text: String,
    /// The final logged live estimate, for an event.
    pub live: Option<Estimate>,
    /// The estimator version that logged the live figures (absent: an
    /// event logged before the version was kept).
    pub live_estimator_version: Option<u32>,
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
    let summary = match source {
        Source::Event { db, event, config } => {
            replay_event(&db, event, config, overrides, outputs)?
        }
        Source::Readings {
            file,
            tank,
            config,
            options,
        } => replay_readings(&file, &tank, &config, &options, overrides, outputs)?,
    };
    Ok(if outputs.json {
        serde_json::to_string_pretty(&summary)? + "\n"
    } else {
        human(&summary)
    })
}

fn replay_event(
    db: &Path,
    event: i64,
    config: Option<PathBuf>,
    overrides: &Overrides,
    outputs: &Outputs,
) -> anyhow::Result<Summary> {
    let conn = store::open_read_only(db)?;
    // One read transaction for the whole replay: every page below sees the
    // same snapshot, in which the daemon's samples and the estimates they
    // produced were committed together.
    let conn = conn
        .unchecked_transaction()
        .with_context(|| format!("reading {}", db.display()))?;
    let row = store::event(&conn, event)?.with_context(|| {
        format!(
            "there is no event {event} in {}; `leaktally events` lists every event",
            db.display()
        )
    })?;
    let config_path = match config {
        Some(p) => p,
        None => match store::heartbeat(&conn)? {
            Some(h) => PathBuf::from(h.config),
            None => {
                bail!("the database does not say which config its daemon used; give --config FILE")
            }
        },
    };
    let mut inputs = database_files(db);
    inputs.push(("the config".to_owned(), config_path.clone()));
    check_outputs(outputs, &inputs)?;
    let config = crate::config::load(&config_path).with_context(|| {
        format!(
            "loading the config {} (give another with --config)",
            config_path.display()
        )
    })?;
    let (tank, interval) = tank_of(&config, &row.tank)?;
    let params = row.params.with(&overrides.change);
    let (live_last, live_version) =
        match store::latest_estimate_with_version(&conn, row.id, row.revision)? {
            Some((e, version)) => (Some(e), version),
            None => (None, None),
        };
    let from = overrides.from_ms.unwrap_or(row.start_ms);
    // A closed event ends with its last live estimate: a sample taken just
    // before the close but stored after it never reached the event, so the
    // replay leaves it out too.
    let end_of_event = row
        .closed_at_ms
        .map(|closed| live_last.as_ref().map_or(closed, |e| e.at_ms.min(closed)));
    let to = overrides.to_ms.or(end_of_event).unwrap_or(i64::MAX);
    if to < from {
        bail!("--to is before --from; give an end after the start");
    }
    let mut estimator = Estimator::new(tank, params, from, interval)?;
    let mut sink = Sink::new(outputs, &inputs, params.hole_height_m)?;
    let mut live = (!overrides.any()).then(|| LiveComparison::new(row.id, row.revision));
    let end = store::last_sample_ms(&conn, &row.tank)?.map_or(from, |last| last.min(to));
    // Pages of a few thousand poll intervals: one sample per poll at most.
    let page_ms = interval.max(1).saturating_mul(4096);
    let mut progress = Progress::new("replaying", (end - from).max(0) as u64, {
        (end - from) / interval.max(1) > 50_000
    });
    let mut samples = 0usize;
    // From one gap limit before the start, so that the estimator can
    // interpolate the level at the start as the live run did; only the
    // samples in the range count as replayed.
    let mut cursor = from.saturating_sub(estimator.lookback_ms());
    while cursor <= end {
        let page_end = cursor.saturating_add(page_ms - 1).min(end);
        for s in store::samples_between(&conn, &row.tank, cursor, page_end)? {
            if s.at_ms >= from {
                samples += 1;
            }
            if let Some(f) = estimator.push(&s) {
                if let Some(live) = live.as_mut() {
                    live.compare(&conn, &f)?;
                }
                sink.take(&f, &mut estimator)?;
            }
            progress.show((s.at_ms - from).max(0) as u64);
        }
        if page_end == i64::MAX {
            break;
        }
        cursor = page_end + 1;
    }
    progress.done();
    let replayed = sink.last(Some(&mut estimator))?;
    // The same figures at every sample, and the same whole estimate at the
    // last (band causes, fit, forecast, crossings, data quality).
    let (identical, compared, matching) = match live.as_mut() {
        Some(live) => {
            live.finish(&conn)?;
            let same = live.matching == live.live
                && live.live == live.replayed
                && live_last.as_ref() == Some(&replayed);
            (Some(same), live.live as usize, live.matching as usize)
        }
        None => (None, 0, 0),
    };
    let mut summary = Summary::of(&row.tank, tank, &config, params, overrides, from, replayed);
    summary.event = Some(row.id);
    summary.revision = Some(row.revision);
    summary.samples = samples;
    summary.live = live_last;
    summary.live_estimator_version = live_version;
    summary.identical = identical;
    summary.compared = compared;
    summary.matching = matching;
    let reportable: Vec<f64> = tank.reportable.iter().map(|m| m.si()).collect();
    sink.finish(&mut summary, &reportable)?;
    Ok(summary)
}

impl Summary {
    /// The summary of a replay of `tank` from `from` that ended at
    /// `replayed`, in the site's presentation; a logged event's replay adds
    /// its id, revision and the comparison with the live figures, a
    /// readings file's its report.
    fn of(
        tank_id: &str,
        tank: &Tank,
        config: &Config,
        params: LeakParams,
        overrides: &Overrides,
        from: i64,
        replayed: Estimate,
    ) -> Self {
        let site = report::Presentation::of(config);
        Summary {
            format: FORMAT,
            event: None,
            tank: tank_id.to_owned(),
            revision: None,
            params,
            params_text: describe_params(&params, &site),
            overrides: overrides.any(),
            samples: 0,
            skipped_rows: Vec::new(),
            readings: None,
            from: report::rfc3339(from),
            to: report::rfc3339(replayed.at_ms),
            from_ms: from,
            to_ms: replayed.at_ms,
            replayed_words: report::estimate::Words::of(&replayed, &params, &site),
            site,
            density_text: density_text(tank, &params, &replayed),
            replayed,
            live: None,
            live_estimator_version: None,
            identical: None,
            compared: 0,
            matching: 0,
            csv: None,
            plot: None,
            caution: report::CAUTION,
        }
    }
}

/// The density an estimate uses, and why: given with `--density` (or
/// logged with the event), the liquid's temperature through the config's
/// expansion data, the config's reference density where no temperature was
/// read, or the config's one density.
fn density_text(tank: &Tank, params: &LeakParams, e: &Estimate) -> String {
    use report::estimate::DensityBasis;
    let basis = match (params.density_kg_m3, e.temperature_k) {
        (Some(_), _) => DensityBasis::Given,
        _ if !tank.density.follows_temperature() => DensityBasis::Fixed,
        (None, Some(t)) => DensityBasis::Temperature(t),
        (None, None) => DensityBasis::Reference,
    };
    report::estimate::density_text(e.density_kg_m3, basis)
}

/// The database and the files SQLite keeps beside it.
fn database_files(db: &Path) -> Vec<(String, PathBuf)> {
    let mut files = vec![("the database".to_owned(), db.to_owned())];
    for suffix in ["-wal", "-shm", "-journal"] {
        let mut name = db.as_os_str().to_owned();
        name.push(suffix);
        files.push((format!("the database's {suffix} file"), PathBuf::from(name)));
    }
    files
}

/// The logged live estimates, read a page at a time and compared one by
/// one with the replayed ones.
struct LiveComparison {
    event: i64,
    revision: i64,
    page: VecDeque<Figures>,
    after_ms: i64,
    exhausted: bool,
    live: u64,
    replayed: u64,
    matching: u64,
}

impl LiveComparison {
    const PAGE: usize = 1024;

    fn new(event: i64, revision: i64) -> Self {
        Self {
            event,
            revision,
            page: VecDeque::new(),
            after_ms: i64::MIN,
            exhausted: false,
            live: 0,
            replayed: 0,
            matching: 0,
        }
    }

    fn next_live(&mut self, conn: &rusqlite::Connection) -> anyhow::Result<Option<Figures>> {
        if self.page.is_empty() && !self.exhausted {
            let page =
                store::figures_after(conn, self.event, self.revision, self.after_ms, Self::PAGE)?;
            self.exhausted = page.len() < Self::PAGE;
            if let Some(last) = page.last() {
                self.after_ms = last.at_ms;
            }
            self.page = page.into();
        }
        let next = self.page.pop_front();
        if next.is_some() {
            self.live += 1;
        }
        Ok(next)
    }

    fn compare(&mut self, conn: &rusqlite::Connection, replayed: &Figures) -> anyhow::Result<()> {
        self.replayed += 1;
        if self
            .next_live(conn)?
            .is_some_and(|live| live.identical(replayed))
        {
            self.matching += 1;
        }
        Ok(())
    }

    /// Counts the live estimates the replay did not reach.
    fn finish(&mut self, conn: &rusqlite::Connection) -> anyhow::Result<()> {
        while self.next_live(conn)?.is_some() {}
        Ok(())
    }
}

fn replay_readings(
    file: &Path,
    tank_id: &str,
    config_path: &Path,
    options: &ReadingsOptions,
    overrides: &Overrides,
    outputs: &Outputs,
) -> anyhow::Result<Summary> {
    let layout = layout_for(file, options)?;
    let mut inputs = vec![
        ("the readings file".to_owned(), file.to_owned()),
        ("the config".to_owned(), config_path.to_owned()),
    ];
    if let Some(c) = &layout.columns_file {
        inputs.push(("the columns file".to_owned(), c.clone()));
    }
    // Checked before the work starts, so a refusal costs nothing; the
    // sink itself is made per pass below.
    check_outputs(outputs, &inputs)?;
    refuse_columns_file_name(outputs, file)?;
    let config = crate::config::load(config_path)?;
    let (tank, interval) = tank_of(&config, tank_id)?;
    let params = LeakParams::default().with(&overrides.change);
    // Parameters are checked before the file is read.
    Estimator::new(tank, params, 0, interval)?;
    let ambient = tank.vessel.ambient().si();
    let stated_headspace_pa = match options.headspace_kpa {
        None => None,
        Some(kpa) if kpa.is_finite() && kpa * 1000.0 > -ambient && kpa < 100_000.0 => {
            Some(kpa * 1000.0)
        }
        Some(kpa) => bail!(
            "--headspace {kpa}: give the headspace as a gauge pressure in kPa, above -{:.3} (a full vacuum at this site's ambient) and below 100,000",
            ambient / 1000.0
        ),
    };
    let target = Target {
        tank,
        other_tanks: config
            .tanks
            .iter()
            .filter(|t| t.id != tank.id)
            .map(|t| t.id.clone())
            .collect(),
        density_kg_m3: params
            .density_kg_m3
            .unwrap_or_else(|| tank.vessel.density().si()),
        stated_headspace_pa,
    };
    let file_size = std::fs::metadata(file).map_or(0, |m| m.len());

    // First pass: stream the rows straight into the estimator, as long as
    // they come in time order; the first row that does not ends the pass,
    // and the second sorts.
    let mut import = Import::open(file, &layout, &target)?;
    let estimator_tank = import.tank_for_estimator(tank, stated_headspace_pa);
    let mut feed = Feed::new(&estimator_tank, params, overrides, interval);
    let mut sink = Sink::new(outputs, &inputs, params.hole_height_m)?;
    let mut order = TimeOrder::default();
    let mut sample = import.blank_sample();
    let mut progress = Progress::new("reading", file_size, file_size > 20_000_000);
    let mut in_order = true;
    while let Some(row) = import.next_row()? {
        match order.judge(&row) {
            Verdict::Next => {
                import.fill_sample(&row, &mut sample);
                feed.push(&sample, &mut sink)?;
            }
            Verdict::Repeat => {}
            Verdict::Earlier => {
                in_order = false;
                break;
            }
        }
        progress.show(import.position());
    }
    let (report, mut feed, sink) = if in_order {
        progress.done();
        let mut report = import.finish();
        order.finish(&mut report, false);
        (report, feed, sink)
    } else {
        drop(sink);
        progress.done();
        // Room for every row at once, estimated from the first pass's bytes
        // per row, so that the vector does not double past the file.
        let expected_rows = (file_size as f64 * import.rows_read() as f64
            / import.position().max(1) as f64
            * 1.05) as usize;
        let mut import = Import::open(file, &layout, &target)?;
        let mut order = TimeOrder::default();
        let mut rows = Vec::with_capacity(expected_rows.min(1 << 28));
        let mut progress = Progress::new("sorting", file_size, file_size > 20_000_000);
        while let Some(row) = import.next_row()? {
            order.note_file_order(&row);
            rows.push(row);
            progress.show(import.position());
        }
        progress.done();
        // By time, then line: rows of the same time keep their file order,
        // so the first of each time in the file is the one used. An
        // unstable sort on that key gives the stable order in place, where
        // a stable sort would want a buffer of half the rows again.
        rows.sort_unstable_by_key(|r| (r.at_ms, r.line));
        let mut feed = Feed::new(&estimator_tank, params, overrides, interval);
        let mut sink = Sink::new(outputs, &inputs, params.hole_height_m)?;
        for row in &rows {
            if order.judge(row) == Verdict::Next {
                import.fill_sample(row, &mut sample);
                feed.push(&sample, &mut sink)?;
            }
        }
        drop(rows);
        let mut report = import.finish();
        order.finish(&mut report, true);
        (report, feed, sink)
    };
    if report.rows_used == 0 {
        return Err(Import::nothing_usable(&report, tank_id));
    }
    // When the estimator could use none of the rows, the warnings usually
    // say why (a level in the wrong unit, say).
    let replayed = sink.last(feed.estimator.as_mut()).map_err(|e| {
        if report.warnings.is_empty() {
            e
        } else {
            anyhow::anyhow!(
                "nothing to replay: {} row(s) read, but the estimator could use none in the range; the readings' warnings:\n  {}",
                report.rows_used,
                report.warnings.join("\n  ")
            )
        }
    })?;
    let from = feed.from.unwrap_or(replayed.at_ms);
    let mut summary = Summary::of(tank_id, tank, &config, params, overrides, from, replayed);
    summary.samples = feed.samples;
    summary.skipped_rows = report.skipped.clone();
    summary.readings = Some(report);
    let reportable: Vec<f64> = tank.reportable.iter().map(|m| m.si()).collect();
    let mut sink = sink;
    sink.finish(&mut summary, &reportable)?;
    Ok(summary)
}

/// The layout of a readings file: its columns file (given, or found beside
/// it), then the command line's settings over it.
fn layout_for(file: &Path, options: &ReadingsOptions) -> anyhow::Result<Layout> {
    let mut layout = match &options.columns_file {
        Some(path) => Layout::from_file(path)?,
        None => {
            let beside = readings::columns_file_beside(file);
            if beside.is_file() {
                Layout::from_file(&beside)?
            } else {
                Layout::default()
            }
        }
    };
    layout.add_command_line(&options.columns)?;
    if let Some(s) = &options.separator {
        layout.separator =
            Some(readings::parse_separator(s).map_err(|e| anyhow::anyhow!("--separator: {e}"))?);
    }
    if options.decimal_comma {
        layout.decimal_comma = true;
    }
    if let Some(z) = &options.time_zone {
        layout.time_zone =
            Some(readings::Zone::parse(z).map_err(|e| anyhow::anyhow!("--time-zone: {e}"))?);
    }
    if let Some(f) = &options.time_format {
        layout.time_format = Some(
            readings::TimeFormat::parse(f).map_err(|e| anyhow::anyhow!("--time-format: {e}"))?,
        );
    }
    Ok(layout)
}

/// Samples into a fresh estimator, made at the first sample when the start
/// is the file's first time.
struct Feed<'a> {
    tank: &'a Tank,
    params: LeakParams,
    interval: i64,
    from: Option<i64>,
    to: i64,
    estimator: Option<Estimator>,
    samples: usize,
}

impl<'a> Feed<'a> {
    fn new(tank: &'a Tank, params: LeakParams, overrides: &Overrides, interval: i64) -> Self {
        Self {
            tank,
            params,
            interval,
            from: overrides.from_ms,
            to: overrides.to_ms.unwrap_or(i64::MAX),
            estimator: None,
            samples: 0,
        }
    }

    fn push(&mut self, sample: &TankSample, sink: &mut Sink) -> anyhow::Result<()> {
        // From one gap limit before `--from`: the estimator interpolates
        // the level at the start from the samples either side of it.
        let lookback = crate::estimator::gap_limit_ms(self.interval);
        if sample.at_ms > self.to
            || self
                .from
                .is_some_and(|from| sample.at_ms < from.saturating_sub(lookback))
        {
            return Ok(());
        }
        let estimator = match &mut self.estimator {
            Some(e) => e,
            None => {
                let from = *self.from.get_or_insert(sample.at_ms);
                self.estimator
                    .insert(Estimator::new(self.tank, self.params, from, self.interval)?)
            }
        };
        if self.from.is_some_and(|from| sample.at_ms >= from) {
            self.samples += 1;
        }
        if let Some(f) = estimator.push(sample) {
            sink.take(&f, estimator)?;
        }
        Ok(())
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

/// Progress on a terminal for long replays.
struct Progress {
    what: &'static str,
    total: u64,
    shown: Option<u64>,
    on: bool,
}

impl Progress {
    fn new(what: &'static str, total: u64, long: bool) -> Self {
        Self {
            what,
            total: total.max(1),
            shown: None,
            on: long && std::io::stderr().is_terminal(),
        }
    }

    fn show(&mut self, done: u64) {
        if !self.on {
            return;
        }
        let percent = (100 * done.min(self.total)) / self.total;
        if self.shown != Some(percent) {
            self.shown = Some(percent);
            eprint!("\r{}: {percent:>3} %", self.what);
        }
    }

    fn done(&mut self) {
        if self.on && self.shown.is_some() {
            eprintln!("\r{}: 100 %", self.what);
        }
        self.on = false;
    }
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
    // Appended after the first format's columns, so readers that take the
    // columns by position keep working.
    /// `liquid`, `vapour` or `none`.
    phase: &'a str,
    /// For vapour, whether the flow is choked; empty otherwise.
    choked: Option<bool>,
    /// The estimate's warning codes, joined by `;`.
    warnings: String,
    /// `method` in words, for people reading the file (its comma a colon,
    /// so that no field needs quoting: `orifice model: given hole`).
    method_text: String,
}

/// Where each estimate goes as it comes: the CSV, the chart's thinned
/// series, and the last one for the summary.
struct Sink {
    csv: Option<(OutputFile, csv::Writer<File>)>,
    chart: Option<(OutputFile, ChartSeries)>,
    /// Whether any sample gave figures.
    any: bool,
    /// For the CSV's driving pressure: the column above the hole.
    hole_height_m: f64,
}

impl Sink {
    /// Checks the outputs against the inputs and opens their temporary
    /// files.
    fn new(
        outputs: &Outputs,
        inputs: &[(String, PathBuf)],
        hole_height_m: f64,
    ) -> anyhow::Result<Self> {
        check_outputs(outputs, inputs)?;
        let csv = match &outputs.csv {
            Some(path) => {
                let (out, file) = OutputFile::create(path, outputs.force)?;
                Some((out, csv::Writer::from_writer(file)))
            }
            None => None,
        };
        let chart = match &outputs.plot {
            Some(path) => Some((
                OutputFile::create(path, outputs.force)?.0,
                ChartSeries::new(ChartSeries::DEFAULT_MAX_POINTS),
            )),
            None => None,
        };
        Ok(Self {
            csv,
            chart,
            any: false,
            hole_height_m,
        })
    }

    /// Takes one sample's figures; the CSV's rows want the whole estimate
    /// (the level, the pressure, the data quality), which the estimator
    /// gives on asking.
    fn take(&mut self, f: &Figures, estimator: &mut Estimator) -> anyhow::Result<()> {
        if let Some((out, w)) = &mut self.csv
            && let Some(e) = estimator.estimate()
        {
            write_row(w, &e, self.hole_height_m)
                .with_context(|| format!("writing {}", out.temporary.display()))?;
        }
        if let Some((_, series)) = &mut self.chart {
            series.push(f);
        }
        self.any = true;
        Ok(())
    }

    /// The whole estimate after the last sample.
    fn last(&self, estimator: Option<&mut Estimator>) -> anyhow::Result<Estimate> {
        estimator
            .filter(|_| self.any)
            .and_then(Estimator::estimate)
            .context("no usable sample in the range: nothing to replay (check --from and --to)")
    }

    /// Writes the chart and puts both outputs in place.
    fn finish(&mut self, summary: &mut Summary, reportable: &[f64]) -> anyhow::Result<()> {
        if let Some((out, writer)) = self.csv.take() {
            let file = writer.into_inner().map_err(|e| {
                anyhow::anyhow!("writing {}: {}", out.temporary.display(), e.error())
            })?;
            summary.csv = Some(out.path.display().to_string());
            out.commit(file)?;
        }
        if let Some((out, series)) = self.chart.take() {
            let labels = ChartLabels {
                tank: &summary.tank,
                event: summary.event,
                params: &summary.params_text,
                last: &summary.replayed,
                leak: &summary.params,
            };
            let svg = plot::render_svg(&series, reportable, &labels, &summary.site)?;
            let mut file = File::options()
                .write(true)
                .open(&out.temporary)
                .with_context(|| format!("writing {}", out.temporary.display()))?;
            file.write_all(svg.as_bytes())
                .with_context(|| format!("writing {}", out.temporary.display()))?;
            summary.plot = Some(out.path.display().to_string());
            out.commit(file)?;
        }
        Ok(())
    }
}

fn write_row(w: &mut csv::Writer<File>, e: &Estimate, hole_height_m: f64) -> anyhow::Result<()> {
    let column = (e.level_m - hole_height_m).max(0.0);
    let driving = if column > 0.0 {
        (e.headspace_pa + e.density_kg_m3 * crate::model::STANDARD_GRAVITY * column).max(0.0)
    } else {
        e.headspace_pa.max(0.0)
    };
    w.serialize(Row {
        time: report::rfc3339(e.at_ms),
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
        phase: report::estimate::phase_code(e.phase),
        choked: e.choked,
        warnings: e
            .warnings
            .iter()
            .map(report::estimate::warning_code)
            .collect::<Vec<_>>()
            .join(";"),
        method_text: report::estimate::method_name(e.method).replace(", ", ": "),
    })?;
    Ok(())
}

/// Refuses outputs that are inputs, the same file twice, or existing files
/// without `--force`.
fn check_outputs(outputs: &Outputs, inputs: &[(String, PathBuf)]) -> anyhow::Result<()> {
    let named: Vec<(&str, &PathBuf)> = [("--csv", &outputs.csv), ("--plot", &outputs.plot)]
        .into_iter()
        .filter_map(|(flag, p)| p.as_ref().map(|p| (flag, p)))
        .collect();
    let protected: Vec<(String, PathBuf)> = inputs
        .iter()
        .cloned()
        .chain(outputs.protect.iter().flat_map(|db| database_files(db)))
        .collect();
    for (i, (flag, path)) in named.iter().enumerate() {
        if path.is_dir() {
            bail!(
                "{flag} {}: that is a folder; give a file name",
                path.display()
            );
        }
        let folder = match path.parent() {
            Some(p) if !p.as_os_str().is_empty() => p,
            _ => Path::new("."),
        };
        if !folder.is_dir() {
            bail!(
                "{flag} {}: the folder {} does not exist; create it or give another path",
                path.display(),
                folder.display()
            );
        }
        for (what, input) in &protected {
            if same_file(path, input) {
                bail!(
                    "{flag} {}: that is {what} ({}), an input of this replay; an output never replaces an input, so give another file name",
                    path.display(),
                    input.display()
                );
            }
        }
        for (other_flag, other) in &named[..i] {
            if same_file(path, other) {
                bail!(
                    "{flag} {} is the same file as {other_flag} {}; give each output its own file",
                    path.display(),
                    other.display()
                );
            }
        }
        if !outputs.force && std::fs::symlink_metadata(path).is_ok() {
            bail!(
                "{flag} {}: the file exists and was left as it is; give --force to replace it, or another name",
                path.display()
            );
        }
    }
    Ok(())
}

/// Refuses an output named as the readings file's columns file
/// (`FILE.columns.toml` beside it), whether or not that exists: the next
/// replay of the readings would take the output for its columns file.
fn refuse_columns_file_name(outputs: &Outputs, readings: &Path) -> anyhow::Result<()> {
    let beside = readings::columns_file_beside(readings);
    for (flag, path) in [("--csv", &outputs.csv), ("--plot", &outputs.plot)] {
        if let Some(path) = path
            && same_file(path, &beside)
        {
            bail!(
                "{flag} {}: that is the name of the readings file's columns file ({}), which every replay of {} reads by itself when it exists; an output never takes an input's name, so give another file name",
                path.display(),
                beside.display(),
                readings.display()
            );
        }
    }
    Ok(())
}

/// A path made absolute with every symlink resolved, also for a file that
/// does not exist yet (through its folder).
fn identity(path: &Path) -> Option<PathBuf> {
    if let Ok(p) = std::fs::canonicalize(path) {
        return Some(p);
    }
    let folder = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    Some(std::fs::canonicalize(folder).ok()?.join(path.file_name()?))
}

/// Whether two paths name one file: the same canonical path, or (for files
/// that exist) the same device and inode, which also catches hard links
/// and case-insensitive file systems.
fn same_file(a: &Path, b: &Path) -> bool {
    if let (Some(x), Some(y)) = (identity(a), identity(b))
        && x == y
    {
        return true;
    }
    #[cfg(unix)]
    {
        use std::os::unix::fs::MetadataExt;
        if let (Ok(x), Ok(y)) = (std::fs::metadata(a), std::fs::metadata(b)) {
            return x.dev() == y.dev() && x.ino() == y.ino();
        }
    }
    false
}

/// An output being written: a temporary file beside its final path, put in
/// place by [`OutputFile::commit`] and removed if the replay fails first.
struct OutputFile {
    path: PathBuf,
    temporary: PathBuf,
    force: bool,
    committed: bool,
}

impl OutputFile {
    fn create(path: &Path, force: bool) -> anyhow::Result<(Self, File)> {
        let folder = match path.parent() {
            Some(p) if !p.as_os_str().is_empty() => p,
            _ => Path::new("."),
        };
        let name = path.file_name().unwrap_or_default().to_string_lossy();
        for attempt in 0..100 {
            let temporary = folder.join(format!(".{name}.{}.{attempt}.tmp", std::process::id()));
            match File::options()
                .write(true)
                .create_new(true)
                .open(&temporary)
            {
                Ok(file) => {
                    return Ok((
                        Self {
                            path: path.to_owned(),
                            temporary,
                            force,
                            committed: false,
                        },
                        file,
                    ));
                }
                Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => continue,
                Err(e) => {
                    return Err(e).with_context(|| {
                        format!(
                            "cannot write in {} (for {})",
                            folder.display(),
                            path.display()
                        )
                    });
                }
            }
        }
        bail!(
            "cannot make a temporary file beside {}: 100 names taken",
            path.display()
        )
    }

    /// Flushes `file` to disk and puts it under the final name: replacing
    /// an existing file only with `--force`, and otherwise by a hard link,
    /// which fails rather than replace a file that appeared meanwhile.
    fn commit(mut self, file: File) -> anyhow::Result<()> {
        file.sync_all()
            .with_context(|| format!("writing {}", self.temporary.display()))?;
        drop(file);
        if self.force {
            std::fs::rename(&self.temporary, &self.path)
                .with_context(|| format!("putting {} in place", self.path.display()))?;
        } else {
            match std::fs::hard_link(&self.temporary, &self.path) {
                Ok(()) => {
                    let _ = std::fs::remove_file(&self.temporary);
                }
                Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => bail!(
                    "{}: the file appeared while the replay ran and was left as it is; give --force to replace it, or another name",
                    self.path.display()
                ),
                // A file system without hard links: the check before the
                // replay stands in.
                Err(_) => std::fs::rename(&self.temporary, &self.path)
                    .with_context(|| format!("putting {} in place", self.path.display()))?,
            }
        }
        self.committed = true;
        Ok(())
    }
}

impl Drop for OutputFile {
    fn drop(&mut self) {
        if !self.committed {
            let _ = std::fs::remove_file(&self.temporary);
        }
    }
}

/// The summary for people.
pub fn human(s: &Summary) -> String {
    let p = &s.site;
    let kg = |x: f64| p.mass(Mass::kilograms(x));
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
        s.samples,
        p.time(s.from_ms),
        p.time(s.to_ms)
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
    if let Some(r) = &s.readings {
        let _ = write!(out, "{r}");
    }
    let r = &s.replayed;
    let w = &s.replayed_words;
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
    let model = |e: &Estimate| e.model_kg.map_or("-".to_owned(), kg);
    out += &column("orifice model", model(r), live.map(model));
    out += &column(
        "rate at end",
        p.rate(MassRate::kg_per_second(r.rate_best_kg_s)),
        live.map(|l| p.rate(MassRate::kg_per_second(l.rate_best_kg_s))),
    );
    out += &column(
        "method",
        report::estimate::method_name(r.method).into(),
        live.map(|l| report::estimate::method_name(l.method).into()),
    );
    let area = |e: &Estimate| {
        e.fit
            .area()
            .map_or("-".to_owned(), |(_, k, _)| match p.units {
                report::presentation::Units::Metric => {
                    format!("Cd·A {} mm²", report::number(k * 1e6))
                }
                report::presentation::Units::UsCustomary => format!(
                    "Cd·A {} in²",
                    report::number(k * report::presentation::INCHES_PER_M.powi(2))
                ),
            })
    };
    out += &column("fitted hole", area(r), live.map(area));
    out += &column(
        "inventory",
        r.inventory_kg.map_or("-".into(), kg),
        live.map(|l| l.inventory_kg.map_or("-".into(), kg)),
    );
    let _ = writeln!(out, "phase        {}", w.phase_text);
    let _ = writeln!(out, "density      {}", s.density_text);
    let _ = writeln!(out, "best from    {}", w.method_reason);
    let _ = writeln!(out, "band from    {}", w.band_text);
    let _ = writeln!(out, "fitted hole  {}", w.fit_status);
    if let Some(text) = &w.implied_cd_text {
        let _ = writeln!(out, "implied Cd   {text}");
    }
    for warning in &w.warnings_text {
        let _ = writeln!(out, "WARNING      {warning}");
    }
    if r.phase == crate::estimate::PhaseName::Vapour {
        let _ = writeln!(
            out,
            "volume       none: the release is vapour (gas), not liquid"
        );
    } else {
        let _ = writeln!(
            out,
            "volume       {}",
            p.volume(
                Mass::kilograms(r.released_best_kg),
                Density::kg_per_cubic_metre(r.density_kg_m3)
            )
        );
    }
    if let Some(f) = &r.forecast {
        let _ = writeln!(
            out,
            "forecast     at the end: flow stops {} later at {}, total then {}",
            report::duration(TimeSpan::seconds(f.stops_after_s)),
            p.length(f.stop_level_m),
            kg(f.total_at_stop_kg)
        );
    }
    for c in &r.crossings {
        let _ = writeln!(
            out,
            "reportable   {}: {}",
            kg(c.quantity_kg),
            report::estimate::crossing_text(c, p)
        );
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
            let why = if s.live_estimator_version != Some(crate::estimate::ESTIMATOR_VERSION) {
                "the event was logged by another version of leaktally's estimator, which gives other figures for the same samples (the replay's are this version's)"
            } else {
                "the config may have changed since"
            };
            let _ = writeln!(
                out,
                "WARNING: the replay differs from the logged live figures ({} of {} estimates identical); {why}.",
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
