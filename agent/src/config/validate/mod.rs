//! Turning the file as written (`raw`) into the validated [`Config`]: every
//! check a value must pass, the plausible limits that refuse unit slips and
//! typos (all kept here, in one list), and where a default stands in for
//! what a file leaves out. Each problem is noted at the span of the text
//! that says it, and checking goes on, so that one pass finds them all.
//!
//! This file checks the site as a whole: the ambient pressure, the devices,
//! unique ids, the web page, and register overlaps once every tank is
//! known. A tank's own checks are in `tank`, its shape's in `geometry`, and
//! one sensor's in `sensor`.
//!
//! Left out: the validated types and the defaults' values (`types`),
//! rendering problems at file:line:column (`problems`), and which registers
//! a device's values occupy (`register_map`; only locating its overlaps is
//! done here).

mod geometry;
mod mqtt;
mod sensor;
mod tank;

use super::problems::Problems;
use super::raw::{self, RawConfig, RawTank};
use super::register_map::overlaps;
use super::types::{
    Config, DEFAULT_WEB_LISTEN, Device, HostName, LossWatch, Parity, Role, SerialLine, Tank, Units,
    Web,
};
use crate::model::{AbsolutePressure, ModelError};
use std::collections::HashMap;
use std::net::SocketAddr;
use std::ops::Range;
use std::path::{Path, PathBuf};
use std::time::Duration;
use toml::Spanned;

/// The largest transfer believed from a file for a tank with no meter in
/// its config, m³/s: 100 m³/s is 360,000 m³/h, past any pump or pipeline.
pub const MAX_UNMETERED_TRANSFER_M3_S: f64 = 100.0;

// Plausible dimensions, m. The largest storage tanks built are about 120 m
// across and 30 m tall, spheres about 25 m across, and a horizontal tank
// that can travel by road about 4 m (all from memory). The limits leave room
// past those and refuse what is surely a unit slip (mm for m) or a typo such
// as 1e308 or 1e-300; the smallest, 5 cm, is a laboratory vessel.
const VERTICAL_DIAMETER_M: (f64, f64) = (0.05, 200.0);
const HORIZONTAL_DIAMETER_M: (f64, f64) = (0.05, 20.0);
const HORIZONTAL_LENGTH_M: (f64, f64) = (0.05, 200.0);
const SPHERE_DIAMETER_M: (f64, f64) = (0.05, 50.0);
/// A dished head can be shallow (a millimetre is a flat head in practice);
/// the model also keeps it within half the diameter.
const HEAD_DEPTH_M: (f64, f64) = (0.001, 10.0);
const TANK_HEIGHT_M: (f64, f64) = (0.05, 100.0);
/// The most a strapping table may say a tank holds, m³: a vertical cylinder
/// at the limits above (200 m across, 100 m tall) holds 3.1 million.
const MAX_TABLE_VOLUME_M3: f64 = 3.2e6;
/// Strapping tables have tens to a few thousand rows; more is a file pasted
/// by mistake, and each point costs memory in every estimator.
const MAX_TABLE_POINTS: usize = 100_000;
/// Pressures past this (100 MPa, 1000 bar) are beyond any tank, even a
/// pressurised sphere (about 2 MPa; from memory).
const MAX_PRESSURE_PA: f64 = 1e8;
/// A reportable quantity past a million tonnes is a unit slip.
const MAX_REPORTABLE_KG: f64 = 1e9;
/// A stuck check longer than a week would never fire in practice.
const MAX_STUCK_AFTER_S: f64 = 604_800.0;
/// The most `max_rate_m_s` may say, m/s: free fall for a second.
const MAX_LEVEL_RATE_M_S: f64 = 10.0;
/// Serial rates, baud: 300 is the slowest a modem line ran; past 921600 no
/// RS-485 transceiver on a tank farm goes (common practice).
const BAUD_RATE: (u32, u32) = (300, 921_600);
/// The Modbus serial-line specification's default rate (V1.02, 2.5.1).
const DEFAULT_BAUD_RATE: u32 = 19_200;
/// A pause between requests past 10 s is surely seconds typed as ms.
const MAX_INTER_REQUEST_DELAY_MS: f64 = 10_000.0;

/// The serial-line keys a device has, with their spans: they make no
/// sense on a Modbus TCP device.
fn serial_only_keys(d: &raw::RawDevice) -> Vec<(&'static str, Range<usize>)> {
    [
        ("baud_rate", d.baud_rate.as_ref().map(Spanned::span)),
        ("parity", d.parity.as_ref().map(Spanned::span)),
        ("stop_bits", d.stop_bits.as_ref().map(Spanned::span)),
        ("data_bits", d.data_bits.as_ref().map(Spanned::span)),
        (
            "inter_request_delay_ms",
            d.inter_request_delay_ms.as_ref().map(Spanned::span),
        ),
    ]
    .into_iter()
    .filter_map(|(key, span)| Some((key, span?)))
    .collect()
}

/// The most `suspected_loss_allowance_mm_h` may say: a metre an hour would
/// let any leak through.
const MAX_LOSS_ALLOWANCE_MM_H: f64 = 1000.0;
/// The allowance where a tank gives none, mm/h (`loss::LossParams`).
const DEFAULT_LOSS_ALLOWANCE_MM_H: f64 = 1.0;

/// A number as a config message quotes it: to 7 significant digits, plain
/// when it is of everyday size, in exponent form when Display would print
/// hundreds of digits (1e308 has 309).
fn shown(x: f64) -> String {
    if !x.is_finite() || x == 0.0 {
        return format!("{x}");
    }
    let rounded: f64 = format!("{x:.6e}").parse().unwrap_or(x);
    if (1e-4..1e6).contains(&rounded.abs()) {
        format!("{rounded}")
    } else {
        format!("{rounded:e}")
    }
}

/// Checks the file as written and builds the [`Config`] it describes, or
/// gives every problem found.
pub(super) fn validate(raw: RawConfig, path: &Path) -> Result<Config, Problems> {
    let mut checker = Checker {
        problems: Problems::default(),
        address_spans: HashMap::new(),
    };
    let config = checker.config(raw, path);
    if checker.problems.is_empty() {
        checker.register_overlaps(&config);
    }
    if checker.problems.is_empty() {
        Ok(config)
    } else {
        Err(checker.problems)
    }
}

/// Collects problems while building the validated config.
struct Checker {
    problems: Problems,
    /// Where each tank's mapped values are written, for the overlap check
    /// that runs once every tank is known.
    address_spans: HashMap<(String, Role), Range<usize>>,
}

impl Checker {
    fn problem(&mut self, span: Range<usize>, message: impl Into<String>) {
        self.problems.push(span, message);
    }

    /// Values that share a register, or run past the last one, each noted
    /// at the address that places it; looked for once every tank is known.
    fn register_overlaps(&mut self, config: &Config) {
        for (tank, role, message) in overlaps(config) {
            let span = self
                .address_spans
                .get(&(config.tanks[tank].id.clone(), role))
                .cloned()
                .unwrap_or(0..0);
            self.problem(span, message);
        }
    }

    /// Records a model error at `span`, prefixed with `context`.
    fn model<T>(
        &mut self,
        span: Range<usize>,
        context: &str,
        result: Result<T, ModelError>,
    ) -> Option<T> {
        result
            .map_err(|e| self.problem(span, format!("{context}: {e}")))
            .ok()
    }

    fn config(&mut self, raw: RawConfig, path: &Path) -> Config {
        let ambient = self.ambient(raw.site.ambient_pressure_kpa.as_ref());
        let (devices, device_index) = self.devices(raw.devices);
        let tanks = self.tanks(raw.tanks, &device_index, &devices, ambient);
        let web = raw.web.map(|w| self.web(w));
        let mqtt = raw.mqtt.map(|m| self.mqtt(m, &raw.site.name, path));
        let database = raw.site.database.as_ref().map(|d| self.database(d, path));
        let (time_zone_name, time_zone) = self.time_zone(raw.site.time_zone.as_ref());
        let units = self.units(raw.site.units.as_ref());
        let suspected_loss = self
            .loss_watch(raw.site.suspected_loss.as_ref(), "[site]")
            .unwrap_or_default();
        Config {
            path: path.to_owned(),
            site_name: raw.site.name,
            ambient,
            database,
            time_zone,
            time_zone_name,
            units,
            devices,
            tanks,
            web,
            mqtt,
            suspected_loss,
        }
    }

    /// A `suspected_loss` word, on `[site]` or a tank (`ctx`).
    pub(super) fn loss_watch(
        &mut self,
        name: Option<&Spanned<String>>,
        ctx: &str,
    ) -> Option<LossWatch> {
        let name = name?;
        let watch = LossWatch::from_name(name.get_ref());
        if watch.is_none() {
            self.problem(
                name.span(),
                format!(
                    "{ctx}: suspected_loss = \"{}\" is not known; give \"alert\" (show it, the operator confirms), \"open\" (also open an event at once) or \"off\"",
                    crate::logging::one_line(name.get_ref())
                ),
            );
        }
        watch
    }

    /// `[site] database`, relative to the config file's folder.
    fn database(&mut self, name: &Spanned<String>, config: &Path) -> PathBuf {
        let text = name.get_ref();
        if text.is_empty() || crate::logging::one_line(text) != *text {
            self.problem(
                name.span(),
                "database must be a file path without control characters, for example \"/var/lib/leaktally/site.db\"",
            );
        }
        let folder = config.parent().unwrap_or(Path::new(""));
        folder.join(text)
    }

    /// `[site] time_zone`: UTC if absent.
    fn time_zone(&mut self, name: Option<&Spanned<String>>) -> (String, jiff::tz::TimeZone) {
        let Some(name) = name else {
            return ("UTC".into(), jiff::tz::TimeZone::UTC);
        };
        match super::types::time_zone(name.get_ref()) {
            Ok(zone) => zone,
            Err(e) => {
                self.problem(name.span(), format!("time_zone: {e}"));
                ("UTC".into(), jiff::tz::TimeZone::UTC)
            }
        }
    }

    /// `[site] units`: metric if absent.
    fn units(&mut self, name: Option<&Spanned<String>>) -> Units {
        let Some(name) = name else {
            return Units::Metric;
        };
        Units::from_name(name.get_ref()).unwrap_or_else(|| {
            self.problem(
                name.span(),
                format!(
                    "units = \"{}\" is not known; give \"metric\" (kg, m, kPa) or \"us\" (lb, ft, in, US gal, bbl, psi)",
                    crate::logging::one_line(name.get_ref())
                ),
            );
            Units::Metric
        })
    }

    /// `ambient_pressure_kpa`, absolute: the standard atmosphere if absent.
    fn ambient(&mut self, kpa: Option<&Spanned<f64>>) -> AbsolutePressure {
        let Some(kpa) = kpa else {
            return AbsolutePressure::STANDARD_ATMOSPHERE;
        };
        let pa = *kpa.get_ref() * 1000.0;
        let (lo, hi) = crate::model::vessel::AMBIENT_RANGE;
        if !(lo..=hi).contains(&pa) {
            self.problem(
                kpa.span(),
                format!(
                    "ambient_pressure_kpa = {} is outside {}..{} kPa; give the absolute ambient pressure in kPa (101.325 at sea level)",
                    kpa.get_ref(),
                    lo / 1000.0,
                    hi / 1000.0
                ),
            );
        }
        AbsolutePressure::pascals(pa)
    }

    /// The `[[device]]` tables, each id used once, and each id's index in
    /// the list (the last, for an id used twice).
    fn devices(&mut self, raw: Vec<raw::RawDevice>) -> (Vec<Device>, HashMap<String, usize>) {
        let mut device_index: HashMap<String, usize> = HashMap::new();
        let mut devices = Vec::new();
        for d in raw {
            if let Some(device) = self.device(&d) {
                if device_index
                    .insert(device.id.clone(), devices.len())
                    .is_some()
                {
                    self.problem(
                        d.id.span(),
                        format!(
                            "device id \"{}\" is used twice; give each [[device]] its own id",
                            device.id
                        ),
                    );
                }
                self.shared_line(&d, &device, &devices);
                devices.push(device);
            }
        }
        (devices, device_index)
    }

    /// Devices on one serial port share the line: the same settings, and
    /// each its own unit id (one line has one of each).
    fn shared_line(&mut self, d: &raw::RawDevice, device: &Device, before: &[Device]) {
        let Some(line) = &device.serial else { return };
        let span = d
            .serial_port
            .as_ref()
            .map_or_else(|| d.id.span(), Spanned::span);
        for other in before {
            let Some(theirs) = &other.serial else {
                continue;
            };
            if theirs.port != line.port {
                continue;
            }
            if theirs != line {
                self.problem(
                    span.clone(),
                    format!(
                        "device \"{}\" is on {} at {} baud, parity {}, stop bits {}, but device \"{}\" on the same port says {} baud, parity {}, stop bits {}; one port has one setting, so make them agree",
                        device.id,
                        line.port,
                        line.baud_rate,
                        line.parity.name(),
                        line.stop_bits,
                        other.id,
                        theirs.baud_rate,
                        theirs.parity.name(),
                        theirs.stop_bits
                    ),
                );
                return;
            }
            if other.unit_id == device.unit_id {
                self.problem(
                    span.clone(),
                    format!(
                        "device \"{}\" has unit_id {} on {}, as device \"{}\" does; every device on a serial line needs its own unit id",
                        device.id, device.unit_id, line.port, other.id
                    ),
                );
                return;
            }
        }
    }

    /// The `[[tank]]` tables, each id used once; a config needs at least
    /// one (said only when nothing else is wrong, as problems above may be
    /// why none was built).
    fn tanks(
        &mut self,
        raw: Vec<RawTank>,
        device_index: &HashMap<String, usize>,
        devices: &[Device],
        ambient: AbsolutePressure,
    ) -> Vec<Tank> {
        let mut tank_ids: HashMap<String, ()> = HashMap::new();
        let mut tanks = Vec::new();
        for t in raw {
            if tank_ids.insert(t.id.get_ref().clone(), ()).is_some() {
                self.problem(
                    t.id.span(),
                    format!(
                        "tank id \"{}\" is used twice; give each [[tank]] its own id",
                        t.id.get_ref()
                    ),
                );
            }
            if let Some(tank) = self.tank(t, device_index, devices, ambient) {
                tanks.push(tank);
            }
        }
        if tanks.is_empty() && self.problems.is_empty() {
            self.problem(
                0..0,
                "the config defines no tanks; add a [[tank]] table (see config/reference.toml)",
            );
        }
        tanks
    }

    fn web(&mut self, w: raw::RawWeb) -> Web {
        let default: SocketAddr = DEFAULT_WEB_LISTEN.parse().expect("a valid default");
        let hosts = self.web_hosts(&w.hosts);
        let Some(listen) = w.listen else {
            return Web {
                listen: default,
                allow_remote: w.allow_remote,
                hosts,
            };
        };
        let text = listen.get_ref().trim();
        let parsed = text
            .parse::<SocketAddr>()
            .ok()
            // "localhost" is the one name worth accepting: it is what people
            // type, and it cannot mean anything but loopback.
            .or_else(|| {
                let port = text.strip_prefix("localhost:")?.parse::<u16>().ok()?;
                Some(SocketAddr::from(([127, 0, 0, 1], port)))
            });
        let Some(addr) = parsed else {
            self.problem(
                listen.span(),
                format!(
                    "web listen = \"{text}\" is not an IP address and port; write it like \"{DEFAULT_WEB_LISTEN}\" (this machine only) or \"0.0.0.0:8470\" (every interface, with allow_remote = true)"
                ),
            );
            return Web {
                listen: default,
                allow_remote: w.allow_remote,
                hosts,
            };
        };
        let web = Web {
            listen: addr,
            allow_remote: w.allow_remote,
            hosts,
        };
        if web.is_remote() && !web.allow_remote {
            self.problem(
                listen.span(),
                format!(
                    "web listen = \"{text}\" can be reached from other machines, and the page has no login; \
                     add allow_remote = true to [web] if that is intended, or listen on \"{DEFAULT_WEB_LISTEN}\""
                ),
            );
        }
        web
    }

    /// The `[web] hosts` names, checked: a browser sends them as the
    /// `Host` header, so anything else (a URL, a path, a space) would never
    /// match and is a mistake to say now rather than a page refused later.
    fn web_hosts(&mut self, hosts: &[Spanned<String>]) -> Vec<HostName> {
        let mut out = Vec::new();
        for h in hosts {
            match HostName::parse(h.get_ref()) {
                Some((name, port)) => out.push(HostName { name, port }),
                None => self.problem(
                    h.span(),
                    format!(
                        "web hosts entry {:?} is not a host name; give names as a browser sends them, such as \"responders.site.example\", \"10.0.0.5:8470\" or \"[fd00::5]:8470\", without http:// or a path",
                        h.get_ref()
                    ),
                ),
            }
        }
        out
    }

    fn device(&mut self, d: &raw::RawDevice) -> Option<Device> {
        let id = d.id.get_ref().trim().to_owned();
        if id.is_empty() {
            self.problem(
                d.id.span(),
                "device id is empty; give it a short name such as \"rtu-1\"",
            );
        }
        let (address, serial) = self.endpoint(d, &id);
        let unit_id = *d.unit_id.get_ref();
        if unit_id == 0 || unit_id > 247 {
            self.problem(
                d.unit_id.span(),
                format!(
                    "unit_id {unit_id} is outside 1..247; use the device's Modbus unit id (often 1)"
                ),
            );
        }
        let interval = *d.poll_interval_ms.get_ref();
        if !(100..=3_600_000).contains(&interval) {
            self.problem(
                d.poll_interval_ms.span(),
                format!("poll_interval_ms = {interval} is outside 100..3600000; 1000 polls once a second"),
            );
        }
        let timeout = *d.request_timeout_ms.get_ref();
        if !(20..=60_000).contains(&timeout) {
            self.problem(
                d.request_timeout_ms.span(),
                format!(
                    "request_timeout_ms = {timeout} is outside 20..60000; 500 suits most devices"
                ),
            );
        } else if timeout >= interval {
            self.problem(
                d.request_timeout_ms.span(),
                format!(
                    "request_timeout_ms = {timeout} is not shorter than poll_interval_ms = {interval}; a slow device would delay every poll, so make the timeout shorter"
                ),
            );
        }
        let inter_request_delay = match &serial {
            Some(line) => self.inter_request_delay(d, line, timeout),
            None => Duration::ZERO,
        };
        Some(Device {
            id,
            address,
            serial,
            unit_id,
            poll_interval: Duration::from_millis(interval),
            request_timeout: Duration::from_millis(timeout),
            inter_request_delay,
            bridge_gaps: d.bridge_gaps,
        })
    }

    /// Where a device is: `address` (Modbus TCP) or `serial_port` and the
    /// line's settings (Modbus RTU), one of the two.
    fn endpoint(&mut self, d: &raw::RawDevice, id: &str) -> (String, Option<SerialLine>) {
        match (&d.address, &d.serial_port) {
            (Some(a), None) => {
                for (key, span) in serial_only_keys(d) {
                    self.problem(
                        span,
                        format!(
                            "device \"{id}\": {key} applies only to a device on a serial line; remove it, or give serial_port in place of address"
                        ),
                    );
                }
                let address = a.get_ref().trim().to_owned();
                let port_ok = address.rsplit_once(':').is_some_and(|(host, port)| {
                    !host.is_empty() && port.parse::<u16>().is_ok_and(|p| p > 0)
                });
                if !port_ok {
                    self.problem(
                        a.span(),
                        format!("device address \"{address}\" is not host:port; write it like \"192.0.2.10:502\""),
                    );
                }
                (address, None)
            }
            (None, Some(port)) => {
                let line = self.serial_line(d, port);
                (line.port.clone(), Some(line))
            }
            (Some(a), Some(_)) => {
                self.problem(
                    a.span(),
                    format!(
                        "device \"{id}\" has both address and serial_port; give address for Modbus TCP or serial_port for Modbus RTU, not both"
                    ),
                );
                (a.get_ref().clone(), None)
            }
            (None, None) => {
                self.problem(
                    d.id.span(),
                    format!(
                        "device \"{id}\" says neither where it is; give address = \"host:port\" (Modbus TCP) or serial_port = \"/dev/ttyUSB0\" (Modbus RTU)"
                    ),
                );
                (String::new(), None)
            }
        }
    }

    /// A serial line's settings, checked; absent ones take the defaults of
    /// the Modbus serial-line specification (V1.02, 2.5.1: 19200 baud, even
    /// parity, one stop bit, eight data bits).
    fn serial_line(&mut self, d: &raw::RawDevice, port: &Spanned<String>) -> SerialLine {
        let path = port.get_ref().trim().to_owned();
        if path.is_empty() || path.chars().any(char::is_control) {
            self.problem(
                port.span(),
                "serial_port is empty or has control characters; give the port's path, such as \"/dev/ttyUSB0\" or \"/dev/serial/by-id/usb-...\"",
            );
        }
        let baud_rate = d
            .baud_rate
            .as_ref()
            .map_or(DEFAULT_BAUD_RATE, |b| *b.get_ref());
        if let Some(b) = &d.baud_rate
            && !(BAUD_RATE.0..=BAUD_RATE.1).contains(&baud_rate)
        {
            self.problem(
                b.span(),
                format!(
                    "baud_rate = {baud_rate} is outside {}..{}; use the rate set on the devices, such as 9600 or 19200",
                    BAUD_RATE.0, BAUD_RATE.1
                ),
            );
        }
        let parity = match d.parity.as_ref().map(|p| (p.get_ref().as_str(), p.span())) {
            None | Some(("even", _)) => Parity::Even,
            Some(("none", _)) => Parity::None,
            Some(("odd", _)) => Parity::Odd,
            Some((other, span)) => {
                self.problem(
                    span,
                    format!(
                        "parity \"{other}\" is not one of \"none\", \"even\", \"odd\"; use the parity set on the devices"
                    ),
                );
                Parity::Even
            }
        };
        let stop_bits = d.stop_bits.as_ref().map_or(1, |b| *b.get_ref());
        if let Some(b) = &d.stop_bits
            && !matches!(stop_bits, 1 | 2)
        {
            self.problem(
                b.span(),
                format!("stop_bits = {stop_bits} is not 1 or 2; use the devices' setting (2 is usual with parity = \"none\")"),
            );
        }
        let data_bits = d.data_bits.as_ref().map_or(8, |b| *b.get_ref());
        if let Some(b) = &d.data_bits
            && data_bits != 8
        {
            self.problem(
                b.span(),
                format!(
                    "data_bits = {data_bits}: Modbus RTU sends 8 data bits a character (Modbus over Serial Line V1.02, 2.5.1; 7 is ASCII mode, which leaktally does not speak); set the devices to RTU with 8 data bits and remove the key or write 8"
                ),
            );
        }
        SerialLine {
            port: path,
            baud_rate: baud_rate.clamp(BAUD_RATE.0, BAUD_RATE.1),
            parity,
            stop_bits: stop_bits.clamp(1, 2),
            data_bits: 8,
        }
    }

    /// The silence before each request on a serial line: the line's t3.5
    /// unless the file says more; and the request timeout must leave room
    /// for the longest reply at the line's rate.
    fn inter_request_delay(
        &mut self,
        d: &raw::RawDevice,
        line: &SerialLine,
        timeout_ms: u64,
    ) -> Duration {
        let least = line.silent_interval();
        let delay = match &d.inter_request_delay_ms {
            None => least,
            Some(ms) => {
                let value = *ms.get_ref();
                let least_ms = least.as_secs_f64() * 1000.0;
                if !(value.is_finite() && value <= MAX_INTER_REQUEST_DELAY_MS) {
                    self.problem(
                        ms.span(),
                        format!(
                            "inter_request_delay_ms = {} is outside 0..{MAX_INTER_REQUEST_DELAY_MS}; leave it out for the line's 3.5-character silence ({} ms at {} baud)",
                            shown(value),
                            shown(least_ms),
                            line.baud_rate
                        ),
                    );
                    least
                } else if value < least_ms {
                    self.problem(
                        ms.span(),
                        format!(
                            "inter_request_delay_ms = {} is shorter than the 3.5-character silence that ends a Modbus RTU frame ({} ms at {} baud, {} bits a character); give at least that, or leave the key out",
                            shown(value),
                            shown(least_ms),
                            line.baud_rate,
                            line.bits_per_character()
                        ),
                    );
                    least
                } else {
                    Duration::from_secs_f64(value / 1000.0)
                }
            }
        };
        // The longest exchange: a read request (8 bytes) and a reply of 125
        // registers (5 + 250 bytes), with the silences around them.
        let longest = line.transmission_time(8 + 255) + 2 * least;
        if Duration::from_millis(timeout_ms) <= longest {
            let span = if d.request_timeout_ms.span().is_empty() {
                d.baud_rate
                    .as_ref()
                    .map_or_else(|| d.id.span(), Spanned::span)
            } else {
                d.request_timeout_ms.span()
            };
            self.problem(
                span,
                format!(
                    "request_timeout_ms = {timeout_ms} is too short for {} baud: the longest read's reply takes {} ms on the line; give request_timeout_ms = {} or more",
                    line.baud_rate,
                    longest.as_millis() + 1,
                    (longest.as_millis() / 100 + 2) * 100
                ),
            );
        }
        delay
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::tests::{BASE, repo_file};
    use crate::config::{load, parse};

    /// Each broken config, as (edit of BASE, expected "line:column: text").
    #[test]
    fn broken_configs_get_located_messages_that_say_how_to_fix_them() {
        let cases: &[(&str, &str, &str)] = &[
            (
                "address = \"127.0.0.1:1502\"",
                "address = \"127.0.0.1:1502\"\npoll_intervall_ms = 1000",
                "6:1: unknown field `poll_intervall_ms`",
            ),
            (
                "type = \"u16\"",
                "type = \"f32\", word_order = \"middle\"",
                "11:71: unknown variant `middle`, expected `high_first` or `low_first`",
            ),
            (
                "density_kg_m3 = 840.0",
                "density_kg_m3 = 0.84",
                "10:48: tank \"T1\": liquid density is 0.84 kg/m³, outside the plausible range",
            ),
            (
                "device = \"d1\"",
                "device = \"d2\"",
                "8:10: tank \"T1\": device \"d2\" is not defined; define it in a [[device]] table or use one of: d1",
            ),
            (
                "height_m = 5.0 }",
                "height_m = 5.0 }\npressure = { register = \"input\", address = 0, type = \"u16\", range = [0.0, 100.0], unit = \"kPa\", reference = \"gauge\" }",
                "10:44: on device \"d1\", tank \"T1\" level (input register 0..0) overlaps tank \"T1\" pressure",
            ),
            (
                "\"vertical_cylinder\", diameter_m = 3.0, height_m = 5.0",
                "\"table\", points = [[0.0, 0.0], [1.0, 5.0], [2.0, 4.0]]",
                "9:40: tank \"T1\" geometry: the calibration table is not increasing at point 2",
            ),
            (
                "unit = \"m\"",
                "unit = \"metres\"",
                "11:106: tank \"T1\" level: unit \"metres\" is not a length unit; use one of: m, cm, mm, ft, in",
            ),
            (
                "address = \"127.0.0.1:1502\"",
                "address = 127.0.0.1:1502",
                "5:16: invalid float, expected nothing; text such as an address needs double quotes",
            ),
            (
                "diameter_m = 3.0",
                "diameter_m = -3.0",
                "9:56: tank \"T1\" geometry: diameter_m = -3 m is outside the plausible 0.05 to 200 m; give it in metres",
            ),
            // Absurd sizes, either way, at the key that says them.
            (
                "diameter_m = 3.0",
                "diameter_m = 1e308",
                "9:56: tank \"T1\" geometry: diameter_m = 1e308 m is outside the plausible 0.05 to 200 m",
            ),
            (
                "diameter_m = 3.0",
                "diameter_m = 1e-300",
                "9:56: tank \"T1\" geometry: diameter_m = 1e-300 m is outside the plausible 0.05 to 200 m",
            ),
            (
                "height_m = 5.0",
                "height_m = 5000.0",
                "9:72: tank \"T1\" geometry: height_m = 5000 m is outside the plausible 0.05 to 100 m; give it in metres (a height_m in mm would be 1000 times too large)",
            ),
            (
                "\"vertical_cylinder\", diameter_m = 3.0, height_m = 5.0",
                "\"sphere\", diameter_m = 3.0, height_m = 5.0",
                "9:61: tank \"T1\" geometry: height_m does not apply to shape \"sphere\", which takes: diameter_m; remove it",
            ),
            (
                "diameter_m = 3.0, height_m = 5.0",
                "diameter_m = 3.0",
                "9:22: tank \"T1\" geometry: shape \"vertical_cylinder\" needs height_m; add it",
            ),
            (
                "\"vertical_cylinder\", diameter_m = 3.0, height_m = 5.0",
                "\"horizontal_cylinder\", diameter_m = 2.0, length_m = 6.0, heads = \"flat\", head_depth_m = 0.5",
                "9:110: tank \"T1\" geometry: head_depth_m applies only to heads = \"ellipsoidal\"",
            ),
            (
                "\"vertical_cylinder\", diameter_m = 3.0, height_m = 5.0",
                "\"table\", points = [[0.0, 0.0], [1.0, 5.0, 7.0], [2.0, 9.0]]",
                "9:53: tank \"T1\" geometry: point 2 has 3 number(s); each point is two, [level_m, volume_m3]",
            ),
            (
                "\"vertical_cylinder\", diameter_m = 3.0, height_m = 5.0",
                "\"table\", points = [[0.0, 0.0], [1.0, 5e9]]",
                "9:53: tank \"T1\" geometry: point 2 has volume 5e9 m³, outside the plausible 0 to 3.2e6 m³",
            ),
            // Arrays of the wrong length, at the array.
            (
                "range = [0.0, 5.0]",
                "range = [0, 5, 7]",
                "11:87: tank \"T1\" level: range = [0, 5, 7] has 3 number(s); give exactly two, low then high",
            ),
            (
                "raw = [4000, 20000]",
                "raw = [4000]",
                "11:64: tank \"T1\" level: raw = [4000] has 1 number(s); give exactly two",
            ),
            // Raw spans the register type cannot hold.
            (
                "raw = [4000, 20000]",
                "raw = [4000, 70000]",
                "11:64: tank \"T1\" level: raw = [4000, 70000] does not fit a u16 register, which holds 0 to 65535",
            ),
            (
                "type = \"u16\", raw = [4000, 20000]",
                "type = \"i16\", raw = [-40000, 20000]",
                "11:64: tank \"T1\" level: raw = [-40000, 20000] does not fit a i16 register, which holds -32768 to 32767",
            ),
            (
                "type = \"u16\", raw = [4000, 20000]",
                "type = \"u32\", raw = [-1, 20000]",
                "11:64: tank \"T1\" level: raw = [-1, 20000] does not fit a u32 register, which holds 0 to 4294967295",
            ),
            (
                "raw = [4000, 20000], range = [0.0, 5.0], unit = \"m\"",
                "range = [-10.0, 5000.0], unit = \"mm\"",
                "11:66: tank \"T1\" level: range = [-10, 5000] does not fit a u16 register, which holds 0 to 65535 (without raw, the register holds the range's values themselves); add raw",
            ),
            // A level range that does not describe the tank.
            (
                "range = [0.0, 5.0]",
                "range = [0.0, 50.0]",
                "11:87: tank \"T1\" level: range reaches 50 m, but the tank is only 5 m tall; give the transmitter's span in m (for this tank at most [0, 5]), or check the unit",
            ),
            (
                "range = [0.0, 5.0]",
                "range = [6.0, 9.0]",
                "11:87: tank \"T1\" level: range 6 to 9 m does not cover the tank, which is 5 m tall",
            ),
            // Pressure and transfer ranges past any tank.
            (
                "height_m = 5.0 }",
                "height_m = 5.0 }\npressure = { register = \"input\", address = 5, type = \"f32\", range = [0.0, 5e6], unit = \"kPa\", reference = \"gauge\" }",
                "10:69: tank \"T1\" pressure: range reaches 5e6 kPa, past any tank (100000 kPa, 1000 bar)",
            ),
            (
                "height_m = 5.0 }",
                "height_m = 5.0 }\npressure = { register = \"input\", address = 5, type = \"f32\", range = [-100.0, 300.0], unit = \"kPa\", reference = \"absolute\" }",
                "10:69: tank \"T1\" pressure: range starts at -100 kPa, but an absolute transmitter reads from a full vacuum (0) up",
            ),
            (
                "height_m = 5.0 }",
                "height_m = 5.0 }\ntransfer = { register = \"input\", address = 5, type = \"f32\", range = [-1e6, 1e6], unit = \"m3/h\" }",
                "10:69: tank \"T1\" transfer: range reaches 277.7778 m³/s, past any pump or pipeline (100 m³/s is 360000 m³/h)",
            ),
            (
                "height_m = 5.0 }",
                "height_m = 5.0 }\nheadspace_kpa = -500.0",
                "10:17: tank \"T1\": headspace_kpa = -500 is not a plausible gauge pressure; give kPa above ambient, from -101.325 (a full vacuum)",
            ),
            (
                "height_m = 5.0 }",
                "height_m = 5.0 }\nsuspected_loss = \"maybe\"",
                "10:18: tank \"T1\": suspected_loss = \"maybe\" is not known; give \"alert\" (show it, the operator confirms), \"open\" (also open an event at once) or \"off\"",
            ),
            (
                "height_m = 5.0 }",
                "height_m = 5.0 }\nsuspected_loss_allowance_mm_h = -1.0",
                "10:33: tank \"T1\": suspected_loss_allowance_mm_h = -1 must be a level speed in mm/h, 0 to 1000; leave it out for 1",
            ),
            (
                "unit = \"m\" }",
                "unit = \"m\", stuck_after_s = 1.5 }",
                "11:127: tank \"T1\" level: stuck_after_s = 1.5 is shorter than two poll cycles of device \"d1\" (1000 ms each)",
            ),
            (
                "unit = \"m\" }",
                "unit = \"m\", max_rate_m_s = 0.0 }",
                "11:126: tank \"T1\" level: max_rate_m_s = 0 must be a level speed in m/s, above 0 and at most 10",
            ),
            (
                "density_kg_m3 = 840.0",
                "density_kg_m3 = 840.0, reportable_kg = [5e12]",
                "10:72: tank \"T1\": reportable quantity 5e12 kg must be a positive number of kg, at most 1e9",
            ),
            (
                "raw = [4000, 20000], ",
                "word_order = \"low_first\", ",
                "11:71: tank \"T1\" level: word_order applies only to 32-bit types",
            ),
        ];
        // Every case is tried before the test fails, so one run shows them all.
        let mut wrong = Vec::new();
        for (from, to, expected) in cases {
            assert!(BASE.contains(from), "case edits {from:?}, not in BASE");
            let text = BASE.replacen(from, to, 1);
            match parse(&text, Path::new("site.toml")) {
                Ok(_) => wrong.push(format!("accepted:\n{to}\nexpected:\n{expected}")),
                Err(e) if !e.to_string().starts_with(&format!("site.toml:{expected}")) => {
                    wrong.push(format!("got:\n{e}\nexpected:\n{expected}"))
                }
                Err(_) => {}
            }
        }
        assert!(wrong.is_empty(), "{}", wrong.join("\n\n"));
        assert!(parse(BASE, Path::new("site.toml")).is_ok());
    }

    /// A Modbus RTU device: the serial-line defaults, t3.5 as the least
    /// delay, and each wrong setting located with its fix.
    #[test]
    fn serial_devices_take_the_line_defaults_and_located_checks() {
        let serial = |keys: &str| {
            BASE.replacen(
                "address = \"127.0.0.1:1502\"",
                &format!("serial_port = \"/dev/ttyUSB0\"\n{keys}"),
                1,
            )
        };
        let config = parse(&serial(""), Path::new("site.toml")).unwrap();
        let d = &config.devices[0];
        let line = d.serial.as_ref().unwrap();
        assert_eq!(
            (line.baud_rate, line.parity, line.stop_bits, line.data_bits),
            (19_200, Parity::Even, 1, 8)
        );
        assert_eq!(d.address, "/dev/ttyUSB0");
        // 3.5 characters of 11 bits at 19200 baud: 2.005 ms.
        assert_eq!(d.inter_request_delay.as_micros(), 2005);
        let slow = parse(
            &serial("baud_rate = 9600\nparity = \"none\"\nstop_bits = 2"),
            Path::new("site.toml"),
        )
        .unwrap();
        // 3.5 x 11 bits / 9600 baud = 4.01 ms; above 19200 baud a fixed 1.75 ms.
        assert_eq!(slow.devices[0].inter_request_delay.as_micros(), 4010);
        let fast = parse(&serial("baud_rate = 115200"), Path::new("site.toml")).unwrap();
        assert_eq!(fast.devices[0].inter_request_delay.as_micros(), 1750);
        let second = "[[device]]\nid = \"d2\"\nserial_port = \"/dev/ttyUSB0\"\n";
        let cases: &[(String, &str)] = &[
            (
                serial("baud_rate = 7"),
                "6:13: baud_rate = 7 is outside 300..921600",
            ),
            (
                serial("parity = \"mark\""),
                "6:10: parity \"mark\" is not one of",
            ),
            (serial("stop_bits = 3"), "6:13: stop_bits = 3 is not 1 or 2"),
            (
                serial("data_bits = 7"),
                "6:13: data_bits = 7: Modbus RTU sends 8 data bits",
            ),
            (
                serial("baud_rate = 9600\ninter_request_delay_ms = 1.0"),
                "7:26: inter_request_delay_ms = 1 is shorter than the 3.5-character silence that ends a Modbus RTU frame (4.010417 ms at 9600 baud",
            ),
            (
                serial("baud_rate = 1200"),
                "6:13: request_timeout_ms = 500 is too short for 1200 baud",
            ),
            (
                BASE.replacen(
                    "address = \"127.0.0.1:1502\"",
                    "address = \"127.0.0.1:1502\"\nbaud_rate = 9600",
                    1,
                ),
                "6:13: device \"d1\": baud_rate applies only to a device on a serial line",
            ),
            (
                BASE.replacen(
                    "address = \"127.0.0.1:1502\"",
                    "address = \"127.0.0.1:1502\"\nserial_port = \"/dev/ttyS0\"",
                    1,
                ),
                "5:11: device \"d1\" has both address and serial_port",
            ),
            (
                BASE.replacen("address = \"127.0.0.1:1502\"", "", 1),
                "4:6: device \"d1\" says neither where it is",
            ),
            (
                serial(&format!("{second}baud_rate = 9600")),
                "8:15: device \"d2\" is on /dev/ttyUSB0 at 9600 baud, parity even, stop bits 1, but device \"d1\" on the same port says 19200 baud",
            ),
            (
                serial(second),
                "8:15: device \"d2\" has unit_id 1 on /dev/ttyUSB0, as device \"d1\" does",
            ),
        ];
        let mut wrong = Vec::new();
        for (text, expected) in cases {
            match parse(text, Path::new("site.toml")) {
                Ok(_) => wrong.push(format!("accepted:\n{text}\nexpected:\n{expected}")),
                Err(e) if !e.to_string().starts_with(&format!("site.toml:{expected}")) => {
                    wrong.push(format!("got:\n{e}\nexpected:\n{expected}"))
                }
                Err(_) => {}
            }
        }
        assert!(wrong.is_empty(), "{}", wrong.join("\n\n"));
    }

    /// The `[web]` section: absent means no server, present means loopback
    /// unless told otherwise, and a reachable address needs the opt-in.
    #[test]
    fn the_web_section_defaults_to_loopback_and_remote_needs_an_opt_in() {
        let with = |web: &str| parse(&format!("{BASE}{web}"), Path::new("site.toml"));
        assert_eq!(parse(BASE, Path::new("site.toml")).unwrap().web, None);
        let default = with("[web]\n").unwrap().web.unwrap();
        assert_eq!(default.listen.to_string(), DEFAULT_WEB_LISTEN);
        assert!(!default.is_remote());
        let local = with("[web]\nlisten = \"localhost:9000\"\n").unwrap().web;
        assert_eq!(local.unwrap().listen.to_string(), "127.0.0.1:9000");
        let v6 = with("[web]\nlisten = \"[::1]:0\"\n").unwrap().web.unwrap();
        assert!(!v6.is_remote());
        let remote = with("[web]\nlisten = \"0.0.0.0:8470\"\nallow_remote = true\n")
            .unwrap()
            .web
            .unwrap();
        assert!(remote.is_remote() && remote.allow_remote);
        // The shipped configs enable the page on loopback only.
        for file in ["config/demo.toml", "config/reference.toml"] {
            let web = load(&repo_file(file)).unwrap().web;
            assert!(web.is_some_and(|w| !w.is_remote()), "{file}");
        }

        // (section text, expected "line:column: text"); BASE is 11 lines.
        let cases: &[(&str, &str)] = &[
            (
                "[web]\nlisten = \"0.0.0.0:8470\"\n",
                "13:10: web listen = \"0.0.0.0:8470\" can be reached from other machines, and the page has no login; add allow_remote = true to [web]",
            ),
            (
                "[web]\nlisten = \"192.0.2.7:8470\"\nallow_remote = false\n",
                "13:10: web listen = \"192.0.2.7:8470\" can be reached from other machines",
            ),
            (
                "[web]\nlisten = \"responders:8470\"\n",
                "13:10: web listen = \"responders:8470\" is not an IP address and port; write it like \"127.0.0.1:8470\"",
            ),
            (
                "[web]\nlisten = \"127.0.0.1\"\n",
                "13:10: web listen = \"127.0.0.1\" is not an IP address and port",
            ),
            (
                "[web]\nlisten = \"127.0.0.1:8470\"\nport = 8470\n",
                "14:1: unknown field `port`, expected one of `listen`, `allow_remote`, `hosts`; check the spelling against config/reference.toml",
            ),
            (
                "[web]\nhosts = [\"responders.site.example\", \"http://10.0.0.5:8470/\"]\n",
                "13:37: web hosts entry \"http://10.0.0.5:8470/\" is not a host name; give names as a browser sends them",
            ),
        ];
        for (web, expected) in cases {
            let err = with(web).expect_err(expected).to_string();
            assert!(
                err.starts_with(&format!("site.toml:{expected}")),
                "got:\n{err}\nexpected:\n{expected}"
            );
        }
    }
}
