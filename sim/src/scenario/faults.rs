//! The faults a scenario scripts and the checks of their values: on a
//! sensor ([`SensorRole`], [`Fault`]: stuck, garbage, a fixed wrong value,
//! recovered), which must be one the site maps for the tank; and on a
//! device, which must be one the site has: a dropped link, late replies, a
//! Modbus exception for all reads or those touching one span
//! ([`Refusal`], [`SimTable`]), replies with the wrong number of values,
//! each with its duration, delay, exception code, span or miscount checked.
//!
//! Left out: the keys each action takes and the event's time and tank,
//! checked for every event in `events`, which hands the fault actions
//! here; and how a fault shows in the registers and replies (`plant`,
//! `service`).

use super::Checker;
use super::events::EventKind;
use super::raw::{Action, RawEvent};
use serde::Deserialize;
use toml::Spanned;

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

impl Checker<'_> {
    /// A sensor fault on `tank`, whose sensor must be one the site maps
    /// for the tank.
    pub(super) fn sensor_fault(
        &mut self,
        e: &RawEvent,
        action: Action,
        tank: usize,
    ) -> Option<EventKind> {
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
        Some(EventKind::SensorFault {
            tank,
            sensor: *sensor.get_ref(),
            fault,
        })
    }

    pub(super) fn link_drops(&mut self, e: &RawEvent) -> Option<EventKind> {
        let (device, duration_s) = self.outage(e)?;
        Some(EventKind::LinkDrops { device, duration_s })
    }

    pub(super) fn device_slows(&mut self, e: &RawEvent) -> Option<EventKind> {
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
        Some(EventKind::DeviceSlows {
            device,
            duration_s,
            reply_delay_ms,
        })
    }

    pub(super) fn device_refuses(&mut self, e: &RawEvent) -> Option<EventKind> {
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
        Some(EventKind::DeviceRefuses {
            device,
            duration_s,
            refusal: Refusal {
                code: *code.get_ref(),
                only,
            },
        })
    }

    pub(super) fn device_miscounts(&mut self, e: &RawEvent) -> Option<EventKind> {
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
        Some(EventKind::DeviceMiscounts {
            device,
            duration_s,
            extra_values: n as i16,
        })
    }

    /// The device and the optional duration of a refusal or miscount.
    fn device_spell(&mut self, e: &RawEvent) -> Option<(usize, Option<f64>)> {
        let device = e.device.as_ref()?;
        let index = self.device_index(device);
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
        let index = self.device_index(device);
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

    /// The site config's index of the device `device` names; a problem at
    /// `device` when the site has no such device.
    fn device_index(&mut self, device: &Spanned<String>) -> Option<usize> {
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
        index
    }
}

#[cfg(test)]
mod tests {
    use super::{Refusal, SimTable};
    use crate::scenario::EventKind;
    use crate::scenario::testing::{TANKS, demo_dir, messages, parse_here};

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
    fn sensor_and_device_mistakes_get_clear_messages() {
        let cases: &[(&str, &str)] = &[
            (
                "[[event]]\nat_s = 1.0\naction = \"sensor_sticks\"\ntank = \"FF-T12\"\nsensor = \"pressure\"\n",
                "tank \"FF-T12\" has no pressure sensor in the site config",
            ),
            (
                "[[event]]\nat_s = 1.0\naction = \"link_drops\"\ndevice = \"rtu-north\"\nduration_s = 8\n",
                "device \"rtu-north\" is not in the site config; use one of: rtu-east, rtu-west",
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
