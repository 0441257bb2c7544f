//! The command line: subcommands and their options, and dispatch to the
//! library. Parsing is clap's; each subcommand's work lives in `commands`.

use crate::commands;
// Re-exported so that code outside the crate (the property tests in the root
// package, which has no clap dependency of its own) can bring the trait into
// scope and call `Cli::try_parse_from`.
pub use clap::Parser;
use clap::Subcommand;
use std::path::PathBuf;

/// Running released-quantity estimates for leaking tanks. Estimates for
/// emergency planning, not measurements.
#[derive(Debug, Parser)]
#[command(name = "leaktally", version, about, long_about = None)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the simulator and the agent on an invented site, flag a leak and
    /// show the running totals live (about a minute; Ctrl-C stops it).
    Demo {
        /// How long to track the leak after flagging it, seconds.
        #[arg(long, default_value_t = 60)]
        seconds: u64,
    },
    /// Run a logged event (or a historian's readings) through the estimator
    /// again, with changed parameters if asked; export CSV, SVG or JSON.
    Replay {
        /// The event's id (leave out with --readings).
        #[arg(required_unless_present = "readings")]
        event: Option<i64>,
        /// A CSV of timestamped readings instead of a logged event (see the
        /// README for the columns); needs --tank and --config.
        #[arg(long, requires_all = ["tank", "config"], conflicts_with = "event")]
        readings: Option<PathBuf>,
        #[command(flatten)]
        layout: Box<ReadingsArgs>,
        /// The tank the readings are from.
        #[arg(long)]
        tank: Option<String>,
        /// The site config (default for an event: the one its daemon ran with).
        #[arg(long, short)]
        config: Option<PathBuf>,
        #[command(flatten)]
        changes: ParamChanges,
        /// Start the replay here instead of at the event's start (a time, a
        /// UTC time, or how long ago, as for `leak open --since`).
        #[arg(long)]
        from: Option<String>,
        /// End the replay here.
        #[arg(long)]
        to: Option<String>,
        /// Write the time series to this CSV file.
        #[arg(long, value_name = "FILE")]
        csv: Option<PathBuf>,
        /// Write a chart of rate and cumulative release to this SVG file.
        #[arg(long, value_name = "FILE.svg")]
        plot: Option<PathBuf>,
        /// Print the summary as JSON.
        #[arg(long)]
        json: bool,
        /// Replace the --csv and --plot files if they exist.
        #[arg(long)]
        force: bool,
        /// The SQLite database the daemon writes.
        #[arg(long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
    /// Pre-planning figures for a tank and hole sizes that have not happened:
    /// liquid below the surface, the headspace gas above it.
    Whatif {
        /// The tank's id (tag) in the config.
        #[arg(long)]
        tank: String,
        /// The site config (TOML).
        #[arg(long, short, default_value = "leaktally.toml")]
        config: PathBuf,
        /// Hole diameters in mm, comma-separated (default: 6.35,25.4,101.6,
        /// the small, medium and large holes of risk-based inspection).
        #[arg(long, value_name = "MM[,MM...]", conflicts_with = "hole_area")]
        hole_diameter: Option<String>,
        /// Hole areas in mm², comma-separated, instead of diameters (each
        /// taken as the round hole of that area).
        #[arg(long, value_name = "MM2[,MM2...]")]
        hole_area: Option<String>,
        /// Height of the hole above the tank bottom, m (default: the bottom,
        /// which releases the most). Above the liquid, the headspace gas vents.
        #[arg(long, value_name = "M", allow_negative_numbers = true)]
        hole_height: Option<f64>,
        /// Liquid level, m (default: 90 % of the tank's height).
        #[arg(long, value_name = "M", allow_negative_numbers = true)]
        level: Option<f64>,
        /// Also give the time until the liquid falls to this level, m.
        #[arg(long, value_name = "M", allow_negative_numbers = true)]
        to_level: Option<f64>,
        /// Headspace pressure, kPa gauge (default: the last logged reading
        /// with --db, else the config's nominal_headspace_kpa or
        /// headspace_kpa, else 0 with a warning).
        #[arg(
            long,
            value_name = "KPA",
            allow_negative_numbers = true,
            conflicts_with = "headspace_abs"
        )]
        headspace: Option<f64>,
        /// Headspace pressure, kPa absolute, instead of --headspace.
        #[arg(long, value_name = "KPA", allow_negative_numbers = true)]
        headspace_abs: Option<f64>,
        /// Read the tank's last good pressure from this database (read-only)
        /// for the headspace.
        #[arg(long, value_name = "FILE")]
        db: Option<PathBuf>,
        /// Horizons for the released totals, comma-separated (default:
        /// 15m,1h), like 5m,30m,2h.
        #[arg(long, value_name = "T[,T...]")]
        horizons: Option<String>,
        /// For a hole above the liquid: a blanket regulator keeps feeding pad
        /// gas at up to this rate, with its unit: 50Nm3/h (0 °C, 101.325
        /// kPa), 60kg/h or 0.02kg/s (default: off).
        #[arg(long, value_name = "RATE")]
        blanket_supply: Option<String>,
        /// Discharge coefficient, 0.1 to 1 (default 1.0, conservative).
        #[arg(long, allow_negative_numbers = true)]
        cd: Option<f64>,
        /// Print JSON instead of the tables.
        #[arg(long)]
        json: bool,
    },
    /// Validate a config file, show the tanks, registers and reads, and read
    /// each block of every device once (exit 2 if a device or read fails).
    Check {
        /// The site config (TOML).
        #[arg(long, short)]
        config: PathBuf,
        /// Only validate and describe: do not read the devices.
        #[arg(long)]
        offline: bool,
    },
    /// Read the configured devices and print each sample as a JSON line.
    Poll {
        /// The site config (TOML).
        #[arg(long, short)]
        config: PathBuf,
        /// Stop after this many seconds (default: until Ctrl-C).
        #[arg(long)]
        seconds: Option<f64>,
    },
    /// Run the agent: poll, track open leak events, log to the database.
    Run {
        /// The site config (TOML).
        #[arg(long, short)]
        config: PathBuf,
        /// The SQLite database the daemon writes.
        #[arg(long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
    /// Flag, revise, annotate or close a leak event (the daemon applies it).
    #[command(subcommand)]
    Leak(LeakCommand),
    /// Show the running totals of the open events (or of one event).
    Status {
        /// One event's id; all open events if absent.
        event: Option<i64>,
        /// Print the JSON document for machines instead of the table.
        #[arg(long)]
        json: bool,
        /// The SQLite database the daemon writes.
        #[arg(long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
}

/// The database file when `--db` is not given.
pub const DEFAULT_DB: &str = "leaktally.db";

#[derive(Debug, Subcommand)]
pub enum LeakCommand {
    /// Open a leak event on a tank.
    Open {
        /// The tank's id (tag) in the config.
        #[arg(long)]
        tank: String,
        #[command(flatten)]
        hole: HoleArgs,
        /// When the leak began: a time today (13:42), a UTC time
        /// (2026-12-01T13:42:00Z) or how long ago (90s, 5m, 1h30m).
        /// The total is computed from then, from the logged history.
        #[arg(long)]
        since: Option<String>,
        /// A note for the audit trail.
        #[arg(long)]
        note: Option<String>,
        /// The SQLite database the daemon writes.
        #[arg(long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
    /// Recompute an event from its start with new parameters (logged).
    Revise {
        /// The event's id.
        event: i64,
        #[command(flatten)]
        changes: ParamChanges,
        #[arg(long)]
        note: Option<String>,
        /// The SQLite database the daemon writes.
        #[arg(long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
    /// Add a note to an event's audit trail.
    Note {
        event: i64,
        text: String,
        /// The SQLite database the daemon writes.
        #[arg(long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
    /// Close an event once the leak is isolated; its total no longer changes.
    Close {
        event: i64,
        #[arg(long)]
        note: Option<String>,
        /// The SQLite database the daemon writes.
        #[arg(long, default_value = DEFAULT_DB)]
        db: PathBuf,
    },
}

/// What is known of the hole.
#[derive(Debug, Clone, clap::Args)]
pub struct HoleArgs {
    /// Hole diameter in mm, if known; without it the hole is fitted to the
    /// level drop.
    #[arg(long, value_name = "MM", allow_negative_numbers = true)]
    pub hole_diameter: Option<f64>,
    /// Height of the hole above the tank bottom, m (default: the bottom, the
    /// conservative choice).
    #[arg(long, value_name = "M", allow_negative_numbers = true)]
    pub hole_height: Option<f64>,
    /// Discharge coefficient, 0.1 to 1 (default 1.0, conservative; the
    /// band runs from 0.61 to 1.0 unless --cd-range says otherwise).
    #[arg(long, allow_negative_numbers = true)]
    pub cd: Option<f64>,
    /// The range the discharge coefficient may lie in, LOW..HIGH (for
    /// example 0.60..0.65 for a hole someone has measured); it must include
    /// --cd. Default 0.61..1.0 (common practice).
    #[arg(long, value_name = "LOW..HIGH")]
    pub cd_range: Option<String>,
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
    #[arg(long = "columns", value_name = "FILE.toml", requires = "readings")]
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

/// Changed leak parameters, for `leak revise` and `replay`.
#[derive(Debug, Clone, clap::Args)]
pub struct ParamChanges {
    #[command(flatten)]
    pub hole: HoleArgs,
    /// Forget the hole diameter and fit the hole to the level drop instead.
    #[arg(long, conflicts_with = "hole_diameter")]
    pub unknown_diameter: bool,
    /// Liquid density, kg/m³, if the config's is wrong for this event.
    #[arg(long)]
    pub density: Option<f64>,
}

/// Runs one parsed command.
pub fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Demo { seconds } => commands::demo::run(seconds),
        Command::Whatif {
            tank,
            config,
            hole_diameter,
            hole_area,
            hole_height,
            level,
            to_level,
            headspace,
            headspace_abs,
            db,
            horizons,
            blanket_supply,
            cd,
            json,
        } => {
            use commands::whatif::{self, HeadspaceGiven, HoleSize};
            let config = crate::config::load(&config)?;
            let Some(t) = config.tanks.iter().find(|t| t.id == tank) else {
                let known: Vec<&str> = config.tanks.iter().map(|t| t.id.as_str()).collect();
                anyhow::bail!(
                    "there is no tank {tank:?} in {}; the tanks are: {}",
                    config.path.display(),
                    known.join(", ")
                );
            };
            let mut holes = Vec::new();
            if let Some(text) = hole_diameter {
                holes.extend(
                    whatif::parse_holes(&text)?
                        .into_iter()
                        .map(HoleSize::Diameter),
                );
            }
            if let Some(text) = hole_area {
                holes.extend(
                    whatif::parse_hole_areas(&text)?
                        .into_iter()
                        .map(HoleSize::Area),
                );
            }
            let metres = |value: Option<f64>, option: &str| -> anyhow::Result<_> {
                match value {
                    Some(m) if !m.is_finite() || m < 0.0 => anyhow::bail!(
                        "{option} {m} must be a height above the tank bottom in metres, 0 or more"
                    ),
                    other => Ok(other.map(crate::model::Length::metres)),
                }
            };
            let given = match (headspace, headspace_abs) {
                (Some(kpa), _) => Some(HeadspaceGiven::Gauge(kpa)),
                (None, Some(kpa)) => Some(HeadspaceGiven::Absolute(kpa)),
                (None, None) => None,
            };
            let request = whatif::Request {
                level: metres(level, "--level")?,
                hole_height: hole_height
                    .map(crate::estimate::check_hole_height_m)
                    .transpose()?
                    .map(crate::model::Length::metres),
                cd: cd
                    .map(crate::estimate::check_cd)
                    .transpose()?
                    .map(crate::model::DischargeCoefficient::new)
                    .transpose()?,
                holes,
                headspace: whatif::headspace(t, given, db.as_deref(), crate::store::now_ms())?,
                horizons: horizons
                    .as_deref()
                    .map(whatif::parse_horizons)
                    .transpose()?,
                to_level: metres(to_level, "--to-level")?,
                supply: blanket_supply
                    .as_deref()
                    .map(whatif::parse_supply)
                    .transpose()?,
            };
            let study = whatif::compute(t, &request)?;
            if json {
                println!("{}", serde_json::to_string_pretty(&study)?);
            } else {
                print!("{}", whatif::human(&study));
            }
            Ok(())
        }
        Command::Check { config, offline } => {
            let checked = runtime()?.block_on(commands::check::run(&config, offline))?;
            print!("{}", checked.text);
            match checked.failed {
                // The binary exits with check::EXIT_DEVICES_FAILED for this.
                Some(failed) => Err(failed.into()),
                None => Ok(()),
            }
        }
        Command::Poll { config, seconds } => runtime()?.block_on(commands::poll::run(
            &config,
            seconds,
            crate::shutdown::signalled(),
        )),
        Command::Run { config, db } => {
            let config = crate::config::load(&config)?;
            runtime()?.block_on(crate::daemon::run(
                config,
                &db,
                crate::shutdown::signalled(),
            ))
        }
        Command::Leak(leak) => commands::leak::run(leak),
        Command::Replay {
            event,
            readings,
            layout,
            tank,
            config,
            changes,
            from,
            to,
            csv,
            plot,
            json,
            force,
            db,
        } => {
            let now = crate::store::now_ms();
            let when =
                |t: Option<String>| t.map(|t| crate::actions::parse_since(&t, now)).transpose();
            let overrides = commands::replay::Overrides {
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
                    protect.push(db);
                    commands::replay::Source::Readings {
                        file,
                        tank: tank.unwrap_or_default(),
                        config: config.unwrap_or_default(),
                        options: commands::replay::ReadingsOptions {
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
                (Some(event), None) => commands::replay::Source::Event { db, event, config },
                (None, None) => {
                    anyhow::bail!("give an event id, or --readings FILE with --tank and --config")
                }
            };
            let outputs = commands::replay::Outputs {
                csv,
                plot,
                json,
                force,
                protect,
            };
            print!("{}", commands::replay::run(source, &overrides, &outputs)?);
            Ok(())
        }
        Command::Status { event, json, db } => commands::status::print(&db, event, json),
    }
}

fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    Ok(tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()?)
}
