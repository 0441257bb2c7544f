//! Readings from outside the agent: a CSV of timestamped tank readings, as
//! a plant historian exports them, turned into samples for a replay.
//!
//! Accepted columns (by header name; any order; other columns are ignored):
//!
//! * time: `time`, `timestamp` or `utc`. RFC 3339 (`2026-12-01T13:42:00Z`,
//!   with an offset or Z), `YYYY-MM-DD HH:MM:SS[.fff]` taken as UTC, or Unix
//!   seconds (`1796160000.5`).
//! * level, one of: `level_m`, `level_mm`, `level_cm`, `level_ft`, `level_in`.
//! * pressure (optional), as the tank's configured transmitter reads it
//!   (gauge or absolute, at its tap): `pressure_pa`, `pressure_kpa`,
//!   `pressure_bar`, `pressure_mbar`, `pressure_psi`.
//! * transfer (optional), net flow into the tank: `transfer_m3_s`,
//!   `transfer_m3_h`, `transfer_l_min`.
//! * `tank` (optional): when present, only rows for the chosen tank are used.
//!
//! A bad row (unreadable time, a level that is not a number) gets a message
//! naming its line and is skipped and counted; only a file with no usable
//! row at all is an error. Rows are sorted by time; a repeated time keeps the
//! first row.

use crate::acquire::sample::{Reading, TankSample};
use anyhow::{Context, bail};
use std::path::Path;

/// What a readings file gave.
#[derive(Debug, Default)]
pub struct Readings {
    pub samples: Vec<TankSample>,
    /// One message per skipped row, naming its line.
    pub skipped: Vec<String>,
}

const LEVEL_UNITS: &[(&str, f64)] = &[
    ("level_m", 1.0),
    ("level_mm", 0.001),
    ("level_cm", 0.01),
    ("level_ft", 0.3048),
    ("level_in", 0.0254),
];
const PRESSURE_UNITS: &[(&str, f64)] = &[
    ("pressure_pa", 1.0),
    ("pressure_kpa", 1e3),
    ("pressure_bar", 1e5),
    ("pressure_mbar", 100.0),
    ("pressure_psi", 6_894.757_293_168_361),
];
const TRANSFER_UNITS: &[(&str, f64)] = &[
    ("transfer_m3_s", 1.0),
    ("transfer_m3_h", 1.0 / 3600.0),
    ("transfer_l_min", 1e-3 / 60.0),
];

/// Reads the file for `tank`.
pub fn read(path: &Path, tank: &str) -> anyhow::Result<Readings> {
    let file = std::fs::File::open(path)
        .with_context(|| format!("cannot open the readings file {}", path.display()))?;
    parse(file, &path.display().to_string(), tank)
}

/// Parses readings from any reader; `name` labels messages.
pub fn parse(input: impl std::io::Read, name: &str, tank: &str) -> anyhow::Result<Readings> {
    let mut reader = csv::ReaderBuilder::new()
        .flexible(true)
        .trim(csv::Trim::All)
        .from_reader(input);
    let headers: Vec<String> = reader
        .headers()
        .with_context(|| format!("{name}: cannot read the header line"))?
        .iter()
        .map(|h| h.to_ascii_lowercase())
        .collect();
    let find = |names: &[&str]| headers.iter().position(|h| names.contains(&h.as_str()));
    let pick = |units: &[(&str, f64)]| {
        units
            .iter()
            .find_map(|(n, factor)| headers.iter().position(|h| h == n).map(|i| (i, *factor)))
    };
    let Some(time_col) = find(&["time", "timestamp", "utc"]) else {
        bail!("{name}:1: no time column; name one of the columns time, timestamp or utc");
    };
    let Some(level_col) = pick(LEVEL_UNITS) else {
        let names: Vec<&str> = LEVEL_UNITS.iter().map(|(n, _)| *n).collect();
        bail!(
            "{name}:1: no level column; name one column {}",
            names.join(", ")
        );
    };
    let pressure_col = pick(PRESSURE_UNITS);
    let transfer_col = pick(TRANSFER_UNITS);
    let tank_col = find(&["tank"]);

    let mut out = Readings::default();
    for (i, record) in reader.records().enumerate() {
        let line = i + 2;
        let record = match record {
            Ok(r) => r,
            Err(e) => {
                out.skipped
                    .push(format!("{name}:{line}: unreadable row: {e}"));
                continue;
            }
        };
        if let Some(col) = tank_col
            && record.get(col).is_some_and(|t| t != tank)
        {
            continue;
        }
        let field = |col: usize| record.get(col).unwrap_or("");
        let at_ms = match parse_time(field(time_col)) {
            Some(t) => t,
            None => {
                out.skipped.push(format!(
                    "{name}:{line}: time {:?} is not RFC 3339, YYYY-MM-DD HH:MM:SS or Unix seconds; row skipped",
                    field(time_col)
                ));
                continue;
            }
        };
        let number = |col: Option<(usize, f64)>| -> Result<Option<f64>, String> {
            match col {
                None => Ok(None),
                Some((c, factor)) => match field(c) {
                    "" => Ok(None),
                    text => text
                        .parse::<f64>()
                        .ok()
                        .filter(|v| v.is_finite())
                        .map(|v| Some(v * factor))
                        .ok_or_else(|| {
                            format!("{:?} in column {} is not a number", text, headers[c])
                        }),
                },
            }
        };
        let level = match number(Some(level_col)) {
            Ok(Some(v)) => v,
            Ok(None) => {
                out.skipped
                    .push(format!("{name}:{line}: no level; row skipped"));
                continue;
            }
            Err(e) => {
                out.skipped.push(format!("{name}:{line}: {e}; row skipped"));
                continue;
            }
        };
        let (pressure, transfer) = match (number(pressure_col), number(transfer_col)) {
            (Ok(p), Ok(t)) => (p, t),
            (Err(e), _) | (_, Err(e)) => {
                out.skipped.push(format!("{name}:{line}: {e}; row skipped"));
                continue;
            }
        };
        out.samples.push(TankSample {
            tank: 0,
            tank_id: tank.to_owned(),
            at_ms,
            level: Reading::good(level),
            pressure: pressure_col.map(|_| {
                pressure.map_or(
                    Reading::bad(crate::acquire::sample::Quality::DeviceError),
                    Reading::good,
                )
            }),
            transfer: transfer_col.map(|_| {
                transfer.map_or(
                    Reading::bad(crate::acquire::sample::Quality::DeviceError),
                    Reading::good,
                )
            }),
            temperature: None,
            leak_flag: None,
        });
    }
    out.samples.sort_by_key(|s| s.at_ms);
    out.samples.dedup_by_key(|s| s.at_ms);
    if out.samples.is_empty() {
        let first = out
            .skipped
            .first()
            .cloned()
            .unwrap_or_else(|| format!("no rows for tank {tank}"));
        bail!(
            "{name}: no usable row ({} skipped); the first problem: {first}",
            out.skipped.len()
        );
    }
    Ok(out)
}

fn parse_time(text: &str) -> Option<i64> {
    if let Ok(t) = text.parse::<jiff::Timestamp>() {
        return Some(t.as_millisecond());
    }
    if let Ok(dt) = text.parse::<jiff::civil::DateTime>() {
        return dt
            .to_zoned_datetime(jiff::tz::TimeZone::UTC)
            .ok()
            .map(|z| z.timestamp().as_millisecond());
    }
    let seconds: f64 = text.parse().ok()?;
    (seconds.is_finite() && seconds > 0.0 && seconds < 1e11)
        .then(|| (seconds * 1000.0).round() as i64)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn columns_units_times_and_bad_rows() {
        let text = "utc,tank,level_mm,pressure_kpa,other\n\
                    2026-12-01T10:00:01Z,A,4000,10,x\n\
                    2026-12-01 10:00:00,A,4100,10.5,y\n\
                    1796119202,A,3900,,z\n\
                    yesterday,A,4000,10,w\n\
                    2026-12-01T10:00:04Z,A,lots,10,v\n\
                    2026-12-01T10:00:05Z,B,1,1,u\n";
        let r = parse(text.as_bytes(), "h.csv", "A").unwrap();
        assert_eq!(r.samples.len(), 3);
        assert_eq!(r.samples[0].level.value, Some(4.1), "sorted by time");
        assert_eq!(r.samples[1].pressure.unwrap().value, Some(10_000.0));
        assert!(
            !r.samples[2].pressure.unwrap().is_good(),
            "an empty pressure is a bad reading"
        );
        assert_eq!(r.skipped.len(), 2, "{:?}", r.skipped);
        assert!(
            r.skipped[0].starts_with("h.csv:5: time \"yesterday\""),
            "{}",
            r.skipped[0]
        );
        assert!(
            r.skipped[1].contains("h.csv:6: \"lots\" in column level_mm is not a number"),
            "{}",
            r.skipped[1]
        );
    }

    #[test]
    fn a_file_with_nothing_usable_is_an_error() {
        let err = parse("time,level_m\nsoon,1\n".as_bytes(), "h.csv", "A")
            .unwrap_err()
            .to_string();
        assert!(err.contains("no usable row (1 skipped)"), "{err}");
        let err = parse("when,level_m\n".as_bytes(), "h.csv", "A")
            .unwrap_err()
            .to_string();
        assert!(err.contains("h.csv:1: no time column"), "{err}");
    }
}
