//! Physical quantities as thin newtypes over `f64`, always in SI units.
//!
//! The model mixes lengths, pressures, densities and flows in one formula,
//! and the classic mistakes are a millimetre where a metre was meant, or a
//! gauge pressure where an absolute one was meant. Each quantity therefore has
//! its own type, built through a named constructor (`Length::millimetres`,
//! `Pressure::kilopascals`, ...) and read back in SI with `si()`.
//!
//! We chose hand-written newtypes over a units crate such as `uom`: the model
//! needs a dozen quantities and a handful of products, `uom`'s generic types
//! make error messages and compile times heavy for a team this size, and a
//! newtype per quantity already stops the mix-ups above at compile time.
//! Gauge and absolute pressure are two types on purpose: subtracting two
//! absolute pressures gives a gauge [`Pressure`], and only adding a gauge
//! pressure to an absolute one gives an absolute one back.
//!
//! Left out: validation. A quantity may hold any `f64`; the constructors of
//! the model types (`Tank`, `Hole`, ...) check ranges and name the culprit.

use std::fmt;
use std::ops::{Add, AddAssign, Div, Mul, Neg, Sub};

/// Standard acceleration of gravity, m/s² (the conventional value fixed by
/// the CGPM in 1901 and used by ISO 80000-3).
pub const STANDARD_GRAVITY: f64 = 9.806_65;

/// Molar gas constant, J/(mol·K) (exact since the 2019 SI redefinition).
pub const GAS_CONSTANT: f64 = 8.314_462_618_153_24;

macro_rules! quantity {
    ($(#[$doc:meta])* $name:ident, $unit:literal) => {
        $(#[$doc])*
        #[derive(Debug, Clone, Copy, PartialEq, PartialOrd, Default)]
        pub struct $name(f64);

        impl $name {
            /// The zero of this quantity.
            pub const ZERO: Self = Self(0.0);

            #[doc = concat!("Wraps a value that is already in ", $unit, ".")]
            pub const fn from_si(value: f64) -> Self {
                Self(value)
            }

            #[doc = concat!("The value in ", $unit, ".")]
            pub const fn si(self) -> f64 {
                self.0
            }

            /// True when the value is neither NaN nor infinite.
            pub fn is_finite(self) -> bool {
                self.0.is_finite()
            }

            /// The larger of two values (NaN loses, as with `f64::max`).
            pub fn max(self, other: Self) -> Self {
                Self(self.0.max(other.0))
            }

            /// The smaller of two values (NaN loses, as with `f64::min`).
            pub fn min(self, other: Self) -> Self {
                Self(self.0.min(other.0))
            }
        }

        impl Mul<f64> for $name {
            type Output = Self;
            fn mul(self, rhs: f64) -> Self {
                Self(self.0 * rhs)
            }
        }

        impl Div<f64> for $name {
            type Output = Self;
            fn div(self, rhs: f64) -> Self {
                Self(self.0 / rhs)
            }
        }

        /// The ratio of two values of the same quantity is a plain number.
        impl Div for $name {
            type Output = f64;
            fn div(self, rhs: Self) -> f64 {
                self.0 / rhs.0
            }
        }

        impl fmt::Display for $name {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                match f.precision() {
                    Some(p) => write!(f, "{:.*} {}", p, self.0, $unit),
                    None => write!(f, "{} {}", self.0, $unit),
                }
            }
        }
    };
}

quantity!(
    /// A length or an elevation above the tank's datum (its lowest point), in m.
    Length,
    "m"
);
quantity!(
    /// An area, in m².
    Area,
    "m²"
);
quantity!(
    /// A volume, in m³.
    Volume,
    "m³"
);
quantity!(
    /// A gauge pressure (relative to the ambient) or a pressure difference, in Pa.
    Pressure,
    "Pa"
);
quantity!(
    /// An absolute pressure, in Pa.
    AbsolutePressure,
    "Pa a"
);
quantity!(
    /// A mass density, in kg/m³.
    Density,
    "kg/m³"
);
quantity!(
    /// A mass, in kg.
    Mass,
    "kg"
);
quantity!(
    /// A mass flow rate, in kg/s.
    MassRate,
    "kg/s"
);
quantity!(
    /// A span of time, in s.
    TimeSpan,
    "s"
);
quantity!(
    /// A molar mass, in kg/mol.
    MolarMass,
    "kg/mol"
);
quantity!(
    /// A thermodynamic temperature, in K.
    Temperature,
    "K"
);

/// Sums and differences, for every quantity but absolute pressure: two
/// absolute pressures do not add up to anything physical.
macro_rules! additive {
    ($($name:ident),*) => {$(
    impl Add for $name {
            type Output = Self;
            fn add(self, rhs: Self) -> Self {
                Self(self.0 + rhs.0)
            }
        }

        impl AddAssign for $name {
            fn add_assign(&mut self, rhs: Self) {
                self.0 += rhs.0;
            }
        }

        impl Sub for $name {
            type Output = Self;
            fn sub(self, rhs: Self) -> Self {
                Self(self.0 - rhs.0)
            }
        }

        impl Neg for $name {
            type Output = Self;
            fn neg(self) -> Self {
                Self(-self.0)
            }
        }

    )*};
}

additive!(
    Length,
    Area,
    Volume,
    Pressure,
    Density,
    Mass,
    MassRate,
    TimeSpan,
    MolarMass,
    Temperature
);

impl Length {
    pub const fn metres(m: f64) -> Self {
        Self(m)
    }
    pub const fn millimetres(mm: f64) -> Self {
        Self(mm / 1000.0)
    }
    pub const fn as_millimetres(self) -> f64 {
        self.0 * 1000.0
    }
    /// The area of a circle of this diameter.
    pub fn circle_area(self) -> Area {
        Area(std::f64::consts::FRAC_PI_4 * self.0 * self.0)
    }
}

impl Area {
    pub const fn square_metres(m2: f64) -> Self {
        Self(m2)
    }
    /// The diameter of a circle of this area.
    pub fn circle_diameter(self) -> Length {
        Length((self.0 / std::f64::consts::FRAC_PI_4).sqrt())
    }
}

impl Volume {
    pub const fn cubic_metres(m3: f64) -> Self {
        Self(m3)
    }
    pub const fn litres(l: f64) -> Self {
        Self(l / 1000.0)
    }
}

impl Pressure {
    pub const fn pascals(pa: f64) -> Self {
        Self(pa)
    }
    pub const fn kilopascals(kpa: f64) -> Self {
        Self(kpa * 1000.0)
    }
    pub const fn bar(bar: f64) -> Self {
        Self(bar * 100_000.0)
    }
}

impl AbsolutePressure {
    /// The standard atmosphere, 101 325 Pa (ISO 2533).
    pub const STANDARD_ATMOSPHERE: Self = Self(101_325.0);

    pub const fn pascals(pa: f64) -> Self {
        Self(pa)
    }
    pub const fn bar(bar: f64) -> Self {
        Self(bar * 100_000.0)
    }
}

/// Absolute minus absolute is a gauge pressure (or a difference).
impl Sub<AbsolutePressure> for AbsolutePressure {
    type Output = Pressure;
    fn sub(self, rhs: AbsolutePressure) -> Pressure {
        Pressure(self.0 - rhs.0)
    }
}

/// Absolute plus gauge is absolute: how a gauge reading becomes absolute.
impl Add<Pressure> for AbsolutePressure {
    type Output = AbsolutePressure;
    fn add(self, rhs: Pressure) -> AbsolutePressure {
        AbsolutePressure(self.0 + rhs.0)
    }
}

impl Density {
    pub const fn kg_per_cubic_metre(rho: f64) -> Self {
        Self(rho)
    }
    /// The hydrostatic pressure of a column of this liquid of the given height.
    pub fn head_pressure(self, column: Length) -> Pressure {
        Pressure(self.0 * STANDARD_GRAVITY * column.0)
    }
    /// The height of a column of this liquid that exerts the given pressure.
    pub fn head_height(self, pressure: Pressure) -> Length {
        Length(pressure.0 / (self.0 * STANDARD_GRAVITY))
    }
}

impl Mass {
    pub const fn kilograms(kg: f64) -> Self {
        Self(kg)
    }
}

impl MassRate {
    pub const fn kg_per_second(kg_s: f64) -> Self {
        Self(kg_s)
    }
}

impl TimeSpan {
    pub const fn seconds(s: f64) -> Self {
        Self(s)
    }
    pub const fn minutes(min: f64) -> Self {
        Self(min * 60.0)
    }
    pub const fn hours(h: f64) -> Self {
        Self(h * 3600.0)
    }
}

impl MolarMass {
    pub const fn kg_per_mol(m: f64) -> Self {
        Self(m)
    }
    pub const fn g_per_mol(m: f64) -> Self {
        Self(m / 1000.0)
    }
}

impl Temperature {
    pub const fn kelvin(t: f64) -> Self {
        Self(t)
    }
    pub const fn celsius(t: f64) -> Self {
        Self(t + 273.15)
    }
}

impl Mul<Length> for Length {
    type Output = Area;
    fn mul(self, rhs: Length) -> Area {
        Area(self.0 * rhs.0)
    }
}

impl Mul<Length> for Area {
    type Output = Volume;
    fn mul(self, rhs: Length) -> Volume {
        Volume(self.0 * rhs.0)
    }
}

impl Mul<Density> for Volume {
    type Output = Mass;
    fn mul(self, rhs: Density) -> Mass {
        Mass(self.0 * rhs.0)
    }
}

impl Div<Density> for Mass {
    type Output = Volume;
    fn div(self, rhs: Density) -> Volume {
        Volume(self.0 / rhs.0)
    }
}

impl Mul<TimeSpan> for MassRate {
    type Output = Mass;
    fn mul(self, rhs: TimeSpan) -> Mass {
        Mass(self.0 * rhs.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn conversions_land_in_si() {
        assert_eq!(Length::millimetres(25.0).si(), 0.025);
        assert_eq!(Pressure::kilopascals(2.5).si(), 2500.0);
        assert_eq!(Pressure::bar(1.0).si(), 100_000.0);
        assert_eq!(Temperature::celsius(15.0).si(), 288.15);
        assert_eq!(TimeSpan::minutes(15.0).si(), 900.0);
        assert_eq!(MolarMass::g_per_mol(28.96).si(), 0.028_96);
    }

    #[test]
    fn gauge_and_absolute_combine_only_the_right_way() {
        let ambient = AbsolutePressure::STANDARD_ATMOSPHERE;
        let inside = ambient + Pressure::kilopascals(20.0);
        assert_eq!((inside - ambient).si(), 20_000.0);
    }

    #[test]
    fn circle_area_round_trips_to_its_diameter() {
        let d = Length::millimetres(50.0);
        assert!((d.circle_area().circle_diameter().si() - d.si()).abs() < 1e-15);
    }

    #[test]
    fn display_carries_the_unit() {
        assert_eq!(format!("{:.1}", Mass::kilograms(12.34)), "12.3 kg");
        assert_eq!(format!("{}", Length::metres(2.0)), "2 m");
    }
}
