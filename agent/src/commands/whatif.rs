//! `leaktally whatif`: pre-planning figures for holes that have not happened.
//!
//! For each hole size: the initial rate, when the liquid flow stops, the
//! total released by then, the totals at +15 min and +1 h, and when each
//! reportable quantity is reached, at the chosen Cd with the band from 0.61
//! to 1.0. The forecast assumes the headspace gauge pressure stays as it
//! is, no pumping, and a hole that does not grow.

use crate::config::Tank;
use crate::model::{
    DischargeCoefficient, Hole, Length, Mass, ModelResult, TankState, TimeSpan,
    forecast::time_to_release, forecast_liquid,
};
use crate::report;
use serde::Serialize;
use std::fmt::Write as _;

/// Representative hole sizes for pre-planning: the small, medium and large
/// release holes of 1/4 in, 1 in and 4 in used in risk-based inspection
/// practice (from memory, after API RP 581; its fourth size, a rupture, is
/// left out because the orifice equation does not describe it).
pub const REPRESENTATIVE_HOLES_MM: [f64; 3] = [6.35, 25.4, 101.6];

/// The figures for one hole size.
#[derive(Debug, Clone, Serialize)]
pub struct HoleFigures {
    pub hole_diameter_mm: f64,
    pub cd: f64,
    pub initial_rate_kg_s: f64,
    pub initial_rate_low_kg_s: f64,
    pub initial_rate_high_kg_s: f64,
    /// At the chosen Cd, and at the band's ends (a higher Cd drains faster).
    pub stops_after_s: f64,
    pub stops_after_low_cd_s: f64,
    pub stops_after_high_cd_s: f64,
    pub total_at_stop_kg: f64,
    pub in_15_min_kg: [f64; 3],
    pub in_1_h_kg: [f64; 3],
    /// (quantity, seconds until reached at the chosen Cd; None if never).
    pub reportable: Vec<(f64, Option<f64>)>,
}

/// A what-if study of one tank.
#[derive(Debug, Clone, Serialize)]
pub struct Study {
    pub tank: String,
    pub level_m: f64,
    pub headspace_pa: f64,
    pub hole_height_m: f64,
    pub density_kg_m3: f64,
    pub liquid_above_hole_kg: f64,
    pub holes: Vec<HoleFigures>,
    pub caution: &'static str,
}

/// Computes the study.
pub fn study(
    tank: &Tank,
    level: Length,
    hole_height: Length,
    cd: DischargeCoefficient,
    holes_mm: &[f64],
) -> ModelResult<Study> {
    let vessel = &tank.vessel;
    let start = TankState {
        level: Length::metres(vessel.geometry().check_level(level)?),
        headspace: tank.assumed_headspace,
    };
    let band = [
        cd.get().min(DischargeCoefficient::SHARP_EDGED.get()),
        cd.get(),
        1.0,
    ];
    let horizons = [TimeSpan::minutes(15.0), TimeSpan::hours(1.0)];
    let mut figures = Vec::new();
    for &mm in holes_mm {
        let hole = Hole::new(Length::millimetres(mm), hole_height)?;
        vessel.check_hole(&hole)?;
        let mut forecasts = Vec::new();
        let mut rates = Vec::new();
        for c in band {
            let c = DischargeCoefficient::new(c)?;
            forecasts.push(forecast_liquid(vessel, &hole, c, &start, &horizons)?);
            rates.push(vessel.outflow(&start, &hole, c).rate.si());
        }
        let mut reportable = Vec::new();
        for q in &tank.reportable {
            let t = time_to_release(vessel, &hole, cd, &start, *q)?;
            reportable.push((q.si(), t.map(|t| t.si())));
        }
        figures.push(HoleFigures {
            hole_diameter_mm: mm,
            cd: cd.get(),
            initial_rate_kg_s: rates[1],
            initial_rate_low_kg_s: rates[0],
            initial_rate_high_kg_s: rates[2],
            stops_after_s: forecasts[1].stops_after.si(),
            stops_after_low_cd_s: forecasts[0].stops_after.si(),
            stops_after_high_cd_s: forecasts[2].stops_after.si(),
            total_at_stop_kg: forecasts[1].released_by_stop.si(),
            in_15_min_kg: [0, 1, 2].map(|i| forecasts[i].horizons[0].released.si()),
            in_1_h_kg: [0, 1, 2].map(|i| forecasts[i].horizons[1].released.si()),
            reportable,
        });
    }
    Ok(Study {
        tank: tank.id.clone(),
        level_m: start.level.si(),
        headspace_pa: start.headspace.si(),
        hole_height_m: hole_height.si(),
        density_kg_m3: vessel.density().si(),
        liquid_above_hole_kg: vessel
            .liquid_above(start.level, &Hole::new(Length::metres(1.0), hole_height)?)
            .si(),
        holes: figures,
        caution: report::CAUTION,
    })
}

/// The study as text for people.
pub fn human(s: &Study) -> String {
    let kg = |x: f64| report::mass(Mass::kilograms(x));
    let rate = |x: f64| report::rate(crate::model::MassRate::kg_per_second(x));
    let dur = |x: f64| report::duration(TimeSpan::seconds(x));
    let rho = crate::model::Density::kg_per_cubic_metre(s.density_kg_m3);
    let mut out = String::new();
    let _ = writeln!(
        out,
        "What-if for tank {}: level {:.2} m, headspace {:.1} kPa gauge, hole {:.2} m above the bottom",
        s.tank,
        s.level_m,
        s.headspace_pa / 1000.0,
        s.hole_height_m
    );
    let _ = writeln!(
        out,
        "Liquid above the hole: {} ({})",
        kg(s.liquid_above_hole_kg),
        report::volumes(Mass::kilograms(s.liquid_above_hole_kg), rho)
    );
    for h in &s.holes {
        let _ = writeln!(
            out,
            "\nHole {} mm, Cd {} (band from Cd 0.61 to 1.0):",
            h.hole_diameter_mm, h.cd
        );
        let _ = writeln!(
            out,
            "  initial rate        {}  (band {} to {})",
            rate(h.initial_rate_kg_s),
            rate(h.initial_rate_low_kg_s),
            rate(h.initial_rate_high_kg_s)
        );
        let _ = writeln!(
            out,
            "  flow stops after    {}  (band {} to {})",
            dur(h.stops_after_s),
            dur(h.stops_after_high_cd_s),
            dur(h.stops_after_low_cd_s)
        );
        let _ = writeln!(out, "  released by then    {}", kg(h.total_at_stop_kg));
        for (label, [low, best, high]) in [
            ("released in 15 min", h.in_15_min_kg),
            ("released in 1 h", h.in_1_h_kg),
        ] {
            let _ = writeln!(
                out,
                "  {label:<18}  {}  (band {} to {})",
                kg(best),
                kg(low),
                kg(high)
            );
        }
        for (q, t) in &h.reportable {
            let when = t.map_or("not reached".to_owned(), |t| {
                format!("reached after {}", dur(t))
            });
            let _ = writeln!(out, "  reportable {:<8} {when}", kg(*q));
        }
    }
    let _ = writeln!(
        out,
        "\nThe forecast assumes the headspace pressure stays as it is, no pumping, and a hole that does not grow."
    );
    let _ = writeln!(out, "{}", s.caution);
    out
}

/// Parses `--hole-diameter 6,25,100` (millimetres).
pub fn parse_holes(text: &str) -> anyhow::Result<Vec<f64>> {
    text.split(',')
        .map(|part| {
            let mm: f64 = part.trim().parse().map_err(|_| {
                anyhow::anyhow!("--hole-diameter: {part:?} is not a number of millimetres; write sizes like 6,25,100")
            })?;
            if !(mm.is_finite() && mm > 0.0 && mm <= 5000.0) {
                anyhow::bail!("--hole-diameter: {mm} mm must be more than 0 and at most 5000 mm");
            }
            Ok(mm)
        })
        .collect()
}

/// The default level for a study: the tank 90 % full, a typical working
/// maximum (common practice).
pub fn default_level(tank: &Tank) -> Length {
    tank.vessel.geometry().height() * 0.9
}
