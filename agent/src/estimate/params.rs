//! What the operator (or a replay) says about a leak: the hole, its height,
//! the discharge coefficient and its range, a density override; a change
//! to them ([`ParamChange`]), the one check of each quantity, and the one
//! merge ([`LeakParams::with`]).
//!
//! Every command that takes these quantities (`leak open`, `leak revise`,
//! `replay`, `whatif`) checks them here, so a hole `leak` refuses is refused
//! everywhere, with the same words. The messages name the command-line
//! options, which every command spells the same.
//!
//! Left out: checks against a tank (a hole above its top, a density its
//! vessel refuses); the estimator and the model make those.

use crate::model::DischargeCoefficient;
use crate::model::vessel::DENSITY_RANGE;
use serde::{Deserialize, Serialize};

/// The discharge coefficient range when nothing is known of the hole: 0.61
/// for a sharp-edged hole to 1.0 for one with no losses (common practice).
pub const DEFAULT_CD_RANGE: (f64, f64) = (0.61, 1.0);

/// What the operator (or a replay) says about the leak.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct LeakParams {
    /// Hole diameter, m; `None` when unknown (then the fit carries the estimate).
    pub hole_diameter_m: Option<f64>,
    /// Height of the hole above the tank bottom, m.
    pub hole_height_m: f64,
    /// The chosen discharge coefficient.
    pub cd: f64,
    /// The range the discharge coefficient may lie in, (low, high); absent:
    /// [`DEFAULT_CD_RANGE`], widened to include `cd`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cd_range: Option<(f64, f64)>,
    /// Liquid density override, kg/m³ (replay); `None` uses the config's.
    pub density_kg_m3: Option<f64>,
    /// Whether the hole height is the default (the bottom), not given.
    #[serde(default, skip_serializing_if = "is_false")]
    pub hole_height_assumed: bool,
    /// Whether the Cd is the default (1.0), not given.
    #[serde(default, skip_serializing_if = "is_false")]
    pub cd_assumed: bool,
}

fn is_false(b: &bool) -> bool {
    !*b
}

impl Default for LeakParams {
    /// Nothing known: the hole fitted, at the bottom, Cd 1.0 (the
    /// conservative choices), both marked as assumed.
    fn default() -> Self {
        Self {
            hole_diameter_m: None,
            hole_height_m: 0.0,
            cd: 1.0,
            cd_range: None,
            density_kg_m3: None,
            hole_height_assumed: true,
            cd_assumed: true,
        }
    }
}

impl LeakParams {
    /// The range of Cd the band spans: the given range, or the default one
    /// widened to include the chosen Cd.
    pub fn cd_band(&self) -> (f64, f64) {
        match self.cd_range {
            Some(range) => range,
            None => (
                self.cd.min(DEFAULT_CD_RANGE.0),
                self.cd.max(DEFAULT_CD_RANGE.1),
            ),
        }
    }

    /// These parameters with `change` applied: each quantity given replaces
    /// the one here (and is no longer assumed); `unknown_diameter` forgets
    /// the hole diameter unless the change gives one. The one merge, for a
    /// revision and a replay's overrides alike.
    pub fn with(&self, change: &ParamChange) -> LeakParams {
        let mut p = *self;
        if change.unknown_diameter {
            p.hole_diameter_m = None;
        }
        if change.hole_diameter_m.is_some() {
            p.hole_diameter_m = change.hole_diameter_m;
        }
        if let Some(h) = change.hole_height_m {
            p.hole_height_m = h;
            p.hole_height_assumed = false;
        }
        if let Some(cd) = change.cd {
            p.cd = cd;
            p.cd_assumed = false;
        }
        if change.cd_range.is_some() {
            p.cd_range = change.cd_range;
        }
        if change.density_kg_m3.is_some() {
            p.density_kg_m3 = change.density_kg_m3;
        }
        p
    }
}

/// A change to an event's parameters, in SI: what `leak revise` (or a
/// replay's overrides) gives; `None` and `false` keep what there is. Built
/// from a command line with the checks below; stored in a revise request
/// with these field names, which action rows already hold.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct ParamChange {
    /// The hole diameter, m.
    pub hole_diameter_m: Option<f64>,
    /// Forget the hole diameter (back to the fitted hole).
    #[serde(default)]
    pub unknown_diameter: bool,
    /// The hole's height above the tank bottom, m.
    pub hole_height_m: Option<f64>,
    /// The chosen discharge coefficient.
    pub cd: Option<f64>,
    /// The range the discharge coefficient may lie in, (low, high).
    #[serde(default)]
    pub cd_range: Option<(f64, f64)>,
    /// Liquid density override, kg/m³.
    pub density_kg_m3: Option<f64>,
}

impl ParamChange {
    /// Whether the change changes nothing.
    pub fn is_empty(&self) -> bool {
        *self == Self::default()
    }
}

/// The hole sizes accepted, as a round hole's diameter in mm: from 0.1 mm
/// (smaller than any hole a tank leaks through, and a size whose flow is
/// below what any level gauge could see) to 5 m (past a tank's wall; more
/// likely metres typed for millimetres). The one rule for every command
/// that takes a hole, whether the size is given as a diameter or an area.
pub const HOLE_DIAMETER_RANGE_MM: (f64, f64) = (0.1, 5000.0);

/// A parameter refused, with what is wrong and how to put it right.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ParamError {
    #[error(
        "--hole-diameter-mm {} {why}; the option takes millimetres (25 for a one-inch hole)",
        given_figure(*mm)
    )]
    HoleDiameter { mm: f64, why: &'static str },
    #[error(
        "--hole-height-m {} must be the height above the tank bottom in metres, 0 or more",
        given_figure(*m)
    )]
    HoleHeight { m: f64 },
    #[error(
        "discharge coefficient {} is outside {} to 1; use 0.61 for a sharp-edged hole or 1.0 for the conservative figure",
        given_figure(*cd),
        DischargeCoefficient::MIN
    )]
    Cd { cd: f64 },
    #[error("--cd-range {text:?} is not LOW..HIGH; write it like 0.60..0.65")]
    CdRangeNotARange { text: String },
    #[error(
        "--cd-range {text}: the low end is above the high end; write it low first, like 0.60..0.65"
    )]
    CdRangeReversed { text: String },
    #[error(
        "--cd-range {text} does not include the Cd {}{}; give a --cd inside the range",
        given_figure(*cd),
        if *defaulted { " (the default, since no --cd is given)" } else { "" }
    )]
    CdRangeExcludesCd {
        text: String,
        cd: f64,
        defaulted: bool,
    },
    #[error(
        "--density-kg-m3 {} is outside {} to {} kg/m³; give the liquid's density in kg/m³ (diesel is about 840)",
        given_figure(*kg_m3),
        DENSITY_RANGE.0,
        DENSITY_RANGE.1
    )]
    Density { kg_m3: f64 },
}

/// Why a round hole of this diameter (mm) is refused, or `None` when it is
/// accepted; the words follow the figure in the caller's message.
pub fn hole_diameter_refusal(mm: f64) -> Option<&'static str> {
    let (min, max) = HOLE_DIAMETER_RANGE_MM;
    if !(mm.is_finite() && mm > 0.0) {
        Some("is not a positive size")
    } else if mm < min {
        Some("is below 0.1 mm, smaller than any hole a tank leaks through")
    } else if mm > max {
        Some("is over 5 m")
    } else {
        None
    }
}

/// `--hole-diameter MM`: the diameter in metres, within
/// [`HOLE_DIAMETER_RANGE_MM`].
pub fn check_hole_diameter_mm(mm: f64) -> Result<f64, ParamError> {
    match hole_diameter_refusal(mm) {
        Some(why) => Err(ParamError::HoleDiameter { mm, why }),
        None => Ok(mm / 1000.0),
    }
}

/// `--hole-height M`: a finite height above the tank bottom, 0 or more.
pub fn check_hole_height_m(m: f64) -> Result<f64, ParamError> {
    if m.is_finite() && m >= 0.0 {
        Ok(m)
    } else {
        Err(ParamError::HoleHeight { m })
    }
}

/// `--cd`: a discharge coefficient the model takes (0.1 to 1).
pub fn check_cd(cd: f64) -> Result<f64, ParamError> {
    DischargeCoefficient::new(cd)
        .map(DischargeCoefficient::get)
        .map_err(|_| ParamError::Cd { cd })
}

/// `--cd-range LOW..HIGH`: two Cds, low first, that include `cd` (or 1.0,
/// the default Cd, when none is given).
pub fn check_cd_range(text: &str, cd: Option<f64>) -> Result<(f64, f64), ParamError> {
    let parsed = text
        .split_once("..")
        .and_then(|(a, b)| Some((a.trim().parse::<f64>().ok()?, b.trim().parse::<f64>().ok()?)));
    let Some((low, high)) = parsed else {
        return Err(ParamError::CdRangeNotARange { text: text.into() });
    };
    check_cd(low)?;
    check_cd(high)?;
    if low > high {
        return Err(ParamError::CdRangeReversed { text: text.into() });
    }
    let chosen = cd.unwrap_or(1.0);
    if !(low..=high).contains(&chosen) {
        return Err(ParamError::CdRangeExcludesCd {
            text: text.into(),
            cd: chosen,
            defaulted: cd.is_none(),
        });
    }
    Ok((low, high))
}

/// `--density`: a liquid's density in kg/m³ within the model's range.
pub fn check_density_kg_m3(kg_m3: f64) -> Result<f64, ParamError> {
    let (low, high) = DENSITY_RANGE;
    if kg_m3.is_finite() && (low..=high).contains(&kg_m3) {
        Ok(kg_m3)
    } else {
        Err(ParamError::Density { kg_m3 })
    }
}

/// A number as a message shows it: plain digits, except where they would
/// run long (a refused `1e-300` is said as that, not as 300 zeros).
pub fn given_figure(x: f64) -> String {
    let size = x.abs();
    if size.is_finite() && size != 0.0 && !(1e-6..1e16).contains(&size) {
        format!("{x:e}")
    } else {
        format!("{x}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_quantity_is_checked_against_its_one_rule() {
        assert_eq!(check_hole_diameter_mm(25.0), Ok(0.025));
        assert!(check_hole_diameter_mm(0.1).is_ok() && check_hole_diameter_mm(0.099).is_err());
        assert!(check_hole_diameter_mm(5000.0).is_ok() && check_hole_diameter_mm(5000.1).is_err());
        for bad in [f64::NAN, f64::INFINITY, 0.0, -0.0, -1.0, 5e-324] {
            assert!(check_hole_diameter_mm(bad).is_err(), "{bad}");
        }
        assert_eq!(check_hole_height_m(0.0), Ok(0.0));
        for bad in [f64::NAN, f64::INFINITY, -1e-300] {
            assert!(check_hole_height_m(bad).is_err(), "{bad}");
        }
        assert_eq!(check_cd(0.61), Ok(0.61));
        for bad in [f64::NAN, 0.099, 1.0 + f64::EPSILON, -0.5] {
            assert!(matches!(check_cd(bad), Err(ParamError::Cd { .. })), "{bad}");
        }
        assert_eq!(check_density_kg_m3(840.0), Ok(840.0));
        for bad in [f64::NAN, 49.9, 15_000.1, f64::INFINITY] {
            assert!(check_density_kg_m3(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn a_cd_range_is_two_cds_low_first_around_the_chosen_one() {
        assert_eq!(check_cd_range("0.60..0.65", Some(0.62)), Ok((0.60, 0.65)));
        assert_eq!(check_cd_range(" 0.61 .. 1 ", None), Ok((0.61, 1.0)));
        let said = |text: &str, cd| check_cd_range(text, cd).unwrap_err().to_string();
        assert!(said("abc", None).contains("is not LOW..HIGH"));
        assert!(said("0.65..0.60", Some(0.62)).contains("low end is above the high end"));
        assert!(said("0.05..0.6", Some(0.5)).starts_with("discharge coefficient 0.05"));
        assert_eq!(
            said("0.5..0.6", None),
            "--cd-range 0.5..0.6 does not include the Cd 1 (the default, since no --cd is given); give a --cd inside the range"
        );
        assert!(!said("0.5..0.6", Some(0.7)).contains("the default"));
    }

    #[test]
    fn a_refusal_says_what_where_and_how_to_fix_in_few_digits() {
        assert_eq!(
            check_hole_diameter_mm(1e-300).unwrap_err().to_string(),
            "--hole-diameter-mm 1e-300 is below 0.1 mm, smaller than any hole a tank leaks through; the option takes millimetres (25 for a one-inch hole)"
        );
        assert_eq!(
            check_hole_diameter_mm(6000.0).unwrap_err().to_string(),
            "--hole-diameter-mm 6000 is over 5 m; the option takes millimetres (25 for a one-inch hole)"
        );
        assert_eq!(
            check_hole_height_m(-1.0).unwrap_err().to_string(),
            "--hole-height-m -1 must be the height above the tank bottom in metres, 0 or more"
        );
        assert_eq!(
            check_cd(2.0).unwrap_err().to_string(),
            "discharge coefficient 2 is outside 0.1 to 1; use 0.61 for a sharp-edged hole or 1.0 for the conservative figure"
        );
        assert_eq!(
            check_density_kg_m3(5.0).unwrap_err().to_string(),
            "--density-kg-m3 5 is outside 50 to 15000 kg/m³; give the liquid's density in kg/m³ (diesel is about 840)"
        );
        assert_eq!(given_figure(0.05), "0.05");
        assert_eq!(given_figure(5e-324), "5e-324");
        assert_eq!(given_figure(1e300), "1e300");
        assert_eq!(given_figure(f64::NAN), "NaN");
    }

    #[test]
    fn a_change_replaces_what_it_gives_and_keeps_the_rest() {
        let before = LeakParams {
            hole_diameter_m: Some(0.025),
            ..LeakParams::default()
        };
        assert_eq!(before.with(&ParamChange::default()), before);
        assert!(ParamChange::default().is_empty());
        let forget = ParamChange {
            unknown_diameter: true,
            ..ParamChange::default()
        };
        assert!(!forget.is_empty());
        assert_eq!(before.with(&forget).hole_diameter_m, None);
        let after = before.with(&ParamChange {
            hole_height_m: Some(0.4),
            cd: Some(0.62),
            cd_range: Some((0.6, 0.65)),
            density_kg_m3: Some(850.0),
            ..ParamChange::default()
        });
        assert_eq!(
            after,
            LeakParams {
                hole_diameter_m: Some(0.025),
                hole_height_m: 0.4,
                cd: 0.62,
                cd_range: Some((0.6, 0.65)),
                density_kg_m3: Some(850.0),
                hole_height_assumed: false,
                cd_assumed: false,
            }
        );
    }
}
