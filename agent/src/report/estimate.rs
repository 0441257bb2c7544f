//! Words for an estimate: why its best figure comes from where it does,
//! the fit, what widens the band, every warning with its figures, when each
//! reportable quantity was reached, and the parameters it rests on.
//!
//! The estimator stores numbers and enums; this module is the one place
//! that turns them into sentences, so `status`, `replay`, the web page, the
//! audit trail and the JSON's text fields say the same thing in the same
//! words.
//!
//! Left out: layout (each report lays out its own lines).

use super::{Presentation, duration, number};
use crate::estimate::{Crossing, Estimate, Fit, LeakParams, Method, PhaseName, Reason, Warning};
use crate::model::{Mass, TimeSpan};

/// A method's name for people.
pub fn method_name(method: Method) -> &'static str {
    match method {
        Method::OrificeGivenHole => "orifice model, given hole",
        Method::FittedHole => "orifice model, fitted hole",
        Method::InventoryBalance => "inventory balance",
        Method::NoData => "no data yet",
    }
}

fn kg(people: &Presentation, x: f64) -> String {
    people.mass(Mass::kilograms(x))
}

fn mm2(square_metres: f64) -> String {
    format!("{} mm²", number(square_metres * 1e6))
}

/// The phase, with the regime for vapour.
pub fn phase_text(e: &Estimate) -> &'static str {
    match (e.phase, e.choked) {
        (PhaseName::Liquid, _) => "liquid",
        (PhaseName::Vapour, Some(true)) => "vapour (choked)",
        (PhaseName::Vapour, Some(false)) => "vapour (subcritical)",
        (PhaseName::Vapour, None) => "vapour",
        (PhaseName::None, _) => "none",
    }
}

/// The phase's code, as the JSON writes it: `liquid`, `vapour` or `none`.
pub fn phase_code(phase: PhaseName) -> &'static str {
    match phase {
        PhaseName::Liquid => "liquid",
        PhaseName::Vapour => "vapour",
        PhaseName::None => "none",
    }
}

/// A warning's code, as the JSON writes it (`hole_inconsistent`, ...).
pub fn warning_code(w: Warning) -> &'static str {
    match w {
        Warning::HoleInconsistent => "hole_inconsistent",
        Warning::LevelContradictsModel => "level_contradicts_model",
        Warning::NoLossSeen => "no_loss_seen",
        Warning::BridgedGapsDominate => "bridged_gaps_dominate",
        Warning::BridgeCutByLevel => "bridge_cut_by_level",
        Warning::TotalRevisedDown => "total_revised_down",
        Warning::PressureHeld => "pressure_held",
        Warning::TransferHeld => "transfer_held",
        Warning::TemperatureHeld => "temperature_held",
        Warning::HoleHeightAssumed => "hole_height_assumed",
        Warning::CdAssumed => "cd_assumed",
        Warning::DefaultAccuracies => "default_accuracies",
        Warning::ForecastCapped => "forecast_capped",
        Warning::VapourNotChecked => "vapour_not_checked",
        Warning::StartBridged => "start_bridged",
        Warning::HoleHeightRefuted => "hole_height_refuted",
    }
}

/// Where the density of an estimate comes from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum DensityBasis {
    /// Given for the event or the replay (`--density`), held fixed.
    Given,
    /// The liquid's measured temperature, K, through the config's
    /// expansion coefficient or density table.
    Temperature(f64),
    /// The density follows temperature, but no temperature was read: the
    /// config's density at its reference temperature.
    Reference,
    /// The config's one density.
    Fixed,
}

/// The density the figures use, and why that one.
pub fn density_text(density_kg_m3: f64, basis: DensityBasis) -> String {
    let why = match basis {
        DensityBasis::Given => " (given, fixed)".to_owned(),
        DensityBasis::Temperature(t) => format!(" at the liquid's {} °C", number(t - 273.15)),
        DensityBasis::Reference => {
            " (the config's, at its reference temperature: no temperature reading)".to_owned()
        }
        DensityBasis::Fixed => " (fixed)".to_owned(),
    };
    format!("{} kg/m³{why}", number(density_kg_m3))
}

/// Why the best figure comes from where it does.
pub fn reason_text(e: &Estimate, p: &LeakParams, people: &Presentation) -> String {
    let (cd_low, cd_high) = p.cd_band();
    let hole = p
        .hole_diameter_m
        .map_or("a".into(), |d| format!("a {}", people.diameter(d)));
    match e.reason {
        Reason::GivenHole => format!(
            "the operator gave {hole} hole; band from Cd {cd_low} to {cd_high} and the instruments, held to what the level allows"
        ),
        Reason::LevelBoundsGivenHole => format!(
            "the operator gave {hole} hole, but the level does not fall as it would through it at the chosen Cd; the figures follow the level balance, inside what the hole allows"
        ),
        Reason::FittedHole => {
            "no hole size given; the hole is fitted to the level drop, and the band is the fit's spread and the instruments'".into()
        }
        Reason::LevelBoundsFittedHole => {
            "no hole size given; the level no longer falls as the fitted hole says (the flow slowed or stopped), so the figures follow the level balance".into()
        }
        Reason::NotEnoughDrop => {
            "no hole size given and not enough level drop to fit one yet; the figure is the level balance, and the rate its slope over the last minute".into()
        }
        // The level's slope can show a flow before the drop is beyond the
        // instruments' uncertainty: say which it is, not "no flow".
        Reason::NoLossSeen if e.rate_best_kg_s > 0.0 => {
            "no loss seen beyond the instruments' uncertainty yet: the figure is the level balance (near zero), and the rate is the level's slope over the last minute; the band's high end is what the level cannot yet rule out".into()
        }
        Reason::NoLossSeen => {
            "no loss seen beyond the instruments' uncertainty yet: the figure is the level balance (near zero), and no flow is shown; the band's high end is what the level cannot yet rule out".into()
        }
        Reason::Vapour => format!(
            "vapour through {} hole, from the headspace pressure; the level cannot check it",
            if p.hole_diameter_m.is_some() { "the given" } else { "the fitted" }
        ),
        Reason::Unrecorded => "logged by an earlier version of leaktally, which kept no reason".into(),
    }
}

/// The fit: the effective area Cd·A first, and diameters only at stated
/// Cds, so that nobody takes a fitted figure for a measured hole.
pub fn fit_text(e: &Estimate, p: &LeakParams, people: &Presentation) -> String {
    match e.fit {
        Fit::Ready {
            area_m2,
            area_low_m2,
            area_high_m2,
        } => {
            let (cd_low, cd_high) = p.cd_band();
            let diameter = |cd: f64| (4.0 * area_m2 / (std::f64::consts::PI * cd)).sqrt();
            format!(
                "effective area Cd·A {} ({} to {}); as a round hole, {} at Cd {cd_high} to {} at Cd {cd_low}",
                mm2(area_m2),
                mm2(area_low_m2),
                mm2(area_high_m2),
                people.diameter(diameter(cd_high)),
                people.diameter(diameter(cd_low)),
            )
        }
        Fit::NotYet {
            level_drop_m,
            needed_m,
        } => format!(
            "not enough data yet: the level has fallen {}, the fit needs {}",
            people.diameter(level_drop_m.max(0.0)),
            people.diameter(needed_m)
        ),
    }
}

/// The fit in a few words, for a line that updates in place: the effective
/// area Cd·A first, then the round hole's diameters at the ends of the Cd
/// range, as [`fit_text`] says it at length.
pub fn fit_brief(e: &Estimate, p: &LeakParams, people: &Presentation) -> String {
    match e.fit {
        Fit::Ready { area_m2, .. } => {
            let (cd_low, cd_high) = p.cd_band();
            let diameter = |cd: f64| (4.0 * area_m2 / (std::f64::consts::PI * cd)).sqrt();
            format!(
                "fitted Cd·A {} (round: {} at Cd {cd_high} to {} at Cd {cd_low})",
                mm2(area_m2),
                people.diameter(diameter(cd_high)),
                people.diameter(diameter(cd_low)),
            )
        }
        Fit::NotYet { .. } => "hole: not enough level drop yet to fit".into(),
    }
}

/// With a given hole: the Cd the level implies, and whether it is inside
/// the range the band spans.
pub fn implied_cd_text(e: &Estimate, p: &LeakParams) -> Option<String> {
    let c = e.implied_cd?;
    let (cd_low, cd_high) = p.cd_band();
    Some(format!(
        "the level implies Cd {} ({} to {}) at the given hole: {} the range {cd_low} to {cd_high}",
        number(c.best),
        number(c.low),
        number(c.high),
        if c.in_range { "inside" } else { "OUTSIDE" }
    ))
}

/// What widens the band, in one line.
pub fn band_text(e: &Estimate, people: &Presentation) -> String {
    let b = &e.band;
    let mut parts = Vec::new();
    if matches!(e.method, Method::OrificeGivenHole) && b.model_high_kg > 0.0 {
        parts.push(format!(
            "the orifice model alone {} to {} (Cd {} to {}, a bound)",
            kg(people, b.model_low_kg),
            kg(people, b.model_high_kg),
            b.cd_low,
            b.cd_high
        ));
    }
    if let Some(f) = b.fit_fraction {
        parts.push(format!("the fit's spread ±{} %", number(f * 100.0)));
    }
    let mut causes = vec![
        format!("level accuracy {}", kg(people, b.level_accuracy_kg)),
        format!("level noise {}", kg(people, b.level_noise_kg)),
        format!("density {}", kg(people, b.density_kg)),
    ];
    if b.transfer_kg > 0.0 {
        causes.push(format!("transfer meter {}", kg(people, b.transfer_kg)));
    }
    if b.temperature_kg > 0.0 {
        causes.push(format!("temperature {}", kg(people, b.temperature_kg)));
    }
    parts.push(format!(
        "the level balance ±{} ({}; 95 %)",
        kg(people, b.inventory_kg),
        causes.join(", ")
    ));
    if b.bridge_kg > 0.0 {
        parts.push(format!(
            "data gaps bridged from the level ±{}",
            kg(people, b.bridge_kg)
        ));
    }
    if b.rate_fraction > 0.0 {
        parts.push(format!(
            "instruments ±{} % on the rate",
            number(b.rate_fraction * 100.0)
        ));
    }
    parts.join("; ")
}

/// One warning in words, with the figures it refers to.
pub fn warning_text(w: Warning, e: &Estimate, p: &LeakParams, people: &Presentation) -> String {
    let q = &e.quality;
    match w {
        Warning::HoleInconsistent => {
            let given = p
                .hole_diameter_m
                .map(|d| p.cd * std::f64::consts::FRAC_PI_4 * d * d);
            match (e.fit.area(), given) {
                (Some((_, fitted, _)), Some(given)) => {
                    let ratio = given / fitted;
                    format!(
                        "the level falls as through an effective area Cd·A of {}, not the {} of the given hole at Cd {}: the orifice figure may be {} by a factor of {}; check the hole size (leak revise --hole-diameter-mm, or --unknown-diameter to fit it)",
                        mm2(fitted),
                        mm2(given),
                        p.cd,
                        if ratio > 1.0 { "too high" } else { "too low" },
                        number(ratio.max(1.0 / ratio))
                    )
                }
                _ => "the given hole does not agree with the level drop".into(),
            }
        }
        Warning::LevelContradictsModel => format!(
            "the level does not agree with the orifice model: the model gives {}, the level balance {} ± {}; the best figure follows the level (check the hole size, and that the gauge is live)",
            e.model_kg.map_or("-".into(), |x| kg(people, x)),
            e.inventory_kg.map_or("-".into(), |x| kg(people, x)),
            kg(people, e.band.inventory_kg)
        ),
        Warning::NoLossSeen => format!(
            "no loss seen yet: the level has not fallen beyond what the instruments allow (level balance {} ± {})",
            e.inventory_kg.map_or("-".into(), |x| kg(people, x)),
            kg(people, e.band.inventory_kg)
        ),
        Warning::BridgedGapsDominate => format!(
            "{} of the total ({} %) was bridged across {} data gap(s) (longest {}), not measured",
            kg(people, q.bridged_kg),
            number(100.0 * q.bridged_kg / e.released_best_kg.max(1e-9)),
            q.gaps_bridged,
            duration(TimeSpan::seconds(q.longest_gap_s))
        ),
        Warning::BridgeCutByLevel => format!(
            "the forecast across data gaps was cut by {} to what the level on the far side allows",
            kg(people, q.bridge_cut_kg)
        ),
        Warning::TotalRevisedDown => format!(
            "the total was revised down {} time(s), by {} in all, to what the level allows (after a data gap, or when the level showed the model's figure to be wrong)",
            q.revisions_down,
            kg(people, q.revised_down_kg)
        ),
        Warning::PressureHeld => {
            "the pressure reading is bad: the last good one is held".into()
        }
        Warning::TransferHeld => {
            "the transfer flow reading is bad: the last good one is held".into()
        }
        Warning::TemperatureHeld => {
            "the temperature reading is bad: the last good one is held".into()
        }
        Warning::HoleHeightAssumed => {
            "no hole height given: the hole is taken at the tank bottom, which releases the most".into()
        }
        Warning::CdAssumed => "no Cd given: 1.0 is used (conservative)".into(),
        Warning::DefaultAccuracies => {
            "some instrument accuracies (or the density's) are defaults, not the data sheet's: see `leaktally check`; the band rests on them".into()
        }
        Warning::ForecastCapped => {
            "the forecast is capped at the liquid there was above the hole (plus transfers in)".into()
        }
        Warning::VapourNotChecked => {
            "vapour leaves through the hole: the level cannot check this figure".into()
        }
        Warning::StartBridged => {
            "the event starts before the first logged level: that stretch is counted at the first sample's rate, not measured".into()
        }
        Warning::HoleHeightRefuted => format!(
            "the level has fallen further than the liquid there was above the given hole height ({} m): the hole is lower than given, or the gauge is wrong; the figures follow the level (check the hole height: leak revise --hole-height-m)",
            number(p.hole_height_m)
        ),
    }
}

/// Every warning of an estimate, in words.
pub fn warnings_text(e: &Estimate, p: &LeakParams, people: &Presentation) -> Vec<String> {
    e.warnings
        .iter()
        .map(|w| warning_text(w, e, p, people))
        .collect()
}

/// An estimate said in words, for the JSON documents beside the numbers
/// and codes (never stored).
#[derive(Debug, Clone, serde::Serialize)]
pub struct Words {
    /// Why the best figure comes from where it does.
    pub method_reason: String,
    /// The fitted hole as an effective area, or why not yet.
    pub fit_status: String,
    /// The Cd the level implies at a given hole, in words.
    pub implied_cd_text: Option<String>,
    /// What widens the band.
    pub band_text: String,
    /// The phase, and for vapour whether it is choked.
    pub phase_text: &'static str,
    /// Every warning of `warnings`, in words, in the same order.
    pub warnings_text: Vec<String>,
}

impl Words {
    pub fn of(e: &Estimate, p: &LeakParams, people: &Presentation) -> Self {
        Self {
            method_reason: reason_text(e, p, people),
            fit_status: fit_text(e, p, people),
            implied_cd_text: implied_cd_text(e, p),
            band_text: band_text(e, people),
            phase_text: phase_text(e),
            warnings_text: warnings_text(e, p, people),
        }
    }
}

/// The parameters in words, for the audit trail.
pub fn describe_params(p: &LeakParams, people: &Presentation) -> String {
    let hole = match p.hole_diameter_m {
        Some(d) => format!("hole {}", people.diameter(d)),
        None => "hole size unknown (fitted)".to_owned(),
    };
    let density = p
        .density_kg_m3
        .map_or(String::new(), |d| format!(", density {d} kg/m³"));
    let (cd_low, cd_high) = p.cd_band();
    format!(
        "{hole} at {}{}, Cd {}{} (range {cd_low} to {cd_high}){density}",
        people.length(p.hole_height_m),
        if p.hole_height_assumed {
            " (assumed: the bottom)"
        } else {
            ""
        },
        p.cd,
        if p.cd_assumed { " (assumed)" } else { "" },
    )
}

/// A reportable quantity's crossings: when it may have been reached (the
/// band's high end) and when the best estimate reached it.
pub fn crossing_text(c: &Crossing, people: &Presentation) -> String {
    match (c.high_at_ms, c.at_ms) {
        (_, Some(best)) => format!(
            "reached at {} (best estimate){}",
            people.time(best),
            c.high_at_ms
                .filter(|&h| h < best)
                .map_or(String::new(), |h| format!(
                    "; may have been reached from {} (band's high end)",
                    people.time(h)
                ))
        ),
        (Some(high), None) => format!(
            "MAY HAVE BEEN REACHED from {} (band's high end); the best estimate is below it",
            people.time(high)
        ),
        (None, None) => "not reached".into(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn codes_are_the_json_codes() {
        for w in Warning::ALL {
            assert_eq!(
                serde_json::to_value(w).unwrap(),
                serde_json::Value::from(warning_code(w))
            );
        }
        for phase in [PhaseName::Liquid, PhaseName::Vapour, PhaseName::None] {
            assert_eq!(
                serde_json::to_value(phase).unwrap(),
                serde_json::Value::from(phase_code(phase))
            );
        }
    }

    #[test]
    fn the_density_says_where_it_comes_from() {
        assert_eq!(
            density_text(782.71, DensityBasis::Temperature(298.15)),
            "783 kg/m³ at the liquid's 25.0 °C"
        );
        assert_eq!(
            density_text(840.0, DensityBasis::Fixed),
            "840 kg/m³ (fixed)"
        );
        assert_eq!(
            density_text(800.0, DensityBasis::Given),
            "800 kg/m³ (given, fixed)"
        );
        assert!(density_text(792.0, DensityBasis::Reference).contains("reference temperature"));
    }

    #[test]
    fn a_fitted_hole_is_an_area_first_with_diameters_at_stated_cds() {
        // Cd·A = 754 mm² is a 40 mm hole at Cd 0.6 (π/4 · 40² · 0.6 = 754).
        let area = 0.6 * std::f64::consts::FRAC_PI_4 * 0.04 * 0.04;
        let e = Estimate {
            fit: Fit::Ready {
                area_m2: area,
                area_low_m2: 0.95 * area,
                area_high_m2: 1.05 * area,
            },
            ..Estimate::blank()
        };
        let p = LeakParams {
            cd_range: Some((0.6, 1.0)),
            cd: 0.6,
            ..LeakParams::default()
        };
        let text = fit_text(&e, &p, &Presentation::default());
        assert!(text.starts_with("effective area Cd·A 754 mm²"), "{text}");
        assert!(
            text.contains("31.0 mm at Cd 1") && text.contains("40.0 mm at Cd 0.6"),
            "{text}"
        );
    }
}
