//! Turning the file as written (`raw`) into the validated [`Config`]: every
//! check a value must pass, the plausible limits that refuse unit slips and
//! typos, and the defaults that stand in for what a file leaves out. Each
//! problem is noted at the span of the text that says it, and checking
//! goes on, so that one pass finds them all.
//!
//! Left out: the validated types themselves (`types`), rendering problems
//! at file:line:column (`problems`), and which registers a device's values
//! occupy (`register_map`, whose overlaps are located here).

use super::problems::Problems;
use super::raw::{
    self, RawConfig, RawGeometry, RawHeads, RawPressureReference, RawSensor, RawShape, RawTank,
};
use super::register_map::overlaps;
use super::types::{
    Config, DEFAULT_DENSITY_UNCERTAINTY, DEFAULT_LEVEL_ACCURACY_FRACTION_OF_SPAN,
    DEFAULT_LEVEL_ACCURACY_MIN_M, DEFAULT_PRESSURE_ACCURACY_FRACTION_OF_SPAN,
    DEFAULT_PRESSURE_ACCURACY_MIN_PA, DEFAULT_TEMPERATURE_ACCURACY_K, DEFAULT_TRANSFER_ACCURACY,
    DEFAULT_WEB_LISTEN, Device, Flag, HostName, PressureSensor, REFERENCE_TEMPERATURE_C, Role,
    Sensor, Tank, Uncertainty, Web,
};
use super::units::{Quantity, Unit};
use crate::model::{
    AbsolutePressure, Density, DensityModel, GasProperties, Geometry, Heads, Length, Mass,
    ModelError, MolarMass, Pressure, PressureTap, Temperature, Vessel, Volume,
};
use crate::registers::{DataType, WordOrder};
use std::collections::HashMap;
use std::net::SocketAddr;
use std::ops::Range;
use std::path::Path;
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
            if let Some(tank) = self.tank(t, &device_index, &devices, ambient) {
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
        device_list: &[Device],
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
            if kg.is_finite() && kg > 0.0 && kg <= MAX_REPORTABLE_KG {
                reportable.push(Mass::kilograms(kg));
            } else {
                self.problem(
                    q.span(),
                    format!(
                        "{ctx}: reportable quantity {} kg must be a positive number of kg, at most {} (a million tonnes)",
                        shown(kg),
                        shown(MAX_REPORTABLE_KG)
                    ),
                );
            }
        }
        reportable.sort_by(|a, b| a.si().total_cmp(&b.si()));

        let assumed_headspace = match &t.headspace_kpa {
            Some(kpa)
                if !kpa.get_ref().is_finite()
                    || kpa.get_ref().abs() > 10_000.0
                    || *kpa.get_ref() * 1000.0 < -ambient.si() =>
            {
                self.problem(
                    kpa.span(),
                    format!(
                        "{ctx}: headspace_kpa = {} is not a plausible gauge pressure; give kPa above ambient, from {:.3} (a full vacuum) to 10000 (0 for an open vent)",
                        shown(*kpa.get_ref()),
                        -ambient.si() / 1000.0
                    ),
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
        let temperature = t.temperature.as_ref().and_then(|s| {
            self.sensor(
                s,
                &format!("{ctx} temperature"),
                Quantity::Temperature,
                density,
            )
        });
        for (name, s) in [
            ("level", Some(&t.level)),
            ("transfer", t.transfer.as_ref()),
            ("temperature", t.temperature.as_ref()),
        ] {
            if let Some(s) = s {
                self.pressure_keys_only_on_pressure(s, &ctx, name);
            }
        }
        let density_model = self.density_model(&t.substance, &ctx, density);
        if density_model.follows_temperature() && t.temperature.is_none() {
            let span = t
                .substance
                .expansion_per_c
                .as_ref()
                .map(|s| s.span())
                .or_else(|| t.substance.density_table.as_ref().map(|s| s.span()))
                .unwrap_or(0..0);
            self.problem(
                span,
                format!("{ctx}: the density follows temperature, but the tank has no temperature sensor; add a temperature = {{ ... }} sensor, or remove the expansion data"),
            );
        }
        let density_uncertainty = match &t.substance.density_uncertainty_pct {
            Some(pct) if !(pct.get_ref().is_finite() && (0.0..=20.0).contains(pct.get_ref())) => {
                self.problem(
                    pct.span(),
                    format!("{ctx}: density_uncertainty_pct = {} is outside 0 to 20 %; give how far the density may be from the truth, in per cent (1 for a product known from its specification)", pct.get_ref()),
                );
                None
            }
            Some(pct) => Some(Uncertainty {
                bound: pct.get_ref() / 100.0,
                relative: true,
                stated: true,
            }),
            None => Some(Uncertainty {
                bound: DEFAULT_DENSITY_UNCERTAINTY,
                relative: true,
                stated: false,
            }),
        };
        if let (Some(level), Some(height)) = (&level, height) {
            self.level_inside_tank(&t.level, level, &ctx, height);
        }
        if let Some(transfer) = &transfer {
            let (lo, hi) = transfer.valid_si;
            let top = MAX_UNMETERED_TRANSFER_M3_S;
            if lo.abs().max(hi.abs()) > top {
                let span = t.transfer.as_ref().map_or(0..0, |s| s.range.span());
                self.problem(
                    span,
                    format!(
                        "{ctx} transfer: range reaches {} m³/s, past any pump or pipeline ({top} m³/s is {} m³/h); check the range and its unit",
                        shown(lo.abs().max(hi.abs())),
                        top * 3600.0
                    ),
                );
            }
        }
        let max_level_rate = self.max_level_rate(&t, &ctx);
        if let Some(d) = device {
            let sensors = [
                ("level", Some(&t.level)),
                ("pressure", t.pressure.as_ref()),
                ("transfer", t.transfer.as_ref()),
            ];
            for (name, s) in sensors {
                if let Some(s) = s {
                    self.stuck_after_poll(s, &ctx, name, &device_list[d]);
                }
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
                Role::Temperature,
                t.temperature.as_ref().map(|s| s.address.span()),
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
            temperature,
            leak_flag,
            density: density_model,
            density_uncertainty: density_uncertainty?,
            max_level_rate,
        })
    }

    /// How the density follows temperature: an expansion coefficient at a
    /// reference temperature, a table, or neither (a constant).
    fn density_model(
        &mut self,
        substance: &raw::RawSubstance,
        ctx: &str,
        density: Density,
    ) -> DensityModel {
        let constant = DensityModel::Constant(density);
        match (&substance.expansion_per_c, &substance.density_table) {
            (Some(beta), Some(table)) => {
                self.problem(
                    table.span(),
                    format!("{ctx}: give either expansion_per_c or density_table, not both"),
                );
                let _ = beta;
                constant
            }
            (Some(beta), None) => {
                let at = substance
                    .reference_temperature_c
                    .as_ref()
                    .map_or(REFERENCE_TEMPERATURE_C, |t| *t.get_ref());
                let model =
                    DensityModel::expansion(density, Temperature::celsius(at), *beta.get_ref());
                self.model(beta.span(), &format!("{ctx} expansion_per_c"), model)
                    .unwrap_or(constant)
            }
            (None, Some(table)) => {
                if let Some(t) = &substance.reference_temperature_c {
                    self.problem(
                        t.span(),
                        format!("{ctx}: reference_temperature_c goes with expansion_per_c; a density_table carries its own temperatures, so remove it"),
                    );
                }
                let points = table
                    .get_ref()
                    .iter()
                    .map(|&(c, rho)| (Temperature::celsius(c), Density::kg_per_cubic_metre(rho)))
                    .collect();
                let model = DensityModel::table(points);
                self.model(table.span(), &format!("{ctx} density_table"), model)
                    .unwrap_or(constant)
            }
            (None, None) => {
                if let Some(t) = &substance.reference_temperature_c {
                    self.problem(
                        t.span(),
                        format!("{ctx}: reference_temperature_c needs expansion_per_c beside it; add the expansion coefficient or remove the key"),
                    );
                }
                constant
            }
        }
    }

    /// A level sensor's range must describe this tank: a span far past its
    /// top, or one that misses it, is a unit or scaling slip (mm taken for
    /// m, or a transmitter's factory range). Up to twice the tank's height
    /// is allowed, since a gauge is often ranged past the tank it sits on.
    fn level_inside_tank(&mut self, raw: &RawSensor, level: &Sensor, ctx: &str, height: f64) {
        let (lo, hi) = level.valid_si;
        let unit = &level.unit;
        let in_unit = |m: f64| shown(m / level.si_per_unit);
        if hi > 2.0 * height + 0.1 {
            self.problem(
                raw.range.span(),
                format!(
                    "{ctx} level: range reaches {} m, but the tank is only {} m tall; give the transmitter's span in {unit} (for this tank at most [{}, {}]), or check the unit",
                    shown(hi),
                    shown(height),
                    in_unit(lo.max(0.0)),
                    in_unit(height)
                ),
            );
        } else if lo < -height || lo >= height || hi <= 0.0 {
            self.problem(
                raw.range.span(),
                format!(
                    "{ctx} level: range {} to {} m does not cover the tank, which is {} m tall; levels are measured up from the tank's lowest inside point, so a range such as [0, {}] {unit} is expected",
                    shown(lo),
                    shown(hi),
                    shown(height),
                    in_unit(height)
                ),
            );
        }
    }

    /// `max_rate_m_s`, which only the level takes.
    fn max_level_rate(&mut self, t: &RawTank, ctx: &str) -> Option<f64> {
        for (name, s) in [
            ("pressure", t.pressure.as_ref()),
            ("transfer", t.transfer.as_ref()),
        ] {
            if let Some(rate) = s.and_then(|s| s.max_rate_m_s.as_ref()) {
                self.problem(
                    rate.span(),
                    format!(
                        "{ctx} {name}: max_rate_m_s applies only to the level sensor; remove it"
                    ),
                );
            }
        }
        let rate = t.level.max_rate_m_s.as_ref()?;
        let v = *rate.get_ref();
        if v.is_finite() && v > 0.0 && v <= MAX_LEVEL_RATE_M_S {
            Some(v)
        } else {
            self.problem(
                rate.span(),
                format!(
                    "{ctx} level: max_rate_m_s = {} must be a level speed in m/s, above 0 and at most {MAX_LEVEL_RATE_M_S}; leave it out to use the limit worked out from the tank",
                    shown(v)
                ),
            );
            None
        }
    }

    /// A stuck check shorter than two poll cycles would flag every reading
    /// of a quiet tank: the value has no chance to change between polls.
    fn stuck_after_poll(&mut self, s: &RawSensor, ctx: &str, name: &str, device: &Device) {
        let Some(secs) = &s.stuck_after_s else { return };
        let v = *secs.get_ref();
        let two_cycles = 2.0 * device.poll_interval.as_secs_f64();
        if v.is_finite() && v > 0.0 && v < two_cycles {
            self.problem(
                secs.span(),
                format!(
                    "{ctx} {name}: stuck_after_s = {} is shorter than two poll cycles of device \"{}\" ({} ms each), so a quiet reading would be flagged stuck; give at least {two_cycles} s (minutes suit most gauges)",
                    shown(v),
                    device.id,
                    device.poll_interval.as_millis()
                ),
            );
        }
    }

    fn geometry(&mut self, g: &Spanned<RawGeometry>, ctx: &str) -> Option<Geometry> {
        let raw = g.get_ref();
        let shape = *raw.shape.get_ref();
        let name = shape.name();
        let gctx = format!("{ctx} geometry");
        let (required, optional) = shape.keys();
        let present: [(&str, Option<Range<usize>>); 6] = [
            ("diameter_m", raw.diameter_m.as_ref().map(Spanned::span)),
            ("height_m", raw.height_m.as_ref().map(Spanned::span)),
            ("length_m", raw.length_m.as_ref().map(Spanned::span)),
            ("heads", raw.heads.as_ref().map(Spanned::span)),
            ("head_depth_m", raw.head_depth_m.as_ref().map(Spanned::span)),
            ("points", raw.points.as_ref().map(Spanned::span)),
        ];
        let mut ok = true;
        for (key, span) in present {
            match span {
                Some(span) if !required.contains(&key) && !optional.contains(&key) => {
                    let takes: Vec<&str> = required.iter().chain(optional).copied().collect();
                    self.problem(
                        span,
                        format!(
                            "{gctx}: {key} does not apply to shape \"{name}\", which takes: {}; remove it",
                            takes.join(", ")
                        ),
                    );
                    ok = false;
                }
                None if required.contains(&key) => {
                    self.problem(
                        raw.shape.span(),
                        format!("{gctx}: shape \"{name}\" needs {key}; add it (config/reference.toml shows each shape)"),
                    );
                    ok = false;
                }
                _ => {}
            }
        }
        let m = Length::metres;
        let mut dimension = |value: &Option<Spanned<f64>>, what: &str, (lo, hi): (f64, f64)| {
            let v = value.as_ref()?;
            let x = *v.get_ref();
            if x.is_finite() && (lo..=hi).contains(&x) {
                Some(x)
            } else {
                self.problem(
                    v.span(),
                    format!(
                        "{gctx}: {what} = {} m is outside the plausible {lo} to {hi} m; give it in metres (a {what} in mm would be 1000 times too large)",
                        shown(x)
                    ),
                );
                ok = false;
                None
            }
        };
        let result = match shape {
            RawShape::VerticalCylinder => {
                let d = dimension(&raw.diameter_m, "diameter_m", VERTICAL_DIAMETER_M);
                let h = dimension(&raw.height_m, "height_m", TANK_HEIGHT_M);
                Geometry::vertical_cylinder(m(d?), m(h?))
            }
            RawShape::HorizontalCylinder => {
                let d = dimension(&raw.diameter_m, "diameter_m", HORIZONTAL_DIAMETER_M);
                let l = dimension(&raw.length_m, "length_m", HORIZONTAL_LENGTH_M);
                let depth = dimension(&raw.head_depth_m, "head_depth_m", HEAD_DEPTH_M);
                let heads = raw.heads.as_ref().map_or(RawHeads::Flat, |h| *h.get_ref());
                let (d, l) = (d?, l?);
                let heads = match (heads, depth, &raw.head_depth_m) {
                    (_, None, Some(_)) => return None, // said above
                    (RawHeads::Flat, None, None) => Heads::Flat,
                    (RawHeads::Hemispherical, None, None) => {
                        Heads::Ellipsoidal { depth: m(d / 2.0) }
                    }
                    (RawHeads::Ellipsoidal, Some(depth), _) => {
                        Heads::Ellipsoidal { depth: m(depth) }
                    }
                    (RawHeads::Ellipsoidal, None, None) => {
                        self.problem(
                            raw.heads.as_ref().map_or(g.span(), Spanned::span),
                            format!("{gctx}: ellipsoidal heads need head_depth_m (a quarter of the diameter for 2:1 heads)"),
                        );
                        return None;
                    }
                    (_, Some(_), Some(span)) => {
                        self.problem(
                            span.span(),
                            format!("{gctx}: head_depth_m applies only to heads = \"ellipsoidal\"; remove it or change the heads"),
                        );
                        return None;
                    }
                    (_, Some(_), None) => return None, // cannot happen: a depth has its key
                };
                Geometry::horizontal_cylinder(m(d), m(l), heads)
            }
            RawShape::Sphere => {
                let d = dimension(&raw.diameter_m, "diameter_m", SPHERE_DIAMETER_M);
                Geometry::sphere(m(d?))
            }
            RawShape::Table => {
                let points = self.table_points(raw.points.as_ref()?, &gctx)?;
                let located = raw.points.as_ref().map_or(g.span(), Spanned::span);
                return self.model(located, &gctx, Geometry::calibration_table(&points));
            }
        };
        if !ok {
            return None;
        }
        self.model(g.span(), &gctx, result)
    }

    /// A strapping table's points: each exactly [level_m, volume_m3], both
    /// within what a tank can be; the model checks the order.
    fn table_points(
        &mut self,
        points: &Spanned<Vec<Spanned<Vec<f64>>>>,
        gctx: &str,
    ) -> Option<Vec<(Length, Volume)>> {
        if points.get_ref().len() > MAX_TABLE_POINTS {
            self.problem(
                points.span(),
                format!(
                    "{gctx}: the table has {} points; at most {MAX_TABLE_POINTS} are read (thin it: the volume is interpolated linearly between points)",
                    points.get_ref().len()
                ),
            );
            return None;
        }
        let mut out = Vec::with_capacity(points.get_ref().len());
        let mut ok = true;
        for (i, point) in points.get_ref().iter().enumerate() {
            let n = i + 1;
            let &[h, v] = point.get_ref().as_slice() else {
                self.problem(
                    point.span(),
                    format!(
                        "{gctx}: point {n} has {} number(s); each point is two, [level_m, volume_m3]",
                        point.get_ref().len()
                    ),
                );
                ok = false;
                continue;
            };
            let (h_lo, h_hi) = (0.0, TANK_HEIGHT_M.1);
            if !(h.is_finite() && (h_lo..=h_hi).contains(&h)) {
                self.problem(
                    point.span(),
                    format!(
                        "{gctx}: point {n} has level {} m, outside the plausible {h_lo} to {h_hi} m; give levels in metres above the tank's lowest point",
                        shown(h)
                    ),
                );
                ok = false;
            }
            if !(v.is_finite() && (0.0..=MAX_TABLE_VOLUME_M3).contains(&v)) {
                self.problem(
                    point.span(),
                    format!(
                        "{gctx}: point {n} has volume {} m³, outside the plausible 0 to {} m³; give volumes in cubic metres (litres would be 1000 times too large)",
                        shown(v),
                        shown(MAX_TABLE_VOLUME_M3)
                    ),
                );
                ok = false;
            }
            out.push((Length::metres(h), Volume::cubic_metres(v)));
        }
        ok.then_some(out)
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
        let stuck_after = match &s.stuck_after_s {
            Some(secs) if (f64::MIN_POSITIVE..=MAX_STUCK_AFTER_S).contains(secs.get_ref()) => {
                Some(Duration::from_secs_f64(*secs.get_ref()))
            }
            Some(secs) => {
                self.problem(
                    secs.span(),
                    format!(
                        "{ctx}: stuck_after_s = {} must be a positive number of seconds, at most {MAX_STUCK_AFTER_S} (a week)",
                        shown(*secs.get_ref())
                    ),
                );
                None
            }
            None => None,
        };
        let (e0, e1) = self.pair(&s.range, ctx, "range", "low then high")?;
        if !(e0.is_finite() && e1.is_finite() && e1 > e0) {
            self.problem(
                s.range.span(),
                format!(
                    "{ctx}: range = [{}, {}] must be two finite numbers, low then high",
                    shown(e0),
                    shown(e1)
                ),
            );
        }
        let raw_span = match &s.raw {
            Some(raw) => {
                let (r0, r1) = self.pair(
                    raw,
                    ctx,
                    "raw",
                    "the raw values at the low and high ends of range",
                )?;
                if !(r0.is_finite() && r1.is_finite() && r0 != r1) {
                    self.problem(
                        raw.span(),
                        format!(
                            "{ctx}: raw = [{}, {}] must be two different finite numbers",
                            shown(r0),
                            shown(r1)
                        ),
                    );
                } else {
                    self.raw_fits(raw.span(), ctx, data_type, (r0, r1), "raw");
                }
                (r0, r1)
            }
            // Unscaled: the register holds the engineering value itself, so
            // the range is what the register must be able to hold.
            None => {
                if e0.is_finite() && e1.is_finite() {
                    self.raw_fits(s.range.span(), ctx, data_type, (e0, e1), "range");
                }
                (e0, e1)
            }
        };
        let unit = unit?;
        let si_per_unit = unit.si_factor(density);
        let si_offset = unit.si_offset();
        let valid = (e0 * si_per_unit + si_offset, e1 * si_per_unit + si_offset);
        let accuracy = self.accuracy(s, ctx, quantity, (valid.1 - valid.0).abs())?;
        Some(Sensor {
            register: s.register,
            address: *s.address.get_ref(),
            data_type,
            word_order,
            raw_span,
            engineering_span: (e0, e1),
            unit: s.unit.get_ref().clone(),
            si_per_unit,
            si_offset,
            valid_si: (valid.0.min(valid.1), valid.0.max(valid.1)),
            stuck_after,
            accuracy,
        })
    }

    /// A two-number array such as `range` or `raw`: exactly two, since a
    /// third is a mistake worth saying (perhaps a missing key) rather than
    /// a number to drop.
    fn pair(
        &mut self,
        value: &Spanned<Vec<f64>>,
        ctx: &str,
        key: &str,
        meaning: &str,
    ) -> Option<(f64, f64)> {
        match value.get_ref().as_slice() {
            &[a, b] => Some((a, b)),
            other => {
                let listed: Vec<String> = other.iter().map(|&x| shown(x)).collect();
                self.problem(
                    value.span(),
                    format!(
                        "{ctx}: {key} = [{}] has {} number(s); give exactly two, {meaning}",
                        listed.join(", "),
                        other.len()
                    ),
                );
                None
            }
        }
    }

    /// Raw values must be ones the register type can hold: a u16 cannot
    /// read 70000, nor an unsigned type a negative count.
    fn raw_fits(
        &mut self,
        span: Range<usize>,
        ctx: &str,
        data_type: DataType,
        (r0, r1): (f64, f64),
        key: &str,
    ) {
        let (lo, hi, name) = match data_type {
            DataType::U16 => (0.0, f64::from(u16::MAX), "u16"),
            DataType::I16 => (f64::from(i16::MIN), f64::from(i16::MAX), "i16"),
            DataType::U32 => (0.0, f64::from(u32::MAX), "u32"),
            DataType::I32 => (f64::from(i32::MIN), f64::from(i32::MAX), "i32"),
            DataType::F32 => (-f64::from(f32::MAX), f64::from(f32::MAX), "f32"),
        };
        // The integer limits exactly, as a datasheet gives them.
        let limit = |x: f64| match data_type {
            DataType::F32 => shown(x),
            _ => format!("{x}"),
        };
        if r0.min(r1) < lo || r0.max(r1) > hi {
            let fix = if key == "range" {
                "add raw = [low, high] with the register's own values, or pick a type that holds these values"
            } else {
                "give the register's values at the ends of range, or pick a type that holds them"
            };
            self.problem(
                span,
                format!(
                    "{ctx}: {key} = [{}, {}] does not fit a {name} register, which holds {} to {}{}; {fix}",
                    shown(r0),
                    shown(r1),
                    limit(lo),
                    limit(hi),
                    if key == "range" { " (without raw, the register holds the range's values themselves)" } else { "" }
                ),
            );
        }
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
        let (lo, hi) = sensor.valid_si;
        let kpa = |pa: f64| shown(pa / 1000.0);
        if lo.abs().max(hi.abs()) > MAX_PRESSURE_PA {
            self.problem(
                s.range.span(),
                format!(
                    "{pctx}: range reaches {} kPa, past any tank ({} kPa, 1000 bar); check the range and its unit",
                    kpa(lo.abs().max(hi.abs())),
                    kpa(MAX_PRESSURE_PA)
                ),
            );
        } else if absolute && lo < 0.0 {
            self.problem(
                s.range.span(),
                format!(
                    "{pctx}: range starts at {} kPa, but an absolute transmitter reads from a full vacuum (0) up; start the range at 0 or above, or say reference = \"gauge\" if it reads relative to ambient",
                    kpa(lo)
                ),
            );
        } else if !absolute && lo < -crate::model::vessel::AMBIENT_RANGE.1 {
            self.problem(
                s.range.span(),
                format!(
                    "{pctx}: range starts at {} kPa gauge, below a full vacuum (about -101 kPa); check the range, or say reference = \"absolute\" if it reads from a vacuum",
                    kpa(lo)
                ),
            );
        }
        Some(PressureSensor {
            sensor,
            absolute,
            tap,
        })
    }

    /// The sensor's accuracy: its own key (one per kind of sensor, in the
    /// unit data sheets use), or the default for its kind.
    fn accuracy(
        &mut self,
        s: &RawSensor,
        ctx: &str,
        quantity: Quantity,
        span_si: f64,
    ) -> Option<Uncertainty> {
        // (key, its value, SI per unit of the key, relative, plausible max in the key's unit)
        let keys = [
            (
                "accuracy_mm",
                &s.accuracy_mm,
                Quantity::Length,
                0.001,
                false,
                1000.0,
            ),
            (
                "accuracy_kpa",
                &s.accuracy_kpa,
                Quantity::Pressure,
                1000.0,
                false,
                1000.0,
            ),
            (
                "accuracy_pct",
                &s.accuracy_pct,
                Quantity::Flow,
                0.01,
                true,
                50.0,
            ),
            (
                "accuracy_c",
                &s.accuracy_c,
                Quantity::Temperature,
                1.0,
                false,
                50.0,
            ),
        ];
        let mut found = None;
        let mut ok = true;
        for (key, value, for_quantity, factor, relative, max) in keys {
            let Some(value) = value else { continue };
            let v = *value.get_ref();
            if for_quantity != quantity {
                let right = keys.iter().find(|k| k.2 == quantity).map_or("", |k| k.0);
                self.problem(
                    value.span(),
                    format!("{ctx}: {key} is for a {} sensor; a {} sensor states its accuracy as {right}", for_quantity.name(), quantity.name()),
                );
                ok = false;
            } else if !(v.is_finite() && v > 0.0 && v <= max) {
                self.problem(
                    value.span(),
                    format!("{ctx}: {key} = {v} is outside (0, {max}]; give the accuracy from the instrument's data sheet"),
                );
                ok = false;
            } else {
                found = Some(Uncertainty {
                    bound: v * factor,
                    relative,
                    stated: true,
                });
            }
        }
        if !ok {
            return None;
        }
        Some(
            found.unwrap_or(match quantity {
                Quantity::Length => Uncertainty {
                    bound: (DEFAULT_LEVEL_ACCURACY_FRACTION_OF_SPAN * span_si)
                        .max(DEFAULT_LEVEL_ACCURACY_MIN_M),
                    relative: false,
                    stated: false,
                },
                Quantity::Pressure => Uncertainty {
                    bound: (DEFAULT_PRESSURE_ACCURACY_FRACTION_OF_SPAN * span_si)
                        .max(DEFAULT_PRESSURE_ACCURACY_MIN_PA),
                    relative: false,
                    stated: false,
                },
                Quantity::Flow => Uncertainty {
                    bound: DEFAULT_TRANSFER_ACCURACY,
                    relative: true,
                    stated: false,
                },
                Quantity::Temperature => Uncertainty {
                    bound: DEFAULT_TEMPERATURE_ACCURACY_K,
                    relative: false,
                    stated: false,
                },
            }),
        )
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
}
