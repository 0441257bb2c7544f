//! The scenario file: which site to serve, how each tank starts (with its
//! headspace held, or a gas space with an optional blanket supply), and the
//! scripted events (a leak opening, pump transfers, sensor faults, dropped
//! links, devices that refuse reads or answer with the wrong number of
//! values, the leak flag).
//!
//! As in the agent's config, a raw serde layer mirrors the TOML and a
//! validation pass turns it into a [`Scenario`] in SI units, naming
//! file:line:column for every problem and reporting all problems at once.
//! The site itself (devices, tanks, registers) is the agent's own config,
//! loaded with `leaktally::config::load`, so the simulator and the agent
//! cannot disagree on a register address.
//!
//! Left out: anything that runs the scenario (see `plant`) and any physics
//! beyond what validation needs (the tank height, for the hole and level
//! checks).

mod problems;
mod raw;
mod tanks;
#[cfg(test)]
mod testing;

pub use problems::ScenarioError;
pub use tanks::TankSetup;

use leaktally::config::{self, Config};
use leaktally::model::Length;
use raw::{Action, RawEvent, RawScenario};
use serde::Deserialize;
use std::collections::HashMap;
use std::ops::Range;
use std::path::{Path, PathBuf};
use toml::Spanned;

/// A validated scenario.
#[derive(Debug, Clone)]
pub struct Scenario {
    /// Where it was read from.
    pub path: PathBuf,
    /// The agent config whose devices and registers the simulator serves.
    pub site: Config,
    /// The physics time step, ms; it divides 100 so truth rows fall on steps.
    pub step_ms: u64,
    /// Seed of the sensor noise.
    pub seed: u64,
    /// How each tank starts, index-aligned with `site.tanks`.
    pub tanks: Vec<TankSetup>,
    /// The script, sorted by time (stable, so same-time events keep their
    /// file order).
    pub events: Vec<Event>,
}

/// One scripted event.
#[derive(Debug, Clone, PartialEq)]
pub struct Event {
    /// Seconds after the simulator starts.
    pub at_s: f64,
    pub kind: EventKind,
}

/// What happens. Tanks and devices are indices into the site config.
#[derive(Debug, Clone, PartialEq)]
pub enum EventKind {
    /// A hole opens; a second one on the same tank replaces the first (a
    /// hole that grows), since the simulator models one hole per tank.
    LeakOpens {
        tank: usize,
        hole: HoleSpec,
    },
    LeakCloses {
        tank: usize,
    },
    /// Net flow into the tank, m³/s (negative out).
    TransferStarts {
        tank: usize,
        flow_m3_s: f64,
    },
    TransferStops {
        tank: usize,
    },
    SensorFault {
        tank: usize,
        sensor: SensorRole,
        fault: Fault,
    },
    /// Requests for the device get no reply for this long.
    LinkDrops {
        device: usize,
        duration_s: f64,
    },
    /// For this long, the device answers every request only after a delay
    /// (a congested radio link or an overloaded gateway).
    DeviceSlows {
        device: usize,
        duration_s: f64,
        reply_delay_ms: u64,
    },
    /// Sets (true) or clears the tank's leak flag bit.
    Flag {
        tank: usize,
        raised: bool,
    },
    /// For this long (`None`: for the rest of the run), the device answers
    /// reads with a Modbus exception: all of them, or those that touch one
    /// span of one table (a register the device does not have).
    DeviceRefuses {
        device: usize,
        duration_s: Option<f64>,
        refusal: Refusal,
    },
    /// For this long (`None`: for the rest of the run), the device answers
    /// reads with this many values more (or, negative, fewer) than asked.
    DeviceMiscounts {
        device: usize,
        duration_s: Option<f64>,
        extra_values: i16,
    },
}

/// An exception a device answers with, and to which reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Refusal {
    /// The exception code, 1 to 255 (Modbus defines 1 to 4, 5, 6, 8, 10, 11).
    pub code: u8,
    /// Only reads of this table that touch `start..start + count`; all
    /// reads when `None`.
    pub only: Option<(SimTable, u16, u16)>,
}

impl Refusal {
    /// Whether a read of `count` values of `table` from `start` is refused.
    pub fn applies(&self, table: SimTable, start: u16, count: u16) -> bool {
        match self.only {
            None => true,
            Some((t, from, n)) => {
                let (a, b) = (u32::from(start), u32::from(start) + u32::from(count));
                let (c, d) = (u32::from(from), u32::from(from) + u32::from(n));
                t == table && a < d && c < b
            }
        }
    }
}

/// A device's four tables, as a scenario names them.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SimTable {
    Holding,
    Input,
    Coil,
    DiscreteInput,
}

/// A hole as the scenario gives it, in SI.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HoleSpec {
    pub diameter_m: f64,
    /// Height of the hole above the tank bottom.
    pub height_m: f64,
    pub cd: f64,
}

/// Which of a tank's sensors a fault event means.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SensorRole {
    Level,
    Pressure,
    Transfer,
    Temperature,
}

impl SensorRole {
    pub const ALL: [SensorRole; 4] = [
        SensorRole::Level,
        SensorRole::Pressure,
        SensorRole::Transfer,
        SensorRole::Temperature,
    ];

    pub fn name(self) -> &'static str {
        match self {
            SensorRole::Level => "level",
            SensorRole::Pressure => "pressure",
            SensorRole::Transfer => "transfer",
            SensorRole::Temperature => "temperature",
        }
    }

    /// Position in per-tank arrays.
    pub fn index(self) -> usize {
        self as usize
    }
}

/// What a sensor's registers show.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub enum Fault {
    /// The live value.
    #[default]
    None,
    /// Frozen at the words they held when the fault began.
    Stuck,
    /// NaN for f32, the type's largest value for integers.
    Garbage,
    /// A fixed value, SI (m, Pa, m³/s), encoded as the sensor encodes any
    /// reading: a transmitter that fails to a wrong value, say past its
    /// range.
    Reads(f64),
}

/// The default discharge coefficient: a sharp-edged hole (common practice).
pub const DEFAULT_CD: f64 = 0.61;
const DEFAULT_STEP_MS: i64 = 10;
const DEFAULT_SEED: u64 = 1;

impl Action {
    /// The keys besides `at_s` and `action` that the action requires,
    /// and those it also accepts.
    pub fn keys(self) -> (&'static [&'static str], &'static [&'static str]) {
        match self {
            Action::LeakOpens => (&["tank", "diameter_mm", "height_m"], &["cd"]),
            Action::TransferStarts => (&["tank", "flow_m3_h"], &[]),
            Action::SensorSticks | Action::SensorGarbage | Action::SensorRecovers => {
                (&["tank", "sensor"], &[])
            }
            Action::SensorReads => (&["tank", "sensor", "value_si"], &[]),
            Action::LinkDrops => (&["device", "duration_s"], &[]),
            Action::DeviceSlows => (&["device", "duration_s", "reply_delay_ms"], &[]),
            Action::DeviceRefuses => (
                &["device", "exception_code"],
                &["duration_s", "table", "address", "count"],
            ),
            Action::DeviceMiscounts => (&["device", "extra_values"], &["duration_s"]),
            Action::LeakCloses | Action::TransferStops | Action::RaiseFlag | Action::LowerFlag => {
                (&["tank"], &[])
            }
        }
    }
}

/// Reads and validates a scenario file, and the site config it names.
pub fn load(path: &Path) -> Result<Scenario, ScenarioError> {
    let text = std::fs::read_to_string(path).map_err(|source| ScenarioError::Read {
        path: path.to_owned(),
        source,
    })?;
    parse(&text, path)
}

/// Validates scenario text; `path` names it in messages and anchors the
/// relative `site` path.
pub fn parse(text: &str, path: &Path) -> Result<Scenario, ScenarioError> {
    let file = path.display().to_string();
    let raw: RawScenario =
        toml::from_str(text).map_err(|e| problems::unparsable(text, &file, &e))?;

    // The site path is relative to the scenario file, so a scenario and its
    // site can move together and the simulator runs from any directory.
    let base = path.parent().unwrap_or_else(|| Path::new(""));
    let site_path = base.join(raw.site.get_ref());
    let site = config::load(&site_path).map_err(|source| ScenarioError::Site {
        at: problems::locate(
            text,
            &file,
            raw.site.span(),
            format!("the site config \"{}\" does not load:", raw.site.get_ref()),
        ),
        source,
    })?;

    let mut checker = Checker {
        problems: Vec::new(),
        site: &site,
    };
    let (step_ms, tanks, events) = checker.scenario(&raw);
    if checker.problems.is_empty() {
        Ok(Scenario {
            path: path.to_owned(),
            step_ms,
            seed: raw.seed.unwrap_or(DEFAULT_SEED),
            tanks,
            events,
            site,
        })
    } else {
        Err(problems::invalid(text, &file, checker.problems))
    }
}

struct Checker<'a> {
    problems: Vec<(Range<usize>, String)>,
    site: &'a Config,
}

impl Checker<'_> {
    fn problem(&mut self, span: Range<usize>, message: impl Into<String>) {
        self.problems.push((span, message.into()));
    }

    fn scenario(&mut self, raw: &RawScenario) -> (u64, Vec<TankSetup>, Vec<Event>) {
        let step_ms = match &raw.step_ms {
            None => DEFAULT_STEP_MS,
            Some(s) => {
                let v = *s.get_ref();
                if !(1..=100).contains(&v) || 100 % v != 0 {
                    self.problem(
                        s.span(),
                        format!(
                            "step_ms = {v} must divide 100 (1, 2, 4, 5, 10, 20, 25, 50 or 100), so the 100 ms truth rows fall on steps; 10 suits most scenarios"
                        ),
                    );
                    DEFAULT_STEP_MS
                } else {
                    v
                }
            }
        };
        self.unique_unit_ids(raw.site.span());
        let tanks = self.tanks(&raw.tanks, raw.site.span());
        let mut events: Vec<Event> = raw.events.iter().filter_map(|e| self.event(e)).collect();
        events.sort_by(|a, b| a.at_s.total_cmp(&b.at_s));
        (step_ms as u64, tanks, events)
    }

    /// The simulator serves every device on one listener and tells them
    /// apart by unit id alone, so two devices may not share one.
    fn unique_unit_ids(&mut self, site_span: Range<usize>) {
        let mut seen: HashMap<u8, &str> = HashMap::new();
        for d in &self.site.devices {
            if let Some(first) = seen.insert(d.unit_id, &d.id) {
                let message = format!(
                    "devices \"{first}\" and \"{}\" of the site both have unit_id {}; the simulator serves all devices on one listener and routes requests by unit id, so give each device its own unit_id",
                    d.id, d.unit_id
                );
                self.problem(site_span.clone(), message);
            }
        }
    }

    fn event(&mut self, e: &RawEvent) -> Option<Event> {
        let action = *e.action.get_ref();
        let name = action.name();
        let (required, optional) = action.keys();
        let present: [(&str, Option<Range<usize>>); 15] = [
            ("tank", e.tank.as_ref().map(Spanned::span)),
            ("device", e.device.as_ref().map(Spanned::span)),
            ("sensor", e.sensor.as_ref().map(Spanned::span)),
            ("diameter_mm", e.diameter_mm.as_ref().map(Spanned::span)),
            ("height_m", e.height_m.as_ref().map(Spanned::span)),
            ("cd", e.cd.as_ref().map(Spanned::span)),
            ("flow_m3_h", e.flow_m3_h.as_ref().map(Spanned::span)),
            ("duration_s", e.duration_s.as_ref().map(Spanned::span)),
            ("value_si", e.value_si.as_ref().map(Spanned::span)),
            (
                "reply_delay_ms",
                e.reply_delay_ms.as_ref().map(Spanned::span),
            ),
            (
                "exception_code",
                e.exception_code.as_ref().map(Spanned::span),
            ),
            ("table", e.table.as_ref().map(Spanned::span)),
            ("address", e.address.as_ref().map(Spanned::span)),
            ("count", e.count.as_ref().map(Spanned::span)),
            ("extra_values", e.extra_values.as_ref().map(Spanned::span)),
        ];
        let mut ok = true;
        for (key, span) in &present {
            match span {
                Some(span) if !required.contains(key) && !optional.contains(key) => {
                    let takes: Vec<&str> = required.iter().chain(optional).copied().collect();
                    self.problem(
                        span.clone(),
                        format!(
                            "{key} does not apply to action \"{name}\", which takes: {}; remove it",
                            takes.join(", ")
                        ),
                    );
                    ok = false;
                }
                None if required.contains(key) => {
                    self.problem(
                        e.action.span(),
                        format!("action \"{name}\" needs {key}; add it to this [[event]]"),
                    );
                    ok = false;
                }
                _ => {}
            }
        }
        let at_s = *e.at_s.get_ref();
        if !(at_s.is_finite() && at_s >= 0.0) {
            self.problem(
                e.at_s.span(),
                format!("at_s = {at_s} must be zero or more seconds after the simulator starts"),
            );
            ok = false;
        }
        if !ok {
            return None;
        }

        // The keys are known to be there from here on.
        let tank = match &e.tank {
            Some(t) => Some(self.tank_index(t)?),
            None => None,
        };
        let kind = match action {
            Action::LeakOpens => {
                let tank = tank?;
                EventKind::LeakOpens {
                    tank,
                    hole: self.hole(e, tank)?,
                }
            }
            Action::LeakCloses => EventKind::LeakCloses { tank: tank? },
            Action::TransferStarts => {
                let flow = e.flow_m3_h.as_ref()?;
                if !flow.get_ref().is_finite() {
                    self.problem(
                        flow.span(),
                        "flow_m3_h must be a finite number of m³/h, positive into the tank",
                    );
                    return None;
                }
                EventKind::TransferStarts {
                    tank: tank?,
                    flow_m3_s: *flow.get_ref() / 3600.0,
                }
            }
            Action::TransferStops => EventKind::TransferStops { tank: tank? },
            Action::SensorSticks
            | Action::SensorGarbage
            | Action::SensorReads
            | Action::SensorRecovers => {
                let tank = tank?;
                let sensor = e.sensor.as_ref()?;
                let t = &self.site.tanks[tank];
                let mapped = match sensor.get_ref() {
                    SensorRole::Level => true,
                    SensorRole::Pressure => t.pressure.is_some(),
                    SensorRole::Transfer => t.transfer.is_some(),
                    SensorRole::Temperature => t.temperature.is_some(),
                };
                if !mapped {
                    self.problem(
                        sensor.span(),
                        format!(
                            "tank \"{}\" has no {} sensor in the site config; pick one it has",
                            t.id,
                            sensor.get_ref().name()
                        ),
                    );
                    return None;
                }
                let fault = match action {
                    Action::SensorSticks => Fault::Stuck,
                    Action::SensorGarbage => Fault::Garbage,
                    Action::SensorReads => {
                        let value = e.value_si.as_ref()?;
                        let v = *value.get_ref();
                        if !v.is_finite() {
                            self.problem(
                                value.span(),
                                "value_si must be a finite number in SI units (m, Pa, m³/s); use sensor_garbage for NaN",
                            );
                            return None;
                        }
                        Fault::Reads(v)
                    }
                    _ => Fault::None,
                };
                EventKind::SensorFault {
                    tank,
                    sensor: *sensor.get_ref(),
                    fault,
                }
            }
            Action::LinkDrops => {
                let (device, duration_s) = self.outage(e)?;
                EventKind::LinkDrops { device, duration_s }
            }
            Action::DeviceSlows => {
                let outage = self.outage(e);
                let delay = e.reply_delay_ms.as_ref()?;
                let reply_delay_ms = *delay.get_ref();
                if reply_delay_ms == 0 || reply_delay_ms > 60_000 {
                    self.problem(
                        delay.span(),
                        format!("reply_delay_ms = {reply_delay_ms} must be 1 to 60000 ms"),
                    );
                    return None;
                }
                let (device, duration_s) = outage?;
                EventKind::DeviceSlows {
                    device,
                    duration_s,
                    reply_delay_ms,
                }
            }
            Action::DeviceRefuses => {
                let (device, duration_s) = self.device_spell(e)?;
                let code = e.exception_code.as_ref()?;
                if *code.get_ref() == 0 {
                    self.problem(
                        code.span(),
                        "exception_code = 0 is not an exception; give 1 to 255 (2 is illegal data address, 6 device busy, 11 gateway target failed to respond)",
                    );
                    return None;
                }
                let only = match (&e.table, &e.address) {
                    (None, None) if e.count.is_none() => None,
                    (Some(table), Some(address)) => {
                        let count = e.count.as_ref().map_or(1, |c| *c.get_ref());
                        if count == 0 {
                            let span = e.count.as_ref().map_or(0..0, Spanned::span);
                            self.problem(
                                span,
                                "count = 0 refuses nothing; give 1 or more registers (or bits)",
                            );
                            return None;
                        }
                        Some((*table.get_ref(), *address.get_ref(), count))
                    }
                    _ => {
                        self.problem(
                            e.action.span(),
                            "device_refuses takes table and address together (with an optional count), to refuse only reads that touch them; give both, or neither to refuse every read",
                        );
                        return None;
                    }
                };
                EventKind::DeviceRefuses {
                    device,
                    duration_s,
                    refusal: Refusal {
                        code: *code.get_ref(),
                        only,
                    },
                }
            }
            Action::DeviceMiscounts => {
                let (device, duration_s) = self.device_spell(e)?;
                let extra = e.extra_values.as_ref()?;
                let n = *extra.get_ref();
                if n == 0 || n.abs() > 10 {
                    self.problem(
                        extra.span(),
                        format!("extra_values = {n} must be -10 to 10 and not 0: how many values a reply has more (or fewer) than asked"),
                    );
                    return None;
                }
                EventKind::DeviceMiscounts {
                    device,
                    duration_s,
                    extra_values: n as i16,
                }
            }
            Action::RaiseFlag | Action::LowerFlag => {
                let tank = tank?;
                if self.site.tanks[tank].leak_flag.is_none() {
                    let span = e.tank.as_ref().map_or(0..0, Spanned::span);
                    self.problem(
                        span,
                        format!(
                            "tank \"{}\" has no leak_flag in the site config, so there is no bit to {}; map one or remove this event",
                            self.site.tanks[tank].id,
                            if action == Action::RaiseFlag { "raise" } else { "lower" }
                        ),
                    );
                    return None;
                }
                EventKind::Flag {
                    tank,
                    raised: action == Action::RaiseFlag,
                }
            }
        };
        Some(Event { at_s, kind })
    }

    /// The device and the optional duration of a refusal or miscount.
    fn device_spell(&mut self, e: &RawEvent) -> Option<(usize, Option<f64>)> {
        let device = e.device.as_ref()?;
        let index = self
            .site
            .devices
            .iter()
            .position(|d| d.id == *device.get_ref());
        if index.is_none() {
            let known: Vec<&str> = self.site.devices.iter().map(|d| d.id.as_str()).collect();
            self.problem(
                device.span(),
                format!(
                    "device \"{}\" is not in the site config; use one of: {}",
                    device.get_ref(),
                    known.join(", ")
                ),
            );
        }
        let duration = match &e.duration_s {
            None => None,
            Some(d) if d.get_ref().is_finite() && *d.get_ref() > 0.0 => Some(*d.get_ref()),
            Some(d) => {
                self.problem(
                    d.span(),
                    format!(
                        "duration_s = {} must be a positive number of seconds (leave it out for the rest of the run)",
                        d.get_ref()
                    ),
                );
                return None;
            }
        };
        Some((index?, duration))
    }

    /// The device and duration of a link event, checked.
    fn outage(&mut self, e: &RawEvent) -> Option<(usize, f64)> {
        let device = e.device.as_ref()?;
        let duration = e.duration_s.as_ref()?;
        let index = self
            .site
            .devices
            .iter()
            .position(|d| d.id == *device.get_ref());
        if index.is_none() {
            let known: Vec<&str> = self.site.devices.iter().map(|d| d.id.as_str()).collect();
            self.problem(
                device.span(),
                format!(
                    "device \"{}\" is not in the site config; use one of: {}",
                    device.get_ref(),
                    known.join(", ")
                ),
            );
        }
        let d = *duration.get_ref();
        if !(d.is_finite() && d > 0.0) {
            self.problem(
                duration.span(),
                format!("duration_s = {d} must be a positive number of seconds"),
            );
            return None;
        }
        Some((index?, d))
    }

    fn hole(&mut self, e: &RawEvent, tank: usize) -> Option<HoleSpec> {
        let t = &self.site.tanks[tank];
        let top = t.vessel.geometry().height().si();
        let (diameter, height) = (e.diameter_mm.as_ref()?, e.height_m.as_ref()?);
        let mut ok = true;
        let d = *diameter.get_ref();
        if !(d.is_finite() && d > 0.0) {
            self.problem(
                diameter.span(),
                format!("diameter_mm = {d} must be a positive number of mm"),
            );
            ok = false;
        }
        let z = *height.get_ref();
        if !z.is_finite() || z < 0.0 {
            self.problem(
                height.span(),
                format!(
                    "height_m = {z} must be the hole's height above the tank bottom, 0 to {top} m"
                ),
            );
            ok = false;
        } else if z > top {
            self.problem(
                height.span(),
                format!(
                    "height_m = {z} puts the hole above the top of tank \"{}\" ({top} m); give its height above the tank bottom, 0 to {top} m",
                    t.id
                ),
            );
            ok = false;
        }
        let cd = match &e.cd {
            None => DEFAULT_CD,
            Some(cd) => {
                let v = *cd.get_ref();
                if !(v > 0.0 && v <= 1.0) {
                    self.problem(
                        cd.span(),
                        format!("cd = {v} is outside (0, 1]; about 0.61 suits a sharp-edged hole, 1.0 a smooth nozzle"),
                    );
                    ok = false;
                }
                v
            }
        };
        ok.then_some(HoleSpec {
            diameter_m: Length::millimetres(d).si(),
            height_m: z,
            cd,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scenario::testing::{TANKS, demo_dir, messages, parse_here};

    #[test]
    fn the_demo_scenario_loads_and_events_are_sorted() {
        let s = load(&demo_dir().join("demo.toml")).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(s.tanks.len(), 3);
        assert_eq!(s.tanks[1].headspace_pa, 15_000.0);
        assert!(s.events.windows(2).all(|w| w[0].at_s <= w[1].at_s));
        assert!(matches!(
            s.events[0].kind,
            EventKind::LeakOpens { tank: 0, .. }
        ));

        let text = format!(
            "{TANKS}
[[event]]
at_s = 9.0
action = \"leak_closes\"
tank = \"FF-T12\"
[[event]]
at_s = 2
action = \"leak_opens\"
tank = \"FF-T12\"
diameter_mm = 25
height_m = 0.3
"
        );
        let s = parse_here(&text).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(s.events[0].at_s, 2.0);
        let EventKind::LeakOpens { hole, .. } = s.events[0].kind else {
            panic!("{:?}", s.events[0]);
        };
        assert_eq!((hole.diameter_m, hole.cd), (0.025, DEFAULT_CD));
    }

    #[test]
    fn a_hole_above_the_tank_is_refused_with_the_tank_height() {
        let text = format!(
            "{TANKS}
[[event]]
at_s = 1.0
action = \"leak_opens\"
tank = \"FF-T12\"
diameter_mm = 40.0
height_m = 6.0
cd = 1.2
"
        );
        let msg = messages(&text);
        assert!(
            msg.contains(
                "test.toml:20:12: height_m = 6 puts the hole above the top of tank \"FF-T12\" (5 m)"
            ),
            "{msg}"
        );
        assert!(
            msg.contains("test.toml:21:6: cd = 1.2 is outside (0, 1]"),
            "{msg}"
        );
    }

    #[test]
    fn refusals_and_miscounts_load_and_their_mistakes_are_said() {
        let ok = parse_here(&format!(
            "{}[[event]]\nat_s = 0.0\naction = \"device_refuses\"\ndevice = \"rtu-east\"\nexception_code = 2\ntable = \"holding\"\naddress = 500\ncount = 2\n\
             [[event]]\nat_s = 3.0\naction = \"device_miscounts\"\ndevice = \"rtu-west\"\nextra_values = -1\nduration_s = 2.0\n",
            TANKS
        ))
        .unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(
            ok.events[0].kind,
            EventKind::DeviceRefuses {
                device: 0,
                duration_s: None,
                refusal: Refusal {
                    code: 2,
                    only: Some((SimTable::Holding, 500, 2)),
                },
            }
        );
        let r = Refusal {
            code: 2,
            only: Some((SimTable::Holding, 500, 2)),
        };
        assert!(r.applies(SimTable::Holding, 490, 11) && r.applies(SimTable::Holding, 501, 1));
        assert!(!r.applies(SimTable::Holding, 490, 10) && !r.applies(SimTable::Input, 500, 1));
        assert_eq!(
            ok.events[1].kind,
            EventKind::DeviceMiscounts {
                device: 1,
                duration_s: Some(2.0),
                extra_values: -1,
            }
        );
        for (event, expected) in [
            (
                "action = \"device_refuses\"\ndevice = \"rtu-east\"\nexception_code = 2\naddress = 5\n",
                "device_refuses takes table and address together",
            ),
            (
                "action = \"device_refuses\"\ndevice = \"rtu-east\"\nexception_code = 0\n",
                "exception_code = 0 is not an exception",
            ),
            (
                "action = \"device_miscounts\"\ndevice = \"rtu-east\"\nextra_values = 40\n",
                "extra_values = 40 must be -10 to 10 and not 0",
            ),
        ] {
            let text = format!("{TANKS}[[event]]\nat_s = 1.0\n{event}");
            let msg = messages(&text);
            assert!(msg.contains(expected), "{msg}");
        }
    }

    #[test]
    fn other_mistakes_get_clear_messages() {
        let cases: &[(&str, &str)] = &[
            (
                "[[event]]\nat_s = -1.0\naction = \"leak_closes\"\ntank = \"FF-T12\"\n",
                "at_s = -1 must be zero or more seconds",
            ),
            (
                "[[event]]\nat_s = 1.0\naction = \"leak_opens\"\ntank = \"FF-T12\"\nheight_m = 0.3\n",
                "action \"leak_opens\" needs diameter_mm",
            ),
            (
                "[[event]]\nat_s = 1.0\naction = \"transfer_stops\"\ntank = \"FF-T12\"\nflow_m3_h = 3.0\n",
                "flow_m3_h does not apply to action \"transfer_stops\", which takes: tank; remove it",
            ),
            (
                "[[event]]\nat_s = 1.0\naction = \"sensor_sticks\"\ntank = \"FF-T12\"\nsensor = \"pressure\"\n",
                "tank \"FF-T12\" has no pressure sensor in the site config",
            ),
            (
                "[[event]]\nat_s = 1.0\naction = \"link_drops\"\ndevice = \"rtu-north\"\nduration_s = 8\n",
                "device \"rtu-north\" is not in the site config; use one of: rtu-east, rtu-west",
            ),
            (
                "[[event]]\nat_s = 1.0\naction = \"raise_flag\"\ntank = \"FF-T20\"\n",
                "tank \"FF-T20\" has no leak_flag in the site config",
            ),
            (
                "[[event]]\nat_s = 1.0\naction = \"leak_bursts\"\n",
                "unknown variant `leak_bursts`",
            ),
        ];
        for (event, expected) in cases {
            let msg = messages(&format!("{TANKS}{event}"));
            assert!(msg.contains(expected), "{event}\n=> {msg}");
            assert!(
                msg.starts_with(&demo_dir().join("test.toml").display().to_string()),
                "{msg}"
            );
        }
        let msg = messages(&TANKS.replace(
            "site = \"../../config/demo.toml\"",
            "site = \"nowhere.toml\"\nstep_ms = 3",
        ));
        assert!(
            msg.contains("test.toml:2:8: the site config \"nowhere.toml\" does not load"),
            "{msg}"
        );
        let msg = messages(&TANKS.replace(
            "site = \"../../config/demo.toml\"",
            "site = \"../../config/demo.toml\"\nstep_ms = 3",
        ));
        assert!(
            msg.contains("test.toml:3:11: step_ms = 3 must divide 100"),
            "{msg}"
        );
    }
}
