//! What acquisition produces: timestamped readings with a quality flag.
//!
//! A reading that is not good keeps its flag and has no value, so nothing
//! downstream can use a bad number by accident.

use serde::Serialize;

/// Why a reading can or cannot be used.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Quality {
    /// Read and decoded, in range, changing as a live sensor does.
    Good,
    /// No answer: the link is down, the device timed out, or a previous
    /// request on this cycle failed.
    CommunicationLost,
    /// The device answered with a Modbus exception, or with data of the
    /// wrong size.
    DeviceError,
    /// Decoded, but outside the sensor's configured range.
    OutOfRange,
    /// Decoded, but not changed at all for longer than the sensor's
    /// `stuck_after_s`.
    Stuck,
    /// A float register held NaN or infinity.
    NotANumber,
    /// Decoded and in range, but further from the last good level than the
    /// tank's fastest possible change allows (see `acquire::plausible`): a
    /// glitch, a lost radar echo, a register half-written.
    ImplausibleStep,
}

impl Quality {
    pub fn name(self) -> &'static str {
        match self {
            Quality::Good => "good",
            Quality::CommunicationLost => "communication lost",
            Quality::DeviceError => "device error",
            Quality::OutOfRange => "out of range",
            Quality::Stuck => "stuck",
            Quality::NotANumber => "not a number",
            Quality::ImplausibleStep => "implausible step",
        }
    }

    /// The flag as the JSON of `leaktally poll`, the database and the log
    /// write it (serde's snake_case names).
    pub fn key(self) -> &'static str {
        match self {
            Quality::Good => "good",
            Quality::CommunicationLost => "communication_lost",
            Quality::DeviceError => "device_error",
            Quality::OutOfRange => "out_of_range",
            Quality::Stuck => "stuck",
            Quality::NotANumber => "not_a_number",
            Quality::ImplausibleStep => "implausible_step",
        }
    }

    /// Why a reading carries this flag, for the log.
    pub fn reason(self) -> &'static str {
        match self {
            Quality::Good => "a usable reading",
            Quality::CommunicationLost => "no answer from the device",
            Quality::DeviceError => "the device refused the read or answered wrongly",
            Quality::OutOfRange => "outside the range configured for the sensor",
            Quality::Stuck => "not changed at all for longer than stuck_after_s",
            Quality::NotANumber => "a float register held NaN or infinity",
            Quality::ImplausibleStep => {
                "further from the last good level than the tank can move in the time between them"
            }
        }
    }
}

/// One sensor value in SI units, or the reason there is none.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Reading {
    /// Present only when the quality is good.
    pub value: Option<f64>,
    pub quality: Quality,
}

impl Reading {
    pub fn good(value: f64) -> Self {
        Self {
            value: Some(value),
            quality: Quality::Good,
        }
    }

    pub fn bad(quality: Quality) -> Self {
        Self {
            value: None,
            quality,
        }
    }

    pub fn is_good(&self) -> bool {
        self.quality == Quality::Good
    }
}

/// Everything read for one tank in one poll cycle.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TankSample {
    /// Index into the config's tanks.
    #[serde(skip)]
    pub tank: usize,
    /// The tank's tag, shared (a sample is made for every tank every
    /// cycle: a copy of the tag each time would cost an allocation).
    pub tank_id: std::sync::Arc<str>,
    /// UTC, milliseconds since the Unix epoch: when the cycle's reads began.
    pub at_ms: i64,
    /// Liquid level above the tank bottom, m.
    pub level: Reading,
    /// Pressure as the transmitter reports it, Pa (gauge or absolute as
    /// configured); absent when no transmitter is mapped.
    pub pressure: Option<Reading>,
    /// Net transfer flow into the tank, m³/s; absent when not mapped.
    pub transfer: Option<Reading>,
    /// The liquid's temperature, K; absent when not mapped.
    #[serde(default)]
    pub temperature: Option<Reading>,
    /// The leak flag; absent when not mapped, `None` inside when unreadable.
    pub leak_flag: Option<Option<bool>>,
}

impl TankSample {
    /// A sample of `tank` with nothing read yet (a level flagged as a
    /// device error, nothing else mapped), to be filled in.
    pub fn empty(tank: &str) -> Self {
        Self {
            tank: 0,
            tank_id: tank.into(),
            at_ms: 0,
            level: Reading::bad(Quality::DeviceError),
            pressure: None,
            transfer: None,
            temperature: None,
            leak_flag: None,
        }
    }
}
