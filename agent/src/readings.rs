//! Readings from outside the agent: a CSV of timestamped tank readings, as
//! a plant historian exports them, turned into the samples the estimator
//! sees live, and an account of how every column was read.
//!
//! Which column holds what comes from, in order of precedence:
//!
//! 1. `--column "NAME=SPEC"` on the command line;
//! 2. a small TOML file (`--columns FILE.toml`, or `<readings>.columns.toml`
//!    found beside the readings), whose `[columns]` table maps names to the
//!    same specs, and which also gives the separator, a decimal comma, the
//!    time format and the time zone;
//! 3. the header, recognised by convention: the names `time`, `level_m`,
//!    `pressure_kpa`, `pressure_kpa_g`, `headspace_pa`, `transfer_m3_h`,
//!    `temperature_c`, `tank` and the like, and tag-style names with the unit
//!    in brackets or parentheses (`FF-T14.PT-101 [kPa(g)]`, `LT-101 (mm)`),
//!    where a pressure unit may carry its reference (`kPa(g)`, `kPag`,
//!    `barg`, `psia`, `kPa abs`, or `_g`, `_abs` after the name).
//!
//! A SPEC is `QUANTITY[,UNIT][,gauge|absolute][,headspace|tap=M][,out]`, or
//! `unused`: the quantity is one of time, level, pressure, transfer,
//! temperature or tank. Every column ends up either used or listed as
//! unused with the reason, and two columns that could be the same quantity
//! are an error that says how to choose: nothing is guessed quietly.
//!
//! Pressure is converted into what the tank's configured transmitter reads
//! (its reference and its tap), so the estimator sees the very kind of value
//! it sees live: absolute is gauge plus the site's ambient pressure, and a
//! headspace reading brought to a submerged tap gains the liquid column at
//! the row's level, at the density the replay uses. A column whose
//! reference or tap is not stated is taken as the configured transmitter's,
//! and the report says so. A tank with a transmitter and a file with no
//! pressure column is an error unless a headspace pressure is stated for the
//! whole file. Readings that do not fit (absolute below ambient by more than
//! a plausible vacuum, gauge readings that sit at the ambient pressure,
//! levels outside the tank, temperatures outside any storage) are counted
//! and warned about.
//!
//! Rows come out one at a time, in file order, as compact [`Row`]s (48
//! bytes), so a long file streams; [`TimeOrder`] counts repeated times and
//! rows out of order for the caller, which sorts when it must. A bad row
//! (an unreadable time, a level that is not a number) gets a message naming
//! its line and is skipped and counted.
//!
//! Left out: separate date and time columns, a units row under the header,
//! thousands separators, and columns picked by position rather than name.

use crate::acquire::sample::{Quality, Reading, TankSample};
use crate::config::units::{Quantity as UnitKind, Unit};
use crate::config::{DEFAULT_PRESSURE_ACCURACY_MIN_PA, PressureSensor, Tank, Uncertainty};
use crate::model::{Density, Length, PressureTap};
use anyhow::{Context, bail};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::fmt;
use std::io::{BufRead, BufReader, Read};
use std::path::{Path, PathBuf};

/// What a column holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Quantity {
    Time,
    Level,
    Pressure,
    Transfer,
    Temperature,
    Tank,
}

impl Quantity {
    pub fn name(self) -> &'static str {
        match self {
            Quantity::Time => "time",
            Quantity::Level => "level",
            Quantity::Pressure => "pressure",
            Quantity::Transfer => "transfer",
            Quantity::Temperature => "temperature",
            Quantity::Tank => "tank",
        }
    }

    fn parse(word: &str) -> Option<Self> {
        Some(match word {
            "time" => Quantity::Time,
            "level" => Quantity::Level,
            "pressure" => Quantity::Pressure,
            "transfer" => Quantity::Transfer,
            "temperature" => Quantity::Temperature,
            "tank" => Quantity::Tank,
            _ => return None,
        })
    }

    /// The kind of unit the quantity is read in, if it has one.
    fn unit_kind(self) -> Option<UnitKind> {
        match self {
            Quantity::Level => Some(UnitKind::Length),
            Quantity::Pressure => Some(UnitKind::Pressure),
            Quantity::Transfer => Some(UnitKind::Flow),
            Quantity::Temperature => Some(UnitKind::Temperature),
            Quantity::Time | Quantity::Tank => None,
        }
    }
}

/// What a pressure reading is relative to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Reference {
    Gauge,
    Absolute,
}

impl Reference {
    pub fn name(self) -> &'static str {
        match self {
            Reference::Gauge => "gauge",
            Reference::Absolute => "absolute",
        }
    }
}

/// What one column holds and how to read it.
#[derive(Debug, Clone, PartialEq)]
pub struct ColumnSpec {
    pub quantity: Quantity,
    /// The unit's canonical name (`kPa`, `mm`, `m3/h`, `degC`); none for
    /// time and tank.
    pub unit: Option<&'static str>,
    /// For pressure: gauge or absolute; `None` takes the configured
    /// transmitter's.
    pub reference: Option<Reference>,
    /// For pressure: where the reading is taken; `None` takes the configured
    /// transmitter's tap.
    pub tap: Option<PressureTap>,
    /// For transfer: positive means out of the tank (the default is into).
    pub outward: bool,
}

impl ColumnSpec {
    fn new(quantity: Quantity, unit: Option<&'static str>) -> Self {
        Self {
            quantity,
            unit,
            reference: None,
            tap: None,
            outward: false,
        }
    }
}

/// A column's role: used as a quantity, or deliberately unused.
#[derive(Debug, Clone, PartialEq)]
pub enum Mapping {
    Use(ColumnSpec),
    Unused,
}

/// Parses a SPEC (`pressure,kPa,gauge,headspace`, `level,mm`, `unused`).
pub fn parse_spec(text: &str) -> Result<Mapping, String> {
    let mut tokens = text.split(',').map(str::trim);
    let first = tokens.next().unwrap_or("").to_ascii_lowercase();
    if first == "unused" {
        if let Some(extra) = tokens.find(|t| !t.is_empty()) {
            return Err(format!("\"unused\" takes nothing after it (got {extra:?})"));
        }
        return Ok(Mapping::Unused);
    }
    let Some(quantity) = Quantity::parse(&first) else {
        return Err(format!(
            "{first:?} is not a quantity; begin with one of time, level, pressure, transfer, temperature, tank or unused"
        ));
    };
    let mut spec = ColumnSpec::new(quantity, None);
    let set_reference = |spec: &mut ColumnSpec, r: Reference| {
        if spec.reference.is_some_and(|old| old != r) {
            return Err("the reference is given twice, differently".to_owned());
        }
        spec.reference = Some(r);
        Ok(())
    };
    for token in tokens.filter(|t| !t.is_empty()) {
        let lower = token.to_ascii_lowercase();
        let pressure_only = |what: &str| {
            if quantity == Quantity::Pressure {
                Ok(())
            } else {
                Err(format!(
                    "{what} is for a pressure column, not {}",
                    quantity.name()
                ))
            }
        };
        match lower.as_str() {
            "gauge" | "g" => {
                pressure_only("gauge")?;
                set_reference(&mut spec, Reference::Gauge)?;
            }
            "absolute" | "abs" | "a" => {
                pressure_only("absolute")?;
                set_reference(&mut spec, Reference::Absolute)?;
            }
            "headspace" => {
                pressure_only("headspace")?;
                spec.tap = Some(PressureTap::Headspace);
            }
            "out" | "outward" | "into" | "in" if quantity == Quantity::Transfer => {
                spec.outward = lower.starts_with("out");
            }
            _ if lower.starts_with("tap") => {
                pressure_only("a tap elevation")?;
                let value = lower[3..]
                    .trim_start_matches([' ', '=', ':'])
                    .trim_end_matches('m')
                    .trim();
                let elevation: f64 = value
                    .parse()
                    .ok()
                    .filter(|v: &f64| v.is_finite())
                    .ok_or_else(|| {
                        format!("{token:?}: give the tap elevation in metres, as tap=0.2")
                    })?;
                spec.tap = Some(PressureTap::Submerged {
                    elevation: Length::metres(elevation),
                });
            }
            _ => {
                let Some(kind) = quantity.unit_kind() else {
                    return Err(format!(
                        "{token:?}: a {} column takes no unit or option",
                        quantity.name()
                    ));
                };
                let Some(unit) = parse_unit(token) else {
                    return Err(format!(
                        "{token:?} is not a unit or option leaktally knows; the {} units are {}",
                        quantity.name(),
                        Unit::names(kind).join(", ")
                    ));
                };
                if unit.kind != kind {
                    return Err(format!(
                        "{token:?} is a unit of {}, not of {}; the {} units are {}",
                        unit.kind.name(),
                        quantity.name(),
                        quantity.name(),
                        Unit::names(kind).join(", ")
                    ));
                }
                if spec.unit.is_some() {
                    return Err(format!("two units ({token:?} is the second)"));
                }
                spec.unit = Some(unit.name);
                if let Some(r) = unit.reference {
                    set_reference(&mut spec, r)?;
                }
            }
        }
    }
    if let Some(kind) = quantity.unit_kind()
        && spec.unit.is_none()
    {
        return Err(format!(
            "a {} column needs its unit, one of {}",
            quantity.name(),
            Unit::names(kind).join(", ")
        ));
    }
    Ok(Mapping::Use(spec))
}

/// A unit read from a header or a spec.
#[derive(Debug, Clone, Copy, PartialEq)]
struct ParsedUnit {
    name: &'static str,
    kind: UnitKind,
    reference: Option<Reference>,
}

/// Historian spellings of the units leaktally knows (lower case, spaces
/// removed), with the canonical name of each.
const UNIT_SPELLINGS: &[(&str, &str)] = &[
    ("m", "m"),
    ("metre", "m"),
    ("metres", "m"),
    ("meter", "m"),
    ("meters", "m"),
    ("cm", "cm"),
    ("mm", "mm"),
    ("ft", "ft"),
    ("feet", "ft"),
    ("in", "in"),
    ("inch", "in"),
    ("inches", "in"),
    ("pa", "Pa"),
    ("kpa", "kPa"),
    ("mpa", "MPa"),
    ("mbar", "mbar"),
    // The hectopascal is the millibar (by definition).
    ("hpa", "mbar"),
    ("bar", "bar"),
    ("psi", "psi"),
    ("m3/s", "m3/s"),
    ("m3_s", "m3/s"),
    ("m3/h", "m3/h"),
    ("m3_h", "m3/h"),
    ("m3/hr", "m3/h"),
    ("l/s", "L/s"),
    ("l_s", "L/s"),
    ("l/min", "L/min"),
    ("l_min", "L/min"),
    ("lpm", "L/min"),
    ("gal/min", "gal/min"),
    ("gpm", "gal/min"),
    ("usgpm", "gal/min"),
    ("bbl/h", "bbl/h"),
    ("bbl/hr", "bbl/h"),
    ("kg/s", "kg/s"),
    ("kg/h", "kg/h"),
    ("t/h", "t/h"),
    ("degc", "degC"),
    ("c", "degC"),
    ("celsius", "degC"),
    ("degf", "degF"),
    ("f", "degF"),
    ("fahrenheit", "degF"),
    ("k", "K"),
    ("kelvin", "K"),
];

/// Reference markers a pressure unit may carry at its end, longest first.
const REFERENCE_MARKERS: &[(&str, Reference)] = &[
    ("(gauge)", Reference::Gauge),
    ("(absolute)", Reference::Absolute),
    ("(abs)", Reference::Absolute),
    ("gauge", Reference::Gauge),
    ("absolute", Reference::Absolute),
    ("(g)", Reference::Gauge),
    ("(a)", Reference::Absolute),
    ("abs", Reference::Absolute),
    ("-g", Reference::Gauge),
    ("_g", Reference::Gauge),
    ("-a", Reference::Absolute),
    ("_a", Reference::Absolute),
    ("g", Reference::Gauge),
    ("a", Reference::Absolute),
];

/// Reads a unit as a historian writes it: `kPa`, `kPa(g)`, `barg`, `psia`,
/// `kPa abs`, `m³/h`, `°C`, `deg F`.
fn parse_unit(text: &str) -> Option<ParsedUnit> {
    let normal: String = text
        .trim()
        .replace('³', "3")
        .replace(['°', 'º'], "deg")
        .chars()
        .filter(|c| !c.is_whitespace())
        .collect::<String>()
        .to_lowercase();
    let plain = |t: &str| {
        UNIT_SPELLINGS
            .iter()
            .find(|(spelling, _)| *spelling == t)
            .and_then(|&(_, name)| Unit::parse(name).map(|u| (name, u.quantity())))
    };
    if let Some((name, kind)) = plain(&normal) {
        return Some(ParsedUnit {
            name,
            kind,
            reference: None,
        });
    }
    REFERENCE_MARKERS.iter().find_map(|&(marker, reference)| {
        let rest = normal.strip_suffix(marker)?;
        let (name, kind) = plain(rest).filter(|(_, k)| *k == UnitKind::Pressure)?;
        Some(ParsedUnit {
            name,
            kind,
            reference: Some(reference),
        })
    })
}

/// How time values are written.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum TimeFormat {
    /// RFC 3339 or `YYYY-MM-DD HH:MM:SS[.fff]` (with or without an offset),
    /// or Unix seconds.
    Auto,
    UnixSeconds,
    UnixMillis,
    /// A strftime pattern (`%d.%m.%Y %H:%M:%S`), with `%z` if the values
    /// carry their offset.
    Pattern(String),
}

impl TimeFormat {
    pub fn parse(text: &str) -> Result<Self, String> {
        Ok(match text.trim().to_ascii_lowercase().as_str() {
            "auto" | "rfc3339" | "iso" | "iso8601" => TimeFormat::Auto,
            "unix" | "unix_s" | "unix_seconds" => TimeFormat::UnixSeconds,
            "unix_ms" | "unix_millis" | "unix_milliseconds" => TimeFormat::UnixMillis,
            _ if text.contains('%') => TimeFormat::Pattern(text.trim().to_owned()),
            _ => {
                return Err(format!(
                    "{text:?} is not a time format; give auto, unix_s, unix_ms or a strftime pattern such as \"%d.%m.%Y %H:%M:%S\""
                ));
            }
        })
    }

    fn describe(&self) -> String {
        match self {
            TimeFormat::Auto => "RFC 3339, YYYY-MM-DD HH:MM:SS or Unix seconds".to_owned(),
            TimeFormat::UnixSeconds => "Unix seconds".to_owned(),
            TimeFormat::UnixMillis => "Unix milliseconds".to_owned(),
            TimeFormat::Pattern(p) => format!("the pattern {p:?}"),
        }
    }
}

/// The time zone for times written without an offset.
#[derive(Debug, Clone)]
pub struct Zone {
    /// As the user wrote it (`Europe/Berlin`, `+01:00`, `UTC`).
    pub name: String,
    tz: jiff::tz::TimeZone,
}

impl PartialEq for Zone {
    fn eq(&self, other: &Self) -> bool {
        self.name == other.name
    }
}

impl Zone {
    fn utc() -> Self {
        Self {
            name: "UTC".to_owned(),
            tz: jiff::tz::TimeZone::UTC,
        }
    }

    /// An IANA name (`Europe/Berlin`), `UTC`, or a fixed offset (`+01:00`,
    /// `-0500`, `UTC+1`).
    pub fn parse(text: &str) -> Result<Self, String> {
        let t = text.trim();
        let upper = t.to_ascii_uppercase();
        if ["UTC", "Z", "GMT"].contains(&upper.as_str()) {
            return Ok(Self::utc());
        }
        let offset_text = upper
            .strip_prefix("UTC")
            .or_else(|| upper.strip_prefix("GMT"))
            .unwrap_or(&upper);
        if let Some(seconds) = parse_offset(offset_text) {
            let offset = jiff::tz::Offset::from_seconds(seconds)
                .map_err(|e| format!("offset {t:?}: {e}"))?;
            return Ok(Self {
                name: t.to_owned(),
                tz: jiff::tz::TimeZone::fixed(offset),
            });
        }
        match jiff::tz::TimeZone::get(t) {
            Ok(tz) => Ok(Self {
                name: t.to_owned(),
                tz,
            }),
            Err(_) => Err(format!(
                "{t:?} is not a time zone this machine knows; give an IANA name such as Europe/Berlin, UTC, or an offset such as +01:00"
            )),
        }
    }

    fn is_fixed(&self) -> bool {
        self.tz.iana_name().is_none_or(|n| n == "UTC")
    }
}

/// `+01:00`, `-0500`, `+1` as seconds east of UTC.
fn parse_offset(text: &str) -> Option<i32> {
    let sign = match text.chars().next()? {
        '+' => 1,
        '-' => -1,
        _ => return None,
    };
    let digits = &text[1..];
    let (hours, minutes) = match digits.split_once(':') {
        Some((h, m)) => (h, m),
        None if digits.len() == 4 => digits.split_at(2),
        None => (digits, "0"),
    };
    let hours: i32 = hours.parse().ok().filter(|h| (0..=18).contains(h))?;
    let minutes: i32 = minutes.parse().ok().filter(|m| (0..60).contains(m))?;
    Some(sign * (hours * 3600 + minutes * 60))
}

/// Where a mapping came from, for the report.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Origin {
    CommandLine,
    ColumnsFile,
    Header,
}

impl Origin {
    fn name(&self) -> &'static str {
        match self {
            Origin::CommandLine => "command line",
            Origin::ColumnsFile => "columns file",
            Origin::Header => "recognised from the header",
        }
    }

    /// Where, for a sentence: "on the command line", "in the columns file".
    fn place(&self) -> &'static str {
        match self {
            Origin::CommandLine => "on the command line",
            Origin::ColumnsFile => "in the columns file",
            Origin::Header => "by the header",
        }
    }
}

/// How to read a readings file: its format and any explicit mappings.
#[derive(Debug, Clone, Default)]
pub struct Layout {
    /// The field separator; `None` detects it from the header line.
    pub separator: Option<u8>,
    pub decimal_comma: bool,
    pub time_format: Option<TimeFormat>,
    /// For times without an offset; `None` takes them as UTC, and says so.
    pub time_zone: Option<Zone>,
    /// Lines before the header (an export's preamble).
    pub skip_lines: usize,
    /// Explicit mappings by column name, in the order given.
    pub columns: Vec<(String, Mapping, Origin)>,
    /// The columns file these settings came from, if any.
    pub columns_file: Option<PathBuf>,
}

/// The columns file as written.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawLayout {
    separator: Option<toml::Spanned<String>>,
    decimal: Option<toml::Spanned<String>>,
    time_format: Option<toml::Spanned<String>>,
    time_zone: Option<toml::Spanned<String>>,
    skip_lines: Option<usize>,
    #[serde(default)]
    columns: BTreeMap<String, toml::Spanned<RawColumn>>,
}

#[derive(Debug, Deserialize)]
#[serde(untagged)]
enum RawColumn {
    Spec(String),
    Table(RawColumnTable),
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawColumnTable {
    quantity: String,
    unit: Option<String>,
    reference: Option<String>,
    tap: Option<String>,
    tap_elevation_m: Option<f64>,
    direction: Option<String>,
}

impl RawColumnTable {
    /// The same as a SPEC string, so both forms mean exactly the same.
    fn as_spec(&self) -> String {
        let mut parts = vec![self.quantity.clone()];
        parts.extend(self.unit.clone());
        parts.extend(self.reference.clone());
        parts.extend(self.tap.clone());
        parts.extend(self.tap_elevation_m.map(|z| format!("tap={z}")));
        parts.extend(self.direction.clone());
        parts.join(",")
    }
}

/// The separator named in a columns file or on the command line.
pub fn parse_separator(text: &str) -> Result<u8, String> {
    match text {
        "," | "comma" => Ok(b','),
        ";" | "semicolon" => Ok(b';'),
        "\t" | "\\t" | "tab" => Ok(b'\t'),
        "|" | "pipe" => Ok(b'|'),
        " " | "space" => Ok(b' '),
        _ => Err(format!(
            "{text:?} is not a separator leaktally reads; give one of , ; tab | space"
        )),
    }
}

/// The columns file beside a readings file: `<file>.columns.toml`.
pub fn columns_file_beside(readings: &Path) -> PathBuf {
    let mut name = readings.file_name().unwrap_or_default().to_os_string();
    name.push(".columns.toml");
    readings.with_file_name(name)
}

impl Layout {
    /// Reads a columns file; every problem names file:line:column.
    pub fn from_file(path: &Path) -> anyhow::Result<Self> {
        let text = std::fs::read_to_string(path)
            .with_context(|| format!("cannot read the columns file {}", path.display()))?;
        Self::from_toml(&text, path)
    }

    pub fn from_toml(text: &str, path: &Path) -> anyhow::Result<Self> {
        let file = path.display();
        let at = |span: std::ops::Range<usize>| {
            let (line, column) = crate::config::line_col(text, span.start);
            format!("{file}:{line}:{column}")
        };
        let raw: RawLayout = toml::from_str(text).map_err(|e| {
            anyhow::anyhow!(
                "{}: {}; the keys are separator, decimal, time_format, time_zone, skip_lines and a [columns] table (README, \"Readings files\")",
                at(e.span().unwrap_or(0..0)),
                e.message().trim()
            )
        })?;
        let mut layout = Layout {
            columns_file: Some(path.to_owned()),
            skip_lines: raw.skip_lines.unwrap_or(0),
            ..Layout::default()
        };
        if let Some(s) = &raw.separator {
            layout.separator = Some(
                parse_separator(s.get_ref())
                    .map_err(|e| anyhow::anyhow!("{}: {e}", at(s.span())))?,
            );
        }
        if let Some(d) = &raw.decimal {
            layout.decimal_comma = match d.get_ref().as_str() {
                "," | "comma" => true,
                "." | "point" => false,
                other => bail!(
                    "{}: decimal {other:?}: give \",\" for a decimal comma or \".\" for a point",
                    at(d.span())
                ),
            };
        }
        if let Some(f) = &raw.time_format {
            layout.time_format = Some(
                TimeFormat::parse(f.get_ref())
                    .map_err(|e| anyhow::anyhow!("{}: {e}", at(f.span())))?,
            );
        }
        if let Some(z) = &raw.time_zone {
            layout.time_zone = Some(
                Zone::parse(z.get_ref()).map_err(|e| anyhow::anyhow!("{}: {e}", at(z.span())))?,
            );
        }
        for (name, column) in &raw.columns {
            let spec = match column.get_ref() {
                RawColumn::Spec(s) => s.clone(),
                RawColumn::Table(t) => t.as_spec(),
            };
            let mapping = parse_spec(&spec)
                .map_err(|e| anyhow::anyhow!("{}: column {name:?}: {e}", at(column.span())))?;
            layout
                .columns
                .push((name.clone(), mapping, Origin::ColumnsFile));
        }
        Ok(layout)
    }

    /// Adds `--column NAME=SPEC` mappings; they take precedence over the
    /// columns file's for the same name.
    pub fn add_command_line(&mut self, entries: &[String]) -> anyhow::Result<()> {
        for entry in entries {
            let (name, mapping) =
                split_column_option(entry).with_context(|| format!("--column {entry:?}"))?;
            self.columns.retain(|(n, _, _)| *n != name);
            self.columns.push((name, mapping, Origin::CommandLine));
        }
        Ok(())
    }
}

/// Splits `NAME=SPEC` at the first `=` whose right-hand side begins with a
/// quantity, so a column name may itself hold `=`.
fn split_column_option(entry: &str) -> anyhow::Result<(String, Mapping)> {
    let mut last_error = None;
    for (i, _) in entry.match_indices('=') {
        let (name, spec) = (entry[..i].trim(), &entry[i + 1..]);
        let word = spec
            .split(',')
            .next()
            .unwrap_or("")
            .trim()
            .to_ascii_lowercase();
        if word != "unused" && Quantity::parse(&word).is_none() {
            continue;
        }
        if name.is_empty() {
            bail!("no column name before the \"=\"; write \"NAME=QUANTITY,UNIT\"");
        }
        match parse_spec(spec) {
            Ok(mapping) => return Ok((name.to_owned(), mapping)),
            Err(e) => last_error = Some(e),
        }
    }
    match last_error {
        Some(e) => bail!("{e}"),
        None => bail!(
            "write \"NAME=QUANTITY[,UNIT][,gauge|absolute][,headspace|tap=M]\" or \"NAME=unused\", for example \"PT-14 [kPa(g)]=pressure,kPa,gauge\""
        ),
    }
}

/// What a header says of its column, by convention.
#[derive(Debug, Clone, PartialEq)]
enum Recognised {
    Column(ColumnSpec),
    /// A time column whose header names its zone (`Time [UTC+01:00]`).
    TimeInZone(Zone),
    Nothing(String),
}

/// Reads a header by the conventions the module doc lists.
fn recognise(header: &str) -> Recognised {
    let lower = header.trim().to_lowercase();
    let words = |s: &str| -> String {
        s.chars()
            .map(|c| if c.is_alphanumeric() { c } else { ' ' })
            .collect::<String>()
            .split_whitespace()
            .collect::<Vec<_>>()
            .join(" ")
    };
    const TIME_NAMES: &[&str] = &[
        "time",
        "timestamp",
        "utc",
        "datetime",
        "date time",
        "time stamp",
        "date and time",
        "time utc",
        "timestamp utc",
        "utc time",
    ];
    const TANK_NAMES: &[&str] = &["tank", "tank id", "tank tag", "tag"];
    let (base_as_written, bracketed) = split_bracketed_unit(header);
    let base = base_as_written.to_lowercase();
    let base = base.as_str();
    let bracketed_lower = bracketed.map(str::to_lowercase);
    if TIME_NAMES.contains(&words(base).as_str()) {
        return match bracketed {
            None => Recognised::Column(ColumnSpec::new(Quantity::Time, None)),
            Some(zone) => match Zone::parse(zone) {
                Ok(z) => Recognised::TimeInZone(z),
                Err(_) => Recognised::Nothing(format!(
                    "a time column whose zone {zone:?} leaktally cannot read; map it with --column \"{header}=time\" and give --time-zone"
                )),
            },
        };
    }
    if bracketed.is_none() && TANK_NAMES.contains(&words(&lower).as_str()) {
        return Recognised::Column(ColumnSpec::new(Quantity::Tank, None));
    }
    // The conventional names: a quantity word, an underscore, the unit.
    const PREFIXES: &[(&str, Quantity)] = &[
        ("level_", Quantity::Level),
        ("pressure_", Quantity::Pressure),
        ("headspace_", Quantity::Pressure),
        ("transfer_", Quantity::Transfer),
        ("temperature_", Quantity::Temperature),
        ("temp_", Quantity::Temperature),
    ];
    if bracketed.is_none()
        && let Some((prefix, quantity)) = PREFIXES.iter().find(|(p, _)| lower.starts_with(p))
    {
        let rest = &lower[prefix.len()..];
        let unit = parse_unit(rest).or_else(|| {
            // `pressure_kpa_abs`: the unit, then the reference.
            let (unit, marker) = rest.rsplit_once('_')?;
            let reference = match marker {
                "g" | "gauge" => Reference::Gauge,
                "a" | "abs" | "absolute" => Reference::Absolute,
                _ => return None,
            };
            parse_unit(unit)
                .filter(|u| u.reference.is_none())
                .map(|u| ParsedUnit {
                    reference: Some(reference),
                    ..u
                })
        });
        return match unit {
            Some(u) if Some(u.kind) == quantity.unit_kind() => {
                let mut spec = ColumnSpec::new(*quantity, Some(u.name));
                spec.reference = u.reference;
                if *prefix == "headspace_" {
                    // The simulator's truth file and this convention: the
                    // headspace, gauge unless the name says otherwise.
                    spec.tap = Some(PressureTap::Headspace);
                    spec.reference = Some(u.reference.unwrap_or(Reference::Gauge));
                }
                Recognised::Column(spec)
            }
            _ => Recognised::Nothing(format!(
                "named like a {} column, but {rest:?} is not a {} unit leaktally knows; map it with --column",
                quantity.name(),
                quantity.name()
            )),
        };
    }
    // Tag style: the unit in brackets or parentheses at the end, or as the
    // last word (`PT-14 kPa(g)`, `LT_101_mm`).
    let candidate = bracketed_lower
        .as_deref()
        .map(|u| (base, u))
        .or_else(|| {
            let (base, last) = lower.trim().rsplit_once([' ', '_'])?;
            // Short words are too often not units ("flow in").
            (last.len() >= 2 && last != "in").then_some((base, last))
        })
        .or_else(|| {
            // `PT-14 kPa(g)`: the brackets hold only the reference.
            let (base, last) = lower.trim().rsplit_once(' ')?;
            last.contains('(').then_some((base, last))
        });
    let not_recognised = || {
        Recognised::Nothing(
            "not recognised as a time, level, pressure, transfer, temperature or tank (no unit leaktally knows in brackets or after an underscore); map it with --column \"NAME=QUANTITY,UNIT\" if it is one".to_owned(),
        )
    };
    let Some((base, unit_text)) = candidate else {
        return not_recognised();
    };
    let Some(unit) = parse_unit(unit_text) else {
        if bracketed.is_some() {
            return Recognised::Nothing(format!(
                "{unit_text:?} in brackets is not a unit leaktally knows; map the column with --column \"NAME=QUANTITY,UNIT\" if it is one"
            ));
        }
        return not_recognised();
    };
    let quantity = match unit.kind {
        UnitKind::Length => Quantity::Level,
        UnitKind::Pressure => Quantity::Pressure,
        UnitKind::Flow => Quantity::Transfer,
        UnitKind::Temperature => Quantity::Temperature,
    };
    let base_words = words(base);
    let has = |w: &str| base_words.split(' ').any(|x| x == w);
    // Names that carry a unit of the quantity but are not the quantity
    // itself: the space above the liquid, a setpoint, an alarm limit.
    if let Some(word) = [
        "ullage",
        "outage",
        "interface",
        "setpoint",
        "sp",
        "alarm",
        "limit",
    ]
    .into_iter()
    .find(|w| has(w))
    {
        return Recognised::Nothing(format!(
            "a {} unit, but \"{word}\" in the name says it is not the {} itself; map it with --column if it is",
            unit.kind.name(),
            quantity.name()
        ));
    }
    let mut spec = ColumnSpec::new(quantity, Some(unit.name));
    spec.reference = unit.reference;
    if quantity == Quantity::Pressure {
        if spec.reference.is_none() {
            if has("abs") || has("absolute") {
                spec.reference = Some(Reference::Absolute);
            } else if has("gauge") || has("g") {
                spec.reference = Some(Reference::Gauge);
            }
        }
        if has("headspace")
            || base_words.contains("vapour space")
            || base_words.contains("vapor space")
        {
            spec.tap = Some(PressureTap::Headspace);
        }
    }
    Recognised::Column(spec)
}

/// Splits `NAME [UNIT]` or `NAME (UNIT)` (brackets balanced, at the end) into
/// the name and what the brackets hold. Brackets that hold only a
/// reference (`kPa(g)`) belong to the unit before them, not to the name.
fn split_bracketed_unit(header: &str) -> (&str, Option<&str>) {
    let trimmed = header.trim();
    let (open, close) = match trimmed.chars().last() {
        Some(']') => ('[', ']'),
        Some(')') => ('(', ')'),
        _ => return (trimmed, None),
    };
    let mut depth = 0;
    for (i, c) in trimmed.char_indices().rev() {
        if c == close {
            depth += 1;
        } else if c == open {
            depth -= 1;
            if depth == 0 {
                let inner = trimmed[i + 1..trimmed.len() - 1].trim();
                let marker_only = ["g", "a", "abs", "gauge", "absolute"]
                    .contains(&inner.to_ascii_lowercase().as_str());
                if marker_only {
                    return (trimmed, None);
                }
                return (trimmed[..i].trim_end(), Some(inner));
            }
        }
    }
    (trimmed, None)
}

/// What the replay's estimator expects, so that the import converts to it.
#[derive(Debug, Clone)]
pub struct Target<'a> {
    pub tank: &'a Tank,
    /// The config's other tank ids: a wide export's columns may carry them.
    pub other_tanks: Vec<String>,
    /// The density the replay uses (its override or the config's), for the
    /// liquid column between a tap and the headspace, and mass flows.
    pub density_kg_m3: f64,
    /// `--headspace`: a gauge headspace pressure held for the whole file, Pa.
    pub stated_headspace_pa: Option<f64>,
}

/// A transmitter reading's kind: its reference and where it is taken.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Kind {
    absolute: bool,
    tap: PressureTap,
}

impl Kind {
    fn describe(&self) -> String {
        let reference = if self.absolute { "absolute" } else { "gauge" };
        match self.tap {
            PressureTap::Headspace => format!("{reference}, in the headspace"),
            PressureTap::Submerged { elevation } => {
                format!(
                    "{reference}, at a tap {:.2} m above the bottom",
                    elevation.si()
                )
            }
        }
    }
}

/// Where the estimator's pressure comes from.
#[derive(Debug, Clone)]
enum PressureSource {
    /// A column, read as `from` and converted to the transmitter's `to`.
    Column {
        index: usize,
        si_per_unit: f64,
        unit: &'static str,
        from: Kind,
        to: Kind,
    },
    /// `--headspace`, converted to the transmitter's kind on every row.
    Stated { headspace_pa: f64, to: Kind },
    /// No pressure at all: the config's assumed headspace (or a stated one)
    /// stands in, as it does live.
    Assumed,
}

/// One used column.
#[derive(Debug, Clone, Serialize)]
pub struct UsedColumn {
    pub name: String,
    pub quantity: Quantity,
    pub unit: Option<String>,
    /// How it was read, in words (reference and tap, direction, zone).
    pub read_as: String,
    /// For pressure: the reference and the tap the values were read with
    /// (stated, or taken from the configured transmitter).
    pub reference: Option<&'static str>,
    pub tap: Option<String>,
    /// command line, columns file, or recognised from the header.
    pub from: String,
}

/// One unused column, and why.
#[derive(Debug, Clone, Serialize)]
pub struct UnusedColumn {
    pub name: String,
    pub why: String,
}

/// Rows that repeat an earlier time.
#[derive(Debug, Clone, Default, Serialize)]
pub struct RepeatedTimes {
    pub rows: u64,
    /// How many of them differ in value from the row kept.
    pub differing: u64,
    /// Their line numbers (the first 20).
    pub lines: Vec<u64>,
}

/// Rows that came earlier in time than a row above them.
#[derive(Debug, Clone, Default, Serialize)]
pub struct OutOfOrder {
    pub rows: u64,
    pub first_line: Option<u64>,
    /// What was done about it: "sorted by time", or "none" when in order.
    pub action: String,
}

/// How a readings file was read: every column, every count, every warning.
#[derive(Debug, Clone, Default, Serialize)]
pub struct ImportReport {
    pub file: String,
    pub columns_file: Option<String>,
    pub separator: String,
    pub decimal: String,
    /// How the times were read and in which zone.
    pub time: String,
    pub columns: Vec<UsedColumn>,
    pub unused: Vec<UnusedColumn>,
    /// What the estimator's pressure is and how it was made.
    pub pressure: String,
    /// `--headspace`, kPa gauge, when given.
    pub headspace_stated_kpa: Option<f64>,
    /// Data rows read (after the header).
    pub rows_read: u64,
    /// Rows for the tank, in the replay.
    pub rows_used: u64,
    pub rows_other_tanks: u64,
    /// The other tanks' names found in the tank column (the first 10).
    pub other_tanks: Vec<String>,
    pub rows_skipped: u64,
    /// Why rows were skipped, one message a row (the first 100).
    pub skipped: Vec<String>,
    pub repeated_times: RepeatedTimes,
    pub out_of_order: OutOfOrder,
    /// Implausible readings and assumptions that may be wrong.
    pub warnings: Vec<String>,
    /// Facts worth knowing that are not warnings (a default taken, a
    /// conversion made).
    pub notes: Vec<String>,
}

const MAX_MESSAGES: usize = 100;
const MAX_LINES: usize = 20;
/// A headspace more than this below ambient is far more likely a reading on
/// the wrong reference than a real vacuum: a fixed-roof atmospheric tank's
/// vacuum vent opens a fraction of a kPa to a few kPa below ambient (common
/// practice), and few tanks would survive 10 kPa.
const VACUUM_MARGIN_PA: f64 = 10_000.0;
/// Gauge readings within this of the ambient pressure read like absolute.
const NEAR_AMBIENT_PA: f64 = 20_000.0;
/// Liquid temperatures any storage tank plausibly holds, K: -73 °C to
/// 227 °C (a wide bound, from memory; heated bitumen is stored near 200 °C).
const TEMPERATURE_RANGE_K: (f64, f64) = (200.0, 500.0);

/// One data row, compact: what a sample needs and where it came from.
/// Absent values (an empty cell) are NaN.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Row {
    pub line: u64,
    pub at_ms: i64,
    pub level_m: f64,
    /// As the configured transmitter would read it, Pa.
    pub pressure_pa: f64,
    /// Net into the tank, m³/s.
    pub transfer_m3_s: f64,
    pub temperature_k: f64,
}

impl Row {
    fn same_values(&self, other: &Row) -> bool {
        let same = |a: f64, b: f64| a == b || (a.is_nan() && b.is_nan());
        same(self.level_m, other.level_m)
            && same(self.pressure_pa, other.pressure_pa)
            && same(self.transfer_m3_s, other.transfer_m3_s)
            && same(self.temperature_k, other.temperature_k)
    }
}

/// Running figures for the warnings.
#[derive(Debug, Clone, Default)]
struct Plausibility {
    pressure_rows: u64,
    /// Rows whose pressure cell is empty.
    pressure_empty: u64,
    /// Rows whose headspace would be more than the margin below ambient.
    below_vacuum: u64,
    lowest_as_read: f64,
    near_ambient: u64,
    /// Rows whose converted value is outside the transmitter's range.
    outside_range: u64,
    converted_min: f64,
    converted_max: f64,
    level_outside: u64,
    level_max: f64,
    level_min: f64,
    temperature_rows: u64,
    temperature_outside: u64,
    temperature_min: f64,
    temperature_max: f64,
    fold_rows: u64,
    gap_rows: u64,
    /// Times written with an offset (or Z), without one, as Unix times.
    offset_rows: u64,
    civil_rows: u64,
    unix_rows: u64,
}

/// A readings file being read, row by row.
pub struct Import {
    name: String,
    reader: csv::Reader<Box<dyn Read>>,
    record: csv::StringRecord,
    skip_lines: u64,
    tank_id: String,
    decimal_comma: bool,
    time_format: TimeFormat,
    zone: Zone,
    zone_stated: bool,
    time_col: usize,
    level: (usize, f64),
    pressure: PressureSource,
    transfer: Option<(usize, f64)>,
    temperature: Option<(usize, f64, f64)>,
    tank_col: Option<usize>,
    headers: Vec<String>,
    ambient_pa: f64,
    /// The config's assumed headspace, which the estimator falls back on.
    assumed_headspace_pa: f64,
    density: Density,
    height_m: f64,
    /// The transmitter's range, SI, for the range warning.
    transmitter_range: Option<(f64, f64)>,
    /// Whether the replay adds a headspace transmitter the config lacks.
    synthetic_transmitter: bool,
    /// Whether a headspace near ambient would be out of the ordinary.
    low_pressure_tank: bool,
    plausible: Plausibility,
    report: ImportReport,
}

impl Import {
    /// Opens `path` for `target` with `layout`.
    pub fn open(path: &Path, layout: &Layout, target: &Target) -> anyhow::Result<Self> {
        let file = std::fs::File::open(path)
            .with_context(|| format!("cannot open the readings file {}", path.display()))?;
        Self::from_reader(Box::new(file), &path.display().to_string(), layout, target)
    }

    /// As [`Import::open`], from any reader; `name` labels messages.
    pub fn from_reader(
        input: Box<dyn Read>,
        name: &str,
        layout: &Layout,
        target: &Target,
    ) -> anyhow::Result<Self> {
        let mut buffered = BufReader::with_capacity(1 << 16, input);
        let mut discard = Vec::new();
        for line in 0..layout.skip_lines {
            discard.clear();
            if buffered.read_until(b'\n', &mut discard)? == 0 {
                bail!(
                    "{name}: the file ends at line {line}, before the header (skip_lines = {})",
                    layout.skip_lines
                );
            }
        }
        let peek = buffered.fill_buf()?;
        let first_line = peek.split(|&b| b == b'\n').next().unwrap_or(&[]);
        let separator = layout
            .separator
            .unwrap_or_else(|| detect_separator(first_line));
        if layout.decimal_comma && separator == b',' {
            bail!(
                "{name}: a decimal comma needs another separator; give separator = \";\" (or tab) in the columns file, or --separator \";\""
            );
        }
        let input: Box<dyn Read> = Box::new(buffered);
        let mut reader = csv::ReaderBuilder::new()
            .flexible(true)
            .trim(csv::Trim::All)
            .delimiter(separator)
            .from_reader(input);
        let header_line = layout.skip_lines + 1;
        let headers: Vec<String> = reader
            .headers()
            .with_context(|| format!("{name}:{header_line}: cannot read the header line"))?
            .iter()
            .enumerate()
            .map(|(i, h)| {
                let h = if i == 0 {
                    h.trim_start_matches('\u{feff}')
                } else {
                    h
                };
                h.trim().to_owned()
            })
            .collect();
        let mut resolved = resolve(&headers, layout, target)
            .map_err(|e| anyhow::anyhow!("{name}:{header_line}: {e}"))?;
        let tank = target.tank;
        let ambient_pa = tank.vessel.ambient().si();
        let density = Density::kg_per_cubic_metre(target.density_kg_m3);
        let configured = tank.pressure.as_ref().map(|p| Kind {
            absolute: p.absolute,
            tap: p.tap,
        });
        // The kind the estimator will be told its transmitter reads: the
        // configured one, or a gauge headspace one the replay adds.
        let to = configured.unwrap_or(Kind {
            absolute: false,
            tap: PressureTap::Headspace,
        });
        let mut notes = resolved.notes;
        let (pressure, pressure_text, synthetic) = match (
            &resolved.pressure,
            target.stated_headspace_pa,
        ) {
            (Some(_), Some(_)) => bail!(
                "{name}:{header_line}: --headspace is for a file with no pressure column, and this one has {:?}; map that column \"=unused\" to hold the stated headspace instead, or leave out --headspace",
                headers[resolved.pressure.as_ref().map_or(0, |p| p.0)]
            ),
            (Some((index, spec)), None) => {
                let unit = spec.unit.unwrap_or("Pa");
                let si_per_unit = Unit::parse(unit).map_or(1.0, |u| u.si_factor(density));
                let from = Kind {
                    absolute: match spec.reference {
                        Some(r) => r == Reference::Absolute,
                        None => to.absolute,
                    },
                    tap: spec.tap.unwrap_or(to.tap),
                };
                if let Some(c) = resolved
                    .used
                    .iter_mut()
                    .find(|c| c.quantity == Quantity::Pressure)
                {
                    c.reference = Some(if from.absolute { "absolute" } else { "gauge" });
                    c.tap = Some(match from.tap {
                        PressureTap::Headspace => "headspace".to_owned(),
                        PressureTap::Submerged { elevation } => {
                            format!("{} m", elevation.si())
                        }
                    });
                }
                let mut text = format!(
                    "column {:?} read as {} ({})",
                    headers[*index],
                    from.describe(),
                    if spec.reference.is_none() && spec.tap.is_none() {
                        if configured.is_some() {
                            "reference and tap not stated: taken as the configured transmitter's"
                        } else {
                            "reference and tap not stated: taken as gauge, in the headspace"
                        }
                    } else if spec.reference.is_none() {
                        if configured.is_some() {
                            "reference not stated: taken as the configured transmitter's"
                        } else {
                            "reference not stated: taken as gauge"
                        }
                    } else if spec.tap.is_none() {
                        if configured.is_some() {
                            "tap not stated: taken as the configured transmitter's"
                        } else {
                            "tap not stated: taken as the headspace"
                        }
                    } else {
                        "as stated"
                    }
                );
                if configured.is_none() {
                    text += &format!(
                        "; the config maps no pressure transmitter on {} (live, the agent assumes {:.1} kPa gauge), so the replay uses the file's pressure as a gauge headspace reading",
                        tank.id,
                        tank.assumed_headspace.si() / 1000.0
                    );
                } else if from == to {
                    text += &format!(
                        "; the transmitter reads the same ({}): passed through",
                        to.describe()
                    );
                } else {
                    text += &format!(
                        "; converted to what the transmitter reads ({})",
                        to.describe()
                    );
                }
                (
                    PressureSource::Column {
                        index: *index,
                        si_per_unit,
                        unit,
                        from,
                        to,
                    },
                    text,
                    configured.is_none(),
                )
            }
            (None, Some(headspace_pa)) => {
                let text = format!(
                    "no pressure column: the stated --headspace {} kPa gauge is held for the whole file{}",
                    fmt_kpa(headspace_pa),
                    if configured.is_some() {
                        format!(
                            ", converted on every row to what the transmitter reads ({})",
                            to.describe()
                        )
                    } else {
                        format!(
                            " (the config's assumption for {}, {} kPa, is not used)",
                            tank.id,
                            fmt_kpa(tank.assumed_headspace.si())
                        )
                    }
                );
                match configured {
                    Some(_) => (PressureSource::Stated { headspace_pa, to }, text, false),
                    None => (PressureSource::Assumed, text, false),
                }
            }
            (None, None) => {
                if let Some(kind) = configured {
                    bail!(
                        "{name}:{header_line}: tank {} has a pressure transmitter ({}) in the config, but no column of the file is a pressure (the columns: {}); map one with --column \"NAME=pressure,UNIT,gauge|absolute\", or state the headspace held for the whole file with --headspace KPA (gauge)",
                        tank.id,
                        kind.describe(),
                        quoted_list(&headers)
                    );
                }
                (
                    PressureSource::Assumed,
                    format!(
                        "no pressure column and no transmitter in the config: the config's assumed headspace for {}, {} kPa gauge, is held, as live",
                        tank.id,
                        fmt_kpa(tank.assumed_headspace.si())
                    ),
                    false,
                )
            }
        };
        let transmitter_range = tank.pressure.as_ref().map(|p| p.sensor.valid_si);
        // A headspace near the ambient pressure (about 1 bar gauge) is out
        // of the ordinary unless the transmitter's range reaches well past
        // it.
        let low_pressure_tank = match &tank.pressure {
            Some(p) => {
                let top_gauge = p.sensor.valid_si.1 - if p.absolute { ambient_pa } else { 0.0 };
                top_gauge < 1.5 * ambient_pa
            }
            None => tank.assumed_headspace.si() < 0.5 * ambient_pa,
        };
        let unit_factor = |spec: &ColumnSpec| -> (f64, f64) {
            spec.unit
                .and_then(Unit::parse)
                .map_or((1.0, 0.0), |u| (u.si_factor(density), u.si_offset()))
        };
        let (level_index, level_spec) = &resolved.level;
        let level = (*level_index, unit_factor(level_spec).0);
        let transfer = resolved.transfer.as_ref().map(|(i, spec)| {
            let f = unit_factor(spec).0;
            (*i, if spec.outward { -f } else { f })
        });
        let temperature = resolved.temperature.as_ref().map(|(i, spec)| {
            let (f, o) = unit_factor(spec);
            (*i, f, o)
        });
        let (zone, zone_stated) = match (&layout.time_zone, &resolved.header_zone) {
            (Some(z), _) => (z.clone(), true),
            (None, Some(z)) => (z.clone(), true),
            (None, None) => (Zone::utc(), false),
        };
        if let (Some(z), Some(h)) = (&layout.time_zone, &resolved.header_zone)
            && z.name != h.name
        {
            notes.push(format!(
                "the time column's header names the zone {}, but {} was given: {} is used",
                h.name, z.name, z.name
            ));
        }
        let time_format = layout.time_format.clone().unwrap_or(TimeFormat::Auto);
        let mut warnings = Vec::new();
        if temperature.is_none() && tank.temperature.is_some() && tank.density.follows_temperature()
        {
            warnings.push(format!(
                "tank {} has a temperature sensor and a density that follows it, but no column of the file is a temperature: every row uses the density at the config's reference, {} kg/m³, not the liquid's; map a temperature column with --column \"NAME=temperature,degC\" if the export has one",
                tank.id,
                report_number(tank.density.at(None).si())
            ));
        }
        let report = ImportReport {
            file: name.to_owned(),
            columns_file: layout
                .columns_file
                .as_ref()
                .map(|p| p.display().to_string()),
            separator: match separator {
                b'\t' => "tab".to_owned(),
                b' ' => "space".to_owned(),
                s => (s as char).to_string(),
            },
            decimal: if layout.decimal_comma { "," } else { "." }.to_owned(),
            time: time_format.describe(),
            columns: resolved.used,
            unused: resolved.unused,
            pressure: pressure_text,
            headspace_stated_kpa: target.stated_headspace_pa.map(|p| p / 1000.0),
            notes,
            warnings,
            ..ImportReport::default()
        };
        Ok(Self {
            name: name.to_owned(),
            reader,
            record: csv::StringRecord::new(),
            skip_lines: layout.skip_lines as u64,
            tank_id: tank.id.clone(),
            decimal_comma: layout.decimal_comma,
            time_format,
            zone,
            zone_stated,
            time_col: resolved.time,
            level,
            pressure,
            transfer,
            temperature,
            tank_col: resolved.tank,
            headers,
            ambient_pa,
            assumed_headspace_pa: tank.assumed_headspace.si(),
            density,
            height_m: tank.vessel.geometry().height().si(),
            transmitter_range: if synthetic { None } else { transmitter_range },
            synthetic_transmitter: synthetic,
            low_pressure_tank,
            plausible: Plausibility {
                lowest_as_read: f64::INFINITY,
                converted_min: f64::INFINITY,
                converted_max: f64::NEG_INFINITY,
                level_max: f64::NEG_INFINITY,
                level_min: f64::INFINITY,
                temperature_min: f64::INFINITY,
                temperature_max: f64::NEG_INFINITY,
                ..Plausibility::default()
            },
            report,
        })
    }

    /// The tank the estimator should be given: the config's, with a gauge
    /// headspace transmitter added when the config has none but the file
    /// has a pressure column, or the stated headspace as its assumption.
    pub fn tank_for_estimator(&self, tank: &Tank, stated_headspace_pa: Option<f64>) -> Tank {
        let mut tank = tank.clone();
        if self.synthetic_transmitter {
            // Built from the level sensor so it has every field a sensor
            // has; only the range, unit and accuracy matter to the estimator.
            let mut sensor = tank.level.clone();
            sensor.unit = "Pa".to_owned();
            sensor.si_per_unit = 1.0;
            sensor.si_offset = 0.0;
            let ambient = tank.vessel.ambient().si();
            sensor.raw_span = (-ambient, 1e9);
            sensor.engineering_span = (-ambient, 1e9);
            sensor.valid_si = (-ambient, 1e9);
            sensor.stuck_after = None;
            sensor.accuracy = Uncertainty {
                bound: DEFAULT_PRESSURE_ACCURACY_MIN_PA,
                relative: false,
                stated: false,
            };
            tank.pressure = Some(PressureSensor {
                sensor,
                absolute: false,
                tap: PressureTap::Headspace,
            });
        } else if tank.pressure.is_none()
            && let Some(p) = stated_headspace_pa
        {
            tank.assumed_headspace = crate::model::Pressure::pascals(p);
        }
        tank
    }

    /// Whether samples carry a pressure reading.
    fn has_pressure(&self) -> bool {
        !matches!(self.pressure, PressureSource::Assumed)
    }

    /// The sample the estimator sees for `row`, written into `sample` (which
    /// is reused, so a long file allocates nothing per row).
    pub fn fill_sample(&self, row: &Row, sample: &mut TankSample) {
        let reading = |v: f64| {
            if v.is_nan() {
                Reading::bad(Quality::DeviceError)
            } else {
                Reading::good(v)
            }
        };
        if *sample.tank_id != *self.tank_id {
            sample.tank_id = self.tank_id.as_str().into();
        }
        sample.tank = 0;
        sample.at_ms = row.at_ms;
        sample.level = Reading::good(row.level_m);
        sample.pressure = self.has_pressure().then(|| reading(row.pressure_pa));
        sample.transfer = self.transfer.map(|_| reading(row.transfer_m3_s));
        sample.temperature = self.temperature.map(|_| reading(row.temperature_k));
        sample.leak_flag = None;
    }

    /// A fresh sample to pass to [`Import::fill_sample`].
    pub fn blank_sample(&self) -> TankSample {
        TankSample {
            tank: 0,
            tank_id: self.tank_id.as_str().into(),
            at_ms: 0,
            level: Reading::bad(Quality::DeviceError),
            pressure: None,
            transfer: None,
            temperature: None,
            leak_flag: None,
        }
    }

    /// Data rows read so far.
    pub fn rows_read(&self) -> u64 {
        self.report.rows_read
    }

    /// How far through the input the reader is, bytes (for progress).
    pub fn position(&self) -> u64 {
        self.reader.position().byte()
    }

    fn skip(&mut self, message: String) {
        self.report.rows_skipped += 1;
        if self.report.skipped.len() < MAX_MESSAGES {
            self.report.skipped.push(message);
        }
    }

    /// The next row for the tank, in file order; bad rows are skipped and
    /// counted. An error only when the file cannot be read at all.
    pub fn next_row(&mut self) -> anyhow::Result<Option<Row>> {
        loop {
            match self.reader.read_record(&mut self.record) {
                Ok(false) => return Ok(None),
                Ok(true) => {}
                Err(e) => {
                    if let csv::ErrorKind::Io(_) = e.kind() {
                        return Err(e).with_context(|| format!("reading {}", self.name));
                    }
                    let line = e.position().map_or(0, |p| p.line()) + self.skip_lines;
                    self.report.rows_read += 1;
                    self.skip(format!("{}:{line}: unreadable row: {e}", self.name));
                    continue;
                }
            }
            self.report.rows_read += 1;
            let line = self.record.position().map_or(0, |p| p.line()) + self.skip_lines;
            match self.convert(line) {
                Converted::Row(row) => {
                    self.report.rows_used += 1;
                    return Ok(Some(row));
                }
                Converted::OtherTank(tank) => {
                    self.report.rows_other_tanks += 1;
                    if self.report.other_tanks.len() < 10
                        && !self.report.other_tanks.contains(&tank)
                    {
                        self.report.other_tanks.push(tank);
                    }
                }
                Converted::Skipped(message) => self.skip(message),
            }
        }
    }

    fn field(&self, col: usize) -> &str {
        self.record.get(col).unwrap_or("")
    }

    /// A number from a cell: `None` for an empty cell.
    fn number(&self, col: usize) -> Result<Option<f64>, String> {
        let text = self.field(col);
        if text.is_empty() {
            return Ok(None);
        }
        let parsed = if self.decimal_comma {
            text.replace(',', ".").parse::<f64>()
        } else {
            text.parse::<f64>()
        };
        match parsed.ok().filter(|v| v.is_finite()) {
            Some(v) => Ok(Some(v)),
            None => {
                let hint = if !self.decimal_comma && text.contains(',') {
                    " (a decimal comma? say so with --decimal-comma or decimal = \",\" in the columns file)"
                } else {
                    ""
                };
                Err(format!(
                    "{text:?} in column {:?} is not a number{hint}",
                    self.headers[col]
                ))
            }
        }
    }

    fn convert(&mut self, line: u64) -> Converted {
        let name = &self.name;
        if let Some(col) = self.tank_col {
            let tank = self.field(col);
            if !tank.eq_ignore_ascii_case(&self.tank_id) {
                return Converted::OtherTank(tank.to_owned());
            }
        }
        let at_ms = match parse_time(
            &self.time_format,
            &self.zone,
            &mut self.plausible,
            self.record.get(self.time_col).unwrap_or(""),
        ) {
            Ok(t) => t,
            Err(why) => {
                return Converted::Skipped(format!("{name}:{line}: {why}; row skipped"));
            }
        };
        let level_m = match self.number(self.level.0) {
            Ok(Some(v)) => v * self.level.1,
            Ok(None) => return Converted::Skipped(format!("{name}:{line}: no level; row skipped")),
            Err(e) => return Converted::Skipped(format!("{name}:{line}: {e}; row skipped")),
        };
        let optional = |col: Option<usize>| col.map_or(Ok(None), |c| self.number(c));
        let (pressure_raw, transfer_raw, temperature_raw) = match (
            optional(match &self.pressure {
                PressureSource::Column { index, .. } => Some(*index),
                _ => None,
            }),
            optional(self.transfer.map(|t| t.0)),
            optional(self.temperature.map(|t| t.0)),
        ) {
            (Ok(p), Ok(t), Ok(k)) => (p, t, k),
            (Err(e), _, _) | (_, Err(e), _) | (_, _, Err(e)) => {
                return Converted::Skipped(format!("{name}:{line}: {e}; row skipped"));
            }
        };
        // The level the estimator uses for the liquid column (it clamps to
        // the tank).
        let level_for_column = level_m.clamp(0.0, self.height_m.max(0.0));
        let p = &mut self.plausible;
        if !(-0.01 * self.height_m..=1.01 * self.height_m).contains(&level_m) {
            p.level_outside += 1;
        }
        p.level_max = p.level_max.max(level_m);
        p.level_min = p.level_min.min(level_m);
        let pressure_pa = match &self.pressure {
            PressureSource::Column {
                si_per_unit,
                from,
                to,
                ..
            } => match pressure_raw {
                None => {
                    p.pressure_empty += 1;
                    f64::NAN
                }
                Some(raw) => {
                    let value = raw * si_per_unit;
                    let headspace = headspace_gauge(
                        value,
                        *from,
                        level_for_column,
                        self.ambient_pa,
                        self.density,
                    );
                    p.pressure_rows += 1;
                    if headspace < -VACUUM_MARGIN_PA {
                        p.below_vacuum += 1;
                        p.lowest_as_read = p.lowest_as_read.min(raw);
                    }
                    if !from.absolute && (headspace - self.ambient_pa).abs() < NEAR_AMBIENT_PA {
                        p.near_ambient += 1;
                    }
                    let converted = if from == to {
                        value
                    } else {
                        reading_of(
                            headspace,
                            *to,
                            level_for_column,
                            self.ambient_pa,
                            self.density,
                        )
                    };
                    note_range(p, self.transmitter_range, converted);
                    converted
                }
            },
            PressureSource::Stated { headspace_pa, to } => {
                let converted = reading_of(
                    *headspace_pa,
                    *to,
                    level_for_column,
                    self.ambient_pa,
                    self.density,
                );
                note_range(p, self.transmitter_range, converted);
                converted
            }
            PressureSource::Assumed => f64::NAN,
        };
        let transfer_m3_s = match (transfer_raw, self.transfer) {
            (Some(v), Some((_, f))) => v * f,
            _ => f64::NAN,
        };
        let temperature_k = match (temperature_raw, self.temperature) {
            (Some(v), Some((_, f, o))) => {
                let k = v * f + o;
                p.temperature_rows += 1;
                if !(TEMPERATURE_RANGE_K.0..=TEMPERATURE_RANGE_K.1).contains(&k) {
                    p.temperature_outside += 1;
                }
                p.temperature_min = p.temperature_min.min(k);
                p.temperature_max = p.temperature_max.max(k);
                k
            }
            _ => f64::NAN,
        };
        Converted::Row(Row {
            line,
            at_ms,
            level_m,
            pressure_pa,
            transfer_m3_s,
            temperature_k,
        })
    }

    /// Finishes the report: the time zone used and every warning.
    pub fn finish(mut self) -> ImportReport {
        let p = &self.plausible;
        let r = &mut self.report;
        let mut kinds = Vec::new();
        if p.offset_rows > 0 {
            kinds.push(format!("{} with an offset or Z", p.offset_rows));
        }
        if p.unix_rows > 0 {
            kinds.push(format!("{} as Unix times", p.unix_rows));
        }
        if p.civil_rows > 0 {
            kinds.push(if self.zone_stated {
                format!(
                    "{} without an offset, taken in {}",
                    p.civil_rows, self.zone.name
                )
            } else {
                format!("{} without an offset, taken as UTC", p.civil_rows)
            });
        }
        if !kinds.is_empty() {
            r.time = format!("{}: {}", r.time, kinds.join(", "));
        }
        if p.civil_rows > 0 && !self.zone_stated {
            r.notes.push(format!(
                "{} row(s) give their time with no offset or zone; they are taken as UTC (say otherwise with --time-zone, or time_zone in the columns file)",
                p.civil_rows
            ));
        }
        if p.fold_rows > 0 {
            r.warnings.push(format!(
                "{} row(s) fall in an hour that happens twice in {} (the clocks went back): their times are ambiguous and were taken as the earlier; export with UTC times or offsets",
                p.fold_rows, self.zone.name
            ));
        }
        if p.gap_rows > 0 {
            r.warnings.push(format!(
                "{} row(s) give a time that never happened in {} (the clocks went forward over it): taken as after the change; check the export's time zone",
                p.gap_rows, self.zone.name
            ));
        }
        if !self.zone.is_fixed() && p.civil_rows > 0 && p.fold_rows == 0 && p.gap_rows == 0 {
            r.notes.push(format!(
                "local times converted with the rules of {} (no row fell in a clock change)",
                self.zone.name
            ));
        }
        if let PressureSource::Column {
            index, unit, from, ..
        } = &self.pressure
        {
            let column = &self.headers[*index];
            if p.below_vacuum > 0 {
                let (what, fix) = if from.absolute {
                    (
                        format!(
                            "absolute readings below the ambient pressure ({} kPa) by more than {} kPa",
                            fmt_kpa(self.ambient_pa),
                            fmt_kpa(VACUUM_MARGIN_PA)
                        ),
                        "if they are gauge readings, map the column as gauge",
                    )
                } else {
                    (
                        format!(
                            "gauge readings putting the headspace more than {} kPa below ambient",
                            fmt_kpa(VACUUM_MARGIN_PA)
                        ),
                        "check the column's unit and reference",
                    )
                };
                r.warnings.push(format!(
                    "pressure column {column:?}: {} of {} row(s) are {what} (lowest {} {unit}), a vacuum few tanks hold; {fix}: --column \"{column}=pressure,{unit},{}\"",
                    p.below_vacuum,
                    p.pressure_rows,
                    report_number(p.lowest_as_read),
                    if from.absolute { "gauge" } else { "absolute" }
                ));
            }
            if !from.absolute
                && p.pressure_rows > 0
                && p.near_ambient as f64 >= 0.9 * p.pressure_rows as f64
                && self.low_pressure_tank
            {
                r.warnings.push(format!(
                    "pressure column {column:?} is read as gauge, but {} of {} row(s) sit within {} kPa of the ambient pressure ({} kPa): they read like absolute pressures, and {} says this tank does not run near 1 bar gauge; if they are absolute, map the column with --column \"{column}=pressure,{unit},absolute\"",
                    p.near_ambient,
                    p.pressure_rows,
                    fmt_kpa(NEAR_AMBIENT_PA),
                    fmt_kpa(self.ambient_pa),
                    if self.transmitter_range.is_some() {
                        "the transmitter's range"
                    } else {
                        "the config"
                    }
                ));
            }
        }
        if p.pressure_empty > 0
            && let PressureSource::Column { index, .. } = &self.pressure
        {
            r.warnings.push(format!(
                "pressure column {:?} is empty on {} of {} row(s): for those the estimator holds the last good pressure, as it does live, and before the first one it assumes the config's {} kPa gauge",
                self.headers[*index],
                p.pressure_empty,
                p.pressure_empty + p.pressure_rows,
                fmt_kpa(self.assumed_headspace_pa)
            ));
        }
        if p.outside_range > 0
            && let Some((lo, hi)) = self.transmitter_range
        {
            r.warnings.push(format!(
                "{} row(s) give a pressure that, as the transmitter would read it, is outside its range ({} to {} kPa; the values run from {} to {} kPa): the estimator holds the last good pressure for them, as it does live, and {}",
                p.outside_range,
                fmt_kpa(lo),
                fmt_kpa(hi),
                fmt_kpa(p.converted_min),
                fmt_kpa(p.converted_max),
                if p.outside_range >= p.pressure_rows {
                    format!(
                        "as no row gives a pressure inside the range, the whole replay assumes the config's {} kPa gauge headspace; check the column's unit and reference",
                        fmt_kpa(self.assumed_headspace_pa)
                    )
                } else {
                    format!(
                        "before the first good one it assumes the config's {} kPa gauge",
                        fmt_kpa(self.assumed_headspace_pa)
                    )
                }
            ));
        }
        if p.level_outside > 0 {
            let level_col = &self.headers[self.level.0];
            r.warnings.push(format!(
                "{} row(s) give a level outside the tank (0 to {:.2} m; the column {level_col:?} runs from {} to {} m): the estimator skips them; check the level's unit",
                p.level_outside,
                self.height_m,
                report_number(p.level_min),
                report_number(p.level_max)
            ));
        }
        if p.temperature_outside > 0
            && let Some((col, _, _)) = self.temperature
        {
            r.warnings.push(format!(
                "{} of {} row(s) give a temperature outside {:.0} to {:.0} °C (the column {:?} runs from {:.1} to {:.1} °C): check the column's unit (degC, degF or K)",
                p.temperature_outside,
                p.temperature_rows,
                TEMPERATURE_RANGE_K.0 - 273.15,
                TEMPERATURE_RANGE_K.1 - 273.15,
                self.headers[col],
                p.temperature_min - 273.15,
                p.temperature_max - 273.15
            ));
        }
        if self.report.rows_used == 0 && self.report.rows_other_tanks > 0 {
            self.report.warnings.push(format!(
                "no row is for tank {}; the tank column names {}",
                self.tank_id,
                self.report.other_tanks.join(", ")
            ));
        }
        self.report
    }

    /// The error for a file with no usable row, from what was read.
    pub fn nothing_usable(report: &ImportReport, tank: &str) -> anyhow::Error {
        let first = report.skipped.first().cloned().unwrap_or_else(|| {
            if report.rows_other_tanks > 0 {
                format!(
                    "no rows for tank {tank}; the file's tank column names {}",
                    report.other_tanks.join(", ")
                )
            } else {
                "the file has no data rows".to_owned()
            }
        });
        anyhow::anyhow!(
            "{}: no usable row ({} skipped); the first problem: {first}",
            report.file,
            report.rows_skipped
        )
    }
}

/// A time cell as ms since the Unix epoch; counts civil times and those in
/// a clock change.
fn parse_time(
    format: &TimeFormat,
    zone: &Zone,
    plausible: &mut Plausibility,
    text: &str,
) -> Result<i64, String> {
    let civil = match format {
        TimeFormat::Auto => {
            if let Ok(t) = text.parse::<jiff::Timestamp>() {
                plausible.offset_rows += 1;
                return Ok(t.as_millisecond());
            }
            if let Ok(dt) = text.parse::<jiff::civil::DateTime>() {
                dt
            } else if let Some(ms) = unix_ms(text, 1000.0) {
                plausible.unix_rows += 1;
                return Ok(ms);
            } else {
                return Err(format!(
                    "time {text:?} is not RFC 3339, YYYY-MM-DD HH:MM:SS or Unix seconds{}",
                    time_hint(text)
                ));
            }
        }
        TimeFormat::UnixSeconds => {
            plausible.unix_rows += 1;
            return unix_ms(text, 1000.0)
                .ok_or_else(|| format!("time {text:?} is not Unix seconds"));
        }
        TimeFormat::UnixMillis => {
            plausible.unix_rows += 1;
            return unix_ms(text, 1.0)
                .ok_or_else(|| format!("time {text:?} is not Unix milliseconds"));
        }
        TimeFormat::Pattern(pattern) => {
            let parsed = jiff::fmt::strtime::parse(pattern, text)
                .map_err(|e| format!("time {text:?} does not match {pattern:?}: {e}"))?;
            if parsed.offset().is_some() {
                plausible.offset_rows += 1;
                return parsed
                    .to_timestamp()
                    .map(|t| t.as_millisecond())
                    .map_err(|e| format!("time {text:?}: {e}"));
            }
            parsed
                .to_datetime()
                .map_err(|e| format!("time {text:?} ({pattern:?}): {e}"))?
        }
    };
    plausible.civil_rows += 1;
    let ambiguous = zone.tz.to_ambiguous_timestamp(civil);
    match ambiguous.offset() {
        jiff::tz::AmbiguousOffset::Fold { .. } => plausible.fold_rows += 1,
        jiff::tz::AmbiguousOffset::Gap { .. } => plausible.gap_rows += 1,
        _ => {}
    }
    ambiguous
        .compatible()
        .map(|t| t.as_millisecond())
        .map_err(|e| format!("time {text:?} in {}: {e}", zone.name))
}

enum Converted {
    Row(Row),
    OtherTank(String),
    Skipped(String),
}

fn note_range(p: &mut Plausibility, range: Option<(f64, f64)>, converted: f64) {
    p.converted_min = p.converted_min.min(converted);
    p.converted_max = p.converted_max.max(converted);
    if let Some((lo, hi)) = range {
        let slack = 1e-9 * (hi - lo).abs();
        if converted < lo - slack || converted > hi + slack {
            p.outside_range += 1;
        }
    }
}

/// The headspace gauge pressure behind a reading of `kind` (the inverse of
/// [`reading_of`]; the same arithmetic as the estimator's).
fn headspace_gauge(value: f64, kind: Kind, level_m: f64, ambient_pa: f64, density: Density) -> f64 {
    let at_tap = if kind.absolute {
        value - ambient_pa
    } else {
        value
    };
    match kind.tap {
        PressureTap::Headspace => at_tap,
        PressureTap::Submerged { elevation } => {
            let column = (level_m - elevation.si()).max(0.0);
            at_tap - density.head_pressure(Length::metres(column)).si()
        }
    }
}

/// What a transmitter of `kind` reads with the headspace at `headspace_pa`
/// gauge and the liquid at `level_m`.
fn reading_of(
    headspace_pa: f64,
    kind: Kind,
    level_m: f64,
    ambient_pa: f64,
    density: Density,
) -> f64 {
    let at_tap = match kind.tap {
        PressureTap::Headspace => headspace_pa,
        PressureTap::Submerged { elevation } => {
            let column = (level_m - elevation.si()).max(0.0);
            headspace_pa + density.head_pressure(Length::metres(column)).si()
        }
    };
    if kind.absolute {
        at_tap + ambient_pa
    } else {
        at_tap
    }
}

fn unix_ms(text: &str, ms_per_unit: f64) -> Option<i64> {
    let value: f64 = text.parse().ok()?;
    let ms = value * ms_per_unit;
    // Up to the year 5138: anything larger is not a time in this unit.
    (value.is_finite() && ms > 0.0 && ms < 1e14).then(|| ms.round() as i64)
}

/// A hint for a time the automatic formats do not read.
fn time_hint(text: &str) -> String {
    let digits_at = |i: usize| text.as_bytes().get(i).is_some_and(u8::is_ascii_digit);
    if text.len() >= 10
        && text.as_bytes().get(2) == Some(&b'.')
        && text.as_bytes().get(5) == Some(&b'.')
    {
        return "; for day.month.year give time_format = \"%d.%m.%Y %H:%M:%S\" (or --time-format)"
            .to_owned();
    }
    if text.len() >= 10
        && text.as_bytes().get(2) == Some(&b'/')
        && text.as_bytes().get(5) == Some(&b'/')
    {
        return "; day/month or month/day cannot be told apart: give time_format, for example \"%d/%m/%Y %H:%M:%S\" (or --time-format)".to_owned();
    }
    if (0..13).all(digits_at) && text.len() == 13 {
        return "; for Unix milliseconds give time_format = \"unix_ms\" (or --time-format unix_ms)"
            .to_owned();
    }
    String::new()
}

fn detect_separator(header: &[u8]) -> u8 {
    let count = |c: u8| header.iter().filter(|&&b| b == c).count();
    [b',', b';', b'\t', b'|']
        .into_iter()
        .max_by_key(|&c| (count(c), c == b','))
        .filter(|&c| count(c) > 0)
        .unwrap_or(b',')
}

fn fmt_kpa(pa: f64) -> String {
    report_number(pa / 1000.0)
}

/// A number for a message: up to three decimals, no trailing zeros.
fn report_number(x: f64) -> String {
    let text = format!("{x:.3}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    if text == "-0" {
        "0".to_owned()
    } else {
        text.to_owned()
    }
}

fn quoted_list(names: &[String]) -> String {
    names
        .iter()
        .map(|n| format!("{n:?}"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The mapping of a header, resolved.
struct Resolved {
    time: usize,
    header_zone: Option<Zone>,
    level: (usize, ColumnSpec),
    pressure: Option<(usize, ColumnSpec)>,
    transfer: Option<(usize, ColumnSpec)>,
    temperature: Option<(usize, ColumnSpec)>,
    tank: Option<usize>,
    used: Vec<UsedColumn>,
    unused: Vec<UnusedColumn>,
    notes: Vec<String>,
}

/// Whether `name` carries the tank tag `tag` as a whole token (FF-T1 is not
/// in FF-T12).
fn names_tank(name: &str, tag: &str) -> bool {
    let (name, tag) = (name.to_lowercase(), tag.to_lowercase());
    if tag.is_empty() {
        return false;
    }
    name.match_indices(&tag).any(|(i, _)| {
        let before = name[..i].chars().next_back();
        let after = name[i + tag.len()..].chars().next();
        !before.is_some_and(char::is_alphanumeric) && !after.is_some_and(char::is_alphanumeric)
    })
}

fn resolve(headers: &[String], layout: &Layout, target: &Target) -> Result<Resolved, String> {
    let tank_id = &target.tank.id;
    // Explicit mappings first: every name must be a column, once.
    let mut explicit: Vec<Option<(Mapping, Origin)>> = vec![None; headers.len()];
    for (name, mapping, origin) in &layout.columns {
        let exact: Vec<usize> = (0..headers.len())
            .filter(|&i| headers[i] == *name)
            .collect();
        let found = if exact.is_empty() {
            (0..headers.len())
                .filter(|&i| headers[i].eq_ignore_ascii_case(name.trim()))
                .collect()
        } else {
            exact
        };
        match found.as_slice() {
            [i] => explicit[*i] = Some((mapping.clone(), origin.clone())),
            [] => {
                return Err(format!(
                    "a column {name:?} is mapped {}, but the file has no column of that name; its columns are: {}",
                    origin.place(),
                    quoted_list(headers)
                ));
            }
            _ => {
                return Err(format!(
                    "the file has {} columns named {name:?}, so the mapping {} is ambiguous; rename them in the export",
                    found.len(),
                    origin.place()
                ));
            }
        }
    }
    let mut candidates: BTreeMap<Quantity, Vec<(usize, ColumnSpec, Origin)>> = BTreeMap::new();
    let mut unused: Vec<UnusedColumn> = Vec::new();
    let mut header_zones: Vec<(usize, Zone)> = Vec::new();
    let mut notes = Vec::new();
    for (i, header) in headers.iter().enumerate() {
        match &explicit[i] {
            Some((Mapping::Use(spec), origin)) => candidates
                .entry(spec.quantity)
                .or_default()
                .push((i, spec.clone(), origin.clone())),
            Some((Mapping::Unused, origin)) => unused.push(UnusedColumn {
                name: header.clone(),
                why: format!("mapped unused {}", origin.place()),
            }),
            None => {
                match recognise(header) {
                    Recognised::Column(spec) => candidates
                        .entry(spec.quantity)
                        .or_default()
                        .push((i, spec, Origin::Header)),
                    Recognised::TimeInZone(zone) => {
                        header_zones.push((i, zone));
                        candidates.entry(Quantity::Time).or_default().push((
                            i,
                            ColumnSpec::new(Quantity::Time, None),
                            Origin::Header,
                        ));
                    }
                    Recognised::Nothing(why) => unused.push(UnusedColumn {
                        name: header.clone(),
                        why,
                    }),
                }
            }
        }
    }
    // One column per quantity: an explicit mapping wins over the header;
    // among recognised ones, those naming this tank over those that do not;
    // what is left must be one column, or the user must say which.
    let mut chosen: BTreeMap<Quantity, (usize, ColumnSpec, Origin)> = BTreeMap::new();
    for (quantity, mut list) in candidates {
        let explicit_count = list.iter().filter(|c| c.2 != Origin::Header).count();
        if explicit_count > 1 {
            let names: Vec<String> = list
                .iter()
                .filter(|c| c.2 != Origin::Header)
                .map(|c| headers[c.0].clone())
                .collect();
            return Err(format!(
                "more than one column is mapped as the {}: {}; map only one",
                quantity.name(),
                quoted_list(&names)
            ));
        }
        if explicit_count == 1 {
            let keep = list.iter().position(|c| c.2 != Origin::Header).unwrap_or(0);
            let kept = list.remove(keep);
            for (i, _, _) in list {
                unused.push(UnusedColumn {
                    name: headers[i].clone(),
                    why: format!(
                        "could be the {}, but {:?} is mapped as the {} {}",
                        quantity.name(),
                        headers[kept.0],
                        quantity.name(),
                        kept.2.place()
                    ),
                });
            }
            chosen.insert(quantity, kept);
            continue;
        }
        if list.len() > 1 {
            let (mine, others): (Vec<_>, Vec<_>) = list
                .into_iter()
                .partition(|c| names_tank(&headers[c.0], tank_id));
            let belongs = |i: usize| {
                target
                    .other_tanks
                    .iter()
                    .find(|t| names_tank(&headers[i], t))
                    .cloned()
            };
            if !mine.is_empty() {
                for (i, _, _) in &others {
                    unused.push(UnusedColumn {
                        name: headers[*i].clone(),
                        why: match belongs(*i) {
                            Some(t) => format!("a {} of tank {t}, by its name", quantity.name()),
                            None => format!(
                                "could be the {}, but does not name tank {tank_id} and {:?} does",
                                quantity.name(),
                                headers[mine[0].0]
                            ),
                        },
                    });
                }
                list = mine;
            } else {
                let (theirs, neutral): (Vec<_>, Vec<_>) =
                    others.into_iter().partition(|c| belongs(c.0).is_some());
                if !neutral.is_empty() {
                    for (i, _, _) in &theirs {
                        unused.push(UnusedColumn {
                            name: headers[*i].clone(),
                            why: format!(
                                "a {} of tank {}, by its name",
                                quantity.name(),
                                belongs(*i).unwrap_or_default()
                            ),
                        });
                    }
                    list = neutral;
                } else {
                    list = theirs;
                }
            }
        }
        if list.len() > 1 {
            let names: Vec<String> = list.iter().map(|c| headers[c.0].clone()).collect();
            let example = &names[0];
            let hint = match quantity.unit_kind() {
                Some(_) => format!("{},{}", quantity.name(), list[0].1.unit.unwrap_or("UNIT")),
                None => quantity.name().to_owned(),
            };
            return Err(format!(
                "{} columns could be the {}: {}; say which with --column \"{example}={hint}\" (the others are then listed as unused), or in the columns file",
                names.len(),
                quantity.name(),
                quoted_list(&names)
            ));
        }
        if let Some(c) = list.pop() {
            if quantity != Quantity::Tank
                && c.2 == Origin::Header
                && !names_tank(&headers[c.0], tank_id)
                && let Some(t) = target
                    .other_tanks
                    .iter()
                    .find(|t| names_tank(&headers[c.0], t))
            {
                if matches!(quantity, Quantity::Time | Quantity::Level) {
                    return Err(format!(
                        "the only {} column, {:?}, names tank {t}, not {tank_id}; pick the right file or tank, or map the column with --column if it is {tank_id}'s",
                        quantity.name(),
                        headers[c.0]
                    ));
                }
                unused.push(UnusedColumn {
                    name: headers[c.0].clone(),
                    why: format!(
                        "a {} of tank {t}, by its name (map it with --column if it is {tank_id}'s)",
                        quantity.name()
                    ),
                });
                continue;
            }
            chosen.insert(quantity, c);
        }
    }
    let Some((time, _, _)) = chosen.get(&Quantity::Time).cloned() else {
        return Err(format!(
            "no time column: none of the columns {} is recognised as the time; name it time, timestamp or utc, or map it with --column \"NAME=time\"",
            quoted_list(headers)
        ));
    };
    let Some(level) = chosen.get(&Quantity::Level).map(|c| (c.0, c.1.clone())) else {
        return Err(format!(
            "no level column: none of the columns {} is recognised as the level; map one with --column \"NAME=level,UNIT\" (UNIT one of {}), or name it level_m, level_mm, ... or \"NAME [mm]\"",
            quoted_list(headers),
            Unit::names(UnitKind::Length).join(", ")
        ));
    };
    let header_zone = header_zones
        .into_iter()
        .find(|(i, _)| *i == time)
        .map(|(_, z)| z);
    if let Some(z) = &header_zone {
        notes.push(format!(
            "the time column's header names its zone: {}",
            z.name
        ));
    }
    let mut used: Vec<UsedColumn> = chosen
        .values()
        .map(|(i, spec, origin)| UsedColumn {
            name: headers[*i].clone(),
            quantity: spec.quantity,
            unit: spec.unit.map(str::to_owned),
            read_as: describe_spec(spec, &header_zone, *i == time),
            reference: None,
            tap: None,
            from: origin.name().to_owned(),
        })
        .collect();
    used.sort_by_key(|u| headers.iter().position(|h| *h == u.name));
    unused.sort_by_key(|u| headers.iter().position(|h| *h == u.name));
    let get = |q: Quantity| chosen.get(&q).map(|c| (c.0, c.1.clone()));
    Ok(Resolved {
        time,
        header_zone,
        level,
        pressure: get(Quantity::Pressure),
        transfer: get(Quantity::Transfer),
        temperature: get(Quantity::Temperature),
        tank: chosen.get(&Quantity::Tank).map(|c| c.0),
        used,
        unused,
        notes,
    })
}

fn describe_spec(spec: &ColumnSpec, zone: &Option<Zone>, is_time: bool) -> String {
    match spec.quantity {
        Quantity::Time if is_time => match zone {
            Some(z) => format!("time, zone {} from the header", z.name),
            None => "time".to_owned(),
        },
        Quantity::Pressure => {
            let reference = spec
                .reference
                .map_or("reference not stated", Reference::name);
            let tap = match spec.tap {
                None => "tap not stated".to_owned(),
                Some(PressureTap::Headspace) => "in the headspace".to_owned(),
                Some(PressureTap::Submerged { elevation }) => {
                    format!("at a tap {:.2} m above the bottom", elevation.si())
                }
            };
            format!(
                "pressure in {}, {reference}, {tap}",
                spec.unit.unwrap_or("?")
            )
        }
        Quantity::Transfer => format!(
            "transfer in {}, positive {}",
            spec.unit.unwrap_or("?"),
            if spec.outward {
                "out of the tank (sign reversed)"
            } else {
                "into the tank"
            }
        ),
        q => match spec.unit {
            Some(u) => format!("{} in {u}", q.name()),
            None => q.name().to_owned(),
        },
    }
}

/// Counts rows with a repeated time and rows out of time order, for a
/// stream of rows in file order (then the first row of each time is kept)
/// or sorted by time.
#[derive(Debug, Default)]
pub struct TimeOrder {
    last_kept: Option<Row>,
    latest_ms: Option<i64>,
    pub repeated: RepeatedTimes,
    pub out_of_order: OutOfOrder,
}

/// What to do with a row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Verdict {
    /// Later than every row kept: use it.
    Next,
    /// The same time as the row kept last: counted, not used.
    Repeat,
    /// Earlier than a row kept: the rows must be sorted.
    Earlier,
}

impl TimeOrder {
    /// Judges the next row of a stream meant to be in time order.
    pub fn judge(&mut self, row: &Row) -> Verdict {
        match &self.last_kept {
            Some(last) if row.at_ms < last.at_ms => Verdict::Earlier,
            Some(last) if row.at_ms == last.at_ms => {
                self.repeated.rows += 1;
                if !row.same_values(last) {
                    self.repeated.differing += 1;
                }
                if self.repeated.lines.len() < MAX_LINES {
                    self.repeated.lines.push(row.line);
                }
                Verdict::Repeat
            }
            _ => {
                self.last_kept = Some(*row);
                Verdict::Next
            }
        }
    }

    /// Notes a row in file order before sorting: counts it if it is earlier
    /// than a row above it.
    pub fn note_file_order(&mut self, row: &Row) {
        match self.latest_ms {
            Some(latest) if row.at_ms < latest => {
                self.out_of_order.rows += 1;
                self.out_of_order.first_line.get_or_insert(row.line);
            }
            _ => self.latest_ms = Some(row.at_ms),
        }
    }

    /// Puts the counts into the report; `sorted` says whether the rows were
    /// sorted.
    pub fn finish(self, report: &mut ImportReport, sorted: bool) {
        report.out_of_order = self.out_of_order;
        report.out_of_order.action = if sorted { "sorted by time" } else { "none" }.to_owned();
        report.repeated_times = self.repeated;
        report.repeated_times.lines.sort_unstable();
    }
}

impl fmt::Display for ImportReport {
    /// The report for people, as lines to indent under a heading.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let decimal = if self.decimal == "," {
            "decimal comma"
        } else {
            "decimal point"
        };
        writeln!(
            f,
            "readings     {}: {} row(s), separator {:?}, {decimal}{}",
            self.file,
            self.rows_read,
            self.separator,
            self.columns_file
                .as_ref()
                .map_or(String::new(), |c| format!(", layout from {c}"))
        )?;
        writeln!(f, "times        {}", self.time)?;
        for c in &self.columns {
            writeln!(f, "column       {:?}: {} ({})", c.name, c.read_as, c.from)?;
        }
        for c in &self.unused {
            writeln!(f, "unused       {:?}: {}", c.name, c.why)?;
        }
        writeln!(f, "pressure     {}", self.pressure)?;
        if self.rows_other_tanks > 0 {
            writeln!(
                f,
                "other tanks  {} row(s) for {} left out",
                self.rows_other_tanks,
                self.other_tanks.join(", ")
            )?;
        }
        let r = &self.repeated_times;
        if r.rows > 0 {
            writeln!(
                f,
                "repeated     {} row(s) repeat the time of an earlier row ({} of them with other values), lines {}{}: the first row of each time is used",
                r.rows,
                r.differing,
                r.lines
                    .iter()
                    .map(u64::to_string)
                    .collect::<Vec<_>>()
                    .join(", "),
                if r.rows as usize > r.lines.len() {
                    ", ..."
                } else {
                    ""
                }
            )?;
        }
        let o = &self.out_of_order;
        if o.rows > 0 {
            writeln!(
                f,
                "order        {} row(s) out of time order (the first at line {}): {}",
                o.rows,
                o.first_line.unwrap_or(0),
                o.action
            )?;
        }
        for n in &self.notes {
            writeln!(f, "note         {n}")?;
        }
        if self.rows_skipped > 0 {
            writeln!(
                f,
                "skipped      {} row(s) of the readings file:",
                self.rows_skipped
            )?;
            for m in self.skipped.iter().take(10) {
                writeln!(f, "               {m}")?;
            }
            if self.rows_skipped > 10 {
                writeln!(
                    f,
                    "               ... (the first {} in the JSON)",
                    self.skipped.len()
                )?;
            }
        }
        for w in &self.warnings {
            writeln!(f, "WARNING: {w}")?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn units_with_their_references() {
        let u = |t: &str| parse_unit(t).map(|u| (u.name, u.reference));
        assert_eq!(u("kPa(g)"), Some(("kPa", Some(Reference::Gauge))));
        assert_eq!(u("kPag"), Some(("kPa", Some(Reference::Gauge))));
        assert_eq!(u("barg"), Some(("bar", Some(Reference::Gauge))));
        assert_eq!(u("psia"), Some(("psi", Some(Reference::Absolute))));
        assert_eq!(u("kPa abs"), Some(("kPa", Some(Reference::Absolute))));
        assert_eq!(u("mbar(a)"), Some(("mbar", Some(Reference::Absolute))));
        assert_eq!(u("kPa"), Some(("kPa", None)));
        assert_eq!(u("Pa"), Some(("Pa", None)));
        assert_eq!(u("m³/h"), Some(("m3/h", None)));
        assert_eq!(u("°C"), Some(("degC", None)));
        assert_eq!(u("deg F"), Some(("degF", None)));
        assert_eq!(u("K"), Some(("K", None)));
        assert_eq!(u("mm"), Some(("mm", None)));
        // A length takes no reference; "ma" is not metres absolute.
        assert_eq!(u("ma"), None);
        assert_eq!(u("furlong"), None);
    }

    #[test]
    fn headers_by_convention_and_tag_style() {
        let spec = |h: &str| match recognise(h) {
            Recognised::Column(s) => (s.quantity, s.unit, s.reference, s.tap),
            other => panic!("{h}: {other:?}"),
        };
        use PressureTap::Headspace;
        use Quantity::*;
        use Reference::*;
        assert_eq!(spec("level_mm"), (Level, Some("mm"), None, None));
        assert_eq!(spec("pressure_kpa"), (Pressure, Some("kPa"), None, None));
        assert_eq!(
            spec("pressure_kpa_g"),
            (Pressure, Some("kPa"), Some(Gauge), None)
        );
        assert_eq!(
            spec("pressure_kpa_abs"),
            (Pressure, Some("kPa"), Some(Absolute), None)
        );
        assert_eq!(
            spec("pressure_barg"),
            (Pressure, Some("bar"), Some(Gauge), None)
        );
        assert_eq!(
            spec("headspace_pa"),
            (Pressure, Some("Pa"), Some(Gauge), Some(Headspace))
        );
        assert_eq!(spec("transfer_m3_h"), (Transfer, Some("m3/h"), None, None));
        assert_eq!(
            spec("temperature_c"),
            (Temperature, Some("degC"), None, None)
        );
        assert_eq!(
            spec("FF-T14.PT-101 [kPa(g)]"),
            (Pressure, Some("kPa"), Some(Gauge), None)
        );
        assert_eq!(
            spec("PT-14 (psia)"),
            (Pressure, Some("psi"), Some(Absolute), None)
        );
        assert_eq!(
            spec("PT-14 kPa(g)"),
            (Pressure, Some("kPa"), Some(Gauge), None)
        );
        assert_eq!(
            spec("PT-14_abs [kPa]"),
            (Pressure, Some("kPa"), Some(Absolute), None)
        );
        assert_eq!(
            spec("Headspace pressure [mbarg]"),
            (Pressure, Some("mbar"), Some(Gauge), Some(Headspace))
        );
        assert_eq!(spec("LT-101 (mm)"), (Level, Some("mm"), None, None));
        assert_eq!(spec("LT_101_mm"), (Level, Some("mm"), None, None));
        assert_eq!(spec("FT-3 [m³/h]"), (Transfer, Some("m3/h"), None, None));
        assert_eq!(spec("TT-14 [°F]"), (Temperature, Some("degF"), None, None));
        assert_eq!(spec("TT-14 [K]"), (Temperature, Some("K"), None, None));
        assert_eq!(spec("Timestamp"), (Time, None, None, None));
        assert_eq!(spec("Date/Time"), (Time, None, None, None));
        assert_eq!(spec("Tag"), (Tank, None, None, None));
        assert!(matches!(
            recognise("Time [UTC+01:00]"),
            Recognised::TimeInZone(z) if z.name == "UTC+01:00"
        ));
        for unrecognised in [
            "time_s",
            "LT-101",
            "Status",
            "level_furlong",
            "Flow in",
            "LT-101 m",
        ] {
            assert!(
                matches!(recognise(unrecognised), Recognised::Nothing(_)),
                "{unrecognised}: {:?}",
                recognise(unrecognised)
            );
        }
    }

    #[test]
    fn specs_on_the_command_line() {
        let (name, m) = split_column_option("PT-14 [kPa(g)]=pressure,kPa,gauge").unwrap();
        assert_eq!(name, "PT-14 [kPa(g)]");
        let Mapping::Use(s) = m else { panic!() };
        assert_eq!(
            (s.quantity, s.unit, s.reference, s.tap),
            (
                Quantity::Pressure,
                Some("kPa"),
                Some(Reference::Gauge),
                None
            )
        );
        let (_, m) = split_column_option("P=pressure,kPa(a),tap=0.2").unwrap();
        let Mapping::Use(s) = m else { panic!() };
        assert_eq!(s.reference, Some(Reference::Absolute));
        assert_eq!(
            s.tap,
            Some(PressureTap::Submerged {
                elevation: Length::metres(0.2)
            })
        );
        // A name holding "=" still splits at the spec.
        let (name, _) = split_column_option("a=b=level,mm").unwrap();
        assert_eq!(name, "a=b");
        let (_, m) = split_column_option("Flow=transfer,m3/h,out").unwrap();
        assert!(matches!(m, Mapping::Use(ColumnSpec { outward: true, .. })));
        assert_eq!(
            split_column_option("Comment=unused").unwrap().1,
            Mapping::Unused
        );
        for (bad, says) in [
            ("P=pressure", "needs its unit"),
            ("P=pressure,mm", "is a unit of length, not of pressure"),
            ("L=level,m,gauge", "is for a pressure column"),
            ("P=pressure,kPa(g),absolute", "given twice"),
            ("P=pressure,kPa,tap=x", "tap elevation in metres"),
            ("P", "NAME=QUANTITY"),
            ("P=volume,m3", "NAME=QUANTITY"),
            ("=level,m", "no column name"),
        ] {
            let err = split_column_option(bad).unwrap_err().to_string();
            assert!(err.contains(says), "{bad}: {err}");
        }
    }

    #[test]
    fn zones_and_offsets() {
        assert_eq!(parse_offset("+01:00"), Some(3600));
        assert_eq!(parse_offset("-0530"), Some(-(5 * 3600 + 30 * 60)));
        assert_eq!(parse_offset("+2"), Some(7200));
        assert_eq!(parse_offset("01:00"), None);
        assert!(Zone::parse("UTC+01:00").unwrap().is_fixed());
        assert!(Zone::parse("Europe/Berlin").is_ok_and(|z| !z.is_fixed()));
        assert!(
            Zone::parse("Mars/Olympus")
                .unwrap_err()
                .contains("IANA name")
        );
    }

    #[test]
    fn a_columns_file_and_its_errors() {
        let text = r#"
separator = ";"
decimal = ","
time_format = "%d.%m.%Y %H:%M:%S"
time_zone = "+01:00"
[columns]
"Zeit" = "time"
"FF-T14 Füllstand [mm]" = { quantity = "level", unit = "mm" }
"FF-T14 Druck" = { quantity = "pressure", unit = "kPa", reference = "absolute", tap_elevation_m = 0.1 }
"Status" = "unused"
"#;
        let layout = Layout::from_toml(text, Path::new("x.columns.toml")).unwrap();
        assert_eq!(layout.separator, Some(b';'));
        assert!(layout.decimal_comma);
        assert_eq!(layout.columns.len(), 4);
        let err = Layout::from_toml(
            "[columns]\n\"P\" = \"pressure,furlong\"\n",
            Path::new("c.toml"),
        )
        .unwrap_err()
        .to_string();
        assert!(
            err.starts_with("c.toml:2:7: column \"P\": \"furlong\""),
            "{err}"
        );
        let err = Layout::from_toml("seperator = \";\"\n", Path::new("c.toml"))
            .unwrap_err()
            .to_string();
        assert!(
            err.starts_with("c.toml:1:1:") && err.contains("unknown field"),
            "{err}"
        );
        let err = Layout::from_toml("decimal = \"x\"\n", Path::new("c.toml"))
            .unwrap_err()
            .to_string();
        assert!(err.starts_with("c.toml:1:11: decimal \"x\""), "{err}");
    }

    /// A config with the demo's three tanks, for the import tests.
    fn demo_config() -> crate::config::Config {
        let text = std::fs::read_to_string(
            Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml"),
        )
        .unwrap();
        crate::config::parse(&text, Path::new("demo.toml")).unwrap()
    }

    fn target<'a>(config: &'a crate::config::Config, tank: &str) -> Target<'a> {
        let t = config.tanks.iter().find(|t| t.id == tank).unwrap();
        Target {
            tank: t,
            other_tanks: config
                .tanks
                .iter()
                .filter(|o| o.id != tank)
                .map(|o| o.id.clone())
                .collect(),
            density_kg_m3: t.vessel.density().si(),
            stated_headspace_pa: None,
        }
    }

    /// Every row of `text` read for `target`, and the report.
    fn import(
        text: &str,
        layout: &Layout,
        target: &Target,
    ) -> anyhow::Result<(Vec<Row>, ImportReport)> {
        let mut import = Import::from_reader(
            Box::new(std::io::Cursor::new(text.as_bytes().to_vec())),
            "h.csv",
            layout,
            target,
        )?;
        let mut rows = Vec::new();
        while let Some(row) = import.next_row()? {
            rows.push(row);
        }
        Ok((rows, import.finish()))
    }

    #[test]
    fn the_present_columns_units_times_and_bad_rows() {
        let config = demo_config();
        let text = "utc,tank,level_mm,transfer_m3_h,other\n\
                    2026-12-01T10:00:01Z,FF-T12,4000,36,x\n\
                    2026-12-01 10:00:00,FF-T12,4100,,y\n\
                    1796119202,FF-T12,3900,0,z\n\
                    yesterday,FF-T12,4000,10,w\n\
                    2026-12-01T10:00:04Z,FF-T12,lots,10,v\n\
                    2026-12-01T10:00:05Z,FF-T20,1,1,u\n";
        let (rows, report) = import(text, &Layout::default(), &target(&config, "FF-T12")).unwrap();
        assert_eq!(rows.len(), 3);
        assert_eq!(rows[0].level_m, 4.0);
        assert_eq!(rows[0].transfer_m3_s, 0.01, "36 m³/h is 0.01 m³/s");
        assert!(
            rows[1].transfer_m3_s.is_nan(),
            "an empty cell is no reading"
        );
        assert_eq!(rows[2].at_ms, 1_796_119_202_000);
        assert_eq!((rows[0].line, rows[1].line, rows[2].line), (2, 3, 4));
        assert_eq!(report.rows_skipped, 2, "{:?}", report.skipped);
        assert!(report.skipped[0].starts_with("h.csv:5: time \"yesterday\""));
        assert!(
            report.skipped[1].contains("h.csv:6: \"lots\" in column \"level_mm\" is not a number")
        );
        assert_eq!(
            (report.rows_other_tanks, report.other_tanks.clone()),
            (1, vec!["FF-T20".to_owned()])
        );
        assert_eq!(report.unused.len(), 1);
        assert_eq!(report.unused[0].name, "other");
        assert!(
            report.notes.iter().any(|n| n.contains("taken as UTC")),
            "{:?}",
            report.notes
        );
        assert!(
            report
                .pressure
                .contains("no pressure column and no transmitter"),
            "{}",
            report.pressure
        );
    }

    #[test]
    fn a_tank_with_a_transmitter_needs_a_pressure_or_a_stated_headspace() {
        let config = demo_config();
        let t = target(&config, "FF-T14");
        let err = import(
            "time,level_m\n2026-12-01T10:00:00Z,1.6\n",
            &Layout::default(),
            &t,
        )
        .err()
        .unwrap()
        .to_string();
        assert!(
            err.contains("has a pressure transmitter (gauge, in the headspace)")
                && err.contains("--headspace KPA"),
            "{err}"
        );
        let stated = Target {
            stated_headspace_pa: Some(15_000.0),
            ..t.clone()
        };
        let (rows, report) = import(
            "time,level_m\n2026-12-01T10:00:00Z,1.6\n",
            &Layout::default(),
            &stated,
        )
        .unwrap();
        assert_eq!(rows[0].pressure_pa, 15_000.0);
        assert!(
            report.pressure.contains("--headspace 15 kPa gauge is held"),
            "{}",
            report.pressure
        );
        let err = import(
            "time,level_m,pressure_kpa\n2026-12-01T10:00:00Z,1.6,15\n",
            &Layout::default(),
            &stated,
        )
        .err()
        .unwrap()
        .to_string();
        assert!(
            err.contains("--headspace is for a file with no pressure column"),
            "{err}"
        );
    }

    /// The conversions: the liquid column is rho g h (hydrostatics), and
    /// absolute is gauge plus ambient (the definitions).
    #[test]
    fn pressure_is_converted_to_what_the_transmitter_reads() {
        let config = demo_config();
        // FF-T20: absolute, tap 0.2 m, gasoil 860 kg/m³, ambient 101.325 kPa.
        let t = target(&config, "FF-T20");
        let (rows, report) = import(
            "time,level_m,Headspace [kPa(g)]\n2026-12-01T10:00:00Z,5.2,2\n",
            &Layout::default(),
            &t,
        )
        .unwrap();
        let expected = 2_000.0 + 860.0 * 9.806_65 * (5.2 - 0.2) + 101_325.0;
        assert!(
            (rows[0].pressure_pa - expected).abs() < 1e-9,
            "{}",
            rows[0].pressure_pa
        );
        assert!(
            report
                .pressure
                .contains("converted to what the transmitter reads (absolute, at a tap 0.20 m"),
            "{}",
            report.pressure
        );
        assert!(report.warnings.is_empty(), "{:?}", report.warnings);
        // The same reading as the transmitter's own: passed through exactly.
        let (rows, report) = import(
            "time,level_m,pressure_kpa\n2026-12-01T10:00:00Z,5.2,143.2\n",
            &Layout::default(),
            &t,
        )
        .unwrap();
        assert_eq!(rows[0].pressure_pa, 143_200.0);
        assert!(
            report
                .pressure
                .contains("taken as the configured transmitter's"),
            "{}",
            report.pressure
        );
        // FF-T14 (gauge, headspace) from an absolute headspace column.
        let (rows, _) = import(
            "time,level_m,PT-101 [kPa(a)]\n2026-12-01T10:00:00Z,1.6,116.325\n",
            &Layout::default(),
            &target(&config, "FF-T14"),
        )
        .unwrap();
        assert!(
            (rows[0].pressure_pa - 15_000.0).abs() < 1e-9,
            "{}",
            rows[0].pressure_pa
        );
    }

    #[test]
    fn implausible_pressures_are_warned_about() {
        let config = demo_config();
        // Gauge readings of a 15 kPa blanket, against FF-T20's absolute
        // transmitter: the file says nothing, so they are taken as absolute.
        let (_, report) = import(
            "time,level_m,pressure_kpa\n2026-12-01T10:00:00Z,5.0,15\n2026-12-01T10:00:01Z,5.0,15.1\n",
            &Layout::default(),
            &target(&config, "FF-T20"),
        )
        .unwrap();
        assert!(
            report.warnings.iter().any(|w| w
                .contains("2 of 2 row(s) are absolute readings below the ambient pressure")
                && w.contains("--column \"pressure_kpa=pressure,kPa,gauge\"")),
            "{:?}",
            report.warnings
        );
        // Absolute readings marked gauge on FF-T14 (range -10 to 100 kPa).
        let (_, report) = import(
            "time,level_m,PT [kPa(g)]\n2026-12-01T10:00:00Z,1.6,116.3\n2026-12-01T10:00:01Z,1.6,116.4\n",
            &Layout::default(),
            &target(&config, "FF-T14"),
        )
        .unwrap();
        assert!(
            report
                .warnings
                .iter()
                .any(|w| w.contains("read like absolute pressures")),
            "{:?}",
            report.warnings
        );
        let (_, report) = import(
            "time,level_m,PT [kPa(g)]\n2026-12-01T10:00:00Z,1.6,\n2026-12-01T10:00:01Z,1.6,15\n",
            &Layout::default(),
            &target(&config, "FF-T14"),
        )
        .unwrap();
        assert!(
            report
                .warnings
                .iter()
                .any(|w| w.contains("is empty on 1 of 2 row(s)")),
            "{:?}",
            report.warnings
        );
        let (_, report) = import(
            "time,level_m,PT [kPa(g)]\n2026-12-01T10:00:00Z,1.6,116.3\n2026-12-01T10:00:01Z,1.6,116.4\n",
            &Layout::default(),
            &target(&config, "FF-T14"),
        )
        .unwrap();
        assert!(
            report.warnings.iter().any(|w| w.contains("2 row(s) give a pressure that, as the transmitter would read it, is outside its range (-10 to 100 kPa")),
            "{:?}",
            report.warnings
        );
    }

    #[test]
    fn a_semicolon_export_with_decimal_commas_and_local_time() {
        let config = demo_config();
        let text = "Export FF-T14\nfrom the historian\n\
                    Zeitstempel;FF-T14.LT-101 [mm];FF-T14.PT-101 [kPa(g)];FF-T14.TT-101 [°C];Status\n\
                    01.12.2026 11:00:00;1600,0;15,02;12,0;ok\n\
                    01.12.2026 11:00:01;1599,0;15,01;12,1;ok\n";
        let mut layout = Layout {
            decimal_comma: true,
            skip_lines: 2,
            time_format: Some(TimeFormat::parse("%d.%m.%Y %H:%M:%S").unwrap()),
            time_zone: Some(Zone::parse("Europe/Berlin").unwrap()),
            ..Layout::default()
        };
        layout
            .add_command_line(&["Zeitstempel=time".to_owned()])
            .unwrap();
        let (rows, report) = import(text, &layout, &target(&config, "FF-T14")).unwrap();
        assert_eq!(report.separator, ";");
        assert_eq!(rows.len(), 2);
        // 11:00 in Berlin in December (UTC+1) is 10:00 UTC.
        assert_eq!(rows[0].at_ms, 1_796_119_200_000);
        assert_eq!(rows[0].line, 4);
        assert_eq!(rows[1].level_m, 1.599);
        assert!((rows[0].pressure_pa - 15_020.0).abs() < 1e-9);
        assert!((rows[1].temperature_k - 285.25).abs() < 1e-9);
        assert_eq!(report.unused.len(), 1, "{:?}", report.unused);
        assert!(
            report.time.contains("taken in Europe/Berlin"),
            "{}",
            report.time
        );
        // Without the decimal comma the numbers say what is wrong.
        layout.decimal_comma = false;
        let err = import(text, &layout, &target(&config, "FF-T14")).err();
        assert!(err.is_none(), "the rows are skipped, not the file refused");
        let (_, report) = import(text, &layout, &target(&config, "FF-T14")).unwrap();
        assert!(
            report.skipped[0].contains("a decimal comma?"),
            "{:?}",
            report.skipped
        );
    }

    #[test]
    fn a_wide_export_picks_the_tanks_own_columns() {
        let config = demo_config();
        let text = "Timestamp [UTC+01:00],FF-T12.LT-101 [m],FF-T14.LT-101 [m],FF-T14.PT-101 [kPa(g)],FF-T12.FT-101 [m3/h]\n\
                    2026-12-01 11:00:00,4.2,1.6,15,0\n";
        let (rows, report) = import(text, &Layout::default(), &target(&config, "FF-T14")).unwrap();
        assert_eq!(rows[0].level_m, 1.6);
        assert_eq!(rows[0].at_ms, 1_796_119_200_000, "the header's offset");
        assert!(rows[0].transfer_m3_s.is_nan());
        let unused: Vec<(&str, &str)> = report
            .unused
            .iter()
            .map(|u| (u.name.as_str(), u.why.as_str()))
            .collect();
        assert_eq!(unused.len(), 2, "{unused:?}");
        assert!(unused[0].1.contains("a level of tank FF-T12"), "{unused:?}");
        // The transfer column is FF-T12's, the only one: refused for FF-T14.
        assert!(
            report
                .columns
                .iter()
                .all(|c| c.quantity != Quantity::Transfer)
        );
        // Two level columns for neither tank: the user must choose.
        let err = import(
            "time,LT-1 [m],LT-2 [m],headspace_pa\n2026-12-01T10:00:00Z,1,1,0\n",
            &Layout::default(),
            &target(&config, "FF-T14"),
        )
        .err()
        .unwrap()
        .to_string();
        assert!(
            err.contains("2 columns could be the level: \"LT-1 [m]\", \"LT-2 [m]\"")
                && err.contains("--column \"LT-1 [m]=level,m\""),
            "{err}"
        );
    }

    #[test]
    fn repeated_and_out_of_order_times_are_counted() {
        let row = |line, at_ms, level_m| Row {
            line,
            at_ms,
            level_m,
            pressure_pa: f64::NAN,
            transfer_m3_s: f64::NAN,
            temperature_k: f64::NAN,
        };
        let mut order = TimeOrder::default();
        assert_eq!(order.judge(&row(2, 1000, 1.0)), Verdict::Next);
        assert_eq!(order.judge(&row(3, 1000, 1.0)), Verdict::Repeat);
        assert_eq!(order.judge(&row(4, 1000, 0.9)), Verdict::Repeat);
        assert_eq!(order.judge(&row(5, 2000, 0.9)), Verdict::Next);
        assert_eq!(order.judge(&row(6, 1500, 0.9)), Verdict::Earlier);
        assert_eq!(order.repeated.rows, 2);
        assert_eq!(order.repeated.differing, 1);
        assert_eq!(order.repeated.lines, [3, 4]);
        let mut order = TimeOrder::default();
        for r in [
            row(2, 1000, 1.0),
            row(3, 3000, 1.0),
            row(4, 2000, 1.0),
            row(5, 500, 1.0),
        ] {
            order.note_file_order(&r);
        }
        assert_eq!(order.out_of_order.rows, 2);
        assert_eq!(order.out_of_order.first_line, Some(4));
    }

    #[test]
    fn a_file_with_nothing_usable_says_why() {
        let config = demo_config();
        let t = target(&config, "FF-T12");
        let (rows, report) = import("time,level_m\nsoon,1\n", &Layout::default(), &t).unwrap();
        assert!(rows.is_empty());
        let err = Import::nothing_usable(&report, "FF-T12").to_string();
        assert!(err.contains("no usable row (1 skipped)"), "{err}");
        let err = import("when,level_m\n", &Layout::default(), &t)
            .err()
            .unwrap()
            .to_string();
        assert!(err.contains("h.csv:1: no time column"), "{err}");
        let err = import("time,height\n", &Layout::default(), &t)
            .err()
            .unwrap()
            .to_string();
        assert!(
            err.contains("no level column") && err.contains("--column \"NAME=level,UNIT\""),
            "{err}"
        );
        let mut layout = Layout::default();
        layout
            .add_command_line(&["LT-9=level,m".to_owned()])
            .unwrap();
        let err = import("time,level_m\n", &layout, &t)
            .err()
            .unwrap()
            .to_string();
        assert!(
            err.contains("a column \"LT-9\" is mapped on the command line, but the file has no column of that name"),
            "{err}"
        );
    }

    #[test]
    fn levels_and_temperatures_out_of_their_range_are_warned_about() {
        let config = demo_config();
        let (_, report) = import(
            "time,level_m,temperature_c\n2026-12-01T10:00:00Z,1600,285\n",
            &Layout::default(),
            &target(&config, "FF-T12"),
        )
        .unwrap();
        assert!(
            report
                .warnings
                .iter()
                .any(|w| w.contains("1 row(s) give a level outside the tank (0 to 5.00 m")),
            "{:?}",
            report.warnings
        );
        assert!(
            report
                .warnings
                .iter()
                .any(|w| w.contains("give a temperature outside")),
            "{:?}",
            report.warnings
        );
    }
}
