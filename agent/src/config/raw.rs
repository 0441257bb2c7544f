//! The config file exactly as written: serde types that mirror the TOML.
//!
//! Unknown keys are errors (`deny_unknown_fields`), so a typo never passes
//! silently. Values that need a check beyond their type are `Spanned`, so
//! that the check in `config::validate` can point at the line and column.
//! Nothing here interprets a value; see the parent module for that.

use crate::acquire::decode::{BitKind, DataType, RegisterKind, WordOrder};
use serde::Deserialize;
use toml::Spanned;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    pub site: RawSite,
    #[serde(default, rename = "device")]
    pub devices: Vec<RawDevice>,
    #[serde(default, rename = "tank")]
    pub tanks: Vec<RawTank>,
    /// The read-only web page; no server unless the section is there.
    pub web: Option<RawWeb>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawWeb {
    /// IP address and port to listen on; loopback by default.
    pub listen: Option<Spanned<String>>,
    /// The explicit opt-in for an address other machines can reach.
    #[serde(default)]
    pub allow_remote: bool,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSite {
    pub name: String,
    /// Absolute ambient pressure in kPa; the standard atmosphere if absent.
    pub ambient_pressure_kpa: Option<Spanned<f64>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawDevice {
    pub id: Spanned<String>,
    /// host:port of the Modbus TCP server (a PLC, an RTU or a gateway).
    pub address: Spanned<String>,
    #[serde(default = "default_unit_id")]
    pub unit_id: Spanned<u8>,
    #[serde(default = "default_poll_interval")]
    pub poll_interval_ms: Spanned<u64>,
    #[serde(default = "default_request_timeout")]
    pub request_timeout_ms: Spanned<u64>,
    /// Whether reads may span unmapped registers between mapped ones.
    #[serde(default = "default_true")]
    pub bridge_gaps: bool,
}

fn default_unit_id() -> Spanned<u8> {
    Spanned::new(0..0, 1)
}
fn default_poll_interval() -> Spanned<u64> {
    Spanned::new(0..0, 1000)
}
fn default_request_timeout() -> Spanned<u64> {
    Spanned::new(0..0, 500)
}
fn default_true() -> bool {
    true
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawTank {
    pub id: Spanned<String>,
    #[serde(default)]
    pub description: String,
    pub device: Spanned<String>,
    pub geometry: Spanned<RawGeometry>,
    pub substance: RawSubstance,
    /// The headspace gauge pressure to assume when there is no pressure
    /// sensor, in kPa: 0 for an open vent, the set point for a blanket.
    #[serde(default)]
    pub headspace_kpa: Option<Spanned<f64>>,
    /// For a tank with a pressure transmitter: the blanket's usual gauge
    /// pressure in kPa, for what-if studies without a logged reading.
    #[serde(default)]
    pub nominal_headspace_kpa: Option<Spanned<f64>>,
    pub level: RawSensor,
    pub pressure: Option<RawSensor>,
    pub transfer: Option<RawSensor>,
    pub leak_flag: Option<RawFlag>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, tag = "shape", rename_all = "snake_case")]
pub enum RawGeometry {
    VerticalCylinder {
        diameter_m: f64,
        height_m: f64,
    },
    HorizontalCylinder {
        diameter_m: f64,
        length_m: f64,
        #[serde(default)]
        heads: RawHeads,
        head_depth_m: Option<f64>,
    },
    Sphere {
        diameter_m: f64,
    },
    Table {
        /// (level m, volume m³) pairs, from the tank's strapping table.
        points: Vec<(f64, f64)>,
    },
}

#[derive(Debug, Default, Clone, Copy, Deserialize, PartialEq)]
#[serde(rename_all = "snake_case")]
pub enum RawHeads {
    #[default]
    Flat,
    Ellipsoidal,
    Hemispherical,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSubstance {
    pub name: String,
    pub density_kg_m3: Spanned<f64>,
    /// Reportable quantities, kg: the thresholds whose first crossing the
    /// site must notify.
    #[serde(default)]
    pub reportable_kg: Vec<Spanned<f64>>,
    pub vapour: Option<Spanned<RawVapour>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawVapour {
    pub molar_mass_g_mol: f64,
    pub heat_capacity_ratio: f64,
    pub temperature_c: f64,
}

/// One value read from registers. The last two fields apply to pressure
/// sensors only (serde cannot flatten a struct into one that refuses
/// unknown keys, so the roles share this type and validation checks them).
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSensor {
    pub register: RegisterKind,
    pub address: Spanned<u16>,
    #[serde(rename = "type")]
    pub data_type: Spanned<DataType>,
    pub word_order: Option<Spanned<WordOrder>>,
    /// Raw register range that maps linearly onto `range`, e.g. [4000, 20000].
    pub raw: Option<Spanned<(f64, f64)>>,
    /// Engineering range, in `unit`: the scaled span, and the limits beyond
    /// which a reading is flagged out of range.
    pub range: Spanned<(f64, f64)>,
    pub unit: Spanned<String>,
    /// Seconds without any change after which a reading counts as stuck.
    pub stuck_after_s: Option<Spanned<f64>>,
    /// Pressure only: what the transmitter's zero is.
    pub reference: Option<Spanned<RawPressureReference>>,
    /// Pressure only: elevation of the tap above the tank bottom, m; absent
    /// for a transmitter in the headspace.
    pub tap_elevation_m: Option<Spanned<f64>>,
}

#[derive(Debug, Clone, Copy, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum RawPressureReference {
    Gauge,
    Absolute,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawFlag {
    pub input: BitKind,
    pub address: Spanned<u16>,
}
