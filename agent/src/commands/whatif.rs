//! `leaktally whatif`: pre-planning figures for holes that have not happened.
//!
//! For each hole size, at a level and a headspace pressure: which phase
//! leaves (liquid when the surface is above the hole, the headspace gas when
//! it is below) and then
//!
//! * liquid: the initial rate in kg/s and m³/h, when the flow stops, the
//!   release by then and by each horizon, at the chosen Cd with the band from
//!   Cd 0.61 to 1.0, by the draining forecast;
//! * gas: the blowdown of the gas space to ambient (or to the pressure a
//!   blanket supply holds) between its isothermal and adiabatic bounds, by
//!   `model::blowdown`: the initial rate, how long the flow stays choked,
//!   when each bound ends, the release by each horizon (like with like)
//!   and by each bound's own end (with a supply the bounds end at
//!   different times, and the adiabatic one may end later and release
//!   more);
//!
//! and when each reportable quantity (and a given level) is reached.
//! Everything the figures rest on is said with where it came from: above
//! all the headspace pressure (the command line, the database's last good
//! reading, the config's nominal blanket pressure, or 0 kPa with a warning),
//! which a blanketed tank's figures depend on most.
//!
//! Left out: a hole that grows, pumping, two-phase jets, and the gas that
//! vents through a hole below the surface once the liquid has gone (a study
//! with the hole above the liquid gives that).

use crate::actions::parse_duration;
use crate::config::Tank;
use crate::estimate::{
    check_cd, check_hole_diameter_mm, check_hole_height_m, given_figure, hole_diameter_refusal,
};
use crate::model::blowdown::{Blowdown, BlowdownEnd, BlowdownForecast, Thermal, Ullage};
use crate::model::{
    AbsolutePressure, Density, DensityModel, DischargeCoefficient, GAS_CONSTANT, GasProperties,
    GasRegime, Hole, Length, Mass, MassRate, Pressure, PressureReading, PressureTap, TankState,
    Temperature, TimeSpan, Vessel, blowdown::ullage_volume, forecast::time_to_release,
    forecast_liquid,
};
use crate::report::presentation::Units;
use crate::report::{self, Presentation};
use crate::store;
use anyhow::{Context, bail};
use serde::Serialize;
use std::f64::consts::FRAC_PI_4;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

/// The version of the JSON document; fields are only ever added within a
/// version. 2: hole sizes in m (`hole_diameter_m`, `hole_area_m2`), the
/// unit in every field's name, machine times RFC 3339 UTC, `generated_at`.
pub const FORMAT: u32 = 2;

/// Representative hole sizes for pre-planning: the small, medium and large
/// release holes of 1/4 in, 1 in and 4 in used in risk-based inspection
/// practice (from memory, after API RP 581; its fourth size, a rupture, is
/// left out because the orifice equation does not describe it).
pub const REPRESENTATIVE_HOLES_MM: [f64; 3] = [6.35, 25.4, 101.6];

/// The horizons when none are given: +15 min and +1 h.
pub const DEFAULT_HORIZONS: [TimeSpan; 2] = [TimeSpan::minutes(15.0), TimeSpan::hours(1.0)];

/// The normal conditions of a normal cubic metre of gas, 0 °C and
/// 101.325 kPa (common practice, as in DIN 1343).
pub const NORMAL_TEMPERATURE_K: f64 = 273.15;
pub const NORMAL_PRESSURE_PA: f64 = 101_325.0;

/// A logged pressure older than this is said to be old.
const OLD_READING_S: f64 = 3600.0;

/// The most hole sizes and horizons a study takes (the tables stay legible).
const MAX_HOLES: usize = 12;
const MAX_HORIZONS: usize = 8;

/// The longest horizon: a year is past any emergency's planning.
const MAX_HORIZON_S: f64 = 366.0 * 86_400.0;

// ---------------------------------------------------------------------------
// What the study is asked

/// A hole size as the user gave it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum HoleSize {
    /// `--hole-diameter`, mm.
    Diameter(f64),
    /// `--hole-area`, mm²: the round hole of the same area.
    Area(f64),
    /// One of [`REPRESENTATIVE_HOLES_MM`], when no size is given.
    Representative(f64),
}

impl HoleSize {
    pub fn diameter_mm(self) -> f64 {
        match self {
            HoleSize::Diameter(mm) | HoleSize::Representative(mm) => mm,
            HoleSize::Area(mm2) => (mm2 / FRAC_PI_4).sqrt(),
        }
    }

    pub fn area_mm2(self) -> f64 {
        match self {
            HoleSize::Area(mm2) => mm2,
            other => FRAC_PI_4 * other.diameter_mm().powi(2),
        }
    }

    fn given_as(self) -> &'static str {
        match self {
            HoleSize::Diameter(_) => "diameter",
            HoleSize::Area(_) => "area",
            HoleSize::Representative(_) => "representative",
        }
    }
}

/// A headspace pressure given on the command line, kPa.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum HeadspaceGiven {
    /// `--headspace`: gauge.
    Gauge(f64),
    /// `--headspace-abs`: absolute.
    Absolute(f64),
}

/// A blanket supply as given: the pad gas rate and its unit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum SupplyGiven {
    KgPerHour(f64),
    KgPerSecond(f64),
    /// Normal cubic metres per hour (0 °C, 101.325 kPa).
    NormalCubicMetresPerHour(f64),
}

/// Everything a study needs besides the tank.
#[derive(Debug, Clone)]
pub struct Request {
    /// `None`: the default, 90 % of the tank's height.
    pub level: Option<Length>,
    /// `None`: the tank bottom, which releases the most.
    pub hole_height: Option<Length>,
    /// `None`: 1.0, the conservative figure.
    pub cd: Option<DischargeCoefficient>,
    /// Empty: the representative sizes.
    pub holes: Vec<HoleSize>,
    pub headspace: Headspace,
    /// The liquid density, and why that one.
    pub density: DensityUsed,
    /// `None`: +15 min and +1 h.
    pub horizons: Option<Vec<TimeSpan>>,
    pub to_level: Option<Length>,
    pub supply: Option<SupplyGiven>,
    /// The site's zone and units, for the prose (warnings, assumptions).
    pub site: Presentation,
}

impl Request {
    /// The plain request: defaults throughout, the headspace from the config.
    pub fn for_tank(tank: &Tank) -> Self {
        Self {
            level: None,
            hole_height: None,
            cd: None,
            holes: Vec::new(),
            headspace: headspace_from_config(tank, Vec::new()),
            density: density_from_config(tank, None),
            horizons: None,
            to_level: None,
            supply: None,
            site: Presentation::default(),
        }
    }
}

// ---------------------------------------------------------------------------
// The headspace pressure and where it comes from

/// The headspace gauge pressure a study uses, and why.
#[derive(Debug, Clone, PartialEq)]
pub struct Headspace {
    pub gauge: Pressure,
    pub source: HeadspaceSource,
    /// What the user should know about it (an assumption, an old reading).
    pub warnings: Vec<String>,
}

#[derive(Debug, Clone, PartialEq)]
pub enum HeadspaceSource {
    /// `--headspace`.
    GivenGauge,
    /// `--headspace-abs`, converted with the site's ambient pressure.
    GivenAbsolute,
    /// The last good reading of the tank's transmitter in the database.
    Logged(LoggedReading),
    /// The config's `nominal_headspace_kpa`.
    ConfigNominal,
    /// The config's `headspace_kpa` (a tank without a transmitter; 0, an open
    /// vent, when left out).
    ConfigAssumed,
    /// Nothing gave it: 0 kPa gauge for a tank with a transmitter.
    AssumedZero,
}

/// A transmitter reading taken from the database.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LoggedReading {
    pub database: String,
    pub at_ms: i64,
    /// RFC 3339 UTC.
    pub at: String,
    /// The same time in the site's zone, for the prose.
    #[serde(skip)]
    pub at_site: String,
    /// How old it was when the study was made.
    pub age_s: f64,
    /// The transmitter's value, Pa, in its own reference.
    pub reading_pa: f64,
    pub reference: &'static str,
    /// `headspace`, or `submerged` with the tap's elevation.
    pub tap: &'static str,
    pub tap_elevation_m: Option<f64>,
    /// The level logged with it (a submerged tap also reads the column).
    pub level_m: Option<f64>,
}

impl HeadspaceSource {
    fn name(&self) -> &'static str {
        match self {
            HeadspaceSource::GivenGauge => "given_gauge",
            HeadspaceSource::GivenAbsolute => "given_absolute",
            HeadspaceSource::Logged(_) => "logged",
            HeadspaceSource::ConfigNominal => "config_nominal",
            HeadspaceSource::ConfigAssumed => "config_assumed",
            HeadspaceSource::AssumedZero => "assumed_zero",
        }
    }

    fn explain(&self) -> String {
        match self {
            HeadspaceSource::GivenGauge => "given with --headspace-kpa".to_owned(),
            HeadspaceSource::GivenAbsolute => {
                "given with --headspace-kpa-abs, less the site's ambient pressure".to_owned()
            }
            HeadspaceSource::Logged(r) => format!(
                "the last good pressure reading in {}, at {} ({} old)",
                r.database,
                r.at_site,
                report::duration(TimeSpan::seconds(r.age_s))
            ),
            HeadspaceSource::ConfigNominal => {
                "the nominal blanket pressure in the config (nominal_headspace_kpa)".to_owned()
            }
            HeadspaceSource::ConfigAssumed => {
                "the config's assumed headspace for a tank without a pressure transmitter (headspace_kpa; 0, an open vent, when left out)"
                    .to_owned()
            }
            HeadspaceSource::AssumedZero => {
                "ASSUMED: nothing gave it (no --headspace, no --db reading, no nominal_headspace_kpa)"
                    .to_owned()
            }
        }
    }
}

/// The headspace from the config alone: the nominal blanket pressure of a
/// tank with a transmitter, the assumed headspace of one without, or 0 kPa
/// with a warning.
pub fn headspace_from_config(tank: &Tank, mut warnings: Vec<String>) -> Headspace {
    match (&tank.pressure, tank.nominal_headspace) {
        (None, _) => Headspace {
            gauge: tank.assumed_headspace,
            source: HeadspaceSource::ConfigAssumed,
            warnings,
        },
        (Some(_), Some(nominal)) => Headspace {
            gauge: nominal,
            source: HeadspaceSource::ConfigNominal,
            warnings,
        },
        (Some(_), None) => {
            warnings.push(format!(
                "the headspace pressure of tank {} is taken as 0 kPa gauge, but the tank has a pressure transmitter, so it may be blanketed or pressurised: the figures may be low (the unsafe side). Give --headspace-kpa KPA, --db FILE for the last logged reading, or nominal_headspace_kpa in the config",
                tank.id
            ));
            Headspace {
                gauge: Pressure::ZERO,
                source: HeadspaceSource::AssumedZero,
                warnings,
            }
        }
    }
}

/// The headspace a study uses: as given, else the last good reading in the
/// database (when one is given), else from the config.
pub fn headspace(
    tank: &Tank,
    given: Option<HeadspaceGiven>,
    db: Option<&Path>,
    now_ms: i64,
    site: &Presentation,
) -> anyhow::Result<Headspace> {
    let ambient_kpa = tank.vessel.ambient().si() / 1000.0;
    let mut warnings = Vec::new();
    if let Some(given) = given {
        let (gauge_kpa, source) = match given {
            HeadspaceGiven::Gauge(kpa) => {
                if !(kpa.is_finite() && kpa > -ambient_kpa && kpa <= 10_000.0) {
                    bail!(
                        "--headspace-kpa {kpa} kPa is not a gauge pressure the tank can hold: give kPa above ambient, from above -{ambient_kpa} (a full vacuum) to 10000"
                    );
                }
                if (kpa - ambient_kpa).abs() < 5.0 {
                    warnings.push(format!(
                        "--headspace-kpa {kpa} kPa gauge is about the ambient pressure ({ambient_kpa} kPa absolute); if you meant an absolute pressure, use --headspace-kpa-abs {kpa}"
                    ));
                }
                (kpa, HeadspaceSource::GivenGauge)
            }
            HeadspaceGiven::Absolute(kpa) => {
                if !(kpa.is_finite() && kpa > 0.0 && kpa <= 10_000.0 + ambient_kpa) {
                    bail!(
                        "--headspace-kpa-abs {kpa} kPa is not an absolute pressure the tank can hold: give kPa above a full vacuum, more than 0 and at most {}",
                        10_000.0 + ambient_kpa
                    );
                }
                if kpa < ambient_kpa - 30.0 {
                    warnings.push(format!(
                        "--headspace-kpa-abs {kpa} kPa absolute is a deep vacuum ({:.1} kPa gauge); if you meant a gauge pressure, use --headspace-kpa {kpa}",
                        kpa - ambient_kpa
                    ));
                }
                (kpa - ambient_kpa, HeadspaceSource::GivenAbsolute)
            }
        };
        if db.is_some() {
            warnings.push(
                "--db is not read for the headspace: the pressure given on the command line takes precedence"
                    .to_owned(),
            );
        }
        return Ok(Headspace {
            gauge: Pressure::kilopascals(gauge_kpa),
            source,
            warnings,
        });
    }
    if let Some(db) = db {
        if tank.pressure.is_none() {
            warnings.push(format!(
                "tank {} has no pressure transmitter, so {} holds no pressure for it; the headspace comes from the config",
                tank.id,
                db.display()
            ));
        } else {
            match last_logged_headspace(tank, db, now_ms, site)? {
                Some((gauge, reading)) => {
                    if reading.age_s > OLD_READING_S {
                        warnings.push(format!(
                            "the last good pressure reading of tank {} in {} is {} old ({}); the headspace may have changed since",
                            tank.id,
                            reading.database,
                            report::duration(TimeSpan::seconds(reading.age_s)),
                            reading.at_site
                        ));
                    }
                    return Ok(Headspace {
                        gauge,
                        source: HeadspaceSource::Logged(reading),
                        warnings,
                    });
                }
                None => warnings.push(format!(
                    "{} holds no good pressure reading of tank {}; the headspace comes from the config",
                    db.display(),
                    tank.id
                )),
            }
        }
    }
    Ok(headspace_from_config(tank, warnings))
}

/// The tank's latest good pressure reading in the database, read-only, as
/// the headspace gauge pressure: converted with the transmitter's reference
/// and tap, as the estimator does (a submerged tap needs the level logged
/// with it).
fn last_logged_headspace(
    tank: &Tank,
    db: &Path,
    now_ms: i64,
    site: &Presentation,
) -> anyhow::Result<Option<(Pressure, LoggedReading)>> {
    let Some(sensor) = &tank.pressure else {
        return Ok(None);
    };
    let conn = store::open_read_only(db)
        .with_context(|| format!("--db {}: reading the last logged pressure", db.display()))?;
    // The recent samples first: on a live database the reading is there,
    // and the whole history is read only when it is not.
    for from_ms in [now_ms.saturating_sub(15 * 60 * 1000), i64::MIN] {
        let samples = store::samples_between(&conn, &tank.id, from_ms, i64::MAX)?;
        for sample in samples.iter().rev() {
            let Some(value) = sample
                .pressure
                .and_then(|r| r.value.filter(|&v| r.is_good() && sensor.sensor.accepts(v)))
            else {
                continue;
            };
            let level = sample.level.value.filter(|_| sample.level.is_good());
            let (tap_name, tap_elevation) = match sensor.tap {
                PressureTap::Headspace => ("headspace", None),
                PressureTap::Submerged { elevation } => ("submerged", Some(elevation.si())),
            };
            let level_for_tap = match (sensor.tap, level) {
                (PressureTap::Headspace, _) => Length::ZERO,
                (PressureTap::Submerged { .. }, Some(level)) => Length::metres(level),
                (PressureTap::Submerged { .. }, None) => continue,
            };
            let reading = if sensor.absolute {
                PressureReading::Absolute(AbsolutePressure::pascals(value))
            } else {
                PressureReading::Gauge(Pressure::pascals(value))
            };
            let gauge = tank
                .vessel
                .headspace_pressure(reading, sensor.tap, level_for_tap);
            return Ok(Some((
                gauge,
                LoggedReading {
                    database: db.display().to_string(),
                    at_ms: sample.at_ms,
                    at: report::rfc3339(sample.at_ms),
                    at_site: site.time(sample.at_ms),
                    age_s: (now_ms - sample.at_ms) as f64 / 1000.0,
                    reading_pa: value,
                    reference: if sensor.absolute { "absolute" } else { "gauge" },
                    tap: tap_name,
                    tap_elevation_m: tap_elevation,
                    level_m: level,
                },
            )));
        }
        if from_ms == i64::MIN {
            break;
        }
    }
    Ok(None)
}

// ---------------------------------------------------------------------------
// The liquid density and where it comes from

/// The liquid density a study uses, and why that one.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DensityUsed {
    pub kg_m3: f64,
    /// `fixed` (the config's one density), `logged_temperature` (at the
    /// liquid's last good logged temperature, through the config's
    /// expansion_per_c or density_table) or `reference_temperature` (the
    /// config's density_kg_m3, not at the liquid's temperature).
    pub source: &'static str,
    pub explanation: String,
    pub logged: Option<LoggedTemperature>,
    /// What the user should know about it (an old reading).
    #[serde(skip)]
    pub warnings: Vec<String>,
}

/// A temperature reading taken from the database.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LoggedTemperature {
    pub database: String,
    pub at_ms: i64,
    /// RFC 3339 UTC.
    pub at: String,
    /// The same time in the site's zone, for the prose.
    #[serde(skip)]
    pub at_site: String,
    /// How old it was when the study was made.
    pub age_s: f64,
    pub temperature_c: f64,
}

/// What the config's density follows, for the explanations.
fn density_model_name(model: &DensityModel) -> &'static str {
    match model {
        DensityModel::Constant(_) => "density_kg_m3",
        DensityModel::Expansion { .. } => "expansion_per_c",
        DensityModel::Table(_) => "density_table",
    }
}

/// The density from the config alone: its one density, or, where the
/// density follows the liquid's temperature, density_kg_m3 at the config's
/// reference temperature, said as such with `why_not` the liquid's.
pub fn density_from_config(tank: &Tank, why_not: Option<String>) -> DensityUsed {
    let rho = tank.vessel.density().si();
    let (source, explanation) = match &tank.density {
        DensityModel::Constant(_) if tank.temperature.is_some() => (
            "fixed",
            "the config's density_kg_m3, fixed: the config gives no expansion_per_c or density_table, so the liquid's temperature does not change it".to_owned(),
        ),
        DensityModel::Constant(_) => ("fixed", "the config's density_kg_m3".to_owned()),
        model => {
            let at = match model {
                DensityModel::Expansion { at, .. } => format!(
                    "at its reference temperature, {} °C",
                    report::number(at.si() - 273.15)
                ),
                _ => "as given, not through its density_table".to_owned(),
            };
            (
                "reference_temperature",
                format!(
                    "the config's density_kg_m3 {at}, NOT at the liquid's temperature: {}",
                    why_not.unwrap_or_else(|| {
                        "give --db FILE for the last logged temperature".to_owned()
                    })
                ),
            )
        }
    };
    DensityUsed {
        kg_m3: rho,
        source,
        explanation,
        logged: None,
        warnings: Vec::new(),
    }
}

/// The density a study uses: with `--db` and a tank whose density follows
/// its temperature sensor, at the liquid's last good logged temperature
/// (read-only, like the pressure); else from the config, said as such.
pub fn liquid_density(
    tank: &Tank,
    db: Option<&Path>,
    now_ms: i64,
    site: &Presentation,
) -> anyhow::Result<DensityUsed> {
    let (Some(db), Some(sensor)) = (db, &tank.temperature) else {
        return Ok(density_from_config(tank, None));
    };
    if !tank.density.follows_temperature() {
        return Ok(density_from_config(tank, None));
    }
    let conn = store::open_read_only(db)
        .with_context(|| format!("--db {}: reading the last logged temperature", db.display()))?;
    // The recent samples first, as for the pressure.
    for from_ms in [now_ms.saturating_sub(15 * 60 * 1000), i64::MIN] {
        let samples = store::samples_between(&conn, &tank.id, from_ms, i64::MAX)?;
        let last = samples.iter().rev().find_map(|sample| {
            let kelvin = sample
                .temperature
                .and_then(|r| r.value.filter(|&v| r.is_good() && sensor.accepts(v)))?;
            Some((sample.at_ms, kelvin))
        });
        if let Some((at_ms, kelvin)) = last {
            let logged = LoggedTemperature {
                database: db.display().to_string(),
                at_ms,
                at: report::rfc3339(at_ms),
                at_site: site.time(at_ms),
                age_s: (now_ms - at_ms) as f64 / 1000.0,
                temperature_c: kelvin - 273.15,
            };
            let mut warnings = Vec::new();
            if logged.age_s > OLD_READING_S {
                warnings.push(format!(
                    "the last good temperature reading of tank {} in {} is {} old ({}); the liquid's density may have changed since",
                    tank.id,
                    logged.database,
                    report::duration(TimeSpan::seconds(logged.age_s)),
                    logged.at_site
                ));
            }
            return Ok(DensityUsed {
                kg_m3: tank.density.at(Some(Temperature::kelvin(kelvin))).si(),
                source: "logged_temperature",
                explanation: format!(
                    "at the liquid's last good logged temperature, {} °C, in {} at {} ({} old), through the config's {}",
                    report::number(logged.temperature_c),
                    logged.database,
                    logged.at_site,
                    report::duration(TimeSpan::seconds(logged.age_s)),
                    density_model_name(&tank.density)
                ),
                logged: Some(logged),
                warnings,
            });
        }
        if from_ms == i64::MIN {
            break;
        }
    }
    Ok(density_from_config(
        tank,
        Some(format!(
            "{} holds no good temperature reading of tank {}",
            db.display(),
            tank.id
        )),
    ))
}

// ---------------------------------------------------------------------------
// The study as figures (the JSON document)

/// A figure at the chosen Cd and at the band's two ends.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AtCd<T> {
    pub cd_low: T,
    pub cd_chosen: T,
    pub cd_high: T,
}

impl<T> AtCd<T> {
    fn from_fn(mut f: impl FnMut(usize) -> T) -> Self {
        Self {
            cd_low: f(0),
            cd_chosen: f(1),
            cd_high: f(2),
        }
    }
}

impl<T: Copy> AtCd<T> {
    fn map<U>(&self, mut f: impl FnMut(T) -> U) -> AtCd<U> {
        AtCd {
            cd_low: f(self.cd_low),
            cd_chosen: f(self.cd_chosen),
            cd_high: f(self.cd_high),
        }
    }
}

/// The discharge coefficients of a study.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct CdUsed {
    pub low: f64,
    pub chosen: f64,
    pub high: f64,
    /// Whether `chosen` was given (`--cd`) or is the default 1.0.
    pub given: bool,
}

/// A what-if study of one tank (the JSON document, `format` 2).
#[derive(Debug, Clone, Serialize)]
pub struct Study {
    pub format: u32,
    /// When the study was made, RFC 3339 UTC.
    pub generated_at: String,
    /// The site's presentation, for the text; not in the document.
    #[serde(skip)]
    pub site: Presentation,
    pub tank: String,
    pub substance: String,
    pub density_kg_m3: f64,
    /// The density and why that one (also in `assumptions`).
    pub density: DensityUsed,
    pub ambient_pa: f64,
    pub level_m: f64,
    /// `given` or `default` (90 % of the tank's height).
    pub level_source: &'static str,
    pub headspace: HeadspaceUsed,
    pub hole_height_m: f64,
    /// `given` or `default` (the tank bottom).
    pub hole_height_source: &'static str,
    pub cd: CdUsed,
    pub horizons_s: Vec<f64>,
    /// `given` or `default` (+15 min and +1 h).
    pub horizons_source: &'static str,
    pub to_level_m: Option<f64>,
    pub liquid_above_hole_kg: f64,
    pub liquid_above_hole_m3: f64,
    /// The gas space above the liquid: the tank's capacity less the liquid.
    pub ullage_volume_m3: f64,
    pub blanket_supply: Option<SupplyUsed>,
    pub holes: Vec<HoleStudy>,
    /// Anything the figures rest on that may be wrong; also in the text.
    pub warnings: Vec<String>,
    /// What the figures assume; also in the text.
    pub assumptions: Vec<String>,
    pub caution: &'static str,
}

#[derive(Debug, Clone, Serialize)]
pub struct HeadspaceUsed {
    pub gauge_pa: f64,
    pub absolute_pa: f64,
    /// `given_gauge`, `given_absolute`, `logged`, `config_nominal`,
    /// `config_assumed` or `assumed_zero`.
    pub source: &'static str,
    pub explanation: String,
    pub logged: Option<LoggedReading>,
}

#[derive(Debug, Clone, Serialize)]
pub struct SupplyUsed {
    pub rate_kg_s: f64,
    pub rate_nm3_h: f64,
    /// As given, e.g. `50 Nm3/h`.
    pub given: String,
}

/// The figures for one hole size.
#[derive(Debug, Clone, Serialize)]
pub struct HoleStudy {
    pub hole_diameter_m: f64,
    pub hole_area_m2: f64,
    /// The same in mm and mm², for Rust callers; not in the document.
    #[serde(skip)]
    pub diameter_mm: f64,
    #[serde(skip)]
    pub area_mm2: f64,
    /// `diameter`, `area` or `representative`.
    pub given_as: &'static str,
    /// `liquid`, `vapour` or `none`.
    pub phase: &'static str,
    /// For vapour, at the start: `choked` or `subcritical`.
    pub regime: Option<&'static str>,
    /// Why this phase (or nothing) flows.
    pub reason: String,
    pub liquid: Option<LiquidFigures>,
    pub vapour: Option<VapourFigures>,
}

#[derive(Debug, Clone, Serialize)]
pub struct LiquidFigures {
    /// The liquid's gauge pressure at the hole at the start.
    pub driving_pressure_pa: f64,
    pub initial_rate_kg_s: AtCd<f64>,
    pub initial_rate_m3_h: AtCd<f64>,
    pub stops_after_s: AtCd<f64>,
    /// Where the flow stops: the hole, or above it under a vacuum.
    pub stop_level_m: f64,
    /// The same at every Cd: the liquid between the level and the stop level.
    pub released_by_stop_kg: f64,
    pub released_by_stop_m3: f64,
    pub horizons: Vec<LiquidHorizon>,
    pub to_level: Option<TimeToLevel>,
    pub reportable: Vec<ReportableTimes>,
}

#[derive(Debug, Clone, Serialize)]
pub struct LiquidHorizon {
    pub after_s: f64,
    pub released_kg: AtCd<f64>,
    pub released_m3: AtCd<f64>,
    pub level_m: AtCd<f64>,
    pub rate_kg_s: AtCd<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct TimeToLevel {
    pub level_m: f64,
    /// `None` where the flow stops above that level.
    pub reached_after_s: AtCd<Option<f64>>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ReportableTimes {
    pub quantity_kg: f64,
    /// `None` where the release never reaches it.
    pub reached_after_s: AtCd<Option<f64>>,
}

#[derive(Debug, Clone, Serialize)]
pub struct VapourFigures {
    pub molar_mass_g_mol: f64,
    pub heat_capacity_ratio: f64,
    pub temperature_c: f64,
    pub ullage_volume_m3: f64,
    pub initial_gas_kg: f64,
    /// The headspace gauge pressure above which the flow is choked.
    pub critical_pressure_gauge_pa: f64,
    pub initial_rate_kg_s: AtCd<f64>,
    pub initial_rate_nm3_h: AtCd<f64>,
    /// `off` or `on`.
    pub supply: &'static str,
    pub isothermal: AtCd<BlowdownFigures>,
    pub adiabatic: AtCd<BlowdownFigures>,
    /// Over both bounds and the Cd band, at each horizon: like with like.
    pub band: Vec<ReleasedBand>,
    /// Over both bounds and the Cd band, by each one's end. Without a
    /// supply that is the release in total; with one the bounds end at
    /// different times and the release goes on after each, so this mixes
    /// end times: read `isothermal_end` and `adiabatic_end`, or `band`.
    pub released_by_end_band: ReleasedBand,
    /// Each bound's own end over the Cd band: when, and how much by then.
    pub isothermal_end: EndRange,
    pub adiabatic_end: EndRange,
    /// How the two bounds compare at the chosen Cd, in words (also in the
    /// text): with a supply, which ends later and releases more by its end.
    pub bounds_compared: String,
    /// Over both bounds and the Cd band.
    pub reportable: Vec<ReportableRange>,
}

#[derive(Debug, Clone, Serialize)]
pub struct BlowdownFigures {
    /// `None` with `choked_throughout`: a supply holds the flow choked.
    pub choked_for_s: Option<f64>,
    pub choked_throughout: bool,
    /// `ambient`, `steady`, `held` or `no_flow`.
    pub end: &'static str,
    /// When the pressure reaches ambient, or when the outflow came within
    /// 1 % of the supply for good; 0 for `held` and `no_flow`.
    pub end_after_s: f64,
    pub end_pressure_gauge_pa: f64,
    pub released_by_end_kg: f64,
    /// The release rate after the end: 0 at ambient, the supply once
    /// steady, the initial rate when held.
    pub rate_after_end_kg_s: f64,
    pub horizons: Vec<BlowdownHorizon>,
    pub reportable: Vec<ReportableTime>,
}

#[derive(Debug, Clone, Serialize)]
pub struct BlowdownHorizon {
    pub after_s: f64,
    pub pressure_gauge_pa: f64,
    pub temperature_c: f64,
    pub rate_kg_s: f64,
    pub regime: Option<&'static str>,
    pub released_kg: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct ReportableTime {
    pub quantity_kg: f64,
    pub reached_after_s: Option<f64>,
}

/// One bound's end over the Cd band: when it ends (the pressure at
/// ambient, or steady against a supply) and what it has released by then.
/// `None` where it never ends (a supply holds the pressure) or nothing flows.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct EndRange {
    pub after_low_s: Option<f64>,
    pub after_high_s: Option<f64>,
    pub released_low_kg: Option<f64>,
    pub released_high_kg: Option<f64>,
}

impl EndRange {
    fn of(runs: &[BlowdownForecast]) -> Self {
        let ends: Vec<(f64, f64)> = runs
            .iter()
            .filter_map(|f| match f.end {
                BlowdownEnd::Ambient { after } | BlowdownEnd::Steady { after, .. } => {
                    Some((after.si(), f.released_by_end.si()))
                }
                BlowdownEnd::Held | BlowdownEnd::NoFlow => None,
            })
            .collect();
        let low = |f: fn(&(f64, f64)) -> f64| ends.iter().map(f).reduce(f64::min);
        let high = |f: fn(&(f64, f64)) -> f64| ends.iter().map(f).reduce(f64::max);
        Self {
            after_low_s: low(|e| e.0),
            after_high_s: high(|e| e.0),
            released_low_kg: low(|e| e.1),
            released_high_kg: high(|e| e.1),
        }
    }
}

#[derive(Debug, Clone, Copy, Serialize)]
pub struct ReleasedBand {
    pub after_s: Option<f64>,
    pub released_low_kg: f64,
    pub released_high_kg: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct ReportableRange {
    pub quantity_kg: f64,
    /// `None`: never, in any case.
    pub earliest_s: Option<f64>,
    /// `None`: never, in the slowest case.
    pub latest_s: Option<f64>,
}

// ---------------------------------------------------------------------------
// Computing the study

/// The study for the demo and the reference tests: the given sizes at a
/// level and hole height, the headspace from the config, the default
/// horizons.
pub fn study(
    tank: &Tank,
    level: Length,
    hole_height: Length,
    cd: DischargeCoefficient,
    holes_mm: &[f64],
) -> anyhow::Result<Study> {
    let request = Request {
        level: Some(level),
        hole_height: Some(hole_height),
        cd: Some(cd),
        holes: holes_mm.iter().map(|&mm| HoleSize::Diameter(mm)).collect(),
        ..Request::for_tank(tank)
    };
    compute(tank, &request)
}

/// Computes a study.
pub fn compute(tank: &Tank, request: &Request) -> anyhow::Result<Study> {
    // The tank as the study sees it: its liquid at the density the
    // request says (the config's, or at the last logged temperature).
    let with_density;
    let tank = if request.density.kg_m3 == tank.vessel.density().si() {
        tank
    } else {
        let v = &tank.vessel;
        let mut t = tank.clone();
        t.vessel = Vessel::new(
            v.geometry().clone(),
            Density::kg_per_cubic_metre(request.density.kg_m3),
            v.ambient(),
            v.vapour().copied(),
        )?;
        with_density = t;
        &with_density
    };
    let vessel = &tank.vessel;
    let geometry = vessel.geometry();
    let ambient = vessel.ambient();
    let level = request.level.unwrap_or_else(|| default_level(tank));
    let level = Length::metres(geometry.check_level(level)?);
    let hole_height = request.hole_height.unwrap_or(Length::ZERO);
    let cd = request.cd.unwrap_or(DischargeCoefficient::CONSERVATIVE);
    let headspace = request.headspace.gauge;
    let start = TankState { level, headspace };
    let rho = vessel.density().si();

    let band = [
        DischargeCoefficient::new(cd.get().min(DischargeCoefficient::SHARP_EDGED.get()))?,
        cd,
        DischargeCoefficient::CONSERVATIVE,
    ];
    let horizons: Vec<TimeSpan> = request
        .horizons
        .clone()
        .unwrap_or_else(|| DEFAULT_HORIZONS.to_vec());
    let holes: Vec<HoleSize> = if request.holes.is_empty() {
        REPRESENTATIVE_HOLES_MM
            .iter()
            .map(|&mm| HoleSize::Representative(mm))
            .collect()
    } else {
        request.holes.clone()
    };
    let probe = Hole::new(Length::metres(0.01), hole_height)?;
    vessel.check_hole(&probe)?;
    if let Some(target) = request.to_level {
        let target_m = geometry.check_level(target)?;
        if target_m >= level.si() {
            bail!(
                "--to-level-m {target_m} m is not below the level {} m; give a level the liquid falls to",
                level.si()
            );
        }
    }

    let mut warnings = request.headspace.warnings.clone();
    warnings.extend(request.density.warnings.iter().cloned());
    let mut assumptions = Vec::new();
    let gas = vessel.vapour().copied();
    let supply = match (request.supply, &gas) {
        (None, _) => None,
        (Some(_), None) => bail!(
            "--blanket-supply: tank {} has no vapour properties in the config, so no gas release can be forecast; add vapour = {{ molar_mass_g_mol = ..., heat_capacity_ratio = ..., temperature_c = ... }} to its [tank.substance]",
            tank.id
        ),
        (Some(given), Some(gas)) => Some(supply_used(given, gas)?),
    };
    let ullage = ullage_volume(vessel, level)?;
    let liquid_above = vessel.liquid_above(level, &probe).si();

    let mut figures = Vec::new();
    for &size in &holes {
        let hole = Hole::new(Length::millimetres(size.diameter_mm()), hole_height)?;
        let mut study = HoleStudy {
            hole_diameter_m: size.diameter_mm() / 1000.0,
            hole_area_m2: size.area_mm2() * 1e-6,
            diameter_mm: size.diameter_mm(),
            area_mm2: size.area_mm2(),
            given_as: size.given_as(),
            phase: "none",
            regime: None,
            reason: String::new(),
            liquid: None,
            vapour: None,
        };
        if level > hole_height {
            let driving = vessel.liquid_driving_pressure(&start, &hole);
            if driving.si() > 0.0 {
                study.phase = "liquid";
                study.reason = "the surface is above the hole: liquid flows".to_owned();
                study.liquid = Some(liquid_figures(
                    tank,
                    &hole,
                    &band,
                    &start,
                    &horizons,
                    request.to_level,
                )?);
            } else {
                study.reason = format!(
                    "the headspace vacuum ({}) holds the liquid column: nothing flows out (air would be drawn in)",
                    request.site.gauge_pressure(headspace.si() / 1000.0)
                );
            }
        } else if headspace.si() <= 0.0 {
            study.reason = "the hole is above the liquid and the headspace is not above ambient: nothing flows out".to_owned();
        } else if ullage.si() <= 0.0 {
            study.reason =
                "the hole is above the liquid but the tank is full: there is no gas space to vent"
                    .to_owned();
        } else if let Some(gas) = &gas {
            let ullage = Ullage::new(ullage, *gas, ambient + headspace, ambient)?;
            let vapour = vapour_figures(
                tank,
                &ullage,
                &hole,
                &band,
                supply.as_ref(),
                &horizons,
                &request.site,
            )?;
            study.phase = "vapour";
            study.regime = Some(regime_name(vapour.1));
            study.reason = format!(
                "the surface is below the hole: the headspace gas vents, {} at the start",
                regime_name(vapour.1)
            );
            study.vapour = Some(vapour.0);
        } else {
            study.phase = "vapour";
            study.reason = "the surface is below the hole: the headspace gas vents, but the config gives no vapour properties for this tank".to_owned();
            warnings.push(format!(
                "the {} hole is above the liquid, where the headspace gas vents, but tank {} has no vapour properties in the config: no gas forecast; add vapour = {{ molar_mass_g_mol = ..., heat_capacity_ratio = ..., temperature_c = ... }} to its [tank.substance]",
                hole_size_text(&request.site, size.diameter_mm()),
                tank.id
            ));
        }
        figures.push(study);
    }

    // Said once, for whichever phases appear.
    let any_liquid = figures.iter().any(|h| h.liquid.is_some());
    let any_vapour = figures.iter().any(|h| h.vapour.is_some());
    if any_liquid {
        assumptions.push(format!(
            "Liquid: the orifice equation with the headspace held at {} (an open vent or a blanket regulator), no pumping, and a hole that does not grow. A forecast never releases more than the liquid above the hole ({}): it drains the tank at most down to the hole.",
            request.site.gauge_pressure(headspace.si() / 1000.0),
            request.site.mass(Mass::kilograms(liquid_above))
        ));
        if headspace.si() > 0.0 {
            assumptions.push(
                "Once the liquid stops, the pressurised headspace gas would vent through the same hole: not included; a study with --hole-height-m above the liquid gives it.".to_owned(),
            );
        }
        if let (Some(s), Some(gas)) = (&supply, &gas) {
            // The regulator must replace the liquid's volume with gas at
            // the headspace pressure to hold it.
            let gas_density = (ambient + headspace).si() * gas.molar_mass().si()
                / (GAS_CONSTANT * gas.temperature().si());
            let holds_m3_h = s.rate_kg_s / gas_density * 3600.0;
            for h in &figures {
                if let Some(l) = &h.liquid
                    && l.initial_rate_m3_h.cd_chosen > holds_m3_h
                {
                    warnings.push(format!(
                        "a blanket supply of {} replaces the liquid only up to {} at the headspace pressure, and the {} hole starts at {}: the headspace would fall, so its liquid figures are high (the safe side)",
                        s.given,
                        flow_text(&request.site, holds_m3_h),
                        hole_size_text(&request.site, h.hole_diameter_m * 1000.0),
                        flow_text(&request.site, l.initial_rate_m3_h.cd_chosen)
                    ));
                }
            }
        }
    }
    if any_vapour {
        assumptions.push(if supply.is_some() {
            "Gas: the ideal-gas nozzle equations, the gas space fixed (the liquid does not move), between two bounds on the heat that reaches the gas: isothermal (the walls keep the gas at its temperature) and adiabatic (no heat reaches the gas, which cools). With a blanket supply neither bound releases more throughout: the supply keeps feeding a gas the adiabatic bound holds cooler and denser, so it can flow longer and release more; each bound's end and total by then are its own, and the release by each horizon compares them like with like. Evaporation from the liquid into the gas space is not included.".to_owned()
        } else {
            "Gas: the ideal-gas nozzle equations, the gas space fixed (the liquid does not move), between two bounds a real tank lies within: isothermal (the walls keep the gas at its temperature; the most released, the longest) and adiabatic (no heat reaches the gas, which cools; less, sooner). Evaporation from the liquid into the gas space is not included.".to_owned()
        });
        assumptions.push(match &supply {
            Some(s) => format!(
                "Blanket supply on: pad gas of the configured vapour at its temperature, at up to {} ({}), by a regulator whose set point is the headspace pressure; steady means the outflow within 1 % of the supply for good.",
                s.given,
                request.site.rate(MassRate::kg_per_second(s.rate_kg_s))
            ),
            None => "Blanket supply off (give --blanket-supply for a regulator that keeps feeding pad gas).".to_owned(),
        });
    } else if supply.is_some() {
        assumptions.push(
            "--blanket-supply matters only for a hole above the liquid; no hole here is."
                .to_owned(),
        );
    }
    assumptions.push(format!(
        "Density of the liquid: {} kg/m³, {}.",
        report::number(rho),
        request.density.explanation
    ));
    assumptions.push(
        "Times run from the moment the hole opens; figures in brackets are the band from the lowest to the highest Cd.".to_owned(),
    );

    let (gauge, absolute) = (headspace.si(), (ambient + headspace).si());
    Ok(Study {
        format: FORMAT,
        generated_at: report::rfc3339(crate::store::now_ms()),
        site: request.site.clone(),
        tank: tank.id.clone(),
        substance: tank.substance.clone(),
        density_kg_m3: rho,
        density: request.density.clone(),
        ambient_pa: ambient.si(),
        level_m: level.si(),
        level_source: if request.level.is_some() {
            "given"
        } else {
            "default"
        },
        headspace: HeadspaceUsed {
            gauge_pa: gauge,
            absolute_pa: absolute,
            source: request.headspace.source.name(),
            explanation: request.headspace.source.explain(),
            logged: match &request.headspace.source {
                HeadspaceSource::Logged(r) => Some(r.clone()),
                _ => None,
            },
        },
        hole_height_m: hole_height.si(),
        hole_height_source: if request.hole_height.is_some() {
            "given"
        } else {
            "default"
        },
        cd: CdUsed {
            low: band[0].get(),
            chosen: cd.get(),
            high: band[2].get(),
            given: request.cd.is_some(),
        },
        horizons_s: horizons.iter().map(|t| t.si()).collect(),
        horizons_source: if request.horizons.is_some() {
            "given"
        } else {
            "default"
        },
        to_level_m: request.to_level.map(|l| l.si()),
        liquid_above_hole_kg: liquid_above,
        liquid_above_hole_m3: liquid_above / rho,
        ullage_volume_m3: ullage.si(),
        blanket_supply: supply,
        holes: figures,
        warnings,
        assumptions,
        caution: report::CAUTION,
    })
}

fn regime_name(regime: Option<GasRegime>) -> &'static str {
    match regime {
        Some(GasRegime::Choked) => "choked",
        Some(GasRegime::Subcritical) => "subcritical",
        None => "no flow",
    }
}

fn supply_used(given: SupplyGiven, gas: &GasProperties) -> anyhow::Result<SupplyUsed> {
    let normal_density =
        NORMAL_PRESSURE_PA * gas.molar_mass().si() / (GAS_CONSTANT * NORMAL_TEMPERATURE_K);
    let (kg_s, text) = match given {
        SupplyGiven::KgPerHour(v) => (v / 3600.0, format!("{} kg/h", size(v))),
        SupplyGiven::KgPerSecond(v) => (v, format!("{} kg/s", size(v))),
        SupplyGiven::NormalCubicMetresPerHour(v) => {
            (v * normal_density / 3600.0, format!("{} Nm³/h", size(v)))
        }
    };
    Ok(SupplyUsed {
        rate_kg_s: kg_s,
        rate_nm3_h: kg_s * 3600.0 / normal_density,
        given: text,
    })
}

fn liquid_figures(
    tank: &Tank,
    hole: &Hole,
    band: &[DischargeCoefficient; 3],
    start: &TankState,
    horizons: &[TimeSpan],
    to_level: Option<Length>,
) -> anyhow::Result<LiquidFigures> {
    let vessel = &tank.vessel;
    let rho = vessel.density().si();
    let geometry = vessel.geometry();
    let mut forecasts = Vec::new();
    for cd in band {
        forecasts.push(forecast_liquid(vessel, hole, *cd, start, horizons)?);
    }
    let rates = AtCd::from_fn(|i| vessel.outflow(start, hole, band[i]).rate.si());
    let liquid_above = vessel.liquid_above(start.level, hole).si();
    let released_by_stop = forecasts[1].released_by_stop.si();
    // By construction the forecast drains at most to the hole; checked, so
    // that a fault would show as an error rather than as a figure.
    let most = liquid_above * (1.0 + 1e-9) + 1e-9;
    if forecasts.iter().any(|f| {
        f.released_by_stop.si() > most || f.horizons.iter().any(|p| p.released.si() > most)
    }) {
        bail!(
            "the forecast for the {} mm hole releases more than the {liquid_above} kg above it; this is a fault in leaktally, please report it",
            hole.diameter().as_millimetres()
        );
    }
    let horizons = (0..horizons.len())
        .map(|k| LiquidHorizon {
            after_s: horizons[k].si(),
            released_kg: AtCd::from_fn(|i| forecasts[i].horizons[k].released.si()),
            released_m3: AtCd::from_fn(|i| forecasts[i].horizons[k].released.si() / rho),
            level_m: AtCd::from_fn(|i| forecasts[i].horizons[k].level.si()),
            rate_kg_s: AtCd::from_fn(|i| forecasts[i].horizons[k].rate.si()),
        })
        .collect();
    let time_to = |mass: Mass| -> anyhow::Result<AtCd<Option<f64>>> {
        let mut out = [None; 3];
        for (i, cd) in band.iter().enumerate() {
            out[i] = time_to_release(vessel, hole, *cd, start, mass)?.map(|t| t.si());
        }
        Ok(AtCd::from_fn(|i| out[i]))
    };
    let to_level = match to_level {
        Some(target) => {
            let drop = (geometry.volume_si(start.level.si()) - geometry.volume_si(target.si()))
                .max(0.0)
                * rho;
            Some(TimeToLevel {
                level_m: target.si(),
                reached_after_s: time_to(Mass::kilograms(drop))?,
            })
        }
        None => None,
    };
    let mut reportable = Vec::new();
    for q in &tank.reportable {
        reportable.push(ReportableTimes {
            quantity_kg: q.si(),
            reached_after_s: time_to(*q)?,
        });
    }
    Ok(LiquidFigures {
        driving_pressure_pa: vessel.liquid_driving_pressure(start, hole).si(),
        initial_rate_kg_s: rates,
        initial_rate_m3_h: rates.map(|r| r * 3600.0 / rho),
        stops_after_s: AtCd::from_fn(|i| forecasts[i].stops_after.si()),
        stop_level_m: forecasts[1].stop_level.si(),
        released_by_stop_kg: released_by_stop,
        released_by_stop_m3: released_by_stop / rho,
        horizons,
        to_level,
        reportable,
    })
}

fn vapour_figures(
    tank: &Tank,
    ullage: &Ullage,
    hole: &Hole,
    band: &[DischargeCoefficient; 3],
    supply: Option<&SupplyUsed>,
    horizons: &[TimeSpan],
    site: &Presentation,
) -> anyhow::Result<(VapourFigures, Option<GasRegime>)> {
    let gas = ullage.gas();
    let ambient = ullage.ambient();
    let supply_rate = MassRate::kg_per_second(supply.map_or(0.0, |s| s.rate_kg_s));
    let normal_density =
        NORMAL_PRESSURE_PA * gas.molar_mass().si() / (GAS_CONSTANT * NORMAL_TEMPERATURE_K);
    let mut runs: Vec<(Thermal, Vec<BlowdownForecast>)> = Vec::new();
    let mut critical = 0.0;
    for thermal in [Thermal::Isothermal, Thermal::Adiabatic] {
        let mut at_cd = Vec::new();
        for cd in band {
            let b = Blowdown::new(*ullage, hole, *cd, supply_rate, thermal)?;
            critical = (b.critical_pressure() - ambient).si();
            at_cd.push(b.forecast(horizons, &tank.reportable)?);
        }
        runs.push((thermal, at_cd));
    }
    let all: Vec<&BlowdownForecast> = runs.iter().flat_map(|(_, f)| f.iter()).collect();
    let figures_of = |f: &BlowdownForecast| -> BlowdownFigures {
        let (end, end_after, end_pressure) = match f.end {
            BlowdownEnd::NoFlow => ("no_flow", 0.0, f.initial.pressure),
            BlowdownEnd::Ambient { after } => ("ambient", after.si(), ambient),
            BlowdownEnd::Steady { pressure, after } => ("steady", after.si(), pressure),
            BlowdownEnd::Held => ("held", 0.0, f.initial.pressure),
        };
        let choked_throughout = f.choked_for.si().is_infinite();
        BlowdownFigures {
            choked_for_s: (!choked_throughout).then_some(f.choked_for.si()),
            choked_throughout,
            end,
            end_after_s: end_after,
            end_pressure_gauge_pa: (end_pressure - ambient).si(),
            released_by_end_kg: f.released_by_end.si(),
            rate_after_end_kg_s: f.rate_after_end.si(),
            horizons: f
                .horizons
                .iter()
                .map(|p| BlowdownHorizon {
                    after_s: p.after.si(),
                    pressure_gauge_pa: (p.pressure - ambient).si(),
                    temperature_c: p.temperature.si() - 273.15,
                    rate_kg_s: p.rate.si(),
                    regime: p.regime.map(|r| regime_name(Some(r))),
                    released_kg: p.released.si(),
                })
                .collect(),
            reportable: tank
                .reportable
                .iter()
                .zip(&f.release_times)
                .map(|(q, t)| ReportableTime {
                    quantity_kg: q.si(),
                    reached_after_s: t.map(|t| t.si()),
                })
                .collect(),
        }
    };
    let at_cd = |runs: &[BlowdownForecast]| AtCd::from_fn(|i| figures_of(&runs[i]));
    let spread = |values: Vec<f64>| {
        let low = values.iter().copied().fold(f64::INFINITY, f64::min);
        let high = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        (low, high)
    };
    let band_out = (0..horizons.len())
        .map(|k| {
            let (low, high) = spread(all.iter().map(|f| f.horizons[k].released.si()).collect());
            ReleasedBand {
                after_s: Some(horizons[k].si()),
                released_low_kg: low,
                released_high_kg: high,
            }
        })
        .collect();
    let (end_low, end_high) = spread(all.iter().map(|f| f.released_by_end.si()).collect());
    let reportable = tank
        .reportable
        .iter()
        .enumerate()
        .map(|(q, mass)| {
            let times: Vec<Option<f64>> = all
                .iter()
                .map(|f| f.release_times[q].map(|t| t.si()))
                .collect();
            let reached: Vec<f64> = times.iter().flatten().copied().collect();
            ReportableRange {
                quantity_kg: mass.si(),
                earliest_s: reached.iter().copied().reduce(f64::min),
                latest_s: if times.iter().all(Option::is_some) {
                    reached.iter().copied().reduce(f64::max)
                } else {
                    None
                },
            }
        })
        .collect();
    let chosen = &runs[0].1[1];
    let rates = AtCd::from_fn(|i| runs[0].1[i].initial.rate.si());
    let isothermal = at_cd(&runs[0].1);
    let adiabatic = at_cd(&runs[1].1);
    let bounds_compared = compare_bounds(
        &isothermal.cd_chosen,
        &adiabatic.cd_chosen,
        supply.is_some(),
        site,
    );
    Ok((
        VapourFigures {
            molar_mass_g_mol: gas.molar_mass().si() * 1000.0,
            heat_capacity_ratio: gas.heat_capacity_ratio(),
            temperature_c: gas.temperature().si() - 273.15,
            ullage_volume_m3: ullage.volume().si(),
            initial_gas_kg: ullage.gas_mass().si(),
            critical_pressure_gauge_pa: critical,
            initial_rate_kg_s: rates,
            initial_rate_nm3_h: rates.map(|r| r * 3600.0 / normal_density),
            supply: if supply.is_some() { "on" } else { "off" },
            isothermal,
            adiabatic,
            band: band_out,
            released_by_end_band: ReleasedBand {
                after_s: None,
                released_low_kg: end_low,
                released_high_kg: end_high,
            },
            isothermal_end: EndRange::of(&runs[0].1),
            adiabatic_end: EndRange::of(&runs[1].1),
            bounds_compared,
            reportable,
        },
        chosen.initial.regime,
    ))
}

/// The two bounds at one Cd, compared by what they do rather than by what
/// they usually do: with a supply the adiabatic bound, whose gas is cooler
/// and denser, can end later and release more by its end than the
/// isothermal one, and the release goes on after either end.
fn compare_bounds(
    iso: &BlowdownFigures,
    adi: &BlowdownFigures,
    supply: bool,
    site: &Presentation,
) -> String {
    let ends = |f: &BlowdownFigures| matches!(f.end, "ambient" | "steady");
    if !(ends(iso) && ends(adi)) {
        return match (iso.end, adi.end) {
            ("no_flow", _) | (_, "no_flow") => "nothing flows".to_owned(),
            _ => "the supply holds the pressure in at least one bound: the release goes on at its initial rate, and the bounds compare only at the horizons".to_owned(),
        };
    }
    let said = |f: &BlowdownFigures| {
        format!(
            "ends after {} having released {}",
            hms_tenths(f.end_after_s),
            site.mass(Mass::kilograms(f.released_by_end_kg))
        )
    };
    let facts = format!(
        "the isothermal bound {}, the adiabatic {}",
        said(iso),
        said(adi)
    );
    if !supply {
        return format!("{facts}; nothing is released after the end, so these are the totals");
    }
    let later = adi.end_after_s > iso.end_after_s;
    let more = adi.released_by_end_kg > iso.released_by_end_kg;
    let how = match (later, more) {
        (true, true) => {
            "the adiabatic bound ends later and releases more by its end: the supply keeps feeding a gas that it holds cooler and denser"
        }
        (false, false) => "the adiabatic bound ends sooner and releases less by its end",
        (true, false) => "the adiabatic bound ends later but releases less by its end",
        (false, true) => "the adiabatic bound ends sooner but releases more by its end",
    };
    format!(
        "{facts}; {how}. The release goes on after each end (at the supply rate once steady), so totals by ends at different times do not compare: the horizons do"
    )
}

// ---------------------------------------------------------------------------
// The study as text

/// A time as h:mm:ss, one unit for a whole column; past a year, in words.
fn hms(seconds: f64) -> String {
    if !seconds.is_finite() {
        return "never".to_owned();
    }
    if seconds > MAX_HORIZON_S {
        return "over a year".to_owned();
    }
    let total = seconds.round() as i64;
    format!(
        "{}:{:02}:{:02}",
        total / 3600,
        (total % 3600) / 60,
        total % 60
    )
}

fn optional_hms(seconds: Option<f64>) -> String {
    seconds.map_or("never".to_owned(), hms)
}

/// A horizon as its user would write it: 15 min, 1 h, 90 s.
fn horizon_label(seconds: f64) -> String {
    let s = seconds.round() as i64;
    match (s / 3600, (s % 3600) / 60, s % 60) {
        (0, 0, sec) => format!("{sec} s"),
        (0, min, 0) => format!("{min} min"),
        (h, 0, 0) => format!("{h} h"),
        (h, min, 0) => format!("{h} h {min:02} min"),
        _ => hms(seconds),
    }
}

/// `best [low–high]`, or just `best` when the band is a point.
fn banded(best: String, low: String, high: String) -> String {
    if low == high && low == best {
        best
    } else {
        format!("{best} [{low}–{high}]")
    }
}

/// A left-aligned table with a two-line header (the quantity, its unit).
struct Table {
    header: Vec<(String, String)>,
    rows: Vec<Vec<String>>,
}

impl Table {
    fn new(header: Vec<(String, String)>) -> Self {
        Self {
            header,
            rows: Vec::new(),
        }
    }

    fn render(&self, out: &mut String) {
        let columns = self.header.len();
        let mut widths = vec![0; columns];
        for (c, (name, unit)) in self.header.iter().enumerate() {
            widths[c] = name.chars().count().max(unit.chars().count());
        }
        for row in &self.rows {
            for (c, cell) in row.iter().enumerate().take(columns) {
                widths[c] = widths[c].max(cell.chars().count());
            }
        }
        let line = |out: &mut String, cells: Vec<&str>| {
            let mut text = String::from(" ");
            for (c, cell) in cells.iter().enumerate() {
                let pad = widths[c] - cell.chars().count();
                text.push(' ');
                text.push_str(cell);
                if c + 1 < cells.len() {
                    text.push_str(&" ".repeat(pad + 2));
                }
            }
            let _ = writeln!(out, "{}", text.trim_end());
        };
        line(out, self.header.iter().map(|(n, _)| n.as_str()).collect());
        line(out, self.header.iter().map(|(_, u)| u.as_str()).collect());
        for row in &self.rows {
            line(out, row.iter().map(String::as_str).collect());
        }
    }
}

/// A mass in the site's unit, the number alone (the unit heads the column).
fn mass_number(p: &Presentation, kg: f64) -> String {
    match p.units {
        Units::Metric => report::number(kg),
        Units::UsCustomary => report::number(kg * report::presentation::POUNDS_PER_KG),
    }
}

/// The mass unit of a column: `kg` or `lb`.
fn mass_unit(p: &Presentation) -> &'static str {
    match p.units {
        Units::Metric => "kg",
        Units::UsCustomary => "lb",
    }
}

/// A mass rate in the site's unit per second, the number alone.
fn rate_number(p: &Presentation, kg_s: f64) -> String {
    mass_number(p, kg_s)
}

/// The rate unit of a column: `kg/s` or `lb/s`, per second throughout.
fn rate_unit(p: &Presentation) -> &'static str {
    match p.units {
        Units::Metric => "kg/s",
        Units::UsCustomary => "lb/s",
    }
}

/// US gallons a minute in one cubic metre an hour.
const US_GPM_PER_M3_H: f64 = 1000.0 / report::LITRES_PER_US_GALLON / 60.0;

/// A liquid volume flow, the number alone: m³/h, or US gal/min.
fn flow_number(p: &Presentation, m3_h: f64) -> String {
    match p.units {
        Units::Metric => report::number(m3_h),
        Units::UsCustomary => report::number(m3_h * US_GPM_PER_M3_H),
    }
}

fn flow_unit(p: &Presentation) -> &'static str {
    match p.units {
        Units::Metric => "m³/h",
        Units::UsCustomary => "US gal/min",
    }
}

/// A liquid volume flow with its unit.
fn flow_text(p: &Presentation, m3_h: f64) -> String {
    format!("{} {}", flow_number(p, m3_h), flow_unit(p))
}

/// The unit a hole's size is given in: `mm` or `in`.
fn hole_unit(p: &Presentation) -> &'static str {
    match p.units {
        Units::Metric => "mm",
        Units::UsCustomary => "in",
    }
}

/// A hole's diameter as given (6.35 mm, or 0.25 in), the number alone.
fn hole_size(p: &Presentation, mm: f64) -> String {
    match p.units {
        Units::Metric => size(mm),
        Units::UsCustomary => size(mm / 25.4),
    }
}

/// A hole's diameter with its unit, for the prose.
fn hole_size_text(p: &Presentation, mm: f64) -> String {
    format!("{} {}", hole_size(p, mm), hole_unit(p))
}

/// A gauge pressure in Pa as the site reads it: `12.0 kPa(g)` or `1.74 psig`.
fn gauge(p: &Presentation, pa: f64) -> String {
    p.gauge_pressure(pa / 1000.0)
}

/// An absolute pressure in Pa as the site reads it: `113 kPa(a)` or `16.4 psia`.
fn absolute(p: &Presentation, pa: f64) -> String {
    match p.units {
        Units::Metric => format!("{} kPa(a)", report::number(pa / 1000.0)),
        Units::UsCustomary => format!(
            "{} psia",
            report::number(pa / 1000.0 * report::presentation::PSI_PER_KPA)
        ),
    }
}

/// A gas volume: `12.0 m³`, or `424 ft³`.
fn gas_volume(p: &Presentation, m3: f64) -> String {
    match p.units {
        Units::Metric => format!("{} m³", report::number(m3)),
        Units::UsCustomary => format!(
            "{} ft³",
            report::number(m3 * report::presentation::FEET_PER_M.powi(3))
        ),
    }
}

/// A hole size as given (6.35, 25.4, 101.6): up to four significant
/// figures, trailing zeros dropped.
fn size(x: f64) -> String {
    let magnitude = x.abs().log10().floor() as i32;
    let decimals = (3 - magnitude).max(0) as usize;
    let text = format!("{x:.decimals$}");
    if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.').to_owned()
    } else {
        text
    }
}

/// A time as h:mm:ss.s, for the gas columns, whose blowdowns can be over in
/// a second.
fn hms_tenths(seconds: f64) -> String {
    if !seconds.is_finite() || seconds > MAX_HORIZON_S {
        return hms(seconds);
    }
    let tenths = (seconds * 10.0).round() as i64;
    let whole = tenths / 10;
    format!(
        "{}:{:02}:{:02}.{}",
        whole / 3600,
        (whole % 3600) / 60,
        whole % 60,
        tenths % 10
    )
}

/// The study as text for people.
pub fn human(s: &Study) -> String {
    let p = &s.site;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "What-if for tank {} ({}, {} kg/m³)",
        s.tank,
        s.substance,
        report::number(s.density_kg_m3)
    );
    let level_note = if s.level_source == "given" {
        "given"
    } else {
        "90 % of the tank's height, the default; give --level-m"
    };
    let _ = writeln!(out, "  level      {} ({level_note})", p.length(s.level_m));
    let _ = writeln!(
        out,
        "  density    {} kg/m³: {}",
        report::number(s.density.kg_m3),
        s.density.explanation
    );
    let _ = writeln!(
        out,
        "  headspace  {} = {}: {}",
        gauge(p, s.headspace.gauge_pa),
        absolute(p, s.headspace.absolute_pa),
        s.headspace.explanation
    );
    let height_note = if s.hole_height_source == "given" {
        ""
    } else {
        " (the bottom, the default, which releases the most; give --hole-height-m)"
    };
    let cd_note = if s.cd.given {
        ""
    } else {
        " (the default, conservative; give --cd)"
    };
    let _ = writeln!(
        out,
        "  hole       {} above the bottom{height_note}; Cd {:.2}{cd_note}, band from {:.2} to {:.2}",
        p.length(s.hole_height_m),
        s.cd.chosen,
        s.cd.low,
        s.cd.high
    );
    if s.liquid_above_hole_kg > 0.0 {
        let _ = writeln!(
            out,
            "  liquid above the hole  {} = {}",
            p.mass(Mass::kilograms(s.liquid_above_hole_kg)),
            p.volume(
                Mass::kilograms(s.liquid_above_hole_kg),
                crate::model::Density::kg_per_cubic_metre(s.density_kg_m3)
            )
        );
    } else {
        let _ = writeln!(
            out,
            "  liquid above the hole  none: the hole is at or above the surface"
        );
    }
    let _ = writeln!(
        out,
        "  gas space  {} above the liquid",
        gas_volume(p, s.ullage_volume_m3)
    );
    if !s.warnings.is_empty() {
        let _ = writeln!(out);
        for w in &s.warnings {
            let _ = writeln!(out, "WARNING: {w}");
        }
    }
    for h in s
        .holes
        .iter()
        .filter(|h| h.liquid.is_none() && h.vapour.is_none())
    {
        let _ = writeln!(
            out,
            "\nHole {}: {}.",
            hole_size_text(p, h.hole_diameter_m * 1000.0),
            h.reason
        );
    }
    liquid_tables(s, &mut out);
    vapour_tables(s, &mut out);
    reach_table(s, &mut out);
    let _ = writeln!(out);
    for a in &s.assumptions {
        let _ = writeln!(out, "{a}");
    }
    let _ = writeln!(out, "{}", s.caution);
    out
}

/// A hole in a table's first column, in the column's unit; a hole given by
/// its area also shows the area as given.
fn hole_label(p: &Presentation, h: &HoleStudy) -> String {
    let diameter = hole_size(p, h.hole_diameter_m * 1000.0);
    match (h.given_as, p.units) {
        ("area", Units::Metric) => format!("{diameter} ({} mm²)", size(h.hole_area_m2 * 1e6)),
        ("area", Units::UsCustomary) => format!(
            "{diameter} ({} in²)",
            size(h.hole_area_m2 * report::presentation::INCHES_PER_M.powi(2))
        ),
        _ => diameter,
    }
}

fn liquid_tables(s: &Study, out: &mut String) {
    let holes: Vec<(&HoleStudy, &LiquidFigures)> = s
        .holes
        .iter()
        .filter_map(|h| h.liquid.as_ref().map(|l| (h, l)))
        .collect();
    if holes.is_empty() {
        return;
    }
    let p = &s.site;
    let rate = |x: f64| rate_number(p, x);
    let flow = |x: f64| flow_number(p, x);
    let kg = |x: f64| mass_number(p, x);
    let _ = writeln!(
        out,
        "\nLiquid through the hole (orifice equation), at Cd {:.2} [band]:",
        s.cd.chosen
    );
    let mut table = Table::new(vec![
        ("hole".into(), hole_unit(p).into()),
        ("phase".into(), "".into()),
        ("initial rate".into(), rate_unit(p).into()),
        ("initial rate".into(), flow_unit(p).into()),
        ("flow stops after".into(), "h:mm:ss".into()),
        ("released by then".into(), mass_unit(p).into()),
    ]);
    for (h, l) in &holes {
        let r = &l.initial_rate_kg_s;
        let v = &l.initial_rate_m3_h;
        let t = &l.stops_after_s;
        table.rows.push(vec![
            hole_label(p, h),
            "liquid".into(),
            banded(rate(r.cd_chosen), rate(r.cd_low), rate(r.cd_high)),
            banded(flow(v.cd_chosen), flow(v.cd_low), flow(v.cd_high)),
            banded(hms(t.cd_chosen), hms(t.cd_high), hms(t.cd_low)),
            kg(l.released_by_stop_kg),
        ]);
    }
    table.render(out);
    let _ = writeln!(
        out,
        "\nLiquid released in all by each horizon, at Cd {:.2} [band]:",
        s.cd.chosen
    );
    let mut header = vec![("hole".to_owned(), hole_unit(p).to_owned())];
    for &t in &s.horizons_s {
        header.push((
            format!("released by {}", horizon_label(t)),
            mass_unit(p).to_owned(),
        ));
    }
    let mut table = Table::new(header);
    for (h, l) in &holes {
        let mut row = vec![hole_label(p, h)];
        for p in &l.horizons {
            let r = &p.released_kg;
            row.push(banded(kg(r.cd_chosen), kg(r.cd_low), kg(r.cd_high)));
        }
        table.rows.push(row);
    }
    table.render(out);
}

fn vapour_tables(s: &Study, out: &mut String) {
    let holes: Vec<(&HoleStudy, &VapourFigures)> = s
        .holes
        .iter()
        .filter_map(|h| h.vapour.as_ref().map(|v| (h, v)))
        .collect();
    let Some((_, first)) = holes.first() else {
        return;
    };
    let p = &s.site;
    let sig = |x: f64| report::number(x);
    let kg = |x: f64| mass_number(p, x);
    let supply = match &s.blanket_supply {
        Some(supply) => format!(
            "blanket supply on at {} = {}",
            supply.given,
            p.rate(MassRate::kg_per_second(supply.rate_kg_s))
        ),
        None => "blanket supply off".to_owned(),
    };
    let _ = writeln!(
        out,
        "\nGas through the hole (ideal-gas nozzle equations): the gas space, {} holding {} of the configured vapour ({} g/mol, k {}, {} °C) at {}, vents to ambient; {supply}; at Cd {:.2}:",
        gas_volume(p, first.ullage_volume_m3),
        p.mass(Mass::kilograms(first.initial_gas_kg)),
        sig(first.molar_mass_g_mol),
        sig(first.heat_capacity_ratio),
        sig(first.temperature_c),
        absolute(p, s.headspace.absolute_pa),
        s.cd.chosen
    );
    let mut header = vec![
        ("hole".to_owned(), hole_unit(p).to_owned()),
        ("phase".to_owned(), "".to_owned()),
        ("bound".to_owned(), "".to_owned()),
        ("initial rate".to_owned(), rate_unit(p).to_owned()),
        ("initial rate".to_owned(), "Nm³/h".to_owned()),
        ("choked for".to_owned(), "h:mm:ss.s".to_owned()),
        ("ends".to_owned(), "".to_owned()),
        ("after".to_owned(), "h:mm:ss.s".to_owned()),
        ("released by then".to_owned(), mass_unit(p).to_owned()),
    ];
    for &t in &s.horizons_s {
        header.push((
            format!("released by {}", horizon_label(t)),
            mass_unit(p).to_owned(),
        ));
    }
    let mut table = Table::new(header);
    for (h, v) in &holes {
        for (i, (name, run)) in [
            ("isothermal", &v.isothermal.cd_chosen),
            ("adiabatic", &v.adiabatic.cd_chosen),
        ]
        .into_iter()
        .enumerate()
        {
            let phase = match (i, h.regime) {
                (0, Some(regime)) => format!("vapour, {regime}"),
                _ => String::new(),
            };
            let (ends, after, by_end) = match run.end {
                "ambient" => (
                    "at ambient".to_owned(),
                    hms_tenths(run.end_after_s),
                    kg(run.released_by_end_kg),
                ),
                "steady" => (
                    format!("steady at {}", gauge(p, run.end_pressure_gauge_pa)),
                    hms_tenths(run.end_after_s),
                    kg(run.released_by_end_kg),
                ),
                "held" => (
                    format!("held at {}", gauge(p, run.end_pressure_gauge_pa)),
                    "—".to_owned(),
                    "—".to_owned(),
                ),
                _ => ("no flow".to_owned(), "—".to_owned(), "0".to_owned()),
            };
            let mut row = vec![
                if i == 0 {
                    hole_label(p, h)
                } else {
                    String::new()
                },
                phase,
                name.to_owned(),
                if i == 0 {
                    rate_number(p, v.initial_rate_kg_s.cd_chosen)
                } else {
                    String::new()
                },
                if i == 0 {
                    sig(v.initial_rate_nm3_h.cd_chosen)
                } else {
                    String::new()
                },
                match run.choked_for_s {
                    _ if run.choked_throughout => "throughout".to_owned(),
                    Some(t) if t > 0.0 => hms_tenths(t),
                    _ => "not choked".to_owned(),
                },
                ends,
                after,
                by_end,
            ];
            for at in &run.horizons {
                row.push(kg(at.released_kg));
            }
            table.rows.push(row);
        }
    }
    table.render(out);
    if s.blanket_supply.is_some() {
        for (h, v) in &holes {
            let _ = writeln!(
                out,
                "  {} {}, at Cd {:.2}: {}.",
                hole_label(p, h),
                hole_unit(p),
                s.cd.chosen,
                v.bounds_compared
            );
        }
    }
    let _ = writeln!(
        out,
        "\nGas released, band over both bounds and Cd {:.2} to {:.2}:",
        s.cd.low, s.cd.high
    );
    let mut header = vec![("hole".to_owned(), hole_unit(p).to_owned())];
    for &t in &s.horizons_s {
        header.push((
            format!("released by {}", horizon_label(t)),
            mass_unit(p).to_owned(),
        ));
    }
    // Without a supply the release by the end is the release in all; with
    // one, each bound ends at its own time and the release goes on, so each
    // bound gets its own column, with its end times.
    let supply = s.blanket_supply.is_some();
    if supply {
        for bound in ["isothermal", "adiabatic"] {
            header.push((
                format!("{bound}, by its end"),
                format!("{} at h:mm:ss.s", mass_unit(p)),
            ));
        }
    } else {
        header.push(("in total".to_owned(), mass_unit(p).to_owned()));
    }
    let mut table = Table::new(header);
    let range = |low: String, high: String| {
        if low == high {
            low
        } else {
            format!("{low}–{high}")
        }
    };
    for (h, v) in &holes {
        let mut row = vec![hole_label(p, h)];
        for b in &v.band {
            row.push(format!(
                "{}–{}",
                kg(b.released_low_kg),
                kg(b.released_high_kg)
            ));
        }
        if supply {
            for e in [&v.isothermal_end, &v.adiabatic_end] {
                row.push(
                    match (
                        e.released_low_kg,
                        e.released_high_kg,
                        e.after_low_s,
                        e.after_high_s,
                    ) {
                        (Some(m0), Some(m1), Some(t0), Some(t1)) => format!(
                            "{} at {}",
                            range(kg(m0), kg(m1)),
                            range(hms_tenths(t0), hms_tenths(t1))
                        ),
                        _ => "— (held)".to_owned(),
                    },
                );
            }
        } else {
            let e = &v.released_by_end_band;
            row.push(if v.isothermal.cd_chosen.end == "held" {
                "—".to_owned()
            } else {
                format!("{}–{}", kg(e.released_low_kg), kg(e.released_high_kg))
            });
        }
        table.rows.push(row);
    }
    table.render(out);
    if let Some(supply) = &s.blanket_supply {
        let _ = writeln!(
            out,
            "  With the supply on the release goes on after the end, at the supply rate ({}) once steady, or at the initial rate where the supply holds the pressure.",
            p.rate(MassRate::kg_per_second(supply.rate_kg_s))
        );
    }
}

fn reach_table(s: &Study, out: &mut String) {
    let reportables: Vec<f64> = s
        .holes
        .iter()
        .find_map(|h| {
            h.liquid
                .as_ref()
                .map(|l| l.reportable.iter().map(|r| r.quantity_kg).collect())
                .or_else(|| {
                    h.vapour
                        .as_ref()
                        .map(|v| v.reportable.iter().map(|r| r.quantity_kg).collect())
                })
        })
        .unwrap_or_default();
    if reportables.is_empty() && s.to_level_m.is_none() {
        return;
    }
    if !s
        .holes
        .iter()
        .any(|h| h.liquid.is_some() || h.vapour.is_some())
    {
        return;
    }
    let p = &s.site;
    let _ = writeln!(out, "\nTime to reach, at Cd {:.2} [band]:", s.cd.chosen);
    let mut header = vec![("hole".to_owned(), hole_unit(p).to_owned())];
    for q in &reportables {
        header.push((
            format!("{} released (reportable)", p.mass(Mass::kilograms(*q))),
            "h:mm:ss".to_owned(),
        ));
    }
    if let Some(level) = s.to_level_m {
        header.push((format!("level {}", p.length(level)), "h:mm:ss".to_owned()));
    }
    let mut table = Table::new(header);
    for h in &s.holes {
        let mut row = vec![hole_label(p, h)];
        if let Some(l) = &h.liquid {
            for r in &l.reportable {
                let t = &r.reached_after_s;
                row.push(banded(
                    optional_hms(t.cd_chosen),
                    optional_hms(t.cd_high),
                    optional_hms(t.cd_low),
                ));
            }
            if let Some(to) = &l.to_level {
                let t = &to.reached_after_s;
                row.push(banded(
                    optional_hms(t.cd_chosen),
                    optional_hms(t.cd_high),
                    optional_hms(t.cd_low),
                ));
            }
        } else if let Some(v) = &h.vapour {
            for r in &v.reportable {
                row.push(match (r.earliest_s, r.latest_s) {
                    (None, _) => "never".to_owned(),
                    (Some(a), b) => format!("{}–{}", hms(a), optional_hms(b)),
                });
            }
            if s.to_level_m.is_some() {
                row.push("— (gas: the level stays)".to_owned());
            }
        } else {
            continue;
        }
        table.rows.push(row);
    }
    table.render(out);
}

// ---------------------------------------------------------------------------
// The command line

/// `leaktally whatif`'s options.
#[derive(Debug, clap::Args)]
pub struct WhatifArgs {
    /// The tank's id (tag) in the config.
    #[arg(long)]
    pub tank: String,
    #[command(flatten)]
    pub config: super::args::ConfigArg,
    /// Hole diameters in mm, comma-separated (default: 6.35,25.4,101.6,
    /// the small, medium and large holes of risk-based inspection).
    #[arg(
        long = "hole-diameters-mm",
        alias = "hole-diameter",
        value_name = "MM[,MM...]",
        conflicts_with = "hole_area"
    )]
    pub hole_diameter: Option<String>,
    /// Hole areas in mm², comma-separated, instead of diameters (each
    /// taken as the round hole of that area).
    #[arg(
        long = "hole-areas-mm2",
        alias = "hole-area",
        value_name = "MM2[,MM2...]"
    )]
    pub hole_area: Option<String>,
    /// Height of the hole above the tank bottom, m (default: the bottom,
    /// which releases the most). Above the liquid, the headspace gas vents.
    #[arg(
        long = "hole-height-m",
        alias = "hole-height",
        value_name = "M",
        allow_negative_numbers = true
    )]
    pub hole_height: Option<f64>,
    /// Liquid level, m (default: 90 % of the tank's height).
    #[arg(
        long = "level-m",
        alias = "level",
        value_name = "M",
        allow_negative_numbers = true
    )]
    pub level: Option<f64>,
    /// Also give the time until the liquid falls to this level, m.
    #[arg(
        long = "to-level-m",
        alias = "to-level",
        value_name = "M",
        allow_negative_numbers = true
    )]
    pub to_level: Option<f64>,
    /// Headspace pressure, kPa gauge (default: the last logged reading
    /// with --db, else the config's nominal_headspace_kpa or
    /// headspace_kpa, else 0 with a warning).
    #[arg(
        long = "headspace-kpa",
        alias = "headspace",
        value_name = "KPA",
        allow_negative_numbers = true,
        conflicts_with = "headspace_abs"
    )]
    pub headspace: Option<f64>,
    /// Headspace pressure, kPa absolute, instead of --headspace-kpa.
    #[arg(
        long = "headspace-kpa-abs",
        alias = "headspace-abs",
        value_name = "KPA",
        allow_negative_numbers = true
    )]
    pub headspace_abs: Option<f64>,
    /// Read the tank's last good pressure from this database (read-only)
    /// for the headspace.
    #[arg(value_parser = crate::commands::args::path_arg, long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Horizons for the released totals, comma-separated (default:
    /// 15m,1h), like 5m,30m,2h.
    #[arg(long, value_name = "T[,T...]")]
    pub horizons: Option<String>,
    /// For a hole above the liquid: a blanket regulator keeps feeding pad
    /// gas at up to this rate, with its unit: 50Nm3/h (0 °C, 101.325
    /// kPa), 60kg/h or 0.02kg/s (default: off).
    #[arg(long, value_name = "RATE")]
    pub blanket_supply: Option<String>,
    /// Discharge coefficient, 0.1 to 1 (default 1.0, conservative).
    #[arg(long, allow_negative_numbers = true)]
    pub cd: Option<f64>,
    /// Print JSON instead of the tables.
    #[arg(long)]
    pub json: bool,
}

/// Runs `leaktally whatif` as the command line gave it: checks the options,
/// makes the study and prints it.
pub fn command(args: WhatifArgs) -> anyhow::Result<()> {
    let WhatifArgs {
        tank,
        config,
        hole_diameter,
        hole_area,
        hole_height,
        level,
        to_level,
        headspace: headspace_gauge,
        headspace_abs,
        db,
        horizons,
        blanket_supply,
        cd,
        json,
    } = args;
    let config = config.load()?;
    let site = Presentation::of(&config);
    let Some(t) = config.tanks.iter().find(|t| t.id == tank) else {
        let known: Vec<&str> = config.tanks.iter().map(|t| t.id.as_str()).collect();
        bail!(
            "there is no tank {tank:?} in {}; the tanks are: {}",
            config.path.display(),
            known.join(", ")
        );
    };
    let mut holes = Vec::new();
    if let Some(text) = hole_diameter {
        holes.extend(parse_holes(&text)?.into_iter().map(HoleSize::Diameter));
    }
    if let Some(text) = hole_area {
        holes.extend(parse_hole_areas(&text)?.into_iter().map(HoleSize::Area));
    }
    let metres = |value: Option<f64>, option: &str| -> anyhow::Result<_> {
        match value {
            Some(m) if !m.is_finite() || m < 0.0 => {
                bail!("{option} {m} must be a height above the tank bottom in metres, 0 or more")
            }
            other => Ok(other.map(Length::metres)),
        }
    };
    let given = match (headspace_gauge, headspace_abs) {
        (Some(kpa), _) => Some(HeadspaceGiven::Gauge(kpa)),
        (None, Some(kpa)) => Some(HeadspaceGiven::Absolute(kpa)),
        (None, None) => None,
    };
    let now_ms = crate::store::now_ms();
    let request = Request {
        level: metres(level, "--level-m")?,
        hole_height: hole_height
            .map(check_hole_height_m)
            .transpose()?
            .map(Length::metres),
        cd: cd
            .map(check_cd)
            .transpose()?
            .map(DischargeCoefficient::new)
            .transpose()?,
        holes,
        headspace: headspace(t, given, db.as_deref(), now_ms, &site)?,
        density: liquid_density(t, db.as_deref(), now_ms, &site)?,
        horizons: horizons.as_deref().map(parse_horizons).transpose()?,
        to_level: metres(to_level, "--to-level-m")?,
        supply: blanket_supply.as_deref().map(parse_supply).transpose()?,
        site,
    };
    let study = compute(t, &request)?;
    if json {
        println!("{}", serde_json::to_string_pretty(&study)?);
    } else {
        print!("{}", human(&study));
    }
    Ok(())
}

// ---------------------------------------------------------------------------
// Parsing the options

/// Parses `--hole-diameter 6,25,100` (millimetres), each size checked by the
/// rule every command shares ([`check_hole_diameter_mm`]), and refused in
/// the same words as `leak open --hole-diameter`.
pub fn parse_holes(text: &str) -> anyhow::Result<Vec<f64>> {
    parse_list(text, "--hole-diameters-mm", |part| {
        let mm: f64 = part.parse().map_err(|_| {
            anyhow::anyhow!(
                "--hole-diameters-mm {part:?} is not a number of millimetres; write sizes like 6,25,100"
            )
        })?;
        check_hole_diameter_mm(mm)?;
        Ok(mm)
    })
}

/// Parses `--hole-area 5,500` (square millimetres): each the area of a round
/// hole whose diameter must pass the same rule as `--hole-diameter`.
pub fn parse_hole_areas(text: &str) -> anyhow::Result<Vec<f64>> {
    parse_list(text, "--hole-areas-mm2", |part| {
        let mm2: f64 = part.parse().map_err(|_| {
            anyhow::anyhow!(
                "--hole-areas-mm2 {part:?} is not a number of square millimetres; write areas like 30,500,8000"
            )
        })?;
        if !(mm2.is_finite() && mm2 > 0.0) {
            bail!(
                "--hole-areas-mm2 {part}: the area must be a positive number of square millimetres"
            );
        }
        let diameter = (mm2 / FRAC_PI_4).sqrt();
        if let Some(why) = hole_diameter_refusal(diameter) {
            bail!(
                "--hole-areas-mm2 {part}: {} mm² is a round hole {} mm across, which {why}; the option takes square millimetres (507 for a one-inch hole)",
                given_figure(mm2),
                // Plain digits would run to 150 places for a 1e-300 area.
                if diameter >= 1e-4 {
                    report::number(diameter)
                } else {
                    format!("{diameter:.2e}")
                }
            );
        }
        Ok(mm2)
    })
}

/// Parses `--horizons 5m,30m,2h` (as `--since` reads a duration): sorted,
/// without repeats.
pub fn parse_horizons(text: &str) -> anyhow::Result<Vec<TimeSpan>> {
    let mut horizons = parse_list(text, "--horizons", |part| {
        let Some(duration) = parse_duration(part) else {
            bail!(
                "--horizons {part:?} is not a duration; write horizons like 5m,30m,2h (s, m or min, h)"
            );
        };
        let seconds = duration.as_secs_f64();
        if seconds <= 0.0 {
            bail!("--horizons {part}: a horizon must be later than the moment the hole opens");
        }
        if seconds > MAX_HORIZON_S {
            bail!("--horizons {part} is more than a year; give horizons of at most 8784h");
        }
        Ok(TimeSpan::seconds(seconds))
    })?;
    horizons.sort_by(|a, b| a.si().total_cmp(&b.si()));
    horizons.dedup();
    if horizons.len() > MAX_HORIZONS {
        bail!("--horizons: at most {MAX_HORIZONS} horizons, so that the tables stay legible");
    }
    Ok(horizons)
}

/// Parses `--blanket-supply 50Nm3/h` (normal cubic metres of pad gas per
/// hour, at 0 °C and 101.325 kPa), `60kg/h` or `0.02kg/s`.
pub fn parse_supply(text: &str) -> anyhow::Result<SupplyGiven> {
    let hint = "give the pad gas rate with its unit, like 50Nm3/h (normal cubic metres per hour, 0 °C and 101.325 kPa), 60kg/h or 0.02kg/s";
    let trimmed = text.trim();
    let split = trimmed
        .find(|c: char| !(c.is_ascii_digit() || matches!(c, '.' | 'e' | 'E' | '+' | '-')))
        .unwrap_or(trimmed.len());
    let (number, unit) = trimmed.split_at(split);
    let Ok(value) = number.parse::<f64>() else {
        bail!("--blanket-supply {text:?}: {hint}");
    };
    let unit = unit.trim().to_ascii_lowercase().replace('³', "3");
    let given = match unit.as_str() {
        "nm3/h" => SupplyGiven::NormalCubicMetresPerHour(value),
        "kg/h" => SupplyGiven::KgPerHour(value),
        "kg/s" => SupplyGiven::KgPerSecond(value),
        _ => {
            bail!("--blanket-supply {text:?}: the unit {unit:?} is not one leaktally knows; {hint}")
        }
    };
    let kg_s_bound = match given {
        SupplyGiven::KgPerSecond(v) => v,
        SupplyGiven::KgPerHour(v) => v / 3600.0,
        // Hydrogen to the heaviest vapours: under 3 kg per normal m³.
        SupplyGiven::NormalCubicMetresPerHour(v) => v / 3600.0,
    };
    if !(value.is_finite() && value > 0.0) {
        bail!("--blanket-supply {text:?}: the rate must be more than 0; {hint}");
    }
    if kg_s_bound > 100.0 {
        bail!("--blanket-supply {text:?} is more than any blanketing regulator feeds; {hint}");
    }
    Ok(given)
}

/// Splits a comma-separated option and parses each part.
fn parse_list<T>(
    text: &str,
    option: &str,
    mut parse: impl FnMut(&str) -> anyhow::Result<T>,
) -> anyhow::Result<Vec<T>> {
    let parts: Vec<&str> = text.split(',').map(str::trim).collect();
    if parts.len() > MAX_HOLES.max(MAX_HORIZONS) {
        bail!(
            "{option}: at most {} values, so that the tables stay legible",
            MAX_HOLES.max(MAX_HORIZONS)
        );
    }
    parts.into_iter().map(&mut parse).collect()
}

/// The default level for a study: the tank 90 % full, a typical working
/// maximum (common practice).
pub fn default_level(tank: &Tank) -> Length {
    tank.vessel.geometry().height() * 0.9
}

#[cfg(test)]
mod tests {
    use super::*;

    fn demo() -> crate::config::Config {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml");
        crate::config::load(&path).unwrap()
    }

    #[test]
    fn hole_sizes_follow_the_shared_rule() {
        assert_eq!(parse_holes("6, 25,100").unwrap(), vec![6.0, 25.0, 100.0]);
        for bad in ["1e-300", "0.05", "6000", "-3", "nan", "", "6,,25"] {
            let err = parse_holes(bad).unwrap_err().to_string();
            assert!(err.starts_with("--hole-diameter"), "{bad}: {err}");
        }
        // The same rule as `leak open`: 0.1 mm passes, just under does not.
        assert!(parse_holes("0.1").is_ok() && parse_holes("0.099").is_err());
        assert!(parse_holes("5000").is_ok() && parse_holes("5000.1").is_err());
        let area = parse_hole_areas("506.7").unwrap()[0];
        assert!((HoleSize::Area(area).diameter_mm() - 25.4).abs() < 1e-3);
        let err = parse_hole_areas("0.005").unwrap_err().to_string();
        assert!(err.contains("below 0.1 mm"), "{err}");
        assert!(
            parse_hole_areas("2e7")
                .unwrap_err()
                .to_string()
                .contains("over 5 m")
        );
    }

    #[test]
    fn a_refused_hole_is_said_in_the_words_every_command_uses() {
        for (text, mm) in [("1e-300", 1e-300), ("6,0.05", 0.05), ("6000", 6000.0)] {
            assert_eq!(
                parse_holes(text).unwrap_err().to_string(),
                check_hole_diameter_mm(mm).unwrap_err().to_string(),
                "{text}"
            );
        }
        let err = parse_hole_areas("1e-300").unwrap_err().to_string();
        assert!(err.len() < 250, "{err}");
        assert!(
            err.contains("1e-300 mm²") && err.contains("1.13e-150 mm across"),
            "{err}"
        );
    }

    #[test]
    fn horizons_and_supplies_parse_with_their_units() {
        let h = parse_horizons("2h, 5m,30m,5m").unwrap();
        assert_eq!(
            h,
            vec![
                TimeSpan::minutes(5.0),
                TimeSpan::minutes(30.0),
                TimeSpan::hours(2.0)
            ]
        );
        for bad in ["5", "0s", "9000h", "5 parsecs", ""] {
            assert!(parse_horizons(bad).is_err(), "{bad}");
        }
        assert_eq!(
            parse_supply("50 Nm3/h").unwrap(),
            SupplyGiven::NormalCubicMetresPerHour(50.0)
        );
        assert_eq!(
            parse_supply("60kg/h").unwrap(),
            SupplyGiven::KgPerHour(60.0)
        );
        assert_eq!(
            parse_supply("0.02 KG/S").unwrap(),
            SupplyGiven::KgPerSecond(0.02)
        );
        for bad in ["50", "50 m3/h", "-5kg/h", "0kg/h", "1e9kg/s", "lots"] {
            assert!(parse_supply(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn the_headspace_says_where_it_came_from() {
        let config = demo();
        let t12 = &config.tanks[0];
        let t14 = &config.tanks[1];
        let h = headspace(t14, None, None, 0, &Presentation::default()).unwrap();
        assert_eq!(h.source, HeadspaceSource::ConfigNominal);
        assert_eq!(h.gauge, Pressure::kilopascals(15.0));
        let h = headspace(t12, None, None, 0, &Presentation::default()).unwrap();
        assert_eq!(h.source, HeadspaceSource::ConfigAssumed);
        let mut bare = t14.clone();
        bare.nominal_headspace = None;
        let h = headspace(&bare, None, None, 0, &Presentation::default()).unwrap();
        assert_eq!(h.source, HeadspaceSource::AssumedZero);
        assert!(h.warnings[0].contains("unsafe side"), "{:?}", h.warnings);
        let h = headspace(
            t14,
            Some(HeadspaceGiven::Absolute(121.325)),
            None,
            0,
            &Presentation::default(),
        )
        .unwrap();
        assert!((h.gauge.si() - 20_000.0).abs() < 1e-6);
        assert_eq!(h.source, HeadspaceSource::GivenAbsolute);
        let h = headspace(
            t14,
            Some(HeadspaceGiven::Gauge(101.0)),
            None,
            0,
            &Presentation::default(),
        )
        .unwrap();
        assert!(
            h.warnings[0].contains("--headspace-kpa-abs"),
            "{:?}",
            h.warnings
        );
        for bad in [-200.0, f64::NAN, 20_000.0] {
            assert!(
                headspace(
                    t14,
                    Some(HeadspaceGiven::Gauge(bad)),
                    None,
                    0,
                    &Presentation::default()
                )
                .is_err()
            );
        }
        assert!(
            headspace(
                t14,
                Some(HeadspaceGiven::Absolute(0.0)),
                None,
                0,
                &Presentation::default()
            )
            .is_err()
        );
    }

    #[test]
    fn the_density_says_which_and_why() {
        let config = demo();
        let (t12, t14) = (&config.tanks[0], &config.tanks[1]);
        // FF-T12: one density, no temperature sensor.
        let d = liquid_density(t12, None, 0, &Presentation::default()).unwrap();
        assert_eq!((d.kg_m3, d.source), (840.0, "fixed"));
        // FF-T14 follows its temperature; without --db the study says it
        // takes the reference density, and why.
        let d = liquid_density(t14, None, 0, &Presentation::default()).unwrap();
        assert_eq!((d.kg_m3, d.source), (792.0, "reference_temperature"));
        assert!(
            d.explanation
                .contains("15.0 °C, NOT at the liquid's temperature")
                && d.explanation.contains("--db"),
            "{}",
            d.explanation
        );
        let study = compute(
            t14,
            &Request {
                level: Some(Length::metres(2.0)),
                holes: vec![HoleSize::Diameter(25.0)],
                ..Request::for_tank(t14)
            },
        )
        .unwrap();
        assert!(
            study
                .assumptions
                .iter()
                .any(|a| a.starts_with("Density of the liquid: 792 kg/m³") && a.contains("NOT")),
            "{:?}",
            study.assumptions
        );
        assert!(human(&study).contains("density    792 kg/m³: the config's density_kg_m3"));
        // At another density the liquid figures follow it: the mass rate
        // goes as sqrt(rho dP), the column's dP as rho.
        let warm = DensityUsed {
            kg_m3: 780.0,
            ..study.density.clone()
        };
        let other = compute(
            t14,
            &Request {
                level: Some(Length::metres(2.0)),
                holes: vec![HoleSize::Diameter(25.0)],
                density: warm,
                ..Request::for_tank(t14)
            },
        )
        .unwrap();
        assert_eq!(other.density_kg_m3, 780.0);
        let rate = |s: &Study| {
            s.holes[0]
                .liquid
                .as_ref()
                .unwrap()
                .initial_rate_kg_s
                .cd_chosen
        };
        let dp = |rho: f64| 15_000.0 + rho * crate::model::STANDARD_GRAVITY * 2.0;
        let expected = ((780.0 * dp(780.0)) / (792.0 * dp(792.0))).sqrt();
        assert!((rate(&other) / rate(&study) / expected - 1.0).abs() < 1e-12);
    }

    #[test]
    fn a_hole_above_the_liquid_gives_a_vapour_forecast() {
        let config = demo();
        let t14 = &config.tanks[1];
        let request = Request {
            level: Some(Length::metres(2.0)),
            hole_height: Some(Length::metres(2.3)),
            holes: vec![HoleSize::Diameter(25.4)],
            ..Request::for_tank(t14)
        };
        let study = compute(t14, &request).unwrap();
        let hole = &study.holes[0];
        assert_eq!((hole.phase, hole.regime), ("vapour", Some("subcritical")));
        let v = hole.vapour.as_ref().unwrap();
        let iso = &v.isothermal.cd_chosen;
        let adi = &v.adiabatic.cd_chosen;
        assert_eq!((iso.end, adi.end), ("ambient", "ambient"));
        assert!(iso.released_by_end_kg > adi.released_by_end_kg);
        assert!(iso.released_by_end_kg > 0.0 && iso.released_by_end_kg < v.initial_gas_kg);
        // Isothermal released: (p0 - pa) V M/(R T) (the ideal gas law).
        let expected = 15_000.0 * v.ullage_volume_m3 * 0.028_01 / (GAS_CONSTANT * 288.15);
        assert!((iso.released_by_end_kg / expected - 1.0).abs() < 1e-12);
        let text = human(&study);
        assert!(text.contains("vapour, subcritical"), "{text}");
        assert!(text.contains("blanket supply off"), "{text}");
        assert!(!text.contains("flow stops after"), "{text}");
    }
}
