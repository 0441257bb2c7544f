//! Engineering units a sensor may report in, and their factors to SI.
//!
//! Factors are exact by definition (the international foot and inch of 1959,
//! the avoirdupois pound, standard gravity, the US gallon of 231 in³ and the
//! 42-gallon oil barrel). Mass flows become volume flows at the tank's
//! liquid density, because the inventory balance works in volume.
//!
//! Left out: whether a unit suits the sensor it is given for (`validate`
//! checks that), and scaling raw register values (`types::Sensor`).

use crate::model::Density;

/// What a unit measures.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Quantity {
    Length,
    Pressure,
    /// Volume or mass flow, converted to m³/s.
    Flow,
    /// Temperature, converted to kelvin.
    Temperature,
}

impl Quantity {
    pub fn name(self) -> &'static str {
        match self {
            Quantity::Length => "length",
            Quantity::Pressure => "pressure",
            Quantity::Flow => "flow",
            Quantity::Temperature => "temperature",
        }
    }
}

/// A unit and how it converts.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Unit {
    quantity: Quantity,
    factor: Factor,
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Factor {
    /// SI value = reading times this.
    Fixed(f64),
    /// Mass flow: SI volume flow = reading times this (kg/s per unit) over the density.
    PerDensity(f64),
    /// SI value = reading times the first plus the second (temperatures,
    /// whose scales do not share a zero).
    Affine(f64, f64),
}

const PSI_IN_PA: f64 = 0.453_592_37 * 9.806_65 / (0.0254 * 0.0254);
const US_GALLON_IN_M3: f64 = 3.785_411_784e-3;

/// Every unit by name: (name, quantity, factor).
const UNITS: &[(&str, Quantity, Factor)] = &[
    ("m", Quantity::Length, Factor::Fixed(1.0)),
    ("cm", Quantity::Length, Factor::Fixed(0.01)),
    ("mm", Quantity::Length, Factor::Fixed(0.001)),
    ("ft", Quantity::Length, Factor::Fixed(0.3048)),
    ("in", Quantity::Length, Factor::Fixed(0.0254)),
    ("Pa", Quantity::Pressure, Factor::Fixed(1.0)),
    ("kPa", Quantity::Pressure, Factor::Fixed(1e3)),
    ("MPa", Quantity::Pressure, Factor::Fixed(1e6)),
    ("mbar", Quantity::Pressure, Factor::Fixed(100.0)),
    ("bar", Quantity::Pressure, Factor::Fixed(1e5)),
    ("psi", Quantity::Pressure, Factor::Fixed(PSI_IN_PA)),
    ("m3/s", Quantity::Flow, Factor::Fixed(1.0)),
    ("m3/h", Quantity::Flow, Factor::Fixed(1.0 / 3600.0)),
    ("L/s", Quantity::Flow, Factor::Fixed(1e-3)),
    ("L/min", Quantity::Flow, Factor::Fixed(1e-3 / 60.0)),
    (
        "gal/min",
        Quantity::Flow,
        Factor::Fixed(US_GALLON_IN_M3 / 60.0),
    ),
    (
        "bbl/h",
        Quantity::Flow,
        Factor::Fixed(42.0 * US_GALLON_IN_M3 / 3600.0),
    ),
    ("kg/s", Quantity::Flow, Factor::PerDensity(1.0)),
    ("kg/h", Quantity::Flow, Factor::PerDensity(1.0 / 3600.0)),
    ("t/h", Quantity::Flow, Factor::PerDensity(1000.0 / 3600.0)),
    // The degree Celsius is the kelvin offset by 273.15 K, and the degree
    // Fahrenheit is 5/9 K with 32 °F at 0 °C (both exact by definition).
    ("degC", Quantity::Temperature, Factor::Affine(1.0, 273.15)),
    (
        "degF",
        Quantity::Temperature,
        Factor::Affine(5.0 / 9.0, 273.15 - 32.0 * 5.0 / 9.0),
    ),
    ("K", Quantity::Temperature, Factor::Fixed(1.0)),
];

impl Unit {
    /// The unit of that name (case-sensitive: mPa is not MPa).
    pub fn parse(name: &str) -> Option<Self> {
        UNITS
            .iter()
            .find(|(n, _, _)| *n == name.trim())
            .map(|&(_, quantity, factor)| Self { quantity, factor })
    }

    /// The names of every unit of a quantity, for error messages.
    pub fn names(quantity: Quantity) -> Vec<&'static str> {
        UNITS
            .iter()
            .filter(|(_, q, _)| *q == quantity)
            .map(|(n, _, _)| *n)
            .collect()
    }

    pub fn quantity(&self) -> Quantity {
        self.quantity
    }

    /// Multiplier from this unit to SI (m, Pa, m³/s, K).
    pub fn si_factor(&self, density: Density) -> f64 {
        match self.factor {
            Factor::Fixed(f) | Factor::Affine(f, _) => f,
            Factor::PerDensity(f) => f / density.si(),
        }
    }

    /// What to add after the multiplier: zero but for temperatures.
    pub fn si_offset(&self) -> f64 {
        match self.factor {
            Factor::Affine(_, offset) => offset,
            _ => 0.0,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn factors_follow_their_definitions() {
        let water = Density::kg_per_cubic_metre(1000.0);
        let f = |name: &str| Unit::parse(name).unwrap().si_factor(water);
        assert_eq!(f("mm"), 0.001);
        assert_eq!(f("ft"), 0.3048);
        // 1 psi = 6894.757293168361 Pa (exact from the pound and the inch).
        assert!((f("psi") - 6_894.757_293_168_361).abs() < 1e-9);
        assert!((f("t/h") - 1.0 / 3600.0).abs() < 1e-18);
        assert!((f("bbl/h") * 3600.0 - 0.158_987_294_928).abs() < 1e-15);
        assert!(Unit::parse("furlong").is_none());
        assert_eq!(Unit::names(Quantity::Length), ["m", "cm", "mm", "ft", "in"]);
        // 212 °F is 100 °C is 373.15 K (definitions of the scales).
        let k = |name: &str, x: f64| {
            let u = Unit::parse(name).unwrap();
            x * u.si_factor(water) + u.si_offset()
        };
        assert!((k("degF", 212.0) - 373.15).abs() < 1e-12);
        assert!((k("degC", 100.0) - 373.15).abs() < 1e-12);
        assert_eq!(k("K", 300.0), 300.0);
    }
}
