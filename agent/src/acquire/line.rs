//! One tank's readings of one cycle as a JSON line: what `leaktally poll`
//! prints, and the payload of the readings the daemon publishes to MQTT
//! (`crate::publish`), so both say a reading the same way.
//!
//! Left out: printing and publishing.

use crate::acquire::sample::{Reading, TankSample};
use crate::config::Config;
use serde::Serialize;

/// The version of `poll`'s JSON lines; fields are only ever added within a
/// version. 2: `tank` (was `tank_id`), `at` RFC 3339 UTC, the unit (and for
/// a pressure its reference) in every reading's name.
pub const FORMAT: u32 = 2;

/// One tank's readings in one cycle, as `poll` prints them: each reading
/// `{"value": ..., "quality": ...}` under a name that carries its unit, the
/// value present only when the quality is `good`.
#[derive(Debug, Serialize)]
pub struct Line<'a> {
    pub format: u32,
    pub tank: &'a str,
    /// When the cycle's reads began, RFC 3339 UTC.
    pub at: String,
    /// The same, ms since 1970 UTC.
    pub at_ms: i64,
    /// Liquid level above the tank bottom, m.
    pub level_m: Reading,
    /// The pressure transmitter's reading, Pa, relative to ambient: under
    /// this name when the transmitter is configured gauge (`absolute =
    /// false`). At its tap: the headspace, or the liquid column above a
    /// submerged tap as well (`pressure_tap`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub pressure_pa_gauge: Option<Reading>,
    /// The same, under this name when the transmitter reads absolute
    /// pressure (above a vacuum).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub pressure_pa_absolute: Option<Reading>,
    /// `headspace` or `submerged`; absent without a transmitter.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub pressure_tap: Option<&'static str>,
    /// Net transfer flow into the tank, m³/s; absent when not mapped.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub transfer_m3_s: Option<Reading>,
    /// The liquid's temperature, K; absent when not mapped.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub temperature_k: Option<Reading>,
    /// The leak flag; absent when not mapped, `null` when unreadable.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub leak_flag: Option<Option<bool>>,
}

impl<'a> Line<'a> {
    /// The line for `sample`, named by its tank's transmitter in `config`.
    pub fn of(sample: &'a TankSample, config: &Config) -> Self {
        let sensor = config
            .tanks
            .get(sample.tank)
            .filter(|t| *t.id == *sample.tank_id)
            .or_else(|| config.tanks.iter().find(|t| *t.id == *sample.tank_id))
            .and_then(|t| t.pressure.as_ref());
        let absolute = sensor.is_some_and(|s| s.absolute);
        Line {
            format: FORMAT,
            tank: &sample.tank_id,
            at: crate::report::rfc3339(sample.at_ms),
            at_ms: sample.at_ms,
            level_m: sample.level,
            pressure_pa_gauge: sample.pressure.filter(|_| !absolute),
            pressure_pa_absolute: sample.pressure.filter(|_| absolute),
            pressure_tap: sample.pressure.and(sensor).map(|s| match s.tap {
                crate::model::PressureTap::Headspace => "headspace",
                crate::model::PressureTap::Submerged { .. } => "submerged",
            }),
            transfer_m3_s: sample.transfer,
            temperature_k: sample.temperature,
            leak_flag: sample.leak_flag,
        }
    }
}
