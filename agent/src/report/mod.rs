//! Figures for people: times, masses, volumes, rates and durations with
//! their units in the site's zone and units ([`presentation`]), and the
//! cautions every human-facing report carries.
//!
//! Left out: layout, but for the status table ([`table`]), which `status`
//! and the demo print alike. Each other command lays out its own table;
//! this module makes sure a number never appears without its unit.
//!
//! * [`estimate`]: the words for an estimate (reasons, the fit, the band's
//!   causes, warnings, crossings) and its parameters, shared by every report.
//! * [`presentation`]: the site's zone and units, the one number format
//!   for people, and RFC 3339 times for machines.
//! * [`table`]: the status table for a terminal.

pub mod estimate;
pub mod presentation;
pub mod table;

pub use presentation::{Presentation, number, rfc3339};

use crate::model::TimeSpan;

/// The caution printed with every human-facing report.
pub const CAUTION: &str = "CAUTION: these figures are estimates for emergency planning, not measurements. \
Follow the site's emergency procedures, local codes and the judgement of licensed professionals.";

/// Litres in one US gallon (exact by definition: 231 cubic inches).
pub const LITRES_PER_US_GALLON: f64 = 3.785_411_784;

/// Litres in one oil barrel (exact by definition: 42 US gallons).
pub const LITRES_PER_BARREL: f64 = 42.0 * LITRES_PER_US_GALLON;

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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_read_as_hours_minutes_and_seconds() {
        assert_eq!(duration(TimeSpan::seconds(42.0)), "42 s");
        assert_eq!(duration(TimeSpan::seconds(252.0)), "4 min 12 s");
        assert_eq!(duration(TimeSpan::seconds(7500.0)), "2 h 05 min");
        assert_eq!(duration(TimeSpan::hours(72.0)), "3.0 days");
    }
}
