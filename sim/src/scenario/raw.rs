//! The scenario file exactly as written: serde types that mirror the TOML.
//!
//! Unknown keys are errors (`deny_unknown_fields`), so a misspelt key never
//! passes silently, and every value a check may complain about is
//! `Spanned`, so that its message can name the line and column.
//!
//! Left out: interpreting any value, and which keys an action takes (the
//! checks in `tanks`, `events` and `faults` do both).

use super::faults::{SensorRole, SimTable};
use serde::Deserialize;
use toml::Spanned;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawScenario {
    pub site: Spanned<String>,
    pub step_ms: Option<Spanned<i64>>,
    pub seed: Option<u64>,
    #[serde(default, rename = "tank")]
    pub tanks: Vec<RawTank>,
    #[serde(default, rename = "event")]
    pub events: Vec<RawEvent>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawTank {
    pub id: Spanned<String>,
    pub initial_level_m: Spanned<f64>,
    pub headspace_kpa: Option<Spanned<f64>>,
    pub level_noise_m: Option<Spanned<f64>>,
    pub pressure_noise_pa: Option<Spanned<f64>>,
    pub level_bias_m: Option<Spanned<f64>>,
    pub level_drift_m_per_h: Option<Spanned<f64>>,
    pub pressure_bias_pa: Option<Spanned<f64>>,
    /// The liquid's temperature, °C, held for the whole run.
    pub temperature_c: Option<Spanned<f64>>,
    /// The liquid's daily temperature swing, peak to peak, K (a sinusoid
    /// of 24 h about `temperature_c`, rising first).
    pub temperature_swing_k: Option<Spanned<f64>>,
    /// The liquid's volumetric expansion coefficient, 1/K: how far the
    /// level rises and falls with the swing.
    pub expansion_per_k: Option<Spanned<f64>>,
    /// "held" (the default): the headspace pressure is held and no gas
    /// is modelled; "gas": the ullage holds the site config's vapour,
    /// which a hole above the surface lets out.
    pub ullage: Option<Spanned<UllageKind>>,
    /// With `ullage = "gas"`: "isothermal" (the default) or "adiabatic".
    pub ullage_thermal: Option<Spanned<ThermalKind>>,
    /// With `ullage = "gas"`: a blanket regulator holding the starting
    /// pressure, feeding at most this much gas, kg/s or normal m³/h
    /// (0 °C, 101.325 kPa); one of the two.
    pub blanket_max_kg_s: Option<Spanned<f64>>,
    pub blanket_max_nm3_h: Option<Spanned<f64>>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum UllageKind {
    Held,
    Gas,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ThermalKind {
    Isothermal,
    Adiabatic,
}

/// One `[[event]]`. Every action shares this flat type, and validation
/// checks which keys an action takes: serde's tagged enums buffer their
/// content, which would lose the spans that make the messages useful.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawEvent {
    pub at_s: Spanned<f64>,
    pub action: Spanned<Action>,
    pub tank: Option<Spanned<String>>,
    pub device: Option<Spanned<String>>,
    pub sensor: Option<Spanned<SensorRole>>,
    pub diameter_mm: Option<Spanned<f64>>,
    pub height_m: Option<Spanned<f64>>,
    pub cd: Option<Spanned<f64>>,
    pub flow_m3_h: Option<Spanned<f64>>,
    pub duration_s: Option<Spanned<f64>>,
    pub value_si: Option<Spanned<f64>>,
    pub reply_delay_ms: Option<Spanned<u64>>,
    pub exception_code: Option<Spanned<u8>>,
    pub table: Option<Spanned<SimTable>>,
    pub address: Option<Spanned<u16>>,
    pub count: Option<Spanned<u16>>,
    pub extra_values: Option<Spanned<i64>>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Action {
    LeakOpens,
    LeakCloses,
    TransferStarts,
    TransferStops,
    SensorSticks,
    SensorGarbage,
    SensorReads,
    SensorRecovers,
    LinkDrops,
    DeviceSlows,
    RaiseFlag,
    LowerFlag,
    DeviceRefuses,
    DeviceMiscounts,
}

impl Action {
    /// The action as the file spells it (serde's `snake_case` above).
    pub fn name(self) -> &'static str {
        match self {
            Action::LeakOpens => "leak_opens",
            Action::LeakCloses => "leak_closes",
            Action::TransferStarts => "transfer_starts",
            Action::TransferStops => "transfer_stops",
            Action::SensorSticks => "sensor_sticks",
            Action::SensorGarbage => "sensor_garbage",
            Action::SensorReads => "sensor_reads",
            Action::SensorRecovers => "sensor_recovers",
            Action::LinkDrops => "link_drops",
            Action::DeviceSlows => "device_slows",
            Action::RaiseFlag => "raise_flag",
            Action::LowerFlag => "lower_flag",
            Action::DeviceRefuses => "device_refuses",
            Action::DeviceMiscounts => "device_miscounts",
        }
    }
}
