//! A tank with its contents, and what flows out of a hole in it.
//!
//! A [`Vessel`] joins the geometry to the liquid's density, the ambient
//! pressure and, where the headspace holds a known vapour, that vapour's
//! properties. Given the present level and headspace pressure it decides
//! which equation applies at a hole:
//!
//! * surface above the hole: liquid, by the orifice equation with the
//!   hydrostatic head plus the headspace gauge pressure;
//! * surface at or below the hole and the headspace above ambient: vapour, by
//!   the ideal-gas nozzle equations (only if vapour properties are known);
//! * otherwise nothing flows.
//!
//! It also converts a pressure transmitter's reading into the headspace gauge
//! pressure, wherever the transmitter sits and whatever its reference.

use super::error::{ModelError, ModelResult, within};
use super::geometry::Geometry;
use super::orifice::{
    DischargeCoefficient, GasProperties, GasRegime, Hole, gas_mass_rate, liquid_mass_rate,
};
use super::units::{AbsolutePressure, Density, Length, Mass, MassRate, Pressure};

/// Liquid densities the model accepts, kg/m³: from liquid hydrogen (about
/// 71) to mercury (about 13 500), from memory. A figure outside is far more
/// likely a unit slip (g/cm³, lb/ft³) than a real liquid.
pub const DENSITY_RANGE: (f64, f64) = (50.0, 15_000.0);

/// Ambient pressures the model accepts, Pa absolute: from about 5 000 m above
/// sea level to a deep low-lying site in high pressure weather, from memory.
pub const AMBIENT_RANGE: (f64, f64) = (50_000.0, 110_000.0);

/// What a pressure transmitter reports.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum PressureReading {
    /// Relative to the ambient pressure.
    Gauge(Pressure),
    /// Relative to vacuum.
    Absolute(AbsolutePressure),
}

/// Where a pressure transmitter is mounted.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum PressureTap {
    /// In the vapour space: it reads the headspace pressure.
    Headspace,
    /// On the shell at this elevation: below the surface it also reads the
    /// liquid column above it.
    Submerged { elevation: Length },
}

/// The state of a tank at one moment: what the sensors say, converted.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TankState {
    /// Liquid level above the datum.
    pub level: Length,
    /// Headspace pressure relative to ambient (zero for an open vent).
    pub headspace: Pressure,
}

/// Which phase leaves through the hole.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Phase {
    /// Nothing flows: the surface is at or below the hole and the headspace
    /// is not above ambient (or its vapour is unknown).
    None,
    Liquid,
    Vapour(GasRegime),
}

/// The flow out of a hole at one moment.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Outflow {
    pub phase: Phase,
    pub rate: MassRate,
    /// The pressure that drives the flow: the liquid's gauge pressure at the
    /// hole, or the headspace gauge pressure for vapour.
    pub driving: Pressure,
}

/// A tank, what it holds, and what surrounds it.
#[derive(Debug, Clone, PartialEq)]
pub struct Vessel {
    geometry: Geometry,
    density: Density,
    ambient: AbsolutePressure,
    vapour: Option<GasProperties>,
}

impl Vessel {
    pub fn new(
        geometry: Geometry,
        density: Density,
        ambient: AbsolutePressure,
        vapour: Option<GasProperties>,
    ) -> ModelResult<Self> {
        within("liquid density", density.si(), DENSITY_RANGE, "kg/m³")?;
        within("ambient pressure", ambient.si(), AMBIENT_RANGE, "Pa")?;
        Ok(Self {
            geometry,
            density,
            ambient,
            vapour,
        })
    }

    pub fn geometry(&self) -> &Geometry {
        &self.geometry
    }

    pub fn density(&self) -> Density {
        self.density
    }

    pub fn ambient(&self) -> AbsolutePressure {
        self.ambient
    }

    pub fn vapour(&self) -> Option<&GasProperties> {
        self.vapour.as_ref()
    }

    /// Refuses a hole that is not on this tank.
    pub fn check_hole(&self, hole: &Hole) -> ModelResult<()> {
        let top = self.geometry.height_si();
        if hole.elevation().si() > top {
            return Err(ModelError::HoleAboveTank {
                hole_m: hole.elevation().si(),
                top_m: top,
            });
        }
        Ok(())
    }

    /// The headspace gauge pressure behind a transmitter reading, given the
    /// present level (needed for a submerged tap, which also sees the liquid
    /// column above it).
    pub fn headspace_pressure(
        &self,
        reading: PressureReading,
        tap: PressureTap,
        level: Length,
    ) -> Pressure {
        let at_tap = match reading {
            PressureReading::Gauge(p) => p,
            PressureReading::Absolute(p) => p - self.ambient,
        };
        match tap {
            PressureTap::Headspace => at_tap,
            PressureTap::Submerged { elevation } => {
                let column = (level - elevation).max(Length::ZERO);
                at_tap - self.density.head_pressure(column)
            }
        }
    }

    /// The liquid's gauge pressure at the hole: the headspace pressure plus
    /// the column above it; zero when the surface is at or below the hole.
    pub fn liquid_driving_pressure(&self, state: &TankState, hole: &Hole) -> Pressure {
        self.driving_pressure_at(state, hole, self.density)
    }

    fn driving_pressure_at(&self, state: &TankState, hole: &Hole, density: Density) -> Pressure {
        let column = state.level - hole.elevation();
        if column.si() <= 0.0 {
            return Pressure::ZERO;
        }
        (state.headspace + density.head_pressure(column)).max(Pressure::ZERO)
    }

    /// What flows out of `hole` in `state`, at discharge coefficient `cd`.
    pub fn outflow(&self, state: &TankState, hole: &Hole, cd: DischargeCoefficient) -> Outflow {
        self.outflow_at(state, hole, cd, self.density)
    }

    /// The same at another liquid density than the vessel's own: the
    /// density at the liquid's measured temperature. The caller keeps it
    /// within [`DENSITY_RANGE`].
    pub fn outflow_at(
        &self,
        state: &TankState,
        hole: &Hole,
        cd: DischargeCoefficient,
        density: Density,
    ) -> Outflow {
        if state.level > hole.elevation() {
            let driving = self.driving_pressure_at(state, hole, density);
            return Outflow {
                phase: if driving.si() > 0.0 {
                    Phase::Liquid
                } else {
                    Phase::None
                },
                rate: liquid_mass_rate(cd, hole.area(), density, driving),
                driving,
            };
        }
        if let Some(gas) = &self.vapour {
            let upstream = self.ambient + state.headspace;
            if let (rate, Some(regime)) =
                gas_mass_rate(cd, hole.area(), upstream, self.ambient, gas)
            {
                return Outflow {
                    phase: Phase::Vapour(regime),
                    rate,
                    driving: state.headspace,
                };
            }
        }
        Outflow {
            phase: Phase::None,
            rate: MassRate::ZERO,
            driving: Pressure::ZERO,
        }
    }

    /// The lowest level the liquid can drain to through `hole` with the
    /// headspace held at `headspace`: the hole itself, or higher where a
    /// vacuum in the headspace balances the column first.
    pub fn stop_level(&self, hole: &Hole, headspace: Pressure) -> Length {
        let suction = self.density.head_height((-headspace).max(Pressure::ZERO));
        (hole.elevation() + suction).min(self.geometry.height())
    }

    /// The mass of liquid between the level and the hole: all that can ever
    /// come out of it as liquid.
    pub fn liquid_above(&self, level: Length, hole: &Hole) -> Mass {
        let g = &self.geometry;
        let above = (g.volume_si(level.si()) - g.volume_si(hole.elevation().si())).max(0.0);
        Mass::kilograms(above * self.density.si())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::orifice::GasProperties;
    use crate::model::units::{MolarMass, Temperature};

    fn tank() -> Vessel {
        let g = Geometry::vertical_cylinder(Length::metres(4.0), Length::metres(6.0)).unwrap();
        Vessel::new(
            g,
            Density::kg_per_cubic_metre(1000.0),
            AbsolutePressure::pascals(100_000.0),
            Some(
                GasProperties::new(
                    MolarMass::g_per_mol(28.96),
                    1.4,
                    Temperature::kelvin(293.15),
                )
                .unwrap(),
            ),
        )
        .unwrap()
    }

    fn hole(z: f64) -> Hole {
        Hole::new(Length::millimetres(20.0), Length::metres(z)).unwrap()
    }

    #[test]
    fn transmitter_readings_become_headspace_gauge_pressure() {
        let v = tank();
        let level = Length::metres(3.0);
        // (reading, tap, expected headspace gauge pressure in Pa)
        let rho_g = 1000.0 * crate::model::units::STANDARD_GRAVITY;
        let cases = [
            (
                PressureReading::Gauge(Pressure::pascals(5000.0)),
                PressureTap::Headspace,
                5000.0,
            ),
            (
                PressureReading::Absolute(AbsolutePressure::pascals(105_000.0)),
                PressureTap::Headspace,
                5000.0,
            ),
            (
                PressureReading::Gauge(Pressure::pascals(5000.0 + 2.5 * rho_g)),
                PressureTap::Submerged {
                    elevation: Length::metres(0.5),
                },
                5000.0,
            ),
            (
                PressureReading::Absolute(AbsolutePressure::pascals(105_000.0 + 2.5 * rho_g)),
                PressureTap::Submerged {
                    elevation: Length::metres(0.5),
                },
                5000.0,
            ),
            // Tap above the surface: it reads the headspace only.
            (
                PressureReading::Gauge(Pressure::pascals(5000.0)),
                PressureTap::Submerged {
                    elevation: Length::metres(3.5),
                },
                5000.0,
            ),
        ];
        for (i, (reading, tap, expected)) in cases.into_iter().enumerate() {
            let got = v.headspace_pressure(reading, tap, level).si();
            assert!(
                (got - expected).abs() < 1e-9,
                "case {i}: {got} vs {expected}"
            );
        }
    }

    #[test]
    fn phase_follows_the_surface_and_the_headspace() {
        let v = tank();
        let cd = DischargeCoefficient::CONSERVATIVE;
        let state = |level: f64, kpa: f64| TankState {
            level: Length::metres(level),
            headspace: Pressure::kilopascals(kpa),
        };
        assert_eq!(
            v.outflow(&state(3.0, 0.0), &hole(1.0), cd).phase,
            Phase::Liquid
        );
        assert_eq!(
            v.outflow(&state(1.0, 0.0), &hole(1.0), cd).phase,
            Phase::None
        );
        assert_eq!(
            v.outflow(&state(0.5, 150.0), &hole(1.0), cd).phase,
            Phase::Vapour(GasRegime::Choked)
        );
        assert_eq!(
            v.outflow(&state(0.5, 10.0), &hole(1.0), cd).phase,
            Phase::Vapour(GasRegime::Subcritical)
        );
        // A vacuum stronger than the column: no liquid leaves.
        let out = v.outflow(&state(1.5, -10.0), &hole(1.0), cd);
        assert_eq!((out.phase, out.rate), (Phase::None, MassRate::ZERO));
        // The stop level is where that vacuum balances the column.
        let stop = v.stop_level(&hole(1.0), Pressure::kilopascals(-9.80665));
        assert!((stop.si() - 2.0).abs() < 1e-12);
    }

    #[test]
    fn implausible_densities_and_holes_are_refused() {
        let g = Geometry::sphere(Length::metres(3.0)).unwrap();
        let amb = AbsolutePressure::STANDARD_ATMOSPHERE;
        let err = Vessel::new(g.clone(), Density::kg_per_cubic_metre(0.85), amb, None).unwrap_err();
        assert!(err.to_string().contains("liquid density"), "{err}");
        assert!(
            Vessel::new(
                g,
                Density::kg_per_cubic_metre(850.0),
                AbsolutePressure::bar(10.0),
                None
            )
            .is_err()
        );
        let err = tank().check_hole(&hole(6.5)).unwrap_err();
        assert_eq!(
            err,
            ModelError::HoleAboveTank {
                hole_m: 6.5,
                top_m: 6.0
            }
        );
    }
}
