//! The site config: devices to poll, tanks and their sensors' registers.
//!
//! Two layers, as ripgrep splits its arguments: `raw` mirrors the TOML and
//! only knows types; [`validate`] turns it into a [`Config`] whose values
//! are in SI units, in range, and consistent with each other (unique ids,
//! known devices, no two values sharing a register). Every problem names
//! file:line:column, says what is wrong and how to fix it, and all problems
//! are reported at once so a config can be fixed in one pass.
//!
//! Left out: anything that needs the network (`leaktally check` probes the
//! devices separately; the daemon binds the web page's address when it
//! starts) and the defaults of the store.

mod raw;
pub mod units;

use crate::acquire::decode::{BitKind, DataType, RegisterKind, WordOrder};
use crate::model::{
    AbsolutePressure, Density, GasProperties, Geometry, Heads, Length, Mass, ModelError, MolarMass,
    Pressure, PressureTap, Temperature, Vessel, Volume,
};
use raw::{RawConfig, RawGeometry, RawHeads, RawPressureReference, RawSensor, RawTank};
use std::collections::{BTreeMap, HashMap};
use std::fmt;
use std::net::SocketAddr;
use std::ops::Range;
use std::path::{Path, PathBuf};
use std::time::Duration;
use toml::Spanned;
use units::{Quantity, Unit};

/// A validated site config.
#[derive(Debug, Clone)]
pub struct Config {
    /// Where it was read from.
    pub path: PathBuf,
    pub site_name: String,
    pub ambient: AbsolutePressure,
    pub devices: Vec<Device>,
    pub tanks: Vec<Tank>,
    /// The read-only web page, when the config has a `[web]` section.
    pub web: Option<Web>,
}

/// Where the daemon serves the read-only web page, the JSON and the metrics.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Web {
    pub listen: SocketAddr,
    /// Whether `listen` may be an address that other machines can reach.
    /// Validation refuses such an address without it, so a page with no
    /// login is never exposed by a typo.
    pub allow_remote: bool,
}

impl Web {
    /// Whether other machines can reach the page (anything but loopback;
    /// 0.0.0.0 and [::] listen on every interface).
    pub fn is_remote(&self) -> bool {
        !self.listen.ip().is_loopback()
    }
}

/// The web page's address when `[web]` gives none: loopback only.
pub const DEFAULT_WEB_LISTEN: &str = "127.0.0.1:8470";

/// A Modbus TCP server to poll.
#[derive(Debug, Clone, PartialEq)]
pub struct Device {
    pub id: String,
    /// host:port.
    pub address: String,
    pub unit_id: u8,
    pub poll_interval: Duration,
    pub request_timeout: Duration,
    /// Whether one read may span unmapped registers between mapped ones.
    pub bridge_gaps: bool,
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
    pub leak_flag: Option<Flag>,
}

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
    /// Multiplier from the engineering unit to SI.
    pub si_per_unit: f64,
    /// Readings outside this range (SI) are flagged out of range.
    pub valid_si: (f64, f64),
    pub stuck_after: Option<Duration>,
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
        (e0 + (raw - r0) * (e1 - e0) / (r1 - r0)) * self.si_per_unit
    }

    /// SI value to the raw register value (the simulator's side).
    pub fn to_raw(&self, si: f64) -> f64 {
        let (r0, r1) = self.raw_span;
        let (e0, e1) = self.engineering_span;
        r0 + (si / self.si_per_unit - e0) * (r1 - r0) / (e1 - e0)
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

/// A config that could not be read or is not valid.
#[derive(Debug)]
pub enum ConfigError {
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    Invalid {
        problems: Vec<Problem>,
    },
}

/// One thing wrong in a config file, located.
#[derive(Debug, Clone, PartialEq)]
pub struct Problem {
    pub file: String,
    pub line: usize,
    pub column: usize,
    pub message: String,
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{}:{}:{}: {}",
            self.file, self.line, self.column, self.message
        )
    }
}

impl fmt::Display for ConfigError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ConfigError::Read { path, source } => {
                write!(
                    f,
                    "cannot read the config file {}: {source}; check the path (config/reference.toml in the source tree documents the format)",
                    path.display()
                )
            }
            ConfigError::Invalid { problems } => {
                for (i, p) in problems.iter().enumerate() {
                    if i > 0 {
                        writeln!(f)?;
                    }
                    write!(f, "{p}")?;
                }
                Ok(())
            }
        }
    }
}

impl std::error::Error for ConfigError {}

/// Reads and validates a config file.
pub fn load(path: &Path) -> Result<Config, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
        path: path.to_owned(),
        source,
    })?;
    parse(&text, path)
}

/// Validates config text; `path` names it in messages.
pub fn parse(text: &str, path: &Path) -> Result<Config, ConfigError> {
    let file = path.display().to_string();
    let locate = |span: Option<Range<usize>>, message: String| {
        let (line, column) = line_col(text, span.map_or(0, |s| s.start));
        Problem {
            file: file.clone(),
            line,
            column,
            message,
        }
    };
    let raw: RawConfig = toml::from_str(text).map_err(|e| ConfigError::Invalid {
        problems: vec![locate(e.span(), parse_hint(e.message()))],
    })?;
    let mut checker = Checker {
        problems: Vec::new(),
        address_spans: HashMap::new(),
    };
    let config = checker.config(raw, path);
    if checker.problems.is_empty() {
        for (tank, role, message) in overlaps(&config) {
            let span = checker
                .address_spans
                .get(&(config.tanks[tank].id.clone(), role))
                .cloned()
                .unwrap_or(0..0);
            checker.problem(span, message);
        }
    }
    if checker.problems.is_empty() {
        Ok(config)
    } else {
        Err(ConfigError::Invalid {
            problems: checker
                .problems
                .into_iter()
                .map(|(span, msg)| locate(Some(span), msg))
                .collect(),
        })
    }
}

/// 1-based line and column of a byte offset.
pub fn line_col(text: &str, offset: usize) -> (usize, usize) {
    let mut offset = offset.min(text.len());
    while !text.is_char_boundary(offset) {
        offset -= 1;
    }
    let before = &text[..offset];
    let line = before.matches('\n').count() + 1;
    let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
    (line, column)
}

/// Adds a way out to the TOML parser's messages where it gives none.
fn parse_hint(message: &str) -> String {
    let message = message.trim_end();
    if message.starts_with("unknown field") {
        format!("{message}; check the spelling against config/reference.toml")
    } else if message.starts_with("missing field") {
        format!("{message}; add it (config/reference.toml documents every key)")
    } else if message.starts_with("invalid float") || message.starts_with("invalid number") {
        format!("{message}; text such as an address needs double quotes, as in \"192.0.2.10:502\"")
    } else if message.starts_with("unknown variant") {
        format!("{message}; use one of the listed values")
    } else {
        message.to_owned()
    }
}

/// Collects problems while building the validated config.
struct Checker {
    problems: Vec<(Range<usize>, String)>,
    /// Where each tank's mapped values are written, for the overlap check
    /// that runs once every tank is known.
    address_spans: HashMap<(String, Role), Range<usize>>,
}

impl Checker {
    fn problem(&mut self, span: Range<usize>, message: impl Into<String>) {
        self.problems.push((span, message.into()));
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
        let ambient = match raw.site.ambient_pressure_kpa {
            Some(kpa) => {
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
            None => AbsolutePressure::STANDARD_ATMOSPHERE,
        };

        let mut device_index: HashMap<String, usize> = HashMap::new();
        let mut devices = Vec::new();
        for d in raw.devices {
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
                devices.push(device);
            }
        }

        let mut tank_ids: HashMap<String, ()> = HashMap::new();
        let mut tanks = Vec::new();
        for t in raw.tanks {
            if tank_ids.insert(t.id.get_ref().clone(), ()).is_some() {
                self.problem(
                    t.id.span(),
                    format!(
                        "tank id \"{}\" is used twice; give each [[tank]] its own id",
                        t.id.get_ref()
                    ),
                );
            }
            if let Some(tank) = self.tank(t, &device_index, ambient) {
                tanks.push(tank);
            }
        }
        if tanks.is_empty() && self.problems.is_empty() {
            self.problem(
                0..0,
                "the config defines no tanks; add a [[tank]] table (see config/reference.toml)",
            );
        }
        let web = raw.web.map(|w| self.web(w));
        Config {
            path: path.to_owned(),
            site_name: raw.site.name,
            ambient,
            devices,
            tanks,
            web,
        }
    }

    fn web(&mut self, w: raw::RawWeb) -> Web {
        let default: SocketAddr = DEFAULT_WEB_LISTEN.parse().expect("a valid default");
        let Some(listen) = w.listen else {
            return Web {
                listen: default,
                allow_remote: w.allow_remote,
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
            };
        };
        let web = Web {
            listen: addr,
            allow_remote: w.allow_remote,
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

    fn device(&mut self, d: &raw::RawDevice) -> Option<Device> {
        let id = d.id.get_ref().trim().to_owned();
        if id.is_empty() {
            self.problem(
                d.id.span(),
                "device id is empty; give it a short name such as \"rtu-1\"",
            );
        }
        let address = d.address.get_ref().trim().to_owned();
        let port_ok = address.rsplit_once(':').is_some_and(|(host, port)| {
            !host.is_empty() && port.parse::<u16>().is_ok_and(|p| p > 0)
        });
        if !port_ok {
            self.problem(
                d.address.span(),
                format!("device address \"{address}\" is not host:port; write it like \"192.0.2.10:502\""),
            );
        }
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
        Some(Device {
            id,
            address,
            unit_id,
            poll_interval: Duration::from_millis(interval),
            request_timeout: Duration::from_millis(timeout),
            bridge_gaps: d.bridge_gaps,
        })
    }

    fn tank(
        &mut self,
        t: RawTank,
        devices: &HashMap<String, usize>,
        ambient: AbsolutePressure,
    ) -> Option<Tank> {
        let id = t.id.get_ref().trim().to_owned();
        let ctx = format!("tank \"{id}\"");
        if id.is_empty() {
            self.problem(
                t.id.span(),
                "tank id is empty; use the tank's tag, such as \"T-101\"",
            );
        }
        let device = devices.get(t.device.get_ref()).copied();
        if device.is_none() {
            let mut known: Vec<&str> = devices.keys().map(String::as_str).collect();
            known.sort();
            self.problem(
                t.device.span(),
                format!(
                    "{ctx}: device \"{}\" is not defined; define it in a [[device]] table or use one of: {}",
                    t.device.get_ref(),
                    if known.is_empty() { "(none defined)".to_owned() } else { known.join(", ") }
                ),
            );
        }

        let geometry = self.geometry(&t.geometry, &ctx);
        let density = Density::kg_per_cubic_metre(*t.substance.density_kg_m3.get_ref());
        let vapour = t.substance.vapour.as_ref().and_then(|v| {
            let raw = v.get_ref();
            let gas = GasProperties::new(
                MolarMass::g_per_mol(raw.molar_mass_g_mol),
                raw.heat_capacity_ratio,
                Temperature::celsius(raw.temperature_c),
            );
            self.model(v.span(), &format!("{ctx} vapour"), gas)
        });
        let vessel = geometry.and_then(|g| {
            let v = Vessel::new(g, density, ambient, vapour);
            self.model(t.substance.density_kg_m3.span(), &ctx, v)
        });

        let mut reportable = Vec::new();
        for q in &t.substance.reportable_kg {
            let kg = *q.get_ref();
            if kg.is_finite() && kg > 0.0 {
                reportable.push(Mass::kilograms(kg));
            } else {
                self.problem(
                    q.span(),
                    format!("{ctx}: reportable quantity {kg} kg must be a positive number of kg"),
                );
            }
        }
        reportable.sort_by(|a, b| a.si().total_cmp(&b.si()));

        let assumed_headspace = match &t.headspace_kpa {
            Some(kpa) if !kpa.get_ref().is_finite() || kpa.get_ref().abs() > 10_000.0 => {
                self.problem(
                    kpa.span(),
                    format!("{ctx}: headspace_kpa = {} is not a plausible gauge pressure; give kPa above ambient (0 for an open vent)", kpa.get_ref()),
                );
                Pressure::ZERO
            }
            Some(kpa) => Pressure::kilopascals(*kpa.get_ref()),
            None => Pressure::ZERO,
        };
        if let (Some(kpa), Some(_)) = (&t.headspace_kpa, &t.pressure) {
            self.problem(
                kpa.span(),
                format!("{ctx}: headspace_kpa is only for tanks without a pressure sensor; remove one of the two"),
            );
        }
        let nominal_headspace = t.nominal_headspace_kpa.as_ref().map(|kpa| {
            let value = *kpa.get_ref();
            if t.pressure.is_none() {
                self.problem(kpa.span(), format!("{ctx}: nominal_headspace_kpa is for tanks with a pressure sensor; for a tank without one, give headspace_kpa"));
            } else if !(value.is_finite() && value > -ambient.si() / 1000.0 && value <= 10_000.0) {
                self.problem(kpa.span(), format!("{ctx}: nominal_headspace_kpa = {value} is not a plausible gauge pressure; give the blanket's usual pressure in kPa above ambient"));
            }
            Pressure::kilopascals(value)
        });

        let height = vessel.as_ref().map(|v| v.geometry().height().si());
        let level = self.sensor(&t.level, &format!("{ctx} level"), Quantity::Length, density);
        let pressure = t
            .pressure
            .as_ref()
            .and_then(|p| self.pressure_sensor(p, &ctx, density, height));
        let transfer = t
            .transfer
            .as_ref()
            .and_then(|s| self.sensor(s, &format!("{ctx} transfer"), Quantity::Flow, density));
        for (name, s) in [("level", Some(&t.level)), ("transfer", t.transfer.as_ref())] {
            if let Some(s) = s {
                self.pressure_keys_only_on_pressure(s, &ctx, name);
            }
        }
        let spans = [
            (Role::Level, Some(t.level.address.span())),
            (
                Role::Pressure,
                t.pressure.as_ref().map(|s| s.address.span()),
            ),
            (
                Role::Transfer,
                t.transfer.as_ref().map(|s| s.address.span()),
            ),
            (
                Role::LeakFlag,
                t.leak_flag.as_ref().map(|f| f.address.span()),
            ),
        ];
        for (role, span) in spans {
            if let Some(span) = span {
                self.address_spans.insert((id.clone(), role), span);
            }
        }
        let leak_flag = t.leak_flag.as_ref().map(|f| Flag {
            kind: f.input,
            address: *f.address.get_ref(),
        });

        Some(Tank {
            id,
            description: t.description,
            device: device?,
            vessel: vessel?,
            substance: t.substance.name,
            reportable,
            assumed_headspace,
            nominal_headspace,
            level: level?,
            pressure,
            transfer,
            leak_flag,
        })
    }

    fn geometry(&mut self, g: &Spanned<RawGeometry>, ctx: &str) -> Option<Geometry> {
        let m = Length::metres;
        let result = match g.get_ref() {
            RawGeometry::VerticalCylinder {
                diameter_m,
                height_m,
            } => Geometry::vertical_cylinder(m(*diameter_m), m(*height_m)),
            RawGeometry::HorizontalCylinder {
                diameter_m,
                length_m,
                heads,
                head_depth_m,
            } => {
                let heads = match (heads, head_depth_m) {
                    (RawHeads::Flat, None) => Heads::Flat,
                    (RawHeads::Hemispherical, None) => Heads::Ellipsoidal {
                        depth: m(diameter_m / 2.0),
                    },
                    (RawHeads::Ellipsoidal, Some(depth)) => Heads::Ellipsoidal { depth: m(*depth) },
                    (RawHeads::Ellipsoidal, None) => {
                        self.problem(
                            g.span(),
                            format!("{ctx}: ellipsoidal heads need head_depth_m (a quarter of the diameter for 2:1 heads)"),
                        );
                        return None;
                    }
                    (_, Some(_)) => {
                        self.problem(
                            g.span(),
                            format!("{ctx}: head_depth_m applies only to heads = \"ellipsoidal\"; remove it or change the heads"),
                        );
                        return None;
                    }
                };
                Geometry::horizontal_cylinder(m(*diameter_m), m(*length_m), heads)
            }
            RawGeometry::Sphere { diameter_m } => Geometry::sphere(m(*diameter_m)),
            RawGeometry::Table { points } => {
                let points: Vec<(Length, Volume)> = points
                    .iter()
                    .map(|&(h, v)| (m(h), Volume::cubic_metres(v)))
                    .collect();
                Geometry::calibration_table(&points)
            }
        };
        self.model(g.span(), &format!("{ctx} geometry"), result)
    }

    fn sensor(
        &mut self,
        s: &RawSensor,
        ctx: &str,
        quantity: Quantity,
        density: Density,
    ) -> Option<Sensor> {
        let data_type = *s.data_type.get_ref();
        let word_order = match (&s.word_order, data_type.width()) {
            (Some(order), 1) => {
                self.problem(
                    order.span(),
                    format!(
                        "{ctx}: word_order applies only to 32-bit types (u32, i32, f32); remove it"
                    ),
                );
                WordOrder::default()
            }
            (Some(order), _) => *order.get_ref(),
            (None, _) => WordOrder::default(),
        };
        let unit = match Unit::parse(s.unit.get_ref()) {
            Some(u) if u.quantity() == quantity => Some(u),
            Some(_) | None => {
                self.problem(
                    s.unit.span(),
                    format!(
                        "{ctx}: unit \"{}\" is not a {} unit; use one of: {}",
                        s.unit.get_ref(),
                        quantity.name(),
                        Unit::names(quantity).join(", ")
                    ),
                );
                None
            }
        };
        let (e0, e1) = *s.range.get_ref();
        if !(e0.is_finite() && e1.is_finite() && e1 > e0) {
            self.problem(
                s.range.span(),
                format!("{ctx}: range = [{e0}, {e1}] must be two finite numbers, low then high"),
            );
        }
        let raw_span = match &s.raw {
            Some(raw) => {
                let (r0, r1) = *raw.get_ref();
                if !(r0.is_finite() && r1.is_finite() && r0 != r1) {
                    self.problem(
                        raw.span(),
                        format!("{ctx}: raw = [{r0}, {r1}] must be two different finite numbers"),
                    );
                }
                (r0, r1)
            }
            // Unscaled: the register holds the engineering value itself.
            None => (e0, e1),
        };
        let stuck_after = match &s.stuck_after_s {
            Some(secs) if secs.get_ref().is_finite() && *secs.get_ref() > 0.0 => {
                Some(Duration::from_secs_f64(*secs.get_ref()))
            }
            Some(secs) => {
                self.problem(
                    secs.span(),
                    format!(
                        "{ctx}: stuck_after_s = {} must be a positive number of seconds",
                        secs.get_ref()
                    ),
                );
                None
            }
            None => None,
        };
        let unit = unit?;
        let si_per_unit = unit.si_factor(density);
        let valid = (e0 * si_per_unit, e1 * si_per_unit);
        Some(Sensor {
            register: s.register,
            address: *s.address.get_ref(),
            data_type,
            word_order,
            raw_span,
            engineering_span: (e0, e1),
            unit: s.unit.get_ref().clone(),
            si_per_unit,
            valid_si: (valid.0.min(valid.1), valid.0.max(valid.1)),
            stuck_after,
        })
    }

    fn pressure_sensor(
        &mut self,
        s: &RawSensor,
        ctx: &str,
        density: Density,
        height: Option<f64>,
    ) -> Option<PressureSensor> {
        let pctx = format!("{ctx} pressure");
        let absolute = match &s.reference {
            Some(r) => *r.get_ref() == RawPressureReference::Absolute,
            None => {
                self.problem(
                    s.unit.span(),
                    format!("{pctx}: say whether the transmitter reads gauge or absolute: add reference = \"gauge\" or \"absolute\""),
                );
                false
            }
        };
        let tap = match &s.tap_elevation_m {
            None => PressureTap::Headspace,
            Some(z) => {
                let zv = *z.get_ref();
                if !zv.is_finite() || zv < 0.0 || height.is_some_and(|h| zv > h) {
                    self.problem(
                        z.span(),
                        format!(
                            "{pctx}: tap_elevation_m = {zv} is not on the tank; give the tap's height above the tank bottom (0 to {} m), or leave it out for a headspace transmitter",
                            height.unwrap_or(f64::NAN)
                        ),
                    );
                }
                PressureTap::Submerged {
                    elevation: Length::metres(zv),
                }
            }
        };
        let sensor = self.sensor(s, &pctx, Quantity::Pressure, density)?;
        Some(PressureSensor {
            sensor,
            absolute,
            tap,
        })
    }

    fn pressure_keys_only_on_pressure(&mut self, s: &RawSensor, ctx: &str, name: &str) {
        if let Some(r) = &s.reference {
            self.problem(
                r.span(),
                format!("{ctx} {name}: reference applies only to the pressure sensor; remove it"),
            );
        }
        if let Some(z) = &s.tap_elevation_m {
            self.problem(
                z.span(),
                format!(
                    "{ctx} {name}: tap_elevation_m applies only to the pressure sensor; remove it"
                ),
            );
        }
    }
}

/// Which register each value of a device occupies, for overlap checks and
/// read planning: (kind, first register, registers) per tank and role.
pub fn register_map(config: &Config, device: usize) -> Vec<MappedValue<'_>> {
    let mut out = Vec::new();
    for (tank_index, tank) in config
        .tanks
        .iter()
        .enumerate()
        .filter(|(_, t)| t.device == device)
    {
        let mut add = |role: Role, sensor: &Sensor| {
            out.push(MappedValue {
                tank: tank_index,
                tank_id: &tank.id,
                role,
                kind: Table::Registers(sensor.register),
                start: u32::from(sensor.address),
                count: u32::from(sensor.data_type.width()),
            })
        };
        add(Role::Level, &tank.level);
        if let Some(p) = &tank.pressure {
            add(Role::Pressure, &p.sensor);
        }
        if let Some(s) = &tank.transfer {
            add(Role::Transfer, s);
        }
        if let Some(f) = &tank.leak_flag {
            out.push(MappedValue {
                tank: tank_index,
                tank_id: &tank.id,
                role: Role::LeakFlag,
                kind: Table::Bits(f.kind),
                start: u32::from(f.address),
                count: 1,
            });
        }
    }
    out
}

/// What a mapped value is for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Role {
    Level,
    Pressure,
    Transfer,
    LeakFlag,
}

impl Role {
    pub fn name(self) -> &'static str {
        match self {
            Role::Level => "level",
            Role::Pressure => "pressure",
            Role::Transfer => "transfer",
            Role::LeakFlag => "leak flag",
        }
    }
}

/// A Modbus table: registers of a kind, or bits of a kind.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Table {
    Registers(RegisterKind),
    Bits(BitKind),
}

impl Table {
    pub fn name(self) -> &'static str {
        match self {
            Table::Registers(RegisterKind::Holding) => "holding register",
            Table::Registers(RegisterKind::Input) => "input register",
            Table::Bits(BitKind::Coil) => "coil",
            Table::Bits(BitKind::DiscreteInput) => "discrete input",
        }
    }
}

/// One value's place in a device's tables.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MappedValue<'a> {
    pub tank: usize,
    pub tank_id: &'a str,
    pub role: Role,
    pub kind: Table,
    pub start: u32,
    pub count: u32,
}

impl MappedValue<'_> {
    pub fn end(&self) -> u32 {
        self.start + self.count
    }
}

/// Finds values that share a register on the same device, and values whose
/// last register is past 65535: (tank index, role, message) for each.
pub fn overlaps(config: &Config) -> Vec<(usize, Role, String)> {
    let mut out = Vec::new();
    for (d, device) in config.devices.iter().enumerate() {
        let mut by_table: BTreeMap<Table, Vec<MappedValue>> = BTreeMap::new();
        for v in register_map(config, d) {
            if v.end() > 65_536 {
                out.push((
                    v.tank,
                    v.role,
                    format!(
                        "tank \"{}\" {}: {} {} runs past the last address 65535; move it lower",
                        v.tank_id,
                        v.role.name(),
                        v.kind.name(),
                        v.start
                    ),
                ));
            }
            by_table.entry(v.kind).or_default().push(v);
        }
        for (table, mut values) in by_table {
            values.sort_by_key(|v| v.start);
            for pair in values.windows(2) {
                let (a, b) = (pair[0], pair[1]);
                if b.start < a.end() {
                    out.push((b.tank, b.role, format!(
                        "on device \"{}\", tank \"{}\" {} ({} {}..{}) overlaps tank \"{}\" {} ({} {}..{}); give each value its own registers",
                        device.id,
                        a.tank_id,
                        a.role.name(),
                        table.name(),
                        a.start,
                        a.end() - 1,
                        b.tank_id,
                        b.role.name(),
                        table.name(),
                        b.start,
                        b.end() - 1
                    )));
                }
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn repo_file(rel: &str) -> PathBuf {
        Path::new(env!("CARGO_MANIFEST_DIR")).join("..").join(rel)
    }

    #[test]
    fn every_config_in_the_config_folder_loads() {
        let dir = repo_file("config");
        let mut seen = 0;
        for entry in std::fs::read_dir(&dir).unwrap() {
            let path = entry.unwrap().path();
            if path.extension().is_some_and(|e| e == "toml") {
                let config = load(&path).unwrap_or_else(|e| panic!("{}:\n{e}", path.display()));
                assert!(!config.tanks.is_empty());
                seen += 1;
            }
        }
        assert!(seen >= 2, "expected the demo and the reference config");
    }

    const BASE: &str = r#"[site]
name = "x"
[[device]]
id = "d1"
address = "127.0.0.1:1502"
[[tank]]
id = "T1"
device = "d1"
geometry = { shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }
substance = { name = "diesel", density_kg_m3 = 840.0 }
level = { register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m" }
"#;

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
                "9:12: tank \"T1\" geometry: the calibration table is not increasing at point 2",
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
                "9:12: tank \"T1\" geometry: tank diameter must be greater than zero",
            ),
            (
                "raw = [4000, 20000], ",
                "word_order = \"low_first\", ",
                "11:71: tank \"T1\" level: word_order applies only to 32-bit types",
            ),
        ];
        for (from, to, expected) in cases {
            assert!(BASE.contains(from), "case edits {from:?}, not in BASE");
            let text = BASE.replacen(from, to, 1);
            let err = parse(&text, Path::new("site.toml"))
                .expect_err(expected)
                .to_string();
            assert!(
                err.starts_with(&format!("site.toml:{expected}")),
                "got:\n{err}\nexpected:\n{expected}"
            );
        }
        assert!(parse(BASE, Path::new("site.toml")).is_ok());
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
                "14:1: unknown field `port`, expected `listen` or `allow_remote`; check the spelling against config/reference.toml",
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

    #[test]
    fn every_problem_is_reported_at_once() {
        let text = BASE
            .replace("unit = \"m\"", "unit = \"yards\"")
            .replace("diameter_m = 3.0", "diameter_m = 0.0");
        let ConfigError::Invalid { problems } = parse(&text, Path::new("s.toml")).unwrap_err()
        else {
            panic!("expected problems");
        };
        assert_eq!(problems.len(), 2, "{problems:?}");
    }

    /// `nominal_headspace_kpa`: only beside a pressure sensor, and a
    /// plausible gauge pressure.
    #[test]
    fn a_nominal_headspace_needs_a_pressure_sensor_and_a_plausible_value() {
        let pressure = "height_m = 5.0 }\npressure = { register = \"input\", address = 5, type = \"u16\", range = [0.0, 100.0], unit = \"kPa\", reference = \"gauge\" }";
        let with = |key: &str| BASE.replacen("height_m = 5.0 }", &format!("{pressure}\n{key}"), 1);
        let tank = parse(
            &with("nominal_headspace_kpa = 15.0"),
            Path::new("site.toml"),
        )
        .unwrap()
        .tanks
        .remove(0);
        assert_eq!(tank.nominal_headspace, Some(Pressure::kilopascals(15.0)));
        let cases = [
            (
                BASE.replacen(
                    "height_m = 5.0 }",
                    "height_m = 5.0 }\nnominal_headspace_kpa = 15.0",
                    1,
                ),
                "site.toml:10:25: tank \"T1\": nominal_headspace_kpa is for tanks with a pressure sensor; for a tank without one, give headspace_kpa",
            ),
            (
                with("nominal_headspace_kpa = -150.0"),
                "site.toml:11:25: tank \"T1\": nominal_headspace_kpa = -150 is not a plausible gauge pressure",
            ),
        ];
        for (text, expected) in cases {
            let err = parse(&text, Path::new("site.toml"))
                .unwrap_err()
                .to_string();
            assert!(
                err.starts_with(expected),
                "got:\n{err}\nexpected:\n{expected}"
            );
        }
        assert_eq!(
            parse(BASE, Path::new("site.toml")).unwrap().tanks[0].nominal_headspace,
            None
        );
    }

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
