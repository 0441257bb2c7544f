//! Figures for people: masses, volumes, rates and durations with their units,
//! and the cautions every human-facing report carries.
//!
//! Left out: layout, but for the status table ([`table`]), which `status`
//! and the demo print alike. Each other command lays out its own table;
//! this module makes sure a number never appears without its unit.
//!
//! * [`estimate`]: the words for an estimate (reasons, the fit, the band's
//!   causes, warnings, crossings) and its parameters, shared by every report.
//! * [`table`]: the status table for a terminal.

pub mod estimate;
pub mod presentation;
pub mod table;

pub use presentation::{Presentation, number, rfc3339};

use crate::model::{Density, Mass, MassRate, TimeSpan, Volume};

/// The caution printed with every human-facing report.
pub const CAUTION: &str = "CAUTION: these figures are estimates for emergency planning, not measurements. \
Follow the site's emergency procedures, local codes and the judgement of licensed professionals.";

/// Litres in one US gallon (exact by definition: 231 cubic inches).
pub const LITRES_PER_US_GALLON: f64 = 3.785_411_784;

/// Litres in one oil barrel (exact by definition: 42 US gallons).
pub const LITRES_PER_BARREL: f64 = 42.0 * LITRES_PER_US_GALLON;

/// A mass in kg, with three significant figures or more and thousands
/// separated for reading at a glance.
pub fn mass(m: Mass) -> String {
    format!("{} kg", number(m.si()))
}

/// A mass rate in kg/s (and kg/h under 1 kg/s, where kg/s reads as 0.0).
pub fn rate(r: MassRate) -> String {
    let kg_s = r.si();
    if kg_s != 0.0 && kg_s.abs() < 1.0 {
        format!("{} kg/h", number(kg_s * 3600.0))
    } else {
        format!("{} kg/s", number(kg_s))
    }
}

/// A mass as liquid volume at `density`, in m³, L, US gal and bbl.
pub fn volumes(m: Mass, density: Density) -> String {
    let v: Volume = m / density;
    let litres = v.si() * 1000.0;
    format!(
        "{} m³ = {} L = {} US gal = {} bbl",
        number(v.si()),
        number(litres),
        number(litres / LITRES_PER_US_GALLON),
        number(litres / LITRES_PER_BARREL)
    )
}

/// A span of time as hours, minutes and seconds (`2 h 05 min`, `4 min 12 s`).
pub fn duration(t: TimeSpan) -> String {
    let s = t.si();
    if !s.is_finite() {
        return "unknown".to_owned();
    }
    let total = s.round() as i64;
    let (h, min, sec) = (total / 3600, (total % 3600) / 60, total % 60);
    match (h, min) {
        (0, 0) => format!("{sec} s"),
        (0, _) => format!("{min} min {sec:02} s"),
        (h, _) if h >= 48 => format!("{:.1} days", s / 86_400.0),
        _ => format!("{h} h {min:02} min"),
    }
}

/// A UTC time as people read it: `2026-12-01 13:42:07 UTC`.
pub fn utc(at_ms: i64) -> String {
    match jiff::Timestamp::from_millisecond(at_ms) {
        Ok(t) => t.strftime("%Y-%m-%d %H:%M:%S UTC").to_string(),
        Err(_) => format!("{at_ms} ms"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn figures_carry_units_and_sensible_digits() {
        assert_eq!(mass(Mass::kilograms(1234.6)), "1,230 kg");
        assert_eq!(mass(Mass::kilograms(123_456.0)), "123,000 kg");
        assert_eq!(mass(Mass::kilograms(0.01234)), "0.0123 kg");
        assert_eq!(rate(MassRate::kg_per_second(2.345)), "2.35 kg/s");
        assert_eq!(rate(MassRate::kg_per_second(0.1)), "360 kg/h");
        assert_eq!(duration(TimeSpan::seconds(42.0)), "42 s");
        assert_eq!(duration(TimeSpan::seconds(252.0)), "4 min 12 s");
        assert_eq!(duration(TimeSpan::seconds(7500.0)), "2 h 05 min");
        assert_eq!(duration(TimeSpan::hours(72.0)), "3.0 days");
    }

    #[test]
    fn volume_units_follow_their_definitions() {
        // 1 m³ of water: 1000 L, 264.172 US gal, 6.28981 bbl (exact
        // definitions of the gallon and the barrel).
        let text = volumes(Mass::kilograms(1000.0), Density::kg_per_cubic_metre(1000.0));
        assert_eq!(text, "1.00 m³ = 1,000 L = 264 US gal = 6.29 bbl");
    }
}
