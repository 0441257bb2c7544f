//! What a reader must be told beside the figures, as codes: one bit each in
//! a [`Warnings`] set, so an estimate carries them without an allocation.

use serde::de::{Deserializer, SeqAccess, Visitor};
use serde::ser::{SerializeSeq, Serializer};
use serde::{Deserialize, Serialize};

/// Something a reader must be told, beside the figures. The figures a
/// warning refers to are in the estimate itself.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Warning {
    /// The given hole's Cd·A and the one the level implies differ by more
    /// than a factor of 1.5 (`implied_cd`, `fit`).
    HoleInconsistent,
    /// The model's total is outside what the level allows: the best figure
    /// follows the level (`model_kg`, `inventory_kg`).
    LevelContradictsModel,
    /// The level has not fallen beyond the instruments' uncertainty.
    NoLossSeen,
    /// More than a quarter of the total was bridged across data gaps.
    BridgedGapsDominate,
    /// A gap's bridge was cut to what the level on its far side allows
    /// (`quality.bridge_cut_kg`).
    BridgeCutByLevel,
    /// A shown total was revised down after a gap (`quality.revised_down_kg`).
    TotalRevisedDown,
    /// This sample's pressure is the last good one, held.
    PressureHeld,
    /// This sample's transfer flow is the last good one, held.
    TransferHeld,
    /// This sample's temperature is the last good one, held.
    TemperatureHeld,
    /// The hole height is assumed at the bottom (not given).
    HoleHeightAssumed,
    /// The Cd is assumed 1.0 (not given).
    CdAssumed,
    /// Some of the tank's instrument accuracies are defaults, not the data
    /// sheet's.
    DefaultAccuracies,
    /// The forecast was capped at the liquid above the hole at the start,
    /// plus transfers in.
    ForecastCapped,
    /// Vapour leaves through the hole; the level cannot check the figure.
    VapourNotChecked,
    /// The event starts before the first usable sample by more than the
    /// gap limit: the start is bridged at the first sample's rate.
    StartBridged,
    /// The level has fallen further than the liquid there was above the
    /// given hole height: the hole is lower (or the gauge wrong), and the
    /// figures follow the level.
    HoleHeightRefuted,
}

impl Warning {
    /// Every warning, most important first (the order they are shown in).
    /// New warnings go at the end of the enum, whose order sets the bits.
    pub const ALL: [Warning; 16] = [
        Warning::HoleInconsistent,
        Warning::LevelContradictsModel,
        Warning::HoleHeightRefuted,
        Warning::NoLossSeen,
        Warning::BridgedGapsDominate,
        Warning::BridgeCutByLevel,
        Warning::TotalRevisedDown,
        Warning::PressureHeld,
        Warning::TransferHeld,
        Warning::TemperatureHeld,
        Warning::HoleHeightAssumed,
        Warning::CdAssumed,
        Warning::DefaultAccuracies,
        Warning::ForecastCapped,
        Warning::VapourNotChecked,
        Warning::StartBridged,
    ];

    fn bit(self) -> u32 {
        1 << (self as u32)
    }
}

/// A set of warnings: one bit each, so an estimate carries them without an
/// allocation. Serialised as a list of their snake_case names; names this
/// version does not know are skipped when read.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Warnings(u32);

impl Warnings {
    /// The set as bits (bit n: the n-th warning of the enum), as the store
    /// keeps it.
    pub fn bits(self) -> u32 {
        self.0
    }

    /// A set from stored bits; bits this version does not know are dropped.
    pub fn from_bits(bits: u32) -> Self {
        let known = Warning::ALL.iter().fold(0, |all, w| all | w.bit());
        Self(bits & known)
    }

    pub fn insert(&mut self, w: Warning) {
        self.0 |= w.bit();
    }

    pub fn contains(&self, w: Warning) -> bool {
        self.0 & w.bit() != 0
    }

    pub fn is_empty(&self) -> bool {
        self.0 == 0
    }

    /// The warnings in a fixed order (most important first).
    pub fn iter(&self) -> impl Iterator<Item = Warning> + '_ {
        Warning::ALL.into_iter().filter(|w| self.contains(*w))
    }
}

impl Serialize for Warnings {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        let mut seq = serializer.serialize_seq(None)?;
        for w in self.iter() {
            seq.serialize_element(&w)?;
        }
        seq.end()
    }
}

impl<'de> Deserialize<'de> for Warnings {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct List;
        impl<'de> Visitor<'de> for List {
            type Value = Warnings;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("a list of warning names")
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Warnings, A::Error> {
                let mut set = Warnings::default();
                while let Some(name) = seq.next_element::<String>()? {
                    let known = Warning::ALL
                        .into_iter()
                        .find(|w| serde_json::to_value(w).is_ok_and(|v| v.as_str() == Some(&name)));
                    if let Some(w) = known {
                        set.insert(w);
                    }
                }
                Ok(set)
            }
        }
        deserializer.deserialize_seq(List)
    }
}
