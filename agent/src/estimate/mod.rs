//! What the estimator says about an event, as numbers and enums.
//!
//! An [`Estimate`] is what the store keeps after each sample and what every
//! report reads. It holds data only: which view the best figure comes from
//! and why ([`Method`], [`Reason`]), the fit's state ([`Fit`]), what widens
//! the band ([`BandCauses`]) and what a reader must be told ([`Warnings`]),
//! each with its figures. The words are rendered at the edge (`report`, the
//! web page), so that what is stored is what was computed, compact, and
//! replays bit for bit.
//!
//! Left out: how any of it is computed (see `estimator`).

use serde::{Deserialize, Serialize};

mod params;
mod warnings;

pub use params::*;
pub use warnings::*;

/// The estimator's version. It changes whenever the same samples would give
/// different figures; an event logged by another version replays with this
/// one's figures, and replay says so rather than calling them a mismatch.
pub const ESTIMATOR_VERSION: u32 = 5;

/// Which view the best estimate comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Method {
    /// The orifice model with the operator's hole size.
    OrificeGivenHole,
    /// The orifice model with the hole fitted to the inventory loss.
    FittedHole,
    /// The inventory balance alone.
    InventoryBalance,
    /// No usable sample yet.
    NoData,
}

impl Method {
    /// A short machine name, as stored in the estimate table's column.
    pub fn code(self) -> &'static str {
        match self {
            Method::OrificeGivenHole => "orifice_given_hole",
            Method::FittedHole => "fitted_hole",
            Method::InventoryBalance => "inventory_balance",
            Method::NoData => "no_data",
        }
    }
}

/// Why the best estimate comes from where it does.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Reason {
    /// The operator gave the hole, and the level agrees with it within the
    /// band.
    GivenHole,
    /// The operator gave the hole, but the level does not fall as it would
    /// through it: the best figure is held to what the level allows.
    LevelBoundsGivenHole,
    /// No hole given; the hole is fitted to the level drop.
    FittedHole,
    /// The fitted model's total was held to what the level allows.
    LevelBoundsFittedHole,
    /// No hole given, and not enough level drop to fit one yet.
    NotEnoughDrop,
    /// The level has not fallen beyond what the instruments allow.
    NoLossSeen,
    /// Vapour through a given or fitted hole: the level cannot check it.
    Vapour,
    /// Stored by an earlier estimator that did not record a reason.
    #[default]
    Unrecorded,
}

/// Where the fitted hole stands.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(tag = "state", rename_all = "snake_case")]
pub enum Fit {
    /// Not reported yet: the level has fallen `level_drop_m` of the
    /// `needed_m` the fit waits for.
    NotYet { level_drop_m: f64, needed_m: f64 },
    /// The effective area Cd·A the level drop implies, with its band (m²).
    Ready {
        area_m2: f64,
        area_low_m2: f64,
        area_high_m2: f64,
    },
}

impl Default for Fit {
    fn default() -> Self {
        Fit::NotYet {
            level_drop_m: 0.0,
            needed_m: 0.0,
        }
    }
}

impl Fit {
    /// The fitted Cd·A and its band, once ready.
    pub fn area(&self) -> Option<(f64, f64, f64)> {
        match *self {
            Fit::Ready {
                area_m2,
                area_low_m2,
                area_high_m2,
            } => Some((area_low_m2, area_m2, area_high_m2)),
            Fit::NotYet { .. } => None,
        }
    }
}

/// The Cd the level drop implies at the operator's hole size.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ImpliedCd {
    pub best: f64,
    pub low: f64,
    pub high: f64,
    /// Whether the range the band spans allows it: `low` to `high`
    /// overlaps the range.
    pub in_range: bool,
}

/// Which phase flows, as stored and shown.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum PhaseName {
    Liquid,
    Vapour,
    #[default]
    None,
}

/// The forecast part of an estimate, in totals since the event start.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ForecastSummary {
    /// Sample time the forecast was made at.
    pub made_at_ms: i64,
    /// Seconds from `made_at_ms` until the liquid flow stops.
    pub stops_after_s: f64,
    pub stop_level_m: f64,
    /// Released since the event start, by the time the flow stops.
    pub total_at_stop_kg: f64,
    pub total_in_15_min_kg: f64,
    pub total_in_1_h_kg: f64,
}

/// The first crossings of one reportable quantity.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Crossing {
    pub quantity_kg: f64,
    /// Sample time of the first best estimate at or above the quantity.
    pub at_ms: Option<i64>,
    /// Sample time the band's high end first reached it: the quantity may
    /// have been released from then on.
    #[serde(default)]
    pub high_at_ms: Option<i64>,
}

/// Counts of what the data was like.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct DataQuality {
    /// Samples with a good level, used.
    pub samples_used: u64,
    /// Samples skipped because the level was not good, was outside the
    /// tank, or jumped (spikes are also counted on their own below).
    pub samples_skipped: u64,
    /// Level readings that jumped and were not confirmed by the next one.
    #[serde(default)]
    pub spikes_rejected: u64,
    /// Samples where a bad pressure reading was replaced by the last good one.
    pub pressure_held: u64,
    /// Samples where a bad transfer reading was replaced by the last good one.
    pub transfer_held: u64,
    /// Samples where a bad temperature reading was replaced by the last good
    /// one.
    #[serde(default)]
    pub temperature_held: u64,
    /// Gaps longer than the gap limit, and what was bridged across them.
    pub gaps_bridged: u64,
    pub bridged_kg: f64,
    pub longest_gap_s: f64,
    /// How much the forecast would have bridged beyond what the level on
    /// the far side of the gaps allows (kg): taken off, not counted.
    #[serde(default)]
    pub bridge_cut_kg: f64,
    /// Times a shown total was revised down after a gap, when the level on
    /// the far side showed less than had been shown, and by how much in all
    /// (kg of the best figure).
    #[serde(default)]
    pub revisions_down: u64,
    #[serde(default)]
    pub revised_down_kg: f64,
}

/// What widens the band, at this sample: the causes the README names, each
/// as an expanded (k = 2, about 95 %) half-width in kg on the inventory
/// balance, and as fractions on the model's rate.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct BandCauses {
    /// The Cd range the model's band spans (a bound, not a distribution).
    pub cd_low: f64,
    pub cd_high: f64,
    /// Contributions to the inventory balance's uncertainty, kg.
    pub level_accuracy_kg: f64,
    pub level_noise_kg: f64,
    pub density_kg: f64,
    pub transfer_kg: f64,
    pub temperature_kg: f64,
    /// All of them combined (root sum of squares), kg.
    pub inventory_kg: f64,
    /// The instruments' and the density's share of the model rate's band,
    /// as a fraction of the rate.
    pub rate_fraction: f64,
    /// The fit's two-sigma spread of Cd·A, as a fraction, once fitted.
    pub fit_fraction: Option<f64>,
    /// The orifice model's own band (kg), before the level bounds it:
    /// the Cd range and the instruments, with no regard to the level.
    #[serde(default)]
    pub model_low_kg: f64,
    #[serde(default)]
    pub model_high_kg: f64,
    /// The uncertainty of what the level set across data gaps (kg,
    /// expanded), which widens the model's band.
    #[serde(default)]
    pub bridge_kg: f64,
}

/// The figures of one estimate, as the store keeps one per sample: what a
/// chart, a series or a replay's comparison needs, in a small fixed size.
/// The whole [`Estimate`] (band causes, fit, forecast, crossings, data
/// quality) is kept for the latest sample of an event; any earlier one can
/// be recomputed from the stored samples.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Figures {
    pub at_ms: i64,
    pub released_best_kg: f64,
    pub released_low_kg: f64,
    pub released_high_kg: f64,
    pub rate_best_kg_s: f64,
    pub rate_low_kg_s: f64,
    pub rate_high_kg_s: f64,
    pub inventory_kg: Option<f64>,
    pub model_kg: Option<f64>,
    pub method: Method,
    pub reason: Reason,
    pub phase: PhaseName,
    pub after_gap: bool,
    /// The warnings of the sample (those of the forecast aside, which is
    /// made for the latest estimate only).
    pub warnings: Warnings,
}

impl Figures {
    /// Whether two figures are the same bit for bit (NaN-free figures; a
    /// plain `==` would also do, but says less about what is meant).
    pub fn identical(&self, other: &Figures) -> bool {
        let same = |a: f64, b: f64| a.to_bits() == b.to_bits();
        let same_opt = |a: Option<f64>, b: Option<f64>| match (a, b) {
            (Some(a), Some(b)) => same(a, b),
            (None, None) => true,
            _ => false,
        };
        self.at_ms == other.at_ms
            && same(self.released_best_kg, other.released_best_kg)
            && same(self.released_low_kg, other.released_low_kg)
            && same(self.released_high_kg, other.released_high_kg)
            && same(self.rate_best_kg_s, other.rate_best_kg_s)
            && same(self.rate_low_kg_s, other.rate_low_kg_s)
            && same(self.rate_high_kg_s, other.rate_high_kg_s)
            && same_opt(self.inventory_kg, other.inventory_kg)
            && same_opt(self.model_kg, other.model_kg)
            && self.method == other.method
            && self.reason == other.reason
            && self.phase == other.phase
            && self.after_gap == other.after_gap
            && self.warnings == other.warnings
    }
}

/// Everything the estimator says after a sample.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Estimate {
    pub at_ms: i64,
    pub released_best_kg: f64,
    /// The band's low end: not ratcheted, so it may fall when the data
    /// narrows what is known (the best figure and the high end never fall
    /// within a revision but by a recorded reconciliation).
    pub released_low_kg: f64,
    pub released_high_kg: f64,
    pub rate_best_kg_s: f64,
    pub rate_low_kg_s: f64,
    pub rate_high_kg_s: f64,
    pub method: Method,
    #[serde(default)]
    pub reason: Reason,
    /// The inventory balance since the start (kg), beside the best figure:
    /// the liquid mass gone from the tank plus metered transfers in.
    pub inventory_kg: Option<f64>,
    /// The orifice model's own total with the given or fitted hole at the
    /// chosen Cd, before the level bounds it (kg).
    #[serde(default)]
    pub model_kg: Option<f64>,
    /// The fitted effective hole, or why not yet.
    #[serde(default)]
    pub fit: Fit,
    /// Effective hole diameter at the chosen Cd, once the fit is ready
    /// (kept for readers of the first document format; `fit` is the figure).
    pub fitted_diameter_m: Option<f64>,
    /// With a given hole and a level that falls measurably: the Cd the
    /// level implies.
    #[serde(default)]
    pub implied_cd: Option<ImpliedCd>,
    pub level_m: f64,
    pub headspace_pa: f64,
    /// The liquid density the figures use, kg/m³ (for volumes).
    pub density_kg_m3: f64,
    /// The liquid's temperature, K, where a sensor reads it.
    #[serde(default)]
    pub temperature_k: Option<f64>,
    pub phase: PhaseName,
    /// For vapour: whether the flow is choked (sonic in the hole).
    #[serde(default)]
    pub choked: Option<bool>,
    /// Liquid between the present level and the hole, kg.
    pub remaining_above_hole_kg: f64,
    pub forecast: Option<ForecastSummary>,
    pub crossings: Vec<Crossing>,
    pub quality: DataQuality,
    /// Whether a gap was bridged just before this sample.
    pub after_gap: bool,
    /// What widens the band.
    #[serde(default)]
    pub band: BandCauses,
    #[serde(default)]
    pub warnings: Warnings,
}

impl Estimate {
    /// The per-sample figures of this estimate.
    pub fn figures(&self) -> Figures {
        Figures {
            at_ms: self.at_ms,
            released_best_kg: self.released_best_kg,
            released_low_kg: self.released_low_kg,
            released_high_kg: self.released_high_kg,
            rate_best_kg_s: self.rate_best_kg_s,
            rate_low_kg_s: self.rate_low_kg_s,
            rate_high_kg_s: self.rate_high_kg_s,
            inventory_kg: self.inventory_kg,
            model_kg: self.model_kg,
            method: self.method,
            reason: self.reason,
            phase: self.phase,
            after_gap: self.after_gap,
            warnings: self.warnings,
        }
    }
}

#[cfg(test)]
impl Estimate {
    /// An estimate with nothing in it, for tests of what renders it.
    pub(crate) fn blank() -> Self {
        Self {
            at_ms: 0,
            released_best_kg: 0.0,
            released_low_kg: 0.0,
            released_high_kg: 0.0,
            rate_best_kg_s: 0.0,
            rate_low_kg_s: 0.0,
            rate_high_kg_s: 0.0,
            method: Method::NoData,
            reason: Reason::Unrecorded,
            inventory_kg: None,
            model_kg: None,
            fit: Fit::default(),
            fitted_diameter_m: None,
            implied_cd: None,
            level_m: 0.0,
            headspace_pa: 0.0,
            density_kg_m3: 1000.0,
            temperature_k: None,
            phase: PhaseName::None,
            choked: None,
            remaining_above_hole_kg: 0.0,
            forecast: None,
            crossings: Vec::new(),
            quality: DataQuality::default(),
            after_gap: false,
            band: BandCauses::default(),
            warnings: Warnings::default(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn warnings_round_trip_as_names_and_skip_unknown_ones() {
        let mut w = Warnings::default();
        w.insert(Warning::NoLossSeen);
        w.insert(Warning::CdAssumed);
        let json = serde_json::to_string(&w).unwrap();
        assert_eq!(json, r#"["no_loss_seen","cd_assumed"]"#);
        let back: Warnings =
            serde_json::from_str(r#"["cd_assumed","from_a_later_version","no_loss_seen"]"#)
                .unwrap();
        assert_eq!(back, w);
    }

    #[test]
    fn the_cd_band_includes_the_chosen_cd() {
        let p = LeakParams {
            cd: 0.5,
            ..LeakParams::default()
        };
        assert_eq!(p.cd_band(), (0.5, 1.0));
        let p = LeakParams {
            cd: 0.62,
            cd_range: Some((0.60, 0.65)),
            ..LeakParams::default()
        };
        assert_eq!(p.cd_band(), (0.60, 0.65));
    }

    #[test]
    fn an_estimate_of_the_first_format_still_reads() {
        // A stored document of estimator version 1 (prose fields, no reason,
        // fit or band): it must read, with the new fields at their defaults.
        let old = r#"{"at_ms":1,"released_best_kg":2.0,"released_low_kg":1.0,"released_high_kg":3.0,
            "rate_best_kg_s":0.1,"rate_low_kg_s":0.05,"rate_high_kg_s":0.2,"method":"fitted_hole",
            "method_reason":"no hole size given","inventory_kg":2.1,"fitted_diameter_m":0.03,
            "fit_status":"fitted","consistency":null,"level_m":3.0,"headspace_pa":0.0,
            "density_kg_m3":840.0,"phase":"liquid","remaining_above_hole_kg":100.0,"forecast":null,
            "crossings":[{"quantity_kg":250.0,"at_ms":null}],"quality":{"samples_used":1,
            "samples_skipped":0,"pressure_held":0,"transfer_held":0,"gaps_bridged":0,
            "bridged_kg":0.0,"longest_gap_s":0.0},"after_gap":false}"#;
        let e: Estimate = serde_json::from_str(old).unwrap();
        assert_eq!(e.reason, Reason::Unrecorded);
        assert_eq!(e.phase, PhaseName::Liquid);
        assert!(e.warnings.is_empty());
        assert_eq!(e.crossings[0].high_at_ms, None);
    }
}
