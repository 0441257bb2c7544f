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

/// The command that confirms a suspected loss as an event from where the
/// unexplained fall began, ready to paste into a POSIX shell: a tank id
/// with anything but plain characters is single-quoted.
pub fn confirm_loss_command(tank: &str, since_ms: i64) -> String {
    let plain = |c: char| c.is_ascii_alphanumeric() || "-_.,:/@%+=".contains(c);
    let tank = if !tank.is_empty() && tank.chars().all(plain) {
        tank.to_string()
    } else {
        format!("'{}'", tank.replace('\'', r"'\''"))
    };
    format!(
        "leaktally leak open --tank {tank} --since {}",
        rfc3339(since_ms)
    )
}

#[cfg(test)]
mod tests {
    #[test]
    fn the_loss_confirm_command_quotes_a_tank_id_for_the_shell() {
        assert_eq!(
            confirm_loss_command("FF-T12", 0),
            "leaktally leak open --tank FF-T12 --since 1970-01-01T00:00:00.000Z"
        );
        // POSIX shell quoting (IEEE Std 1003.1, 2.2.3): inside single
        // quotes nothing is special, and a quote is ended, escaped, reopened.
        assert_eq!(
            confirm_loss_command("West tank's; rm", 0),
            "leaktally leak open --tank 'West tank'\\''s; rm' --since 1970-01-01T00:00:00.000Z"
        );
    }

    use super::*;

    #[test]
    fn durations_read_as_hours_minutes_and_seconds() {
        assert_eq!(duration(TimeSpan::seconds(42.0)), "42 s");
        assert_eq!(duration(TimeSpan::seconds(252.0)), "4 min 12 s");
        assert_eq!(duration(TimeSpan::seconds(7500.0)), "2 h 05 min");
        assert_eq!(duration(TimeSpan::hours(72.0)), "3.0 days");
    }
}
