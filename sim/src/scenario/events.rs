//! The scripted events: [`Event`] and [`EventKind`], which keys each
//! action takes, and the checks of an `[[event]]`: its keys against its
//! action's (a key that does not apply, or one missing, is said the same
//! way for every action), its time, its tank, a leak's hole
//! ([`HoleSpec`]), a transfer's flow and the leak flag.
//!
//! Left out: what the values of a sensor or device fault mean and their
//! checks (`faults`, to which the sensor and device actions are handed),
//! and playing the events (`plant`).

use super::Checker;
use super::faults::{Fault, Refusal, SensorRole};
use super::raw::{Action, RawEvent};
use leaktally::model::Length;
use std::ops::Range;
use toml::Spanned;

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

/// A hole as the scenario gives it, in SI.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HoleSpec {
    pub diameter_m: f64,
    /// Height of the hole above the tank bottom.
    pub height_m: f64,
    pub cd: f64,
}

/// The default discharge coefficient: a sharp-edged hole (common practice).
pub const DEFAULT_CD: f64 = 0.61;

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

impl Checker<'_> {
    /// One `[[event]]`, checked: its keys against its action's, its time,
    /// its tank, and what its action needs; `None` after a problem.
    pub(super) fn event(&mut self, e: &RawEvent) -> Option<Event> {
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
            | Action::SensorRecovers => self.sensor_fault(e, action, tank?)?,
            Action::LinkDrops => self.link_drops(e)?,
            Action::DeviceSlows => self.device_slows(e)?,
            Action::DeviceRefuses => self.device_refuses(e)?,
            Action::DeviceMiscounts => self.device_miscounts(e)?,
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
    use crate::scenario::testing::{TANKS, demo_dir, messages};

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
    fn event_mistakes_get_clear_messages() {
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
    }
}
