//! The config file exactly as written: serde types that mirror the TOML.
//!
//! Unknown keys are errors (`deny_unknown_fields`), so a typo never passes
//! silently. Values that need a check beyond their type are `Spanned`, so
//! that the check in `config::validate` can point at the line and column.
//! Nothing here interprets a value: that is `validate`'s job.

use crate::registers::{BitKind, DataType, RegisterKind, WordOrder};
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
    /// Publishing to an MQTT broker; none unless the section is there.
    pub mqtt: Option<RawMqtt>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawMqtt {
    /// host:port of the broker.
    pub broker: Spanned<String>,
    /// TLS; on by default when `ca_file` is given.
    pub tls: Option<Spanned<bool>>,
    pub ca_file: Option<Spanned<String>>,
    pub client_cert_file: Option<Spanned<String>>,
    pub client_key_file: Option<Spanned<String>>,
    pub username: Option<Spanned<String>>,
    pub password_file: Option<Spanned<String>>,
    /// Never taken: read only to say where the password goes instead.
    pub password: Option<Spanned<toml::Value>>,
    pub client_id: Option<Spanned<String>>,
    pub topic_prefix: Option<Spanned<String>>,
    pub site_id: Option<Spanned<String>>,
    pub qos: Option<Spanned<u8>>,
    pub readings_every_s: Option<Spanned<f64>>,
    pub outbox_limit: Option<Spanned<usize>>,
    pub keep_alive_s: Option<Spanned<u64>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawWeb {
    /// IP address and port to listen on; loopback by default.
    pub listen: Option<Spanned<String>>,
    /// The explicit opt-in for an address other machines can reach.
    #[serde(default)]
    pub allow_remote: bool,
    /// More names the page answers to in the `Host` header (a DNS name,
    /// a LAN address, the name a reverse proxy forwards), each with an
    /// optional `:port`.
    #[serde(default)]
    pub hosts: Vec<Spanned<String>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSite {
    pub name: String,
    /// Absolute ambient pressure in kPa; the standard atmosphere if absent.
    pub ambient_pressure_kpa: Option<Spanned<f64>>,
    /// The database the daemon writes and every command reads, relative to
    /// the config file's folder.
    pub database: Option<Spanned<String>>,
    /// The IANA time zone people's times are shown in, or `local`.
    pub time_zone: Option<Spanned<String>>,
    /// `metric` or `us`: the units people's figures are shown in.
    pub units: Option<Spanned<String>>,
    /// `alert` (the default), `open` or `off`: what a suspected loss does.
    pub suspected_loss: Option<Spanned<String>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawDevice {
    pub id: Spanned<String>,
    /// host:port of the Modbus TCP server (a PLC, an RTU or a gateway);
    /// absent for a device on a serial line.
    pub address: Option<Spanned<String>>,
    /// The serial port of a Modbus RTU device (in place of `address`), and
    /// the line's settings; absent ones take the Modbus serial-line
    /// defaults (`validate` says which).
    pub serial_port: Option<Spanned<String>>,
    pub baud_rate: Option<Spanned<u32>>,
    pub parity: Option<Spanned<String>>,
    pub stop_bits: Option<Spanned<u8>>,
    pub data_bits: Option<Spanned<u8>>,
    pub inter_request_delay_ms: Option<Spanned<f64>>,
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
    /// The liquid's temperature, for a density that follows it.
    pub temperature: Option<RawSensor>,
    pub leak_flag: Option<RawFlag>,
    /// This tank's `suspected_loss`, over the site's.
    pub suspected_loss: Option<Spanned<String>>,
    /// How fast the level may fall unexplained before it counts, mm/h.
    pub suspected_loss_allowance_mm_h: Option<Spanned<f64>>,
}

/// A tank's shape and its dimensions. One flat table rather than an enum
/// tagged by `shape`: serde buffers a tagged enum's content, which loses the
/// spans, and every dimension needs its own line and column when it is out
/// of range. Validation checks which keys the shape takes.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawGeometry {
    pub shape: Spanned<RawShape>,
    pub diameter_m: Option<Spanned<f64>>,
    /// Vertical cylinder only.
    pub height_m: Option<Spanned<f64>>,
    /// Horizontal cylinder only: the straight shell.
    pub length_m: Option<Spanned<f64>>,
    /// Horizontal cylinder only.
    pub heads: Option<Spanned<RawHeads>>,
    /// Horizontal cylinder with ellipsoidal heads only.
    pub head_depth_m: Option<Spanned<f64>>,
    /// Table only: (level m, volume m³) pairs, from the tank's strapping
    /// table; each pair is checked for its length.
    pub points: Option<Spanned<Vec<Spanned<Vec<f64>>>>>,
}

#[derive(Debug, Clone, Copy, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum RawShape {
    VerticalCylinder,
    HorizontalCylinder,
    Sphere,
    Table,
}

impl RawShape {
    pub fn name(self) -> &'static str {
        match self {
            RawShape::VerticalCylinder => "vertical_cylinder",
            RawShape::HorizontalCylinder => "horizontal_cylinder",
            RawShape::Sphere => "sphere",
            RawShape::Table => "table",
        }
    }

    /// The keys besides `shape` that the shape requires, and those it also
    /// accepts.
    pub fn keys(self) -> (&'static [&'static str], &'static [&'static str]) {
        match self {
            RawShape::VerticalCylinder => (&["diameter_m", "height_m"], &[]),
            RawShape::HorizontalCylinder => {
                (&["diameter_m", "length_m"], &["heads", "head_depth_m"])
            }
            RawShape::Sphere => (&["diameter_m"], &[]),
            RawShape::Table => (&["points"], &[]),
        }
    }
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
    /// How far the stated density may be from the truth, per cent.
    pub density_uncertainty_pct: Option<Spanned<f64>>,
    /// Volumetric expansion coefficient, 1/°C: the density then follows
    /// the tank's temperature sensor.
    pub expansion_per_c: Option<Spanned<f64>>,
    /// The temperature `density_kg_m3` is given at (with `expansion_per_c`).
    pub reference_temperature_c: Option<Spanned<f64>>,
    /// (°C, kg/m³) points from the product's data sheet, instead of an
    /// expansion coefficient.
    pub density_table: Option<Spanned<Vec<(f64, f64)>>>,
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
    /// A list rather than a pair: serde reads a pair from the first two
    /// numbers and ignores any more, and a third number is a mistake to say.
    pub raw: Option<Spanned<Vec<f64>>>,
    /// Engineering range, in `unit`: the scaled span, and the limits beyond
    /// which a reading is flagged out of range. Two numbers, as `raw`.
    pub range: Spanned<Vec<f64>>,
    pub unit: Spanned<String>,
    /// Seconds without any change after which a reading counts as stuck.
    pub stuck_after_s: Option<Spanned<f64>>,
    /// Level only: the fastest the level can move, m/s, in place of the
    /// limit worked out from the tank (see `acquire::plausible`).
    pub max_rate_m_s: Option<Spanned<f64>>,
    /// Pressure only: what the transmitter's zero is.
    pub reference: Option<Spanned<RawPressureReference>>,
    /// Pressure only: elevation of the tap above the tank bottom, m; absent
    /// for a transmitter in the headspace.
    pub tap_elevation_m: Option<Spanned<f64>>,
    /// The data sheet's accuracy, one key per kind of sensor: level in mm,
    /// pressure in kPa, transfer flow in per cent of the reading,
    /// temperature in °C. Validation refuses a key on the wrong sensor.
    pub accuracy_mm: Option<Spanned<f64>>,
    pub accuracy_kpa: Option<Spanned<f64>>,
    pub accuracy_pct: Option<Spanned<f64>>,
    pub accuracy_c: Option<Spanned<f64>>,
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
