//! Liquid density as a function of temperature.
//!
//! A liquid expands as it warms, so a tank whose product cools shows a
//! falling level with no mass leaving. Where a tank has a temperature
//! sensor, the inventory balance works in mass at the measured density, and
//! the release figures use it too. Two ways to say how the density follows
//! temperature:
//!
//! * a volumetric expansion coefficient β at a reference temperature:
//!   ρ(T) = ρ_ref / (1 + β (T − T_ref)), the usual linear volume
//!   correction (from V(T) = V_ref (1 + β (T − T_ref)) at constant mass);
//! * a density-versus-temperature table from the product's data sheet,
//!   interpolated linearly and held flat beyond its ends.
//!
//! Left out: pressure (liquids are treated as incompressible) and any
//! product-specific correlation; a table covers those where they matter.

use super::error::{ModelError, ModelResult, finite, within};
use super::units::{Density, Temperature};
use super::vessel::DENSITY_RANGE;

/// The widest volumetric expansion coefficient accepted, per kelvin: liquid
/// propane is about 3e-3 /K and most liquids are below 1.5e-3 /K (from
/// memory); 1e-2 /K is past any liquid stored in a tank.
pub const MAX_EXPANSION_PER_K: f64 = 1e-2;

/// How a liquid's density follows its temperature.
#[derive(Debug, Clone, PartialEq)]
pub enum DensityModel {
    /// One density, whatever the temperature (no temperature sensor, or no
    /// expansion data).
    Constant(Density),
    /// ρ(T) = ρ_ref / (1 + β (T − T_ref)).
    Expansion {
        reference: Density,
        at: Temperature,
        per_kelvin: f64,
    },
    /// (temperature, density) points, temperatures strictly rising.
    Table(Vec<(Temperature, Density)>),
}

impl DensityModel {
    /// A linear expansion model; refuses implausible inputs.
    pub fn expansion(reference: Density, at: Temperature, per_kelvin: f64) -> ModelResult<Self> {
        within("liquid density", reference.si(), DENSITY_RANGE, "kg/m³")?;
        finite("reference temperature", at.si())?;
        within(
            "volumetric expansion coefficient",
            per_kelvin,
            (0.0, MAX_EXPANSION_PER_K),
            "1/K",
        )?;
        Ok(Self::Expansion {
            reference,
            at,
            per_kelvin,
        })
    }

    /// A table model; refuses fewer than two points, temperatures that do not
    /// rise, and densities outside the plausible range.
    pub fn table(points: Vec<(Temperature, Density)>) -> ModelResult<Self> {
        if points.len() < 2 {
            return Err(ModelError::DensityTableTooShort(points.len()));
        }
        for (i, (t, rho)) in points.iter().enumerate() {
            finite("table temperature", t.si())?;
            within("liquid density", rho.si(), DENSITY_RANGE, "kg/m³")?;
            if i > 0 && t.si() <= points[i - 1].0.si() {
                return Err(ModelError::DensityTableNotRising { index: i });
            }
        }
        Ok(Self::Table(points))
    }

    /// The density at `temperature`; the reference density when the
    /// temperature is unknown.
    pub fn at(&self, temperature: Option<Temperature>) -> Density {
        let Some(t) = temperature.filter(|t| t.si().is_finite()) else {
            return self.reference();
        };
        match self {
            Self::Constant(rho) => *rho,
            Self::Expansion {
                reference,
                at,
                per_kelvin,
            } => {
                let factor = 1.0 + per_kelvin * (t.si() - at.si());
                // A factor at or below zero would need a temperature some
                // hundreds of kelvin below the reference: not a liquid any
                // more. Hold the density at its plausible limit instead.
                let rho = if factor > 0.0 {
                    reference.si() / factor
                } else {
                    DENSITY_RANGE.1
                };
                Density::kg_per_cubic_metre(rho.clamp(DENSITY_RANGE.0, DENSITY_RANGE.1))
            }
            Self::Table(points) => {
                let x = t.si();
                let first = points[0];
                let last = points[points.len() - 1];
                if x <= first.0.si() {
                    return first.1;
                }
                if x >= last.0.si() {
                    return last.1;
                }
                let i = points.partition_point(|(pt, _)| pt.si() <= x);
                let (t0, r0) = points[i - 1];
                let (t1, r1) = points[i];
                let w = (x - t0.si()) / (t1.si() - t0.si());
                Density::kg_per_cubic_metre(r0.si() + w * (r1.si() - r0.si()))
            }
        }
    }

    /// The density to use without a temperature: the constant, the one at
    /// the reference temperature, or the table's first point.
    pub fn reference(&self) -> Density {
        match self {
            Self::Constant(rho) => *rho,
            Self::Expansion { reference, .. } => *reference,
            Self::Table(points) => points[0].1,
        }
    }

    /// Whether the density follows temperature at all.
    pub fn follows_temperature(&self) -> bool {
        !matches!(self, Self::Constant(_))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn expansion_follows_the_volume_correction() {
        // V(T) = V_ref (1 + β ΔT) at constant mass, so ρ = ρ_ref / (1 + β ΔT):
        // diesel-like, 845 kg/m³ at 15 °C, β = 8.3e-4 /K, at 35 °C.
        let m = DensityModel::expansion(
            Density::kg_per_cubic_metre(845.0),
            Temperature::celsius(15.0),
            8.3e-4,
        )
        .unwrap();
        let rho = m.at(Some(Temperature::celsius(35.0))).si();
        assert!((rho - 845.0 / (1.0 + 8.3e-4 * 20.0)).abs() < 1e-12);
        assert_eq!(m.at(None).si(), 845.0);
        assert!(m.follows_temperature());
    }

    #[test]
    fn tables_interpolate_and_hold_at_their_ends() {
        let c = Temperature::celsius;
        let d = Density::kg_per_cubic_metre;
        let m = DensityModel::table(vec![(c(0.0), d(810.0)), (c(40.0), d(778.0))]).unwrap();
        assert!((m.at(Some(c(20.0))).si() - 794.0).abs() < 1e-9);
        assert_eq!(m.at(Some(c(-30.0))).si(), 810.0);
        assert_eq!(m.at(Some(c(90.0))).si(), 778.0);
        assert!(DensityModel::table(vec![(c(10.0), d(800.0))]).is_err());
        assert!(DensityModel::table(vec![(c(10.0), d(800.0)), (c(10.0), d(790.0))]).is_err());
        assert!(DensityModel::expansion(d(800.0), c(15.0), 0.5).is_err());
    }
}
