//! What the operator (or a replay) says about a leak: the hole, its height,
//! the discharge coefficient and its range, a density override.

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
}
