//! The invented demo site, and what `leaktally demo` shows with it.
//!
//! Fennick Flats is a fictional fuel depot; tank FF-T12 and every figure
//! about it are made up for the demo. The demo runs the physics core on that
//! tank for three hole sizes and prints what a pre-planning engineer would
//! want to see. (Once the agent can poll, the demo drives the simulator
//! instead; see the README.)

use crate::model::{
    AbsolutePressure, Density, DischargeCoefficient, Geometry, Hole, Length, Mass, ModelResult,
    Pressure, TankState, TimeSpan, Vessel, forecast::time_to_release, forecast_liquid,
};
use crate::report;
use std::fmt::Write as _;

/// The demo tank: an upright diesel tank, 6 m across and 8 m tall.
pub fn demo_vessel() -> ModelResult<Vessel> {
    Vessel::new(
        Geometry::vertical_cylinder(Length::metres(6.0), Length::metres(8.0))?,
        Density::kg_per_cubic_metre(840.0),
        AbsolutePressure::STANDARD_ATMOSPHERE,
        None,
    )
}

/// Representative hole sizes for pre-planning: small, medium and large
/// release holes of 1/4 in, 1 in and 4 in, as used in risk-based inspection
/// practice (from memory; the fourth, a full rupture, is left out because
/// the orifice equation does not describe it).
pub const REPRESENTATIVE_HOLES_MM: [f64; 3] = [6.35, 25.4, 101.6];

/// The demo's reportable quantity for diesel at the invented site.
pub const DEMO_REPORTABLE_KG: f64 = 1000.0;

/// Runs the demo calculation and returns the text it prints.
pub fn run() -> ModelResult<String> {
    let vessel = demo_vessel()?;
    let start = TankState {
        level: Length::metres(6.5),
        headspace: Pressure::ZERO,
    };
    let hole_height = Length::metres(0.4);
    let density = vessel.density();
    let mut out = String::new();
    let _ = writeln!(
        out,
        "leaktally demo: what-if for tank FF-T12, Fennick Flats depot (invented)"
    );
    let _ = writeln!(
        out,
        "  upright cylinder 6 m x 8 m, diesel at {density:.0}, level {:.2}, open vent, hole {:.2} above the bottom",
        start.level, hole_height
    );
    let _ = writeln!(
        out,
        "  liquid above the hole: {}",
        report::mass(vessel.liquid_above(
            start.level,
            &Hole::new(Length::millimetres(1.0), hole_height)?
        ))
    );
    let _ = writeln!(
        out,
        "  reportable quantity (demo value): {}",
        report::mass(Mass::kilograms(DEMO_REPORTABLE_KG))
    );
    let horizons = [TimeSpan::minutes(15.0), TimeSpan::hours(1.0)];
    for mm in REPRESENTATIVE_HOLES_MM {
        let hole = Hole::new(Length::millimetres(mm), hole_height)?;
        let _ = writeln!(out, "\n  hole {mm} mm (Cd 1.0, band from Cd 0.61):");
        let at = |cd| forecast_liquid(&vessel, &hole, cd, &start, &horizons);
        let (high, low) = (
            at(DischargeCoefficient::CONSERVATIVE)?,
            at(DischargeCoefficient::SHARP_EDGED)?,
        );
        let initial = vessel
            .outflow(&start, &hole, DischargeCoefficient::CONSERVATIVE)
            .rate;
        let initial_low = vessel
            .outflow(&start, &hole, DischargeCoefficient::SHARP_EDGED)
            .rate;
        let _ = writeln!(
            out,
            "    initial rate         {} (band {} to {})",
            report::rate(initial),
            report::rate(initial_low),
            report::rate(initial)
        );
        let _ = writeln!(
            out,
            "    flow stops after     {} (Cd 0.61: {})",
            report::duration(high.stops_after),
            report::duration(low.stops_after)
        );
        let _ = writeln!(
            out,
            "    released by then     {} ({})",
            report::mass(high.released_by_stop),
            report::volumes(high.released_by_stop, density)
        );
        for (h, l) in high.horizons.iter().zip(&low.horizons) {
            let _ = writeln!(
                out,
                "    released by +{:<8} {} (band {} to {})",
                report::duration(h.after),
                report::mass(h.released),
                report::mass(l.released),
                report::mass(h.released)
            );
        }
        let reportable = Mass::kilograms(DEMO_REPORTABLE_KG);
        let crossing = time_to_release(
            &vessel,
            &hole,
            DischargeCoefficient::CONSERVATIVE,
            &start,
            reportable,
        )?;
        let _ = writeln!(
            out,
            "    reportable quantity  {}",
            crossing.map_or("not reached".to_owned(), |t| format!(
                "reached after {}",
                report::duration(t)
            ))
        );
    }
    let _ = writeln!(
        out,
        "\nThe forecast assumes the headspace stays vented, no pumping and a hole that does not grow."
    );
    let _ = writeln!(out, "{}", report::CAUTION);
    Ok(out)
}

#[cfg(test)]
mod tests {
    #[test]
    fn the_demo_computes_every_hole_and_carries_the_caution() {
        let text = super::run().unwrap();
        assert_eq!(text.matches("flow stops after").count(), 3, "{text}");
        assert!(text.contains("CAUTION"));
        assert!(!text.contains("NaN") && !text.contains("inf"), "{text}");
    }
}
