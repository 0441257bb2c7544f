//! The validated config: the site, its devices, its tanks with their
//! contents and sensors, and the web page, every value in SI units and
//! already checked; what a sensor's registers mean (scaling to and from SI,
//! the valid range, the resolution) and how far a reading may be off (the
//! accuracies, stated or default). Code outside the config module sees
//! only these.
//!
//! Left out: how the file becomes these values and what is refused
//! (`validate`), the problems it reports (`problems`), and the register map
//! a device's values make together (`register_map`).

use crate::model::{AbsolutePressure, DensityModel, Mass, Pressure, PressureTap, Vessel};
use crate::registers::{BitKind, DataType, RegisterKind, WordOrder};
use std::net::SocketAddr;
use std::ops::Range;
use std::path::PathBuf;
use std::time::Duration;

/// The units a site's people read figures in (`[site] units`). Only what
/// people read changes: the database, JSON and CSV stay SI.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Units {
    /// kg, m, mm, m³ and L, kPa.
    #[default]
    Metric,
    /// lb, ft, in, US gal and bbl, psi.
    UsCustomary,
}

impl Units {
    /// The config's word for these units.
    pub fn name(self) -> &'static str {
        match self {
            Units::Metric => "metric",
            Units::UsCustomary => "us",
        }
    }

    /// The units a config word names.
    pub fn from_name(name: &str) -> Option<Units> {
        match name {
            "metric" => Some(Units::Metric),
            "us" => Some(Units::UsCustomary),
            _ => None,
        }
    }
}

/// What a suspected loss on a tank does (`suspected_loss`, on `[site]`
/// or a tank).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum LossWatch {
    /// Not watched.
    Off,
    /// Raised on the page, in the metrics and the log; an operator
    /// confirms with `leak open --since`.
    #[default]
    Alert,
    /// As `Alert`, and an event is opened at once, back-dated to where the
    /// unexplained fall began.
    Open,
}

impl LossWatch {
    /// The config's word for it.
    pub fn name(self) -> &'static str {
        match self {
            LossWatch::Off => "off",
            LossWatch::Alert => "alert",
            LossWatch::Open => "open",
        }
    }

    pub fn from_name(name: &str) -> Option<Self> {
        [LossWatch::Off, LossWatch::Alert, LossWatch::Open]
            .into_iter()
            .find(|w| w.name() == name)
    }
}

/// Why a time zone name could not be used.
#[derive(Debug, thiserror::Error)]
#[error(
    "\"{name}\" is not a time zone this machine knows; give an IANA name such as \"Europe/Berlin\", \"America/Chicago\" or \"UTC\" (the names are in /usr/share/zoneinfo), or \"local\" for this machine's zone"
)]
pub struct UnknownZone {
    pub name: String,
}

/// The zone a config names (`UTC`, `Europe/Oslo`, or `local` for the
/// machine's own), with the name reports show for it.
pub fn time_zone(name: &str) -> Result<(String, jiff::tz::TimeZone), UnknownZone> {
    let unknown = || UnknownZone {
        name: name.to_owned(),
    };
    if name == "local" {
        let zone = jiff::tz::TimeZone::try_system().map_err(|_| unknown())?;
        let shown = match zone.iana_name() {
            // One name for UTC, whatever the machine calls it.
            Some("Etc/UTC" | "Etc/UCT" | "Etc/Universal" | "Etc/Zulu" | "UCT" | "Zulu") => "UTC",
            Some(name) => name,
            None => "local",
        };
        return Ok((shown.to_owned(), zone));
    }
    let zone = jiff::tz::TimeZone::get(name).map_err(|_| unknown())?;
    Ok((name.to_owned(), zone))
}

/// A validated site config.
#[derive(Debug, Clone)]
pub struct Config {
    /// Where it was read from.
    pub path: PathBuf,
    pub site_name: String,
    pub ambient: AbsolutePressure,
    /// The database from `[site] database`, resolved against the config
    /// file's folder; commands use it when no `--db` names another.
    pub database: Option<PathBuf>,
    /// The zone people's times are shown in (`[site] time_zone`; UTC if
    /// absent), and its name as written (or the machine's, for `local`).
    pub time_zone: jiff::tz::TimeZone,
    pub time_zone_name: String,
    /// The units people's figures are shown in (`[site] units`).
    pub units: Units,
    pub devices: Vec<Device>,
    pub tanks: Vec<Tank>,
    /// The read-only web page, when the config has a `[web]` section.
    pub web: Option<Web>,
    /// Publishing to an MQTT broker, when the config has an `[mqtt]`
    /// section.
    pub mqtt: Option<super::mqtt::Mqtt>,
    /// `[site] suspected_loss`: what a suspected loss does where a tank
    /// does not say.
    pub suspected_loss: LossWatch,
}

impl Config {
    /// What a suspected loss on `tank` (an index into `tanks`) does.
    pub fn loss_watch(&self, tank: usize) -> LossWatch {
        self.tanks.get(tank).map_or(LossWatch::Off, |t| {
            t.suspected_loss.unwrap_or(self.suspected_loss)
        })
    }
}

/// Where the daemon serves the read-only web page, the JSON and the metrics.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Web {
    pub listen: SocketAddr,
    /// Whether `listen` may be an address that other machines can reach.
    /// Validation refuses such an address without it, so a page with no
    /// login is never exposed by a typo.
    pub allow_remote: bool,
    /// Names the page answers to besides its listen address (and
    /// `localhost` on loopback), from `[web] hosts`: lower case, each with
    /// the port it must come with, or `None` for any port.
    pub hosts: Vec<HostName>,
}

/// One name a request's `Host` header may carry.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct HostName {
    /// A DNS name or an IP address, lower case; an IPv6 address without
    /// its brackets.
    pub name: String,
    /// The port it must come with; `None` accepts any (a reverse proxy
    /// forwards the public name with the public port, or none).
    pub port: Option<u16>,
}

impl HostName {
    /// Splits a `Host` header value (`name`, `name:port`, `[v6]` or
    /// `[v6]:port`) into a lower-case name and its port, if it is well
    /// formed; it knows nothing of which names are allowed.
    pub fn parse(text: &str) -> Option<(String, Option<u16>)> {
        let text = text.trim();
        let port_of = |p: &str| p.parse::<u16>().ok();
        if let Some(rest) = text.strip_prefix('[') {
            let (inside, after) = rest.split_once(']')?;
            let ip = inside.parse::<std::net::Ipv6Addr>().ok()?;
            let port = match after {
                "" => None,
                p => Some(port_of(p.strip_prefix(':')?)?),
            };
            return Some((ip.to_string(), port));
        }
        let (name, port) = match text.rsplit_once(':') {
            Some((name, port)) => (name, Some(port_of(port)?)),
            None => (text, None),
        };
        let plain = |c: char| c.is_ascii_alphanumeric() || matches!(c, '.' | '-' | '_');
        if name.is_empty() || name.len() > 253 || !name.chars().all(plain) {
            return None;
        }
        Some((name.to_ascii_lowercase(), port))
    }
}

impl Web {
    /// Whether other machines can reach the page (anything but loopback;
    /// `0.0.0.0` and `[::]` listen on every interface).
    pub fn is_remote(&self) -> bool {
        !self.listen.ip().is_loopback()
    }
}

/// The web page's address when `[web]` gives none: loopback only.
pub const DEFAULT_WEB_LISTEN: &str = "127.0.0.1:8470";

/// A Modbus device to poll: a TCP server, or a unit on a serial line.
#[derive(Debug, Clone, PartialEq)]
pub struct Device {
    pub id: String,
    /// Where the device is, as the log and `check` say it: host:port for
    /// Modbus TCP, the serial port's path for Modbus RTU.
    pub address: String,
    /// The serial line, for a Modbus RTU device; `None` for Modbus TCP.
    pub serial: Option<SerialLine>,
    pub unit_id: u8,
    pub poll_interval: Duration,
    pub request_timeout: Duration,
    /// On a serial line: the silence kept before each request to this
    /// device, after the line's previous exchange ended. Zero over TCP.
    pub inter_request_delay: Duration,
    /// Whether one read may span unmapped registers between mapped ones.
    pub bridge_gaps: bool,
}

/// A serial port's parity bit.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Parity {
    None,
    Even,
    Odd,
}

impl Parity {
    pub fn name(self) -> &'static str {
        match self {
            Parity::None => "none",
            Parity::Even => "even",
            Parity::Odd => "odd",
        }
    }
}

/// A serial line carrying Modbus RTU: the port and its character format.
/// Every device on one port has the same (the config checks).
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct SerialLine {
    /// The port's path, e.g. /dev/ttyUSB0.
    pub port: String,
    pub baud_rate: u32,
    pub parity: Parity,
    pub stop_bits: u8,
    pub data_bits: u8,
}

impl SerialLine {
    /// Bits on the wire per character: a start bit, the data bits, the
    /// parity bit if any, and the stop bits (11 for 8E1, 8N2 and 8O1).
    pub fn bits_per_character(&self) -> u32 {
        1 + u32::from(self.data_bits)
            + u32::from(self.parity != Parity::None)
            + u32::from(self.stop_bits)
    }

    /// How long `bytes` characters take on the wire, back to back.
    pub fn transmission_time(&self, bytes: usize) -> Duration {
        let bits = bytes as f64 * f64::from(self.bits_per_character());
        Duration::from_secs_f64(bits / f64::from(self.baud_rate.max(1)))
    }

    /// The silent interval that ends a frame, t3.5: 3.5 character times,
    /// and a fixed 1.75 ms above 19200 baud (Modbus over Serial Line
    /// Specification V1.02, section 2.5.1.1).
    pub fn silent_interval(&self) -> Duration {
        if self.baud_rate > 19_200 {
            Duration::from_micros(1750)
        } else {
            let bits = 3.5 * f64::from(self.bits_per_character());
            Duration::from_secs_f64(bits / f64::from(self.baud_rate.max(1)))
        }
    }
}

/// A tank, its contents and its sensors.
#[derive(Debug, Clone)]
pub struct Tank {
    pub id: String,
    pub description: String,
    /// Index into [`Config::devices`].
    pub device: usize,
    pub vessel: Vessel,
    pub substance: String,
    /// Reportable quantities, ascending.
    pub reportable: Vec<Mass>,
    /// Headspace gauge pressure to assume when no pressure sensor is mapped.
    pub assumed_headspace: Pressure,
    /// With a pressure sensor: the blanket's usual gauge pressure, which
    /// `whatif` takes when no reading is given or logged.
    pub nominal_headspace: Option<Pressure>,
    pub level: Sensor,
    pub pressure: Option<PressureSensor>,
    /// Net volume flow into the tank from pumps (negative out), m³/s.
    pub transfer: Option<Sensor>,
    /// The liquid's temperature, K.
    pub temperature: Option<Sensor>,
    pub leak_flag: Option<Flag>,
    /// How the density follows the temperature (a constant without data).
    pub density: DensityModel,
    /// How far the density may be from the truth, as a fraction (a bound).
    pub density_uncertainty: Uncertainty,
    /// The level sensor's `max_rate_m_s`: the fastest the level can move,
    /// m/s, when the site knows better than the limit acquisition works out
    /// from the tank.
    pub max_level_rate: Option<f64>,
    /// This tank's `suspected_loss`, over the site's.
    pub suspected_loss: Option<LossWatch>,
    /// `suspected_loss_allowance_mm_h` in m/s: how fast the level may fall
    /// unexplained before the watch counts it.
    pub loss_allowance_m_s: f64,
}

/// A bound on an error, and whether the config states it or a default
/// stands in (which `check` says, so nobody mistakes a default for a data
/// sheet).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Uncertainty {
    /// The bound: in SI units for a sensor's absolute accuracy, or a
    /// fraction for a relative one (a flow meter's per cent of reading, a
    /// density's per cent).
    pub bound: f64,
    /// Whether `bound` is a fraction of the value rather than in its units.
    pub relative: bool,
    /// Whether the config gives it; false for a default.
    pub stated: bool,
}

impl Uncertainty {
    /// The bound on the error of a value of `magnitude`, in its units.
    pub fn of(&self, magnitude: f64) -> f64 {
        if self.relative {
            self.bound * magnitude.abs()
        } else {
            self.bound
        }
    }
}

/// Default density uncertainty: 1 % (common practice for a product whose
/// density comes from its specification rather than a sample).
pub const DEFAULT_DENSITY_UNCERTAINTY: f64 = 0.01;
/// Default level accuracy: 0.1 % of the range, and never under 3 mm (common
/// practice for radar and hydrostatic tank gauges).
pub const DEFAULT_LEVEL_ACCURACY_FRACTION_OF_SPAN: f64 = 0.001;
pub const DEFAULT_LEVEL_ACCURACY_MIN_M: f64 = 0.003;
/// Default pressure accuracy: 0.25 % of the range, and never under 0.1 kPa
/// (common practice for industrial transmitters, installed).
pub const DEFAULT_PRESSURE_ACCURACY_FRACTION_OF_SPAN: f64 = 0.0025;
pub const DEFAULT_PRESSURE_ACCURACY_MIN_PA: f64 = 100.0;
/// Default transfer meter accuracy: 1 % of the reading (common practice).
pub const DEFAULT_TRANSFER_ACCURACY: f64 = 0.01;
/// The temperature a density is given at when the config does not say:
/// 15 °C, the usual reference temperature for petroleum products (common
/// practice).
pub const REFERENCE_TEMPERATURE_C: f64 = 15.0;
/// Default temperature accuracy: 0.5 °C (common practice for a resistance
/// thermometer in a thermowell).
pub const DEFAULT_TEMPERATURE_ACCURACY_K: f64 = 0.5;

/// One numeric value in registers and how to turn it into SI.
#[derive(Debug, Clone, PartialEq)]
pub struct Sensor {
    pub register: RegisterKind,
    pub address: u16,
    pub data_type: DataType,
    pub word_order: WordOrder,
    /// (raw low, raw high) -> (engineering low, engineering high), linear.
    pub raw_span: (f64, f64),
    pub engineering_span: (f64, f64),
    /// The engineering unit as written, for display.
    pub unit: String,
    /// Multiplier from the engineering unit to SI...
    pub si_per_unit: f64,
    /// ...and what to add after it (only temperatures have one).
    pub si_offset: f64,
    /// Readings outside this range (SI) are flagged out of range.
    pub valid_si: (f64, f64),
    pub stuck_after: Option<Duration>,
    /// How far a reading may be from the truth.
    pub accuracy: Uncertainty,
}

impl Sensor {
    /// The registers this value occupies.
    pub fn registers(&self) -> Range<u32> {
        let start = u32::from(self.address);
        start..start + u32::from(self.data_type.width())
    }

    /// Whether an SI value is one this sensor can report: finite and inside
    /// its valid range, with a hair of slack for the scaling's round-off at
    /// the ends.
    pub fn accepts(&self, si: f64) -> bool {
        let (lo, hi) = self.valid_si;
        let slack = 1e-9 * (hi - lo).abs();
        si.is_finite() && si >= lo - slack && si <= hi + slack
    }

    /// Raw register value to SI.
    pub fn to_si(&self, raw: f64) -> f64 {
        let (r0, r1) = self.raw_span;
        let (e0, e1) = self.engineering_span;
        (e0 + (raw - r0) * (e1 - e0) / (r1 - r0)) * self.si_per_unit + self.si_offset
    }

    /// SI value to the raw register value (the simulator's side).
    pub fn to_raw(&self, si: f64) -> f64 {
        let (r0, r1) = self.raw_span;
        let (e0, e1) = self.engineering_span;
        r0 + ((si - self.si_offset) / self.si_per_unit - e0) * (r1 - r0) / (e1 - e0)
    }

    /// The smallest step in SI that the register can show: the quantisation
    /// of an integer register, or zero for f32 (effectively continuous).
    pub fn resolution_si(&self) -> f64 {
        match self.data_type {
            DataType::F32 => 0.0,
            _ => {
                ((self.engineering_span.1 - self.engineering_span.0)
                    / (self.raw_span.1 - self.raw_span.0))
                    .abs()
                    * self.si_per_unit
            }
        }
    }
}

/// A pressure transmitter: where it is and what its zero is.
#[derive(Debug, Clone, PartialEq)]
pub struct PressureSensor {
    pub sensor: Sensor,
    pub absolute: bool,
    pub tap: PressureTap,
}

/// A leak flag the control system sets: a coil or a discrete input.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Flag {
    pub kind: BitKind,
    pub address: u16,
}

/// What a mapped value is for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Role {
    Level,
    Pressure,
    Transfer,
    Temperature,
    LeakFlag,
}

impl Role {
    pub fn name(self) -> &'static str {
        match self {
            Role::Level => "level",
            Role::Pressure => "pressure",
            Role::Transfer => "transfer",
            Role::Temperature => "temperature",
            Role::LeakFlag => "leak flag",
        }
    }
}

#[cfg(test)]
mod tests {
    use crate::config::load;
    use crate::config::tests::repo_file;

    #[test]
    fn demo_config_values_are_in_si() {
        let c = load(&repo_file("config/demo.toml")).unwrap();
        let t12 = &c.tanks[0];
        assert_eq!(t12.id, "FF-T12");
        assert_eq!(t12.level.to_si(4000.0), 0.0);
        assert_eq!(t12.level.to_si(20000.0), 5.0);
        assert!((t12.level.resolution_si() - 5.0 / 16000.0).abs() < 1e-15);
        let transfer = t12.transfer.as_ref().unwrap();
        assert!((transfer.to_si(10000.0) - 100.0 / 3600.0).abs() < 1e-15);
        let t20 = &c.tanks[2];
        assert_eq!(t20.level.to_si(1234.0), 1.234);
        assert!(t20.pressure.as_ref().unwrap().absolute);
        assert_eq!(c.devices[t20.device].unit_id, 2);
    }
}
