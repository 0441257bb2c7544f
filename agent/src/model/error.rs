//! The one error type of the physics core.
//!
//! Every variant says what is wrong with which input and how to put it right,
//! because these messages reach operators through the CLI and the config
//! checker unchanged. The model never panics on input; anything it cannot
//! compute comes back as one of these.

use thiserror::Error;

/// A number as a message quotes it: to 7 significant digits, plain when it
/// is of everyday size, in exponent form when Display would print hundreds
/// of digits (1e300 has 301).
pub fn short(x: f64) -> String {
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

/// Something the model was asked to work with is not physically meaningful.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum ModelError {
    #[error("{what} is {}, which is not a number; give a finite value", short(*value))]
    NotFinite { what: &'static str, value: f64 },

    #[error("{what} must be greater than zero (got {} {unit}); give a positive value", short(*value))]
    NotPositive {
        what: &'static str,
        value: f64,
        unit: &'static str,
    },

    #[error(
        "{what} must not be negative (got {} {unit}); measure it from the tank's lowest point",
        short(*value)
    )]
    Negative {
        what: &'static str,
        value: f64,
        unit: &'static str,
    },

    #[error(
        "{what} is {} {unit}, outside the plausible range {} to {} {unit}; check the value and its unit",
        short(*value),
        short(*min),
        short(*max)
    )]
    OutOfRange {
        what: &'static str,
        value: f64,
        min: f64,
        max: f64,
        unit: &'static str,
    },

    #[error(
        "discharge coefficient {} is outside 0.1 to 1; use 0.61 for a sharp-edged hole or 1.0 for the conservative figure", short(*_0)
    )]
    DischargeCoefficient(f64),

    #[error(
        "the hole is at {} m but the tank is only {} m tall; give the hole height above the tank bottom",
        short(*hole_m),
        short(*top_m)
    )]
    HoleAboveTank { hole_m: f64, top_m: f64 },

    #[error(
        "the level {} m is above the top of the tank ({} m); check the level sensor's scaling",
        short(*level_m),
        short(*top_m)
    )]
    LevelAboveTank { level_m: f64, top_m: f64 },

    #[error(
        "the volume {} m³ is more than the tank holds ({} m³); check the volume and the geometry",
        short(*volume_m3),
        short(*capacity_m3)
    )]
    VolumeAboveCapacity { volume_m3: f64, capacity_m3: f64 },

    #[error(
        "a calibration table needs at least two points (got {0}); list (level, volume) pairs from the tank's strapping table"
    )]
    TableTooShort(usize),

    #[error(
        "the calibration table must start at level 0 m (it starts at {} m); add the volume at the bottom as the first point", short(*_0)
    )]
    TableStart(f64),

    #[error(
        "the calibration table is not increasing at point {index}: {what} goes from {} to {}; \
         levels and volumes must both rise strictly from one point to the next",
        short(*previous),
        short(*next)
    )]
    TableNotIncreasing {
        index: usize,
        what: &'static str,
        previous: f64,
        next: f64,
    },

    #[error(
        ",
        short(*previous),
        short(*next)the heat capacity ratio must be greater than 1 (got {0}); air is 1.40, methane 1.31, propane 1.13"
    )]
    HeatCapacityRatio(f64),

    #[error(
        "a density table needs at least two (temperature, density) points (got {0}); list them from the product's data sheet"
    )]
    DensityTableTooShort(usize),

    #[error(
        "the density table's temperatures must rise strictly from one point to the next (point {index} does not); sort the points by temperature"
    )]
    DensityTableNotRising { index: usize },

    #[error(
        "samples must come in time order, but one at {next_ms} ms follows one at {previous_ms} ms; sort the readings by time"
    )]
    SamplesOutOfOrder { previous_ms: i64, next_ms: i64 },

    #[error(
        "the {what} did not settle within {steps} steps; this is a fault in leaktally, not in the inputs: please report it with the command that gave it"
    )]
    NotConverged { what: &'static str, steps: usize },
}

pub type ModelResult<T> = Result<T, ModelError>;

/// Checks that a value is a finite number.
pub(crate) fn finite(what: &'static str, value: f64) -> ModelResult<f64> {
    if value.is_finite() {
        Ok(value)
    } else {
        Err(ModelError::NotFinite { what, value })
    }
}

/// Checks that a value is a finite number greater than zero.
pub(crate) fn positive(what: &'static str, value: f64, unit: &'static str) -> ModelResult<f64> {
    if finite(what, value)? > 0.0 {
        Ok(value)
    } else {
        Err(ModelError::NotPositive { what, value, unit })
    }
}

/// Checks that a value is a finite number, zero or more.
pub(crate) fn non_negative(what: &'static str, value: f64, unit: &'static str) -> ModelResult<f64> {
    if finite(what, value)? >= 0.0 {
        Ok(value)
    } else {
        Err(ModelError::Negative { what, value, unit })
    }
}

/// Checks that a value is a finite number within `[min, max]`.
pub(crate) fn within(
    what: &'static str,
    value: f64,
    (min, max): (f64, f64),
    unit: &'static str,
) -> ModelResult<f64> {
    if (min..=max).contains(&finite(what, value)?) {
        Ok(value)
    } else {
        Err(ModelError::OutOfRange {
            what,
            value,
            min,
            max,
            unit,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Issue 11: an absurd value is quoted short, not as hundreds of digits.
    #[test]
    fn messages_quote_numbers_short() {
        assert_eq!(short(1e300), "1e300");
        assert_eq!(short(1e-300), "1e-300");
        assert_eq!(short(840.0), "840");
        assert_eq!(short(0.61), "0.61");
        assert_eq!(short(1.0 / 3.0), "0.3333333");
        let e = ModelError::OutOfRange {
            what: "liquid density",
            value: 1e300,
            min: 50.0,
            max: 15_000.0,
            unit: "kg/m³",
        };
        assert_eq!(
            e.to_string(),
            "liquid density is 1e300 kg/m³, outside the plausible range 50 to 15000 kg/m³; check the value and its unit"
        );
    }
}
