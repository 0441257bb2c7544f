//! How a site shows figures to people: the time zone its clocks read and
//! the units its people work in (`[site] time_zone`, `[site] units`).
//!
//! Every time a person reads is in the site's zone with its offset beside
//! it; every number a person reads goes through [`number`] (three
//! significant figures, thousands grouped from 1,000); and each quantity has
//! one unit per report. Machine output (JSON, CSV, the database) never goes
//! through here: it carries RFC 3339 UTC times ([`rfc3339`]) and SI numbers
//! with the unit in the field's name.
//!
//! Left out: layout (each report's own) and the words for an estimate
//! (`report::estimate`).

pub use crate::config::{Units, UnknownZone};
use crate::model::{Density, Mass, MassRate};
use jiff::tz::TimeZone;

/// Pounds in one kilogram (the pound is 0.453 592 37 kg exactly, by the
/// international yard and pound agreement of 1959).
pub const POUNDS_PER_KG: f64 = 1.0 / 0.453_592_37;
/// Feet in one metre (the foot is 0.3048 m exactly, same agreement).
pub const FEET_PER_M: f64 = 1.0 / 0.3048;
/// Inches in one metre (the inch is 25.4 mm exactly).
pub const INCHES_PER_M: f64 = 1.0 / 0.0254;
/// psi in one kPa (1 lbf/in² = 6.894 757 293 168 kPa, from the exact pound
/// and inch and standard gravity 9.806 65 m/s²).
pub const PSI_PER_KPA: f64 = 1.0 / 6.894_757_293_168;

/// A site's time zone and units: everything a report needs to say a time
/// or a quantity the way the site's people read it.
#[derive(Debug, Clone)]
pub struct Presentation {
    /// The IANA name of the zone (`Europe/Oslo`), or `UTC`.
    pub zone_name: String,
    pub zone: TimeZone,
    pub units: Units,
}

impl Default for Presentation {
    /// UTC and metric: for readers with no site config to go by.
    fn default() -> Self {
        Presentation {
            zone_name: "UTC".into(),
            zone: TimeZone::UTC,
            units: Units::Metric,
        }
    }
}

impl Presentation {
    /// The presentation of a zone named as a config names it (`UTC`,
    /// `Europe/Oslo`, or `local` for the machine's own).
    pub fn new(zone_name: &str, units: Units) -> Result<Self, UnknownZone> {
        let (zone_name, zone) = crate::config::time_zone(zone_name)?;
        Ok(Presentation {
            zone_name,
            zone,
            units,
        })
    }

    /// The presentation a site's config asks for.
    pub fn of(config: &crate::config::Config) -> Self {
        Presentation {
            zone_name: config.time_zone_name.clone(),
            zone: config.time_zone.clone(),
            units: config.units,
        }
    }

    /// A time as people read it, in the site's zone with its abbreviation
    /// and offset: `2026-12-01 14:42:07 CET (UTC+01:00)`;
    /// `2026-12-01 13:42:07 UTC` in UTC.
    pub fn time(&self, at_ms: i64) -> String {
        match jiff::Timestamp::from_millisecond(to_nearest_second(at_ms)) {
            Ok(t) => {
                let local = t.to_zoned_datetime(self.zone.clone());
                if self.is_utc() {
                    local.strftime("%Y-%m-%d %H:%M:%S UTC").to_string()
                } else {
                    local.strftime("%Y-%m-%d %H:%M:%S %Z (UTC%:z)").to_string()
                }
            }
            Err(_) => format!("{at_ms} ms since 1970"),
        }
    }

    /// A time of day in the site's zone, for a chart's axis or a running
    /// line: `14:42:07`.
    pub fn clock(&self, at_ms: i64) -> String {
        self.strftime(at_ms, "%H:%M:%S")
    }

    /// A time of day in the site's zone by `pattern` (jiff's `strftime`),
    /// with its date in front when that is not the same local day as
    /// `now_ms`: a forecast past midnight or a crossing yesterday must not
    /// read as today.
    pub fn clock_near(&self, at_ms: i64, now_ms: i64, pattern: &str) -> String {
        let day = |ms: i64| self.strftime(ms, "%Y-%m-%d");
        if day(at_ms) == day(now_ms) {
            self.strftime(at_ms, pattern)
        } else {
            self.strftime(at_ms, &format!("%Y-%m-%d {pattern}"))
        }
    }

    /// A time in the site's zone by a `strftime` pattern (jiff's).
    pub fn strftime(&self, at_ms: i64, pattern: &str) -> String {
        match jiff::Timestamp::from_millisecond(to_nearest_second(at_ms)) {
            Ok(t) => t
                .to_zoned_datetime(self.zone.clone())
                .strftime(pattern)
                .to_string(),
            Err(_) => format!("{at_ms} ms since 1970"),
        }
    }

    /// The zone as a report's header names it: `Europe/Oslo, UTC+01:00` at
    /// `at_ms` (the offset changes with summer time).
    pub fn zone_text(&self, at_ms: i64) -> String {
        if self.is_utc() {
            return "UTC".into();
        }
        format!("{}, UTC{}", self.zone_name, self.strftime(at_ms, "%:z"))
    }

    fn is_utc(&self) -> bool {
        self.zone_name == "UTC" || self.zone_name == "Etc/UTC"
    }

    /// A mass: `1,230 kg`, or `2,710 lb`.
    pub fn mass(&self, m: Mass) -> String {
        match self.units {
            Units::Metric => format!("{} kg", number(m.si())),
            Units::UsCustomary => format!("{} lb", number(m.si() * POUNDS_PER_KG)),
        }
    }

    /// A mass rate, always per second so that a table has one unit:
    /// `2.35 kg/s`, `0.0120 kg/s`, or `5.18 lb/s`.
    pub fn rate(&self, r: MassRate) -> String {
        match self.units {
            Units::Metric => format!("{} kg/s", number(r.si())),
            Units::UsCustomary => format!("{} lb/s", number(r.si() * POUNDS_PER_KG)),
        }
    }

    /// A mass as liquid volume at `density`: `1.00 m³ (1,000 L)`, or
    /// `264 US gal (6.29 bbl)`.
    pub fn volume(&self, m: Mass, density: Density) -> String {
        let m3 = (m / density).si();
        let litres = m3 * 1000.0;
        match self.units {
            Units::Metric => format!("{} m³ ({} L)", number(m3), number(litres)),
            Units::UsCustomary => format!(
                "{} US gal ({} bbl)",
                number(litres / super::LITRES_PER_US_GALLON),
                number(litres / super::LITRES_PER_BARREL)
            ),
        }
    }

    /// A level or height: `2.35 m`, or `7.71 ft`.
    pub fn length(&self, metres: f64) -> String {
        match self.units {
            Units::Metric => format!("{} m", number(metres)),
            Units::UsCustomary => format!("{} ft", number(metres * FEET_PER_M)),
        }
    }

    /// A hole's diameter: `25.0 mm`, or `0.984 in`.
    pub fn diameter(&self, metres: f64) -> String {
        match self.units {
            Units::Metric => format!("{} mm", number(metres * 1000.0)),
            Units::UsCustomary => format!("{} in", number(metres * INCHES_PER_M)),
        }
    }

    /// A gauge pressure: `12.0 kPa(g)`, or `1.74 psig`.
    pub fn gauge_pressure(&self, kpa: f64) -> String {
        match self.units {
            Units::Metric => format!("{} kPa(g)", number(kpa)),
            Units::UsCustomary => format!("{} psig", number(kpa * PSI_PER_KPA)),
        }
    }
}

/// People read times to the second, rounded, not cut: a start an operator
/// typed as 13:42:00 and stored a millisecond earlier still reads 13:42:00.
fn to_nearest_second(at_ms: i64) -> i64 {
    at_ms
        .saturating_add(500)
        .div_euclid(1000)
        .saturating_mul(1000)
}

/// A machine timestamp: RFC 3339 in UTC with milliseconds,
/// `2026-12-01T13:42:07.250Z`.
pub fn rfc3339(at_ms: i64) -> String {
    match jiff::Timestamp::from_millisecond(at_ms) {
        Ok(t) => t.strftime("%Y-%m-%dT%H:%M:%S%.3fZ").to_string(),
        Err(_) => format!("{at_ms}"),
    }
}

/// A round quantity as people write it, for a chart's ticks: 50, 2.5,
/// 12,000 ([`number`] would say 50.0, its three significant figures).
pub fn whole(x: f64) -> String {
    let text = number(x);
    if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.').to_owned()
    } else {
        text
    }
}

/// The one number format for people: three significant figures, thousands
/// grouped with commas from 1,000 (`0.0123`, `2.35`, `358`, `1,230`,
/// `123,000`), never exponent notation for the sizes a site meets.
pub fn number(x: f64) -> String {
    if x == 0.0 {
        return "0".into();
    }
    if !x.is_finite() {
        return if x.is_nan() {
            "unknown".into()
        } else if x > 0.0 {
            "unbounded".into()
        } else {
            "-unbounded".into()
        };
    }
    let mut magnitude = x.abs().log10().floor() as i32;
    // Rounding to three figures can carry into the next power of ten
    // (0.9996 is 1.00, 999.6 is 1,000).
    if (x.abs() / 10f64.powi(magnitude - 2)).round() >= 1000.0 {
        magnitude += 1;
    }
    if magnitude < 3 {
        let decimals = (2 - magnitude).max(0) as usize;
        return format!("{x:.decimals$}");
    }
    let unit = 10f64.powi(magnitude.max(2) - 2);
    let rounded = (x / unit).round() * unit;
    let digits = format!("{:.0}", rounded.abs());
    let mut out = String::with_capacity(digits.len() + digits.len() / 3 + 1);
    if rounded < 0.0 {
        out.push('-');
    }
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(c);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_have_three_significant_figures_and_group_from_a_thousand() {
        for (x, text) in [
            (0.0, "0"),
            (0.012_34, "0.0123"),
            (2.345, "2.35"),
            (358.4, "358"),
            (999.4, "999"),
            (999.6, "1,000"),
            (0.999_96, "1.00"),
            (1234.6, "1,230"),
            (11_400.0, "11,400"),
            (123_456.0, "123,000"),
            (-1983.0, "-1,980"),
            (4000.0, "4,000"),
            (2.5e9, "2,500,000,000"),
        ] {
            assert_eq!(number(x), text, "{x}");
        }
        assert_eq!(number(f64::NAN), "unknown");
    }

    #[test]
    fn us_customary_units_follow_their_exact_definitions() {
        let us = Presentation {
            units: Units::UsCustomary,
            ..Presentation::default()
        };
        // 1 lb = 0.45359237 kg, 1 ft = 0.3048 m, 1 in = 25.4 mm, 1 psi =
        // 6.894757 kPa, 1 US gal = 3.785411784 L, 1 bbl = 42 US gal: all
        // exact by definition (NIST SP 811, appendix B).
        assert_eq!(us.mass(Mass::kilograms(453.592_37)), "1,000 lb");
        assert_eq!(us.length(0.3048 * 25.0), "25.0 ft");
        assert_eq!(us.diameter(0.0254), "1.00 in");
        assert_eq!(us.gauge_pressure(6.894_757), "1.00 psig");
        assert_eq!(
            us.volume(
                Mass::kilograms(158.987_294_928),
                Density::kg_per_cubic_metre(1000.0)
            ),
            "42.0 US gal (1.00 bbl)"
        );
        let metric = Presentation::default();
        assert_eq!(metric.mass(Mass::kilograms(1234.6)), "1,230 kg");
        assert_eq!(metric.rate(MassRate::kg_per_second(0.1)), "0.100 kg/s");
        assert_eq!(
            metric.volume(Mass::kilograms(1000.0), Density::kg_per_cubic_metre(1000.0)),
            "1.00 m³ (1,000 L)"
        );
    }

    #[test]
    fn times_for_people_carry_the_zone_and_machine_times_are_rfc3339_utc() {
        // 2026-07-01T12:00:00Z: summer time in Oslo (UTC+02:00, tz database).
        let summer = 1_782_907_200_000;
        assert_eq!(rfc3339(summer + 250), "2026-07-01T12:00:00.250Z");
        assert_eq!(
            Presentation::default().time(summer),
            "2026-07-01 12:00:00 UTC"
        );
        // Rounded to the second, not cut.
        assert_eq!(
            Presentation::default().time(summer - 1),
            "2026-07-01 12:00:00 UTC"
        );
        let oslo = Presentation::new("Europe/Oslo", Units::Metric).unwrap();
        assert_eq!(oslo.time(summer), "2026-07-01 14:00:00 CEST (UTC+02:00)");
        assert_eq!(oslo.zone_text(summer), "Europe/Oslo, UTC+02:00");
        // 2026-12-01T12:00:00Z: winter, UTC+01:00.
        assert_eq!(oslo.clock(1_796_126_400_000), "13:00:00");
        // A day later in Oslo's terms carries its date; the same day does not.
        assert_eq!(
            oslo.clock_near(1_796_126_400_000, 1_796_126_400_000 - 3_600_000, "%H:%M"),
            "13:00"
        );
        assert_eq!(
            oslo.clock_near(1_796_126_400_000 + 86_400_000, 1_796_126_400_000, "%H:%M"),
            "2026-12-02 13:00"
        );
        let e = Presentation::new("Europe/Nowhere", Units::Metric).unwrap_err();
        assert!(e.to_string().contains("IANA name"), "{e}");
    }
}
